//! Where reports go and how they look: the validated form of the common flags.

use std::io::{IsTerminal, Write};

use anyhow::Result;
use plumb_report::{
    ColorChoice, Document, Format, render_json, render_markdown, render_table, use_color,
};
use serde::Serialize;

use crate::args::{ColorArg, Common, FormatArg};

/// The version of every JSON report's schema (docs/json.md). Bumped on any incompatible change.
pub const SCHEMA_VERSION: u32 = 1;

/// The common flags, resolved against the environment.
#[derive(Clone, Debug)]
pub struct Settings {
    pub format: Format,
    pub color: bool,
    pub seed: u64,
    pub quiet: bool,
}

impl Settings {
    pub fn from_args(c: &Common) -> Settings {
        let format = match c.format {
            FormatArg::Table => Format::Table,
            FormatArg::Json => Format::Json,
            FormatArg::Markdown => Format::Markdown,
        };
        let choice = match c.color {
            ColorArg::Auto => ColorChoice::Auto,
            ColorArg::Always => ColorChoice::Always,
            ColorArg::Never => ColorChoice::Never,
        };
        let no_color = std::env::var("NO_COLOR").ok();
        let term = std::env::var("TERM").ok();
        let color = use_color(
            choice,
            format,
            std::io::stdout().is_terminal(),
            no_color.as_deref(),
            term.as_deref(),
        );
        Settings {
            format,
            color,
            seed: c.seed,
            quiet: c.quiet,
        }
    }

    /// A note for the user on stderr (not part of the report), unless --quiet.
    pub fn note(&self, text: &str) {
        if !self.quiet {
            eprintln!("plumb: {text}");
        }
    }

    /// Renders a report to stdout in the chosen format.
    pub fn emit<T: Serialize>(&self, json: &T, doc: &Document) -> Result<()> {
        let mut buf = Vec::new();
        match self.format {
            Format::Json => render_json(json, &mut buf)?,
            Format::Markdown => render_markdown(doc, &mut buf)?,
            Format::Table => render_table(doc, &mut buf, self.color)?,
        }
        let mut out = std::io::stdout().lock();
        match out.write_all(&buf).and_then(|_| out.flush()) {
            // A reader that stopped reading (`| head`) is not an error of ours.
            Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(()),
            other => Ok(other?),
        }
    }
}

/// A shape as NumPy prints it.
pub fn shape(s: &[usize]) -> String {
    plumb_formats::shape_text(s)
}

/// A number for a table: 4 significant digits, scientific when far from 1.
pub fn num(v: f64) -> String {
    if v == 0.0 {
        "0".into()
    } else if !v.is_finite() {
        format!("{v}")
    } else if (1e-3..1e5).contains(&v.abs()) {
        let digits = (3 - v.abs().log10().floor() as i32).max(0) as usize;
        format!("{v:.digits$}")
    } else {
        format!("{v:.3e}")
    }
}
