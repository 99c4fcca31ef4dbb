//! JUnit XML, for CI systems that show test results: one test suite per run, one test case per
//! checked tensor or check, a failure element where it failed. Valid against the JUnit schema CI
//! systems use (fixtures/junit/junit-10.xsd; tests/it/report.rs validates it).

use std::io::{self, Write};

use crate::document::figure;
use crate::{Block, Document};

/// Writes a document's cases as a JUnit XML report.
pub fn render_junit(doc: &Document, out: &mut impl Write) -> io::Result<()> {
    let failures = doc.cases.iter().filter(|c| !c.passed).count();
    let suite = if doc.command.is_empty() {
        "plumb".to_string()
    } else {
        format!("plumb {}", doc.command)
    };
    writeln!(out, r#"<?xml version="1.0" encoding="UTF-8"?>"#)?;
    writeln!(
        out,
        r#"<testsuites name="plumb" tests="{}" failures="{failures}" errors="0">"#,
        doc.cases.len()
    )?;
    writeln!(
        out,
        r#"  <testsuite name="{}" tests="{}" failures="{failures}" errors="0" skipped="0" time="0">"#,
        xml(&suite),
        doc.cases.len()
    )?;
    let facts: Vec<(String, String)> = doc
        .blocks
        .iter()
        .filter_map(|b| match b {
            Block::Facts(f) => Some(f.clone()),
            _ => None,
        })
        .next()
        .unwrap_or_default();
    if !facts.is_empty() {
        writeln!(out, "    <properties>")?;
        for (k, v) in facts {
            writeln!(
                out,
                r#"      <property name="{}" value="{}"/>"#,
                xml(k.trim()),
                xml(&v)
            )?;
        }
        writeln!(out, "    </properties>")?;
    }
    for c in &doc.cases {
        let classname = format!(
            "plumb.{}",
            if doc.command.is_empty() {
                "run"
            } else {
                &doc.command
            }
        );
        let figures: Vec<String> = c
            .figures
            .iter()
            .map(|(k, v)| format!("{k} = {}", figure(*v)))
            .collect();
        if c.passed && figures.is_empty() {
            writeln!(
                out,
                r#"    <testcase classname="{}" name="{}" time="0"/>"#,
                xml(&classname),
                xml(&c.name)
            )?;
            continue;
        }
        writeln!(
            out,
            r#"    <testcase classname="{}" name="{}" time="0">"#,
            xml(&classname),
            xml(&c.name)
        )?;
        if !c.passed {
            writeln!(
                out,
                r#"      <failure type="{}" message="{}">{}</failure>"#,
                xml(c.code.as_deref().unwrap_or("failed")),
                xml(&c.message),
                xml(&c.message)
            )?;
        }
        if !figures.is_empty() {
            // The figures behind the case, for whoever opens it in the CI's test view.
            writeln!(
                out,
                "      <system-out>{}</system-out>",
                xml(&figures.join("\n"))
            )?;
        }
        writeln!(out, "    </testcase>")?;
    }
    if let Some(v) = doc.verdict() {
        writeln!(out, "    <system-out>verdict: {}</system-out>", v.name())?;
    }
    writeln!(out, "  </testsuite>")?;
    writeln!(out, "</testsuites>")
}

/// Escapes text for an XML attribute or element, dropping the characters XML 1.0 cannot hold.
fn xml(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for ch in s.chars() {
        match ch {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&apos;"),
            '\n' => out.push_str("&#10;"),
            '\t' | '\r' => out.push(' '),
            // What XML 1.0 cannot hold at all: other control characters, U+FFFE and U+FFFF.
            c if (c as u32) < 0x20 || c == '\u{fffe}' || c == '\u{ffff}' => {}
            c => out.push(c),
        }
    }
    out
}
