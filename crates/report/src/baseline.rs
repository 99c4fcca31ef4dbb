//! Baselines: the figures of a passing run, recorded, so that a later run fails when a figure got
//! worse, a new finding appeared, or the network changed shape — and says exactly what changed.
//!
//! An error figure (`*error*`, `*bound*`, `*residual*`) is worse when it grew tenfold over its
//! recorded value (plus an absolute slack of 1e-12 for values at rounding level) [practice]; an
//! error that crossed plumb's own tolerance and bound fails its case, which the baseline reports as
//! a regression, so no fixed levels of relative error are needed here; a count of things gone wrong
//! (`*mismatches`, `unreliable`, `*_units`) is worse when it rose at all. Any other figure (a
//! gradient norm, a weight's standard deviation) is a property of the run: a change beyond one
//! part in a million is a warning that this is not the baseline's run, not a failure.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::document::figure;
use crate::{Block, Document, Finding, Severity, Verdict, tally};

/// A run judged against a baseline ([`Baseline::judge`]).
#[derive(Clone, Debug)]
pub struct Judged {
    /// What changed since the baseline, as findings.
    pub changes: Vec<Finding>,
    /// How many of the changes are at the run's `fail_on` severity or worse.
    pub worse: usize,
    /// The run's verdict with the changes counted.
    pub verdict: Verdict,
}

impl Judged {
    /// Writes the judgement into a run's JSON report: a `baseline` object (`path`, `changes`,
    /// `worse`), the changes appended to `findings`, and `"verdict": "fail"` when a change is at
    /// the run's `fail_on` level or worse (docs/json.md).
    pub fn annotate(&self, path: &str, report: &mut serde_json::Value) {
        let Some(obj) = report.as_object_mut() else {
            return;
        };
        obj.insert(
            "baseline".into(),
            serde_json::json!({"path": path, "changes": self.changes.len(), "worse": self.worse}),
        );
        if let Some(list) = obj.get_mut("findings").and_then(|f| f.as_array_mut()) {
            list.extend(
                self.changes
                    .iter()
                    .map(|f| serde_json::to_value(f).expect("a finding serialises")),
            );
        }
        if self.worse > 0 {
            obj.insert("verdict".into(), serde_json::json!("fail"));
        }
    }
}

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
    /// A figure that was not finite is written as null (JSON has no NaN) and read back as NaN.
    #[serde(deserialize_with = "nulls_as_nan")]
    pub figures: BTreeMap<String, f64>,
}

fn nulls_as_nan<'de, D: serde::Deserializer<'de>>(d: D) -> Result<BTreeMap<String, f64>, D::Error> {
    let raw: BTreeMap<String, Option<f64>> = Deserialize::deserialize(d)?;
    Ok(raw
        .into_iter()
        .map(|(k, v)| (k, v.unwrap_or(f64::NAN)))
        .collect())
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

    /// Reads a baseline file's bytes (the format version is the caller's to check).
    pub fn from_json(bytes: &[u8]) -> Result<Baseline, serde_json::Error> {
        serde_json::from_slice(bytes)
    }

    /// Why this baseline cannot judge the run, if it cannot: a run made on a network needs the
    /// network's shapes in the baseline, or a change of shape would pass unseen (an edited or
    /// damaged baseline whose `network` is null or missing).
    pub fn unfit_for(&self, doc: &Document) -> Option<String> {
        match (&self.network, &doc.network) {
            (None, Some(_)) => Some(
                "the baseline records no network (`network` is null or missing), so a change of \
                 shape could not be seen: record the baseline again with --save-baseline"
                    .into(),
            ),
            _ => None,
        }
    }

    /// Judges a run against this baseline: the changes since it are findings of the run,
    /// listed before its verdict, and those at the run's `fail_on` level or worse fail it, as its
    /// own findings would; the verdict line then counts them too. `findings` are the run's own;
    /// `source` names the baseline (its path) in the report.
    pub fn judge(&self, source: &str, doc: &mut Document, findings: &[Finding]) -> Judged {
        let changes = self.compare(doc, findings);
        let worse = changes.iter().filter(|f| f.severity >= doc.fail_on).count();
        let mut verdict = doc.verdict().unwrap_or(Verdict::Pass);
        doc.insert_before_verdict(vec![
            Block::Heading(format!("against the baseline {source}")),
            Block::Findings(changes.clone()),
        ]);
        if !changes.is_empty() {
            let since = format!("since the baseline {source}: {}", tally(&changes));
            let summary = match (worse, doc.verdict_summary()) {
                (0, Some(own)) => format!("{own}; {since}"),
                (0, None) => since,
                _ => format!(
                    "{worse} change{} at {} or worse {since}",
                    if worse == 1 { "" } else { "s" },
                    doc.fail_on
                ),
            };
            if worse > 0 {
                verdict = Verdict::Fail;
            }
            doc.set_verdict(verdict, &summary);
        }
        Judged {
            changes,
            worse,
            verdict,
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
        let mut same_network = true;
        if let (Some(old), Some(new)) = (&self.network, &doc.network) {
            // Maps, not scans: a baseline may list as many tensors as it likes.
            let index = |list: &'_ [(String, Vec<usize>)]| -> BTreeMap<String, Vec<usize>> {
                list.iter().rev().cloned().collect()
            };
            let (old_shapes, new_shapes) = (index(&old.shapes), index(&new.shapes));
            let mut seen = std::collections::BTreeSet::new();
            let names: Vec<&String> = old
                .shapes
                .iter()
                .chain(&new.shapes)
                .map(|(n, _)| n)
                .filter(|n| seen.insert(*n))
                .collect();
            for name in names {
                let shape_of = |m: &BTreeMap<String, Vec<usize>>| m.get(name.as_str()).cloned();
                let message = match (shape_of(&old_shapes), shape_of(&new_shapes)) {
                    (Some(a), Some(b)) if a == b => continue,
                    (Some(a), Some(b)) => format!(
                        "the network changed shape: {name} was {} in the baseline and is {} now",
                        tuple(&a),
                        tuple(&b)
                    ),
                    (Some(a), None) => format!(
                        "the network changed shape: {name} ({}) is in the baseline and no longer in the network",
                        tuple(&a)
                    ),
                    (None, Some(b)) => format!(
                        "the network changed shape: {name} ({}) is new since the baseline",
                        tuple(&b)
                    ),
                    (None, None) => continue,
                };
                same_network = false;
                out.push(
                    Finding::new("baseline-shape-changed", Severity::Error, message).tensor(name),
                );
            }
            if same_network && old.hash != new.hash {
                same_network = false;
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
            let about = |f: Finding| match &c.tensor {
                Some(t) => f.tensor(t),
                None => f,
            };
            if old.passed && !c.passed {
                let code = c.code.as_deref().unwrap_or("failed");
                out.push(about(Finding::new(
                    "baseline-regressed",
                    Severity::Error,
                    format!("{} passed in the baseline and fails now ({code})", c.name),
                )));
            }
            for (name, &now) in &c.figures {
                let Some(&then) = old.figures.get(name) else {
                    continue;
                };
                let Some((severity, why)) = change(name, then, now) else {
                    continue;
                };
                // A property of another network is bound to differ; the shape finding says why.
                if severity < Severity::Error && !same_network {
                    continue;
                }
                let code = if severity == Severity::Error {
                    "baseline-worse"
                } else {
                    "baseline-drifted"
                };
                out.push(about(
                    Finding::new(
                        code,
                        severity,
                        format!(
                            "`{name}` of {} went from {} to {} ({why})",
                            c.name,
                            figure(then),
                            figure(now)
                        ),
                    )
                    .figure("case", &c.name)
                    .figure("figure", name)
                    .figure("baseline", then)
                    .figure("now", now),
                ));
            }
        }
        if same_network {
            for name in self.cases.keys() {
                if !doc.cases.iter().any(|c| &c.name == name) {
                    out.push(
                        Finding::new(
                            "baseline-case-missing",
                            Severity::Warning,
                            format!(
                                "{name} is in the baseline and was not checked now (another --sample, \
                                 --directions or layout?)"
                            ),
                        )
                        .figure("case", name),
                    );
                }
            }
        }
        let known = &self.findings;
        for (f, key) in findings.iter().zip(keys(findings)) {
            if f.severity >= Severity::Warning && !known.contains(&key) {
                let gist = f.message.split("; ").next().unwrap_or_default();
                let mut n = Finding::new(
                    "baseline-new-finding",
                    Severity::Error,
                    format!(
                        "a new {} `{}` the baseline did not have: {gist}",
                        f.severity, f.code
                    ),
                )
                .figure("code", &f.code);
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

/// What a figure measures, which decides what counts as a change for the worse.
#[derive(Debug, PartialEq)]
enum Kind {
    /// Things that went wrong (mismatches, unreliable coordinates, flagged units): any rise is worse.
    Count,
    /// An error or an error bound: worse when it grew tenfold.
    Error,
    /// A property of the network, weights and data (a gradient norm, a standard deviation): a
    /// change is not worse in itself but means the run is not the baseline's run.
    Property,
}

fn kind(name: &str) -> Kind {
    if name.ends_with("mismatches") || name == "unreliable" || name.ends_with("_units") {
        Kind::Count
    } else if name.contains("error") || name.contains("bound") || name.contains("residual") {
        Kind::Error
    } else {
        Kind::Property
    }
}

/// Relative change beyond which a property counts as changed: far above the run-to-run noise of
/// a parallel sum in f64, far below any change of weights or data that matters.
const PROPERTY_TOLERANCE: f64 = 1e-6;

/// Whether a figure changed for the worse (an error) or changed at all (a warning), and how.
fn change(name: &str, then: f64, now: f64) -> Option<(Severity, String)> {
    let worse = |why: String| Some((Severity::Error, why));
    if then.is_finite() && !now.is_finite() {
        return worse("it is no longer finite".into());
    }
    match kind(name) {
        Kind::Count => (now > then).then(|| (Severity::Error, "the count rose".into())),
        Kind::Error => (now > 10.0 * then + 1e-12).then(|| {
            (
                Severity::Error,
                if then > 0.0 {
                    format!("{}× the baseline; 10× is allowed", figure(now / then))
                } else {
                    "it was 0 in the baseline; 10× (+1e-12) is allowed".into()
                },
            )
        }),
        Kind::Property => {
            let rel = (now - then).abs() / then.abs().max(now.abs()).max(f64::MIN_POSITIVE);
            (rel > PROPERTY_TOLERANCE).then(|| {
                let by = if then != 0.0 {
                    format!("{:+.3}%", 100.0 * (now - then) / then.abs())
                } else {
                    "from 0".to_string()
                };
                (
                    Severity::Warning,
                    format!("{by}: the weights, data or settings differ from the baseline's"),
                )
            })
        }
    }
}

/// A shape as a tuple, `(3, 6)`.
fn tuple(shape: &[usize]) -> String {
    match shape {
        [n] => format!("({n},)"),
        _ => format!(
            "({})",
            shape
                .iter()
                .map(|d| d.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    }
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
                .about("layer1")
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
            f[0].message
                .contains("`max_rel_error` of layer1 went from 1.000e-10 to 2.000e-9"),
            "{}",
            f[0].message
        );
        assert_eq!(f[0].tensor.as_deref(), Some("layer1"));
        let f = b.compare(&doc(1e-10, 4), &[]);
        assert_eq!(f[0].code, "baseline-shape-changed");
        assert_eq!(f[0].tensor.as_deref(), Some("layer1"));
        assert!(
            f[0].message
                .contains("was (3, 5) in the baseline and is (4, 5) now")
        );
        let new = [Finding::new("gradient-mismatch", Severity::Error, "x").tensor("layer1")];
        assert_eq!(
            b.compare(&doc(1e-10, 3), &new)[0].code,
            "baseline-new-finding"
        );
        // Growth under tenfold is no change for the worse by itself: plumb's verdict on the case
        // (its tolerance and bound) decides whether such an error is wrong.
        let b = Baseline::record(&doc(0.9e-7, 3), &[]);
        assert!(b.compare(&doc(8e-7, 3), &[]).is_empty());
        assert_eq!(b.compare(&doc(1e-5, 3), &[])[0].code, "baseline-worse");
        // A figure of 0 in the baseline, and a NaN one read back from JSON's null.
        let b = Baseline::record(&doc(0.0, 3), &[]);
        let f = b.compare(&doc(1e-9, 3), &[]);
        assert!(
            f[0].message.contains("it was 0 in the baseline"),
            "{}",
            f[0].message
        );
        let b = Baseline::record(&doc(f64::NAN, 3), &[]);
        let text = serde_json::to_string(&b).unwrap();
        assert!(text.contains("null"), "{text}");
        let back: Baseline = serde_json::from_str(&text).unwrap();
        assert!(back.cases["layer1"].figures["max_rel_error"].is_nan());
    }

    fn with(d: Document, case: Case) -> Document {
        let mut d = d;
        d.cases[0] = case;
        d
    }

    #[test]
    fn counts_properties_and_cases_each_follow_their_rule() {
        let case = |passed: bool, mismatches: f64, norm: f64| {
            Case::new("layer1", passed)
                .about("layer1")
                .figure("max_rel_error", 1e-10)
                .figure("mismatches", mismatches)
                .figure("gradient_norm", norm)
        };
        let b = Baseline::record(&with(doc(1e-10, 3), case(true, 0.0, 0.25)), &[]);
        // A count may not rise at all.
        let f = b.compare(&with(doc(1e-10, 3), case(true, 1.0, 0.25)), &[]);
        assert_eq!(f.len(), 1, "{f:?}");
        assert_eq!(
            (f[0].code.as_str(), f[0].severity),
            ("baseline-worse", Severity::Error)
        );
        // A property that moved is a warning, not a failure; within one part in 10⁶ it is silent.
        let f = b.compare(&with(doc(1e-10, 3), case(true, 0.0, 0.26)), &[]);
        assert_eq!(f.len(), 1, "{f:?}");
        assert_eq!(
            (f[0].code.as_str(), f[0].severity),
            ("baseline-drifted", Severity::Warning)
        );
        assert!(
            b.compare(
                &with(doc(1e-10, 3), case(true, 0.0, 0.25 * (1.0 + 1e-8))),
                &[]
            )
            .is_empty()
        );
        // A case that passed and fails now.
        let failing = case(false, 0.0, 0.25).failing("gradient-mismatch", "wrong");
        let f = b.compare(&with(doc(1e-10, 3), failing), &[]);
        assert_eq!(f[0].code, "baseline-regressed", "{f:?}");
        assert!(
            f[0].message.contains("(gradient-mismatch)"),
            "{}",
            f[0].message
        );
        // A case the run no longer has.
        let mut other = doc(1e-10, 3);
        other.cases[0].name = "layer9".into();
        let f = b.compare(&other, &[]);
        assert!(f.iter().any(|f| f.code == "baseline-case-missing"), "{f:?}");
        // Another command's baseline says so.
        let mut other = doc(1e-10, 3);
        other.command = "probe".into();
        assert_eq!(b.compare(&other, &[])[0].code, "baseline-other-command");
    }
}
