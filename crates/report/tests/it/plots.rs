//! The plots as a reader of the SVG sees them: a well-formed document, one drawn element per datum,
//! the labels as text, and no panic on empty, non-finite or single-value input.

use plumb_report::{HeatRow, StripSeries, error_strip, heatmap, histogram};

/// Checks that `svg` is one `<svg>` root whose tags all balance, and returns it for chaining.
///
/// A small scanner rather than an XML crate: plotters writes one tag per line, no comments, no
/// CDATA, and escapes text, so balancing tags is enough to catch a broken document.
fn well_formed(svg: &str) -> &str {
    assert!(
        svg.starts_with("<svg"),
        "starts with {:?}",
        &svg[..svg.len().min(60)]
    );
    assert!(
        svg.trim_end().ends_with("</svg>"),
        "ends with {:?}",
        &svg[svg.len().saturating_sub(60)..]
    );
    assert!(svg.contains(r#"width="820""#));
    let mut open: Vec<&str> = Vec::new();
    let mut roots = 0;
    let mut rest = svg;
    while let Some(start) = rest.find('<') {
        let end = start + rest[start..].find('>').expect("an unclosed tag");
        let tag = &rest[start + 1..end];
        if let Some(name) = tag.strip_prefix('/') {
            assert_eq!(open.pop(), Some(name), "a stray </{name}>");
        } else {
            if open.is_empty() {
                roots += 1;
            }
            if !tag.ends_with('/') {
                open.push(tag.split_whitespace().next().unwrap());
            }
        }
        rest = &rest[end + 1..];
    }
    assert!(open.is_empty(), "left open: {open:?}");
    assert_eq!(roots, 1, "one root element");
    svg
}

fn count(svg: &str, tag: &str) -> usize {
    svg.matches(tag).count()
}

/// The text of every `<text>` element, so a label is found as text and not inside an attribute.
fn texts(svg: &str) -> Vec<String> {
    svg.split("<text")
        .skip(1)
        .map(|t| {
            let body = &t[t.find('>').unwrap() + 1..];
            body[..body.find("</text>").unwrap()].trim().to_string()
        })
        .collect()
}

const BANDS: [(f64, &str); 1] = [(1e-6, "tolerance 1e-6 (f64)")];

fn series(label: &str, values: &[f64]) -> StripSeries {
    StripSeries {
        label: label.into(),
        values: values.to_vec(),
        bounds: Vec::new(),
    }
}

#[test]
fn strip_draws_a_dot_per_positive_finite_value() {
    let data = [
        series("layer1.weight", &[1e-9, 3e-8, 2e-10, f64::NAN, 0.0]),
        series("layer1.bias", &[5e-5, f64::INFINITY, -1e-3, 1e-30]),
        series("out & <b>", &[]),
    ];
    let svg = error_strip("relative error per tensor", &data, &BANDS).unwrap();
    well_formed(&svg);
    // NaN, inf, zero and negative cannot sit on a log axis; 1e-30 is clamped to 1e-18, not dropped.
    assert_eq!(count(&svg, "<circle"), 3 + 2);
    let texts = texts(&svg);
    for label in [
        "layer1.weight",
        "layer1.bias",
        "out &amp; &lt;b&gt;",
        "tolerance 1e-6 (f64)",
    ] {
        assert!(texts.iter().any(|t| t == label), "{label} in {texts:?}");
    }
    assert!(texts.iter().any(|t| t == "max 3.0e-8"), "{texts:?}");
    assert!(texts.contains(&"relative error per tensor".to_string()));
}

// Each point's error bound is drawn as a short dash (a two-point <polyline>) at its place across;
// a series without bounds draws none, and a bound that is 0 or not finite is left out.
#[test]
fn strip_marks_each_points_bound() {
    let without = error_strip("e", &[series("w", &[1e-9, 2e-8, 3e-7])], &BANDS).unwrap();
    let mut with = series("w", &[1e-9, 2e-8, 3e-7]);
    with.bounds = vec![1e-8, f64::NAN, 0.0];
    let marked = error_strip("e", &[with], &BANDS).unwrap();
    well_formed(&marked);
    assert_eq!(
        count(&marked, "<polyline") - count(&without, "<polyline"),
        1,
        "one finite positive bound, one dash"
    );
    assert_eq!(count(&marked, "<circle"), 3);
}

#[test]
fn strip_survives_empty_and_single_inputs() {
    let empty = error_strip("nothing", &[], &[]).unwrap();
    assert!(texts(well_formed(&empty)).contains(&"no finite values".to_string()));
    assert_eq!(count(&empty, "<circle"), 0);

    let only_bad = error_strip("bad", &[series("w", &[f64::NAN, 0.0])], &BANDS).unwrap();
    assert_eq!(count(well_formed(&only_bad), "<circle"), 0);

    // Exact agreement (every error 0) is said, not shown as missing data.
    let exact = error_strip(
        "exact",
        &[series("a", &[0.0, 0.0]), series("b", &[1e-12, 0.0])],
        &BANDS,
    )
    .unwrap();
    let words = texts(well_formed(&exact));
    assert!(words.contains(&"all exact (0)".to_string()), "{words:?}");
    assert_eq!(count(&exact, "<circle"), 1);
    let all_exact = error_strip("exact", &[series("a", &[0.0])], &BANDS).unwrap();
    assert!(texts(well_formed(&all_exact)).contains(&"every value is exactly 0".to_string()));

    let one = error_strip("one", &[series("w", &[3e-9])], &[]).unwrap();
    assert_eq!(count(well_formed(&one), "<circle"), 1);
    // Even one value gets an axis with decades to read it against.
    assert!(texts(&one).iter().filter(|t| t.contains("e-")).count() >= 3);
}

#[test]
fn strip_turns_labels_that_do_not_fit_and_is_deterministic() {
    let many: Vec<StripSeries> = (0..20)
        .map(|i| series(&format!("encoder.block{i}.attn.weight"), &[1e-8, 2e-8]))
        .collect();
    let svg = error_strip("many", &many, &BANDS).unwrap();
    well_formed(&svg);
    let turned = svg
        .split("<text")
        .filter(|t| t.contains("rotate(270") && t.contains("encoder.block"))
        .count();
    assert_eq!(turned, 20);
    assert_eq!(svg, error_strip("many", &many, &BANDS).unwrap());
}

fn row(label: &str, values: &[f64]) -> HeatRow {
    HeatRow {
        label: label.into(),
        values: values.to_vec(),
    }
}

#[test]
fn heatmap_draws_a_cell_per_finite_value_and_its_legend() {
    let rows = [
        row("layer1", &[0.0, 0.25, 0.5, 1.0, 2.0, -1.0]),
        row("layer2", &[0.1, f64::NAN, 0.9]),
        row("out", &[]),
    ];
    let svg = heatmap(
        "dead units\nthe fraction of probe inputs where a unit is zero",
        &rows,
    )
    .unwrap();
    well_formed(&svg);
    let finite_cells = 6 + 2;
    assert!(
        count(&svg, "<rect") >= finite_cells,
        "{} rects",
        count(&svg, "<rect")
    );
    let texts = texts(&svg);
    for label in ["dead units", "layer1", "layer2", "out", "0", "1", "6 units"] {
        assert!(texts.iter().any(|t| t == label), "{label} in {texts:?}");
    }
    assert!(
        texts
            .iter()
            .any(|t| t.starts_with("the fraction of probe inputs"))
    );
    // Out of range is clamped: 2.0 is drawn in the full red of 1.0 (the legend stops just short).
    assert_eq!(count(&svg, r##"fill="#BE141E""##), 2);
}

#[test]
fn heatmap_survives_empty_input() {
    let svg = heatmap("nothing", &[]).unwrap();
    assert!(texts(well_formed(&svg)).contains(&"no finite values".to_string()));
    let svg = heatmap("one", &[row("l", &[0.5])]).unwrap();
    well_formed(&svg);
}

fn normal(x: f64) -> f64 {
    (-x * x / 2.0).exp() / (2.0 * std::f64::consts::PI).sqrt()
}

#[test]
fn histogram_draws_bars_and_the_reference_curve() {
    // Deterministic values spread over [-2, 2]; the shape does not matter here, only the drawing.
    let values: Vec<f64> = (0..500)
        .map(|i| 2.0 * (f64::from(i) * 0.731).sin())
        .collect();
    let plain = histogram("weights", &values, 20, None).unwrap();
    let with = histogram("weights", &values, 20, Some(("N(0, 1)", &normal))).unwrap();
    well_formed(&plain);
    well_formed(&with);
    // Each non-empty bin is a filled bar and its outline; every bin holds a value here.
    assert!(count(&plain, "<rect") >= 2 * 20);
    assert!(count(&with, "<polyline") > count(&plain, "<polyline"));
    let points = with
        .split("<polyline")
        .filter(|p| p.contains(r##"stroke="#D55E00""##))
        .map(|p| {
            p.split("points=\"")
                .nth(1)
                .unwrap()
                .split('"')
                .next()
                .unwrap()
                .split_whitespace()
                .count()
        })
        .max()
        .unwrap();
    assert!(points >= 150, "the curve has {points} points");
    let texts = texts(&with);
    for label in ["weights", "N(0, 1)", "values (n = 500)", "density", "value"] {
        assert!(texts.iter().any(|t| t == label), "{label} in {texts:?}");
    }
}

#[test]
fn histogram_survives_empty_single_and_non_finite_input() {
    let empty = histogram("nothing", &[], 10, Some(("N(0, 1)", &normal))).unwrap();
    assert!(texts(well_formed(&empty)).contains(&"no finite values".to_string()));
    let bad = histogram("bad", &[f64::NAN, f64::NEG_INFINITY], 0, None).unwrap();
    assert!(texts(well_formed(&bad)).contains(&"no finite values".to_string()));
    let one = histogram("one", &[0.3, f64::NAN], 0, Some(("N(0, 1)", &normal))).unwrap();
    assert!(texts(well_formed(&one)).contains(&"values (n = 1)".to_string()));
    let zeros = histogram("zeros", &[0.0; 10], 5, None).unwrap();
    well_formed(&zeros);
    // A curve that blows up is broken around the pole, not dropped.
    let pole = |x: f64| 1.0 / x;
    let svg = histogram("pole", &[-1.0, 1.0], 4, Some(("1/x", &pole))).unwrap();
    assert!(texts(well_formed(&svg)).contains(&"1/x".to_string()));
}
