//! A description of any kind of network (DESIGN §4), read onto the engine's layer graph: the
//! graph, the settings of each layer as written, and the tensors its weight file holds.

use std::path::{Path, PathBuf};

use plumb_engine::graph::{
    Add, Attention, BatchNorm, Conv, Dense, Embedding, Flatten, GlobalAvgPool, Graph, GraphBuilder,
    GraphError, Gru, LayerNorm, Lstm, Padding, Pool, RmsNorm, Rnn, Shape, ShapeError,
};
use plumb_engine::{Activation, Conventions};

use crate::file_tensors::INPUT_GRADIENT;
use crate::file_tensors::{FileTensor, file_tensors};
use crate::settings::{self, KeySpans, KindSettings, LayerSettings, Parsed};
use crate::walk::Walk;
use crate::{DescriptionError, Layout, MAX_PARAMETERS};

/// A parsed description of any kind of network, built into a [`Graph`].
#[derive(Debug)]
pub struct GraphDescription {
    /// The file it was read from (for messages).
    pub path: PathBuf,
    pub graph: Graph,
    /// The storage of dense layers (DESIGN §4.3).
    pub layout: Layout,
    /// Each `[[layer]]` as written, in order; `layers[j]` is `graph.nodes()[j]`.
    pub layers: Vec<LayerSettings>,
    /// The tensors the weight file holds, in layer order, and which graph tensors each one holds.
    pub files: Vec<FileTensor>,
}

impl GraphDescription {
    /// Reads a description file and builds its graph.
    pub fn read(path: &Path) -> Result<GraphDescription, DescriptionError> {
        let text = read_text(path)?;
        GraphDescription::parse(path, &text)
    }

    /// Parses a description from its text and builds its graph; `path` is used in messages only.
    pub fn parse(path: &Path, text: &str) -> Result<GraphDescription, DescriptionError> {
        let w = Walk::new(path, text);
        let parsed = settings::parse(&w)?;
        crate::description::check_dense(&w, &parsed)?;
        let graph = build(&w, &parsed)?;
        let files = file_tensors(&graph, &parsed.layers, parsed.layout);
        check_distinct(&w, &parsed, &files)?;
        Ok(GraphDescription {
            path: path.to_path_buf(),
            graph,
            layout: parsed.layout,
            layers: parsed.layers,
            files,
        })
    }

    /// Whether every layer is dense on a flat input: a description whose rules, messages, layouts
    /// and identity hash are those plumb gave before the layer graph.
    pub fn is_dense(&self) -> bool {
        matches!(self.graph.input(), Shape::Flat(_))
            && self
                .layers
                .iter()
                .all(|l| matches!(l.kind, KindSettings::Dense { .. }))
    }

    /// A dense description's canonical text, `comment` as its first lines: what its identity hash
    /// is taken of (the text the dense engine wrote, so baselines keep their hash); the
    /// conventions only where they depart from the defaults. `None` for other kinds.
    pub fn dense_text(&self, comment: &str) -> Option<String> {
        let Shape::Flat(inputs) = self.graph.input() else {
            return None;
        };
        if !self.is_dense() {
            return None;
        }
        let mut out = String::new();
        for line in comment.lines() {
            out.push_str(&format!("# {line}\n"));
        }
        let c = self.graph.loss_config();
        out.push_str(&format!("inputs = {inputs}\n"));
        out.push_str(&format!("loss = \"{}\"\n", c.loss.name()));
        out.push_str(&format!("l2 = {:?}\n", c.l2));
        let default = Conventions::default();
        if c.reduction != default.reduction {
            out.push_str(&format!("reduction = \"{}\"\n", c.reduction));
        }
        if c.l2_divisor != default.l2_divisor {
            out.push_str(&format!("l2-divisor = \"{}\"\n", c.l2_divisor));
        }
        if c.l2_on_bias != default.l2_on_bias {
            out.push_str(&format!("l2-on-bias = {}\n", c.l2_on_bias));
        }
        out.push_str(&format!("layout = \"{}\"\n", self.layout.name()));
        for layer in &self.layers {
            let KindSettings::Dense {
                units,
                weight,
                bias,
            } = &layer.kind
            else {
                return None;
            };
            out.push_str(&format!("\n[[layer]]\nunits = {units}\n"));
            out.push_str(&format!("activation = \"{}\"\n", layer.activation.name()));
            match layer.activation {
                Activation::LeakyRelu { slope } => out.push_str(&format!("slope = {slope:?}\n")),
                Activation::Elu { alpha } => out.push_str(&format!("alpha = {alpha:?}\n")),
                _ => {}
            }
            // A `name` prefixes the layer's tensors: the text names them as the file does.
            let (weight, bias) = match (&layer.name, self.layout) {
                (Some(n), Layout::Augmented) => (weight.clone().or_else(|| Some(n.clone())), None),
                (Some(n), _) => (
                    weight.clone().or_else(|| Some(format!("{n}.weight"))),
                    bias.clone().or_else(|| Some(format!("{n}.bias"))),
                ),
                (None, _) => (weight.clone(), bias.clone()),
            };
            let quote = |s: &str| format!("\"{}\"", s.replace('\\', "\\\\").replace('"', "\\\""));
            if let Some(w) = weight {
                out.push_str(&format!("weight = {}\n", quote(&w)));
            }
            if let Some(b) = bias {
                out.push_str(&format!("bias = {}\n", quote(&b)));
            }
        }
        Some(out)
    }
}

/// The UTF-8 text of a description file, within the size plumb reads.
pub(crate) fn read_text(path: &Path) -> Result<String, DescriptionError> {
    let err = |message: String| DescriptionError {
        path: path.to_path_buf(),
        line: None,
        column: None,
        message,
    };
    let bytes = crate::input::read_input(path, crate::MAX_DESCRIPTION_BYTES)
        .map_err(|e| err(format!("cannot read the network description: {e}")))?;
    String::from_utf8(bytes).map_err(|e| {
        let offset = e.utf8_error().valid_up_to();
        err(format!(
            "byte {offset} is not UTF-8; a network description is a UTF-8 TOML text file"
        ))
    })
}

/// Builds the graph layer by layer, refusing sizes plumb would not allocate before the engine
/// multiplies them, and mapping the engine's errors to the key and line they come from.
fn build(w: &Walk<'_>, p: &Parsed) -> Result<Graph, DescriptionError> {
    let mut b = GraphBuilder::new(p.input, p.loss);
    let mut total: u128 = 0;
    for (l, spans) in p.layers.iter().zip(&p.spans) {
        guard(w, &b.shape(), l, spans, &mut total)?;
        let name = l.name.as_deref();
        let act = l.activation;
        let pushed = match &l.kind {
            KindSettings::Dense { units, .. } => b.push(name, act, |s| Dense::new(*units, s)),
            KindSettings::Conv { settings, .. } => b.push(name, act, |s| Conv::new(settings, s)),
            KindSettings::Pool {
                op,
                dims,
                size,
                stride,
            } => b.push(name, act, |s| Pool::new(*op, *dims, *size, *stride, s)),
            KindSettings::GlobalAvgPool => b.push(name, act, GlobalAvgPool::new),
            KindSettings::Flatten => b.push(name, act, Flatten::new),
            KindSettings::BatchNorm { epsilon } => {
                b.push(name, act, |s| BatchNorm::new(*epsilon, s))
            }
            KindSettings::LayerNorm { epsilon } => {
                b.push(name, act, |s| LayerNorm::new(*epsilon, s))
            }
            KindSettings::RmsNorm { epsilon } => b.push(name, act, |s| RmsNorm::new(*epsilon, s)),
            KindSettings::Add { from } => b.push(name, act, |s| Add::new(from, s)),
            KindSettings::Embedding { size } => b.push(name, act, |s| Embedding::new(*size, s)),
            // The cell applies an rnn's activation; the graph adds none after it.
            KindSettings::Rnn { units, output, .. } => b.push(name, Activation::Identity, |s| {
                Rnn::new(*units, act, output, s)
            }),
            KindSettings::Lstm {
                units,
                output,
                gate_order,
                ..
            } => b.push(name, act, |s| Lstm::new(*units, gate_order, output, s)),
            KindSettings::Gru {
                units,
                output,
                gate_order,
                reset,
                ..
            } => b.push(name, act, |s| {
                Gru::new(*units, gate_order, reset, output, s)
            }),
            KindSettings::Attention { heads, causal, .. } => {
                b.push(name, act, |s| Attention::new(*heads, *causal, s))
            }
        };
        pushed.map_err(|e| graph_error(w, p, e))?;
    }
    b.finish().map_err(|e| graph_error(w, p, e))
}

/// Refuses a layer whose parameters or output would pass [`MAX_PARAMETERS`], from generous
/// upper bounds computed in u128 before the engine multiplies anything in usize.
fn guard(
    w: &Walk<'_>,
    input: &Shape,
    l: &LayerSettings,
    spans: &KeySpans,
    total: &mut u128,
) -> Result<(), DescriptionError> {
    let dims: Vec<u128> = input.dims().iter().map(|&d| d as u128).collect();
    let size: u128 = dims.iter().product();
    let last = *dims.last().unwrap_or(&1);
    let (params, out, key): (u128, u128, &str) = match &l.kind {
        KindSettings::Dense { units, .. } => {
            let u = *units as u128;
            (u * (last + 1), u * (size / last.max(1)), "units")
        }
        KindSettings::Conv { settings, .. } => {
            let c = settings.channels as u128;
            let k: u128 = settings.kernel.iter().map(|&k| k as u128).product();
            let pad = |a: usize| match settings.padding {
                Padding::Explicit(p) => 2 * p[a] as u128,
                Padding::Same => settings.dilation[a] as u128 * settings.kernel[a] as u128,
            };
            let positions: u128 = (0..2)
                .map(|a| {
                    let extent = if settings.dims == 1 && a == 0 {
                        1
                    } else {
                        dims.get(dims.len().saturating_sub(2 - a))
                            .copied()
                            .unwrap_or(1)
                    };
                    extent + pad(a)
                })
                .product();
            (c * dims[0] * k + c, c.max(dims[0]) * positions, "channels")
        }
        KindSettings::Embedding { size: e } => {
            let vocabulary = match *input {
                Shape::Tokens { vocabulary, .. } => vocabulary as u128,
                _ => 0,
            };
            (vocabulary * *e as u128, size * *e as u128, "size")
        }
        KindSettings::Rnn { units, .. }
        | KindSettings::Lstm { units, .. }
        | KindSettings::Gru { units, .. } => {
            let u = 4 * *units as u128;
            (u * (last.max(dims[0]) + u + 2), u * size, "units")
        }
        KindSettings::Attention { .. } => (4 * (size * size + size), size, "heads"),
        _ => (2 * size, size, "kind"),
    };
    *total += params;
    let too_many = *total > MAX_PARAMETERS as u128;
    if too_many || out > MAX_PARAMETERS as u128 {
        let what = if too_many {
            format!("makes the network larger than {MAX_PARAMETERS} parameters")
        } else {
            format!("would output more than {MAX_PARAMETERS} values per sample")
        };
        return Err(w.error(
            Some(spans.of(key)),
            format!(
                "layer {} ({}) {what}, more than plumb will allocate; check its sizes",
                l.number,
                l.kind_name()
            ),
        ));
    }
    Ok(())
}

/// The key a shape error is about.
fn shape_key(e: &ShapeError) -> &'static str {
    match e {
        ShapeError::Input { .. } => "kind",
        ShapeError::Zero { key }
        | ShapeError::Arity { key, .. }
        | ShapeError::Choice { key, .. } => key,
        ShapeError::KernelTooLarge { .. } => "kernel",
        ShapeError::WindowTooLarge { .. } => "size",
        ShapeError::SameNeedsStride1 { .. } => "padding",
        ShapeError::Epsilon { .. } => "epsilon",
        ShapeError::GateOrder { .. } => "gate-order",
        ShapeError::Heads { .. } => "heads",
    }
}

/// The engine's error with the file, the key's line and column.
fn graph_error(w: &Walk<'_>, p: &Parsed, e: GraphError) -> DescriptionError {
    let at = |layer: usize, key: &str| Some(p.spans[layer - 1].of(key));
    match &e {
        GraphError::Layer {
            layer,
            name,
            source,
        } => {
            let key = shape_key(source);
            let kind = p.layers[layer - 1].kind_name();
            let place = if key == "kind" {
                format!("layer {layer} (\"{name}\", {kind})")
            } else {
                format!("layer {layer} (\"{name}\", {kind}), `{key}`")
            };
            w.error(at(*layer, key), format!("{place}: {source}"))
        }
        GraphError::TapUnknown { layer, name, from } => {
            let later = p.layers[*layer..]
                .iter()
                .find(|l| l.graph_name() == *from)
                .map(|l| l.number);
            let message = match later {
                Some(k) => format!(
                    "layer {layer} (\"{name}\"): `from = \"{from}\"` names layer {k}, which comes after it; an add reads the output of an earlier layer: name one of the layers above it"
                ),
                None => e.to_string(),
            };
            w.error(at(*layer, "from"), message)
        }
        GraphError::TapShape { layer, .. } => w.error(at(*layer, "from"), e.to_string()),
        GraphError::DuplicateName { layer, .. } => w.error(at(*layer, "name"), e.to_string()),
        GraphError::SoftmaxHidden { layer, .. }
        | GraphError::SoftmaxShape { layer, .. }
        | GraphError::SoftmaxSingle { layer, .. } => {
            w.error(at(*layer, "activation"), e.to_string())
        }
        GraphError::ActivationParameter { layer, what, .. } => {
            let key = if what.contains("slope") {
                "slope"
            } else {
                "alpha"
            };
            w.error(at(*layer, key), e.to_string())
        }
        GraphError::LossNeedsProbabilities { .. } => {
            w.error(Some(p.loss_span.clone()), e.to_string())
        }
        GraphError::EmptyInput { .. } => w.error(Some(p.input_span.clone()), e.to_string()),
        GraphError::BadL2 { .. } => w.error(p.l2_span.clone(), e.to_string()),
        _ => w.error(None, e.to_string()),
    }
}

/// Two file tensors under one name would read one tensor twice.
fn check_distinct(w: &Walk<'_>, p: &Parsed, files: &[FileTensor]) -> Result<(), DescriptionError> {
    let dense = matches!(p.input, Shape::Flat(_))
        && p.layers
            .iter()
            .all(|l| matches!(l.kind, KindSettings::Dense { .. }));
    // A gradient file's tensor `input` is the input gradient (DESIGN §5): a parameter of that
    // name would be read as one, and `grad -o` would write a file `compare` refuses.
    if let Some(a) = files.iter().find(|f| f.name == INPUT_GRADIENT) {
        let spans = &p.spans[a.layer];
        let at = ["weight", "bias", "name"]
            .iter()
            .find_map(|k| spans.keys.iter().find(|(key, _)| key == k))
            .map_or(spans.header.clone(), |(_, r)| r.clone());
        return Err(w.error(
            Some(at),
            format!(
                "layer {}'s tensor would be named `{INPUT_GRADIENT}`, the name gradient files keep for the input gradient; give the layer another `name`",
                a.layer + 1
            ),
        ));
    }
    let mut first = std::collections::HashMap::with_capacity(files.len());
    for (i, a) in files.iter().enumerate() {
        if let Some(b) = first.insert(a.name.as_str(), i).map(|j| &files[j]) {
            let mut e = w.error(
                Some(p.spans[a.layer].header.clone()),
                format!(
                    "the tensor name `{}` is used twice: by layer {}'s {} and by layer {}'s {}; give each tensor its own name",
                    a.name,
                    b.layer + 1,
                    b.role_name(),
                    a.layer + 1,
                    a.role_name()
                ),
            );
            // A dense description's message names the line alone, as it always has.
            if dense {
                e.column = None;
            }
            return Err(e);
        }
    }
    Ok(())
}
