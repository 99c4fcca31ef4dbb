//! Per-tensor figures of a check: how much was covered, how far apart the two gradients are, and
//! the verdict.

use crate::check::{CheckResult, CoordCheck, DirectionCheck, Scope, Settlement, Status};
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

/// The indices into `result.coords` of each part's coordinates, in order. One pass over the
/// coordinates, each tried against its own layer's parts only: a scan of every coordinate per
/// part would be quadratic in the layers of a deep network.
pub fn coords_by_part(result: &CheckResult, parts: &[Part]) -> Vec<Vec<usize>> {
    let mut of_layer: Vec<Vec<usize>> = Vec::new();
    for (p, part) in parts.iter().enumerate() {
        if part.layer >= of_layer.len() {
            of_layer.resize(part.layer + 1, Vec::new());
        }
        of_layer[part.layer].push(p);
    }
    let mut out = vec![Vec::new(); parts.len()];
    for (i, c) in result.coords.iter().enumerate() {
        for &p in of_layer.get(c.coord.layer).into_iter().flatten() {
            if parts[p].contains(c) {
                out[p].push(i);
            }
        }
    }
    out
}

/// Summarises a check per part; `parameters` gives each part's size.
pub fn summarise(result: &CheckResult, parts: &[(Part, usize)]) -> Vec<PartSummary> {
    let just: Vec<Part> = parts.iter().map(|&(p, _)| p).collect();
    let by_part = coords_by_part(result, &just);
    // The directions within one layer, by layer (those over every tensor belong to no part).
    let mut dirs_of_layer: Vec<Vec<&DirectionCheck>> = Vec::new();
    for d in &result.directions {
        if let Scope::Part { layer, .. } = d.scope {
            if layer >= dirs_of_layer.len() {
                dirs_of_layer.resize(layer + 1, Vec::new());
            }
            dirs_of_layer[layer].push(d);
        }
    }
    parts
        .iter()
        .zip(by_part)
        .map(|(&(part, parameters), idx)| {
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
            let dirs: Vec<&DirectionCheck> = dirs_of_layer
                .get(part.layer)
                .into_iter()
                .flatten()
                .copied()
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
