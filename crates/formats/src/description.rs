//! The dense engine's network description: a TOML file naming dense layers, activations, loss, L2
//! strength and the weight file's layout (docs/description.md). It is read by the one parser of
//! every kind (`settings.rs`), then refused when a layer is not dense.

use std::fmt;
use std::path::{Path, PathBuf};

use plumb_engine::graph::Shape;
use plumb_engine::{Activation, Conventions, Network, NetworkError};
use thiserror::Error;

use crate::settings::{self, KindSettings, Parsed};
use crate::walk::Walk;

/// How a weight file stores each layer.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Layout {
    /// Tensor `layerJ`, units × (fan-in + 1), the bias weights in column 0.
    Augmented,
    /// `layerJ.weight`, units × fan-in, and `layerJ.bias` of length units.
    Split,
    /// `layerJ.weight`, fan-in × units (the x·W + b convention), and `layerJ.bias`.
    SplitTransposed,
}

impl Layout {
    pub const ALL: [Layout; 3] = [Layout::Augmented, Layout::Split, Layout::SplitTransposed];

    pub fn name(&self) -> &'static str {
        match self {
            Layout::Augmented => "augmented",
            Layout::Split => "split",
            Layout::SplitTransposed => "split-transposed",
        }
    }

    pub fn from_name(name: &str) -> Option<Layout> {
        Layout::ALL.into_iter().find(|l| l.name() == name)
    }
}

impl serde::Serialize for Layout {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(self.name())
    }
}

impl fmt::Display for Layout {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// One `[[layer]]` table as written.
#[derive(Clone, Debug, PartialEq)]
pub struct LayerDescription {
    pub units: usize,
    pub activation: Activation,
    /// Explicit name of the weight tensor in the weight file (overrides the layout's default).
    pub weight: Option<String>,
    /// Explicit name of the bias tensor (split layouts only).
    pub bias: Option<String>,
    /// The line of the `[[layer]]` header, for messages.
    pub line: usize,
}

/// A parsed and validated network description.
#[derive(Clone, Debug)]
pub struct Description {
    /// The file it was read from (for messages).
    pub path: PathBuf,
    pub layout: Layout,
    pub layers: Vec<LayerDescription>,
    /// The architecture the engine runs.
    pub network: Network,
}

/// What is wrong with a description, and where.
#[derive(Clone, Debug, Error, PartialEq)]
#[error("{}{}: {message}", path.display(), place(*line, *column))]
pub struct DescriptionError {
    pub path: PathBuf,
    /// 1-based line, when the problem has a place in the file.
    pub line: Option<usize>,
    pub column: Option<usize>,
    pub message: String,
}

fn place(line: Option<usize>, column: Option<usize>) -> String {
    match (line, column) {
        (Some(l), Some(c)) => format!(":{l}:{c}"),
        (Some(l), None) => format!(":{l}"),
        _ => String::new(),
    }
}

/// The largest network plumb accepts: 2²⁶ parameters (512 MiB per copy in f64; a check holds a few
/// copies), far beyond any hand-written network, and a guard against a typo that would ask for
/// terabytes.
pub const MAX_PARAMETERS: usize = 1 << 26;

impl Description {
    /// Reads and validates a description file of dense layers. A file with other kinds is
    /// refused, naming the first such layer: the commands that take a `Description` run the dense
    /// engine ([`crate::GraphDescription`] reads every kind).
    pub fn read(path: &Path) -> Result<Description, DescriptionError> {
        let text = crate::graph_description::read_text(path)?;
        Description::parse(path, &text)
    }

    /// Parses and validates a description from its text; `path` is used in messages only.
    pub fn parse(path: &Path, text: &str) -> Result<Description, DescriptionError> {
        let w = Walk::new(path, text);
        let parsed = settings::parse(&w)?;
        dense(&w, parsed)
    }

    /// The number of input features.
    pub fn inputs(&self) -> usize {
        self.network.inputs()
    }

    /// The description as TOML text (used by the demo to write its example files).
    pub fn to_toml(&self, comment: &str) -> String {
        let mut out = String::new();
        for line in comment.lines() {
            out.push_str(&format!("# {line}\n"));
        }
        let net = &self.network;
        out.push_str(&format!("inputs = {}\n", net.inputs()));
        out.push_str(&format!("loss = \"{}\"\n", net.loss().name()));
        out.push_str(&format!("l2 = {:?}\n", net.l2()));
        // The conventions only when they depart from the defaults: the text is what a baseline's
        // description hash is taken of, and descriptions written before these keys keep theirs.
        let c = net.conventions();
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
            out.push_str(&format!("\n[[layer]]\nunits = {}\n", layer.units));
            out.push_str(&format!("activation = \"{}\"\n", layer.activation.name()));
            match layer.activation {
                Activation::LeakyRelu { slope } => out.push_str(&format!("slope = {slope:?}\n")),
                Activation::Elu { alpha } => out.push_str(&format!("alpha = {alpha:?}\n")),
                _ => {}
            }
            if let Some(w) = &layer.weight {
                out.push_str(&format!("weight = {}\n", quote(w)));
            }
            if let Some(b) = &layer.bias {
                out.push_str(&format!("bias = {}\n", quote(b)));
            }
        }
        out
    }
}

fn quote(s: &str) -> String {
    format!("\"{}\"", s.replace('\\', "\\\\").replace('"', "\\\""))
}

/// The dense engine's description from the one parser's result: every layer dense, the input
/// flat. The checks and messages are the dense engine's own.
fn dense(w: &Walk<'_>, parsed: Parsed) -> Result<Description, DescriptionError> {
    if let Some((l, spans)) = parsed
        .layers
        .iter()
        .zip(&parsed.spans)
        .find(|(l, _)| !matches!(l.kind, KindSettings::Dense { .. }))
    {
        return Err(w.error(
            Some(spans.of("kind")),
            format!(
                "layer {} is a {} layer (line {}); this command does not take {} layers yet, only dense ones: check such a network with the commands that read any kind",
                l.number,
                l.kind_name(),
                l.line,
                l.kind_name()
            ),
        ));
    }
    let Shape::Flat(inputs) = parsed.input else {
        return Err(w.error(
            Some(parsed.input_span.clone()),
            format!(
                "the input is {}; this command does not take that input yet, only a number of features",
                parsed.input
            ),
        ));
    };
    let mut layers = Vec::with_capacity(parsed.layers.len());
    for l in &parsed.layers {
        let KindSettings::Dense {
            units,
            weight,
            bias,
        } = &l.kind
        else {
            unreachable!("checked above");
        };
        // A `name` prefixes the layer's tensors as it does in the graph.
        let (weight, bias) = match (&l.name, parsed.layout) {
            (Some(n), Layout::Augmented) => (weight.clone().or_else(|| Some(n.clone())), None),
            (Some(n), _) => (
                weight.clone().or_else(|| Some(format!("{n}.weight"))),
                bias.clone().or_else(|| Some(format!("{n}.bias"))),
            ),
            (None, _) => (weight.clone(), bias.clone()),
        };
        layers.push(LayerDescription {
            units: *units,
            activation: l.activation,
            weight,
            bias,
            line: l.line,
        });
    }
    let spans = &parsed.spans;

    let mut parameters: usize = 0;
    let mut fan_in = inputs;
    for (i, layer) in layers.iter().enumerate() {
        let count = layer
            .units
            .checked_mul(fan_in + 1)
            .and_then(|c| c.checked_add(parameters));
        match count {
            Some(c) if c <= MAX_PARAMETERS => parameters = c,
            _ => {
                return Err(w.error(
                    Some(spans[i].of("units")),
                    format!(
                        "layer {} makes the network larger than {} parameters, more than plumb will allocate; check the unit counts",
                        i + 1,
                        MAX_PARAMETERS
                    ),
                ));
            }
        }
        fan_in = layer.units;
    }

    let spec: Vec<(usize, Activation)> = layers.iter().map(|l| (l.units, l.activation)).collect();
    let loss = parsed.loss;
    let network = Network::new(inputs, &spec, loss.loss, loss.l2)
        .map_err(|e| {
            let span = match &e {
                NetworkError::NoInputs => Some(parsed.input_span.clone()),
                NetworkError::NoUnits { layer } => Some(spans[layer - 1].of("units")),
                NetworkError::SoftmaxHidden { layer, .. }
                | NetworkError::SoftmaxSingleUnit { layer }
                | NetworkError::BadActivationParameter { layer, .. } => {
                    Some(spans[layer - 1].of("activation"))
                }
                NetworkError::LossNeedsProbabilities { .. } => Some(parsed.loss_span.clone()),
                NetworkError::BadL2 { .. } | NetworkError::NoLayers => None,
            };
            w.error(span, e.to_string())
        })?
        .with_conventions(Conventions {
            reduction: loss.reduction,
            l2_divisor: loss.l2_divisor,
            l2_on_bias: loss.l2_on_bias,
        });

    let desc = Description {
        path: w.path.to_path_buf(),
        layout: parsed.layout,
        layers,
        network,
    };
    // Two layers (or a weight and a bias) under one name would read one tensor twice.
    let names = crate::layout::expected_tensors(&desc, desc.layout);
    let mut first = std::collections::HashMap::with_capacity(names.len());
    for (i, a) in names.iter().enumerate() {
        if let Some(b) = first.insert(a.name.as_str(), i).map(|j| &names[j]) {
            let line = desc.layers[a.layer].line;
            return Err(DescriptionError {
                path: w.path.to_path_buf(),
                line: Some(line),
                column: None,
                message: format!(
                    "the tensor name `{}` is used twice: by layer {}'s {} and by layer {}'s {}; give each tensor its own name",
                    a.name,
                    b.layer + 1,
                    b.role.name(),
                    a.layer + 1,
                    a.role.name()
                ),
            });
        }
    }
    Ok(desc)
}

#[cfg(test)]
mod tests {
    use super::*;
    use plumb_engine::{L2Divisor, Reduction};

    fn parse(text: &str) -> Result<Description, DescriptionError> {
        Description::parse(Path::new("net.toml"), text)
    }

    const GOOD: &str = r#"
inputs = 4
loss = "cross-entropy"
l2 = 0.01

[[layer]]
units = 5
activation = "leaky-relu"
slope = 0.2

[[layer]]
units = 3
activation = "softmax"
"#;

    #[test]
    fn reads_the_example() {
        let d = parse(GOOD).unwrap();
        assert_eq!(d.inputs(), 4);
        assert_eq!(d.layout, Layout::Augmented);
        assert_eq!(d.network.l2(), 0.01);
        assert_eq!(d.layers[0].activation, Activation::LeakyRelu { slope: 0.2 });
        assert_eq!(d.layers[1].line, 11);
        assert_eq!(d.network.parameters(), 5 * 5 + 3 * 6);
    }

    #[test]
    fn round_trips_through_its_own_text() {
        let d = parse(GOOD).unwrap();
        let again = parse(&d.to_toml("generated")).unwrap();
        assert_eq!(again.network, d.network);
        assert_eq!(again.layout, d.layout);
    }

    #[test]
    fn unknown_key_names_the_key_the_line_and_the_nearest_one() {
        let e = parse(&GOOD.replace("activation = \"softmax\"", "activaton = \"softmax\""))
            .unwrap_err();
        assert_eq!(e.line, Some(13));
        assert!(e.message.contains("`activaton`"), "{e}");
        assert!(e.message.contains("did you mean `activation`"), "{e}");
        assert!(e.to_string().starts_with("net.toml:13:1:"), "{e}");
    }

    #[test]
    fn rule_violations_point_at_their_line() {
        let e = parse(&GOOD.replace("units = 5", "units = 0")).unwrap_err();
        assert_eq!(e.line, Some(7));
        assert!(e.message.contains("0 units"), "{e}");

        let e = parse(
            &GOOD
                .replace("\"leaky-relu\"", "\"softmax\"")
                .replace("slope = 0.2\n", ""),
        )
        .unwrap_err();
        assert_eq!(e.line, Some(8));
        assert!(
            e.message.contains("only allowed on the output layer"),
            "{e}"
        );

        let e = parse(&GOOD.replace("\"softmax\"", "\"identity\"")).unwrap_err();
        assert_eq!(e.line, Some(3));
        assert!(
            e.message.contains("cross-entropy needs sigmoid or softmax"),
            "{e}"
        );

        let e = parse(&GOOD.replace("\"softmax\"", "\"softmx\"")).unwrap_err();
        assert!(e.message.contains("did you mean `softmax`"), "{e}");

        let e = parse(&GOOD.replace("slope = 0.2", "alpha = 0.2")).unwrap_err();
        assert!(e.message.contains("`alpha` belongs to elu"), "{e}");
    }

    #[test]
    fn type_and_syntax_errors() {
        let e = parse(&GOOD.replace("inputs = 4", "inputs = \"4\"")).unwrap_err();
        assert!(e.message.contains("must be a whole number"), "{e}");
        let e = parse(&GOOD.replace("inputs = 4", "inputs = -4")).unwrap_err();
        assert!(e.message.contains("positive"), "{e}");
        let e = parse(&GOOD.replace("inputs = 4", "inputs = 4 4")).unwrap_err();
        assert!(e.message.starts_with("not valid TOML"), "{e}");
        assert_eq!(e.line, Some(2));
        let e = parse(&GOOD.replace("inputs = 4\n", "")).unwrap_err();
        assert!(e.message.contains("`input` is missing"), "{e}");
        let e = parse(&GOOD.replace("units = 3", "units = 3000000000")).unwrap_err();
        assert!(
            e.message.contains("beyond") || e.message.contains("larger than"),
            "{e}"
        );
    }

    #[test]
    fn a_bias_name_needs_a_split_layout() {
        let text = GOOD.replace(
            "units = 3\n",
            "units = 3\nweight = \"out.w\"\nbias = \"out.b\"\n",
        );
        let e = parse(&text).unwrap_err();
        assert!(e.message.contains("augmented layout keeps the bias"), "{e}");
        let d = parse(&format!("layout = \"split\"\n{text}")).unwrap();
        assert_eq!(d.layers[1].bias.as_deref(), Some("out.b"));
    }

    #[test]
    fn tensor_names_must_be_distinct() {
        let text = format!("layout = \"split\"\n{GOOD}")
            .replace("units = 3\n", "units = 3\nweight = \"layer1.weight\"\n");
        let e = parse(&text).unwrap_err();
        assert!(e.message.contains("`layer1.weight` is used twice"), "{e}");
        assert_eq!(e.line, Some(12));
        let text = format!("layout = \"split\"\n{GOOD}")
            .replace("units = 3\n", "units = 3\nweight = \"w\"\nbias = \"w\"\n");
        assert!(parse(&text).is_err());
    }

    #[test]
    fn conventions_are_read_and_default_to_mean_2m_no_bias() {
        let d = parse(GOOD).unwrap();
        assert_eq!(d.network.conventions(), Conventions::default());
        let text = format!("reduction = \"sum\"\nl2-divisor = \"2\"\nl2-on-bias = true\n{GOOD}");
        let d = parse(&text).unwrap();
        let c = d.network.conventions();
        assert_eq!(c.reduction, Reduction::Sum);
        assert_eq!(c.l2_divisor, L2Divisor::Two);
        assert!(c.l2_on_bias);
        let again = parse(&d.to_toml("")).unwrap();
        assert_eq!(again.network, d.network);
        // A number for the divisor reads as the same name.
        let d = parse(&format!("l2-divisor = 1\n{GOOD}")).unwrap();
        assert_eq!(d.network.conventions().l2_divisor, L2Divisor::One);
    }

    #[test]
    fn default_conventions_leave_the_canonical_text_unchanged() {
        // Baselines hash this text: a description written before the keys existed, and the same
        // one with the defaults spelled out, must give the same text.
        let plain = parse(GOOD).unwrap().to_toml("");
        let spelled =
            format!("reduction = \"mean\"\nl2-divisor = \"2m\"\nl2-on-bias = false\n{GOOD}");
        assert_eq!(parse(&spelled).unwrap().to_toml(""), plain);
        assert!(!plain.contains("reduction") && !plain.contains("l2-divisor"));
    }

    #[test]
    fn convention_errors_name_the_key_the_line_and_the_fix() {
        let e = parse(&format!("reduction = \"sun\"\n{GOOD}")).unwrap_err();
        assert_eq!(e.line, Some(1));
        assert!(e.message.contains("did you mean `sum`"), "{e}");
        let e = parse(&format!("\nl2-divisor = \"2M\"\n{GOOD}")).unwrap_err();
        assert_eq!(e.line, Some(2));
        assert!(e.message.contains("`2m`"), "{e}");
        let e = parse(&format!("l2-on-bias = \"yes\"\n{GOOD}")).unwrap_err();
        assert!(e.message.contains("true or false"), "{e}");
        let e = parse(&format!("l2-divisr = \"2\"\n{GOOD}")).unwrap_err();
        assert!(e.message.contains("did you mean `l2-divisor`"), "{e}");
    }
}
