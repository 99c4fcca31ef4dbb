//! A density histogram with a reference density drawn over it.

use plotters::prelude::*;

use super::{Area, DrawResult, PALETTE, draw_no_data, render_svg, tick_format};

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
}
