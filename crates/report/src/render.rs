//! Renderers: a terminal table (optionally coloured), Markdown, and JSON.

use std::io::{self, Write};

use serde::Serialize;

use crate::{Block, Cell, Document, Finding, Severity, Table, Tone, Verdict};

/// The output format of a command (`--format`).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    Table,
    Json,
    Markdown,
}

/// `--color`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ColorChoice {
    Auto,
    Always,
    Never,
}

/// Whether to colour: never with JSON or Markdown; with `auto`, only on a terminal, and not when
/// `NO_COLOR` is set (to anything non-empty, per no-color.org) or `TERM=dumb`.
pub fn use_color(
    choice: ColorChoice,
    format: Format,
    is_terminal: bool,
    no_color: Option<&str>,
    term: Option<&str>,
) -> bool {
    if format != Format::Table {
        return false;
    }
    match choice {
        ColorChoice::Never => false,
        ColorChoice::Always => true,
        ColorChoice::Auto => {
            is_terminal && no_color.is_none_or(str::is_empty) && term != Some("dumb")
        }
    }
}

/// Writes a report as pretty-printed JSON followed by a newline.
pub fn render_json<T: Serialize>(report: &T, out: &mut impl Write) -> io::Result<()> {
    serde_json::to_writer_pretty(&mut *out, report).map_err(io::Error::other)?;
    writeln!(out)
}

/// Paragraph width of the terminal renderer.
const WIDTH: usize = 100;

/// Writes a document for a terminal: aligned tables, findings worst first, the verdict last.
pub fn render_table(doc: &Document, out: &mut impl Write, color: bool) -> io::Result<()> {
    // Rendered whole first, so that text read from files passes through `visible` once.
    let mut buf = Vec::new();
    table_into(doc, &mut buf, color)?;
    out.write_all(visible(&String::from_utf8_lossy(&buf), color).as_bytes())
}

/// Text safe to write to a terminal: control characters other than a newline and a tab — which
/// a file's names, keys and fields can carry (an escape sequence that clears the screen or sets
/// the window's title) — written as visible escapes (`\x1b`, `\u{9b}`), and with `colour` the
/// renderer's own styling (ESC `[` digits `m`) kept. Every message plumb writes from a file's
/// bytes goes through it.
pub fn visible(text: &str, colour: bool) -> std::borrow::Cow<'_, str> {
    let raw = |c: char| c.is_control() && c != '\n' && c != '\t';
    if !text.chars().any(raw) {
        return std::borrow::Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 16);
    let mut rest = text;
    while let Some(c) = rest.chars().next() {
        if colour && c == '\x1b' {
            let style = rest[1..].strip_prefix('[').and_then(|t| {
                let digits = t.find(|d: char| !(d.is_ascii_digit() || d == ';'))?;
                t[digits..].starts_with('m').then_some(2 + digits + 1)
            });
            if let Some(n) = style {
                out.push_str(&rest[..n]);
                rest = &rest[n..];
                continue;
            }
        }
        match c {
            c if raw(c) && (c as u32) < 0x80 => out.push_str(&format!("\\x{:02x}", c as u32)),
            c if raw(c) => out.push_str(&format!("\\u{{{:x}}}", c as u32)),
            c => out.push(c),
        }
        rest = &rest[c.len_utf8()..];
    }
    std::borrow::Cow::Owned(out)
}

fn table_into(doc: &Document, out: &mut impl Write, color: bool) -> io::Result<()> {
    let paint = Paint { on: color };
    writeln!(out, "{}", paint.bold(&doc.title))?;
    for block in &doc.blocks {
        writeln!(out)?;
        match block {
            Block::Heading(h) => writeln!(out, "{}", paint.bold(h))?,
            Block::Text(t) => {
                for line in wrap(t, WIDTH) {
                    writeln!(out, "{line}")?;
                }
            }
            Block::Code(t) => {
                for line in t.trim_end().lines() {
                    if line.is_empty() {
                        writeln!(out)?;
                    } else {
                        writeln!(out, "  {line}")?;
                    }
                }
            }
            Block::Facts(facts) => {
                let w = facts.iter().map(|(k, _)| width(k)).max().unwrap_or(0);
                for (k, v) in facts {
                    writeln!(out, "  {}{}  {v}", paint.dim(k), " ".repeat(w - width(k)))?;
                }
            }
            Block::Table(t) => table(t, out, &paint)?,
            Block::Findings(fs) => {
                if fs.is_empty() {
                    writeln!(out, "{}", paint.tone("no findings", Tone::Good))?;
                }
                for f in sorted(fs) {
                    let tone = severity_tone(f.severity);
                    let place = place(f);
                    let head = format!("{:<7} {}", f.severity.name(), f.code);
                    let lead = format!("{}{}: ", paint.tone(&head, tone), place);
                    let indent = width(&head) + width(&place) + 2;
                    let lines = wrap(&f.message, WIDTH.saturating_sub(indent).max(40));
                    for (i, line) in lines.iter().enumerate() {
                        if i == 0 {
                            writeln!(out, "{lead}{line}")?;
                        } else {
                            writeln!(out, "{}{line}", " ".repeat(indent))?;
                        }
                    }
                }
            }
            Block::Verdict(v, summary) => {
                let tone = match v {
                    Verdict::Pass => Tone::Good,
                    Verdict::Fail => Tone::Bad,
                    Verdict::Inconclusive => Tone::Warn,
                };
                let word = format!("verdict: {}", v.name().to_uppercase());
                writeln!(out, "{} — {summary}", paint.tone(&paint.bold(&word), tone))?;
            }
            Block::Plot { title, .. } => writeln!(
                out,
                "{}",
                paint.dim(&format!("[plot: {title} — in the HTML report (--html)]"))
            )?,
            Block::Caution(c) => {
                for (i, line) in wrap(c, WIDTH - 2).iter().enumerate() {
                    let mark = if i == 0 { "! " } else { "  " };
                    writeln!(out, "{}{line}", paint.tone(mark, Tone::Warn))?;
                }
            }
        }
    }
    Ok(())
}

/// Writes a document as GitHub-flavoured Markdown (for pull-request comments).
pub fn render_markdown(doc: &Document, out: &mut impl Write) -> io::Result<()> {
    let mut buf = Vec::new();
    markdown_into(doc, &mut buf)?;
    out.write_all(visible(&String::from_utf8_lossy(&buf), false).as_bytes())
}

fn markdown_into(doc: &Document, out: &mut impl Write) -> io::Result<()> {
    writeln!(out, "# {}", doc.title)?;
    for block in &doc.blocks {
        writeln!(out)?;
        match block {
            Block::Heading(h) => writeln!(out, "## {h}")?,
            Block::Text(t) => writeln!(out, "{t}")?,
            Block::Code(t) => writeln!(out, "```\n{}\n```", t.trim_end())?,
            Block::Facts(facts) => {
                for (k, v) in facts {
                    writeln!(out, "- **{}**: {}", md(k), md(v))?;
                }
            }
            Block::Table(t) => {
                let numeric = numeric_columns(t);
                writeln!(
                    out,
                    "| {} |",
                    t.header
                        .iter()
                        .map(|h| md(h))
                        .collect::<Vec<_>>()
                        .join(" | ")
                )?;
                let rule: Vec<&str> = numeric
                    .iter()
                    .map(|&n| if n { "---:" } else { "---" })
                    .collect();
                writeln!(out, "|{}|", rule.join("|"))?;
                for row in t.rows.iter().chain(t.footer.iter()) {
                    let cells: Vec<String> = row.iter().map(|c| md(&c.text)).collect();
                    writeln!(out, "| {} |", cells.join(" | "))?;
                }
            }
            Block::Findings(fs) => {
                if fs.is_empty() {
                    writeln!(out, "No findings.")?;
                    continue;
                }
                writeln!(out, "| severity | code | where | message |")?;
                writeln!(out, "|---|---|---|---|")?;
                for f in sorted(fs) {
                    let place = place(f);
                    writeln!(
                        out,
                        "| {} | `{}` | {} | {} |",
                        f.severity.name(),
                        f.code,
                        md(place.trim()),
                        md(&f.message)
                    )?;
                }
            }
            Block::Verdict(v, summary) => {
                writeln!(out, "**Verdict: {}** — {}", v.name(), md(summary))?
            }
            Block::Caution(c) => writeln!(out, "> **Caution:** {}", md(c))?,
            Block::Plot { title, .. } => {
                writeln!(out, "_Plot: {} (in the HTML report)._", md(title))?
            }
        }
    }
    Ok(())
}

fn sorted(fs: &[Finding]) -> Vec<&Finding> {
    let mut v: Vec<&Finding> = fs.iter().collect();
    v.sort_by_key(|f| std::cmp::Reverse(f.severity));
    v
}

fn place(f: &Finding) -> String {
    match (&f.tensor, f.layer) {
        (Some(t), _) => format!(" {t}"),
        (None, Some(l)) => format!(" layer {l}"),
        (None, None) => String::new(),
    }
}

fn severity_tone(s: Severity) -> Tone {
    match s {
        Severity::Error => Tone::Bad,
        Severity::Warning => Tone::Warn,
        Severity::Note => Tone::Dim,
    }
}

fn table(t: &Table, out: &mut impl Write, paint: &Paint) -> io::Result<()> {
    let cols = t.header.len();
    let numeric = numeric_columns(t);
    let mut widths: Vec<usize> = t.header.iter().map(|h| width(h)).collect();
    for row in t.rows.iter().chain(t.footer.iter()) {
        for (i, c) in row.iter().enumerate().take(cols) {
            widths[i] = widths[i].max(width(&c.text));
        }
    }
    let line = |cells: Vec<(String, Tone)>, out: &mut dyn Write| -> io::Result<()> {
        let mut s = String::new();
        for (i, (text, tone)) in cells.into_iter().enumerate() {
            let pad = " ".repeat(widths[i].saturating_sub(width(&text)));
            let painted = paint.tone(&text, tone);
            if i > 0 {
                s.push_str("  ");
            }
            if numeric[i] {
                s.push_str(&pad);
                s.push_str(&painted);
            } else {
                s.push_str(&painted);
                if i + 1 < cols {
                    s.push_str(&pad);
                }
            }
        }
        writeln!(out, "{}", s.trim_end())
    };
    let header: Vec<(String, Tone)> = t.header.iter().map(|h| (h.clone(), Tone::Plain)).collect();
    let header_text = {
        let mut v = Vec::new();
        line(header, &mut v)?;
        String::from_utf8(v).expect("text")
    };
    write!(out, "{}", paint.bold(header_text.trim_end()))?;
    writeln!(out)?;
    let rule = |out: &mut dyn Write| -> io::Result<()> {
        let parts: Vec<String> = widths.iter().map(|&w| "─".repeat(w)).collect();
        writeln!(out, "{}", paint.dim(&parts.join("  ")))
    };
    rule(out)?;
    let cells = |row: &[Cell]| -> Vec<(String, Tone)> {
        (0..cols)
            .map(|i| {
                row.get(i)
                    .map_or((String::new(), Tone::Plain), |c| (c.text.clone(), c.tone))
            })
            .collect()
    };
    for row in &t.rows {
        line(cells(row), out)?;
    }
    if let Some(f) = &t.footer {
        rule(out)?;
        line(cells(f), out)?;
    }
    Ok(())
}

/// A column is right-aligned when every body cell looks like a number (or is a dash or empty).
fn numeric_columns(t: &Table) -> Vec<bool> {
    (0..t.header.len())
        .map(|i| {
            let mut any = false;
            let all = t.rows.iter().all(|r| {
                let s = r.get(i).map_or("", |c| c.text.trim());
                if s.is_empty() || s == "—" || s == "-" {
                    return true;
                }
                any = true;
                looks_numeric(s)
            });
            all && any
        })
        .collect()
}

fn looks_numeric(s: &str) -> bool {
    let s = s.trim_end_matches('%');
    !s.is_empty()
        && s.chars()
            .next()
            .is_some_and(|c| c.is_ascii_digit() || c == '-' || c == '+' || c == '.')
        && s.chars()
            .all(|c| c.is_ascii_digit() || matches!(c, '.' | 'e' | 'E' | '-' | '+' | ',' | '_'))
}

fn width(s: &str) -> usize {
    s.chars().count()
}

/// Greedy word wrap.
fn wrap(text: &str, width_limit: usize) -> Vec<String> {
    let mut lines = Vec::new();
    for para in text.split('\n') {
        let mut cur = String::new();
        for word in para.split(' ') {
            if !cur.is_empty() && width(&cur) + 1 + width(word) > width_limit {
                lines.push(std::mem::take(&mut cur));
            }
            if !cur.is_empty() {
                cur.push(' ');
            }
            cur.push_str(word);
        }
        lines.push(cur);
    }
    lines
}

/// Text for a Markdown table cell or list item: a file or tensor name is shown as written, not
/// taken for markup, a table pipe or raw HTML.
fn md(s: &str) -> String {
    s.replace('\\', "\\\\")
        .replace('|', "\\|")
        .replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('\n', " ")
}

/// ANSI styling, or none.
struct Paint {
    on: bool,
}

impl Paint {
    fn wrap(&self, s: &str, code: &str) -> String {
        if self.on && !s.is_empty() {
            format!("\x1b[{code}m{s}\x1b[0m")
        } else {
            s.to_string()
        }
    }

    fn bold(&self, s: &str) -> String {
        self.wrap(s, "1")
    }

    fn dim(&self, s: &str) -> String {
        self.wrap(s, "2")
    }

    fn tone(&self, s: &str, tone: Tone) -> String {
        match tone {
            Tone::Plain => s.to_string(),
            Tone::Good => self.wrap(s, "32"),
            Tone::Warn => self.wrap(s, "33"),
            Tone::Bad => self.wrap(s, "31"),
            Tone::Dim => self.dim(s),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> Document {
        let mut d = Document::new("plumb test");
        d.push(Block::Facts(vec![("network".into(), "4 → 5 → 3".into())]));
        let mut t = Table::new(["tensor", "shape", "parameters"])
            .row([Cell::from("layer1"), "(5, 5)".into(), "25".into()])
            .row([
                Cell::from("layer2"),
                "(3, 6)".into(),
                Cell::new("18", Tone::Bad),
            ]);
        t.footer([Cell::from("total"), "".into(), "43".into()]);
        d.push(Block::Table(t));
        d.push(Block::Findings(vec![
            Finding::new("a-note", Severity::Note, "fine").tensor("layer1"),
            Finding::new("x|y", Severity::Error, "broken | badly").layer(2),
        ]));
        d.push(Block::Verdict(Verdict::Fail, "1 error".into()));
        d
    }

    #[test]
    fn terminal_table_aligns_numbers_right_and_sorts_findings() {
        let mut out = Vec::new();
        render_table(&sample(), &mut out, false).unwrap();
        let s = String::from_utf8(out).unwrap();
        assert!(s.contains("layer1  (5, 5)          25\n"), "{s}");
        assert!(s.contains("total                   43\n"), "{s}");
        let err = s.find("error   x|y layer 2: broken").unwrap();
        let note = s.find("note    a-note layer1: fine").unwrap();
        assert!(err < note, "{s}");
        assert!(s.contains("verdict: FAIL — 1 error"));
        assert!(!s.contains('\x1b'));
    }

    #[test]
    fn control_characters_from_files_are_written_as_escapes() {
        // ECMA-48: ESC [ 2 J erases the display, ESC ] 0 ; … BEL sets a window title, and
        // U+009B is the one-character CSI; a rendition (ESC [ n m) is what plumb's colour writes.
        let text = "a\u{1b}[2Jb\u{1b}]0;t\u{7}c\u{9b}d\te\nf";
        assert_eq!(
            visible(text, false),
            "a\\x1b[2Jb\\x1b]0;t\\x07c\\u{9b}d\te\nf"
        );
        let painted = "\u{1b}[31mred\u{1b}[0m \u{1b}[2J";
        assert_eq!(visible(painted, true), "\u{1b}[31mred\u{1b}[0m \\x1b[2J");
        assert_eq!(visible(painted, false), "\\x1b[31mred\\x1b[0m \\x1b[2J");
        let mut doc = Document::new("t\u{1b}[2J");
        doc.push(Block::Text("x\u{7}".into()));
        for colour in [false, true] {
            let mut out = Vec::new();
            render_table(&doc, &mut out, colour).unwrap();
            let out = String::from_utf8(out).unwrap();
            assert!(
                !out.contains('\u{7}') && !out.contains("\u{1b}[2J"),
                "{out:?}"
            );
        }
        let mut out = Vec::new();
        render_markdown(&doc, &mut out).unwrap();
        assert!(
            !String::from_utf8(out)
                .unwrap()
                .contains(['\u{1b}', '\u{7}'])
        );
    }

    #[test]
    fn colour_only_when_asked() {
        let mut out = Vec::new();
        render_table(&sample(), &mut out, true).unwrap();
        assert!(
            String::from_utf8(out)
                .unwrap()
                .contains("\x1b[31m18\x1b[0m")
        );
        // no-color.org: NO_COLOR set to a non-empty value disables colour; an empty one does not.
        assert!(!use_color(
            ColorChoice::Auto,
            Format::Table,
            true,
            Some("1"),
            None
        ));
        assert!(use_color(
            ColorChoice::Auto,
            Format::Table,
            true,
            Some(""),
            None
        ));
        assert!(!use_color(
            ColorChoice::Auto,
            Format::Table,
            true,
            None,
            Some("dumb")
        ));
        assert!(!use_color(
            ColorChoice::Auto,
            Format::Table,
            false,
            None,
            None
        ));
        assert!(!use_color(
            ColorChoice::Always,
            Format::Json,
            true,
            None,
            None
        ));
        assert!(use_color(
            ColorChoice::Always,
            Format::Table,
            false,
            Some("1"),
            None
        ));
    }

    #[test]
    fn markdown_escapes_pipes_and_aligns_numeric_columns() {
        let mut out = Vec::new();
        render_markdown(&sample(), &mut out).unwrap();
        let s = String::from_utf8(out).unwrap();
        assert!(s.contains("|---|---|---:|"), "{s}");
        assert!(
            s.contains("| error | `x|y` | layer 2 | broken \\| badly |"),
            "{s}"
        );
        assert!(s.contains("**Verdict: fail** — 1 error"));
    }
}
