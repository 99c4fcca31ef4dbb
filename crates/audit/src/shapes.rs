//! The dimension audit: the tensors a description implies against the tensors a weight file holds.
//!
//! When a tensor does not fit, the audit tests the usual explanations before calling it a plain
//! wrong shape: the file is in another layout, the matrix is transposed, the bias column is missing
//! or extra, the bias has the wrong length, the layers are stored in another order, or the tensors
//! merely have other names (then it says which name to write in the description).

use std::collections::{BTreeSet, HashMap, HashSet};

use plumb_engine::graph::Node;
use plumb_formats::{
    Description, ExpectedTensor, Layout, Role, Tensor, TensorFile, bind, expected_tensors,
    shape_fits, shape_text,
};
use plumb_report::{Finding, Severity, Verdict};
use serde::Serialize;

/// The state of one expected tensor.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Status {
    /// Present, floating point, of the expected shape.
    Ok,
    /// Not in the file under this name.
    Missing,
    /// Present with another shape.
    WrongShape,
    /// Present with the right shape but not floating point.
    NotFloat,
    /// No weight file was given.
    Unchecked,
}

/// One tensor the description expects, and what the file has under its name.
#[derive(Clone, Debug, Serialize)]
pub struct TensorShape {
    pub name: String,
    pub role: &'static str,
    pub expected: Vec<usize>,
    pub found: Option<Vec<usize>>,
    pub dtype: Option<&'static str>,
    pub status: Status,
}

/// One layer of the audit, of a dense description or of any kind.
#[derive(Clone, Debug, Serialize)]
pub struct LayerShapes {
    /// 1-based.
    pub layer: usize,
    #[serde(flatten)]
    pub terms: LayerTerms,
    pub parameters: usize,
    /// The file tensors of the layer (an augmented dense matrix is one).
    pub tensors: Vec<TensorShape>,
    /// `pass`, `fail`, or `unchecked` without a weight file.
    pub verdict: &'static str,
}

/// What a layer is, in its description's terms (docs/json.md): its name and kind and one
/// sample's shape going in and coming out; for a layer of a dense description also its fan-in,
/// units and activation, the fields the dense audit has always reported.
#[derive(Clone, Debug, Serialize)]
pub struct LayerTerms {
    pub name: String,
    pub kind: &'static str,
    pub input: String,
    pub output: String,
    #[serde(flatten)]
    pub dense: Option<DenseTerms>,
}

/// A dense layer in the terms of a dense description.
#[derive(Clone, Debug, Serialize)]
pub struct DenseTerms {
    pub inputs: usize,
    pub units: usize,
    pub activation: String,
}

impl LayerTerms {
    /// The terms of a node of the layer graph; `dense` for a description of dense layers only,
    /// whose layers are also shown as fan-in → units with their activation.
    pub fn of_node(node: &Node, dense: bool) -> LayerTerms {
        let (input, output) = (node.layer.input(), node.layer.output());
        let dense = dense.then(|| DenseTerms {
            inputs: input.size(),
            units: output.size(),
            activation: node.activation.to_string(),
        });
        LayerTerms {
            name: node.name.clone(),
            kind: node.layer.kind(),
            input: input.to_string(),
            output: output.to_string(),
            dense,
        }
    }

    /// `dense relu`, `conv2d`: what the layer is.
    pub fn kind(&self) -> String {
        match &self.dense {
            Some(d) => format!("dense {}", d.activation),
            None => self.kind.to_string(),
        }
    }

    /// `4 → 3`, `(3, 8, 8) → (6, 8, 8)`.
    pub fn in_out(&self) -> String {
        match &self.dense {
            Some(d) => format!("{} → {}", d.inputs, d.units),
            None => format!("{} → {}", self.input, self.output),
        }
    }

    /// The layer's name beside its number, except in a dense description (its layers are
    /// numbered, and named `layerJ` by default).
    pub fn name(&self) -> Option<&str> {
        match self.dense {
            Some(_) => None,
            None => Some(&self.name),
        }
    }
}

/// A tensor in the file that no layer uses.
#[derive(Clone, Debug, Serialize)]
pub struct StrayTensor {
    pub name: String,
    pub shape: Vec<usize>,
    pub dtype: &'static str,
}

impl StrayTensor {
    /// The tensors of `file` whose names are not in `used` (what the layers took), in file order.
    pub(crate) fn left_over(file: Option<&TensorFile>, used: &BTreeSet<&str>) -> Vec<StrayTensor> {
        file.map(|f| {
            f.tensors
                .iter()
                .filter(|t| !used.contains(t.name.as_str()))
                .map(|t| StrayTensor {
                    name: t.name.clone(),
                    shape: t.shape.clone(),
                    dtype: t.dtype.name(),
                })
                .collect()
        })
        .unwrap_or_default()
    }

    /// The error finding that names this tensor; `fix` says how to make a layer use it.
    pub(crate) fn finding(&self, fix: &str) -> Finding {
        Finding::new(
            "tensor-unexpected",
            Severity::Error,
            format!(
                "{} {} is in the file, but no layer of the description uses it: {fix}",
                shape_text(&self.shape),
                self.dtype
            ),
        )
        .tensor(&self.name)
    }
}

/// The whole dimension audit.
#[derive(Clone, Debug, Serialize)]
pub struct ShapeAudit {
    /// Carried by the command's report, at its top.
    #[serde(skip)]
    pub verdict: Verdict,
    /// The layout the description declares.
    pub layout: Layout,
    /// The layout the file is actually in, when it fits another one than declared.
    pub detected_layout: Option<Layout>,
    pub layers: Vec<LayerShapes>,
    pub unexpected: Vec<StrayTensor>,
    pub total_parameters: usize,
    pub findings: Vec<Finding>,
}

/// Audits a weight file (or, with `None`, just lists what the description expects).
pub fn audit_shapes(desc: &Description, file: Option<&TensorFile>) -> ShapeAudit {
    let bound = file.map(|f| bind(desc, f));
    let file = bound.as_deref();
    let expected = expected_tensors(desc, desc.layout);
    let mut findings = Vec::new();
    let mut detected_layout = None;
    let mut statuses: Vec<(Option<&Tensor>, Status)> = Vec::new();
    let mut used: BTreeSet<&str> = BTreeSet::new();

    match file {
        None => statuses = expected.iter().map(|_| (None, Status::Unchecked)).collect(),
        Some(file) => {
            let index = by_name(file);
            for e in &expected {
                let t = index.get(e.name.as_str()).copied();
                let status = match t {
                    None => Status::Missing,
                    Some(t) if !shape_fits(e.role, &e.shape, &t.shape) => Status::WrongShape,
                    Some(t) if !t.dtype.is_float() => Status::NotFloat,
                    Some(_) => Status::Ok,
                };
                if t.is_some() {
                    used.insert(&e.name);
                }
                statuses.push((t, status));
            }
            let all_ok = statuses.iter().all(|(_, s)| *s == Status::Ok);
            if !all_ok {
                if let Some((layout, ambiguous)) = other_layout(desc, file) {
                    detected_layout = Some(layout);
                    let names = expected_tensors(desc, layout);
                    let names: HashSet<&str> = names.iter().map(|n| n.name.as_str()).collect();
                    used.extend(
                        file.tensors
                            .iter()
                            .filter(|t| names.contains(t.name.as_str()))
                            .map(|t| t.name.as_str()),
                    );
                    let mut msg = format!(
                        "the file is in layout `{layout}`, but the description says `{}`: set layout = \"{layout}\" in the description",
                        desc.layout
                    );
                    if let Some(other) = ambiguous {
                        msg.push_str(&format!(
                            " (every layer is square, so `{other}` fits as well: check whether your code computes W·x + b or x·W + b)"
                        ));
                    }
                    findings.push(
                        Finding::new("other-layout", Severity::Error, msg)
                            .figure("declared", desc.layout.name())
                            .figure("found", layout.name()),
                    );
                } else {
                    diagnose_tensors(desc, file, &expected, &statuses, &mut findings, &mut used);
                }
            }
            for (e, (t, status)) in expected.iter().zip(&statuses) {
                if *status == Status::NotFloat {
                    let t = t.expect("present");
                    findings.push(
                        Finding::new(
                            "dtype-not-float",
                            Severity::Error,
                            format!(
                                "holds {} values; weights must be floating point (f16, bf16, f32 or f64): save it as float32 or float64",
                                t.dtype.name()
                            ),
                        )
                        .tensor(&e.name)
                        .layer(e.layer + 1)
                        .figure("dtype", t.dtype.name()),
                    );
                }
                if *status == Status::Ok && e.shape.len() == 2 && e.shape[0] == e.shape[1] {
                    findings.push(
                        Finding::new(
                            "square-matrix",
                            Severity::Note,
                            format!(
                                "is square ({0} × {0}), so a transposed copy would have the same shape: the dimension audit cannot rule that out; a gradient or value check can",
                                e.shape[0]
                            ),
                        )
                        .tensor(&e.name)
                        .layer(e.layer + 1),
                    );
                }
                if *status == Status::Ok
                    && e.role == Role::Bias
                    && t.is_some_and(|t| t.shape.len() == 2)
                {
                    findings.push(
                        Finding::new(
                            "bias-as-matrix",
                            Severity::Note,
                            format!(
                                "is stored as a {} matrix; read as a vector of {}",
                                shape_text(&t.expect("present").shape),
                                e.shape[0]
                            ),
                        )
                        .tensor(&e.name)
                        .layer(e.layer + 1),
                    );
                }
            }
        }
    }

    let unexpected = StrayTensor::left_over(file, &used);
    if detected_layout.is_none() {
        let stand_ins: HashSet<String> = findings
            .iter()
            .filter_map(|f| f.figures.get("source").and_then(|v| v.as_str()))
            .map(str::to_string)
            .collect();
        for s in &unexpected {
            if stand_ins.contains(&s.name) {
                continue; // already named as the likely stand-in for a missing tensor
            }
            findings.push(s.finding("remove it, or name it in a [[layer]] with weight = / bias ="));
        }
    }

    let layers = build_layers(
        desc,
        &expected,
        &statuses,
        file.is_some(),
        detected_layout.is_some(),
    );
    let verdict = Verdict::of(&findings);
    ShapeAudit {
        verdict,
        layout: desc.layout,
        detected_layout,
        layers,
        unexpected,
        total_parameters: desc.network.parameters(),
        findings,
    }
}

/// The file's tensors by name (the first of a name, as `TensorFile::get` finds it): one lookup
/// per expected tensor instead of a scan of the file, which may hold 100,000 tensors.
pub(crate) fn by_name(file: &TensorFile) -> HashMap<&str, &Tensor> {
    file.tensors
        .iter()
        .rev()
        .map(|t| (t.name.as_str(), t))
        .collect()
}

/// The layout, other than the declared one, under which every tensor is present with a fitting
/// shape; with the second layout that fits as well when split and split-transposed cannot be told
/// apart (all layers square).
fn other_layout(desc: &Description, file: &TensorFile) -> Option<(Layout, Option<Layout>)> {
    let index = by_name(file);
    let fits = |layout: Layout| {
        expected_tensors(desc, layout).iter().all(|e| {
            index
                .get(e.name.as_str())
                .is_some_and(|t| shape_fits(e.role, &e.shape, &t.shape))
        })
    };
    let candidates: Vec<Layout> = Layout::ALL
        .into_iter()
        .filter(|&l| l != desc.layout && fits(l))
        .collect();
    match candidates.as_slice() {
        [] => None,
        [one] => Some((*one, None)),
        [a, b, ..] => Some((*a, Some(*b))),
    }
}

/// Names what is wrong with each tensor that does not fit, trying the known explanations in turn.
fn diagnose_tensors<'f>(
    desc: &Description,
    file: &'f TensorFile,
    expected: &[ExpectedTensor],
    statuses: &[(Option<&Tensor>, Status)],
    findings: &mut Vec<Finding>,
    used: &mut BTreeSet<&'f str>,
) {
    let specs = desc.network.layers();
    let expected_names: HashSet<&str> = expected.iter().map(|x| x.name.as_str()).collect();
    // The first unclaimed tensor of each shape, so finding a stand-in is a lookup, not a scan
    // of the file for every missing tensor.
    let mut strays: HashMap<&[usize], usize> = HashMap::new();
    for (i, c) in file.tensors.iter().enumerate() {
        if !used.contains(c.name.as_str()) && !expected_names.contains(c.name.as_str()) {
            strays.entry(c.shape.as_slice()).or_insert(i);
        }
    }
    for (e, (t, status)) in expected.iter().zip(statuses) {
        let layer = e.layer + 1;
        let want = shape_text(&e.shape);
        match status {
            Status::WrongShape => {
                let t = t.expect("present");
                let got = shape_text(&t.shape);
                let (inputs, units) = (specs[e.layer].inputs, specs[e.layer].units);
                let (code, msg) =
                    explain_wrong_shape(e, &t.shape, inputs, units, expected, statuses);
                findings.push(
                    Finding::new(
                        code,
                        Severity::Error,
                        format!("is {got}, expected {want}: {msg}"),
                    )
                    .tensor(&e.name)
                    .layer(layer)
                    .figure("expected", &e.shape)
                    .figure("found", &t.shape),
                );
            }
            Status::Missing => {
                // A tensor under another name with exactly this shape that nothing else claims is
                // likely the one meant: say which name to write.
                // What shape_fits accepts: the same shape, or for a bias of n also (n, 1), (1, n).
                let mut shapes = vec![e.shape.clone()];
                if e.role == Role::Bias && e.shape.len() == 1 {
                    shapes.extend([vec![e.shape[0], 1], vec![1, e.shape[0]]]);
                }
                let stand_in = shapes
                    .iter()
                    .filter_map(|s| strays.get(s.as_slice()).copied())
                    .min()
                    .map(|i| &file.tensors[i]);
                debug_assert!(stand_in.is_none_or(|c| shape_fits(e.role, &e.shape, &c.shape)));
                let key = if e.role == Role::Bias {
                    "bias"
                } else {
                    "weight"
                };
                let mut f = Finding::new(
                    "tensor-missing",
                    Severity::Error,
                    match stand_in {
                        Some(c) => format!(
                            "is not in the file; `{}` has its shape {want}: if that is layer {layer}'s {}, write {key} = \"{}\" in [[layer]] {layer}",
                            c.name,
                            e.role.name(),
                            c.name
                        ),
                        None => format!(
                            "is not in the file: layer {layer} needs {} tensor of shape {want} under layout `{}`",
                            match e.role {
                                Role::Augmented => "an augmented",
                                Role::Weight => "a weight",
                                Role::Bias => "a bias",
                            },
                            desc.layout
                        ),
                    },
                )
                .tensor(&e.name)
                .layer(layer)
                .figure("expected", &e.shape);
                if let Some(c) = stand_in {
                    used.insert(c.name.as_str());
                    f = f.figure("source", &c.name);
                }
                findings.push(f);
            }
            _ => {}
        }
    }
}

/// The most specific explanation of a wrong shape: (code, advice).
fn explain_wrong_shape(
    e: &ExpectedTensor,
    found: &[usize],
    inputs: usize,
    units: usize,
    all: &[ExpectedTensor],
    statuses: &[(Option<&Tensor>, Status)],
) -> (&'static str, String) {
    let layer = e.layer + 1;
    // Another layer expects exactly this shape in this role, and its tensor has the shape this
    // layer expects: the two are swapped, the layers stored in another order.
    if let Some(other) = all.iter().zip(statuses).find_map(|(o, (t, st))| {
        (o.layer != e.layer
            && o.role == e.role
            && *st != Status::Ok
            && shape_fits(o.role, &o.shape, found)
            && t.is_some_and(|t| shape_fits(e.role, &e.shape, &t.shape)))
        .then_some(o)
    }) {
        return (
            "layers-out-of-order",
            format!(
                "that is the shape layer {} expects; the layers are stored in another order than the description lists them",
                other.layer + 1
            ),
        );
    }
    match (e.role, found) {
        (Role::Bias, [k]) | (Role::Bias, [1, k]) | (Role::Bias, [k, 1]) => {
            let hint = if *k == inputs {
                format!(" — {k} is the number of the layer's inputs, so the bias may belong to the layer below")
            } else {
                String::new()
            };
            (
                "bias-wrong-length",
                format!("the bias has {k} entries but layer {layer} has {units} units{hint}"),
            )
        }
        (Role::Augmented, &[r, c]) if r == units && c == inputs => (
            "bias-column-missing",
            format!(
                "the bias column is missing: the augmented layout keeps the {units} bias weights in column 0; add them, or store them apart with layout = \"split\""
            ),
        ),
        (Role::Augmented, &[r, c]) if r == units && c == inputs + 2 => (
            "bias-column-extra",
            "one column too many: there is a second bias column, or the matrix belongs to a layer with one more input".to_string(),
        ),
        (Role::Augmented, &[r, c]) if r == inputs + 1 && c == units => (
            "transposed-matrix",
            "the matrix is stored transposed ((inputs + 1) × units); transpose it, or check whether your code multiplies x·W".to_string(),
        ),
        (Role::Weight, &[r, c]) if e.shape == [units, inputs] && r == units && c == inputs + 1 => (
            "bias-column-extra",
            "the weight matrix carries an extra column, likely the bias: that is the augmented layout; set layout = \"augmented\" or drop the column".to_string(),
        ),
        (Role::Weight, &[r, c]) if e.shape == [inputs, units] && r == inputs + 1 && c == units => (
            "bias-column-extra",
            "the weight matrix carries an extra row, likely the bias: store the bias apart, or drop the row".to_string(),
        ),
        (Role::Weight, &[r, c]) if e.shape.len() == 2 && [c, r] == [e.shape[0], e.shape[1]] => (
            "transposed-matrix",
            format!(
                "the matrix is stored transposed; transpose it, or if every layer is stored this way, set layout = \"{}\"",
                if e.shape == [units, inputs] { "split-transposed" } else { "split" }
            ),
        ),
        _ => (
            "wrong-shape",
            format!(
                "layer {layer} maps {inputs} inputs to {units} units; check the description's unit counts against the file"
            ),
        ),
    }
}

fn build_layers(
    desc: &Description,
    expected: &[ExpectedTensor],
    statuses: &[(Option<&Tensor>, Status)],
    checked: bool,
    other_layout: bool,
) -> Vec<LayerShapes> {
    desc.network
        .layers()
        .iter()
        .enumerate()
        .map(|(l, spec)| {
            let tensors: Vec<TensorShape> = expected
                .iter()
                .zip(statuses)
                .filter(|(e, _)| e.layer == l)
                .map(|(e, (t, s))| TensorShape {
                    name: e.name.clone(),
                    role: e.role.name(),
                    expected: e.shape.clone(),
                    found: t.map(|t| t.shape.clone()),
                    dtype: t.map(|t| t.dtype.name()),
                    status: *s,
                })
                .collect();
            let verdict = if !checked {
                "unchecked"
            } else if !other_layout && tensors.iter().all(|t| t.status == Status::Ok) {
                "pass"
            } else {
                "fail"
            };
            LayerShapes {
                layer: l + 1,
                terms: LayerTerms {
                    name: format!("layer{}", l + 1),
                    kind: "dense",
                    input: plumb_engine::graph::Shape::Flat(spec.inputs).to_string(),
                    output: plumb_engine::graph::Shape::Flat(spec.units).to_string(),
                    dense: Some(DenseTerms {
                        inputs: spec.inputs,
                        units: spec.units,
                        activation: spec.activation.to_string(),
                    }),
                },
                parameters: spec.parameters(),
                tensors,
                verdict,
            }
        })
        .collect()
}
