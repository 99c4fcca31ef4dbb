//! One `[[layer]]` table of a description: its kind, the keys that kind takes (a key of another
//! kind named as such), and its settings with their defaults (DESIGN §4.2, §4.3).

use std::ops::Range;

use plumb_engine::Activation;
use plumb_engine::graph::{ConvSettings, Padding, PoolKind, Storage};
use toml::de::{DeTable, DeValue};

use crate::settings::{KINDS, KeySpans, KindSettings, LayerSettings};
use crate::walk::{Entry, Walk, find, kind, list, suggest};
use crate::{DescriptionError, Layout};

/// Keys every layer may have.
const COMMON: [&str; 2] = ["kind", "name"];

/// The keys of a kind besides `kind` and `name` (DESIGN §4.2).
fn keys(kind: &str) -> &'static [&'static str] {
    match kind {
        "dense" => &["units", "activation", "slope", "alpha", "weight", "bias"],
        "conv1d" | "conv2d" => &[
            "channels",
            "kernel",
            "stride",
            "padding",
            "dilation",
            "bias",
            "activation",
            "slope",
            "alpha",
            "storage",
        ],
        "max-pool1d" | "max-pool2d" | "avg-pool1d" | "avg-pool2d" => &["size", "stride"],
        "batch-norm" | "layer-norm" | "rms-norm" => &["epsilon", "activation", "slope", "alpha"],
        "add" => &["from", "activation", "slope", "alpha"],
        "embedding" => &["size"],
        "rnn" => &["units", "activation", "slope", "alpha", "output", "storage"],
        "lstm" => &["units", "output", "gate-order", "storage"],
        "gru" => &["units", "output", "gate-order", "reset", "storage"],
        "attention" => &["heads", "causal", "storage"],
        _ => &[],
    }
}

pub(crate) fn boolean(w: &Walk<'_>, e: Entry<'_>, key: &str) -> Result<bool, DescriptionError> {
    match e.1.get_ref() {
        DeValue::Boolean(b) => Ok(*b),
        other => Err(w.error(
            Some(e.1.span()),
            format!(
                "`{key}` must be true or false (no quotes), but it is {}",
                kind(other)
            ),
        )),
    }
}

/// One `[[layer]]` table.
pub(crate) fn layer(
    w: &Walk<'_>,
    number: usize,
    span: Range<usize>,
    t: &DeTable<'_>,
    layout: Layout,
) -> Result<(LayerSettings, KeySpans), DescriptionError> {
    let kind = match find(t, "kind") {
        None => "dense",
        Some(e) => {
            let name = w.string(e, "kind")?;
            let kinds = &KINDS[..];
            match kinds.iter().find(|&&k| k == name) {
                Some(k) => k,
                None => {
                    return Err(w.error(
                        Some(e.1.span()),
                        format!(
                            "unknown kind \"{name}\" in layer {number}{}; the kinds are {}",
                            suggest(&name, kinds),
                            list(kinds)
                        ),
                    ));
                }
            }
        }
    };
    let own = keys(kind);
    for (key, _) in t.iter() {
        let key_name = key.get_ref().as_ref();
        if COMMON.contains(&key_name) || own.contains(&key_name) {
            continue;
        }
        let owners: Vec<&str> = KINDS
            .iter()
            .copied()
            .filter(|k| keys(k).contains(&key_name))
            .collect();
        let mut known: Vec<&str> = COMMON.to_vec();
        known.extend_from_slice(own);
        let message = if owners.is_empty() {
            format!(
                "unknown key `{key_name}` in layer {number} ({kind}){}; the keys of {kind} are {}",
                suggest(key_name, &known),
                list(&known)
            )
        } else {
            format!(
                "`{key_name}` is a key of {}, not of {kind} (layer {number}); remove it, or set `kind` to the kind you meant (the keys of {kind} are {})",
                owners.join(", "),
                list(&known)
            )
        };
        return Err(w.error(Some(key.span()), message));
    }
    let spans = KeySpans {
        header: span.clone(),
        keys: t
            .iter()
            .map(|(k, v)| (k.get_ref().to_string(), v.span()))
            .collect(),
    };
    let name = find(t, "name").map(|e| w.name(e, "name")).transpose()?;
    let at = (number, span.clone());
    let need = |key: &str, what: &str| w.required(t, key, Some(at.clone()), what);
    let count = |key: &str, what: &str| need(key, what).and_then(|e| w.count(e, key));
    let dims = if kind.ends_with("1d") { 1 } else { 2 };
    let epsilon = |default: f64| match find(t, "epsilon") {
        Some(e) => w.number(e, "epsilon"),
        None => Ok(default),
    };
    let choice = |key: &str, default: &str| match find(t, key) {
        Some(e) => w.string(e, key),
        None => Ok(default.to_string()),
    };
    let transposed = || {
        match find(t, "storage") {
        None => Ok(false),
        Some(e) => match w.string(e, "storage")?.as_str() {
            "transposed" => Ok(true),
            other => Err(w.error(
                Some(e.1.span()),
                format!(
                    "{kind} weights are stored out × in (rows are outputs); `storage = \"transposed\"` declares in × out, and \"{other}\" is neither: write \"transposed\" or remove the key"
                ),
            )),
        },
    }
    };
    let default_activation = match kind {
        "dense" => None,
        "rnn" => Some(Activation::Tanh),
        _ => Some(Activation::Identity),
    };
    let activation = if own.contains(&"activation") {
        activation(w, t, number, default_activation)?
    } else {
        Activation::Identity
    };

    let settings = match kind {
        "dense" => {
            let units = count("units", "its number of units")?;
            let weight = find(t, "weight").map(|e| w.name(e, "weight")).transpose()?;
            let bias_entry = find(t, "bias");
            let bias = bias_entry.map(|e| w.name(e, "bias")).transpose()?;
            if let (Some(e), Layout::Augmented) = (bias_entry, layout) {
                return Err(w.error(
                    Some(e.0.span()),
                    format!(
                        "layer {number} names a bias tensor, but the augmented layout keeps the bias weights in column 0 of the weight tensor; remove `bias`, or set layout = \"split\" or \"split-transposed\""
                    ),
                ));
            }
            KindSettings::Dense {
                units,
                weight,
                bias,
            }
        }
        "conv1d" | "conv2d" => {
            let channels = count("channels", "its number of output channels")?;
            let kernel = pair(w, need("kernel", "its kernel size")?, "kernel", kind, dims)?;
            let stride = optional_pair(w, t, "stride", kind, dims, 1)?;
            let dilation = optional_pair(w, t, "dilation", kind, dims, 1)?;
            let padding = match find(t, "padding") {
                None => Padding::Explicit([0, 0]),
                Some(e) => match e.1.get_ref() {
                    DeValue::String(s) if s.as_ref() == "same" => Padding::Same,
                    DeValue::String(s) => {
                        return Err(w.error(
                            Some(e.1.span()),
                            format!(
                                "`padding` is \"{s}\"; it takes a number, [height, width] or \"same\""
                            ),
                        ));
                    }
                    _ => Padding::Explicit(pair_from_zero(w, e, "padding", kind, dims)?),
                },
            };
            let bias = match find(t, "bias") {
                None => true,
                Some(e) => boolean(w, e, "bias")?,
            };
            let canonical = if dims == 1 { "oik" } else { "oihw" };
            let storage = match find(t, "storage") {
                None => Storage::canonical(canonical),
                Some(e) => {
                    let letters = w.string(e, "storage")?;
                    Storage::parse(&letters, canonical).map_err(|err| {
                        w.error(
                            Some(e.1.span()),
                            format!(
                                "{err} (o output channels, i input channels, {})",
                                if dims == 1 {
                                    "k the kernel length"
                                } else {
                                    "h and w the kernel height and width"
                                }
                            ),
                        )
                    })?
                }
            };
            KindSettings::Conv {
                settings: ConvSettings {
                    dims,
                    channels,
                    kernel,
                    stride,
                    dilation,
                    padding,
                    bias,
                },
                storage,
            }
        }
        "max-pool1d" | "max-pool2d" | "avg-pool1d" | "avg-pool2d" => {
            let size = pair(w, need("size", "its window size")?, "size", kind, dims)?;
            let stride = match find(t, "stride") {
                None => size,
                Some(e) => pair(w, e, "stride", kind, dims)?,
            };
            KindSettings::Pool {
                op: if kind.starts_with("max") {
                    PoolKind::Max
                } else {
                    PoolKind::Avg
                },
                dims,
                size,
                stride,
            }
        }
        "global-avg-pool" => KindSettings::GlobalAvgPool,
        "flatten" => KindSettings::Flatten,
        "batch-norm" => KindSettings::BatchNorm {
            epsilon: epsilon(1e-5)?,
        },
        "layer-norm" => KindSettings::LayerNorm {
            epsilon: epsilon(1e-5)?,
        },
        "rms-norm" => KindSettings::RmsNorm {
            epsilon: epsilon(1e-6)?,
        },
        "add" => KindSettings::Add {
            from: w.name(
                need(
                    "from",
                    "the `name` of the earlier layer whose output it adds",
                )?,
                "from",
            )?,
        },
        "embedding" => KindSettings::Embedding {
            size: count("size", "the length of each token's vector")?,
        },
        "rnn" => KindSettings::Rnn {
            units: count("units", "its number of units")?,
            output: choice("output", "last")?,
            transposed: transposed()?,
        },
        "lstm" => KindSettings::Lstm {
            units: count("units", "its number of units")?,
            output: choice("output", "last")?,
            gate_order: choice("gate-order", "ifgo")?,
            transposed: transposed()?,
        },
        "gru" => KindSettings::Gru {
            units: count("units", "its number of units")?,
            output: choice("output", "last")?,
            gate_order: choice("gate-order", "rzn")?,
            reset: choice("reset", "after")?,
            transposed: transposed()?,
        },
        "attention" => KindSettings::Attention {
            heads: count("heads", "its number of heads")?,
            causal: match find(t, "causal") {
                None => false,
                Some(e) => boolean(w, e, "causal")?,
            },
            transposed: transposed()?,
        },
        other => unreachable!("{other} is in KINDS"),
    };
    Ok((
        LayerSettings {
            number,
            name,
            line: w.line(span.start),
            activation,
            kind: settings,
        },
        spans,
    ))
}

/// `activation` with its `slope` or `alpha`; `default` when the kind has one (dense has none).
fn activation(
    w: &Walk<'_>,
    t: &DeTable<'_>,
    number: usize,
    default: Option<Activation>,
) -> Result<Activation, DescriptionError> {
    let entry = find(t, "activation");
    let name = match (entry, default) {
        (Some(e), _) => w.string(e, "activation")?,
        (None, Some(a)) => a.name().to_string(),
        (None, None) => {
            return Err(w.error(
                t.iter().next().map(|(k, _)| k.span()),
                format!("layer {number} has no `activation`: add `activation = …` with its activation function"),
            ));
        }
    };
    let slope = find(t, "slope");
    let alpha = find(t, "alpha");
    let activation = match name.as_str() {
        "identity" => Activation::Identity,
        "sigmoid" => Activation::Sigmoid,
        "tanh" => Activation::Tanh,
        "relu" => Activation::Relu,
        "leaky-relu" => Activation::LeakyRelu {
            slope: match slope {
                Some(e) => w.number(e, "slope")?,
                None => 0.01,
            },
        },
        "elu" => Activation::Elu {
            alpha: match alpha {
                Some(e) => w.number(e, "alpha")?,
                None => 1.0,
            },
        },
        "softplus" => Activation::Softplus,
        "gelu" => Activation::Gelu,
        "softmax" => Activation::Softmax,
        other => {
            return Err(w.error(
                entry.map(|e| e.1.span()),
                format!(
                    "unknown activation \"{other}\"{}; the activations are {}",
                    suggest(other, &Activation::NAMES),
                    list(&Activation::NAMES)
                ),
            ));
        }
    };
    if let (Some(e), false) = (slope, matches!(activation, Activation::LeakyRelu { .. })) {
        return Err(w.error(
            Some(e.0.span()),
            format!("`slope` belongs to leaky-relu, but layer {number} uses {name}; remove it"),
        ));
    }
    if let (Some(e), false) = (alpha, matches!(activation, Activation::Elu { .. })) {
        return Err(w.error(
            Some(e.0.span()),
            format!("`alpha` belongs to elu, but layer {number} uses {name}; remove it"),
        ));
    }
    Ok(activation)
}

/// An int or [h, w] as [height, width]; a 1-D kind takes an int (or a list of one) in the second
/// slot, the first being 1.
fn pair(
    w: &Walk<'_>,
    e: Entry<'_>,
    key: &str,
    kind: &str,
    dims: usize,
) -> Result<[usize; 2], DescriptionError> {
    let values = ints(w, e, key, kind, dims)?;
    Ok(match values[..] {
        [n] if dims == 1 => [1, n],
        [n] => [n, n],
        [h, wd] => [h, wd],
        _ => unreachable!("ints checks the count"),
    })
}

/// [`pair`] for padding, whose unused first slot of a 1-D kind is 0.
fn pair_from_zero(
    w: &Walk<'_>,
    e: Entry<'_>,
    key: &str,
    kind: &str,
    dims: usize,
) -> Result<[usize; 2], DescriptionError> {
    let [h, wd] = pair(w, e, key, kind, dims)?;
    Ok(if dims == 1 { [0, wd] } else { [h, wd] })
}

fn optional_pair(
    w: &Walk<'_>,
    t: &DeTable<'_>,
    key: &str,
    kind: &str,
    dims: usize,
    default: usize,
) -> Result<[usize; 2], DescriptionError> {
    match find(t, key) {
        None if dims == 1 => Ok([1, default]),
        None => Ok([default, default]),
        Some(e) => pair(w, e, key, kind, dims),
    }
}

/// The whole numbers of an int or a list of `dims` (or one) of them.
fn ints(
    w: &Walk<'_>,
    e: Entry<'_>,
    key: &str,
    kind: &str,
    dims: usize,
) -> Result<Vec<usize>, DescriptionError> {
    match e.1.get_ref() {
        DeValue::Array(items) => {
            if !(items.len() == dims || items.len() == 1) {
                let shape = if dims == 1 {
                    "one number"
                } else {
                    "[height, width]"
                };
                return Err(w.error(
                    Some(e.1.span()),
                    format!(
                        "`{key}` has {} values; {kind} takes a number or {shape}",
                        items.len()
                    ),
                ));
            }
            items.iter().map(|v| w.count((e.0, v), key)).collect()
        }
        _ => Ok(vec![w.count(e, key)?]),
    }
}
