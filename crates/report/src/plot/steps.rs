//! The step-size plot: error against h, one line per method, one panel per coordinate.

use plotters::prelude::*;

use super::{PALETTE, WIDTH, draw_no_data};

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
        let root = SVGBackend::with_string(&mut svg, (WIDTH, height)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| e.to_string())?;
        let areas = root.split_evenly((panels.len().max(1), 1));
        for (area, panel) in areas.iter().zip(panels) {
            draw_panel(area, panel).map_err(|e| e.to_string())?;
        }
        root.present().map_err(|e| e.to_string())?;
    }
    Ok(svg)
}

fn draw_panel<DB: DrawingBackend>(
    area: &DrawingArea<DB, plotters::coord::Shift>,
    panel: &StepPanel,
) -> Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
    // What a log axis can show: positive and finite, errors within 1e-18..1e6 (a relative error
    // is at most 2; beyond that the picture says nothing more).
    let finite = |v: f64| v.is_finite() && v > 0.0;
    let xs = &panel.steps;
    let (xmin, xmax) = xs
        .iter()
        .filter(|&&x| finite(x))
        .fold((f64::MAX, f64::MIN), |(a, b), &x| (a.min(x), b.max(x)));
    let ys: Vec<f64> = panel
        .series
        .iter()
        .flat_map(|(_, v)| v.iter().copied())
        .filter(|&v| finite(v))
        .map(|v| v.clamp(1e-18, 1e6))
        .collect();
    if ys.is_empty() || xmin > xmax {
        area.draw(&Text::new(
            panel.title.clone(),
            (12, 12),
            ("sans-serif", 16).into_font(),
        ))?;
        let (w, h) = area.dim_in_pixel();
        return draw_no_data(area, w as i32 / 2, h as i32 / 2);
    }
    let (xmin, xmax) = if xmin < xmax {
        (xmin, xmax)
    } else {
        (xmin / 10.0, xmax * 10.0)
    };
    let ymin = ys.iter().copied().fold(f64::MAX, f64::min) / 3.0;
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
            .filter(|&(h, e)| finite(h) && finite(e))
            .map(|(h, e)| (h, e.clamp(1e-18, 1e6)))
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

#[cfg(test)]
mod tests {
    use super::*;

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
        let svg = step_plot(std::slice::from_ref(&panel)).unwrap();
        assert!(svg.starts_with("<svg"), "{}", &svg[..100]);
        // Nothing a log axis can show (a dead unit: every error 0 or NaN), or a single step:
        // a panel that says so, at once.
        let empty = StepPanel {
            series: vec![
                ("central".into(), vec![0.0; 10]),
                ("forward".into(), vec![f64::NAN; 10]),
            ],
            ..panel.clone()
        };
        assert!(step_plot(&[empty]).unwrap().contains("no finite values"));
        let single = StepPanel {
            steps: vec![1e-5],
            series: vec![("central".into(), vec![1e-9])],
            ..panel
        };
        assert!(step_plot(&[single]).unwrap().contains("<polyline"));
        assert!(svg.matches("<polyline").count() >= 2);
        assert!(svg.contains("central") && svg.contains("relative error"));
    }
}
