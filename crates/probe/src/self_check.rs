//! The verdict rules of the self-check: per tensor, the program's gradient against finite
//! differences of its own loss (match, mismatch, unreliable at a kink, unsettled), with the
//! findings that say which tensor disagrees, where, and whether enough was settled to judge.

use plumb_fd::report::remedies;
use plumb_fd::{
    ExternalConfig, ExternalResult, Precision, SETTLE, Settlement, Status, UNSETTLED_SHARE,
};
use plumb_formats::Tensor;
use plumb_formats::shape_text;
use plumb_report::{Finding, Severity, Verdict, number};

use crate::TensorSpec;
use crate::report::{SelfCheck, SelfTensor, SelfWorst};

/// The self-check's report and findings: `params` are the program's tensors (the values sent),
/// `fitting` those whose gradient has their shape (the others fail outright), `r` the checker's
/// result over the fitting ones.
pub(crate) fn self_check_report(
    params: &[Tensor],
    fitting: &[usize],
    grads: &[(TensorSpec, Vec<f64>)],
    r: &ExternalResult,
    cfg: &ExternalConfig,
    precision: Precision,
    findings: &mut Vec<Finding>,
) -> SelfCheck {
    let mut tensors = Vec::new();
    let mut conclusive = true;
    for (i, p) in params.iter().enumerate() {
        let Some(t) = fitting.iter().position(|&f| f == i) else {
            findings.push(
                Finding::new(
                    "self-inconsistent",
                    Severity::Error,
                    format!(
                        "the program's gradient of this tensor has shape {}, its parameters {}: it cannot be the gradient of its own loss",
                        shape_text(&grads[i].0.shape),
                        shape_text(&p.shape)
                    ),
                )
                .tensor(&p.name),
            );
            tensors.push(SelfTensor {
                name: p.name.clone(),
                verdict: Verdict::Fail,
                parameters: p.data.len(),
                checked: 0,
                max_rel_error: f64::NAN,
                median_rel_error: f64::NAN,
                mismatches: 0,
                unreliable: 0,
                unsettled: 0,
                directions: 0,
                direction_mismatches: 0,
                worst: None,
            });
            continue;
        };
        let coords: Vec<_> = r.coords.iter().filter(|c| c.coord.tensor == t).collect();
        let dirs: Vec<_> = r
            .directions
            .iter()
            .filter(|d| d.tensor == Some(t))
            .collect();
        let mut rel: Vec<f64> = coords.iter().map(|c| c.rel_error).collect();
        rel.sort_by(f64::total_cmp);
        let worst = coords
            .iter()
            .min_by(|a, b| plumb_fd::worst_first((a.status, a.rel_error), (b.status, b.rel_error)));
        let mismatches = coords
            .iter()
            .filter(|c| c.status == Status::Mismatch)
            .count();
        let unreliable = coords
            .iter()
            .filter(|c| c.status == Status::Unreliable)
            .count();
        let direction_mismatches = dirs.iter().filter(|d| d.status == Status::Mismatch).count();
        let worst = worst.map(|w| SelfWorst {
            index: Tensor::index_of(p, w.coord.index),
            gradient: w.analytic,
            differences: w.numeric,
            rel_error: w.rel_error,
            bound: w.bound,
            status: w.status,
        });
        if mismatches > 0 || direction_mismatches > 0 {
            // Only a coordinate that disagrees is quoted (not an unreliable one).
            let at = worst.as_ref().filter(|w| w.status == Status::Mismatch).map_or(String::new(), |w| {
                format!(
                    "; worst at {}{:?}: gradient {:.6e}, differences {:.6e} (relative error {}, bound {})",
                    p.name,
                    w.index,
                    w.gradient,
                    w.differences,
                    number(w.rel_error),
                    number(w.bound)
                )
            });
            findings.push(
                Finding::new(
                    "self-inconsistent",
                    Severity::Error,
                    format!(
                        "the program's gradient disagrees with {} differences of its own loss at {mismatches} of {} coordinates and {direction_mismatches} of {} directions{at}",
                        cfg.method,
                        coords.len(),
                        dirs.len()
                    ),
                )
                .tensor(&p.name)
                .figure("mismatches", mismatches)
                .figure("direction_mismatches", direction_mismatches),
            );
        }
        if unreliable > 0 {
            findings.push(
                Finding::new(
                    "kink-unreliable",
                    Severity::Note,
                    format!("{unreliable} coordinates straddle a kink (or a break in a derivative the method relies on) at every step tried; not judged"),
                )
                .tensor(&p.name),
            );
        }
        let unsettled = coords
            .iter()
            .filter(|c| c.status == Status::Unsettled)
            .count();
        let settled_coords = Settlement::of(coords.iter().map(|c| c.status));
        let settled_dirs = Settlement::of(dirs.iter().map(|d| d.status));
        // Directions stand in for unchecked coordinates (as in the check report's per-tensor rule, plumb_fd::report).
        let settled = settled_coords.conclusive()
            && (coords.len() >= p.data.len() || settled_dirs.conclusive());
        conclusive &= settled;
        if settled_coords.unsettled > 0 || settled_dirs.unsettled > 0 {
            findings.push(
                Finding::new(
                    "unsettled",
                    if settled {
                        Severity::Note
                    } else {
                        Severity::Warning
                    },
                    format!(
                        "{} of {} coordinates ({unreliable} unreliable at kinks) and {} of {} directions are unsettled: {} differences in {} cannot tell a match from a mismatch there (their error bound exceeds {}% of the value){}",
                        settled_coords.unsettled,
                        coords.len(),
                        settled_dirs.unsettled,
                        dirs.len(),
                        cfg.method,
                        precision.name(),
                        SETTLE * 100.0,
                        if settled {
                            String::new()
                        } else {
                            format!(
                                "; more than the {}% a check may leave open, so this tensor is inconclusive",
                                UNSETTLED_SHARE * 100.0
                            )
                        }
                    ),
                )
                .tensor(&p.name)
                .figure("unsettled", unsettled)
                .figure("unreliable", unreliable)
                .figure("settled_share", settled_coords.share()),
            );
        }
        tensors.push(SelfTensor {
            name: p.name.clone(),
            verdict: if mismatches > 0 || direction_mismatches > 0 {
                Verdict::Fail
            } else if !settled {
                Verdict::Inconclusive
            } else {
                Verdict::Pass
            },
            parameters: p.data.len(),
            checked: coords.len(),
            max_rel_error: rel.last().copied().unwrap_or(0.0),
            median_rel_error: rel.get(rel.len() / 2).copied().unwrap_or(0.0),
            mismatches,
            unreliable,
            unsettled,
            directions: dirs.len(),
            direction_mismatches,
            worst,
        });
    }
    let global_bad = r
        .directions
        .iter()
        .filter(|d| d.tensor.is_none() && d.status == Status::Mismatch)
        .count();
    if global_bad > 0 {
        findings.push(Finding::new(
            "self-inconsistent",
            Severity::Error,
            format!("{global_bad} random directions over all tensors disagree with differences of the program's own loss"),
        ));
    }
    let global = Settlement::of(
        r.directions
            .iter()
            .filter(|d| d.tensor.is_none())
            .map(|d| d.status),
    );
    conclusive &=
        global.conclusive() || r.coords.len() >= params.iter().map(|p| p.data.len()).sum();
    if !conclusive {
        let all = Settlement::of(r.coords.iter().map(|c| c.status));
        let unreliable = r
            .coords
            .iter()
            .filter(|c| c.status == Status::Unreliable)
            .count();
        // The complex step does not apply to an outside program, and --step is its larger step.
        let what = remedies(cfg.method, precision, unreliable, all.unsettled)
            .split("; ")
            .filter(|r| !r.contains("complex"))
            .collect::<Vec<_>>()
            .join("; ");
        findings.push(
            Finding::new(
                "inconclusive",
                Severity::Warning,
                format!(
                    "{} of {} checked coordinates and {} of {} directions over all tensors are unsettled: more than the {}% a check may leave open, so the program's gradient can neither pass nor fail against its own loss. What would settle them: {}",
                    all.unsettled,
                    all.checked,
                    global.unsettled,
                    global.checked,
                    UNSETTLED_SHARE * 100.0,
                    if precision == Precision::F32 {
                        what.replace("(--precision f64)", "(the program computing in float64)")
                    } else {
                        what
                    }
                ),
            )
            .figure("unsettled", all.unsettled)
            .figure("checked", all.checked)
            .figure("settled_share", all.share()),
        );
    }
    SelfCheck {
        conclusive,
        method: cfg.method.name().into(),
        step_rule: cfg.step.map_or_else(
            || cfg.method.step_rule(cfg.eps).to_string(),
            |h| format!("fixed h = {h:e} (--step)"),
        ),
        tolerance: cfg.tolerance,
        sample: cfg.sample.to_string(),
        checked: r.coords.len(),
        parameters: params.iter().map(|p| p.data.len()).sum(),
        directions_per_tensor: cfg.directions,
        tensors,
    }
}
