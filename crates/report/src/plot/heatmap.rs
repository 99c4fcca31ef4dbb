//! Unit health: one row per layer, one cell per unit.

use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, VPos};

use super::{Area, DrawResult, WIDTH, draw_no_data, render_svg, shorten, text_style, text_width};

/// One row of a [`heatmap`]: a layer, and a fraction in [0, 1] for each of its units.
#[derive(Clone, Debug)]
pub struct HeatRow {
    pub label: String,
    pub values: Vec<f64>,
}

/// The most cells a row is drawn with: beyond that the SVG grows by megabytes and the cells are
/// thinner than a pixel.
const MAX_CELLS: usize = 1000;

/// The largest finite value of a group of units (NaN when none is finite).
fn worst(group: &[f64]) -> f64 {
    group
        .iter()
        .copied()
        .filter(|v| v.is_finite())
        .fold(f64::NAN, f64::max)
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
/// show as the grey of the row's background, distinct from the white of a true 0. Rows of more
/// than 1,000 units are drawn as 1,000 cells or fewer, each the worst of the units it stands for
/// (so one dead unit still shows), and the caption says so.
pub fn heatmap(title: &str, rows: &[HeatRow]) -> Result<String, String> {
    let widest = rows.iter().map(|r| r.values.len()).max().unwrap_or(0);
    let per_cell = widest.div_ceil(MAX_CELLS).max(1);
    let binned: Vec<HeatRow>;
    let (rows, title) = if per_cell > 1 {
        binned = rows
            .iter()
            .map(|r| HeatRow {
                label: r.label.clone(),
                values: r.values.chunks(per_cell).map(worst).collect(),
            })
            .collect();
        let note = format!("each cell is the worst of {per_cell} neighbouring units");
        let title = if title.contains('\n') {
            format!("{title} ({note})")
        } else {
            format!("{title}\n{note}")
        };
        (&binned[..], title)
    } else {
        (rows, title.to_string())
    };
    let title = title.as_str();
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_wide_layer_is_binned_and_keeps_its_dead_unit() {
        let mut values = vec![0.0; 100_000];
        values[54_321] = 1.0;
        let svg = heatmap(
            "health",
            &[HeatRow {
                label: "layer 1".into(),
                values,
            }],
        )
        .unwrap();
        assert!(svg.len() < 400_000, "{} bytes", svg.len());
        assert!(svg.contains("worst of 100 neighbouring units"));
        // The dead unit's cell is drawn in the full red of 1.
        assert!(
            svg.contains("#BE141E") || svg.to_lowercase().contains("#be141e"),
            "no red cell"
        );
    }
}
