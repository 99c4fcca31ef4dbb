//! A report as the human formats see it: a title and a list of blocks.

use std::collections::HashMap;

use crate::{Finding, Severity, Verdict};

/// The mood of a table cell or line, which the terminal renderer may colour.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Tone {
    Plain,
    Good,
    Warn,
    Bad,
    Dim,
}

/// One table cell: text and its tone.
#[derive(Clone, Debug, PartialEq)]
pub struct Cell {
    pub text: String,
    pub tone: Tone,
}

impl Cell {
    pub fn new(text: impl Into<String>, tone: Tone) -> Cell {
        Cell {
            text: text.into(),
            tone,
        }
    }
}

impl<T: Into<String>> From<T> for Cell {
    fn from(text: T) -> Cell {
        Cell::new(text, Tone::Plain)
    }
}

/// A table with a header row; numeric-looking columns are right-aligned by the renderers.
#[derive(Clone, Debug, PartialEq, Default)]
pub struct Table {
    pub header: Vec<String>,
    pub rows: Vec<Vec<Cell>>,
    /// A closing row set off from the body (totals).
    pub footer: Option<Vec<Cell>>,
}

impl Table {
    pub fn new<H: Into<String>>(header: impl IntoIterator<Item = H>) -> Table {
        Table {
            header: header.into_iter().map(Into::into).collect(),
            rows: Vec::new(),
            footer: None,
        }
    }

    pub fn row<C: Into<Cell>>(mut self, cells: impl IntoIterator<Item = C>) -> Table {
        self.push(cells);
        self
    }

    pub fn push<C: Into<Cell>>(&mut self, cells: impl IntoIterator<Item = C>) {
        self.rows.push(cells.into_iter().map(Into::into).collect());
    }

    pub fn footer<C: Into<Cell>>(&mut self, cells: impl IntoIterator<Item = C>) {
        self.footer = Some(cells.into_iter().map(Into::into).collect());
    }
}

/// A piece of a document.
#[derive(Clone, Debug, PartialEq)]
pub enum Block {
    Heading(String),
    /// A paragraph of prose.
    Text(String),
    /// Lines shown exactly as they are, in a fixed-width font: a file's text, commands to run.
    Code(String),
    /// "name: value" lines.
    Facts(Vec<(String, String)>),
    Table(Table),
    /// Findings, worst first; an empty list renders as "no findings".
    Findings(Vec<Finding>),
    /// The closing verdict with a one-line summary.
    Verdict(Verdict, String),
    /// A caution the reader must not miss (e.g. that a passing check is not a safety assessment).
    Caution(String),
    /// A picture, as a standalone SVG document (shown by the HTML renderer; the text renderers
    /// name it only).
    Plot {
        title: String,
        svg: String,
    },
}

/// One check of a run as a test case (JUnit XML, baselines): a tensor, a coordinate, a check.
#[derive(Clone, Debug, PartialEq)]
pub struct Case {
    /// Unique within the run: e.g. `layer1` or `self-check layer2`.
    pub name: String,
    pub passed: bool,
    /// Why it failed (the finding's code and message); empty when it passed.
    pub message: String,
    /// The code of the finding that failed it, if one did.
    pub code: Option<String>,
    /// The figures a baseline records and compares, by name.
    pub figures: std::collections::BTreeMap<String, f64>,
    /// The tensor the case is about, if it is about one.
    pub tensor: Option<String>,
}

impl Case {
    pub fn new(name: impl Into<String>, passed: bool) -> Case {
        Case {
            name: name.into(),
            passed,
            message: String::new(),
            code: None,
            figures: Default::default(),
            tensor: None,
        }
    }

    /// The case is about this tensor (a baseline's findings then name it).
    pub fn about(mut self, tensor: &str) -> Case {
        self.tensor = Some(tensor.to_string());
        self
    }

    pub fn failing(mut self, code: &str, message: impl Into<String>) -> Case {
        self.passed = false;
        self.code = Some(code.to_string());
        self.message = message.into();
        self
    }

    pub fn figure(mut self, name: &str, value: f64) -> Case {
        self.figures.insert(name.to_string(), value);
        self
    }
}

/// A titled list of blocks, and the run's checks as test cases.
#[derive(Clone, Debug, PartialEq)]
pub struct Document {
    pub title: String,
    pub blocks: Vec<Block>,
    /// The command (`check`, `audit`, …): the JUnit suite and the baseline's key.
    pub command: String,
    pub cases: Vec<Case>,
    /// The network the run was made on, for baselines.
    pub network: Option<crate::NetworkId>,
    /// The lowest severity that fails the run: `error`, or `warning` under `audit --fail-on
    /// warning`. Findings added after the command built the document (a baseline's) are judged
    /// by it too.
    pub fail_on: Severity,
}

impl Document {
    pub fn new(title: impl Into<String>) -> Document {
        Document {
            title: title.into(),
            blocks: Vec::new(),
            command: String::new(),
            cases: Vec::new(),
            network: None,
            fail_on: Severity::Error,
        }
    }

    /// The verdict block's verdict, if the document has one.
    pub fn verdict(&self) -> Option<crate::Verdict> {
        self.blocks.iter().rev().find_map(|b| match b {
            Block::Verdict(v, _) => Some(*v),
            _ => None,
        })
    }

    /// Makes the test cases tell what the findings tell, so a CI system never shows a failing
    /// run as all green: a finding at `fail_on` or worse fails the case it names (`figures.case`,
    /// as baseline findings carry), else a case about its tensor; such findings with no case of
    /// their own (a global direction, a whole-run problem) fail one case named `findings`.
    pub fn fail_cases_for(&mut self, findings: &[Finding]) {
        let mut loose: Vec<&Finding> = Vec::new();
        // Cases by name (the first of a name) and by tensor, found once: a scan of every case per
        // finding is quadratic for a file of 100,000 stray tensors.
        let mut by_case: HashMap<String, usize> = HashMap::new();
        let mut by_tensor: HashMap<String, Vec<usize>> = HashMap::new();
        for (i, c) in self.cases.iter().enumerate() {
            by_case.entry(c.name.clone()).or_insert(i);
            if let Some(t) = &c.tensor {
                by_tensor.entry(t.clone()).or_default().push(i);
            }
        }
        for f in findings.iter().filter(|f| f.severity >= self.fail_on) {
            let named = f.figures.get("case").and_then(|v| v.as_str());
            let by_name = named.and_then(|n| by_case.get(n).copied());
            let none = Vec::new();
            let about = f
                .tensor
                .as_ref()
                .and_then(|t| by_tensor.get(t))
                .unwrap_or(&none);
            let target = match by_name {
                Some(i) => Some(i),
                None if about.iter().any(|&i| !self.cases[i].passed) => continue,
                None => about.first().copied(),
            };
            match target {
                Some(i) if self.cases[i].passed => {
                    let c = self.cases[i].clone().failing(&f.code, f.message.clone());
                    self.cases[i] = c;
                }
                Some(_) => {}
                None => loose.push(f),
            }
        }
        if let Some(first) = loose.first() {
            let message = loose
                .iter()
                .map(|f| format!("{}: {}", f.code, f.message))
                .collect::<Vec<_>>()
                .join("\n");
            self.cases
                .push(Case::new("findings", false).failing(&first.code, message));
        }
    }

    /// Every finding the document lists, in order.
    pub fn findings(&self) -> Vec<Finding> {
        self.blocks
            .iter()
            .filter_map(|b| match b {
                Block::Findings(f) => Some(f.clone()),
                _ => None,
            })
            .flatten()
            .collect()
    }

    /// The verdict block's summary line, if the document has one.
    pub fn verdict_summary(&self) -> Option<String> {
        self.blocks.iter().rev().find_map(|b| match b {
            Block::Verdict(_, s) => Some(s.clone()),
            _ => None,
        })
    }

    /// Replaces the verdict block's verdict and summary (a document without one is left as is).
    pub fn set_verdict(&mut self, v: crate::Verdict, summary: &str) {
        if let Some(b) = self
            .blocks
            .iter_mut()
            .rev()
            .find(|b| matches!(b, Block::Verdict(..)))
        {
            *b = Block::Verdict(v, summary.to_string());
        }
    }

    /// Inserts blocks just before the verdict block (at the end when there is none).
    pub fn insert_before_verdict(&mut self, blocks: Vec<Block>) {
        let at = self
            .blocks
            .iter()
            .rposition(|b| matches!(b, Block::Verdict(..)))
            .unwrap_or(self.blocks.len());
        for (i, b) in blocks.into_iter().enumerate() {
            self.blocks.insert(at + i, b);
        }
    }

    /// Appends blocks, e.g. an optional plot.
    pub fn extend(&mut self, blocks: impl IntoIterator<Item = Block>) {
        self.blocks.extend(blocks);
    }

    pub fn push(&mut self, block: Block) {
        self.blocks.push(block);
    }
}

/// A number for a table cell: 4 significant digits, in exponent form when far from 1.
pub fn number(v: f64) -> String {
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

/// A figure in a message: integers as they are, otherwise four significant digits, in exponent
/// form when very large or small.
pub(crate) fn figure(v: f64) -> String {
    if v.is_finite() && v.fract() == 0.0 && v.abs() < 1e9 {
        format!("{}", v as i64)
    } else if v.is_finite() && v != 0.0 && !(1e-3..1e6).contains(&v.abs()) {
        format!("{v:.3e}")
    } else if v.is_finite() {
        let decimals = (3 - v.abs().log10().floor() as i32).max(0) as usize;
        let text = format!("{v:.decimals$}");
        if text.contains('.') {
            text.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            text
        }
    } else {
        format!("{v}")
    }
}

#[cfg(test)]
mod tests {
    use super::figure;

    #[test]
    fn figures_keep_four_significant_digits() {
        assert_eq!(figure(3.0), "3");
        assert_eq!(figure(0.0099), "0.0099");
        assert_eq!(figure(0.123456), "0.1235");
        assert_eq!(figure(12.5), "12.5");
        assert_eq!(figure(1.605e-15), "1.605e-15");
        assert_eq!(figure(6.169e12), "6.169e12");
        assert_eq!(figure(f64::NAN), "NaN");
    }
}
