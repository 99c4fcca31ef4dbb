//! The release audit: every check in turn, as findings.

use plumb_engine::Init;
use plumb_report::{Finding, Severity, Verdict, tally};
use serde::Serialize;

use crate::{
    GraphShapeAudit, InsideHealth, LayerFlow, LayerHealth, LayerInit, SymmetricGroup, unit_ranges,
};

/// `fail` when any finding reaches `level`.
pub fn verdict_at(findings: &[Finding], level: Severity) -> Verdict {
    if findings.iter().any(|f| f.severity >= level) {
        Verdict::Fail
    } else {
        Verdict::Pass
    }
}

impl Audit {
    /// The verdict line's summary: the findings counted by severity.
    pub fn summary(&self) -> String {
        tally(&self.findings)
    }
}

/// The thresholds of the audit; `Default` gives the documented defaults (docs/audit.md), which are
/// common practice with no formal source unless docs/audit.md names one.
#[derive(Clone, Debug, Serialize)]
pub struct Thresholds {
    /// |w| beyond which a value is implausible for any trained network.
    pub max_magnitude: f64,
    /// Relative distance under which two units' incoming rows (or outgoing columns) count as equal.
    pub symmetry_tolerance: f64,
    /// Distance from an asymptote within which a sigmoid or tanh output is saturated.
    pub saturation: f64,
    /// Fraction of probe samples on which a unit must be saturated to be reported.
    pub saturated_fraction: f64,
    /// Fraction of a layer's units dead or saturated that makes the layer itself a finding.
    pub layer_fraction: f64,
    /// Mean fraction over a layer's units (inactive for ReLU, saturated for sigmoid and tanh) that
    /// makes the layer a finding even when no single unit reaches the per-unit rule.
    pub layer_mean: f64,
    /// Factor off the scheme the activation calls for beyond which a layer's scale is flagged.
    pub scale_factor: f64,
    /// Orders of magnitude of gradient change from the output layer to the first that is flagged.
    pub flow_orders: f64,
    /// Family-wise level of the Kolmogorov–Smirnov tests against a claimed initialisation (Holm's
    /// correction across the layers).
    pub ks_alpha: f64,
    /// The lowest severity that fails the audit (the report states it as `fail_on`).
    #[serde(skip)]
    pub fail_on: Severity,
}

impl Default for Thresholds {
    fn default() -> Self {
        Thresholds {
            max_magnitude: 1e6,
            symmetry_tolerance: 1e-6,
            saturation: 0.01,
            saturated_fraction: 0.99,
            layer_fraction: 0.5,
            layer_mean: 0.85,
            scale_factor: 10.0,
            flow_orders: 3.0,
            ks_alpha: 0.01,
            fail_on: Severity::Error,
        }
    }
}

/// The whole audit.
#[derive(Clone, Debug, Serialize)]
pub struct Audit {
    /// `fail` when a finding reaches `fail_on`.
    #[serde(skip)]
    pub verdict: Verdict,
    /// The lowest severity that fails the audit (the thresholds' `fail_on`).
    #[serde(skip)]
    pub fail_on: Severity,
    pub shapes: GraphShapeAudit,
    pub health: Vec<LayerHealth>,
    pub init: Vec<LayerInit>,
    pub flow: Vec<LayerFlow>,
    /// The layer graph's measures inside its kinds (gates, heads, norm scales, table rows); empty
    /// for a dense network.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub inside: Vec<InsideHealth>,
    /// Checks that could not run, and why.
    pub skipped: Vec<String>,
    pub findings: Vec<Finding>,
}

/// A gradient whose RMS changes by `flow_orders` orders of magnitude from the output layer to the
/// first.
pub(crate) fn flow_findings(flow: &[LayerFlow], t: &Thresholds, findings: &mut Vec<Finding>) {
    if let (Some(first), Some(last)) = (flow.first(), flow.last())
        && flow.len() > 1
        && first.gradient_rms > 0.0
        && last.gradient_rms > 0.0
    {
        let orders = (first.gradient_rms / last.gradient_rms).log10();
        if orders.abs() >= t.flow_orders {
            let (code, what) = if orders < 0.0 {
                ("vanishing-gradient", "shrinks")
            } else {
                ("exploding-gradient", "grows")
            };
            findings.push(
                Finding::new(
                    code,
                    Severity::Warning,
                    format!(
                        "the gradient {what} by {:.1} orders of magnitude from the output layer (RMS {:.3e}) to the first (RMS {:.3e})",
                        orders.abs(),
                        last.gradient_rms,
                        first.gradient_rms
                    ),
                )
                .figure("orders", orders),
            );
        }
    }
}

/// Identical incoming rows: the same activation (a warning); identical outgoing columns as well:
/// the same gradient for ever (an error).
pub(crate) fn symmetry_findings(
    g: &SymmetricGroup,
    tensor: &str,
    output: bool,
    channels: bool,
) -> Vec<Finding> {
    let (names, dup, sym) = if channels {
        ("channels", "duplicate-channels", "symmetric-channels")
    } else {
        ("units", "duplicate-units", "symmetric-units")
    };
    let mut out = Vec::new();
    let all_inseparable = g.inseparable.len() == 1 && g.inseparable[0].len() == g.units.len();
    if !all_inseparable {
        let outgoing = if output {
            "they are output units, whose gradients differ with the targets, so training can still separate them"
        } else if g.inseparable.is_empty() {
            "their outgoing weights differ, so they receive different gradients and training can still separate them"
        } else {
            "their outgoing weights are not all identical, so not all of them receive the same gradient"
        };
        out.push(
            Finding::new(
                dup,
                Severity::Warning,
                format!(
                    "{names} {} of layer {} have identical incoming weights and bias: they compute the same activation on every input; {outgoing}",
                    unit_ranges(&g.units),
                    g.layer
                ),
            )
            .tensor(tensor)
            .layer(g.layer)
            .figure("units", &g.units),
        );
    }
    for units in &g.inseparable {
        out.push(
            Finding::new(
                sym,
                Severity::Error,
                format!(
                    "{names} {} of layer {} have identical incoming weights and bias and identical outgoing weights: they compute the same activation and receive the same gradient, so gradient descent can never separate them",
                    unit_ranges(units),
                    g.layer
                ),
            )
            .tensor(tensor)
            .layer(g.layer)
            .figure("units", units),
        );
    }
    out
}

/// A finding about a tensor when the layer has one (a pooling layer with an activation has none).
fn about(f: Finding, tensor: Option<&str>) -> Finding {
    match tensor {
        Some(t) => f.tensor(t),
        None => f,
    }
}

/// The unit findings of one layer's health: per unit, for the layer's share of flagged units, and
/// for its mean fraction. A convolution's channels are judged over their positions as well.
pub(crate) fn health_findings(
    h: &LayerHealth,
    tensor: Option<&str>,
    t: &Thresholds,
    samples: usize,
    out: &mut Vec<Finding>,
) {
    let channel = h.unit_name == "channel";
    let (name, names) = if channel {
        ("channel", "channels")
    } else {
        ("unit", "units")
    };
    let at = if channel { " at every position" } else { "" };
    // What a flagged unit does, said of one unit and of several.
    let (unit_code, layer_code, mean_code, one, many) = match h.measure {
        Some("inactive") => (
            if channel { "dead-channel" } else { "dead-unit" },
            "dead-layer",
            "mostly-inactive-layer",
            format!("outputs 0{at} on all {samples} probe samples: it is dead and learns no more"),
            format!(
                "each output 0{at} on all {samples} probe samples: they are dead and learn no more"
            ),
        ),
        Some("saturated") => {
            let over = if channel { " (and positions)" } else { "" };
            let near = format!(
                "within {} of an asymptote on at least {:.0}% of the {samples} probe samples{over}",
                t.saturation,
                t.saturated_fraction * 100.0
            );
            (
                if channel {
                    "saturated-channel"
                } else {
                    "saturated-unit"
                },
                "saturated-layer",
                "mostly-saturated-layer",
                format!("is {near}: its gradient all but vanishes"),
                format!("are each {near}: their gradients all but vanish"),
            )
        }
        _ => return,
    };
    let pairs = if channel {
        "(channel, sample, position) values"
    } else {
        "(unit, sample) pairs"
    };
    let layer = format!("layer {} ({})", h.layer, h.activation);
    let share = h.flagged.len() as f64 / h.units.max(1) as f64;
    let phrase = if h.flagged.len() == 1 {
        format!("{name} {}", h.flagged[0])
    } else {
        format!("{names} {}", unit_ranges(&h.flagged))
    };
    if !h.flagged.is_empty() && share >= t.layer_fraction {
        out.push(about(
            Finding::new(
                layer_code,
                Severity::Error,
                format!(
                    "{} of the {} {names} of {layer} — {phrase} — {many}",
                    h.flagged.len(),
                    h.units,
                ),
            )
            .layer(h.layer)
            .figure("units", &h.flagged)
            .figure("fraction", share)
            .figure("mean_fraction", h.mean_fraction),
            tensor,
        ));
        return;
    }
    if h.mean_fraction >= t.layer_mean {
        let state = if layer_code == "dead-layer" {
            format!(
                "its {names} output 0 on {:.1}% of the {pairs} of the probe data",
                h.mean_fraction * 100.0
            )
        } else {
            format!(
                "its {names} are within {} of an asymptote on {:.1}% of the {pairs} of the probe data",
                t.saturation,
                h.mean_fraction * 100.0
            )
        };
        out.push(about(
            Finding::new(
                mean_code,
                Severity::Warning,
                format!(
                    "{layer}: {state} (at or above {:.0}%), though only {} of its {} {names} {} the per-{name} rule: little signal and gradient pass through it",
                    t.layer_mean * 100.0,
                    h.flagged.len(),
                    h.units,
                    if h.flagged.len() == 1 { "meets" } else { "meet" }
                ),
            )
            .layer(h.layer)
            .figure("mean_fraction", h.mean_fraction),
            tensor,
        ));
    }
    for &u in &h.flagged {
        out.push(about(
            Finding::new(
                unit_code,
                Severity::Warning,
                format!("{name} {u} of {layer} {one}"),
            )
            .layer(h.layer)
            .figure("unit", u)
            .figure("fraction", h.fractions[u - 1]),
            tensor,
        ));
    }
}

pub(crate) fn init_findings(
    li: &LayerInit,
    activation: &str,
    t: &Thresholds,
    out: &mut Vec<Finding>,
) {
    if let Some(test) = &li.test
        && !test.passed
    {
        out.push(
                Finding::new(
                    "init-mismatch",
                    Severity::Warning,
                    format!(
                        "its weights are unlikely to be drawn from {} (Kolmogorov–Smirnov D = {:.4}, p = {:.2e}, {:.2e} after Holm's correction across the layers < {}): their standard deviation {} is {}× that scheme's; closest is {} ({}×)",
                        test.scheme,
                        test.statistic,
                        test.p_value,
                        test.adjusted_p_value,
                        t.ks_alpha,
                        times(li.std),
                        times(scheme_ratio(li, test.scheme)),
                        li.closest,
                        times(li.ratio)
                    ),
                )
                .tensor(&li.tensor)
                .layer(li.layer)
                .figure("p_value", test.p_value)
                .figure("adjusted_p_value", test.adjusted_p_value)
                .figure("statistic", test.statistic),
            );
    }
    let r = li.reference_ratio;
    if r > 0.0 && (r < 1.0 / t.scale_factor || r > t.scale_factor) {
        let (code, why) = if r < 1.0 {
            ("scale-too-small", "the signal will vanish through it")
        } else if activation == "sigmoid" || activation == "tanh" {
            ("scale-too-large", "its units will saturate")
        } else {
            ("scale-too-large", "the signal will explode through it")
        };
        out.push(
            Finding::new(
                code,
                Severity::Warning,
                format!("its weights' standard deviation {} is {}× what {} calls for with {activation} units: {why}", times(li.std), times(r), li.reference),
            )
            .tensor(&li.tensor)
            .layer(li.layer)
            .figure("ratio", r),
        );
    }
}

/// std over the σ of a named scheme.
fn scheme_ratio(li: &LayerInit, scheme: &str) -> f64 {
    Init::from_name(scheme).map_or(f64::NAN, |s| li.std / s.std_dev(li.fan_in, li.fan_out))
}

/// A figure for a message: three decimals near 1, exponent form when far from it (a byte-swapped
/// layer's spread is 1e285 times any scheme's).
fn times(r: f64) -> String {
    if r.is_finite() && r != 0.0 && !(1e-3..1e4).contains(&r.abs()) {
        format!("{r:.3e}")
    } else {
        format!("{r:.3}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn relu_layer(fractions: Vec<f64>, flagged: Vec<usize>) -> LayerHealth {
        LayerHealth {
            layer: 1,
            activation: "relu".into(),
            units: fractions.len(),
            unit_name: "unit",
            measure: Some("inactive"),
            mean_fraction: fractions.iter().sum::<f64>() / fractions.len() as f64,
            fractions,
            flagged,
            histogram: vec![0; crate::BINS],
            range: (0.0, 1.0),
        }
    }

    fn codes(h: &LayerHealth) -> Vec<(String, Severity)> {
        let mut out = Vec::new();
        health_findings(h, Some("layer1"), &Thresholds::default(), 100, &mut out);
        out.into_iter().map(|f| (f.code, f.severity)).collect()
    }

    // The three rules on one ReLU layer of 10 units (defaults: 50% of units dead makes the layer
    // an error; a mean inactive fraction of 85% makes it a warning when too few units are dead).
    #[test]
    fn a_layer_is_judged_by_its_dead_share_and_by_its_mean() {
        // One unit dead, the others inactive on 90%: the mean (0.91) flags the layer.
        let mut f = vec![0.9; 10];
        f[4] = 1.0;
        let c = codes(&relu_layer(f, vec![5]));
        assert!(
            c.contains(&("mostly-inactive-layer".into(), Severity::Warning)),
            "{c:?}"
        );
        assert!(
            c.contains(&("dead-unit".into(), Severity::Warning)),
            "{c:?}"
        );
        // Half the units dead: the layer is an error, and its mean finding is not repeated.
        let f = [vec![1.0; 5], vec![0.5; 5]].concat();
        let c = codes(&relu_layer(f, vec![1, 2, 3, 4, 5]));
        assert_eq!(c, vec![("dead-layer".to_string(), Severity::Error)]);
        // A healthy layer, inactive on half its pairs: nothing.
        assert!(codes(&relu_layer(vec![0.5; 10], vec![])).is_empty());
        // Just under the mean threshold: nothing either.
        assert!(codes(&relu_layer(vec![0.84; 10], vec![])).is_empty());
    }

    // A byte-swapped layer's spread is near 1e285: the KS finding writes it in exponent form, as
    // the scale findings do, not as a number of some 290 digits.
    #[test]
    fn init_mismatch_of_a_huge_spread_prints_it_in_exponent_form() {
        let li = LayerInit {
            layer: 1,
            tensor: "W1".into(),
            fan_in: 4,
            fan_out: 3,
            std: 1.25e285,
            closest: "glorot-uniform",
            ratio: 1e285,
            reference: "glorot-normal",
            reference_ratio: 1e285,
            test: Some(crate::init::KsTest {
                scheme: "glorot-uniform",
                statistic: 0.5,
                p_value: 1e-30,
                adjusted_p_value: 1e-30,
                passed: false,
            }),
        };
        let mut out = Vec::new();
        init_findings(&li, "tanh", &Thresholds::default(), &mut out);
        let ks = out
            .iter()
            .find(|f| f.code == "init-mismatch")
            .expect("found");
        assert!(
            ks.message.contains("deviation 1.250e285 is"),
            "{}",
            ks.message
        );
        assert!(ks.message.len() < 400, "{}", ks.message);
    }
}
