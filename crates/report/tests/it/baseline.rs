//! A run judged against its baseline (`Baseline::judge`): changes at the run's `fail_on` level
//! fail it, the others leave its verdict alone, and the report lists them before its verdict. The
//! levels are plumb's own (crates/report/src/baseline.rs: an error figure tenfold worse, a count
//! that rose, another figure moved by more than one part in a million).

use plumb_report::{Baseline, Block, Case, Document, Severity, Verdict};

fn run(max_rel: f64, norm: f64) -> Document {
    let mut doc = Document::new("check");
    doc.command = "check".into();
    doc.cases = vec![
        Case::new("gradient w1", true)
            .figure("max_rel_error", max_rel)
            .figure("gradient_norm", norm),
    ];
    doc.push(Block::Verdict(Verdict::Pass, "every tensor agrees".into()));
    doc
}

fn position(doc: &Document, f: impl Fn(&Block) -> bool) -> usize {
    doc.blocks.iter().position(f).unwrap()
}

#[test]
fn an_error_figure_tenfold_worse_fails_the_run_and_is_listed_before_the_verdict() {
    let base = Baseline::record(&run(1e-9, 2.0), &[]);
    let mut doc = run(2e-8, 2.0);
    let judged = base.judge("base.json", &mut doc, &[]);
    assert_eq!(judged.verdict, Verdict::Fail);
    assert_eq!(judged.worse, 1);
    assert_eq!(judged.changes[0].severity, Severity::Error);
    assert_eq!(doc.verdict(), Some(Verdict::Fail));
    let summary = doc.verdict_summary().unwrap();
    assert!(
        summary.contains("1 change at error or worse since the baseline base.json"),
        "{summary}"
    );
    let heading = position(
        &doc,
        |b| matches!(b, Block::Heading(h) if h == "against the baseline base.json"),
    );
    assert!(heading < position(&doc, |b| matches!(b, Block::Verdict(..))));
}

#[test]
fn an_error_figure_within_tenfold_and_an_unchanged_run_keep_the_verdict() {
    let base = Baseline::record(&run(1e-9, 2.0), &[]);
    for max_rel in [1e-9, 9e-9] {
        let mut doc = run(max_rel, 2.0);
        let judged = base.judge("base.json", &mut doc, &[]);
        assert!(judged.changes.is_empty(), "{:?}", judged.changes);
        assert_eq!(judged.verdict, Verdict::Pass);
        assert_eq!(doc.verdict_summary().unwrap(), "every tensor agrees");
    }
}

#[test]
fn a_moved_property_is_a_warning_that_fails_only_under_fail_on_warning() {
    let base = Baseline::record(&run(1e-9, 2.0), &[]);
    let mut doc = run(1e-9, 2.5);
    let judged = base.judge("base.json", &mut doc, &[]);
    assert_eq!(judged.changes.len(), 1);
    assert_eq!(judged.changes[0].severity, Severity::Warning);
    assert_eq!((judged.worse, judged.verdict), (0, Verdict::Pass));
    let summary = doc.verdict_summary().unwrap();
    assert!(
        summary.starts_with("every tensor agrees; since the baseline base.json"),
        "{summary}"
    );
    let mut strict = run(1e-9, 2.5);
    strict.fail_on = Severity::Warning;
    let judged = base.judge("base.json", &mut strict, &[]);
    assert_eq!((judged.worse, judged.verdict), (1, Verdict::Fail));
}
