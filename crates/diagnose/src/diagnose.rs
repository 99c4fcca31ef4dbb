//! Naming the mistake behind a wrong tensor.

use crate::Named;
use crate::catalogue::{CATALOGUE, Problem};

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
}

/// Diagnoses each of `names` (tensors already found wrong) against every hypothesis of the
/// catalogue; a hypothesis explains a tensor when its residual is at most that tensor's entry of
/// `tolerances`.
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
                    let diff = u
                        .data
                        .iter()
                        .zip(&v.data)
                        .map(|(a, b)| (a - b) * (a - b))
                        .sum::<f64>()
                        .sqrt();
                    let den = if v.norm() > 0.0 {
                        v.norm()
                    } else {
                        r.norm().max(f64::MIN_POSITIVE)
                    };
                    let factor = h.factors.as_ref().map(|f| f[k]);
                    scored.push((code, h.label.clone(), diff / den, factor));
                }
            }
            // Smallest residual first; the catalogue's order breaks ties.
            scored.sort_by(|a, b| a.2.total_cmp(&b.2));
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
                },
                other => Diagnosis {
                    code: "unexplained",
                    label: String::new(),
                    residual: other.map_or(f64::INFINITY, |b| b.2),
                    factor: None,
                    runners_up,
                },
            }
        })
        .collect()
}
