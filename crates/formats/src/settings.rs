//! The one parser of network descriptions: the top level (DESIGN §4.1) and the settings of every
//! layer kind as written (§4.2, §4.3), with the place of each key kept for errors found later,
//! when the graph is built. [`crate::GraphDescription`] and the dense [`crate::Description`] both
//! start here.

use std::ops::Range;

use plumb_engine::graph::{ConvSettings, LossConfig, PoolKind, Shape, Storage};
use plumb_engine::{Activation, Conventions, L2Divisor, Loss, Reduction};
use toml::de::{DeTable, DeValue};

use crate::layer_settings::{boolean, layer};
use crate::walk::{Walk, find, kind, list, suggest};
use crate::{DescriptionError, Layout};

/// Every layer kind a description may name, in the order docs/description.md lists them.
pub const KINDS: [&str; 18] = [
    "dense",
    "conv1d",
    "conv2d",
    "max-pool1d",
    "max-pool2d",
    "avg-pool1d",
    "avg-pool2d",
    "global-avg-pool",
    "flatten",
    "batch-norm",
    "layer-norm",
    "rms-norm",
    "add",
    "embedding",
    "rnn",
    "lstm",
    "gru",
    "attention",
];

const TOP_KEYS: [&str; 9] = [
    "input",
    "inputs",
    "loss",
    "reduction",
    "l2",
    "l2-divisor",
    "l2-on-bias",
    "layout",
    "layer",
];

/// One `[[layer]]` table as written, its defaults filled in.
#[derive(Clone, Debug, PartialEq)]
pub struct LayerSettings {
    /// 1-based, counting every `[[layer]]` table.
    pub number: usize,
    /// `name` as written; the graph's default is `layerJ`.
    pub name: Option<String>,
    /// The line of the `[[layer]]` header.
    pub line: usize,
    /// The activation the graph applies after the layer; an rnn's is its cell's (the graph then
    /// applies identity).
    pub activation: Activation,
    pub kind: KindSettings,
}

impl LayerSettings {
    /// The kind's name as a description writes it.
    pub fn kind_name(&self) -> &'static str {
        self.kind.name()
    }

    /// The layer's name in the graph: `name`, or `layerJ`.
    pub fn graph_name(&self) -> String {
        self.name
            .clone()
            .unwrap_or_else(|| format!("layer{}", self.number))
    }
}

/// The settings of each kind (DESIGN §4.2), defaults filled in. Choices the engine validates
/// (`output`, `gate-order`, `reset`) are kept as written, so its errors quote them.
#[derive(Clone, Debug, PartialEq)]
pub enum KindSettings {
    Dense {
        units: usize,
        /// `weight`: the weight (augmented: the whole) tensor's name in the file.
        weight: Option<String>,
        /// `bias`: the bias tensor's name (split layouts).
        bias: Option<String>,
    },
    /// conv1d and conv2d; `storage` is the weight's axis order in the file.
    Conv {
        settings: ConvSettings,
        storage: Storage,
    },
    Pool {
        op: PoolKind,
        /// 1 or 2.
        dims: usize,
        size: [usize; 2],
        stride: [usize; 2],
    },
    GlobalAvgPool,
    Flatten,
    BatchNorm {
        epsilon: f64,
    },
    LayerNorm {
        epsilon: f64,
    },
    RmsNorm {
        epsilon: f64,
    },
    Add {
        from: String,
    },
    Embedding {
        size: usize,
    },
    Rnn {
        units: usize,
        output: String,
        /// `storage = "transposed"`: the weights are stored in × out.
        transposed: bool,
    },
    Lstm {
        units: usize,
        output: String,
        gate_order: String,
        transposed: bool,
    },
    Gru {
        units: usize,
        output: String,
        gate_order: String,
        reset: String,
        transposed: bool,
    },
    Attention {
        heads: usize,
        causal: bool,
        transposed: bool,
    },
}

impl KindSettings {
    pub fn name(&self) -> &'static str {
        match self {
            KindSettings::Dense { .. } => "dense",
            KindSettings::Conv { settings, .. } if settings.dims == 1 => "conv1d",
            KindSettings::Conv { .. } => "conv2d",
            KindSettings::Pool { op, dims, .. } => match (op, dims) {
                (PoolKind::Max, 1) => "max-pool1d",
                (PoolKind::Max, _) => "max-pool2d",
                (PoolKind::Avg, 1) => "avg-pool1d",
                (PoolKind::Avg, _) => "avg-pool2d",
            },
            KindSettings::GlobalAvgPool => "global-avg-pool",
            KindSettings::Flatten => "flatten",
            KindSettings::BatchNorm { .. } => "batch-norm",
            KindSettings::LayerNorm { .. } => "layer-norm",
            KindSettings::RmsNorm { .. } => "rms-norm",
            KindSettings::Add { .. } => "add",
            KindSettings::Embedding { .. } => "embedding",
            KindSettings::Rnn { .. } => "rnn",
            KindSettings::Lstm { .. } => "lstm",
            KindSettings::Gru { .. } => "gru",
            KindSettings::Attention { .. } => "attention",
        }
    }
}

/// Where a layer's keys sit in the text.
#[derive(Clone, Debug)]
pub(crate) struct KeySpans {
    /// The `[[layer]]` table.
    pub header: Range<usize>,
    /// Each key written, with its value's span.
    pub keys: Vec<(String, Range<usize>)>,
}

impl KeySpans {
    /// The value of `key` if written, else the layer's header.
    pub fn of(&self, key: &str) -> Range<usize> {
        self.keys
            .iter()
            .find(|(k, _)| k == key)
            .map_or_else(|| self.header.clone(), |(_, s)| s.clone())
    }
}

/// A whole description as written.
#[derive(Debug)]
pub(crate) struct Parsed {
    pub input: Shape,
    /// The value of `input` (or `inputs`).
    pub input_span: Range<usize>,
    pub loss: LossConfig,
    pub loss_span: Range<usize>,
    pub l2_span: Option<Range<usize>>,
    pub layout: Layout,
    pub layers: Vec<LayerSettings>,
    pub spans: Vec<KeySpans>,
}

/// Parses the description's text: TOML syntax, the keys and their types and choices. Shapes are
/// judged when the graph is built.
pub(crate) fn parse(w: &Walk<'_>) -> Result<Parsed, DescriptionError> {
    let doc = DeTable::parse(w.text).map_err(|e| {
        let msg = e.message().trim().to_string();
        w.error(e.span(), format!("not valid TOML: {msg}"))
    })?;
    let table = doc.get_ref();
    w.reject_unknown(table.iter(), &TOP_KEYS, "at the top level")?;

    let (input, input_span) = input(w, table)?;
    let loss_entry = w.required(
        table,
        "loss",
        None,
        "the loss: \"cross-entropy\" or \"squared-error\"",
    )?;
    let loss_name = w.string(loss_entry, "loss")?;
    let loss = match loss_name.as_str() {
        "cross-entropy" => Loss::CrossEntropy,
        "squared-error" => Loss::SquaredError,
        other => {
            return Err(w.error(
                Some(loss_entry.1.span()),
                format!(
                    "unknown loss \"{other}\"{}; the losses are {}",
                    suggest(other, &Loss::NAMES),
                    list(&Loss::NAMES)
                ),
            ));
        }
    };
    let l2_entry = find(table, "l2");
    let l2 = match l2_entry {
        Some(e) => {
            let v = w.number(e, "l2")?;
            if !(v.is_finite() && v >= 0.0) {
                return Err(w.error(
                    Some(e.1.span()),
                    format!("l2 is {v}; it must be a finite number ≥ 0 (0 turns L2 off)"),
                ));
            }
            v
        }
        None => 0.0,
    };
    let c = conventions(w, table)?;
    let layout = match find(table, "layout") {
        Some(e) => {
            let name = w.string(e, "layout")?;
            let names: Vec<&str> = Layout::ALL.iter().map(Layout::name).collect();
            Layout::from_name(&name).ok_or_else(|| {
                w.error(
                    Some(e.1.span()),
                    format!(
                        "unknown layout \"{name}\"{}; the layouts are {}",
                        suggest(&name, &names),
                        list(&names)
                    ),
                )
            })?
        }
        None => Layout::Augmented,
    };

    let layer_entry = w.required(table, "layer", None, "the layers, as [[layer]] tables")?;
    let DeValue::Array(items) = layer_entry.1.get_ref() else {
        return Err(w.error(
            Some(layer_entry.0.span()),
            "`layer` must be an array of tables: write each layer as a [[layer]] section",
        ));
    };
    if items.is_empty() {
        return Err(w.error(
            Some(layer_entry.0.span()),
            "the network has no layers: add at least one [[layer]] section",
        ));
    }
    let mut layers = Vec::with_capacity(items.len());
    let mut spans = Vec::with_capacity(items.len());
    for (i, item) in items.iter().enumerate() {
        let DeValue::Table(t) = item.get_ref() else {
            return Err(w.error(
                Some(item.span()),
                format!(
                    "layer {} is not a table: write it as a [[layer]] section",
                    i + 1
                ),
            ));
        };
        let (settings, span) = layer(w, i + 1, item.span(), t, layout)?;
        layers.push(settings);
        spans.push(span);
    }
    Ok(Parsed {
        input,
        input_span,
        loss: LossConfig {
            loss,
            reduction: c.reduction,
            l2,
            l2_divisor: c.l2_divisor,
            l2_on_bias: c.l2_on_bias,
        },
        loss_span: loss_entry.1.span(),
        l2_span: l2_entry.map(|e| e.1.span()),
        layout,
        layers,
        spans,
    })
}

/// `input` as an int, a list, `{ steps, features }` or `{ tokens, vocabulary }`; or the older
/// `inputs = N`.
fn input(w: &Walk<'_>, table: &DeTable<'_>) -> Result<(Shape, Range<usize>), DescriptionError> {
    let (entry, key) = match (find(table, "input"), find(table, "inputs")) {
        (Some(_), Some(old)) => {
            return Err(w.error(
                Some(old.0.span()),
                "both `input` and `inputs` are given; keep one (`inputs = N` is the older spelling of `input = N`)",
            ));
        }
        (Some(e), None) => (e, "input"),
        (None, Some(e)) => (e, "inputs"),
        (None, None) => {
            return Err(w.error(
                None,
                "the key `input` is missing: add `input = …` with one sample's shape — a number of features (`input = 4`; the older `inputs = 4` is accepted too), [channels, length], [channels, height, width], { steps = …, features = … } or { tokens = …, vocabulary = … }",
            ));
        }
    };
    let span = entry.1.span();
    let shape = match (entry.1.get_ref(), key) {
        (DeValue::Integer(_), _) | (_, "inputs") => Shape::Flat(w.count(entry, key)?),
        (DeValue::Array(items), _) => {
            let dims = items
                .iter()
                .map(|v| w.count((entry.0, v), "input"))
                .collect::<Result<Vec<_>, _>>()?;
            match dims[..] {
                [n] => Shape::Flat(n),
                [channels, length] => Shape::Signal { channels, length },
                [channels, height, width] => Shape::Image {
                    channels,
                    height,
                    width,
                },
                _ => {
                    return Err(w.error(
                        Some(span),
                        format!(
                            "`input` has {} axes; one sample's shape is [features], [channels, length] or [channels, height, width]",
                            dims.len()
                        ),
                    ));
                }
            }
        }
        (DeValue::Table(t), _) => {
            let has = |k| find(t, k).is_some();
            let known: &[&str] = if has("tokens") || has("vocabulary") {
                &["tokens", "vocabulary"]
            } else {
                &["steps", "features"]
            };
            w.reject_unknown(t.iter(), known, "in `input`")?;
            let mut values = [0; 2];
            for (slot, k) in values.iter_mut().zip(known) {
                let e = find(t, k).ok_or_else(|| {
                    w.error(
                        Some(span.clone()),
                        format!(
                            "`input` has no `{k}`: write `input = {{ {} = …, {} = … }}`",
                            known[0], known[1]
                        ),
                    )
                })?;
                *slot = w.count(e, k)?;
            }
            if known[0] == "tokens" {
                Shape::Tokens {
                    steps: values[0],
                    vocabulary: values[1],
                }
            } else {
                Shape::Sequence {
                    steps: values[0],
                    width: values[1],
                }
            }
        }
        (other, _) => {
            return Err(w.error(
                Some(span),
                format!(
                    "`input` must be a whole number, a list of axis lengths or a table, but it is {}; write e.g. `input = 4` or `input = [1, 64]`",
                    kind(other)
                ),
            ));
        }
    };
    // One sample's values must be countable, and no more than a network may hold.
    let size = shape
        .dims()
        .iter()
        .try_fold(1usize, |a, &d| a.checked_mul(d));
    if size.is_none_or(|s| s > crate::MAX_PARAMETERS) {
        return Err(w.error(
            Some(span),
            format!(
                "one sample of this input holds more than {} values, more than plumb will allocate; check the axis lengths",
                crate::MAX_PARAMETERS
            ),
        ));
    }
    Ok((shape, span))
}

/// `reduction`, `l2-divisor` and `l2-on-bias`, each with its default when absent.
fn conventions(w: &Walk<'_>, table: &DeTable<'_>) -> Result<Conventions, DescriptionError> {
    let mut c = Conventions::default();
    if let Some(e) = find(table, "reduction") {
        let name = w.string(e, "reduction")?;
        let names = Reduction::ALL.map(|r| r.name());
        c.reduction = Reduction::from_name(&name).ok_or_else(|| {
            w.error(
                Some(e.1.span()),
                format!(
                    "unknown reduction \"{name}\"{}; the reductions are {} (\"mean\": the loss averaged over the samples, the default; \"sum\": summed)",
                    suggest(&name, &names),
                    list(&names)
                ),
            )
        })?;
    }
    if let Some(e) = find(table, "l2-divisor") {
        let name = match e.1.get_ref() {
            // `l2-divisor = 2` or `= 1` written as a number means the same as the string.
            DeValue::Integer(i) => i.as_str().to_string(),
            _ => w.string(e, "l2-divisor")?,
        };
        let names = L2Divisor::ALL.map(|d| d.name());
        c.l2_divisor = L2Divisor::from_name(&name).ok_or_else(|| {
            w.error(
                Some(e.1.span()),
                format!(
                    "unknown l2-divisor \"{name}\"{}; the L2 term is (λ / divisor) · Σ w², with the divisor one of {} (m is the number of samples; \"2m\" is the default)",
                    suggest(&name, &names),
                    list(&names)
                ),
            )
        })?;
    }
    if let Some(e) = find(table, "l2-on-bias") {
        c.l2_on_bias = boolean(w, e, "l2-on-bias")?;
    }
    Ok(c)
}
