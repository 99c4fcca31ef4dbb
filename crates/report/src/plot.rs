//! SVG plots, drawn with plotters' SVG backend (no fonts or raster code needed).

use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

/// One panel of a log-log plot: error against step size, a line per method.
#[derive(Clone, Debug)]
pub struct StepPanel {
    pub title: String,
    pub steps: Vec<f64>,
    /// (label, errors at each step); non-positive or non-finite errors are left out.
    pub series: Vec<(String, Vec<f64>)>,
    /// Vertical reference lines: (label, step).
    pub marks: Vec<(String, f64)>,
}

/// Renders panels stacked vertically into one SVG document.
pub fn step_plot(panels: &[StepPanel]) -> Result<String, String> {
    let height = 360 * panels.len().max(1) as u32;
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (820, height)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| e.to_string())?;
        let areas = root.split_evenly((panels.len().max(1), 1));
        for (area, panel) in areas.iter().zip(panels) {
            draw_panel(area, panel).map_err(|e| e.to_string())?;
        }
        root.present().map_err(|e| e.to_string())?;
    }
    Ok(svg)
}

const PALETTE: [RGBColor; 6] = [
    RGBColor(0, 114, 178),
    RGBColor(213, 94, 0),
    RGBColor(0, 158, 115),
    RGBColor(204, 121, 167),
    RGBColor(86, 86, 86),
    RGBColor(230, 159, 0),
];

fn draw_panel<DB: DrawingBackend>(
    area: &DrawingArea<DB, plotters::coord::Shift>,
    panel: &StepPanel,
) -> Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
    let finite = |v: f64| v.is_finite() && v > 0.0;
    let xs = &panel.steps;
    let (xmin, xmax) = xs
        .iter()
        .fold((f64::MAX, f64::MIN), |(a, b), &x| (a.min(x), b.max(x)));
    let ys: Vec<f64> = panel
        .series
        .iter()
        .flat_map(|(_, v)| v.iter().copied())
        .filter(|&v| finite(v))
        .collect();
    let ymin = ys.iter().copied().fold(f64::MAX, f64::min).max(1e-18) / 3.0;
    let ymax = ys.iter().copied().fold(f64::MIN, f64::max).max(ymin * 10.0) * 3.0;
    let mut chart = ChartBuilder::on(area)
        .caption(&panel.title, ("sans-serif", 16))
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(70)
        .build_cartesian_2d((xmin..xmax).log_scale(), (ymin..ymax).log_scale())?;
    chart
        .configure_mesh()
        .x_desc("step h")
        .y_desc("relative error")
        .x_label_formatter(&|v| format!("{v:.0e}"))
        .y_label_formatter(&|v| format!("{v:.0e}"))
        .draw()?;
    for (i, (label, errs)) in panel.series.iter().enumerate() {
        let color = PALETTE[i % PALETTE.len()];
        let points: Vec<(f64, f64)> = xs
            .iter()
            .copied()
            .zip(errs.iter().copied())
            .filter(|&(_, e)| finite(e))
            .collect();
        chart
            .draw_series(LineSeries::new(points.clone(), color.stroke_width(2)))?
            .label(label.clone())
            .legend(move |(x, y)| {
                PathElement::new(vec![(x, y), (x + 20, y)], color.stroke_width(2))
            });
        chart.draw_series(
            points
                .into_iter()
                .map(|p| Circle::new(p, 2, color.filled())),
        )?;
    }
    for (label, x) in &panel.marks {
        let style = ShapeStyle::from(&BLACK.mix(0.4)).stroke_width(1);
        chart.draw_series(std::iter::once(PathElement::new(
            vec![(*x, ymin), (*x, ymax)],
            style,
        )))?;
        chart.draw_series(std::iter::once(Text::new(
            label.clone(),
            (*x, ymax / 2.0),
            ("sans-serif", 12),
        )))?;
    }
    chart
        .configure_series_labels()
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK.mix(0.3))
        .position(SeriesLabelPosition::LowerRight)
        .draw()?;
    Ok(())
}

// ---------------------------------------------------------------------------------------------
// Shared by the three plots below.

/// Every plot is this wide, so a report's figures line up.
const WIDTH: u32 = 820;

type Area<DB> = DrawingArea<DB, plotters::coord::Shift>;
type DrawResult<DB> = Result<(), DrawingAreaErrorKind<<DB as DrawingBackend>::ErrorType>>;

/// Draws into a fresh SVG string of the given height; the one place backend errors become strings.
fn render_svg(
    height: u32,
    draw: impl FnOnce(&Area<SVGBackend<'_>>) -> Result<(), DrawingAreaErrorKind<std::io::Error>>,
) -> Result<String, String> {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (WIDTH, height)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| e.to_string())?;
        draw(&root).map_err(|e| e.to_string())?;
        root.present().map_err(|e| e.to_string())?;
    }
    Ok(svg)
}

/// A text style anchored at `h`/`v`: the SVG backend can align text, but cannot measure it.
fn text_style(size: u32, h: HPos, v: VPos) -> TextStyle<'static> {
    TextStyle::from(("sans-serif", size).into_font()).pos(Pos::new(h, v))
}

/// A rough width in pixels of `text` at `size`; SVG leaves the real font to the viewer, so layout
/// can only budget for an average sans-serif glyph.
fn text_width(text: &str, size: u32) -> i32 {
    // plotters writes font-size = size / 1.24; an average glyph is about 0.55 em wide.
    (text.chars().count() as f64 * f64::from(size) / 1.24 * 0.55).ceil() as i32
}

/// Cuts a label to `max` characters so one long tensor name cannot squeeze the plot away.
fn shorten(label: &str, max: usize) -> String {
    if label.chars().count() <= max {
        label.to_string()
    } else {
        let head: String = label.chars().take(max.saturating_sub(1)).collect();
        format!("{head}…")
    }
}

/// A tick formatter for a linear axis over `lo..hi`: plotters' default prints 1e-8 as "0.0" and
/// 3e6 as "3000000.0", so far from 1 this switches to scientific notation, with only as many
/// digits as neighbouring ticks need to differ.
fn tick_format(lo: f64, hi: f64) -> impl Fn(&f64) -> String {
    // Plotters places up to about ten ticks; half that step is the finest a label has to show.
    let step = ((hi - lo) / 20.0).abs().max(f64::MIN_POSITIVE);
    let magnitude = lo.abs().max(hi.abs());
    let scientific = !(1e-3..1e5).contains(&magnitude);
    let trim = |s: String| -> String {
        match s.split_once('e') {
            Some((m, e)) if m.contains('.') => {
                format!("{}e{e}", m.trim_end_matches('0').trim_end_matches('.'))
            }
            None if s.contains('.') => s.trim_end_matches('0').trim_end_matches('.').to_string(),
            _ => s,
        }
    };
    move |&v| {
        if v.abs() < step * 1e-6 {
            return "0".to_string();
        }
        if scientific {
            let digits = (v.abs().log10().floor() - step.log10().floor()).clamp(0.0, 6.0);
            trim(format!("{v:.*e}", digits as usize))
        } else {
            let decimals = (-step.log10().floor()).clamp(0.0, 8.0);
            trim(format!("{v:.*}", decimals as usize))
        }
    }
}

/// Writes "no finite values" where the data would have been, so an empty plot says why it is empty.
fn draw_no_data<DB: DrawingBackend>(area: &Area<DB>, x: i32, y: i32) -> DrawResult<DB> {
    area.draw(&Text::new(
        "no finite values",
        (x, y),
        text_style(14, HPos::Center, VPos::Center).color(&BLACK.mix(0.5)),
    ))
}

// ---------------------------------------------------------------------------------------------
// Error strip.

/// One column of an [`error_strip`]: the relative errors measured for one tensor.
#[derive(Clone, Debug)]
pub struct StripSeries {
    pub label: String,
    pub values: Vec<f64>,
}

/// Band lines get these colours in increasing order of value: thresholds on a relative error go
/// from good to bad as they grow.
const BAND_COLORS: [RGBColor; 4] = [
    RGBColor(0, 140, 100),
    RGBColor(200, 130, 0),
    RGBColor(200, 40, 20),
    RGBColor(120, 0, 60),
];

/// Errors below this are all "exact" as far as a double can tell; clamping keeps the log axis from
/// spanning hundreds of empty decades.
const STRIP_FLOOR: f64 = 1e-18;

/// Relative errors per tensor on a log axis: a column of dots per series, the column's worst value
/// marked with a bar, and a dashed line for each `(value, label)` band.
///
/// Dots are spread across the column by their index (not at random) so the same report always
/// draws the same picture. Values that are zero, negative or not finite cannot be placed on a log
/// axis and are left out; positive values below 1e-18 are drawn at 1e-18. A column of more than
/// 1500 values shows its worst 100 and an even sample of the rest by rank.
pub fn error_strip(
    title: &str,
    series: &[StripSeries],
    bands: &[(f64, &'static str)],
) -> Result<String, String> {
    let columns: Vec<(String, Vec<f64>)> = series
        .iter()
        .map(|s| {
            let kept = s
                .values
                .iter()
                .copied()
                .filter(|v| v.is_finite() && *v > 0.0)
                .map(|v| v.max(STRIP_FLOOR))
                .collect();
            (shorten(&s.label, 28), thinned(kept))
        })
        .collect();
    let mut bands: Vec<(f64, &str)> = bands
        .iter()
        .copied()
        .filter(|(v, _)| v.is_finite() && *v > 0.0)
        .map(|(v, l)| (v.max(STRIP_FLOOR), l))
        .collect();
    bands.sort_by(|a, b| a.0.total_cmp(&b.0));

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
        draw_strip(root, title, &columns, &bands, upright, label_area)
    })
}

/// At most this many dots per strip column: beyond it the SVG grows by megabytes and shows no more.
const STRIP_DOTS: usize = 1500;

/// A column of more than [`STRIP_DOTS`] values cut down to that many: the largest 100 (the ones a
/// reader looks for, the worst included, so the column's bar stays exact), then every k-th of the
/// rest by rank, so the spread keeps its shape. The kept values stay in their original order.
fn thinned(values: Vec<f64>) -> Vec<f64> {
    const TOP: usize = 100;
    if values.len() <= STRIP_DOTS {
        return values;
    }
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&a, &b| values[b].total_cmp(&values[a]));
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
    columns: &[(String, Vec<f64>)],
    bands: &[(f64, &str)],
    upright: bool,
    label_area: i32,
) -> DrawResult<DB> {
    let all = columns
        .iter()
        .flat_map(|(_, v)| v.iter().copied())
        .chain(bands.iter().map(|b| b.0));
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
    let band_room = bands
        .iter()
        .map(|(_, l)| text_width(l, 12) + 14)
        .max()
        .unwrap_or(0)
        .max(20);

    let mut chart = ChartBuilder::on(area)
        .caption(title, ("sans-serif", 16))
        .margin(12)
        .margin_right(band_room)
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

    // Bands under the data, labelled in the right margin, nudged apart if they crowd.
    let mut last_label_y = i32::MIN;
    for (k, (value, label)) in bands.iter().enumerate() {
        let color = BAND_COLORS[k.min(BAND_COLORS.len() - 1)];
        chart.draw_series(DashedLineSeries::new(
            vec![(xmin, *value), (xmax, *value)],
            6,
            4,
            color.stroke_width(1),
        ))?;
        let (_, py) = chart.backend_coord(&(xmax, *value));
        // Bands are sorted upwards, so each label must sit at least a line above the last one.
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
    for (i, (label, values)) in columns.iter().enumerate() {
        let centre = i as f64;
        let worst = values.iter().copied().reduce(f64::max);
        if let Some(worst) = worst {
            chart.draw_series(std::iter::once(PathElement::new(
                vec![(centre - 0.34, worst), (centre + 0.34, worst)],
                BLACK.stroke_width(2),
            )))?;
        }
        // After the bar, so the worst dot stays visible on top of it. Golden-ratio steps fill the
        // column evenly for any count, and the first dot sits in the middle.
        let spread = 0.55;
        chart.draw_series(values.iter().enumerate().map(|(k, &v)| {
            let offset = ((k as f64 * 0.618_033_988_75 + 0.5).fract() - 0.5) * spread;
            Circle::new((centre + offset, v), 3, dot)
        }))?;
        let (px, _) = chart.backend_coord(&(centre, ymin));
        let (x, y) = (px - base.0, ys.end + 6 - base.1);
        if upright {
            area.draw(&Text::new(
                label.clone(),
                (x, y),
                text_style(12, HPos::Center, VPos::Top),
            ))?;
            if let Some(worst) = worst {
                area.draw(&Text::new(
                    format!("max {worst:.1e}"),
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

    if columns.iter().all(|(_, v)| v.is_empty()) {
        draw_no_data(
            area,
            (xs.start + xs.end) / 2 - base.0,
            (ys.start + ys.end) / 2 - base.1,
        )?;
    }
    Ok(())
}

// ---------------------------------------------------------------------------------------------
// Heatmap.

/// One row of a [`heatmap`]: a layer, and a fraction in [0, 1] for each of its units.
#[derive(Clone, Debug)]
pub struct HeatRow {
    pub label: String,
    pub values: Vec<f64>,
}

/// White at 0, a strong red at 1: a fraction (of dead inputs, of saturated steps) reads as "how bad".
fn heat_color(fraction: f64) -> RGBColor {
    let t = fraction.clamp(0.0, 1.0);
    let mix = |to: u8| (255.0 + (f64::from(to) - 255.0) * t).round() as u8;
    RGBColor(mix(190), mix(20), mix(30))
}

/// Wraps `text` into lines of at most `width` characters, breaking at spaces.
fn wrap(text: &str, width: usize) -> Vec<String> {
    let mut lines = Vec::new();
    for paragraph in text.lines() {
        let mut line = String::new();
        for word in paragraph.split_whitespace() {
            if !line.is_empty() && line.chars().count() + 1 + word.chars().count() > width {
                lines.push(std::mem::take(&mut line));
            }
            if !line.is_empty() {
                line.push(' ');
            }
            line.push_str(word);
        }
        lines.push(line);
    }
    lines
}

/// A fraction per unit, one row per layer: white for 0, red for 1 (values outside are clamped).
///
/// The first line of `title` is the title; any further lines are a caption printed under the
/// legend. Rows may differ in length: every cell is as wide as the longest row's would be, so a
/// unit's position means the same thing in every row. Values that are not finite are left out and
/// show as the grey of the row's background, distinct from the white of a true 0.
pub fn heatmap(title: &str, rows: &[HeatRow]) -> Result<String, String> {
    let (head, caption) = match title.split_once('\n') {
        Some((h, c)) => (h, c.trim()),
        None => (title, ""),
    };
    let caption = if caption.is_empty() {
        Vec::new()
    } else {
        wrap(caption, 135)
    };
    // Many layers get thinner rows so the figure stays about a page long.
    let row_h = if rows.len() > 30 { 12 } else { 20 };
    let gap = if rows.len() > 30 { 2 } else { 4 };
    let grid_h = (row_h + gap) * rows.len().max(1) as i32;
    let height = 44 + grid_h + 40 + 16 * caption.len() as i32 + 10;
    render_svg(height as u32, |root| {
        draw_heatmap(root, head, &caption, rows, row_h, gap)
    })
}

fn draw_heatmap<DB: DrawingBackend>(
    area: &Area<DB>,
    title: &str,
    caption: &[String],
    rows: &[HeatRow],
    row_h: i32,
    gap: i32,
) -> DrawResult<DB> {
    let margin = 12;
    let label_size = if row_h < 16 { 10 } else { 12 };
    area.draw(&Text::new(
        title.to_string(),
        (WIDTH as i32 / 2, margin),
        text_style(16, HPos::Center, VPos::Top),
    ))?;
    let labels: Vec<String> = rows.iter().map(|r| shorten(&r.label, 32)).collect();
    let label_w = labels
        .iter()
        .map(|l| text_width(l, label_size))
        .max()
        .unwrap_or(0)
        .clamp(30, 240);
    let x0 = margin + label_w + 8;
    let x1 = WIDTH as i32 - margin;
    let top = 44;
    let longest = rows.iter().map(|r| r.values.len()).max().unwrap_or(0);
    let cell_w = f64::from(x1 - x0) / longest.max(1) as f64;
    // Cell edges are rounded from one float grid so cells tile without gaps or drift.
    let edge = |i: usize| x0 + (i as f64 * cell_w).round() as i32;
    // A 1-pixel inset lets the grey background draw the grid, when cells are big enough to keep it.
    let inset = i32::from(cell_w >= 5.0);
    let backdrop = RGBColor(215, 215, 215).filled();

    for (r, (row, label)) in rows.iter().zip(&labels).enumerate() {
        let y = top + r as i32 * (row_h + gap);
        area.draw(&Text::new(
            label.clone(),
            (x0 - 8, y + row_h / 2),
            text_style(label_size, HPos::Right, VPos::Center),
        ))?;
        if row.values.is_empty() {
            continue;
        }
        area.draw(&Rectangle::new(
            [(x0, y), (edge(row.values.len()), y + row_h)],
            backdrop,
        ))?;
        for (i, &v) in row.values.iter().enumerate() {
            if !v.is_finite() {
                continue;
            }
            area.draw(&Rectangle::new(
                [
                    (edge(i) + inset, y + inset),
                    (edge(i + 1) - inset, y + row_h - inset),
                ],
                heat_color(v).filled(),
            ))?;
        }
    }
    let below = top + (row_h + gap) * rows.len().max(1) as i32 + 6;
    if longest == 0 {
        draw_no_data(area, (x0 + x1) / 2, top + row_h / 2)?;
    } else {
        area.draw(&Text::new(
            format!("{longest} units"),
            (x1, below),
            text_style(11, HPos::Right, VPos::Top).color(&BLACK.mix(0.6)),
        ))?;
    }

    // Legend: "0", a white-to-red bar, "1".
    let (bar_x, bar_w, steps) = (x0 + 14, 160, 32);
    let legend_y = below + 2;
    area.draw(&Text::new(
        "0",
        (bar_x - 5, legend_y + 5),
        text_style(12, HPos::Right, VPos::Center),
    ))?;
    for s in 0..steps {
        let a = bar_x + s * bar_w / steps;
        let b = bar_x + (s + 1) * bar_w / steps;
        let t = (f64::from(s) + 0.5) / f64::from(steps);
        area.draw(&Rectangle::new(
            [(a, legend_y), (b, legend_y + 10)],
            heat_color(t).filled(),
        ))?;
    }
    area.draw(&Rectangle::new(
        [(bar_x, legend_y), (bar_x + bar_w, legend_y + 10)],
        BLACK.mix(0.4),
    ))?;
    area.draw(&Text::new(
        "1",
        (bar_x + bar_w + 5, legend_y + 5),
        text_style(12, HPos::Left, VPos::Center),
    ))?;

    for (k, line) in caption.iter().enumerate() {
        area.draw(&Text::new(
            line.clone(),
            (margin, legend_y + 26 + 16 * k as i32),
            text_style(12, HPos::Left, VPos::Top).color(&BLACK.mix(0.7)),
        ))?;
    }
    Ok(())
}

// ---------------------------------------------------------------------------------------------
// Histogram.

/// How many points a reference density is evaluated at: smooth at 820 px, cheap to compute.
const CURVE_POINTS: usize = 200;

/// A histogram of `values` scaled to a density (the bars' area is 1), with an optional named
/// reference density drawn over it to compare shapes, e.g. `Some(("N(0, 0.1²)", &normal))`.
///
/// Values that are not finite are left out. `bins == 0` picks √n bins (between 5 and 100). Where the
/// reference curve is not finite it is broken, and where it towers over the bars it is cut at three
/// times the tallest bar so the histogram stays readable.
pub fn histogram(
    title: &str,
    values: &[f64],
    bins: usize,
    density: Option<(&str, &dyn Fn(f64) -> f64)>,
) -> Result<String, String> {
    let Binned { n, lo, hi, bars } = bin_density(values, bins)?;
    let curve = density.map(|(name, f)| {
        let points: Vec<(f64, f64)> = (0..CURVE_POINTS)
            .map(|i| {
                let x = lo + (hi - lo) * i as f64 / (CURVE_POINTS - 1) as f64;
                (x, f(x))
            })
            .collect();
        (name, points)
    });
    render_svg(420, |root| {
        draw_histogram(root, title, n, (lo, hi), &bars, curve.as_ref())
    })
}

/// The finite values counted into equal bins and scaled to a density.
struct Binned {
    /// How many values were finite, and so counted.
    n: usize,
    lo: f64,
    hi: f64,
    /// (left edge, right edge, density) of every bin that holds a value.
    bars: Vec<(f64, f64, f64)>,
}

fn bin_density(values: &[f64], bins: usize) -> Result<Binned, String> {
    let values: Vec<f64> = values.iter().copied().filter(|v| v.is_finite()).collect();
    let bins = if bins > 0 {
        bins
    } else {
        ((values.len() as f64).sqrt().ceil() as usize).clamp(5, 100)
    };
    let (lo, hi) = values
        .iter()
        .fold((f64::MAX, f64::MIN), |(a, b), &v| (a.min(v), b.max(v)));
    let (lo, hi) = if values.is_empty() {
        (0.0, 1.0)
    } else if hi > lo {
        (lo, hi)
    } else {
        // One distinct value: give its bar a width in proportion to it.
        // (Zero, or a value so small its 5% would underflow, gets a fixed ±0.5 instead.)
        let half = if lo.abs() > 1e-300 {
            lo.abs() * 0.05
        } else {
            0.5
        };
        (lo - half, hi + half)
    };
    let width = (hi - lo) / bins as f64;
    if !width.is_finite() || width <= 0.0 {
        return Err(format!(
            "histogram: the range {lo:e}..{hi:e} cannot be split into {bins} bins"
        ));
    }
    let mut counts = vec![0usize; bins];
    for v in &values {
        let i = (((v - lo) / width) as usize).min(bins - 1);
        counts[i] += 1;
    }
    // Dividing by n and the bin width makes the bars' total area 1, comparable with a density.
    let scale = 1.0 / (values.len().max(1) as f64 * width);
    let bars: Vec<(f64, f64, f64)> = counts
        .iter()
        .enumerate()
        .filter(|(_, c)| **c > 0)
        .map(|(i, &c)| {
            let left = lo + i as f64 * width;
            (left, left + width, c as f64 * scale)
        })
        .collect();
    Ok(Binned {
        n: values.len(),
        lo,
        hi,
        bars,
    })
}

type Curve<'a> = (&'a str, Vec<(f64, f64)>);

fn draw_histogram<DB: DrawingBackend>(
    area: &Area<DB>,
    title: &str,
    n: usize,
    (lo, hi): (f64, f64),
    bars: &[(f64, f64, f64)],
    curve: Option<&Curve>,
) -> DrawResult<DB> {
    let tallest = bars.iter().map(|b| b.2).fold(0.0, f64::max);
    // With no data there is nothing to compare the curve to, so it is not drawn.
    let curve = curve.filter(|_| n > 0);
    let curve_top = curve
        .iter()
        .flat_map(|(_, p)| p.iter().map(|q| q.1))
        .filter(|y| y.is_finite())
        .fold(0.0, f64::max);
    let cap = if tallest > 0.0 {
        3.0 * tallest
    } else {
        f64::MAX
    };
    let top = tallest.max(curve_top.min(cap));
    let ymax = if top > 0.0 { top * 1.12 } else { 1.0 };
    let pad = (hi - lo) * 0.03;

    let mut chart = ChartBuilder::on(area)
        .caption(title, ("sans-serif", 16))
        .margin(12)
        .margin_right(24)
        .x_label_area_size(40)
        .y_label_area_size(70)
        .build_cartesian_2d((lo - pad)..(hi + pad), 0.0..ymax)?;
    let x_ticks = tick_format(lo - pad, hi + pad);
    let y_ticks = tick_format(0.0, ymax);
    chart
        .configure_mesh()
        .x_desc("value")
        .y_desc("density")
        .x_label_formatter(&x_ticks)
        .y_label_formatter(&y_ticks)
        .light_line_style(WHITE)
        .draw()?;

    // Opaque (the palette blue over white), so the grid stays behind the bars.
    let fill = RGBColor(140, 190, 219).filled();
    let edge = PALETTE[0].stroke_width(1);
    let drawn = chart.draw_series(bars.iter().flat_map(|&(a, b, d)| {
        [
            Rectangle::new([(a, 0.0), (b, d)], fill),
            Rectangle::new([(a, 0.0), (b, d)], edge),
        ]
    }))?;
    if n > 0 {
        drawn
            .label(format!("values (n = {n})"))
            .legend(move |(x, y)| Rectangle::new([(x, y - 5), (x + 20, y + 5)], fill));
    }

    if let Some((name, points)) = curve {
        let color = PALETTE[1];
        // Split at non-finite values so one pole does not erase the whole curve.
        let mut pieces: Vec<Vec<(f64, f64)>> = vec![Vec::new()];
        for &(x, y) in points {
            if y.is_finite() {
                pieces.last_mut().unwrap().push((x, y.clamp(0.0, ymax)));
            } else if !pieces.last().unwrap().is_empty() {
                pieces.push(Vec::new());
            }
        }
        pieces.retain(|p| !p.is_empty());
        for (k, piece) in pieces.into_iter().enumerate() {
            let drawn = chart.draw_series(LineSeries::new(piece, color.stroke_width(2)))?;
            if k == 0 {
                drawn.label(name.to_string()).legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 20, y)], color.stroke_width(2))
                });
            }
        }
    }

    // The legend goes in the upper corner away from the tallest bar.
    let peak = bars
        .iter()
        .max_by(|a, b| a.2.total_cmp(&b.2))
        .map_or(lo, |b| (b.0 + b.1) / 2.0);
    let corner = if peak > (lo + hi) / 2.0 {
        SeriesLabelPosition::UpperLeft
    } else {
        SeriesLabelPosition::UpperRight
    };
    if n == 0 {
        let (xs, ys) = chart.plotting_area().get_pixel_range();
        let base = area.get_base_pixel();
        draw_no_data(
            area,
            (xs.start + xs.end) / 2 - base.0,
            (ys.start + ys.end) / 2 - base.1,
        )?;
    } else {
        chart
            .configure_series_labels()
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK.mix(0.3))
            .position(corner)
            .draw()?;
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
        let kept = thinned(values.clone());
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
        assert_eq!(thinned(vec![3.0, 1.0, 2.0]), vec![3.0, 1.0, 2.0]);
    }

    #[test]
    fn ticks_stay_short_at_any_scale() {
        let f = tick_format(-1.2e-8, 1.2e-8);
        assert_eq!(
            (f(&-1e-8), f(&0.0), f(&5e-9)),
            ("-1e-8".into(), "0".into(), "5e-9".into())
        );
        let f = tick_format(2e6, 4e6);
        assert_eq!((f(&2.2e6), f(&3e6)), ("2.2e6".into(), "3e6".into()));
        let f = tick_format(-0.5, 0.4);
        assert_eq!(
            (f(&-0.25), f(&0.1), f(&0.0)),
            ("-0.25".into(), "0.1".into(), "0".into())
        );
        let f = tick_format(0.0, 180.0);
        assert_eq!((f(&20.0), f(&180.0)), ("20".into(), "180".into()));
    }

    #[test]
    fn histogram_bars_have_unit_area() {
        let values: Vec<f64> = (0..1000).map(|i| (f64::from(i) * 0.37).sin()).collect();
        for bins in [1, 7, 40] {
            let b = bin_density(&values, bins).unwrap();
            let area: f64 = b.bars.iter().map(|(l, r, d)| (r - l) * d).sum();
            assert!((area - 1.0).abs() < 1e-12, "{bins} bins: area {area}");
        }
        // One distinct value still makes a bar of area 1, not a division by a zero width.
        let b = bin_density(&[2.5, 2.5, f64::NAN], 0).unwrap();
        assert_eq!((b.n, b.bars.len()), (2, 1));
        let (l, r, d) = b.bars[0];
        assert!(l < 2.5 && 2.5 < r && ((r - l) * d - 1.0).abs() < 1e-12);
    }

    #[test]
    fn draws_an_svg_with_a_line_per_series() {
        let steps: Vec<f64> = (0..10).map(|i| 10f64.powi(-i)).collect();
        let panel = StepPanel {
            title: "layer 1 (0, 1)".into(),
            steps: steps.clone(),
            series: vec![
                (
                    "central".into(),
                    steps.iter().map(|h| h * h + 1e-16 / h).collect(),
                ),
                (
                    "forward".into(),
                    steps.iter().map(|h| h + 1e-16 / h).collect(),
                ),
            ],
            marks: vec![("∛ε".into(), 6e-6)],
        };
        let svg = step_plot(&[panel]).unwrap();
        assert!(svg.starts_with("<svg"), "{}", &svg[..100]);
        assert!(svg.matches("<polyline").count() >= 2);
        assert!(svg.contains("central") && svg.contains("relative error"));
    }
}
