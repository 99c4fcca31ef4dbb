//! Relative errors per tensor on a log axis, each against the error bound of the method that
//! measured it, and against reference lines (plumb's tolerance for the precision).

use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, VPos};

use super::{
    Area, DrawResult, PALETTE, WIDTH, draw_no_data, render_svg, shorten, text_style, text_width,
};

/// One column of an [`error_strip`]: the relative errors measured for one tensor.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct StripSeries {
    pub label: String,
    pub values: Vec<f64>,
    /// Per value, the error the method can explain there, relative like the value (the check's
    /// `rel_bound`); empty when the values come from no finite-difference method (compare).
    pub bounds: Vec<f64>,
}

/// Reference lines get these colours in increasing order of value.
const LINE_COLORS: [RGBColor; 3] = [
    RGBColor(200, 40, 20),
    RGBColor(120, 0, 60),
    RGBColor(0, 90, 160),
];

/// The colour of the per-point bound marks.
const BOUND_COLOR: RGBColor = RGBColor(110, 110, 110);

/// Errors below this are all "exact" as far as a double can tell; clamping keeps the log axis from
/// spanning hundreds of empty decades.
const STRIP_FLOOR: f64 = 1e-18;
/// A relative error is at most 2; larger values (from another measure) are drawn at 1e6.
const STRIP_CEILING: f64 = 1e6;

/// Relative errors per tensor on a log axis: a column of dots per series, the column's worst value
/// marked with a bar, each dot's error bound (when given) as a short grey dash at the dot's place
/// across, and a dashed line for each `(value, label)` reference line.
///
/// Dots are spread across the column by their index (not at random) so the same report always
/// draws the same picture. Values that are zero, negative or not finite cannot be placed on a log
/// axis and are left out (a column of exact zeros says "all exact (0)"); positive values below
/// 1e-18 are drawn at 1e-18, above 1e6 at 1e6. A column of more than
/// 1500 values shows its worst 100 and an even sample of the rest by rank.
pub fn error_strip(
    title: &str,
    series: &[StripSeries],
    lines: &[(f64, &str)],
) -> Result<String, String> {
    let columns: Vec<Column> = series
        .iter()
        .map(|s| {
            let bound = |k: usize| {
                s.bounds
                    .get(k)
                    .copied()
                    .filter(|b| b.is_finite() && *b > 0.0)
                    .map(|b| b.clamp(STRIP_FLOOR, STRIP_CEILING))
            };
            let kept: Vec<(f64, Option<f64>)> = s
                .values
                .iter()
                .enumerate()
                .filter(|(_, v)| v.is_finite() && **v > 0.0)
                .map(|(k, v)| (v.clamp(STRIP_FLOOR, STRIP_CEILING), bound(k)))
                .collect();
            (shorten(&s.label, 28), thinned(kept))
        })
        .collect();
    // A column of exact agreements has no dot to draw on a log axis: it says so instead.
    let exact: Vec<bool> = series
        .iter()
        .map(|s| !s.values.is_empty() && s.values.iter().all(|&v| v == 0.0))
        .collect();
    let mut lines: Vec<(f64, &str)> = lines
        .iter()
        .copied()
        .filter(|(v, _)| v.is_finite() && *v > 0.0)
        .map(|(v, l)| (v.clamp(STRIP_FLOOR, STRIP_CEILING), l))
        .collect();
    lines.sort_by(|a, b| a.0.total_cmp(&b.0));

    // Labels go under their column if they fit, else they are turned to read upwards.
    let n = columns.len().max(1);
    let plot_width = WIDTH as i32 - 90 - 100;
    let longest = columns
        .iter()
        .map(|(l, _)| text_width(l, 12))
        .max()
        .unwrap_or(0);
    // Under an upright label goes a second line with the column's worst value, "max 1.2e-7".
    let upright = longest.max(text_width("max 1.0e-10", 10)) <= plot_width / n as i32 - 6;
    let label_area = if upright { 44 } else { longest + 14 };
    let height = 420 + label_area as u32;
    render_svg(height, |root| {
        draw_strip(root, title, &columns, &exact, &lines, upright, label_area)
    })
}

/// At most this many dots per strip column: beyond it the SVG grows by megabytes and shows no more.
const STRIP_DOTS: usize = 1500;

/// A column's label and its (value, bound) points.
type Column = (String, Vec<(f64, Option<f64>)>);

/// A column of more than [`STRIP_DOTS`] values cut down to that many: the largest 100 (the ones a
/// reader looks for, the worst included, so the column's bar stays exact), then every k-th of the
/// rest by rank, so the spread keeps its shape. The kept values stay in their original order.
fn thinned(values: Vec<(f64, Option<f64>)>) -> Vec<(f64, Option<f64>)> {
    const TOP: usize = 100;
    if values.len() <= STRIP_DOTS {
        return values;
    }
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&a, &b| values[b].0.total_cmp(&values[a].0));
    let stride = (values.len() - TOP).div_ceil(STRIP_DOTS - TOP);
    let mut keep = vec![false; values.len()];
    for (rank, &i) in order.iter().enumerate() {
        keep[i] = rank < TOP || (rank - TOP).is_multiple_of(stride);
    }
    values
        .into_iter()
        .zip(keep)
        .filter_map(|(v, k)| k.then_some(v))
        .collect()
}

fn draw_strip<DB: DrawingBackend>(
    area: &Area<DB>,
    title: &str,
    columns: &[Column],
    exact: &[bool],
    lines: &[(f64, &str)],
    upright: bool,
    label_area: i32,
) -> DrawResult<DB> {
    let all = columns
        .iter()
        .flat_map(|(_, v)| v.iter().flat_map(|&(x, b)| std::iter::once(x).chain(b)))
        .chain(lines.iter().map(|b| b.0));
    let (lo, hi) = all.fold((f64::MAX, f64::MIN), |(a, b), v| (a.min(v), b.max(v)));
    let (lo, hi) = if lo <= hi { (lo, hi) } else { (1e-12, 1.0) };
    // Whole decades with some air, and at least three, so the axis always has labels to read.
    let mut low = (lo.log10() - 0.3).floor();
    let mut high = (hi.log10() + 0.3).ceil();
    if high - low < 3.0 {
        let widen = (3.0 - (high - low)) / 2.0;
        low = (low - widen).floor();
        high = (high + widen).ceil();
    }
    let (ymin, ymax) = (10f64.powf(low), 10f64.powf(high));
    // Fewer than three columns are drawn a third of the width each, centred, not stretched.
    let n = columns.len().max(1);
    let side = 3usize.saturating_sub(n) as f64 / 2.0;
    let (xmin, xmax) = (-0.5 - side, n as f64 - 0.5 + side);
    let line_room = lines
        .iter()
        .map(|(_, l)| text_width(l, 12) + 14)
        .max()
        .unwrap_or(0)
        .max(20);

    let mut chart = ChartBuilder::on(area)
        .caption(title, ("sans-serif", 16))
        .margin(12)
        .margin_right(line_room)
        .x_label_area_size(label_area)
        .y_label_area_size(70)
        .build_cartesian_2d(xmin..xmax, (ymin..ymax).log_scale())?;
    chart
        .configure_mesh()
        .disable_x_mesh()
        .x_labels(0)
        .y_desc("relative error")
        .y_label_formatter(&|v| format!("{v:.0e}"))
        .light_line_style(WHITE)
        .draw()?;

    let (xs, ys) = chart.plotting_area().get_pixel_range();
    let base = area.get_base_pixel();

    // Faint separators, so a dot is never read as belonging to its neighbour.
    let faint = ShapeStyle::from(&BLACK.mix(0.12)).stroke_width(1);
    for i in 1..columns.len() {
        let x = i as f64 - 0.5;
        chart.draw_series(std::iter::once(PathElement::new(
            vec![(x, ymin), (x, ymax)],
            faint,
        )))?;
    }

    // Reference lines under the data, labelled in the right margin, nudged apart if they crowd.
    let mut last_label_y = i32::MIN;
    for (k, (value, label)) in lines.iter().enumerate() {
        let color = LINE_COLORS[k.min(LINE_COLORS.len() - 1)];
        chart.draw_series(DashedLineSeries::new(
            vec![(xmin, *value), (xmax, *value)],
            6,
            4,
            color.stroke_width(1),
        ))?;
        let (_, py) = chart.backend_coord(&(xmax, *value));
        // Lines are sorted upwards, so each label must sit at least a line above the last one.
        let py = if last_label_y == i32::MIN {
            py
        } else {
            py.min(last_label_y - 14)
        };
        last_label_y = py;
        area.draw(&Text::new(
            label.to_string(),
            (xs.end + 6 - base.0, py - base.1),
            text_style(12, HPos::Left, VPos::Center).color(&color),
        ))?;
    }

    let dot = PALETTE[0].mix(0.65).filled();
    let spread = 0.55;
    let offset = |k: usize| ((k as f64 * 0.618_033_988_75 + 0.5).fract() - 0.5) * spread;
    for (i, (label, points)) in columns.iter().enumerate() {
        let centre = i as f64;
        let worst = points.iter().map(|p| p.0).reduce(f64::max);
        // Each point's bound first, a short dash at the dot's place across, so the dots lie on top.
        chart.draw_series(points.iter().enumerate().filter_map(|(k, &(_, b))| {
            let x = centre + offset(k);
            b.map(|b| {
                PathElement::new(
                    vec![(x - 0.03, b), (x + 0.03, b)],
                    BOUND_COLOR.stroke_width(2),
                )
            })
        }))?;
        if let Some(worst) = worst {
            chart.draw_series(std::iter::once(PathElement::new(
                vec![(centre - 0.34, worst), (centre + 0.34, worst)],
                BLACK.stroke_width(2),
            )))?;
        }
        // After the bar, so the worst dot stays visible on top of it. Golden-ratio steps fill the
        // column evenly for any count, and the first dot sits in the middle.
        chart.draw_series(
            points
                .iter()
                .enumerate()
                .map(|(k, &(v, _))| Circle::new((centre + offset(k), v), 3, dot)),
        )?;
        let (px, _) = chart.backend_coord(&(centre, ymin));
        let (x, y) = (px - base.0, ys.end + 6 - base.1);
        if upright {
            area.draw(&Text::new(
                label.clone(),
                (x, y),
                text_style(12, HPos::Center, VPos::Top),
            ))?;
            let note = match worst {
                Some(worst) => Some(format!("max {worst:.1e}")),
                None if exact[i] => Some("all exact (0)".to_string()),
                None => None,
            };
            if let Some(note) = note {
                area.draw(&Text::new(
                    note,
                    (x, y + 16),
                    text_style(10, HPos::Center, VPos::Top).color(&BLACK.mix(0.6)),
                ))?;
            }
        } else {
            let style =
                text_style(12, HPos::Right, VPos::Center).transform(FontTransform::Rotate270);
            area.draw(&Text::new(label.clone(), (x, y), style))?;
        }
    }

    if !exact.is_empty() && exact.iter().all(|&e| e) {
        area.draw(&Text::new(
            "every value is exactly 0",
            (
                (xs.start + xs.end) / 2 - base.0,
                (ys.start + ys.end) / 2 - base.1,
            ),
            text_style(14, HPos::Center, VPos::Center).color(&BLACK.mix(0.5)),
        ))?;
    } else if columns.iter().all(|(_, v)| v.is_empty()) {
        draw_no_data(
            area,
            (xs.start + xs.end) / 2 - base.0,
            (ys.start + ys.end) / 2 - base.1,
        )?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_long_column_keeps_its_worst_values_and_its_spread() {
        let values: Vec<f64> = (0..100_000)
            .map(|i| ((i * 7919) % 100_000) as f64)
            .collect();
        let kept: Vec<f64> = thinned(values.iter().map(|&v| (v, None)).collect())
            .into_iter()
            .map(|p| p.0)
            .collect();
        assert!(
            kept.len() <= STRIP_DOTS && kept.len() > STRIP_DOTS - 50,
            "{}",
            kept.len()
        );
        let max = kept.iter().copied().fold(0.0, f64::max);
        assert_eq!(max, 99_999.0);
        assert_eq!(kept.iter().filter(|&&v| v >= 99_900.0).count(), 100);
        // The rest is spread over the whole range: a tenth of it below 10% of the largest value.
        let low = kept.iter().filter(|&&v| v < 10_000.0).count() as f64 / kept.len() as f64;
        assert!((0.08..0.12).contains(&low), "{low}");
        let few = vec![(3.0, Some(1.0)), (1.0, None), (2.0, Some(4.0))];
        assert_eq!(thinned(few.clone()), few);
    }
}
