//! Per-tensor figures of a check: how much was covered, how far apart the two gradients are, and
//! the verdict.

use crate::check::{CheckResult, CoordCheck, Scope, Settlement, Status};
use crate::order::worst_first;

/// A part of the network a summary covers: a layer's bias weights, its other weights, or both
/// (one tensor of a weight file, under its layout).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Part {
    pub layer: usize,
    pub bias: bool,
    pub weights: bool,
}

impl Part {
    pub fn contains(&self, c: &CoordCheck) -> bool {
        c.coord.layer == self.layer
            && if c.coord.col == 0 {
                self.bias
            } else {
                self.weights
            }
    }

    fn covers(&self, scope: Scope) -> bool {
        match scope {
            Scope::Global => false,
            Scope::Part { layer, bias } => {
                layer == self.layer && if bias { self.bias } else { self.weights }
            }
        }
    }
}

/// The figures of one part.
#[derive(Clone, Debug, PartialEq)]
pub struct PartSummary {
    pub part: Part,
    pub parameters: usize,
    pub checked: usize,
    pub max_rel_error: f64,
    pub median_rel_error: f64,
    /// The method's error bound relative to the compared values, largest and median.
    pub max_bound: f64,
    pub median_bound: f64,
    /// ‖a − n‖₂ / ‖a‖₂ over the checked coordinates.
    pub norm_rel_error: f64,
    pub mismatches: usize,
    pub unreliable: usize,
    pub unsettled: usize,
    pub directions: usize,
    pub direction_mismatches: usize,
    /// How much of the coordinates, and apart of the directions, was settled.
    pub settled_coords: Settlement,
    pub settled_directions: Settlement,
    /// Indices into `CheckResult::coords`, worst first (at most 3).
    pub worst: Vec<usize>,
}

impl PartSummary {
    pub fn passed(&self) -> bool {
        self.mismatches == 0 && self.direction_mismatches == 0
    }

    /// Whether enough of the part was settled for a verdict (see [`Settlement::conclusive`]): its
    /// coordinates, and its directions unless every coordinate was checked (directions stand in
    /// for the coordinates a sample leaves out).
    pub fn conclusive(&self) -> bool {
        self.settled_coords.conclusive()
            && (self.checked >= self.parameters || self.settled_directions.conclusive())
    }
}

/// Summarises a check per part; `parameters` gives each part's size.
pub fn summarise(result: &CheckResult, parts: &[(Part, usize)]) -> Vec<PartSummary> {
    parts
        .iter()
        .map(|&(part, parameters)| {
            let idx: Vec<usize> = (0..result.coords.len())
                .filter(|&i| part.contains(&result.coords[i]))
                .collect();
            let coords: Vec<&CoordCheck> = idx.iter().map(|&i| &result.coords[i]).collect();
            let rel: Vec<f64> = coords.iter().map(|c| c.rel_error).collect();
            let bounds: Vec<f64> = coords
                .iter()
                .map(|c| c.bound / c.analytic.abs().max(c.numeric.abs()).max(f64::MIN_POSITIVE))
                .collect();
            let (d2, a2) = coords.iter().fold((0.0, 0.0), |(d, a), c| {
                (d + (c.analytic - c.numeric).powi(2), a + c.analytic.powi(2))
            });
            let mut worst = idx.clone();
            worst.sort_by(|&i, &j| {
                let (a, b) = (&result.coords[i], &result.coords[j]);
                worst_first((a.status, a.rel_error), (b.status, b.rel_error))
            });
            worst.truncate(3);
            let dirs: Vec<_> = result
                .directions
                .iter()
                .filter(|d| part.covers(d.scope))
                .collect();
            PartSummary {
                part,
                parameters,
                checked: coords.len(),
                max_rel_error: rel.iter().copied().fold(0.0, f64::max),
                median_rel_error: median(&rel),
                max_bound: bounds.iter().copied().fold(0.0, f64::max),
                median_bound: median(&bounds),
                norm_rel_error: if a2 > 0.0 {
                    (d2 / a2).sqrt()
                } else {
                    d2.sqrt()
                },
                mismatches: coords
                    .iter()
                    .filter(|c| c.status == Status::Mismatch)
                    .count(),
                unreliable: coords
                    .iter()
                    .filter(|c| c.status == Status::Unreliable)
                    .count(),
                unsettled: coords
                    .iter()
                    .filter(|c| c.status == Status::Unsettled)
                    .count(),
                directions: dirs.len(),
                direction_mismatches: dirs.iter().filter(|d| d.status == Status::Mismatch).count(),
                settled_coords: Settlement::of(coords.iter().map(|c| c.status)),
                settled_directions: Settlement::of(dirs.iter().map(|d| d.status)),
                worst,
            }
        })
        .collect()
}

fn median(v: &[f64]) -> f64 {
    if v.is_empty() {
        return 0.0;
    }
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let n = s.len();
    if n % 2 == 1 {
        s[n / 2]
    } else {
        0.5 * (s[n / 2 - 1] + s[n / 2])
    }
}
