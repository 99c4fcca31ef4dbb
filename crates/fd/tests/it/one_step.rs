//! Central differences settled at ±h alone (`Method::settle_one_step`, issue 14): the band and
//! the bound at their edges, kinks, a wrong value the size of the truncation error, and whole
//! checks — dense, layer graph, outside program — that settle most coordinates on three losses
//! and still find every planted mistake.

use std::cell::Cell;

use ndarray::ArrayD;
use plumb_engine::graph::Graph;
use plumb_engine::{Activation, Batch, Init, Loss, Rng};
use plumb_fd::{
    Change, CheckConfig, ExternalConfig, Inside, Method, ONE_STEP_BAND, ONE_STEP_BOUND,
    OutsideTensor, Precision, Rule, Sample, Status, Target, check_external, check_graph,
    check_graph_gradient,
};

use crate::graph_common::dense;

fn ident(h: f64) -> f64 {
    h
}

/// f(x) = 3x + x²/2 about 0 [calculus: f′(0) = 3, f‴ = 0, so the quotient at ±h is 3 up to
/// round-off and the third difference is round-off alone]. With the band fixed at w, an analytic
/// value 0.99 w from the quotient settles on one step, one 1.01 w from it does not (the ladder
/// takes it, as before).
#[test]
fn the_band_holds_at_its_edges() {
    let f = |d: f64| (3.0 * d + 0.5 * d * d, false);
    let h = 1e-3;
    let w = 1e-6;
    for (offset, settles) in [(0.99, true), (-0.99, true), (1.01, false), (-1.01, false)] {
        let target = Target {
            analytic: 3.0 + offset * w,
            within: w,
            bound: 1.0,
        };
        let e = Method::Central.estimate_toward(&f, 0.0, h, 1e-16, ident, 1, Some(target));
        assert_eq!(e.one_step, settles, "offset {offset}: {e:?}");
        assert!((e.value - 3.0).abs() < 1e-12, "{e:?}");
        if settles {
            assert_eq!(e.step, h);
            // Its bound is the round-off at h (2·noise/h) plus twice the truncation the third
            // difference shows — here round-off too.
            assert!(e.error >= 2.0 * 1e-16 / h && e.error < 1e-11, "{e:?}");
        }
    }
}

/// f(x) = sin(0.3 + x) [the identity sin(a + b) − sin(a − b) = 2 cos a sin b: the quotient at ±h
/// is cos 0.3 · sin h / h exactly, and f‴ = −cos]. At h = 0.02 its truncation error is 6.7e-5 of
/// the value; at h = 1e-4 it is 1.7e-9. The bound a settle may carry is the edge here: the first
/// is far above half the tolerance 1e-6 of the value, and does not settle however close the
/// analytic value; the second settles.
#[test]
fn the_bound_decides_with_the_band_met() {
    let x0 = 0.3f64;
    let f = |d: f64| ((x0 + d).sin(), false);
    let f0 = x0.sin();
    let tolerance = 1e-6;
    for (h, settles) in [(0.02f64, false), (1e-4, true)] {
        let quotient = x0.cos() * h.sin() / h;
        let scale = tolerance * quotient.abs();
        let target = Target {
            analytic: quotient,
            within: ONE_STEP_BAND * scale,
            bound: ONE_STEP_BOUND * scale,
        };
        let e = Method::Central.estimate_toward(&f, f0, h, 1e-16, ident, 1, Some(target));
        assert_eq!(e.one_step, settles, "h = {h}: {e:?}");
        if settles {
            // The bound covers the estimate's actual error against cos 0.3.
            assert!((e.value - x0.cos()).abs() <= e.error, "{e:?}");
        }
    }
}

/// The analytic value wrong by the truncation error of the quotient at ±h: a = g + T(h), so the
/// quotient agrees with it to round-off. With T(h) at 1 to 60 times the tolerance of the value,
/// the third loss shows T and the estimate never settles on one step; whatever the ladder then
/// says, a match carries a bound at least half the size of the mistake, and where T is a tenth of the
/// value the verdict is unsettled. Values: f = sin(0.3 + x) as above (g = cos 0.3, T(h) =
/// cos 0.3 · (sin h / h − 1) by the identity).
#[test]
fn a_mistake_the_size_of_the_truncation_never_settles_on_one_step() {
    let x0 = 0.3f64;
    let g = x0.cos();
    let f = |d: f64| ((x0 + d).sin(), false);
    let f0 = x0.sin();
    let tolerance = 1e-6;
    let rule = Rule {
        eps: f64::EPSILON,
        tolerance,
        scale: g,
    };
    for h in [2.5e-3f64, 5e-3, 0.01, 0.02, 0.8] {
        let truncation = g * (h.sin() / h - 1.0);
        for share in [0.5, 0.8, 1.0, 1.25, 2.0] {
            let a = g + share * truncation;
            let target = rule.target(a, 0.0);
            let e = Method::Central.estimate_toward(&f, f0, h, 1e-16, ident, 1, Some(target));
            assert!(!e.one_step, "h = {h}, share {share}: {e:?}");
            let (_, _, bound, status) = rule.judge(a, e.value, 0.0, 0.0, e.error, e.crossed);
            // The ladder's match says the estimate is within its bound of g and the analytic
            // value within the bound of the estimate: twice the bound covers the mistake.
            let mistake = (a - g).abs();
            if status == Status::Match {
                assert!(
                    2.0 * bound >= mistake,
                    "h = {h}, share {share}: {bound:e} < {mistake:e}"
                );
            }
            if h == 0.8 {
                // T(0.8) is a tenth of the value: nothing can be settled there.
                assert!(
                    matches!(status, Status::Unsettled | Status::Mismatch),
                    "{status:?}"
                );
            }
        }
    }
}

/// A kink crossed within ±h never settles on one step, nor one crossed at 2h only, even with the
/// analytic value equal to the quotient: f(x) = 3x + max(0, x − u) [calculus: a slope of 3 below
/// u, 4 above], the crossing flagged as the engine flags it (the side of u changed).
#[test]
fn a_kink_within_the_stencil_never_settles_on_one_step() {
    let h = 1e-3;
    for u in [0.3 * h, -0.7 * h, 1.5 * h] {
        let f = |d: f64| (3.0 * d + (d - u).max(0.0), (d > u) != (0.0 > u));
        let quotient = (f(h).0 - f(-h).0) / (2.0 * h);
        let target = Target {
            analytic: quotient,
            within: 1e-3,
            bound: 1.0,
        };
        let e = Method::Central.estimate_toward(&f, f(0.0).0, h, 1e-16, ident, 1, Some(target));
        assert!(!e.one_step, "u = {u:e}: {e:?}");
        assert!(e.crossed, "u = {u:e}: {e:?}");
        let s = Method::Central.settle_one_step(&f, f(0.0).0, h, 1e-16, ident, target);
        assert!(s.is_none(), "u = {u:e}");
    }
}

/// A settle on one step takes three losses, and a failed one costs nothing more than the ladder:
/// ±h and 2h are its first points, each taken once.
#[test]
fn the_ladder_after_a_failed_settle_takes_no_loss_twice() {
    for (reach, ladder) in [(1u32, 4usize), (6, 14)] {
        let calls = Cell::new(0usize);
        let f = |d: f64| {
            calls.set(calls.get() + 1);
            ((0.3 + d).sin(), false)
        };
        let g = 0.3f64.cos();
        let near = Target {
            analytic: g,
            within: 1e-7,
            bound: 1e-6,
        };
        let e = Method::Central.estimate_toward(
            &f,
            0.3f64.sin(),
            1e-5,
            1e-16,
            ident,
            reach,
            Some(near),
        );
        assert!(e.one_step, "{e:?}");
        assert_eq!(calls.replace(0), 3);
        let far = Target {
            analytic: 2.0 * g,
            ..near
        };
        let e =
            Method::Central.estimate_toward(&f, 0.3f64.sin(), 1e-5, 1e-16, ident, reach, Some(far));
        assert!(!e.one_step, "{e:?}");
        assert_eq!(calls.get(), ladder, "reach {reach}");
        // The same estimate as the ladder alone.
        let plain = Method::Central.estimate_with(&f, 0.3f64.sin(), 1e-5, 1e-16, ident, reach);
        assert_eq!(plain, e);
    }
}

fn tanh_net() -> (Graph, Vec<ArrayD<f64>>, Batch) {
    let net = dense(
        6,
        &[
            (8, Activation::Tanh),
            (5, Activation::Tanh),
            (3, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        1e-3,
    );
    let w = Init::GlorotUniform.graph_params(&net, &mut Rng::new(3));
    let batch = Batch::graph_synthetic(&net, 12, 3);
    (net, w, batch)
}

/// A correct gradient in f64: most coordinates settle on one step, each a match at the default
/// step whose bound is within half the tolerance of its value; every verdict is a match. The same
/// gradient with one entry off by three times the tolerance is a mismatch there, settled on
/// nothing.
#[test]
fn a_dense_check_settles_on_one_step_and_still_finds_a_mistake() {
    let (net, w, batch) = tanh_net();
    let (x, y) = (batch.x.view(), batch.y.view());
    let mut cfg = CheckConfig::new(Method::Central, Precision::F64);
    cfg.sample = Some(Sample::All);
    cfg.directions = Some(2);
    let r = check_graph(&net, &w, x, y, &cfg, &|_, _| {}).unwrap();
    let settled: Vec<_> = r.coords.iter().filter(|c| c.one_step).collect();
    assert!(
        settled.len() * 2 > r.coords.len(),
        "{} of {}",
        settled.len(),
        r.coords.len()
    );
    assert!(r.coords.iter().all(|c| c.status == Status::Match));
    assert!(r.directions.iter().all(|d| d.status == Status::Match));
    let value = |g: &[ArrayD<f64>], e: plumb_fd::Entry| g[e.tensor].as_slice().unwrap()[e.index];
    for c in &settled {
        let h = Method::Central.default_step(value(&w, c.coord), f64::EPSILON);
        assert_eq!(c.step, h, "{c:?}");
        assert!(c.rel_error <= ONE_STEP_BAND * r.tolerance, "{c:?}");
    }
    // Plant a mistake of 3× the tolerance at a coordinate that settled.
    let at = settled[settled.len() / 2].coord;
    let mut wrong = r.analytic.clone();
    wrong[at.tensor].as_slice_mut().unwrap()[at.index] *= 1.0 + 3.0 * r.tolerance;
    let r2 = check_graph_gradient(&net, &w, x, y, &wrong, &cfg, &|_, _| {}).unwrap();
    let c = r2.coords.iter().find(|c| c.coord == at).unwrap();
    assert_eq!(c.status, Status::Mismatch, "{c:?}");
    assert!(!c.one_step);
    let others = r2.coords.iter().filter(|c| c.coord != at);
    assert!(others.into_iter().all(|c| c.status == Status::Match));
}

/// An outside program's loss (here the engine's, asked as a program would be): coordinates that
/// settle on one step cost three losses, so the whole check asks for fewer than four per
/// coordinate; a planted mistake is still a mismatch.
#[test]
fn an_outside_check_asks_for_fewer_losses() {
    let (net, w, batch) = tanh_net();
    let (x, y) = (batch.x.view(), batch.y.view());
    let grad = net.gradient(&w, x, y, None).params;
    let tensors = |g: &[ArrayD<f64>]| -> Vec<OutsideTensor> {
        (0..w.len())
            .map(|t| OutsideTensor {
                name: format!("tensor{t}"),
                values: w[t].iter().copied().collect(),
                gradient: g[t].iter().copied().collect(),
                gross: Vec::new(),
            })
            .collect()
    };
    let asked = Cell::new(0usize);
    let mut losses = |count: usize, changes: &[Change]| -> Result<Vec<f64>, ()> {
        asked.set(asked.get() + count);
        let mut out = vec![w.clone(); count];
        for c in changes {
            let t = &mut out[c.perturbation as usize][c.tensor as usize];
            t.as_slice_mut().unwrap()[c.index as usize] += c.delta;
        }
        Ok(out.iter().map(|p| net.loss(p, x, y)).collect())
    };
    let cfg = ExternalConfig {
        method: Method::Central,
        step: None,
        sample: Sample::All,
        directions: 0,
        seed: 1,
        eps: f64::EPSILON,
        tolerance: 1e-6,
    };
    let f0 = net.loss(&w, x, y);
    let r = check_external(&tensors(&grad), f0, &mut losses, &Inside::opaque(), &cfg).unwrap();
    let n = r.coords.len();
    assert!(r.coords.iter().all(|c| c.status == Status::Match));
    let settled = r.coords.iter().filter(|c| c.one_step).count();
    assert!(settled * 2 > n, "{settled} of {n}");
    // Three losses each for the settled, four for the rest.
    assert_eq!(asked.get(), 3 * settled + 4 * (n - settled));
    // Layer 2's weight (tensor 2, 5 × 8), unit 2, input 2.
    let mut wrong = grad.clone();
    let at = 2 * 8 + 2;
    wrong[2].as_slice_mut().unwrap()[at] *= 1.0 + 3.0 * cfg.tolerance;
    let r2 = check_external(&tensors(&wrong), f0, &mut losses, &Inside::opaque(), &cfg).unwrap();
    let bad: Vec<_> = r2
        .coords
        .iter()
        .filter(|c| c.status != Status::Match)
        .collect();
    assert_eq!(bad.len(), 1, "{bad:?}");
    assert_eq!((bad[0].coord.tensor, bad[0].coord.index), (2, at));
    assert_eq!(bad[0].status, Status::Mismatch);
}
