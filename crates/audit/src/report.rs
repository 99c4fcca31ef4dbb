//! The audit as a report: its test cases and its tables, built here so that the command only
//! renders them.

use std::collections::{HashMap, HashSet};

use plumb_report::{Block, Case, Cell, Finding, Table, Tone, number};

use crate::{Audit, sparkline, unit_ranges};

impl Audit {
    /// The audit's test cases beside the shape cases: one per layer's tensor, failed by the first
    /// finding about it at `fail_on` or worse (shape findings have cases of their own), and one
    /// for the network, failed by such a finding about no tensor.
    pub fn cases(&self) -> Vec<Case> {
        let a = self;
        let level = self.fail_on;
        // The first failing finding per tensor (`None`: about no tensor), and each layer's first
        // health and flow row, found in one pass each: a file of 100,000 stray tensors has a
        // finding each, and a scan of them per tensor was quadratic.
        let mut failing: HashMap<Option<&str>, &Finding> = HashMap::new();
        for f in a.findings.iter().filter(|f| {
            f.severity >= level
                && !f.code.starts_with("shape")
                && !matches!(
                    f.code.as_str(),
                    "transposed-matrix"
                        | "bias-column-missing"
                        | "bias-column-extra"
                        | "bias-wrong-length"
                        | "layers-out-of-order"
                        | "wrong-shape"
                        | "tensor-missing"
                        | "tensor-unexpected"
                        | "other-layout"
                        | "dtype-not-float"
                )
        }) {
            failing.entry(f.tensor.as_deref()).or_insert(f);
        }
        let mut health = HashMap::new();
        for h in &a.health {
            health.entry(h.layer).or_insert(h);
        }
        let mut flow = HashMap::new();
        for f in &a.flow {
            flow.entry(f.layer).or_insert(f);
        }
        let mut out = Vec::new();
        for i in &a.init {
            let flagged = health.get(&i.layer).map_or(0, |h| h.flagged.len());
            let mut c = Case::new(format!("audit {}", i.tensor), true)
                .about(&i.tensor)
                .figure("flagged_units", flagged as f64)
                .figure("weight_std", i.std)
                .figure("std_ratio", i.reference_ratio);
            if let Some(f) = flow.get(&i.layer) {
                c = c
                    .figure("activation_std", f.activation_std)
                    .figure("gradient_norm", f.gradient_norm)
                    .figure("sigma_max", f.sigma_max);
            }
            if let Some(f) = failing.get(&Some(i.tensor.as_str())) {
                c = c.failing(&f.code, f.message.clone());
            }
            out.push(c);
        }
        // Tensors no initialisation row stands for (biases, norm scales, tables) get a case when
        // a finding about them fails the audit, so that no failure is left out of the cases.
        let init: HashSet<&str> = a.init.iter().map(|i| i.tensor.as_str()).collect();
        let mut extra: HashSet<&str> = HashSet::new();
        for f in &a.findings {
            if let Some(t) = f.tensor.as_deref()
                && !init.contains(t)
                && let Some(f) = failing.get(&Some(t))
                && extra.insert(t)
            {
                out.push(
                    Case::new(format!("audit {t}"), true)
                        .about(t)
                        .failing(&f.code, f.message.clone()),
                );
            }
        }
        let mut c = Case::new("audit network", true);
        if let Some(f) = failing.get(&None) {
            c = c.failing(&f.code, f.message.clone());
        }
        out.push(c);
        out
    }

    /// The health, initialisation and flow tables of the audit.
    pub fn sections(&self) -> Vec<Block> {
        let a = self;
        let mut out = Vec::new();
        if !a.health.is_empty() {
            out.push(Block::Heading("unit health on the probe data".into()));
            let mut t = Table::new([
                "layer",
                "activation",
                "units",
                "measure",
                "mean",
                "worst",
                "flagged",
                "activations",
            ]);
            for h in &a.health {
                let mean = h.mean_fraction;
                let worst = h.fractions.iter().copied().fold(0.0, f64::max);
                t.push([
                    Cell::from(h.layer.to_string()),
                    Cell::from(h.activation.clone()),
                    Cell::from(h.units.to_string()),
                    Cell::from(h.measure.unwrap_or("—")),
                    Cell::from(if h.measure.is_some() {
                        format!("{:.1}%", mean * 100.0)
                    } else {
                        "—".into()
                    }),
                    Cell::from(if h.measure.is_some() {
                        format!("{:.1}%", worst * 100.0)
                    } else {
                        "—".into()
                    }),
                    Cell::new(
                        if h.flagged.is_empty() {
                            "none".to_string()
                        } else {
                            unit_ranges(&h.flagged)
                        },
                        if h.flagged.is_empty() {
                            Tone::Good
                        } else {
                            Tone::Bad
                        },
                    ),
                    Cell::from(format!(
                        "{:.2} {} {:.2}",
                        h.range.0,
                        sparkline(&h.histogram),
                        h.range.1
                    )),
                ]);
            }
            out.push(Block::Table(t));
        }
        if !a.init.is_empty() {
            out.push(Block::Heading("initialisation scale".into()));
            let mut t = Table::new([
                "layer",
                "tensor",
                "fan in",
                "fan out",
                "std",
                "closest",
                "called for",
                "KS test",
            ]);
            for i in &a.init {
                let ks = i.test.as_ref().map_or("—".to_string(), |k| {
                    format!(
                        "{}: D {:.4}, p {} (Holm {}){}",
                        k.scheme,
                        k.statistic,
                        number(k.p_value),
                        number(k.adjusted_p_value),
                        if k.passed { "" } else { " ✗" }
                    )
                });
                let tone = if i.test.as_ref().is_some_and(|k| !k.passed) {
                    Tone::Bad
                } else {
                    Tone::Plain
                };
                t.push([
                    Cell::from(i.layer.to_string()),
                    Cell::from(i.tensor.clone()),
                    Cell::from(i.fan_in.to_string()),
                    Cell::from(i.fan_out.to_string()),
                    Cell::from(number(i.std)),
                    Cell::from(format!("{} ({}×)", i.closest, ratio(i.ratio))),
                    Cell::from(format!("{} ({}×)", i.reference, ratio(i.reference_ratio))),
                    Cell::new(ks, tone),
                ]);
            }
            out.push(Block::Table(t));
        }
        if !a.inside.is_empty() {
            out.push(Block::Heading("inside the layers".into()));
            let mut t = Table::new(["layer", "kind", "part", "measure", "mean", "flagged"]);
            for h in &a.inside {
                t.push([
                    Cell::from(h.layer.to_string()),
                    Cell::from(h.kind),
                    Cell::from(h.part.clone()),
                    Cell::from(h.measure),
                    Cell::from(format!("{:.1}%", h.mean_fraction * 100.0)),
                    if h.flagged.is_empty() {
                        Cell::new("none".to_string(), Tone::Good)
                    } else {
                        Cell::new(unit_ranges(&h.flagged), Tone::Bad)
                    },
                ]);
            }
            out.push(Block::Table(t));
        }
        if !a.flow.is_empty() {
            out.push(Block::Heading("signal and gradient flow".into()));
            let mut t = Table::new([
                "layer",
                "activation std",
                "gradient norm",
                "gradient RMS",
                "largest singular value",
            ]);
            for f in &a.flow {
                t.push([
                    Cell::from(f.layer.to_string()),
                    Cell::from(number(f.activation_std)),
                    Cell::from(number(f.gradient_norm)),
                    Cell::from(number(f.gradient_rms)),
                    Cell::from(number(f.sigma_max)),
                ]);
            }
            out.push(Block::Table(t));
        }
        out
    }
}

/// A ratio to a scheme's scale: two decimals near 1, the table's number form far from it.
fn ratio(r: f64) -> String {
    if r.is_finite() && (1e-2..1e3).contains(&r.abs()) {
        format!("{r:.2}")
    } else {
        number(r)
    }
}
