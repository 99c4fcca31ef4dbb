//! SVG plots, drawn with plotters' SVG backend (no fonts or raster code needed): the step-size
//! V-curve (steps.rs), relative errors per tensor (strip.rs), unit health (heatmap.rs) and weight
//! histograms (histogram.rs), with what they share here.

mod heatmap;
mod histogram;
mod steps;
mod strip;

use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

pub use heatmap::{HeatRow, heatmap};
pub use histogram::histogram;
pub use steps::{StepPanel, step_plot};
pub use strip::{StripSeries, error_strip};

/// Line colours: five of the Okabe–Ito palette, which colour-blind readers tell apart, and grey.
const PALETTE: [RGBColor; 6] = [
    RGBColor(0, 114, 178),
    RGBColor(213, 94, 0),
    RGBColor(0, 158, 115),
    RGBColor(204, 121, 167),
    RGBColor(86, 86, 86),
    RGBColor(230, 159, 0),
];

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

#[cfg(test)]
mod tests {
    use super::*;

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
}
