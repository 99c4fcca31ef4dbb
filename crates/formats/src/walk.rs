//! Walking toml's spanned document by hand, so that every error about a description names the key
//! and its line, and an unknown name is answered with the nearest known one.

use std::ops::Range;
use std::path::Path;

use toml::Spanned;
use toml::de::{DeTable, DeValue};

use crate::{DescriptionError, MAX_PARAMETERS};

/// The text of one description and where its lines end.
pub(crate) struct Walk<'a> {
    pub path: &'a Path,
    pub text: &'a str,
    /// Where each line ends, so a line number costs a search, not a scan of the text before it.
    pub newlines: Vec<usize>,
}

pub(crate) type Entry<'i> = (
    &'i Spanned<std::borrow::Cow<'i, str>>,
    &'i Spanned<DeValue<'i>>,
);

impl<'a> Walk<'a> {
    pub fn new(path: &'a Path, text: &'a str) -> Self {
        Walk {
            path,
            text,
            newlines: text.match_indices('\n').map(|(i, _)| i).collect(),
        }
    }

    pub fn error(
        &self,
        span: Option<Range<usize>>,
        message: impl Into<String>,
    ) -> DescriptionError {
        let (line, column) = match span {
            Some(span) => {
                let (l, c) = line_col(self.text, &self.newlines, span.start);
                (Some(l), Some(c))
            }
            None => (None, None),
        };
        DescriptionError {
            path: self.path.to_path_buf(),
            line,
            column,
            message: message.into(),
        }
    }

    /// The 1-based line of a byte offset.
    pub fn line(&self, offset: usize) -> usize {
        line_col(self.text, &self.newlines, offset).0
    }

    pub fn reject_unknown<'i>(
        &self,
        entries: impl Iterator<Item = Entry<'i>>,
        known: &[&str],
        context: &str,
    ) -> Result<(), DescriptionError> {
        for (key, _) in entries {
            let name = key.get_ref().as_ref();
            if !known.contains(&name) {
                return Err(self.error(
                    Some(key.span()),
                    format!(
                        "unknown key `{name}` {context}{}; the known keys there are {}",
                        suggest(name, known),
                        list(known)
                    ),
                ));
            }
        }
        Ok(())
    }

    pub fn required<'t, 'i>(
        &self,
        table: &'t DeTable<'i>,
        key: &str,
        layer: Option<(usize, Range<usize>)>,
        what: &str,
    ) -> Result<Entry<'t>, DescriptionError>
    where
        'i: 't,
    {
        find(table, key).ok_or_else(|| match layer {
            Some((n, span)) => self.error(
                Some(span),
                format!("layer {n} has no `{key}`: add `{key} = …` with {what}"),
            ),
            None => self.error(
                None,
                format!("the key `{key}` is missing: add `{key} = …` with {what}"),
            ),
        })
    }

    pub fn count(&self, entry: Entry<'_>, key: &str) -> Result<usize, DescriptionError> {
        match entry.1.get_ref() {
            DeValue::Integer(i) => {
                let text = i.as_str();
                match i128::from_str_radix(text, i.radix()) {
                    Ok(v) if v < 0 => Err(self.error(
                        Some(entry.1.span()),
                        format!("`{key}` is {v}; it must be a positive whole number"),
                    )),
                    Ok(v) if v > MAX_PARAMETERS as i128 => Err(self.error(
                        Some(entry.1.span()),
                        format!("`{key}` is {v}, beyond the {MAX_PARAMETERS} plumb accepts"),
                    )),
                    Ok(v) => Ok(v as usize),
                    Err(_) => Err(self.error(
                        Some(entry.1.span()),
                        format!("`{key}` = {text} is not a whole number plumb can hold"),
                    )),
                }
            }
            other => Err(self.error(
                Some(entry.1.span()),
                format!(
                    "`{key}` must be a whole number, but it is {}; write e.g. `{key} = 4`",
                    kind(other)
                ),
            )),
        }
    }

    pub fn number(&self, entry: Entry<'_>, key: &str) -> Result<f64, DescriptionError> {
        let v = match entry.1.get_ref() {
            DeValue::Float(f) => f.as_str().parse::<f64>().ok(),
            DeValue::Integer(i) => i64::from_str_radix(i.as_str(), i.radix())
                .ok()
                .map(|v| v as f64),
            other => {
                return Err(self.error(
                    Some(entry.1.span()),
                    format!("`{key}` must be a number, but it is {}", kind(other)),
                ));
            }
        };
        v.ok_or_else(|| {
            self.error(
                Some(entry.1.span()),
                format!("`{key}` is not a number plumb can read"),
            )
        })
    }

    pub fn string(&self, entry: Entry<'_>, key: &str) -> Result<String, DescriptionError> {
        match entry.1.get_ref() {
            DeValue::String(s) => Ok(s.to_string()),
            other => Err(self.error(
                Some(entry.1.span()),
                format!(
                    "`{key}` must be a string in quotes, but it is {}",
                    kind(other)
                ),
            )),
        }
    }

    pub fn name(&self, entry: Entry<'_>, key: &str) -> Result<String, DescriptionError> {
        let s = self.string(entry, key)?;
        if s.is_empty() {
            return Err(self.error(
                Some(entry.1.span()),
                format!("`{key}` is empty; give the tensor's name in the weight file"),
            ));
        }
        Ok(s)
    }
}

pub(crate) fn find<'t, 'i>(table: &'t DeTable<'i>, key: &str) -> Option<Entry<'t>> {
    table.iter().find(|(k, _)| k.get_ref().as_ref() == key)
}

pub(crate) fn kind(v: &DeValue<'_>) -> &'static str {
    match v {
        DeValue::String(_) => "a string",
        DeValue::Integer(_) => "an integer",
        DeValue::Float(_) => "a float",
        DeValue::Boolean(_) => "a boolean",
        DeValue::Datetime(_) => "a date",
        DeValue::Array(_) => "an array",
        DeValue::Table(_) => "a table",
    }
}

/// 1-based line and column (in characters) of a byte offset.
pub(crate) fn line_col(text: &str, newlines: &[usize], offset: usize) -> (usize, usize) {
    let mut offset = offset.min(text.len());
    while !text.is_char_boundary(offset) {
        offset -= 1;
    }
    let before = newlines.partition_point(|&n| n < offset);
    let start = if before == 0 {
        0
    } else {
        newlines[before - 1] + 1
    };
    (before + 1, text[start..offset].chars().count() + 1)
}

pub(crate) fn list(names: &[&str]) -> String {
    names
        .iter()
        .map(|n| format!("`{n}`"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// ", did you mean `x`?" when a known name is within a small edit distance.
pub(crate) fn suggest(given: &str, known: &[&str]) -> String {
    let best = known
        .iter()
        .map(|k| (edit_distance(given, k), *k))
        .min_by_key(|(d, _)| *d);
    match best {
        Some((d, k)) if d <= 2.max(given.chars().count() / 3) => format!(" (did you mean `{k}`?)"),
        _ => String::new(),
    }
}

/// Levenshtein distance, for suggestions.
pub(crate) fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut cur = vec![i + 1; b.len() + 1];
        for (j, &cb) in b.iter().enumerate() {
            cur[j + 1] = (prev[j] + usize::from(ca != cb))
                .min(prev[j + 1] + 1)
                .min(cur[j] + 1);
        }
        prev = cur;
    }
    prev[b.len()]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn edit_distance_is_levenshtein() {
        // Textbook example [pub: Levenshtein distance]: kitten → sitting takes 3 edits.
        assert_eq!(edit_distance("kitten", "sitting"), 3);
        assert_eq!(edit_distance("", "abc"), 3);
        assert_eq!(edit_distance("layer", "layer"), 0);
    }
}
