//! What is wrong with a description and where ([`DescriptionError`]), the weight file's layout of
//! dense layers ([`Layout`]), and the rules a description of dense layers on a flat input keeps
//! before its graph is built, with the messages plumb has always given for them (a layer's units,
//! softmax on the output layer only and over more than one unit, activation parameters, a loss
//! that needs probabilities, λ, the parameter limit, distinct tensor names).

use std::fmt;
use std::path::PathBuf;

use plumb_engine::Activation;
use plumb_engine::graph::Shape;
use thiserror::Error;

use crate::settings::{KindSettings, Parsed};
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

/// The rules of a description of dense layers on a flat input, checked on the parser's result
/// before the graph is built (the graph's builder would refuse the same networks, in its own
/// words). Other descriptions pass.
pub(crate) fn check_dense(w: &Walk<'_>, parsed: &Parsed) -> Result<(), DescriptionError> {
    let Shape::Flat(inputs) = parsed.input else {
        return Ok(());
    };
    let mut layers = Vec::with_capacity(parsed.layers.len());
    for l in &parsed.layers {
        let KindSettings::Dense { units, .. } = l.kind else {
            return Ok(());
        };
        layers.push((units, l.activation));
    }
    let spans = &parsed.spans;

    let mut parameters: usize = 0;
    let mut fan_in = inputs;
    for (i, &(units, _)) in layers.iter().enumerate() {
        let count = units
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
        fan_in = units;
    }

    if layers.is_empty() {
        return Err(w.error(
            None,
            "the network has no layers: add at least one [[layer]]",
        ));
    }
    if inputs == 0 {
        return Err(w.error(
            Some(parsed.input_span.clone()),
            "`inputs` is 0: a network needs at least one input feature",
        ));
    }
    let l2 = parsed.loss.l2;
    if !(l2.is_finite() && l2 >= 0.0) {
        return Err(w.error(None, format!("l2 is {l2}; it must be a finite number ≥ 0")));
    }
    let last = layers.len();
    for (i, &(units, activation)) in layers.iter().enumerate() {
        let layer = i + 1;
        if units == 0 {
            return Err(w.error(
                Some(spans[i].of("units")),
                format!("layer {layer} has 0 units: every layer needs at least one"),
            ));
        }
        let at = Some(spans[i].of("activation"));
        let bad = |what: &str, value: f64, rule: &str| {
            w.error(
                at.clone(),
                format!("layer {layer}: {what} is {value}; {rule}"),
            )
        };
        if let Err((what, value, rule)) = activation.check_parameter() {
            return Err(bad(what, value, rule));
        }
        match activation {
            Activation::Softmax if layer != last => {
                return Err(w.error(
                    at.clone(),
                    format!(
                        "layer {layer} uses softmax, which is only allowed on the output layer (layer {last}); use another activation there"
                    ),
                ));
            }
            Activation::Softmax if units == 1 => {
                return Err(w.error(
                    at.clone(),
                    format!(
                        "layer {layer} is a softmax over a single unit, which is always 1; use sigmoid for one output"
                    ),
                ));
            }
            _ => {}
        }
    }
    let output = layers[last - 1].1;
    if !parsed.loss.loss.accepts(output) {
        return Err(w.error(
            Some(parsed.loss_span.clone()),
            format!(
                "cross-entropy needs sigmoid or softmax outputs, but the output layer uses {output}; change the output activation or use squared-error"
            ),
        ));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use std::path::Path;

    use super::*;
    use crate::{GraphDescription, KindSettings};
    use plumb_engine::{L2Divisor, Reduction};

    fn parse(text: &str) -> Result<GraphDescription, DescriptionError> {
        GraphDescription::parse(Path::new("net.toml"), text)
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
        assert_eq!(d.graph.input(), Shape::Flat(4));
        assert_eq!(d.layout, Layout::Augmented);
        assert_eq!(d.graph.loss_config().l2, 0.01);
        assert_eq!(d.layers[0].activation, Activation::LeakyRelu { slope: 0.2 });
        assert_eq!(d.layers[1].line, 11);
        assert_eq!(d.graph.parameters(), 5 * 5 + 3 * 6);
    }

    #[test]
    fn round_trips_through_its_own_text() {
        let d = parse(GOOD).unwrap();
        let again = parse(&d.dense_text("generated").unwrap()).unwrap();
        assert_eq!(again.dense_text(""), d.dense_text(""));
        assert_eq!(again.graph.loss_config(), d.graph.loss_config());
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
        let KindSettings::Dense { bias, .. } = &d.layers[1].kind else {
            panic!("a dense layer")
        };
        assert_eq!(bias.as_deref(), Some("out.b"));
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
        let c = d.graph.loss_config();
        assert_eq!(
            (c.reduction, c.l2_divisor, c.l2_on_bias),
            (Reduction::Mean, L2Divisor::TwoM, false)
        );
        let text = format!("reduction = \"sum\"\nl2-divisor = \"2\"\nl2-on-bias = true\n{GOOD}");
        let d = parse(&text).unwrap();
        let c = d.graph.loss_config();
        assert_eq!(c.reduction, Reduction::Sum);
        assert_eq!(c.l2_divisor, L2Divisor::Two);
        assert!(c.l2_on_bias);
        let again = parse(&d.dense_text("").unwrap()).unwrap();
        assert_eq!(again.graph.loss_config(), d.graph.loss_config());
        // A number for the divisor reads as the same name.
        let d = parse(&format!("l2-divisor = 1\n{GOOD}")).unwrap();
        assert_eq!(d.graph.loss_config().l2_divisor, L2Divisor::One);
    }

    #[test]
    fn default_conventions_leave_the_canonical_text_unchanged() {
        // Baselines hash this text: a description written before the keys existed, and the same
        // one with the defaults spelled out, must give the same text.
        let plain = parse(GOOD).unwrap().dense_text("").unwrap();
        let spelled =
            format!("reduction = \"mean\"\nl2-divisor = \"2m\"\nl2-on-bias = false\n{GOOD}");
        assert_eq!(parse(&spelled).unwrap().dense_text("").unwrap(), plain);
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
