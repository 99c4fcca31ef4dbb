//! The network description: a TOML file naming the layers, activations, loss, L2 strength and the
//! weight file's layout (docs/description.md).
//!
//! The file is walked by hand over toml's spanned document, not deserialised blindly, so that every
//! error can name the key and its line, and an unknown key can be answered with the nearest known one.

use std::fmt;
use std::ops::Range;
use std::path::{Path, PathBuf};

use plumb_engine::{Activation, Conventions, L2Divisor, Loss, Network, NetworkError, Reduction};
use thiserror::Error;
use toml::Spanned;
use toml::de::{DeTable, DeValue};

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

const TOP_KEYS: [&str; 8] = [
    "inputs",
    "loss",
    "reduction",
    "l2",
    "l2-divisor",
    "l2-on-bias",
    "layout",
    "layer",
];
const LAYER_KEYS: [&str; 6] = ["units", "activation", "slope", "alpha", "weight", "bias"];

impl Description {
    /// Reads and validates a description file.
    pub fn read(path: &Path) -> Result<Description, DescriptionError> {
        let bytes = crate::input::read_input(path, crate::MAX_DESCRIPTION_BYTES).map_err(|e| {
            DescriptionError {
                path: path.to_path_buf(),
                line: None,
                column: None,
                message: format!("cannot read the network description: {e}"),
            }
        })?;
        let text = String::from_utf8(bytes).map_err(|e| {
            let offset = e.utf8_error().valid_up_to();
            DescriptionError {
                path: path.to_path_buf(),
                line: None,
                column: None,
                message: format!(
                    "byte {offset} is not UTF-8; a network description is a UTF-8 TOML text file"
                ),
            }
        })?;
        Description::parse(path, &text)
    }

    /// Parses and validates a description from its text; `path` is used in messages only.
    pub fn parse(path: &Path, text: &str) -> Result<Description, DescriptionError> {
        let newlines = text.match_indices('\n').map(|(i, _)| i).collect();
        Parser {
            path,
            text,
            newlines,
        }
        .parse()
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

struct Parser<'a> {
    path: &'a Path,
    text: &'a str,
    /// Where each line ends, so a line number costs a search, not a scan of the text before it.
    newlines: Vec<usize>,
}

type Entry<'i> = (
    &'i Spanned<std::borrow::Cow<'i, str>>,
    &'i Spanned<DeValue<'i>>,
);

impl<'a> Parser<'a> {
    fn error(&self, span: Option<Range<usize>>, message: impl Into<String>) -> DescriptionError {
        let (line, column) = match span {
            Some(span) => {
                let (l, c) = line_col(self.text, &self.newlines, span.start);
                (Some(l), Some(c))
            }
            None => (None, None),
        };
        DescriptionError {
            path: self.path.to_path_buf(),
            line,
            column,
            message: message.into(),
        }
    }

    fn parse(&self) -> Result<Description, DescriptionError> {
        let doc = DeTable::parse(self.text).map_err(|e| {
            let msg = e.message().trim().to_string();
            self.error(e.span(), format!("not valid TOML: {msg}"))
        })?;
        let table = doc.get_ref();
        self.reject_unknown(table.iter(), &TOP_KEYS, "at the top level")?;

        let inputs_entry = self.required(table, "inputs", None, "the number of input features")?;
        let inputs = self.count(inputs_entry, "inputs")?;
        let loss_entry = self.required(
            table,
            "loss",
            None,
            "the loss: \"cross-entropy\" or \"squared-error\"",
        )?;
        let loss_name = self.string(loss_entry, "loss")?;
        let loss = match loss_name.as_str() {
            "cross-entropy" => Loss::CrossEntropy,
            "squared-error" => Loss::SquaredError,
            other => {
                return Err(self.error(
                    Some(loss_entry.1.span()),
                    format!(
                        "unknown loss \"{other}\"{}; the losses are {}",
                        suggest(other, &Loss::NAMES),
                        list(&Loss::NAMES)
                    ),
                ));
            }
        };
        let l2 = match find(table, "l2") {
            Some(e) => {
                let v = self.number(e, "l2")?;
                if !(v.is_finite() && v >= 0.0) {
                    return Err(self.error(
                        Some(e.1.span()),
                        format!("l2 is {v}; it must be a finite number ≥ 0 (0 turns L2 off)"),
                    ));
                }
                v
            }
            None => 0.0,
        };
        let conventions = self.conventions(table)?;
        let layout = match find(table, "layout") {
            Some(e) => {
                let name = self.string(e, "layout")?;
                let names: Vec<&str> = Layout::ALL.iter().map(Layout::name).collect();
                Layout::from_name(&name).ok_or_else(|| {
                    self.error(
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

        let layer_entry = self.required(table, "layer", None, "the layers, as [[layer]] tables")?;
        let DeValue::Array(items) = layer_entry.1.get_ref() else {
            return Err(self.error(
                Some(layer_entry.0.span()),
                "`layer` must be an array of tables: write each layer as a [[layer]] section",
            ));
        };
        if items.is_empty() {
            return Err(self.error(
                Some(layer_entry.0.span()),
                "the network has no layers: add at least one [[layer]] section",
            ));
        }
        let mut layers = Vec::with_capacity(items.len());
        let mut spans = Vec::with_capacity(items.len());
        for (i, item) in items.iter().enumerate() {
            let DeValue::Table(t) = item.get_ref() else {
                return Err(self.error(
                    Some(item.span()),
                    format!(
                        "layer {} is not a table: write it as a [[layer]] section",
                        i + 1
                    ),
                ));
            };
            let (layer, span) = self.layer(i + 1, item.span(), t, layout)?;
            layers.push(layer);
            spans.push(span);
        }

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
                    return Err(self.error(
                        Some(spans[i].units.clone()),
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

        let spec: Vec<(usize, Activation)> =
            layers.iter().map(|l| (l.units, l.activation)).collect();
        let network = Network::new(inputs, &spec, loss, l2)
            .map_err(|e| {
                let span = match &e {
                    NetworkError::NoInputs => Some(inputs_entry.1.span()),
                    NetworkError::NoUnits { layer } => Some(spans[layer - 1].units.clone()),
                    NetworkError::SoftmaxHidden { layer, .. }
                    | NetworkError::SoftmaxSingleUnit { layer }
                    | NetworkError::BadActivationParameter { layer, .. } => {
                        Some(spans[layer - 1].activation.clone())
                    }
                    NetworkError::LossNeedsProbabilities { .. } => Some(loss_entry.1.span()),
                    NetworkError::BadL2 { .. } | NetworkError::NoLayers => None,
                };
                self.error(span, e.to_string())
            })?
            .with_conventions(conventions);

        let desc = Description {
            path: self.path.to_path_buf(),
            layout,
            layers,
            network,
        };
        // Two layers (or a weight and a bias) under one name would read one tensor twice.
        let names = crate::layout::expected_tensors(&desc, layout);
        let mut first = std::collections::HashMap::with_capacity(names.len());
        for (i, a) in names.iter().enumerate() {
            if let Some(b) = first.insert(a.name.as_str(), i).map(|j| &names[j]) {
                let line = desc.layers[a.layer].line;
                return Err(DescriptionError {
                    path: self.path.to_path_buf(),
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

    /// `reduction`, `l2-divisor` and `l2-on-bias`, each with its default when absent.
    fn conventions(&self, table: &DeTable<'_>) -> Result<Conventions, DescriptionError> {
        let mut c = Conventions::default();
        if let Some(e) = find(table, "reduction") {
            let name = self.string(e, "reduction")?;
            let names = Reduction::ALL.map(|r| r.name());
            c.reduction = Reduction::from_name(&name).ok_or_else(|| {
                self.error(
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
                _ => self.string(e, "l2-divisor")?,
            };
            let names = L2Divisor::ALL.map(|d| d.name());
            c.l2_divisor = L2Divisor::from_name(&name).ok_or_else(|| {
                self.error(
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
            c.l2_on_bias = match e.1.get_ref() {
                DeValue::Boolean(b) => *b,
                other => {
                    return Err(self.error(
                        Some(e.1.span()),
                        format!(
                            "`l2-on-bias` must be true or false (no quotes), but it is {}",
                            kind(other)
                        ),
                    ));
                }
            };
        }
        Ok(c)
    }

    fn layer(
        &self,
        number: usize,
        span: Range<usize>,
        t: &DeTable<'_>,
        layout: Layout,
    ) -> Result<(LayerDescription, LayerSpans), DescriptionError> {
        let what = format!("in layer {number}");
        self.reject_unknown(t.iter(), &LAYER_KEYS, &what)?;
        let units_entry = self.required(
            t,
            "units",
            Some((number, span.clone())),
            "its number of units",
        )?;
        let units = self.count(units_entry, "units")?;
        let act_entry = self.required(
            t,
            "activation",
            Some((number, span.clone())),
            "its activation function",
        )?;
        let act_name = self.string(act_entry, "activation")?;
        let slope = find(t, "slope");
        let alpha = find(t, "alpha");
        let activation = match act_name.as_str() {
            "identity" => Activation::Identity,
            "sigmoid" => Activation::Sigmoid,
            "tanh" => Activation::Tanh,
            "relu" => Activation::Relu,
            "leaky-relu" => Activation::LeakyRelu {
                slope: match slope {
                    Some(e) => self.number(e, "slope")?,
                    None => 0.01,
                },
            },
            "elu" => Activation::Elu {
                alpha: match alpha {
                    Some(e) => self.number(e, "alpha")?,
                    None => 1.0,
                },
            },
            "softplus" => Activation::Softplus,
            "gelu" => Activation::Gelu,
            "softmax" => Activation::Softmax,
            other => {
                return Err(self.error(
                    Some(act_entry.1.span()),
                    format!(
                        "unknown activation \"{other}\"{}; the activations are {}",
                        suggest(other, &Activation::NAMES),
                        list(&Activation::NAMES)
                    ),
                ));
            }
        };
        if let (Some(e), false) = (slope, matches!(activation, Activation::LeakyRelu { .. })) {
            return Err(self.error(
                Some(e.0.span()),
                format!(
                    "`slope` belongs to leaky-relu, but layer {number} uses {act_name}; remove it"
                ),
            ));
        }
        if let (Some(e), false) = (alpha, matches!(activation, Activation::Elu { .. })) {
            return Err(self.error(
                Some(e.0.span()),
                format!("`alpha` belongs to elu, but layer {number} uses {act_name}; remove it"),
            ));
        }
        let weight = find(t, "weight")
            .map(|e| self.name(e, "weight"))
            .transpose()?;
        let bias_entry = find(t, "bias");
        let bias = bias_entry.map(|e| self.name(e, "bias")).transpose()?;
        if let (Some(e), Layout::Augmented) = (bias_entry, layout) {
            return Err(self.error(
                Some(e.0.span()),
                format!(
                    "layer {number} names a bias tensor, but the augmented layout keeps the bias weights in column 0 of the weight tensor; remove `bias`, or set layout = \"split\" or \"split-transposed\""
                ),
            ));
        }
        let (line, _) = line_col(self.text, &self.newlines, span.start);
        Ok((
            LayerDescription {
                units,
                activation,
                weight,
                bias,
                line,
            },
            LayerSpans {
                units: units_entry.1.span(),
                activation: act_entry.1.span(),
            },
        ))
    }

    fn reject_unknown<'i>(
        &self,
        entries: impl Iterator<Item = Entry<'i>>,
        known: &[&str],
        context: &str,
    ) -> Result<(), DescriptionError> {
        for (key, _) in entries {
            let name = key.get_ref().as_ref();
            if !known.contains(&name) {
                return Err(self.error(
                    Some(key.span()),
                    format!(
                        "unknown key `{name}` {context}{}; the known keys there are {}",
                        suggest(name, known),
                        list(known)
                    ),
                ));
            }
        }
        Ok(())
    }

    fn required<'t, 'i>(
        &self,
        table: &'t DeTable<'i>,
        key: &str,
        layer: Option<(usize, Range<usize>)>,
        what: &str,
    ) -> Result<Entry<'t>, DescriptionError>
    where
        'i: 't,
    {
        find(table, key).ok_or_else(|| match layer {
            Some((n, span)) => self.error(
                Some(span),
                format!("layer {n} has no `{key}`: add `{key} = …` with {what}"),
            ),
            None => self.error(
                None,
                format!("the key `{key}` is missing: add `{key} = …` with {what}"),
            ),
        })
    }

    fn count(&self, entry: Entry<'_>, key: &str) -> Result<usize, DescriptionError> {
        match entry.1.get_ref() {
            DeValue::Integer(i) => {
                let text = i.as_str();
                match i128::from_str_radix(text, i.radix()) {
                    Ok(v) if v < 0 => Err(self.error(
                        Some(entry.1.span()),
                        format!("`{key}` is {v}; it must be a positive whole number"),
                    )),
                    Ok(v) if v > MAX_PARAMETERS as i128 => Err(self.error(
                        Some(entry.1.span()),
                        format!("`{key}` is {v}, beyond the {MAX_PARAMETERS} plumb accepts"),
                    )),
                    Ok(v) => Ok(v as usize),
                    Err(_) => Err(self.error(
                        Some(entry.1.span()),
                        format!("`{key}` = {text} is not a whole number plumb can hold"),
                    )),
                }
            }
            other => Err(self.error(
                Some(entry.1.span()),
                format!(
                    "`{key}` must be a whole number, but it is {}; write e.g. `{key} = 4`",
                    kind(other)
                ),
            )),
        }
    }

    fn number(&self, entry: Entry<'_>, key: &str) -> Result<f64, DescriptionError> {
        let v = match entry.1.get_ref() {
            DeValue::Float(f) => f.as_str().parse::<f64>().ok(),
            DeValue::Integer(i) => i64::from_str_radix(i.as_str(), i.radix())
                .ok()
                .map(|v| v as f64),
            other => {
                return Err(self.error(
                    Some(entry.1.span()),
                    format!("`{key}` must be a number, but it is {}", kind(other)),
                ));
            }
        };
        v.ok_or_else(|| {
            self.error(
                Some(entry.1.span()),
                format!("`{key}` is not a number plumb can read"),
            )
        })
    }

    fn string(&self, entry: Entry<'_>, key: &str) -> Result<String, DescriptionError> {
        match entry.1.get_ref() {
            DeValue::String(s) => Ok(s.to_string()),
            other => Err(self.error(
                Some(entry.1.span()),
                format!(
                    "`{key}` must be a string in quotes, but it is {}",
                    kind(other)
                ),
            )),
        }
    }

    fn name(&self, entry: Entry<'_>, key: &str) -> Result<String, DescriptionError> {
        let s = self.string(entry, key)?;
        if s.is_empty() {
            return Err(self.error(
                Some(entry.1.span()),
                format!("`{key}` is empty; give the tensor's name in the weight file"),
            ));
        }
        Ok(s)
    }
}

/// Where the values of one layer sit in the text, for errors found after parsing.
struct LayerSpans {
    units: Range<usize>,
    activation: Range<usize>,
}

fn find<'t, 'i>(table: &'t DeTable<'i>, key: &str) -> Option<Entry<'t>> {
    table.iter().find(|(k, _)| k.get_ref().as_ref() == key)
}

fn kind(v: &DeValue<'_>) -> &'static str {
    match v {
        DeValue::String(_) => "a string",
        DeValue::Integer(_) => "an integer",
        DeValue::Float(_) => "a float",
        DeValue::Boolean(_) => "a boolean",
        DeValue::Datetime(_) => "a date",
        DeValue::Array(_) => "an array",
        DeValue::Table(_) => "a table",
    }
}

/// 1-based line and column (in characters) of a byte offset.
fn line_col(text: &str, newlines: &[usize], offset: usize) -> (usize, usize) {
    let mut offset = offset.min(text.len());
    while !text.is_char_boundary(offset) {
        offset -= 1;
    }
    let before = newlines.partition_point(|&n| n < offset);
    let start = if before == 0 {
        0
    } else {
        newlines[before - 1] + 1
    };
    (before + 1, text[start..offset].chars().count() + 1)
}

fn list(names: &[&str]) -> String {
    names
        .iter()
        .map(|n| format!("`{n}`"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// ", did you mean `x`?" when a known name is within a small edit distance.
fn suggest(given: &str, known: &[&str]) -> String {
    let best = known
        .iter()
        .map(|k| (edit_distance(given, k), *k))
        .min_by_key(|(d, _)| *d);
    match best {
        Some((d, k)) if d <= 2.max(given.chars().count() / 3) => format!(" (did you mean `{k}`?)"),
        _ => String::new(),
    }
}

/// Levenshtein distance, for suggestions.
fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut cur = vec![i + 1; b.len() + 1];
        for (j, &cb) in b.iter().enumerate() {
            cur[j + 1] = (prev[j] + usize::from(ca != cb))
                .min(prev[j + 1] + 1)
                .min(cur[j] + 1);
        }
        prev = cur;
    }
    prev[b.len()]
}

#[cfg(test)]
mod tests {
    use super::*;

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
        assert!(e.message.contains("`inputs` is missing"), "{e}");
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

    #[test]
    fn edit_distance_is_levenshtein() {
        // Textbook example [pub: Levenshtein distance]: kitten → sitting takes 3 edits.
        assert_eq!(edit_distance("kitten", "sitting"), 3);
        assert_eq!(edit_distance("", "abc"), 3);
        assert_eq!(edit_distance("layer", "layer"), 0);
    }
}
