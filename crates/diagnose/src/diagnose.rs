//! Naming the mistake behind a wrong tensor.

use crate::Named;
use crate::catalogue::{CATALOGUE, CONSTANT_FACTOR, Problem};

/// What explains one tensor of an outside gradient.
#[derive(Clone, Debug, PartialEq)]
pub struct Diagnosis {
    /// A catalogue code, or `unexplained`.
    pub code: &'static str,
    /// Where or how (e.g. "hidden layer 2"); empty when the code says it all.
    pub label: String,
    /// ‖outside − hypothesis‖ / ‖hypothesis‖ for the code named (the best one for `unexplained`).
    pub residual: f64,
    /// The factor, for `constant-factor`.
    pub factor: Option<f64>,
    /// The next best hypotheses, for the record: (code, label, residual).
    pub runners_up: Vec<(&'static str, String, f64)>,
    /// For `unexplained`: the 0-based layer whose backward step first goes wrong — the layer of
    /// the wrong tensor nearest the output, where backpropagation starts (set by `judge`).
    pub first_wrong_layer: Option<usize>,
}

fn distance(a: &[f64], b: &[f64]) -> f64 {
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y) * (x - y))
        .sum::<f64>()
        .sqrt()
}

/// Diagnoses each of `names` (tensors already found wrong) against every hypothesis of the
/// catalogue; a hypothesis explains a tensor when its residual is at most that tensor's entry of
/// `tolerances`.
///
/// A hypothesis that leaves a tensor as the reference has it (bitwise, or within the tolerance:
/// the L2 term's reach at λ = 0, a swap of two other layers, a slope left out above the layer)
/// never names that tensor: it cannot be what made it wrong. Of the hypotheses that reproduce a
/// tensor the smallest residual is named, the catalogue's order breaking ties, with a fitted
/// `constant-factor` only when no other code reproduces it.
pub fn diagnose(
    problem: &Problem<'_>,
    outside: &[Named],
    names: &[String],
    tolerances: &[f64],
) -> Vec<Diagnosis> {
    // Every hypothesis once, for all tensors.
    let hypotheses: Vec<(&'static str, crate::Hypothesis)> = CATALOGUE
        .iter()
        .flat_map(|m| {
            (m.hypotheses)(problem, outside)
                .into_iter()
                .map(move |h| (m.code, h))
        })
        .collect();
    names
        .iter()
        .zip(tolerances)
        .map(|(name, &tolerance)| {
            let u = outside.iter().find(|t| &t.name == name);
            let r = problem.reference_tensors.iter().find(|t| &t.name == name);
            let mut scored: Vec<(&'static str, String, f64, Option<f64>)> = Vec::new();
            if let (Some(u), Some(r)) = (u, r) {
                for (code, h) in &hypotheses {
                    let Some(k) = h.tensors.iter().position(|t| &t.name == name) else {
                        continue;
                    };
                    let v = &h.tensors[k];
                    if v.shape != u.shape || v.data.iter().any(|x| !x.is_finite()) {
                        continue;
                    }
                    if v.shape == r.shape && distance(&v.data, &r.data) <= tolerance * r.norm() {
                        continue;
                    }
                    let den = if v.norm() > 0.0 {
                        v.norm()
                    } else {
                        r.norm().max(f64::MIN_POSITIVE)
                    };
                    let factor = h.factors.as_ref().map(|f| f[k]);
                    scored.push((
                        code,
                        h.label.clone(),
                        distance(&u.data, &v.data) / den,
                        factor,
                    ));
                }
            }
            // Smallest residual first; the catalogue's order breaks ties; a fitted factor yields to
            // any other code that reproduces the tensor.
            scored.sort_by(|a, b| {
                let demoted = |x: &(&str, String, f64, Option<f64>)| {
                    x.0 == CONSTANT_FACTOR && x.2 <= tolerance
                };
                let reproduces = |x: &(&str, String, f64, Option<f64>)| x.2 <= tolerance;
                reproduces(b)
                    .cmp(&reproduces(a))
                    .then(demoted(a).cmp(&demoted(b)))
                    .then(a.2.total_cmp(&b.2))
            });
            let best = scored.first().cloned();
            let runners_up = scored
                .iter()
                .skip(1)
                .take(3)
                .map(|(c, l, r, _)| (*c, l.clone(), *r))
                .collect();
            match best {
                Some((code, label, residual, factor)) if residual <= tolerance => Diagnosis {
                    code,
                    label,
                    residual,
                    factor,
                    runners_up,
                    first_wrong_layer: None,
                },
                _ => {
                    let residual = scored.iter().map(|s| s.2).fold(f64::INFINITY, f64::min);
                    Diagnosis {
                        code: "unexplained",
                        label: String::new(),
                        residual,
                        factor: None,
                        runners_up,
                        first_wrong_layer: None,
                    }
                }
            }
        })
        .collect()
}
