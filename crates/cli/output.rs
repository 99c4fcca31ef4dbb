//! Where reports go and how they look: the validated form of the common flags, and the one place a
//! report is rendered — to stdout in the chosen format, and to the JUnit, HTML and baseline files
//! asked for — so that adding a renderer touches no command.

use std::io::{IsTerminal, Write};
use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use plumb_formats::{Existing, MAX_REPORT_BYTES, read_input, write_file};
use plumb_report::{
    BASELINE_VERSION, Baseline, Cell, ColorChoice, Document, Format, NetworkId, Table, Tone,
    Verdict, render_html, render_json, render_junit, render_markdown, render_table, use_color,
};
use serde::Serialize;

use crate::args::{ColorArg, Common, FormatArg};

pub use plumb_report::SCHEMA_VERSION;

/// The common flags, resolved against the environment.
#[derive(Clone, Debug)]
pub struct Settings {
    pub format: Format,
    pub color: bool,
    pub seed: u64,
    pub quiet: bool,
    pub junit: Option<PathBuf>,
    pub html: Option<PathBuf>,
    pub save_baseline: Option<PathBuf>,
    pub baseline: Option<PathBuf>,
    pub force: bool,
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
            junit: c.junit.clone(),
            html: c.html.clone(),
            save_baseline: c.save_baseline.clone(),
            baseline: c.baseline.clone(),
            force: c.force,
        }
    }

    /// Refuses, before any work, output files that exist (without --force), that are not regular
    /// files, that are an input of the run (the baseline included), or that two outputs share
    /// (`outputs` are the command's own), and a baseline that cannot be read. The write itself
    /// checks again: a file created meanwhile is not replaced either.
    pub fn check_outputs(&self, command: &str, inputs: &[&Path], outputs: &[&Path]) -> Result<()> {
        let mut inputs = inputs.to_vec();
        inputs.extend(self.baseline.as_deref());
        let mut all: Vec<&Path> = outputs.to_vec();
        all.extend(
            [&self.junit, &self.html, &self.save_baseline]
                .into_iter()
                .flatten()
                .map(PathBuf::as_path),
        );
        crate::inputs::distinct_outputs(&all)?;
        for p in [&self.junit, &self.html, &self.save_baseline]
            .into_iter()
            .flatten()
        {
            crate::inputs::check_output(p, self.force, &inputs)?;
        }
        if let Some(b) = &self.baseline {
            let base = read_baseline(b)?;
            if base.command != command {
                bail!(
                    "{}: the baseline was recorded by `plumb {}`, and this run is `plumb {command}`: \
                     give a baseline this command recorded (--save-baseline)",
                    b.display(),
                    base.command
                );
            }
        }
        Ok(())
    }

    /// What an output may do to a file already at its path: replace a regular one with --force.
    pub fn existing(&self) -> Existing {
        if self.force {
            Existing::Replace
        } else {
            Existing::Keep
        }
    }

    /// A note for the user on stderr (not part of the report), unless --quiet.
    pub fn note(&self, text: &str) {
        if !self.quiet {
            eprintln!("plumb: {}", plumb_report::visible(text, false));
        }
    }

    /// Renders a report — against the baseline when asked, to stdout, and to the JUnit, HTML and
    /// baseline files asked for — and returns the run's verdict.
    pub fn emit<T: Serialize>(&self, json: &T, mut doc: Document) -> Result<Verdict> {
        let mut value = serde_json::to_value(json).context("the report serialises")?;
        let findings = doc.findings();
        let mut verdict = doc.verdict().unwrap_or(Verdict::Pass);
        // The JUnit cases must fail where the findings do, baseline changes included.
        let mut every = findings.clone();
        if let Some(path) = &self.baseline {
            // check_outputs has refused an unreadable baseline or another command's.
            let base = read_baseline(path)?;
            if let Some(why) = base.unfit_for(&doc) {
                bail!("{}: {why}", path.display());
            }
            let judged = base.judge(&path.display().to_string(), &mut doc, &findings);
            verdict = judged.verdict;
            judged.annotate(&path.display().to_string(), &mut value);
            every.extend(judged.changes);
        }
        doc.fail_cases_for(&every);
        let mut buf = Vec::new();
        match self.format {
            Format::Json => render_json(&value, &mut buf)?,
            Format::Markdown => render_markdown(&doc, &mut buf)?,
            Format::Table => render_table(&doc, &mut buf, self.color)?,
        }
        if let Some(p) = &self.junit {
            let mut x = Vec::new();
            render_junit(&doc, &mut x)?;
            write_file(p, &x, self.existing())
                .with_context(|| format!("{}: cannot write the JUnit report", p.display()))?;
        }
        if let Some(p) = &self.html {
            let mut h = Vec::new();
            render_html(&doc, &mut h)?;
            write_file(p, &h, self.existing())
                .with_context(|| format!("{}: cannot write the HTML report", p.display()))?;
            self.note(&format!("wrote the HTML report to {}", p.display()));
        }
        let mut out = std::io::stdout().lock();
        match out.write_all(&buf).and_then(|_| out.flush()) {
            // A reader that stopped reading (`| head`) is not an error of ours.
            Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => {}
            other => other?,
        }
        if let Some(p) = &self.save_baseline {
            if verdict != Verdict::Pass {
                bail!(
                    "{}: not saved — a baseline records a passing run, and this one is {}",
                    p.display(),
                    if verdict == Verdict::Fail {
                        "failed"
                    } else {
                        "inconclusive"
                    }
                );
            }
            let base = Baseline::record(&doc, &findings);
            let text = serde_json::to_string_pretty(&base).expect("a baseline serialises");
            write_file(p, text.as_bytes(), self.existing())
                .with_context(|| format!("{}: cannot write the baseline", p.display()))?;
            self.note(&format!("recorded the baseline in {}", p.display()));
        }
        Ok(verdict)
    }
}

/// Reads a baseline file, refusing one of another format version.
fn read_baseline(path: &Path) -> Result<Baseline> {
    let bytes = match read_input(path, MAX_REPORT_BYTES) {
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => bail!(
            "{}: no such baseline file; record one with --save-baseline",
            path.display()
        ),
        // A directory, a device or pipe, a symbolic-link loop, a file too large: said as it is.
        other => other.with_context(|| format!("{}: cannot read the baseline", path.display()))?,
    };
    let base = Baseline::from_json(&bytes).with_context(|| {
        format!(
            "{}: not a plumb baseline (record one with --save-baseline)",
            path.display()
        )
    })?;
    if base.plumb_baseline != BASELINE_VERSION {
        bail!(
            "{}: a baseline of format {}, and this plumb reads format {BASELINE_VERSION}: record \
             it again with --save-baseline",
            path.display(),
            base.plumb_baseline
        );
    }
    Ok(base)
}

/// The network a run is about, for baselines: its identity hash
/// ([`plumb_fd::report::description_hash`]) and its file tensors with their shapes.
pub fn network_id(desc: &plumb_formats::GraphDescription) -> NetworkId {
    NetworkId {
        hash: plumb_fd::report::description_hash(desc),
        shapes: desc
            .files
            .iter()
            .map(|f| (f.name.clone(), f.shape.clone()))
            .collect(),
    }
}

/// A shape as NumPy prints it.
pub fn shape(s: &[usize]) -> String {
    plumb_formats::shape_text(s)
}

/// A number for a table: 4 significant digits, scientific when far from 1.
pub fn num(v: f64) -> String {
    plumb_report::number(v)
}

/// A verdict as a table cell, in its colour.
pub fn verdict_cell(v: Verdict) -> Cell {
    match v {
        Verdict::Pass => Cell::new("pass", Tone::Good),
        Verdict::Fail => Cell::new("fail", Tone::Bad),
        Verdict::Inconclusive => Cell::new("inconclusive", Tone::Warn),
    }
}

/// A count as a table cell: plain at zero, in `tone` above (mismatches bad, unsettled a warning).
pub fn count_cell(n: usize, tone: Tone) -> Cell {
    Cell::new(n.to_string(), if n > 0 { tone } else { Tone::Plain })
}

/// A tensor's random directions as `agreeing/checked`, bad when any mismatched.
pub fn directions_cell(directions: usize, mismatches: usize) -> Cell {
    Cell::new(
        format!("{}/{directions}", directions - mismatches),
        if mismatches > 0 {
            Tone::Bad
        } else {
            Tone::Plain
        },
    )
}

/// One tensor's row of a finite-difference check's table (`check`'s own, `probe`'s self-check):
/// the figures both reports carry, `bound` only where the report has it.
pub struct CheckRow<'a> {
    pub name: &'a str,
    pub parameters: usize,
    pub checked: usize,
    pub max_rel: f64,
    pub median_rel: f64,
    pub median_bound: Option<f64>,
    pub mismatches: usize,
    pub unreliable: usize,
    pub unsettled: usize,
    pub directions: usize,
    pub direction_mismatches: usize,
    pub verdict: Verdict,
}

/// The per-tensor table of a finite-difference check, one row per tensor; the `bound` column
/// when the first row has one.
pub fn check_table<'a>(rows: impl IntoIterator<Item = CheckRow<'a>>) -> Table {
    let mut rows = rows.into_iter().peekable();
    let bound = rows.peek().is_some_and(|r| r.median_bound.is_some());
    let mut head = vec!["tensor", "parameters", "checked", "max rel", "median rel"];
    head.extend(bound.then_some("bound"));
    head.extend([
        "mismatch",
        "unreliable",
        "unsettled",
        "directions",
        "verdict",
    ]);
    let mut t = Table::new(head);
    for r in rows {
        let bad = if r.mismatches > 0 {
            Tone::Bad
        } else {
            Tone::Plain
        };
        let mut cells = vec![
            Cell::from(r.name.to_string()),
            Cell::from(r.parameters.to_string()),
            Cell::from(r.checked.to_string()),
            Cell::new(num(r.max_rel), bad),
            Cell::from(num(r.median_rel)),
        ];
        cells.extend(bound.then(|| Cell::from(num(r.median_bound.unwrap_or(f64::NAN)))));
        cells.extend([
            count_cell(r.mismatches, Tone::Bad),
            count_cell(r.unreliable, Tone::Warn),
            count_cell(r.unsettled, Tone::Warn),
            directions_cell(r.directions, r.direction_mismatches),
            verdict_cell(r.verdict),
        ]);
        t.push(cells);
    }
    t
}
