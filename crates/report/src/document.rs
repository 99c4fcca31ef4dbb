//! A report as the human formats see it: a title and a list of blocks.

use crate::{Finding, Verdict};

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
}

impl Case {
    pub fn new(name: impl Into<String>, passed: bool) -> Case {
        Case {
            name: name.into(),
            passed,
            message: String::new(),
            code: None,
            figures: Default::default(),
        }
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
}

impl Document {
    pub fn new(title: impl Into<String>) -> Document {
        Document {
            title: title.into(),
            blocks: Vec::new(),
            command: String::new(),
            cases: Vec::new(),
            network: None,
        }
    }

    /// The verdict block's verdict, if the document has one.
    pub fn verdict(&self) -> Option<crate::Verdict> {
        self.blocks.iter().rev().find_map(|b| match b {
            Block::Verdict(v, _) => Some(*v),
            _ => None,
        })
    }

    pub fn push(&mut self, block: Block) {
        self.blocks.push(block);
    }
}
