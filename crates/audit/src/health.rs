//! Unit health on probe data: ReLU units that never fire, sigmoid and tanh units stuck near an
//! asymptote. Thresholds [practice, no formal source]: a unit is dead when it outputs 0 on every
//! probe sample (the definition Lu, Shin, Su & Karniadakis, Commun. Comput. Phys. 28:1671, 2020, use
//! for a dead network), saturated when its output is within 0.01 of an asymptote on 99% of them.
//! A layer is judged by the share of its units so flagged and by the mean of the fractions over its
//! units, which sees a layer saturated on most samples in every unit but on 99% in none.

use ndarray::ArrayView2;
use plumb_engine::{Activation, Scalar};
use serde::Serialize;

/// Bins of the activation histogram.
pub const BINS: usize = 16;

/// One hidden layer's health.
#[derive(Clone, Debug, Serialize)]
pub struct LayerHealth {
    /// 1-based layer.
    pub layer: usize,
    pub activation: String,
    pub units: usize,
    /// What a unit is: "unit", or "channel" for a convolution's output (measured over its
    /// positions and the samples).
    pub unit_name: &'static str,
    /// What `fractions` measure: `inactive` (ReLU), `negative` (leaky ReLU, ELU), `saturated`
    /// (sigmoid, tanh), or null.
    pub measure: Option<&'static str>,
    /// Per unit, the fraction of probe samples (and positions or steps) on which the measure
    /// holds.
    pub fractions: Vec<f64>,
    /// The mean of `fractions`: the share of the layer's (unit, sample) pairs on which it holds.
    pub mean_fraction: f64,
    /// 1-based units that are dead (ReLU) or saturated (sigmoid, tanh).
    pub flagged: Vec<usize>,
    /// Counts of the layer's activations in `BINS` equal bins over `range`.
    pub histogram: Vec<usize>,
    pub range: (f64, f64),
}

/// How a layer's output (m × size, each sample in C order of its shape) splits into units: the
/// sample's values are indexed (o · count + u) · inner + j, so unit u gathers `outer × inner`
/// values per sample (a channel's positions, a unit's steps).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Units {
    pub outer: usize,
    pub count: usize,
    pub inner: usize,
    /// "unit", or "channel" for a convolution's output.
    pub name: &'static str,
}

impl Units {
    /// One value per unit and sample: the columns of a dense layer.
    pub fn columns(count: usize) -> Units {
        Units {
            outer: 1,
            count,
            inner: 1,
            name: "unit",
        }
    }
}

/// Per unit, how many of its values in `v` (m × size) satisfy `test`: each sample's values walked
/// in runs of `inner` that belong to one unit, so no index is divided.
fn count_where<S: Scalar>(
    v: ArrayView2<S>,
    units: Units,
    test: impl Fn(f64) -> bool,
) -> Vec<usize> {
    let mut counts = vec![0usize; units.count];
    if units.inner == 0 || units.count == 0 {
        return counts;
    }
    fn tally(
        mut values: impl Iterator<Item = f64>,
        units: Units,
        counts: &mut [usize],
        test: &impl Fn(f64) -> bool,
    ) {
        for _ in 0..units.outer {
            for c in counts.iter_mut() {
                *c += values
                    .by_ref()
                    .take(units.inner)
                    .filter(|&x| test(x))
                    .count();
            }
        }
    }
    for row in v.rows() {
        match row.as_slice() {
            Some(r) => tally(r.iter().map(|x| x.re()), units, &mut counts, &test),
            None => tally(row.iter().map(|x| x.re()), units, &mut counts, &test),
        }
    }
    counts
}

/// One layer's health from its values before (`z`) and after (`a`) its activation: per unit, the
/// share of its (sample, position) values on which the measure holds. The values are read in f64
/// whatever they were computed in (widening is exact), one sample row at a time.
pub fn unit_health<S: Scalar>(
    layer: usize,
    act: Activation,
    z: ArrayView2<S>,
    a: ArrayView2<S>,
    units: Units,
    saturation: f64,
    saturated_fraction: f64,
) -> LayerHealth {
    let per_unit = (z.nrows() * units.outer * units.inner) as f64;
    let (measure, counts) = match act {
        Activation::Relu => (Some("inactive"), count_where(z, units, |z| z <= 0.0)),
        Activation::LeakyRelu { .. } | Activation::Elu { .. } => {
            (Some("negative"), count_where(z, units, |z| z <= 0.0))
        }
        Activation::Sigmoid => (
            Some("saturated"),
            count_where(a, units, |a| a < saturation || a > 1.0 - saturation),
        ),
        Activation::Tanh => (
            Some("saturated"),
            count_where(a, units, |a| a.abs() > 1.0 - saturation),
        ),
        _ => (None, vec![0; units.count]),
    };
    let fractions: Vec<f64> = counts.iter().map(|&c| c as f64 / per_unit).collect();
    let flagged = fractions
        .iter()
        .enumerate()
        .filter(|&(_, &f)| match act {
            Activation::Relu => f >= 1.0,
            Activation::Sigmoid | Activation::Tanh => f >= saturated_fraction,
            _ => false,
        })
        .map(|(u, _)| u + 1)
        .collect();
    let range = match act {
        Activation::Tanh => (-1.0, 1.0),
        Activation::Sigmoid => (0.0, 1.0),
        _ => {
            let (lo, hi) = a
                .iter()
                .map(|v| v.re())
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
                    (lo.min(v), hi.max(v))
                });
            if lo.is_finite() && hi > lo {
                (lo, hi)
            } else {
                (lo.min(0.0), lo.max(0.0) + 1.0)
            }
        }
    };
    let mut histogram = vec![0; BINS];
    for v in a.iter().map(|v| v.re()) {
        let t = (v - range.0) / (range.1 - range.0) * BINS as f64;
        // Truncation is the floor on the bins (t ≥ 0); below 0 goes to the first bin.
        if t.is_finite() {
            histogram[(t.max(0.0) as usize).min(BINS - 1)] += 1;
        }
    }
    let mean_fraction = fractions.iter().sum::<f64>() / fractions.len().max(1) as f64;
    LayerHealth {
        layer,
        activation: act.to_string(),
        units: units.count,
        unit_name: units.name,
        measure,
        mean_fraction,
        fractions,
        flagged,
        histogram,
        range,
    }
}

/// A histogram as a one-line sparkline of block characters.
pub fn sparkline(counts: &[usize]) -> String {
    const BARS: [char; 8] = ['▁', '▂', '▃', '▄', '▅', '▆', '▇', '█'];
    let max = counts.iter().copied().max().unwrap_or(0);
    counts
        .iter()
        .map(|&c| {
            if c == 0 {
                ' '
            } else {
                BARS[((c as f64 / max as f64) * 7.0).round() as usize]
            }
        })
        .collect()
}
