//! The health measures of the layer graph's kinds, beside the unit health every kind with an
//! activation shares ([`crate::unit_health`]): units or channels with identical incoming
//! parameters, norm scales that have collapsed, recurrent gates stuck near 0 or 1, attention heads
//! whose weights are one-hot, and embedding rows the probe data never reads.
//!
//! Thresholds are plumb's own figures, common practice with no formal source unless named
//! (docs/audit.md): a gate is saturated, and an attention row one-hot, within `saturation` (0.01)
//! of its limit, as a sigmoid unit is; the share of steps and samples (or queries) that flags it is
//! `saturated_fraction` (99%); a norm scale has collapsed below `collapsed_scale` (1e-3) in
//! magnitude, a thousandth of the 1 it starts from.

use ndarray::{Array1, ArrayD, ArrayView1, Axis};
use plumb_engine::graph::{Graph, Inside, Role, Shape};
use plumb_report::{Finding, Severity};
use serde::Serialize;

use crate::symmetry::equal_groups;
use crate::{SymmetricGroup, Thresholds, Units, unit_ranges};

/// The thresholds of the measures only the layer graph's kinds have. They join [`Thresholds`]
/// once the CLI builds its thresholds for the graph (adding a field there today would break the
/// CLI's struct literal).
#[derive(Clone, Debug, Serialize)]
pub struct KindThresholds {
    /// |scale| below which a norm's channel or feature has collapsed.
    pub collapsed_scale: f64,
}

impl Default for KindThresholds {
    fn default() -> Self {
        KindThresholds {
            collapsed_scale: 1e-3,
        }
    }
}

/// One measure inside a layer of the graph (a gate, the heads, a norm's scale, a table's rows).
#[derive(Clone, Debug, Serialize)]
pub struct InsideHealth {
    /// 1-based layer.
    pub layer: usize,
    /// The layer's kind.
    pub kind: &'static str,
    /// What is measured: `gate f`, `heads`, `scale`, `rows`.
    pub part: String,
    /// What `fractions` measure: `saturated` (gate units), `one-hot` (heads), `collapsed`
    /// (scale entries: 1 or 0), `unused` (table rows: 1 or 0).
    pub measure: &'static str,
    /// Per element (gate unit, head, channel or feature, row), the share on which it holds.
    pub fractions: Vec<f64>,
    pub mean_fraction: f64,
    /// The flagged elements: 1-based units, heads, channels or features; token ids (from 0) for
    /// table rows.
    pub flagged: Vec<usize>,
}

impl InsideHealth {
    fn new(
        layer: usize,
        kind: &'static str,
        part: String,
        measure: &'static str,
        fractions: Vec<f64>,
        flagged: Vec<usize>,
    ) -> Self {
        let mean_fraction = fractions.iter().sum::<f64>() / fractions.len().max(1) as f64;
        InsideHealth {
            layer,
            kind,
            part,
            measure,
            fractions,
            mean_fraction,
            flagged,
        }
    }
}

/// How a layer's output splits into units: the feature axis of its shape, a convolution's (or
/// signal's) channels over their positions, a sequence's width over its steps.
pub fn output_units(shape: &Shape) -> Units {
    let (outer, count, inner, name) = match *shape {
        Shape::Flat(n) => (1, n, 1, "unit"),
        Shape::Sequence { steps, width } => (steps, width, 1, "unit"),
        Shape::Signal { channels, length } => (1, channels, length, "channel"),
        Shape::Image {
            channels,
            height,
            width,
        } => (1, channels, height * width, "channel"),
        Shape::Tokens { steps, .. } => (1, steps, 1, "unit"),
    };
    Units {
        outer,
        count,
        inner,
        name,
    }
}

/// Groups of units (channels) of each layer whose incoming parameters are identical, split by
/// their outgoing weights in the next layer when it reads them directly.
pub fn graph_symmetry(
    graph: &Graph,
    params: &[ArrayD<f64>],
    tolerance: f64,
) -> Vec<SymmetricGroup> {
    let nodes = graph.nodes();
    let tapped: Vec<bool> = (0..nodes.len())
        .map(|j| {
            nodes
                .iter()
                .filter_map(|n| n.layer.tap())
                .any(|from| from == nodes[j].name)
        })
        .collect();
    let mut out = Vec::new();
    for (j, node) in nodes.iter().enumerate() {
        let owned = node.layer.unit_tensors();
        if owned.is_empty() {
            continue;
        }
        let first = node.tensors().start;
        let count = params[first + owned[0]].shape()[0];
        let rows: Vec<Array1<f64>> = (0..count)
            .map(|u| {
                owned
                    .iter()
                    .flat_map(|&t| params[first + t].index_axis(Axis(0), u).to_owned())
                    .collect()
            })
            .collect();
        let views: Vec<ArrayView1<f64>> = rows.iter().map(|r| r.view()).collect();
        // The next layer's slice [:, u, …] multiplies unit u, when nothing else reads it.
        let outgoing = nodes
            .get(j + 1)
            .filter(|_| !tapped[j])
            .and_then(|next| {
                next.layer
                    .input_unit_tensor()
                    .map(|t| next.tensors().start + t)
            })
            .filter(|&t| params[t].ndim() >= 2 && params[t].shape()[1] == count);
        for g in equal_groups(&views, tolerance) {
            let inseparable = match outgoing {
                Some(t) => {
                    let cols: Vec<Array1<f64>> = g
                        .iter()
                        .map(|&u| params[t].index_axis(Axis(1), u).iter().copied().collect())
                        .collect();
                    let views: Vec<ArrayView1<f64>> = cols.iter().map(|c| c.view()).collect();
                    equal_groups(&views, tolerance)
                        .into_iter()
                        .map(|sub| sub.into_iter().map(|k| g[k] + 1).collect())
                        .collect()
                }
                None => Vec::new(),
            };
            out.push(SymmetricGroup {
                layer: j + 1,
                units: g.iter().map(|u| u + 1).collect(),
                inseparable,
            });
        }
    }
    out
}

/// Norm scales near zero: per norm layer, which channels or features have collapsed.
pub fn collapsed_scales(
    graph: &Graph,
    params: &[ArrayD<f64>],
    k: &KindThresholds,
) -> Vec<(InsideHealth, String)> {
    graph
        .tensors()
        .iter()
        .enumerate()
        .filter(|(_, t)| t.spec.role == Role::Scale)
        .map(|(i, t)| {
            let fractions: Vec<f64> = params[i]
                .iter()
                .map(|v| f64::from(u8::from(v.abs() < k.collapsed_scale)))
                .collect();
            let flagged = (1..=fractions.len())
                .filter(|&f| fractions[f - 1] > 0.0)
                .collect();
            let kind = graph.nodes()[t.layer].layer.kind();
            let health = InsideHealth::new(
                t.layer + 1,
                kind,
                "scale".into(),
                "collapsed",
                fractions,
                flagged,
            );
            (health, t.name.clone())
        })
        .collect()
}

/// The measures inside layer `layer` (0-based) from what its kind shows ([`Inside`]).
pub fn inside_health(
    graph: &Graph,
    layer: usize,
    inside: &[Inside],
    t: &Thresholds,
) -> Vec<InsideHealth> {
    let kind = graph.nodes()[layer].layer.kind();
    let near = |v: f64, limit: f64| (v - limit).abs() < t.saturation;
    inside
        .iter()
        .map(|measure| match measure {
            Inside::Gate { letter, values } => {
                let rows = values.nrows().max(1) as f64;
                let fractions: Vec<f64> = values
                    .columns()
                    .into_iter()
                    .map(|c| {
                        c.iter().filter(|&&v| near(v, 0.0) || near(v, 1.0)).count() as f64 / rows
                    })
                    .collect();
                let flagged = flagged_at(&fractions, t.saturated_fraction);
                InsideHealth::new(
                    layer + 1,
                    kind,
                    format!("gate {letter}"),
                    "saturated",
                    fractions,
                    flagged,
                )
            }
            Inside::Attention { weights, causal } => {
                let (m, heads, steps, _) = weights.dim();
                let fractions: Vec<f64> = (0..heads)
                    .map(|h| {
                        // A query that sees one key (the first step under a causal mask) is
                        // one-hot by construction and tells nothing.
                        let queries: Vec<(usize, usize)> = (0..m)
                            .flat_map(|i| (0..steps).map(move |q| (i, q)))
                            .filter(|&(_, q)| !causal || q >= 1)
                            .collect();
                        let one_hot = queries
                            .iter()
                            .filter(|&&(i, q)| {
                                let top = (0..steps)
                                    .map(|k| weights[[i, h, q, k]])
                                    .fold(0.0, f64::max);
                                near(top, 1.0)
                            })
                            .count();
                        if queries.is_empty() || steps < 2 {
                            0.0
                        } else {
                            one_hot as f64 / queries.len() as f64
                        }
                    })
                    .collect();
                let flagged = flagged_at(&fractions, t.saturated_fraction);
                InsideHealth::new(
                    layer + 1,
                    kind,
                    "heads".into(),
                    "one-hot",
                    fractions,
                    flagged,
                )
            }
            Inside::Rows { reads, .. } => {
                let fractions: Vec<f64> =
                    reads.iter().map(|&r| f64::from(u8::from(r == 0))).collect();
                let flagged = (0..reads.len()).filter(|&r| reads[r] == 0).collect();
                InsideHealth::new(layer + 1, kind, "rows".into(), "unused", fractions, flagged)
            }
        })
        .collect()
}

/// 1-based elements whose fraction reaches `at`.
fn flagged_at(fractions: &[f64], at: f64) -> Vec<usize> {
    (1..=fractions.len())
        .filter(|&u| fractions[u - 1] >= at)
        .collect()
}

/// The findings of one inside measure; `tensor` names the tensor it concerns, `noun` what a scale
/// entry is (channel or feature), `samples` the probe batch's size.
pub fn inside_findings(
    h: &InsideHealth,
    tensor: &str,
    noun: &str,
    samples: usize,
    t: &Thresholds,
) -> Vec<Finding> {
    if h.flagged.is_empty() {
        return Vec::new();
    }
    let n = h.flagged.len();
    let of = |one: &str, many: &str| {
        if n == 1 {
            one.to_string()
        } else {
            many.to_string()
        }
    };
    let layer = format!("layer {} ({})", h.layer, h.kind);
    let list = unit_ranges(&h.flagged);
    let finding = match h.measure {
        "saturated" => {
            let gate = h.part.trim_start_matches("gate ");
            let pct = t.saturated_fraction * 100.0;
            Finding::new(
                "saturated-gate",
                Severity::Warning,
                format!(
                    "{} {list} of {layer}: gate {gate} is within {} of 0 or 1 on at least {pct:.0}% of the (step, sample) values of the {samples} probe samples, so it is all but fixed there and passes almost no gradient",
                    of("unit", "units"),
                    t.saturation,
                ),
            )
            .figure("gate", gate)
        }
        "one-hot" => Finding::new(
            "one-hot-head",
            Severity::Warning,
            format!(
                "{} {list} of {layer} {} all weight on one step (within {}) for at least {:.0}% of the queries of the probe data: {} like a fixed lookup and pass almost no gradient to the other steps",
                of("head", "heads"),
                of("puts", "put"),
                t.saturation,
                t.saturated_fraction * 100.0,
                of("it acts", "they act"),
            ),
        ),
        "collapsed" => {
            let share = n as f64 / h.fractions.len().max(1) as f64;
            let (code, severity) = if share >= t.layer_fraction {
                ("collapsed-norm", Severity::Error)
            } else {
                ("collapsed-scale", Severity::Warning)
            };
            Finding::new(
                code,
                severity,
                format!(
                    "the scale of {layer} is near 0 for {n} of its {} {noun}s ({noun} {list}): {} a constant (the shift) whatever the input, and no gradient reaches what lies below through {}",
                    h.fractions.len(),
                    of(&format!("that {noun} outputs"), &format!("those {noun}s output")),
                    of("it", "them"),
                ),
            )
            .figure("fraction", share)
        }
        "unused" => Finding::new(
            "unused-rows",
            Severity::Note,
            format!(
                "{n} of the {} rows of {layer} ({} {list}) {} never read by the probe data: the audit could not see {} used, and rows of tokens absent from the training data keep their initial values",
                h.fractions.len(),
                of("token", "tokens"),
                of("is", "are"),
                of("it", "them"),
            ),
        )
        .figure("tokens", &h.flagged),
        _ => return Vec::new(),
    };
    let finding = match h.measure {
        "unused" => finding,
        "one-hot" => finding.figure("heads", &h.flagged),
        _ => finding.figure("units", &h.flagged),
    };
    vec![finding.tensor(tensor).layer(h.layer)]
}
