//! One self-contained HTML file: no scripts, no fonts, no network — the verdict first, then the
//! document's blocks, its plots inline as SVG. Readable on screen and printed.

use std::io::{self, Write};

use crate::{Block, Cell, Document, Finding, Severity, Table, Tone, Verdict};

const STYLE: &str = "body{font:15px/1.45 system-ui,-apple-system,'Segoe UI',sans-serif;max-width:64rem;margin:2rem auto;padding:0 1rem;color:#1b1b1b}\
h1{font-size:1.5rem;margin-bottom:.2rem}h2{font-size:1.15rem;margin-top:2rem;border-bottom:1px solid #ddd;padding-bottom:.2rem}\
.verdict{font-size:1.25rem;font-weight:600;padding:.6rem 1rem;border-radius:.4rem;margin:1rem 0}\
.pass{background:#e6f4ea;color:#0b6b2f}.fail{background:#fde8e8;color:#a11}.inconclusive{background:#fff6e0;color:#8a5a00}\
table{border-collapse:collapse;margin:.6rem 0;font-size:.9rem}th,td{padding:.25rem .6rem;border-bottom:1px solid #e4e4e4;text-align:left;vertical-align:top}\
th{background:#f5f5f5}td.num{text-align:right;font-variant-numeric:tabular-nums}\
.good{color:#0b6b2f}.bad{color:#b00}.warn{color:#8a5a00}.dim{color:#777}\
dl{display:grid;grid-template-columns:max-content auto;gap:.15rem 1rem}dt{color:#555}dd{margin:0}\
.finding{margin:.3rem 0;padding:.35rem .6rem;border-left:4px solid #bbb}.finding.error{border-color:#c00}.finding.warning{border-color:#d90}\
code{background:#f3f3f3;padding:0 .25rem;border-radius:.2rem}pre{background:#f7f7f7;padding:.6rem;overflow-x:auto;white-space:pre-wrap;overflow-wrap:anywhere}\
figure{margin:1rem 0}figcaption{color:#555;font-size:.9rem}figure svg{max-width:100%;height:auto}\
.caution{background:#fff6e0;border-left:4px solid #d90;padding:.5rem .8rem}\
@media print{body{margin:0;max-width:none}h2{break-after:avoid}figure,table{break-inside:avoid}}";

/// The closing caution of a page whose command gave none of its own.
const GENERAL_CAUTION: &str = "This report says only what plumb checked. A pass is not a safety \
     assessment: a model that decides about machinery, vehicles, medicine or people needs the \
     validation, standards and qualified review that apply there.";

/// Writes a document as one self-contained HTML page.
pub fn render_html(doc: &Document, out: &mut impl Write) -> io::Result<()> {
    writeln!(
        out,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">"
    )?;
    writeln!(
        out,
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
    )?;
    writeln!(
        out,
        "<title>{}</title>\n<style>{STYLE}</style>\n</head>\n<body>",
        esc(&doc.title)
    )?;
    writeln!(out, "<h1>{}</h1>", esc(&doc.title))?;
    // The verdict first, whatever order the document has it in.
    let verdict = doc.blocks.iter().rev().find_map(|b| match b {
        Block::Verdict(v, s) => Some((*v, s.clone())),
        _ => None,
    });
    if let Some((v, s)) = &verdict {
        writeln!(
            out,
            "<div class=\"verdict {}\" id=\"verdict\">verdict: {} — {}</div>",
            v.name(),
            v.name().to_uppercase(),
            esc(s)
        )?;
    }
    for b in &doc.blocks {
        match b {
            Block::Heading(h) => writeln!(out, "<h2>{}</h2>", esc(h))?,
            Block::Text(t) => writeln!(out, "<p>{}</p>", esc(t))?,
            Block::Code(t) => writeln!(out, "<pre>{}</pre>", esc(t))?,
            Block::Facts(f) => {
                writeln!(out, "<dl>")?;
                for (k, v) in f {
                    writeln!(out, "<dt>{}</dt><dd>{}</dd>", esc(k.trim()), esc(v))?;
                }
                writeln!(out, "</dl>")?;
            }
            Block::Table(t) => table(t, out)?,
            Block::Findings(fs) => findings(fs, out)?,
            Block::Verdict(..) => {}
            Block::Caution(c) => writeln!(
                out,
                "<p class=\"caution\"><strong>Caution.</strong> {}</p>",
                esc(c)
            )?,
            Block::Plot { title, svg } => writeln!(
                out,
                "<figure>{}<figcaption>{}</figcaption></figure>",
                strip_prolog(svg),
                esc(title)
            )?,
        }
    }
    match verdict {
        Some((Verdict::Fail, _)) => writeln!(
            out,
            "<p class=\"dim\">Exit code 1: a finding of severity error.</p>"
        )?,
        Some((Verdict::Inconclusive, _)) => writeln!(
            out,
            "<p class=\"dim\">Exit code 1: too little was settled to pass (inconclusive).</p>"
        )?,
        _ => {}
    }
    // A page may be attached to a release and read without the command that made it: it always
    // says what a pass does not mean.
    if !doc.blocks.iter().any(|b| matches!(b, Block::Caution(_))) {
        writeln!(
            out,
            "<p class=\"caution\"><strong>Caution.</strong> {}</p>",
            esc(GENERAL_CAUTION)
        )?;
    }
    writeln!(out, "</body>\n</html>")
}

fn table(t: &Table, out: &mut impl Write) -> io::Result<()> {
    writeln!(out, "<table>\n<thead><tr>")?;
    for h in &t.header {
        write!(out, "<th>{}</th>", esc(h))?;
    }
    writeln!(out, "</tr></thead>\n<tbody>")?;
    for row in t.rows.iter().chain(t.footer.iter()) {
        write!(out, "<tr>")?;
        for c in row {
            cell(c, out)?;
        }
        writeln!(out, "</tr>")?;
    }
    writeln!(out, "</tbody>\n</table>")
}

fn cell(c: &Cell, out: &mut impl Write) -> io::Result<()> {
    let numeric = c
        .text
        .trim()
        .chars()
        .next()
        .is_some_and(|ch| ch.is_ascii_digit() || ch == '-')
        && c.text
            .trim()
            .chars()
            .all(|ch| ch.is_ascii_digit() || ".eE-+%".contains(ch));
    let mut class = String::new();
    if numeric {
        class.push_str("num ");
    }
    class.push_str(match c.tone {
        Tone::Good => "good",
        Tone::Bad => "bad",
        Tone::Warn => "warn",
        Tone::Dim => "dim",
        Tone::Plain => "",
    });
    let class = class.trim();
    if class.is_empty() {
        write!(out, "<td>{}</td>", esc(&c.text))
    } else {
        write!(out, "<td class=\"{class}\">{}</td>", esc(&c.text))
    }
}

fn findings(fs: &[Finding], out: &mut impl Write) -> io::Result<()> {
    if fs.is_empty() {
        return writeln!(out, "<p class=\"good\">No findings.</p>");
    }
    let mut sorted: Vec<&Finding> = fs.iter().collect();
    sorted.sort_by_key(|f| std::cmp::Reverse(f.severity));
    for f in sorted {
        let place = match (&f.tensor, f.layer) {
            (Some(t), _) => format!(" <code>{}</code>", esc(t)),
            (None, Some(l)) => format!(" layer {l}"),
            _ => String::new(),
        };
        let class = match f.severity {
            Severity::Error => "error",
            Severity::Warning => "warning",
            Severity::Note => "note",
        };
        writeln!(
            out,
            "<div class=\"finding {class}\"><strong>{}</strong> <code>{}</code>{place}: {}</div>",
            f.severity.name(),
            esc(&f.code),
            esc(&f.message)
        )?;
    }
    Ok(())
}

/// An SVG document without its XML prolog, to sit inside HTML.
fn strip_prolog(svg: &str) -> &str {
    match svg.find("<svg") {
        Some(i) => &svg[i..],
        None => svg,
    }
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}
