//! What the numbers of a weight file say before any forward pass: non-finite entries, magnitudes no
//! trained network has (the sign of bytes read in the wrong order or as the wrong type), and
//! tensors that are all one value, and a layer stored at a lower precision than the rest of the
//! file (the readers widen every tensor to f64, but each keeps the dtype it was stored in).

use plumb_formats::{DType, Description, Role, Tensor, TensorFile, expected_tensors};
use plumb_report::{Finding, Severity};

use crate::Thresholds;

/// Findings on the values of every tensor the layout uses.
pub fn check_values(desc: &Description, file: &TensorFile, t: &Thresholds) -> Vec<Finding> {
    let mut out = Vec::new();
    let mut stored: Vec<(String, usize, DType)> = Vec::new();
    for e in expected_tensors(desc, desc.layout) {
        let Some(tensor) = file.get(&e.name) else {
            continue;
        };
        if !tensor.dtype.is_float() {
            continue; // the shape audit names it
        }
        let layer = e.layer + 1;
        stored.push((e.name.clone(), layer, tensor.dtype));
        let bad: Vec<usize> = (0..tensor.data.len())
            .filter(|&k| !tensor.data[k].is_finite())
            .collect();
        if let Some(&first) = bad.first() {
            let nan = bad.iter().filter(|&&k| tensor.data[k].is_nan()).count();
            out.push(
                Finding::new(
                    "non-finite",
                    Severity::Error,
                    format!(
                        "{} non-finite values ({nan} NaN, {} infinite), the first at {:?} ({}); a network with them computes nothing",
                        bad.len(),
                        bad.len() - nan,
                        index_of(tensor, first),
                        tensor.data[first]
                    ),
                )
                .tensor(&e.name)
                .layer(layer)
                .figure("count", bad.len())
                .figure("first_index", index_of(tensor, first)),
            );
        }
        let max = tensor
            .data
            .iter()
            .filter(|v| v.is_finite())
            .fold(0.0f64, |m, v| m.max(v.abs()));
        if max > t.max_magnitude {
            let hint = if swapped_plausible(tensor, t.max_magnitude) {
                "; read with its bytes in the other order it holds plausible values: the file was written with the wrong byte order"
            } else if max > 1e30 {
                "; values this large suggest bytes read as the wrong type or in the wrong order"
            } else {
                ""
            };
            out.push(
                Finding::new(
                    "implausible-magnitude",
                    Severity::Error,
                    format!("its largest |value| is {max:.3e}, beyond the {:e} no trained network reaches{hint}", t.max_magnitude),
                )
                .tensor(&e.name)
                .layer(layer)
                .figure("max_abs", max),
            );
        }
        // One value throughout: weights that cannot have been trained (or were never written).
        let (weights, bias) = parts(desc, e.layer, e.role, tensor);
        if let Some(w) =
            weights.filter(|w| w.len() > 1 && w.iter().all(|v| *v == w[0]) && w[0].is_finite())
        {
            out.push(
                Finding::new(
                    "constant-weights",
                    Severity::Error,
                    if w[0] == 0.0 {
                        "every weight (bias aside) is 0: the layer passes no signal and its units are all alike".to_string()
                    } else {
                        format!("every weight (bias aside) is {}: its units all compute the same function", w[0])
                    },
                )
                .tensor(&e.name)
                .layer(layer)
                .figure("value", w[0]),
            );
        }
        if let Some(b) = bias.filter(|b| b.len() > 1 && b.iter().all(|v| *v == 0.0)) {
            out.push(
                Finding::new(
                    "zero-bias",
                    Severity::Note,
                    format!("all {} bias weights are exactly 0: expected straight after initialisation, unusual after training", b.len()),
                )
                .tensor(&e.name)
                .layer(layer),
            );
        }
    }
    out.extend(mixed_precision(&stored));
    out
}

/// Significant bits of a float type (the stored mantissa and its implicit leading bit).
fn significant_bits(d: DType) -> u32 {
    match d {
        DType::BF16 => 8,
        DType::F16 => 11,
        DType::F32 => 24,
        _ => 53,
    }
}

/// A tensor stored at a lower precision than the file's widest: one layer converted on its own.
fn mixed_precision(stored: &[(String, usize, DType)]) -> Vec<Finding> {
    let Some(widest) = stored
        .iter()
        .map(|(_, _, d)| *d)
        .max_by_key(|d| significant_bits(*d))
    else {
        return Vec::new();
    };
    let wide = significant_bits(widest);
    stored
        .iter()
        .filter(|(_, _, d)| significant_bits(*d) < wide)
        .map(|(name, layer, d)| {
            let bits = significant_bits(*d);
            Finding::new(
                "mixed-precision",
                Severity::Warning,
                format!(
                    "stored as {d} while the file holds {widest} tensors: its values keep {bits} significant bits (about {:.0} decimal digits) against {wide}; a file exported from one model normally has one precision, so this tensor was likely converted on its own",
                    bits as f64 * 2f64.log10()
                ),
            )
            .tensor(name)
            .layer(*layer)
            .figure("dtype", d.name())
            .figure("widest", widest.name())
        })
        .collect()
}

/// The non-bias and bias values of a layout tensor.
fn parts(
    desc: &Description,
    layer: usize,
    role: Role,
    t: &Tensor,
) -> (Option<Vec<f64>>, Option<Vec<f64>>) {
    match role {
        Role::Weight => (Some(t.data.clone()), None),
        Role::Bias => (None, Some(t.data.clone())),
        Role::Augmented => {
            let cols = desc.network.layers()[layer].inputs + 1;
            let (mut w, mut b) = (Vec::new(), Vec::new());
            for (k, v) in t.data.iter().enumerate() {
                if k % cols == 0 {
                    b.push(*v)
                } else {
                    w.push(*v)
                }
            }
            (Some(w), Some(b))
        }
    }
}

/// Whether the tensor's values, with each one's bytes reversed, would all be plausible.
fn swapped_plausible(t: &Tensor, limit: f64) -> bool {
    let ok = |v: f64| v.is_finite() && v.abs() < limit.min(1e3);
    t.data.iter().all(|&v| match t.dtype {
        DType::F64 => ok(f64::from_bits(v.to_bits().swap_bytes())),
        DType::F32 => ok(f32::from_bits((v as f32).to_bits().swap_bytes()) as f64),
        _ => false,
    })
}

fn index_of(t: &Tensor, mut k: usize) -> Vec<usize> {
    let mut idx = vec![0; t.shape.len()];
    for (i, &d) in t.shape.iter().enumerate().rev() {
        idx[i] = k % d.max(1);
        k /= d.max(1);
    }
    idx
}
