//! Naming the mistake behind a wrong tensor.

use crate::catalogue::{CONSTANT_FACTOR, Hypothesis};
use plumb_formats::Tensor;

/// What a diagnosis tests against: the reference tensors (in the layout the outside gradient is
/// named in) and the hypotheses of a catalogue, each with its code. The layer graph's canonical
/// tensors ([`crate::GraphProblem`]) and a weight file's tensors (`crate::file_view`) are two
/// sources; the rule that names a tensor is one.
pub trait Hypotheses {
    fn reference(&self) -> &[Tensor];
    /// Every hypothesis, in the order ties are broken; `outside` is the gradient under diagnosis
    /// (for hypotheses that fit a parameter to it, such as a constant factor).
    fn hypotheses(&self, outside: &[Tensor]) -> Vec<(&'static str, Hypothesis)>;
}

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
    /// Other hypotheses that reproduce the tensor as well (code, label): the gradient cannot tell
    /// them from the one named (e.g. `time-truncated` and `state-gradient-dropped` when only the
    /// last step's output is read).
    pub alike: Vec<(&'static str, String)>,
    /// The 0-based layer the named mistake sits in, when it sits in one.
    pub layer: Option<usize>,
    /// For `unexplained`: the 0-based layer whose backward step first goes wrong — the layer of
    /// the wrong tensor nearest the output, where backpropagation starts (set by `judge`).
    pub first_wrong_layer: Option<usize>,
}

/// The share of the disagreement between the outside tensor and the reference a hypothesis may
/// leave unexplained and still be scored: it must account for nine tenths of it.
const UNEXPLAINED_SHARE: f64 = 0.1;

/// A hypothesis scored on one tensor: code, label, residual, fitted factor, layer.
type Scored = (&'static str, String, f64, Option<f64>, Option<usize>);

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
/// A hypothesis that does not move the reference most of the way to the outside tensor (one that
/// leaves it as the reference has it: the L2 term's reach at λ = 0, a swap of two other layers, a
/// slope left out above the layer) never names that tensor: it cannot be what made it wrong. The
/// test is relative to the disagreement, not to the tensor's size, so a mistake whose effect on a
/// far tensor is itself near the agreement tolerance (a norm's ε misplaced, seen three layers
/// down) still names it when the hypothesis reproduces that effect. Of the hypotheses that reproduce a
/// tensor the smallest residual is named, the catalogue's order breaking ties, with a fitted
/// `constant-factor` only when no other code reproduces it.
pub fn diagnose(
    problem: &dyn Hypotheses,
    outside: &[Tensor],
    names: &[String],
    tolerances: &[f64],
) -> Vec<Diagnosis> {
    // Every hypothesis once, for all tensors.
    let hypotheses = problem.hypotheses(outside);
    names
        .iter()
        .zip(tolerances)
        .map(|(name, &tolerance)| {
            let u = outside.iter().find(|t| &t.name == name);
            let r = problem.reference().iter().find(|t| &t.name == name);
            let mut scored: Vec<Scored> = Vec::new();
            if let (Some(u), Some(r)) = (u, r) {
                for (code, h) in &hypotheses {
                    let Some(k) = h.tensors.iter().position(|t| &t.name == name) else {
                        continue;
                    };
                    let v = &h.tensors[k];
                    if v.shape != u.shape || v.data.iter().any(|x| !x.is_finite()) {
                        continue;
                    }
                    if v.shape == r.shape
                        && distance(&u.data, &v.data)
                            > UNEXPLAINED_SHARE * distance(&u.data, &r.data)
                    {
                        continue;
                    }
                    // Relative to the larger of the hypothesis and the reference: a hypothesis that
                    // is zero up to round-off (a bias whose gradient a norm cancels) is not judged
                    // against its own noise.
                    let den = v.norm().max(r.norm()).max(f64::MIN_POSITIVE);
                    let factor = h.factors.as_ref().map(|f| f[k]);
                    scored.push((
                        code,
                        h.label.clone(),
                        distance(&u.data, &v.data) / den,
                        factor,
                        h.layer,
                    ));
                }
            }
            // Smallest residual first; the catalogue's order breaks ties; a fitted factor yields to
            // any other code that reproduces the tensor.
            scored.sort_by(|a, b| {
                let demoted = |x: &Scored| x.0 == CONSTANT_FACTOR && x.2 <= tolerance;
                let reproduces = |x: &Scored| x.2 <= tolerance;
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
                .map(|(c, l, r, _, _)| (*c, l.clone(), *r))
                .collect();
            match best {
                Some((code, label, residual, factor, layer)) if residual <= tolerance => {
                    let alike = scored
                        .iter()
                        .skip(1)
                        .filter(|s| s.2 <= tolerance && s.0 != CONSTANT_FACTOR)
                        .map(|s| (s.0, s.1.clone()))
                        .collect();
                    Diagnosis {
                        code,
                        label,
                        residual,
                        factor,
                        runners_up,
                        alike,
                        layer,
                        first_wrong_layer: None,
                    }
                }
                _ => {
                    let residual = scored.iter().map(|s| s.2).fold(f64::INFINITY, f64::min);
                    Diagnosis {
                        code: "unexplained",
                        label: String::new(),
                        residual,
                        factor: None,
                        runners_up,
                        alike: Vec::new(),
                        layer: None,
                        first_wrong_layer: None,
                    }
                }
            }
        })
        .collect()
}
