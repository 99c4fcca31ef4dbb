//! What the numbers of a weight file say before any forward pass: non-finite entries, magnitudes no
//! trained network has (the sign of bytes read in the wrong order or as the wrong type), and
//! tensors that are all one value, and a layer stored at a lower precision than the rest of the
//! file (the readers widen every tensor to f64, but each keeps the dtype it was stored in).

use plumb_formats::DType;
use plumb_report::{Finding, Severity};

use crate::Thresholds;

/// One tensor's values as the checks read them: every value, and which of them are weights (all
/// one value is a finding) and which biases (all zero is a note).
#[derive(Clone, Debug)]
pub struct Values {
    pub name: String,
    /// 1-based.
    pub layer: usize,
    pub shape: Vec<usize>,
    /// The dtype it was stored in (every reader widens to f64).
    pub dtype: DType,
    pub data: Vec<f64>,
    pub weights: Option<Vec<f64>>,
    pub bias: Option<Vec<f64>>,
}

/// Findings on the values of tensors: non-finite entries, implausible magnitudes, constant
/// weights, all-zero biases, and tensors stored narrower than the widest.
pub fn values_findings(tensors: &[Values], t: &Thresholds) -> Vec<Finding> {
    let mut out = Vec::new();
    let mut stored: Vec<(String, usize, DType)> = Vec::new();
    for v in tensors {
        let (data, name, layer) = (&v.data, &v.name, v.layer);
        stored.push((name.clone(), layer, v.dtype));
        let bad: Vec<usize> = (0..data.len()).filter(|&k| !data[k].is_finite()).collect();
        if let Some(&first) = bad.first() {
            let nan = bad.iter().filter(|&&k| data[k].is_nan()).count();
            out.push(
                Finding::new(
                    "non-finite",
                    Severity::Error,
                    format!(
                        "{} non-finite values ({nan} NaN, {} infinite), the first at {:?} ({}); a network with them computes nothing",
                        bad.len(),
                        bad.len() - nan,
                        index_of(&v.shape, first),
                        data[first]
                    ),
                )
                .tensor(name)
                .layer(layer)
                .figure("count", bad.len())
                .figure("first_index", index_of(&v.shape, first)),
            );
        }
        let max = data
            .iter()
            .filter(|v| v.is_finite())
            .fold(0.0f64, |m, v| m.max(v.abs()));
        if max > t.max_magnitude {
            let hint = if swapped_plausible(data, v.dtype, t.max_magnitude) {
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
                .tensor(name)
                .layer(layer)
                .figure("max_abs", max),
            );
        }
        // One value throughout: weights that cannot have been trained (or were never written).
        if let Some(w) = v
            .weights
            .as_ref()
            .filter(|w| w.len() > 1 && w.iter().all(|v| *v == w[0]) && w[0].is_finite())
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
                .tensor(name)
                .layer(layer)
                .figure("value", w[0]),
            );
        }
        if let Some(b) = v
            .bias
            .as_ref()
            .filter(|b| b.len() > 1 && b.iter().all(|v| *v == 0.0))
        {
            out.push(
                Finding::new(
                    "zero-bias",
                    Severity::Note,
                    format!("all {} bias weights are exactly 0: expected straight after initialisation, unusual after training", b.len()),
                )
                .tensor(name)
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

/// Whether the tensor's values, with each one's bytes reversed, would all be plausible.
fn swapped_plausible(data: &[f64], dtype: DType, limit: f64) -> bool {
    let ok = |v: f64| v.is_finite() && v.abs() < limit.min(1e3);
    data.iter().all(|&v| match dtype {
        DType::F64 => ok(f64::from_bits(v.to_bits().swap_bytes())),
        DType::F32 => ok(f32::from_bits((v as f32).to_bits().swap_bytes()) as f64),
        _ => false,
    })
}

fn index_of(shape: &[usize], mut k: usize) -> Vec<usize> {
    let mut idx = vec![0; shape.len()];
    for (i, &d) in shape.iter().enumerate().rev() {
        idx[i] = k % d.max(1);
        k /= d.max(1);
    }
    idx
}
