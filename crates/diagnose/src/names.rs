//! Which tensor of a gradient file is the gradient of which parameter (DESIGN §5).
//!
//! In order: the user's `--map FILE=PARAM` pairs; then exact names; then the common habits of
//! naming a gradient after its parameter — a `d`, `grad_` or `grad.` prefix, a `.grad` or `_grad`
//! suffix (`dW1` for `W1`, `grad_layer1.weight`, `W1.grad`). A parameter with two candidates, or a
//! file tensor that would serve two parameters, is an input error naming both: guessing could
//! compare the wrong tensors and report a mistake the user never made. A bias gradient stored as a
//! 1 × n or n × 1 matrix is read as the vector it is, as weight files are.

use std::collections::HashSet;
use std::fmt;

use thiserror::Error;

use crate::Expected;
use plumb_formats::Tensor;

/// The habits, as (prefix, suffix) around the parameter's name.
pub const HABITS: [(&str, &str); 5] = [
    ("d", ""),
    ("grad_", ""),
    ("grad.", ""),
    ("", ".grad"),
    ("", "_grad"),
];

/// Appended to the name of a file tensor left unbound whose name is a parameter's that another
/// tensor was mapped to.
pub const UNBOUND: &str = " (not matched)";

/// How a file tensor was matched to its parameter.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Matched {
    /// Under the parameter's own name.
    Exact,
    /// Under a habit (prefix, suffix).
    Habit(&'static str, &'static str),
    /// By a `--map` pair.
    Map,
}

impl Matched {
    /// Short text for reports: "exact", "habit `d…`", "--map".
    pub fn describe(&self) -> String {
        match self {
            Matched::Exact => "exact".into(),
            Matched::Habit(p, s) => format!("habit `{p}…{s}`"),
            Matched::Map => "--map".into(),
        }
    }
}

/// One file tensor bound to a parameter.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Binding {
    pub file: String,
    pub parameter: String,
    pub matched: Matched,
}

/// Why the names cannot be settled. Every message says how to settle them.
#[derive(Clone, Debug, Error, PartialEq, Eq)]
pub enum NameError {
    #[error(
        "the gradient's tensors `{first}` and `{second}` both look like the gradient of `{parameter}`; say which with --map {first}={parameter}"
    )]
    TwoCandidates {
        parameter: String,
        first: String,
        second: String,
    },
    #[error(
        "the gradient's tensor `{file}` looks like the gradient of both `{first}` and `{second}`; say which with --map {file}={first} (or ={second})"
    )]
    TwoParameters {
        file: String,
        first: String,
        second: String,
    },
    #[error("--map {file}={parameter}: the gradient file has no tensor `{file}`; it holds {held}")]
    MapNoTensor {
        file: String,
        parameter: String,
        held: NameList,
    },
    #[error(
        "--map {file}={parameter}: the description has no parameter `{parameter}`; its parameters are {held}"
    )]
    MapNoParameter {
        file: String,
        parameter: String,
        held: NameList,
    },
    #[error("--map names `{name}` twice; give each file tensor and each parameter once")]
    MapTwice { name: String },
    #[error("--map: `{0}` is not FILE=PARAM; write pairs like --map dW1=W1,db1=b1")]
    MapSyntax(String),
}

/// Names for a message, quoted, the first few only.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct NameList(pub Vec<String>);

impl fmt::Display for NameList {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if self.0.is_empty() {
            return f.write_str("none");
        }
        let shown: Vec<String> = self.0.iter().take(8).map(|n| format!("`{n}`")).collect();
        write!(f, "{}", shown.join(", "))?;
        if self.0.len() > 8 {
            write!(f, ", … ({} in all)", self.0.len())?;
        }
        Ok(())
    }
}

/// Parses `--map` text: comma-separated FILE=PARAM pairs (several flags may be joined first).
pub fn parse_map(text: &str) -> Result<Vec<(String, String)>, NameError> {
    text.split(',')
        .map(str::trim)
        .filter(|p| !p.is_empty())
        .map(|pair| match pair.split_once('=') {
            Some((f, p)) if !f.trim().is_empty() && !p.trim().is_empty() => {
                Ok((f.trim().to_string(), p.trim().to_string()))
            }
            _ => Err(NameError::MapSyntax(pair.to_string())),
        })
        .collect()
}

/// The habit under which `file` names the gradient of `parameter`, if any.
fn habit(file: &str, parameter: &str) -> Option<(&'static str, &'static str)> {
    HABITS.into_iter().find(|(p, s)| {
        file.len() == p.len() + parameter.len() + s.len()
            && file.starts_with(p)
            && file.ends_with(s)
            && &file[p.len()..file.len() - s.len()] == parameter
    })
}

/// Whether a gradient file's tensor named `file` could be bound to one of `parameters` — by
/// `map`, its exact name or a habit — and so must be read; any other is only listed, its values
/// unread (an archive member may inflate to gigabytes that no comparison uses).
pub fn may_bind(parameters: &HashSet<&str>, map: &[(String, String)], file: &str) -> bool {
    map.iter().any(|(f, _)| f == file)
        || parameters.contains(file)
        || HABITS.iter().any(|(p, s)| {
            file.len() >= p.len() + s.len()
                && file.starts_with(p)
                && file.ends_with(s)
                && parameters.contains(&file[p.len()..file.len() - s.len()])
        })
}

/// Binds file tensors to parameters: `map` first, then exact names, then the habits. Returns one
/// binding per parameter found; parameters with no tensor are left out (the judge reports them
/// absent) and file tensors bound to nothing keep their names (reported as unexpected).
pub fn match_names(
    parameters: &[&str],
    file: &[&str],
    map: &[(String, String)],
) -> Result<Vec<Binding>, NameError> {
    let mut out: Vec<Binding> = Vec::new();
    let taken_file = |out: &[Binding], f: &str| out.iter().any(|b| b.file == f);
    let taken_param = |out: &[Binding], p: &str| out.iter().any(|b| b.parameter == p);
    for (f, p) in map {
        if !file.contains(&f.as_str()) {
            return Err(NameError::MapNoTensor {
                file: f.clone(),
                parameter: p.clone(),
                held: NameList(file.iter().map(|s| s.to_string()).collect()),
            });
        }
        if !parameters.contains(&p.as_str()) {
            return Err(NameError::MapNoParameter {
                file: f.clone(),
                parameter: p.clone(),
                held: NameList(parameters.iter().map(|s| s.to_string()).collect()),
            });
        }
        if taken_file(&out, f) {
            return Err(NameError::MapTwice { name: f.clone() });
        }
        if taken_param(&out, p) {
            return Err(NameError::MapTwice { name: p.clone() });
        }
        out.push(Binding {
            file: f.clone(),
            parameter: p.clone(),
            matched: Matched::Map,
        });
    }
    for &p in parameters {
        if !taken_param(&out, p) && file.contains(&p) && !taken_file(&out, p) {
            out.push(Binding {
                file: p.to_string(),
                parameter: p.to_string(),
                matched: Matched::Exact,
            });
        }
    }
    // A parameter found under its own name whose habit name is in the file too (weights and
    // gradients saved together): which one is the gradient is the user's to say.
    for b in out.iter().filter(|b| b.matched == Matched::Exact) {
        if let Some(&f) = file
            .iter()
            .find(|f| !taken_file(&out, f) && habit(f, &b.parameter).is_some())
        {
            return Err(NameError::TwoCandidates {
                parameter: b.parameter.clone(),
                first: f.to_string(),
                second: b.file.clone(),
            });
        }
    }
    let mut by_habit: Vec<Binding> = Vec::new();
    for &p in parameters {
        if taken_param(&out, p) {
            continue;
        }
        let candidates: Vec<(&str, (&'static str, &'static str))> = file
            .iter()
            .filter(|f| !taken_file(&out, f))
            .filter_map(|&f| habit(f, p).map(|h| (f, h)))
            .collect();
        match candidates.as_slice() {
            [] => {}
            [(f, (pre, suf))] => {
                if let Some(other) = by_habit.iter().find(|b| b.file == *f) {
                    return Err(NameError::TwoParameters {
                        file: f.to_string(),
                        first: other.parameter.clone(),
                        second: p.to_string(),
                    });
                }
                by_habit.push(Binding {
                    file: f.to_string(),
                    parameter: p.to_string(),
                    matched: Matched::Habit(pre, suf),
                });
            }
            [(a, _), (b, _), ..] => {
                return Err(NameError::TwoCandidates {
                    parameter: p.to_string(),
                    first: a.to_string(),
                    second: b.to_string(),
                });
            }
        }
    }
    out.extend(by_habit);
    // In the parameters' order, for the report.
    out.sort_by_key(|b| parameters.iter().position(|p| *p == b.parameter));
    Ok(out)
}

/// The outside gradient under the parameters' names: each bound tensor renamed to its parameter,
/// a bias stored as 1 × n or n × 1 read as its n entries; unbound tensors unchanged, except that one
/// named like a parameter another tensor was mapped to gets [`UNBOUND`] appended, so that it cannot
/// be judged in the mapped tensor's place.
pub fn bind_gradient(
    expected: &[Expected],
    outside: Vec<Tensor>,
    map: &[(String, String)],
) -> Result<(Vec<Tensor>, Vec<Binding>), NameError> {
    let parameters: Vec<&str> = expected.iter().map(|e| e.name.as_str()).collect();
    let file: Vec<&str> = outside.iter().map(|t| t.name.as_str()).collect();
    let bindings = match_names(&parameters, &file, map)?;
    let renamed = outside
        .into_iter()
        .map(|mut t| {
            if !bindings.iter().any(|b| b.file == t.name)
                && bindings.iter().any(|b| b.parameter == t.name)
            {
                t.name.push_str(UNBOUND);
            } else if let Some(b) = bindings.iter().find(|b| b.file == t.name) {
                t.name = b.parameter.clone();
                let e = expected
                    .iter()
                    .find(|e| e.name == t.name)
                    .expect("bound to a parameter");
                let vector = e.bias
                    && e.shape.len() == 1
                    && t.shape.len() == 2
                    && t.shape.contains(&1)
                    && t.data.len() == e.shape[0];
                if vector {
                    t.shape = e.shape.clone();
                }
            }
            t
        })
        .collect();
    Ok((renamed, bindings))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn names(bs: &[Binding]) -> Vec<(&str, &str)> {
        bs.iter()
            .map(|b| (b.file.as_str(), b.parameter.as_str()))
            .collect()
    }

    /// Every name `match_names` binds is one `may_bind` reads, and names it cannot bind are not:
    /// the habits of the module doc, `--map`, and near misses (`ddW1`, `dW10`, `W1_grad2`).
    #[test]
    fn what_may_bind_is_what_binds() {
        let params: HashSet<&str> = ["W1", "layer3.weight", "input"].into();
        let map = parse_map("g=W1").unwrap();
        for name in [
            "W1",
            "dW1",
            "grad_W1",
            "grad.W1",
            "W1.grad",
            "W1_grad",
            "dlayer3.weight",
            "layer3.weight.grad",
            "input",
            "dinput",
            "g",
        ] {
            assert!(may_bind(&params, &map, name), "{name}");
        }
        for name in ["ddW1", "dW10", "W1_grad2", "gradW1", "h", "", "d", "notes"] {
            assert!(!may_bind(&params, &map, name), "{name}");
        }
        // What match_names binds (the one candidate of each parameter) is read.
        let file = ["dW1", "grad_layer3.weight", "ddW1"];
        let p: Vec<&str> = params.iter().copied().collect();
        for b in match_names(&p, &file, &[]).unwrap() {
            assert!(may_bind(&params, &[], &b.file), "{}", b.file);
        }
    }

    #[test]
    fn exact_then_habits() {
        let params = ["W1", "b1", "W2", "b2", "layer3.weight"];
        for file in [
            ["dW1", "db1", "dW2", "db2", "dlayer3.weight"],
            [
                "grad_W1",
                "grad_b1",
                "grad_W2",
                "grad_b2",
                "grad_layer3.weight",
            ],
            [
                "grad.W1",
                "grad.b1",
                "grad.W2",
                "grad.b2",
                "grad.layer3.weight",
            ],
            [
                "W1.grad",
                "b1.grad",
                "W2.grad",
                "b2.grad",
                "layer3.weight.grad",
            ],
            [
                "W1_grad",
                "b1_grad",
                "W2_grad",
                "b2_grad",
                "layer3.weight_grad",
            ],
        ] {
            let b = match_names(&params, &file, &[]).unwrap();
            let want: Vec<(&str, &str)> = file.iter().copied().zip(params).collect();
            assert_eq!(names(&b), want);
            assert!(b.iter().all(|b| matches!(b.matched, Matched::Habit(..))));
        }
        // Exact names win, and a name that is both exact and a habit stays exact.
        let b = match_names(&["W", "dW"], &["W", "dW"], &[]).unwrap();
        assert!(
            b.iter()
                .all(|b| b.matched == Matched::Exact && b.file == b.parameter)
        );
        // No habit strips more than one affix, or matches a different name.
        assert!(
            match_names(&["W1"], &["ddW1", "gradW1", "dW10"], &[])
                .unwrap()
                .is_empty()
        );
    }

    #[test]
    fn ambiguity_names_both_and_suggests_map() {
        let e = match_names(&["W1"], &["dW1", "grad_W1"], &[]).unwrap_err();
        let text = e.to_string();
        assert!(
            text.contains("`dW1`") && text.contains("`grad_W1`"),
            "{text}"
        );
        assert!(text.contains("--map dW1=W1"), "{text}");
        // The map settles it; the other tensor is left unbound.
        let map = parse_map("grad_W1=W1").unwrap();
        let b = match_names(&["W1"], &["dW1", "grad_W1"], &map).unwrap();
        assert_eq!(names(&b), [("grad_W1", "W1")]);
        assert_eq!(b[0].matched, Matched::Map);
        // One file tensor for two parameters: `dW_grad` is `d` + `W_grad` and `dW` + `_grad`.
        let e = match_names(&["W_grad", "dW"], &["dW_grad"], &[]).unwrap_err();
        assert!(matches!(e, NameError::TwoParameters { .. }), "{e}");
    }

    #[test]
    fn weights_and_gradients_in_one_file_are_ambiguous() {
        // `W1` is the parameter's own name and `dW1` its habit name: either could be the gradient.
        let e = match_names(&["W1", "b1"], &["W1", "dW1", "db1"], &[]).unwrap_err();
        assert_eq!(
            e,
            NameError::TwoCandidates {
                parameter: "W1".into(),
                first: "dW1".into(),
                second: "W1".into(),
            }
        );
        assert!(e.to_string().contains("--map dW1=W1"), "{e}");
        // A habit name that is another parameter's own name is not ambiguous.
        let b = match_names(&["W", "dW"], &["W", "dW"], &[]).unwrap();
        assert_eq!(names(&b), [("W", "W"), ("dW", "dW")]);
    }

    #[test]
    fn a_mapped_parameter_is_not_shadowed_by_a_tensor_of_its_name() {
        let expected = vec![Expected {
            name: "W1".into(),
            layer: 0,
            shape: vec![1, 2],
            bias: false,
        }];
        // The weights first in the file, the gradient second, mapped.
        let outside = vec![
            Tensor::new("W1", vec![1, 2], vec![5.0, 6.0]),
            Tensor::new("dW1", vec![1, 2], vec![0.1, 0.2]),
        ];
        let map = parse_map("dW1=W1").unwrap();
        let (t, _) = bind_gradient(&expected, outside, &map).unwrap();
        let judged: Vec<&Tensor> = t.iter().filter(|t| t.name == "W1").collect();
        assert_eq!(judged.len(), 1);
        assert_eq!(judged[0].data, [0.1, 0.2]);
        assert_eq!(t[0].name, format!("W1{UNBOUND}"));
    }

    #[test]
    fn map_errors_name_what_is_missing() {
        let e = match_names(&["W1"], &["g"], &parse_map("h=W1").unwrap()).unwrap_err();
        assert!(e.to_string().contains("no tensor `h`") && e.to_string().contains("`g`"));
        let e = match_names(&["W1"], &["g"], &parse_map("g=W2").unwrap()).unwrap_err();
        assert!(e.to_string().contains("no parameter `W2`"), "{e}");
        let e = match_names(&["W1", "W2"], &["g"], &parse_map("g=W1,g=W2").unwrap()).unwrap_err();
        assert_eq!(e, NameError::MapTwice { name: "g".into() });
        assert!(matches!(parse_map("g"), Err(NameError::MapSyntax(_))));
        assert_eq!(parse_map(" a=b , c=d ").unwrap().len(), 2);
    }

    #[test]
    fn bias_rows_and_columns_read_as_vectors() {
        let expected = vec![
            Expected {
                name: "b1".into(),
                layer: 0,
                shape: vec![3],
                bias: true,
            },
            Expected {
                name: "W1".into(),
                layer: 0,
                shape: vec![3, 1],
                bias: false,
            },
        ];
        let outside = vec![
            Tensor::new("db1", vec![1, 3], vec![1.0, 2.0, 3.0]),
            Tensor::new("dW1", vec![1, 3], vec![1.0, 2.0, 3.0]),
        ];
        let (t, b) = bind_gradient(&expected, outside, &[]).unwrap();
        assert_eq!(b.len(), 2);
        assert_eq!(
            (t[0].name.as_str(), t[0].shape.as_slice()),
            ("b1", &[3][..])
        );
        // A weight keeps the shape it came in (its transposition is a finding of its own).
        assert_eq!(
            (t[1].name.as_str(), t[1].shape.as_slice()),
            ("W1", &[1, 3][..])
        );
    }
}
