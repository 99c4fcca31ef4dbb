//! The dimension audit of a network of any kind: the tensors a [`GraphDescription`] implies in
//! the file (their shapes in the declared storage) against the tensors a weight file holds.
//!
//! A tensor that does not fit is explained in the layer's own terms before it is called a plain
//! wrong shape: a conv weight stored in another axis order than declared (and which order it is,
//! or which orders fit alike when equal lengths make it ambiguous), kernel axes exchanged, a
//! missing bias, a norm scale of the wrong length, a recurrent or attention weight stored
//! transposed, gate blocks of the wrong multiple, an attention projection of the wrong width, an
//! embedding table with its axes exchanged. The report types and codes are the dense audit's
//! ([`crate::audit_shapes`]) where the two meet.

use std::collections::{BTreeSet, HashMap};

use plumb_engine::graph::{Role, Storage};
use plumb_formats::{
    FileFormat, FileStorage, FileTensor, GraphDescription, KindSettings, Layout, Tensor,
    TensorFile, shape_text,
};
use plumb_report::{Finding, Severity, Verdict};
use serde::Serialize;

use crate::shapes::by_name;
use crate::{LayerShapes, LayerTerms, Status, StrayTensor, TensorShape};

/// The whole graph dimension audit.
#[derive(Clone, Debug, Serialize)]
pub struct GraphShapeAudit {
    /// Carried by the command's report, at its top.
    #[serde(skip)]
    pub verdict: Verdict,
    /// The storage of dense layers the description declares.
    pub layout: Layout,
    pub layers: Vec<LayerShapes>,
    pub unexpected: Vec<StrayTensor>,
    pub total_parameters: usize,
    pub findings: Vec<Finding>,
}

/// Audits a weight file against a description of any kind (or, with `None`, lists what the
/// description expects).
pub fn audit_graph_shapes(desc: &GraphDescription, file: Option<&TensorFile>) -> GraphShapeAudit {
    let mut findings = Vec::new();
    let mut used: BTreeSet<&str> = BTreeSet::new();
    let statuses: Vec<(Option<&Tensor>, Status)> = match file {
        None => desc
            .files
            .iter()
            .map(|_| (None, Status::Unchecked))
            .collect(),
        Some(file) => {
            let index = by_name(file);
            // A `.npy` holds one tensor, named after the file: when one is expected, that one.
            let single =
                file.format == FileFormat::Npy && file.tensors.len() == 1 && desc.files.len() == 1;
            desc.files
                .iter()
                .map(|f| {
                    let t = if single {
                        Some(&file.tensors[0])
                    } else {
                        index.get(f.name.as_str()).copied()
                    };
                    if let Some(t) = t {
                        used.insert(t.name.as_str());
                    }
                    let status = match t {
                        None => Status::Missing,
                        Some(t) if !f.fits(&t.shape) => Status::WrongShape,
                        Some(t) if !t.dtype.is_float() => Status::NotFloat,
                        Some(_) => Status::Ok,
                    };
                    (t, status)
                })
                .collect()
        }
    };

    if let Some(file) = file {
        // Unclaimed tensors by shape, the first of each: a missing tensor's likely stand-in.
        let mut strays: HashMap<&[usize], &Tensor> = HashMap::new();
        for t in file.tensors.iter().rev() {
            if !used.contains(t.name.as_str()) {
                strays.insert(t.shape.as_slice(), t);
            }
        }
        for (f, (t, status)) in desc.files.iter().zip(&statuses) {
            let layer = f.layer + 1;
            match status {
                Status::WrongShape => {
                    let t = t.expect("present");
                    let (code, advice) = explain(desc, f, &t.shape);
                    findings.push(
                        Finding::new(
                            code,
                            Severity::Error,
                            format!(
                                "is {}, expected {}{}: {advice}",
                                shape_text(&t.shape),
                                shape_text(&f.shape),
                                declared(f)
                            ),
                        )
                        .tensor(&f.name)
                        .layer(layer)
                        .figure("expected", &f.shape)
                        .figure("found", &t.shape)
                        .figure("storage", f.storage.letters()),
                    );
                }
                Status::Missing => {
                    let stand_in = strays.get(f.shape.as_slice()).copied();
                    let kind = desc.layers[f.layer].kind_name();
                    let message = match stand_in {
                        Some(s) => format!(
                            "is not in the file; `{}` has its shape {}: if that is layer {layer}'s {}, rename it in the file{}",
                            s.name,
                            shape_text(&f.shape),
                            f.role_name(),
                            if matches!(desc.layers[f.layer].kind, KindSettings::Dense { .. }) {
                                format!(
                                    " or write {} = \"{}\" in [[layer]] {layer}",
                                    if f.role == Role::Bias {
                                        "bias"
                                    } else {
                                        "weight"
                                    },
                                    s.name
                                )
                            } else {
                                String::new()
                            }
                        ),
                        None if f.role == Role::Bias
                            && matches!(desc.layers[f.layer].kind, KindSettings::Conv { .. }) =>
                        {
                            format!(
                                "is not in the file: layer {layer} ({kind}) has a bias unless it says bias = false; add the bias of shape {}, or write bias = false in [[layer]] {layer}",
                                shape_text(&f.shape)
                            )
                        }
                        None => format!(
                            "is not in the file: layer {layer} ({kind}) needs its {} of shape {}{}",
                            f.role_name(),
                            shape_text(&f.shape),
                            declared(f)
                        ),
                    };
                    let code = if f.role == Role::Bias && stand_in.is_none() {
                        "bias-missing"
                    } else {
                        "tensor-missing"
                    };
                    let mut finding = Finding::new(code, Severity::Error, message)
                        .tensor(&f.name)
                        .layer(layer)
                        .figure("expected", &f.shape);
                    if let Some(s) = stand_in {
                        used.insert(s.name.as_str());
                        strays.remove(s.shape.as_slice());
                        finding = finding.figure("source", &s.name);
                    }
                    findings.push(finding);
                }
                Status::NotFloat => {
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
                        .tensor(&f.name)
                        .layer(layer)
                        .figure("dtype", t.dtype.name()),
                    );
                }
                Status::Ok => {
                    if let (KindSettings::Conv { .. }, FileStorage::Axes(declared), Role::Weight) =
                        (&desc.layers[f.layer].kind, &f.storage, f.role)
                    {
                        let canonical = &desc.graph.tensors()[f.tensors[0]].spec.shape;
                        let alike = orders_of_shape(declared, canonical, &f.shape);
                        if !alike.is_empty() {
                            findings.push(
                                Finding::new(
                                    "storage-ambiguous",
                                    Severity::Note,
                                    format!(
                                        "fits the declared order \"{}\", but equal axis lengths give {} the same shape: the dimension audit cannot rule those out; a gradient or value check can",
                                        declared.letters(),
                                        quoted(&alike)
                                    ),
                                )
                                .tensor(&f.name)
                                .layer(layer),
                            );
                        }
                    }
                }
                Status::Unchecked => {}
            }
        }
    }

    let unexpected = StrayTensor::left_over(file, &used);
    for s in &unexpected {
        findings.push(s.finding("remove it, or check the layer names"));
    }

    let layers = desc
        .graph
        .nodes()
        .iter()
        .enumerate()
        .map(|(j, node)| {
            let tensors: Vec<TensorShape> = desc
                .files
                .iter()
                .zip(&statuses)
                .filter(|(f, _)| f.layer == j)
                .map(|(f, (t, s))| TensorShape {
                    name: f.name.clone(),
                    role: f.role_name(),
                    expected: f.shape.clone(),
                    found: t.map(|t| t.shape.clone()),
                    dtype: t.map(|t| t.dtype.name()),
                    status: *s,
                })
                .collect();
            let verdict = if file.is_none() {
                "unchecked"
            } else if tensors.iter().all(|t| t.status == Status::Ok) {
                "pass"
            } else {
                "fail"
            };
            LayerShapes {
                layer: j + 1,
                terms: LayerTerms::of_node(node),
                parameters: node
                    .layer
                    .params()
                    .iter()
                    .map(|p| p.shape.iter().product::<usize>())
                    .sum(),
                tensors,
                verdict,
            }
        })
        .collect();
    GraphShapeAudit {
        verdict: Verdict::of(&findings),
        layout: desc.layout,
        layers,
        unexpected,
        total_parameters: desc.graph.parameters(),
        findings,
    }
}

/// " (storage \"hwio\")" when the storage is not the canonical one.
fn declared(f: &FileTensor) -> String {
    match &f.storage {
        FileStorage::Axes(s) if s.is_canonical() => String::new(),
        s => format!(" (storage \"{}\")", s.letters()),
    }
}

/// The most specific explanation of a wrong shape: (code, advice).
fn explain(desc: &GraphDescription, f: &FileTensor, found: &[usize]) -> (&'static str, String) {
    let settings = &desc.layers[f.layer];
    let layer = f.layer + 1;
    let node = &desc.graph.nodes()[f.layer];
    let canonical = &desc.graph.tensors()[f.tensors[0]].spec.shape;
    let reversed = |s: &[usize]| s.iter().rev().copied().collect::<Vec<_>>();
    match (&settings.kind, &f.storage, f.role) {
        (KindSettings::Conv { .. }, FileStorage::Axes(declared), Role::Weight) => {
            conv_weight(declared, canonical, found)
        }
        (
            KindSettings::Rnn { units, .. }
            | KindSettings::Lstm { units, .. }
            | KindSettings::Gru { units, .. },
            _,
            Role::Weight | Role::Bias,
        ) => {
            let blocks = canonical[0] / units;
            let gates = match &settings.kind {
                KindSettings::Lstm { gate_order, .. } | KindSettings::Gru { gate_order, .. } => {
                    format!(" (gates \"{gate_order}\")")
                }
                _ => String::new(),
            };
            let transposed = f.storage.letters() == "io";
            if f.shape.len() == 2 && found == reversed(&f.shape) {
                return (
                    "transposed-matrix",
                    if transposed {
                        "the weight is stored out × in (rows are outputs) though `storage = \"transposed\"` is declared: remove that key, or transpose the tensor".to_string()
                    } else {
                        format!(
                            "the weight is stored in × out: write storage = \"transposed\" in [[layer]] {layer}, or transpose the tensor"
                        )
                    },
                );
            }
            // The axis that stacks the gate blocks, in the file's order.
            let axis = if transposed { found.len() - 1 } else { 0 };
            let other_fits = found.len() == f.shape.len()
                && found
                    .iter()
                    .zip(&f.shape)
                    .enumerate()
                    .all(|(a, (x, y))| a == axis || x == y);
            if other_fits
                && found[axis] > 0
                && found[axis].is_multiple_of(*units)
                && found[axis] != canonical[0]
            {
                let k = found[axis] / units;
                let likely = match k {
                    4 => " — 4 blocks is an lstm's stacking",
                    3 => " — 3 blocks is a gru's stacking",
                    1 => " — 1 block is an rnn's",
                    _ => "",
                };
                return (
                    "gate-blocks",
                    format!(
                        "it stacks {k} blocks of {units} units, but a {} stacks {blocks}{gates}{likely}: check the layer's kind and units",
                        settings.kind_name()
                    ),
                );
            }
            plain(desc, f)
        }
        (KindSettings::Attention { .. }, _, _) => {
            let width = canonical[0];
            if f.shape.len() == 2 && found.len() == 2 && found[0] != found[1] {
                return (
                    "attention-width",
                    format!(
                        "the projections of layer {layer} are square, width × width = {width} × {width} (the width of its input, {}); this one maps {} to {}",
                        node.layer.input(),
                        found[if f.storage.letters() == "io" { 0 } else { 1 }],
                        found[if f.storage.letters() == "io" { 1 } else { 0 }]
                    ),
                );
            }
            if let [w] = found {
                return (
                    "attention-width",
                    format!(
                        "has {w} entries, but layer {layer}'s projections are {width} wide (the width of its input)"
                    ),
                );
            }
            if let [a, b] = found {
                return (
                    "attention-width",
                    format!(
                        "is {a} × {b}, but layer {layer}'s projections are {width} × {width}, the width of its input {}",
                        node.layer.input()
                    ),
                );
            }
            plain(desc, f)
        }
        (KindSettings::Embedding { .. }, _, Role::Table) if found == reversed(&f.shape) => (
            "embedding-transposed",
            format!(
                "the table is stored size × vocabulary; plumb reads vocabulary × size ({} × {}, one row per token id): transpose it",
                f.shape[0], f.shape[1]
            ),
        ),
        (
            KindSettings::BatchNorm { .. }
            | KindSettings::LayerNorm { .. }
            | KindSettings::RmsNorm { .. },
            _,
            Role::Scale | Role::Shift,
        ) => {
            let n = f.shape[0];
            let k: usize = found.iter().product();
            let input = node.layer.input();
            let over = match input {
                plumb_engine::graph::Shape::Signal { .. }
                | plumb_engine::graph::Shape::Image { .. } => "the channels",
                _ if matches!(settings.kind, KindSettings::BatchNorm { .. }) => "the features",
                _ => "the last axis",
            };
            let also = input
                .dims()
                .iter()
                .position(|&d| d == k)
                .map(|a| format!(" ({k} is the length of axis {a} of the input {input})"))
                .unwrap_or_default();
            (
                "norm-scale-wrong-length",
                format!(
                    "the {} has {k} entries, but layer {layer} ({}) normalises over {over} of its input {input}, {n} of them{also}",
                    f.role_name(),
                    settings.kind_name()
                ),
            )
        }
        (KindSettings::Dense { .. }, FileStorage::Augmented, _) => {
            let (units, fan_in) = (f.shape[0], f.shape[1] - 1);
            match *found {
                [r, c] if r == units && c == fan_in => (
                    "bias-column-missing",
                    format!(
                        "the bias column is missing: the augmented layout keeps the {units} bias weights in column 0; add them, or store them apart with layout = \"split\""
                    ),
                ),
                [r, c] if r == fan_in + 1 && c == units => (
                    "transposed-matrix",
                    "the matrix is stored transposed ((inputs + 1) × units); transpose it"
                        .to_string(),
                ),
                _ => plain(desc, f),
            }
        }
        (KindSettings::Dense { .. }, FileStorage::Axes(s), Role::Weight)
            if found == reversed(&f.shape) =>
        {
            (
                "transposed-matrix",
                format!(
                    "the matrix is stored transposed; transpose it, or if every dense layer is stored this way, set layout = \"{}\"",
                    if s.is_canonical() {
                        "split-transposed"
                    } else {
                        "split"
                    }
                ),
            )
        }
        (_, _, Role::Bias) => (
            "bias-wrong-length",
            format!(
                "the bias has {} entries but layer {layer} has {}",
                found.iter().product::<usize>(),
                f.shape[0]
            ),
        ),
        _ => plain(desc, f),
    }
}

fn plain(desc: &GraphDescription, f: &FileTensor) -> (&'static str, String) {
    let node = &desc.graph.nodes()[f.layer];
    (
        "wrong-shape",
        format!(
            "layer {} ({}) reads {} and outputs {}; check the description's sizes against the file",
            f.layer + 1,
            node.layer.kind(),
            node.layer.input(),
            node.layer.output()
        ),
    )
}

/// The axis orders of a conv weight, other than the declared one, that give shape `found`.
fn orders_of_shape(declared: &Storage, canonical: &[usize], found: &[usize]) -> Vec<String> {
    let letters = if canonical.len() == 3 { "oik" } else { "oihw" };
    permutations(letters)
        .into_iter()
        .filter(|p| p != declared.letters())
        .filter(|p| {
            Storage::parse(p, letters)
                .expect("a permutation")
                .file_shape(canonical)
                == found
        })
        .collect()
}

fn quoted(orders: &[String]) -> String {
    orders
        .iter()
        .map(|p| format!("\"{p}\""))
        .collect::<Vec<_>>()
        .join(", ")
}

/// A conv weight of the wrong shape: the axis orders whose shape matches what was found.
fn conv_weight(declared: &Storage, canonical: &[usize], found: &[usize]) -> (&'static str, String) {
    let letters = if canonical.len() == 3 { "oik" } else { "oihw" };
    let fits = orders_of_shape(declared, canonical, found);
    let glossary = if letters == "oik" {
        "o out-channels, i in-channels, k kernel length"
    } else {
        "o out-channels, i in-channels, h, w kernel height and width"
    };
    // The declared order with h and w exchanged: the kernel is stored turned on its diagonal.
    let exchanged: String = declared
        .letters()
        .chars()
        .map(|c| match c {
            'h' => 'w',
            'w' => 'h',
            c => c,
        })
        .collect();
    match fits.as_slice() {
        [] => (
            "wrong-shape",
            format!(
                "no order of its axes gives this shape ({glossary}); check the layer's channels and kernel against the file"
            ),
        ),
        [one] if letters == "oihw" && *one == exchanged => (
            "kernel-axes-exchanged",
            format!(
                "the kernel's height and width axes are exchanged: the file holds \"{one}\"; transpose the kernel axes, or write storage = \"{one}\" if the kernel really is stored that way ({glossary})"
            ),
        ),
        [one] => (
            "storage-order",
            format!(
                "the weight is stored in the order \"{one}\", not \"{}\" as declared: write storage = \"{one}\", or store it as declared ({glossary})",
                declared.letters()
            ),
        ),
        many => (
            "storage-order",
            format!(
                "the weight is stored in another order than \"{}\"; equal axis lengths make {} fit alike, so the shape cannot tell which: check the code that saved it ({glossary})",
                declared.letters(),
                quoted(many)
            ),
        ),
    }
}

/// Every order of the letters, in lexicographic order of positions.
fn permutations(letters: &str) -> Vec<String> {
    let chars: Vec<char> = letters.chars().collect();
    let mut out = Vec::new();
    let mut used = vec![false; chars.len()];
    let mut current = String::new();
    fn walk(chars: &[char], used: &mut [bool], current: &mut String, out: &mut Vec<String>) {
        if current.len() == chars.len() {
            out.push(current.clone());
            return;
        }
        for i in 0..chars.len() {
            if !used[i] {
                used[i] = true;
                current.push(chars[i]);
                walk(chars, used, current, out);
                current.pop();
                used[i] = false;
            }
        }
    }
    walk(&chars, &mut used, &mut current, &mut out);
    out
}
