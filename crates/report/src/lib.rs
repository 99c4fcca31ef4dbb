//! The findings model every command reports through, and the renderers that turn a report into a
//! terminal table, Markdown, JSON, JUnit XML or a self-contained HTML page.
//!
//! A command builds two things from its result: a typed, serialisable report (the JSON, whose schema
//! is documented in `docs/json.md`) and a [`Document`] — headings, text, tables and findings — for the
//! human formats. Renderers write to any `impl Write`, so adding one touches no command.
//!
//! ```
//! use plumb_report::{Block, Document, Finding, Severity, Table, render_markdown};
//!
//! let mut doc = Document::new("plumb shapes");
//! doc.push(Block::Table(Table::new(["tensor", "shape"]).row(["layer1", "(5, 5)"])));
//! doc.push(Block::Findings(vec![Finding::new("tensor-missing", Severity::Error, "layer2 is missing")]));
//! let mut out = Vec::new();
//! render_markdown(&doc, &mut out).unwrap();
//! assert!(String::from_utf8(out).unwrap().contains("| layer1 | (5, 5) |"));
//! ```

mod baseline;
mod document;
mod finding;
mod html;
mod junit;
mod plot;
mod render;
mod sources;

pub use baseline::{BASELINE_VERSION, Baseline, Judged, NetworkId, Recorded};
pub use document::{Block, Case, Cell, Document, Table, Tone, number};
pub use finding::{Finding, Severity, Verdict, tally};
pub use html::render_html;
pub use junit::render_junit;
pub use plot::{HeatRow, StepPanel, StripSeries, error_strip, heatmap, histogram, step_plot};
pub use render::{
    ColorChoice, Format, render_json, render_markdown, render_table, use_color, visible,
};
pub use sources::{DataSource, SCHEMA_VERSION, WeightsSource, figure};
