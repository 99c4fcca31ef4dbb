//! The step-size plot: error against h, one line per method, one panel per coordinate.

use plotters::prelude::*;

use super::{PALETTE, WIDTH};

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
        let svg = step_plot(&[panel]).unwrap();
        assert!(svg.starts_with("<svg"), "{}", &svg[..100]);
        assert!(svg.matches("<polyline").count() >= 2);
        assert!(svg.contains("central") && svg.contains("relative error"));
    }
}
