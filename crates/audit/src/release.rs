//! The release audit: every check in turn, as findings.

use plumb_engine::{Batch, Init};
use plumb_formats::{Description, Role, TensorFile, assemble, bind, expected_tensors};
use plumb_report::{Finding, Severity, Verdict};
use serde::Serialize;

use crate::{
    LayerFlow, LayerHealth, LayerInit, ShapeAudit, audit_shapes, check_values, layer_flow,
    layer_health, layer_init, symmetric_groups,
};

/// The thresholds of the audit; `Default` gives the documented defaults (docs/audit.md).
#[derive(Clone, Debug, Serialize)]
pub struct Thresholds {
    /// |w| beyond which a value is implausible for any trained network.
    pub max_magnitude: f64,
    /// Relative distance under which two units' incoming rows count as equal.
    pub symmetry_tolerance: f64,
    /// Distance from an asymptote within which a sigmoid or tanh output is saturated.
    pub saturation: f64,
    /// Fraction of probe samples on which a unit must be saturated to be reported.
    pub saturated_fraction: f64,
    /// Fraction of a layer's units dead or saturated that makes the layer itself a finding.
    pub layer_fraction: f64,
    /// Factor off the scheme the activation calls for beyond which a layer's scale is flagged.
    pub scale_factor: f64,
    /// Orders of magnitude of gradient change from the output layer to the first that is flagged.
    pub flow_orders: f64,
    /// Level of the Kolmogorov–Smirnov test against a claimed initialisation.
    pub ks_alpha: f64,
}

impl Default for Thresholds {
    fn default() -> Self {
        Thresholds {
            max_magnitude: 1e6,
            symmetry_tolerance: 1e-6,
            saturation: 0.01,
            saturated_fraction: 0.99,
            layer_fraction: 0.5,
            scale_factor: 10.0,
            flow_orders: 3.0,
            ks_alpha: 0.01,
        }
    }
}

/// The whole audit.
#[derive(Clone, Debug, Serialize)]
pub struct Audit {
    #[serde(skip)]
    pub verdict: Verdict,
    pub shapes: ShapeAudit,
    pub health: Vec<LayerHealth>,
    pub init: Vec<LayerInit>,
    pub flow: Vec<LayerFlow>,
    /// Checks that could not run, and why.
    pub skipped: Vec<String>,
    pub findings: Vec<Finding>,
}

/// Audits a weight file on a probe batch; `claimed` is the scheme the file says it was drawn from.
pub fn audit(
    desc: &Description,
    file: &TensorFile,
    batch: &Batch,
    claimed: Option<Init>,
    t: &Thresholds,
    seed: u64,
) -> Audit {
    let file = &*bind(desc, file);
    let shapes = audit_shapes(desc, Some(file));
    let mut findings = shapes.findings.clone();
    findings.extend(check_values(desc, file, t));
    let mut skipped = Vec::new();
    let (mut health, mut init, mut flow) = (Vec::new(), Vec::new(), Vec::new());
    let weights = match (shapes.verdict, assemble(desc, file, &desc.path)) {
        (Verdict::Pass, Ok(w)) => Some(w),
        _ => {
            skipped.push("symmetry, unit health, initialisation and flow: the tensors do not fit the description".into());
            None
        }
    };
    let finite = weights
        .as_ref()
        .is_some_and(|w| w.layers().iter().all(|l| l.iter().all(|v| v.is_finite())));
    if weights.is_some() && !finite {
        skipped.push(
            "unit health, initialisation and flow: the weights hold non-finite values".into(),
        );
    }
    let names: Vec<String> = (0..desc.layers.len())
        .map(|l| {
            expected_tensors(desc, desc.layout)
                .into_iter()
                .find(|e| e.layer == l && e.role != Role::Bias)
                .map(|e| e.name)
                .unwrap_or_default()
        })
        .collect();
    let net = &desc.network;
    if let Some(w) = &weights {
        for (l, groups) in symmetric_groups(w, t.symmetry_tolerance)
            .into_iter()
            .enumerate()
        {
            for g in groups {
                let units: Vec<usize> = g.iter().map(|u| u + 1).collect();
                findings.push(
                    Finding::new(
                        "symmetric-units",
                        Severity::Error,
                        format!(
                            "units {units:?} of layer {} have the same incoming weights and bias: they compute the same value, get the same gradient, and will never differ",
                            l + 2
                        ),
                    )
                    .tensor(&names[l])
                    .layer(l + 1)
                    .figure("units", &units),
                );
            }
        }
    }
    if let (Some(w), true) = (&weights, finite) {
        let trace = net.forward(w, batch.x.view());
        health = layer_health(net, &trace, t.saturation, t.saturated_fraction);
        for h in &health {
            health_findings(h, &names[h.layer - 1], t, batch.len(), &mut findings);
        }
        for (l, spec) in net.layers().iter().enumerate() {
            let values: Vec<f64> = w
                .layer(l)
                .slice(ndarray::s![.., 1..])
                .iter()
                .copied()
                .collect();
            let li = layer_init(l + 1, &names[l], &values, spec, claimed, t.ks_alpha);
            init_findings(&li, spec.activation.name(), t, &mut findings);
            init.push(li);
        }
        flow = layer_flow(net, w, &trace, batch.y.view(), seed);
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
    Audit {
        verdict: Verdict::of(&findings),
        shapes,
        health,
        init,
        flow,
        skipped,
        findings,
    }
}

fn health_findings(
    h: &LayerHealth,
    tensor: &str,
    t: &Thresholds,
    samples: usize,
    out: &mut Vec<Finding>,
) {
    if h.flagged.is_empty() {
        return;
    }
    let relu = h.measure == Some("inactive");
    let (unit_code, layer_code, what) = if relu {
        (
            "dead-unit",
            "dead-layer",
            format!("outputs 0 on all {samples} probe samples: it is dead and learns no more"),
        )
    } else {
        (
            "saturated-unit",
            "saturated-layer",
            format!(
                "is within {} of an asymptote on at least {:.0}% of the {samples} probe samples: its gradient all but vanishes",
                t.saturation,
                t.saturated_fraction * 100.0
            ),
        )
    };
    let share = h.flagged.len() as f64 / h.units as f64;
    if share >= t.layer_fraction {
        out.push(
            Finding::new(
                layer_code,
                Severity::Error,
                format!(
                    "{} of the {} units of hidden layer {} ({}) — units {:?} — each {what}",
                    h.flagged.len(),
                    h.units,
                    h.layer,
                    h.activation,
                    h.flagged
                ),
            )
            .tensor(tensor)
            .layer(h.layer)
            .figure("units", &h.flagged)
            .figure("fraction", share),
        );
    } else {
        for &u in &h.flagged {
            out.push(
                Finding::new(
                    unit_code,
                    Severity::Warning,
                    format!(
                        "unit {u} of hidden layer {} ({}) {what}",
                        h.layer, h.activation
                    ),
                )
                .tensor(tensor)
                .layer(h.layer)
                .figure("unit", u)
                .figure("fraction", h.fractions[u - 1]),
            );
        }
    }
}

fn init_findings(li: &LayerInit, activation: &str, t: &Thresholds, out: &mut Vec<Finding>) {
    if let Some(test) = &li.test
        && !test.passed
    {
        out.push(
                Finding::new(
                    "init-mismatch",
                    Severity::Error,
                    format!(
                        "its weights are not drawn from {} (Kolmogorov–Smirnov D = {:.4}, p = {:.2e} < {}): their standard deviation {:.4} is {:.2}× that scheme's; closest is {} ({:.2}×)",
                        test.scheme,
                        test.statistic,
                        test.p_value,
                        t.ks_alpha,
                        li.std,
                        scheme_ratio(li, test.scheme),
                        li.closest,
                        li.ratio
                    ),
                )
                .tensor(&li.tensor)
                .layer(li.layer)
                .figure("p_value", test.p_value)
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
                format!("its weights' standard deviation {:.3e} is {r:.3}× what {} calls for with {activation} units: {why}", li.std, li.reference),
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
