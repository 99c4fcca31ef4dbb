//! Baselines: the figures of a passing run, recorded, so that a later run fails when a figure got
//! worse, a new finding appeared, or the network changed shape — and says exactly what changed.
//!
//! A figure is worse when it is an error or a count that grew (`*error*`, `*bound*`, mismatches,
//! unreliable, dead or saturated units, …) and it grew tenfold over its recorded value (plus an
//! absolute slack of 1e-12 for values at rounding level), or crossed one of the bands 1e-7, 1e-4,
//! 1e-2 of relative error [practice] upward, or a count rose at all.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::{Document, Finding, Severity};

/// What identifies the network a run was made on.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct NetworkId {
    /// A hash of the description's canonical text (independent of comments and layout of the file).
    pub hash: String,
    /// The tensors and their shapes under the description's layout.
    pub shapes: Vec<(String, Vec<usize>)>,
}

/// One recorded case.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Recorded {
    pub passed: bool,
    pub figures: BTreeMap<String, f64>,
}

/// A baseline file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Baseline {
    pub plumb_baseline: u32,
    pub command: String,
    pub network: Option<NetworkId>,
    pub cases: BTreeMap<String, Recorded>,
    /// The finding codes of the run (with their tensor), as `code@tensor`.
    pub findings: Vec<String>,
}

/// The baseline format's version.
pub const BASELINE_VERSION: u32 = 1;

/// Relative-error bands a figure may not cross upward [practice, no formal source].
const BANDS: [f64; 3] = [1e-7, 1e-4, 1e-2];

impl Baseline {
    pub fn record(doc: &Document, findings: &[Finding]) -> Baseline {
        Baseline {
            plumb_baseline: BASELINE_VERSION,
            command: doc.command.clone(),
            network: doc.network.clone(),
            cases: doc
                .cases
                .iter()
                .map(|c| {
                    (
                        c.name.clone(),
                        Recorded {
                            passed: c.passed,
                            figures: c.figures.clone(),
                        },
                    )
                })
                .collect(),
            findings: keys(findings),
        }
    }

    /// What got worse since the baseline, as error findings naming the case and the figure.
    pub fn compare(&self, doc: &Document, findings: &[Finding]) -> Vec<Finding> {
        let mut out = Vec::new();
        if self.command != doc.command {
            out.push(Finding::new(
                "baseline-other-command",
                Severity::Error,
                format!(
                    "the baseline was recorded by `plumb {}`, this run is `plumb {}`",
                    self.command, doc.command
                ),
            ));
            return out;
        }
        if let (Some(old), Some(new)) = (&self.network, &doc.network) {
            if old.shapes != new.shapes {
                let describe = |s: &[(String, Vec<usize>)]| {
                    s.iter()
                        .map(|(n, sh)| format!("{n} {sh:?}"))
                        .collect::<Vec<_>>()
                        .join(", ")
                };
                out.push(Finding::new(
                    "baseline-shape-changed",
                    Severity::Error,
                    format!(
                        "the network changed shape: it was {}, it is {}",
                        describe(&old.shapes),
                        describe(&new.shapes)
                    ),
                ));
            } else if old.hash != new.hash {
                out.push(Finding::new(
                    "baseline-description-changed",
                    Severity::Error,
                    "the network description changed since the baseline (activations, loss, L2 or layout): record a new baseline if that was meant",
                ));
            }
        }
        for c in &doc.cases {
            let Some(old) = self.cases.get(&c.name) else {
                continue;
            };
            if old.passed && !c.passed {
                out.push(
                    Finding::new(
                        "baseline-regressed",
                        Severity::Error,
                        format!(
                            "{} passed in the baseline and fails now: {}",
                            c.name, c.message
                        ),
                    )
                    .tensor(&c.name),
                );
            }
            for (name, &now) in &c.figures {
                let Some(&then) = old.figures.get(name) else {
                    continue;
                };
                if let Some(why) = worse(name, then, now) {
                    out.push(
                        Finding::new(
                            "baseline-worse",
                            Severity::Error,
                            format!("{}: {name} went from {then:e} to {now:e} ({why})", c.name),
                        )
                        .tensor(&c.name)
                        .figure("figure", name)
                        .figure("baseline", then)
                        .figure("now", now),
                    );
                }
            }
        }
        let known = &self.findings;
        for (f, key) in findings.iter().zip(keys(findings)) {
            if f.severity >= Severity::Warning && !known.contains(&key) {
                let mut n = Finding::new(
                    "baseline-new-finding",
                    Severity::Error,
                    format!("a new {} finding `{}`: {}", f.severity, f.code, f.message),
                );
                if let Some(t) = &f.tensor {
                    n = n.tensor(t);
                }
                out.push(n);
            }
        }
        out
    }
}

fn keys(findings: &[Finding]) -> Vec<String> {
    findings
        .iter()
        .map(|f| format!("{}@{}", f.code, f.tensor.as_deref().unwrap_or("")))
        .collect()
}

/// Whether a figure got worse, and how.
fn worse(name: &str, then: f64, now: f64) -> Option<String> {
    let is_count = [
        "mismatch",
        "unreliable",
        "dead",
        "saturated",
        "count",
        "errors",
        "warnings",
    ]
    .iter()
    .any(|k| name.contains(k));
    let is_error = name.contains("error") || name.contains("bound") || name.contains("residual");
    if !now.is_finite() && then.is_finite() {
        return Some("it is no longer finite".into());
    }
    if is_count {
        return (now > then).then(|| "the count rose".into());
    }
    if is_error {
        if now > 10.0 * then + 1e-12 {
            return Some(format!(
                "{:.1}× the baseline",
                now / then.max(f64::MIN_POSITIVE)
            ));
        }
        if let Some(b) = BANDS.iter().find(|&&b| then <= b && now > b) {
            return Some(format!("it crossed {b:e}"));
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::Case;

    fn doc(err: f64, shape: usize) -> Document {
        let mut d = Document::new("t");
        d.command = "check".into();
        d.network = Some(NetworkId {
            hash: "h".into(),
            shapes: vec![("layer1".into(), vec![shape, 5])],
        });
        d.cases.push(
            Case::new("layer1", true)
                .figure("max_rel_error", err)
                .figure("mismatches", 0.0),
        );
        d
    }

    #[test]
    fn same_run_passes_and_changes_are_named() {
        let b = Baseline::record(&doc(1e-10, 3), &[]);
        assert!(b.compare(&doc(1e-10, 3), &[]).is_empty());
        assert!(b.compare(&doc(5e-10, 3), &[]).is_empty(), "within 10×");
        let f = b.compare(&doc(2e-9, 3), &[]);
        assert_eq!(f[0].code, "baseline-worse");
        assert!(
            f[0].message.contains("layer1: max_rel_error"),
            "{}",
            f[0].message
        );
        let f = b.compare(&doc(1e-10, 4), &[]);
        assert_eq!(f[0].code, "baseline-shape-changed");
        let new = [Finding::new("gradient-mismatch", Severity::Error, "x").tensor("layer1")];
        assert_eq!(
            b.compare(&doc(1e-10, 3), &new)[0].code,
            "baseline-new-finding"
        );
        // A band crossed upward is worse even when under tenfold.
        let b = Baseline::record(&doc(0.9e-7, 3), &[]);
        assert_eq!(b.compare(&doc(2e-7, 3), &[])[0].code, "baseline-worse");
    }
}
