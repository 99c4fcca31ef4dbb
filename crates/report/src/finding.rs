//! Findings: one thing a command reports, with a code, a severity, where, and the numbers.

use std::collections::BTreeMap;
use std::fmt;

use serde::{Deserialize, Serialize};

/// How serious a finding is. An `error` fails the run (exit 1).
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Severity {
    Note,
    Warning,
    Error,
}

impl Severity {
    pub fn name(&self) -> &'static str {
        match self {
            Severity::Note => "note",
            Severity::Warning => "warning",
            Severity::Error => "error",
        }
    }
}

impl fmt::Display for Severity {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// Findings counted by severity, as a verdict line says them: "2 errors, 1 warning, 0 notes".
pub fn tally(findings: &[Finding]) -> String {
    [Severity::Error, Severity::Warning, Severity::Note]
        .iter()
        .map(|&s| {
            let n = findings.iter().filter(|f| f.severity == s).count();
            format!("{n} {}{}", s.name(), if n == 1 { "" } else { "s" })
        })
        .collect::<Vec<_>>()
        .join(", ")
}

/// The outcome of a whole run (or of one tensor of it).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Verdict {
    Pass,
    Fail,
    /// Nothing was found wrong, but too little was settled to say `pass` (exit 1, as a failure:
    /// a check that cannot vouch for a gradient must not let it through).
    Inconclusive,
}

impl Verdict {
    /// `fail` when any finding is an error.
    pub fn of(findings: &[Finding]) -> Verdict {
        Verdict::of_check(findings, true)
    }

    /// `fail` when any finding is an error, else `inconclusive` unless the check was conclusive
    /// (the rule of what is conclusive belongs to the check: `plumb_fd::Settlement`).
    pub fn of_check(findings: &[Finding], conclusive: bool) -> Verdict {
        if findings.iter().any(|f| f.severity == Severity::Error) {
            Verdict::Fail
        } else if conclusive {
            Verdict::Pass
        } else {
            Verdict::Inconclusive
        }
    }

    pub fn name(&self) -> &'static str {
        match self {
            Verdict::Pass => "pass",
            Verdict::Fail => "fail",
            Verdict::Inconclusive => "inconclusive",
        }
    }
}

/// One finding. `figures` holds the numbers behind it, by name, so that JSON consumers need not
/// parse the message.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Finding {
    pub code: String,
    pub severity: Severity,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub tensor: Option<String>,
    /// 1-based layer number, as in the docs.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub layer: Option<usize>,
    pub message: String,
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub figures: BTreeMap<String, serde_json::Value>,
}

impl Finding {
    pub fn new(code: impl Into<String>, severity: Severity, message: impl Into<String>) -> Self {
        Finding {
            code: code.into(),
            severity,
            tensor: None,
            layer: None,
            message: message.into(),
            figures: BTreeMap::new(),
        }
    }

    pub fn tensor(mut self, name: impl Into<String>) -> Self {
        self.tensor = Some(name.into());
        self
    }

    /// The 1-based layer the finding is about.
    pub fn layer(mut self, layer: usize) -> Self {
        self.layer = Some(layer);
        self
    }

    pub fn figure(mut self, name: &str, value: impl Serialize) -> Self {
        let v = serde_json::to_value(value).unwrap_or(serde_json::Value::Null);
        self.figures.insert(name.to_string(), v);
        self
    }
}
