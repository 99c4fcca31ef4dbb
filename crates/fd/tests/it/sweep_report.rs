//! The sweep's verdict rule (`plumb_fd::report::sweep_report`), both ways, on a smooth network
//! whose analytic gradient is right: forward differences err by about h·|J″|/2 (Taylor; Numerical
//! Recipes §5.7), so a sweep over small steps finds agreement, and one confined to steps of 0.5
//! and 1 finds none and says `no-agreement` at every coordinate swept.

use plumb_fd::report::{SweepAsk, sweep_report};
use plumb_fd::{Method, Precision, steps};
use plumb_report::Verdict;

use crate::graph_common::loaded;

fn ask(from: f64, to: f64, n: usize) -> SweepAsk {
    SweepAsk {
        coords: None,
        methods: vec![Method::Forward],
        steps: steps(from, to, n),
        precision: Precision::F64,
        seed: 4,
        plot: None,
    }
}

#[test]
fn small_steps_agree_and_steps_of_order_one_do_not() {
    let l = loaded("small.toml", 8);
    let fine = sweep_report(&l, &ask(1e-2, 1e-12, 11)).unwrap();
    assert_eq!(fine.verdict, Verdict::Pass, "{:?}", fine.findings);
    assert_eq!(fine.coordinates.len(), 4, "the worst and three at random");
    assert!(fine.coordinates.iter().all(|c| fine.agrees(c)));
    // Forward differences at √ε ≈ 1.5e-8 are good to about 1e-7 relative (their round-off and
    // truncation meet there); a best error far below the tolerance.
    for c in &fine.coordinates {
        assert!(
            c.best_error() < 1e-5,
            "{}: {}",
            c.place.label(),
            c.best_error()
        );
    }

    let coarse = sweep_report(&l, &ask(1.0, 0.5, 2)).unwrap();
    assert_eq!(coarse.verdict, Verdict::Fail);
    assert_eq!(coarse.findings.len(), coarse.coordinates.len());
    for (c, f) in coarse.coordinates.iter().zip(&coarse.findings) {
        assert!(!coarse.agrees(c));
        assert_eq!(f.code, "no-agreement");
        assert_eq!(f.tensor.as_deref(), Some(c.place.tensor.as_str()));
    }
}
