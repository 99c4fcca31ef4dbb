//! The dimension audit of a network of any kind: the tensors a [`GraphDescription`] implies in
//! the file (their shapes in the declared storage) against the tensors a weight file holds.
//!
//! A tensor that does not fit is explained in the layer's own terms before it is called a plain
//! wrong shape: a conv weight stored in another axis order than declared (and which order it is,
//! or which orders fit alike when equal lengths make it ambiguous), kernel axes exchanged, a
//! missing bias, a norm scale of the wrong length, a recurrent or attention weight stored
//! transposed, gate blocks of the wrong multiple, an attention projection of the wrong width, an
//! embedding table with its axes exchanged. A dense layer's tensors keep the names and codes the
//! dense audit gave them (another layout, a transposed matrix, a bias column missing or extra,
//! layers in another order, a renamed tensor).

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

/// The whole dimension audit.
#[derive(Clone, Debug, Serialize)]
pub struct GraphShapeAudit {
    /// Carried by the command's report, at its top.
    #[serde(skip)]
    pub verdict: Verdict,
    /// The storage of dense layers the description declares.
    pub layout: Layout,
    /// The layout the file's dense layers are actually in, when every tensor fits another one
    /// than declared.
    pub detected_layout: Option<Layout>,
    pub layers: Vec<LayerShapes>,
    pub unexpected: Vec<StrayTensor>,
    pub total_parameters: usize,
    pub findings: Vec<Finding>,
}

impl GraphShapeAudit {
    /// Every tensor the description expects, with what the file holds under its name.
    pub fn tensors(&self) -> impl Iterator<Item = &TensorShape> {
        self.layers.iter().flat_map(|l| &l.tensors)
    }

    /// Whether any tensor of the file fits the description (in any layout of its dense layers): a
    /// file none of whose tensors fits belongs to another network.
    pub fn fits_any(&self) -> bool {
        self.detected_layout.is_some() || self.tensors().any(|t| t.status == Status::Ok)
    }
}

/// Audits a weight file against a description of any kind (or, with `None`, lists what the
/// description expects).
pub fn audit_graph_shapes(desc: &GraphDescription, file: Option<&TensorFile>) -> GraphShapeAudit {
    let mut findings = Vec::new();
    let mut used: BTreeSet<&str> = BTreeSet::new();
    let dense_description = desc.is_dense();
    let statuses: Vec<(Option<&Tensor>, Status)> = match file {
        None => desc
            .files
            .iter()
            .map(|_| (None, Status::Unchecked))
            .collect(),
        Some(file) => {
            let index = by_name(file);
            desc.files
                .iter()
                .map(|f| {
                    let t = find(desc, file, &index, &f.name);
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

    let mut detected_layout = None;
    if let Some(file) = file
        && statuses.iter().any(|(_, s)| *s != Status::Ok)
    {
        if let Some((layout, ambiguous)) = other_layout(desc, file) {
            detected_layout = Some(layout);
            let index = by_name(file);
            for (name, _, _) in layout_tensors(desc, layout) {
                if let Some(t) = find(desc, file, &index, &name) {
                    used.insert(t.name.as_str());
                }
            }
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
            diagnose(desc, file, &statuses, &mut used, &mut findings);
        }
    }
    if file.is_some() {
        notes(desc, &statuses, &mut findings);
    }

    let unexpected = StrayTensor::left_over(file, &used);
    if detected_layout.is_none() {
        let fix = if dense_description {
            "remove it, or name it in a [[layer]] with weight = / bias ="
        } else {
            "remove it, or check the layer names"
        };
        findings.extend(StrayTensor::findings(&unexpected, fix));
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
            } else if detected_layout.is_none() && tensors.iter().all(|t| t.status == Status::Ok) {
                "pass"
            } else {
                "fail"
            };
            LayerShapes {
                layer: j + 1,
                terms: LayerTerms::of_node(node, dense_description),
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
        detected_layout,
        layers,
        unexpected,
        total_parameters: desc.graph.parameters(),
        findings,
    }
}

/// Refuses a dense description's weight file that its dimension audit fails, with the first
/// errors (tensor, message, code) and the command that shows the whole audit: the message a
/// command that loads such a file stops with. Other kinds' files are left to
/// [`GraphDescription::read_params`], which names the first tensor that does not fit.
pub fn refuse_misfit(
    desc: &GraphDescription,
    file: &TensorFile,
    path: &std::path::Path,
) -> Result<(), String> {
    if !desc.is_dense() {
        return Ok(());
    }
    let audit = audit_graph_shapes(desc, Some(file));
    if audit.verdict != Verdict::Fail {
        return Ok(());
    }
    let problems: Vec<String> = audit
        .findings
        .iter()
        .filter(|f| f.severity == Severity::Error)
        .take(4)
        .map(|f| match &f.tensor {
            Some(t) => format!("  - {t}: {} ({})", f.message, f.code),
            None => format!("  - {} ({})", f.message, f.code),
        })
        .collect();
    Err(format!(
        "{}: the weights do not fit {}:\n{}\nrun `plumb shapes {} --weights {}` for the full dimension audit",
        path.display(),
        desc.path.display(),
        problems.join("\n"),
        desc.path.display(),
        path.display()
    ))
}

/// The file's tensor of this name. A `.npy` holds one tensor, named after the file: when the
/// description expects one, that one, whatever the file is called.
pub(crate) fn find<'f>(
    desc: &GraphDescription,
    file: &'f TensorFile,
    index: &HashMap<&str, &'f Tensor>,
    name: &str,
) -> Option<&'f Tensor> {
    if file.format == FileFormat::Npy && file.tensors.len() == 1 && desc.files.len() == 1 {
        return file.tensors.first();
    }
    index.get(name).copied()
}

/// Whether a layer is dense.
fn is_dense(desc: &GraphDescription, layer: usize) -> bool {
    matches!(desc.layers[layer].kind, KindSettings::Dense { .. })
}

/// A dense layer's (fan-in, units).
fn dense_sizes(desc: &GraphDescription, layer: usize) -> (usize, usize) {
    let node = &desc.graph.nodes()[layer];
    (node.layer.input().size(), node.layer.output().size())
}

/// The file tensors (name, shape, whether a bias) the description implies when its dense layers
/// are stored in `layout`; other kinds' tensors as the description has them.
fn layout_tensors(desc: &GraphDescription, layout: Layout) -> Vec<(String, Vec<usize>, bool)> {
    let mut out = Vec::with_capacity(desc.files.len());
    for (j, node) in desc.graph.nodes().iter().enumerate() {
        match &desc.layers[j].kind {
            KindSettings::Dense { weight, bias, .. } => {
                let (fan_in, units) = dense_sizes(desc, j);
                let specs = &desc.graph.tensors()[node.tensors()];
                let weight_name = || weight.clone().unwrap_or_else(|| specs[0].name.clone());
                let bias_name = bias.clone().unwrap_or_else(|| specs[1].name.clone());
                match layout {
                    Layout::Augmented => out.push((
                        weight.clone().unwrap_or_else(|| node.name.clone()),
                        vec![units, fan_in + 1],
                        false,
                    )),
                    Layout::Split => {
                        out.push((weight_name(), vec![units, fan_in], false));
                        out.push((bias_name, vec![units], true));
                    }
                    Layout::SplitTransposed => {
                        out.push((weight_name(), vec![fan_in, units], false));
                        out.push((bias_name, vec![units], true));
                    }
                }
            }
            _ => out.extend(
                desc.files
                    .iter()
                    .filter(|f| f.layer == j)
                    .map(|f| (f.name.clone(), f.shape.clone(), f.shape.len() == 1)),
            ),
        }
    }
    out
}

/// The layout, other than the declared one, under which every tensor is present with a fitting
/// shape; with the second layout that fits as well when split and split-transposed cannot be
/// told apart (all dense layers square). Only for descriptions with dense layers.
fn other_layout(desc: &GraphDescription, file: &TensorFile) -> Option<(Layout, Option<Layout>)> {
    if !(0..desc.layers.len()).any(|j| is_dense(desc, j)) {
        return None;
    }
    let index = by_name(file);
    let fits = |layout: Layout| {
        layout_tensors(desc, layout)
            .iter()
            .all(|(name, shape, vector)| {
                find(desc, file, &index, name).is_some_and(|t| {
                    t.shape == *shape
                        || (*vector
                            && t.shape.len() == 2
                            && t.shape.contains(&1)
                            && t.shape.iter().product::<usize>() == shape[0])
                })
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

/// Names what is wrong with each tensor that is missing or of the wrong shape, trying the known
/// explanations in turn.
fn diagnose<'f>(
    desc: &GraphDescription,
    file: &'f TensorFile,
    statuses: &[(Option<&Tensor>, Status)],
    used: &mut BTreeSet<&'f str>,
    findings: &mut Vec<Finding>,
) {
    // Unclaimed tensors by shape, the first of each: a missing tensor's likely stand-in (read
    // or listed from its header alone: only its name and shape are needed).
    let listed: Vec<(&'f str, &'f [usize])> = file.listing().map(|(n, s, _)| (n, s)).collect();
    let mut strays: HashMap<&[usize], usize> = HashMap::new();
    for (i, &(name, shape)) in listed.iter().enumerate().rev() {
        if !used.contains(name) {
            strays.insert(shape, i);
        }
    }
    for (k, (f, (t, status))) in desc.files.iter().zip(statuses).enumerate() {
        let layer = f.layer + 1;
        let dense = is_dense(desc, f.layer);
        match status {
            Status::WrongShape => {
                let t = t.expect("present");
                let (code, advice) = match swapped_with(desc, statuses, k, &t.shape) {
                    Some(other) => (
                        "layers-out-of-order",
                        format!(
                            "that is the shape layer {} expects; the layers are stored in another order than the description lists them",
                            other + 1
                        ),
                    ),
                    None => explain(desc, f, &t.shape),
                };
                let mut finding = Finding::new(
                    code,
                    Severity::Error,
                    format!(
                        "is {}, expected {}{}: {advice}",
                        shape_text(&t.shape),
                        shape_text(&f.shape),
                        if dense { String::new() } else { declared(f) }
                    ),
                )
                .tensor(&f.name)
                .layer(layer)
                .figure("expected", &f.shape)
                .figure("found", &t.shape);
                if !dense {
                    finding = finding.figure("storage", f.storage.letters());
                }
                findings.push(finding);
            }
            Status::Missing => {
                // What `fits` accepts: the shape, or for a vector of n also n × 1 and 1 × n.
                let mut shapes = vec![f.shape.clone()];
                if f.shape.len() == 1 {
                    shapes.extend([vec![f.shape[0], 1], vec![1, f.shape[0]]]);
                }
                let stand_in = shapes
                    .iter()
                    .filter_map(|s| strays.get(s.as_slice()).copied())
                    .min()
                    .map(|i| listed[i].0);
                let kind = desc.layers[f.layer].kind_name();
                let message = match stand_in {
                    Some(s) => format!(
                        "is not in the file; `{}` has its shape {}: if that is layer {layer}'s {}, rename it in the file{}",
                        s,
                        shape_text(&f.shape),
                        f.role_name(),
                        if dense {
                            format!(
                                " or write {} = \"{}\" in [[layer]] {layer}",
                                if f.role == Role::Bias {
                                    "bias"
                                } else {
                                    "weight"
                                },
                                s
                            )
                        } else {
                            String::new()
                        }
                    ),
                    None if dense => format!(
                        "is not in the file: layer {layer} needs {} tensor of shape {} under layout `{}`",
                        match (&f.storage, f.role) {
                            (FileStorage::Augmented, _) => "an augmented",
                            (_, Role::Bias) => "a bias",
                            _ => "a weight",
                        },
                        shape_text(&f.shape),
                        desc.layout
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
                // A dense layer's missing bias is a missing tensor, as it has always been named.
                let code = if f.role == Role::Bias && stand_in.is_none() && !dense {
                    "bias-missing"
                } else {
                    "tensor-missing"
                };
                let mut finding = Finding::new(code, Severity::Error, message)
                    .tensor(&f.name)
                    .layer(layer)
                    .figure("expected", &f.shape);
                if let Some(s) = stand_in {
                    used.insert(s);
                    strays.retain(|_, &mut i| listed[i].0 != s);
                    finding = finding.figure("source", s);
                }
                findings.push(finding);
            }
            _ => {}
        }
    }
}

/// The notes and dtype errors of tensors whose shape fits: a tensor that is not floating point;
/// a square dense matrix (a transposed copy has its shape); a dense bias stored as a matrix; a
/// conv weight whose equal axis lengths let other orders fit.
fn notes(
    desc: &GraphDescription,
    statuses: &[(Option<&Tensor>, Status)],
    findings: &mut Vec<Finding>,
) {
    for (f, (t, status)) in desc.files.iter().zip(statuses) {
        let layer = f.layer + 1;
        let dense = is_dense(desc, f.layer);
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
                .tensor(&f.name)
                .layer(layer)
                .figure("dtype", t.dtype.name()),
            );
        }
        if *status != Status::Ok {
            continue;
        }
        if dense && f.shape.len() == 2 && f.shape[0] == f.shape[1] {
            findings.push(
                Finding::new(
                    "square-matrix",
                    Severity::Note,
                    format!(
                        "is square ({0} × {0}), so a transposed copy would have the same shape: the dimension audit cannot rule that out; a gradient or value check can",
                        f.shape[0]
                    ),
                )
                .tensor(&f.name)
                .layer(layer),
            );
        }
        if let Some(t) = t.filter(|t| dense && f.role == Role::Bias && t.shape.len() == 2) {
            findings.push(
                Finding::new(
                    "bias-as-matrix",
                    Severity::Note,
                    format!(
                        "is stored as a {} matrix; read as a vector of {}",
                        shape_text(&t.shape),
                        f.shape[0]
                    ),
                )
                .tensor(&f.name)
                .layer(layer),
            );
        }
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
}

/// The layer whose dense tensor of the same role this one's found shape fits while that one's
/// found shape fits this one: the two are swapped, the layers stored in another order.
fn swapped_with(
    desc: &GraphDescription,
    statuses: &[(Option<&Tensor>, Status)],
    k: usize,
    found: &[usize],
) -> Option<usize> {
    let f = &desc.files[k];
    if !is_dense(desc, f.layer) {
        return None;
    }
    desc.files
        .iter()
        .zip(statuses)
        .find(|(o, (t, st))| {
            o.layer != f.layer
                && is_dense(desc, o.layer)
                && o.role_name() == f.role_name()
                && *st != Status::Ok
                && o.fits(found)
                && t.is_some_and(|t| f.fits(&t.shape))
        })
        .map(|(o, _)| o.layer)
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
        (KindSettings::Dense { .. }, storage, role) => dense(desc, f, storage, role, found),
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

/// A dense tensor of the wrong shape: a bias of another length, a bias column missing or extra,
/// a matrix stored transposed.
fn dense(
    desc: &GraphDescription,
    f: &FileTensor,
    storage: &FileStorage,
    role: Role,
    found: &[usize],
) -> (&'static str, String) {
    let layer = f.layer + 1;
    let (inputs, units) = dense_sizes(desc, f.layer);
    match (storage, role, found) {
        (FileStorage::Axes(_), Role::Bias, [k] | [1, k] | [k, 1]) => {
            let hint = if *k == inputs {
                format!(
                    " — {k} is the number of the layer's inputs, so the bias may belong to the layer below"
                )
            } else {
                String::new()
            };
            (
                "bias-wrong-length",
                format!("the bias has {k} entries but layer {layer} has {units} units{hint}"),
            )
        }
        (FileStorage::Augmented, _, &[r, c]) if r == units && c == inputs => (
            "bias-column-missing",
            format!(
                "the bias column is missing: the augmented layout keeps the {units} bias weights in column 0; add them, or store them apart with layout = \"split\""
            ),
        ),
        (FileStorage::Augmented, _, &[r, c]) if r == units && c == inputs + 2 => (
            "bias-column-extra",
            "one column too many: there is a second bias column, or the matrix belongs to a layer with one more input".to_string(),
        ),
        (FileStorage::Augmented, _, &[r, c]) if r == inputs + 1 && c == units => (
            "transposed-matrix",
            "the matrix is stored transposed ((inputs + 1) × units); transpose it, or check whether your code multiplies x·W".to_string(),
        ),
        (FileStorage::Axes(s), Role::Weight, &[r, c]) => {
            let split = s.is_canonical();
            if split && r == units && c == inputs + 1 {
                return (
                    "bias-column-extra",
                    "the weight matrix carries an extra column, likely the bias: that is the augmented layout; set layout = \"augmented\" or drop the column".to_string(),
                );
            }
            if !split && r == inputs + 1 && c == units {
                return (
                    "bias-column-extra",
                    "the weight matrix carries an extra row, likely the bias: store the bias apart, or drop the row".to_string(),
                );
            }
            if [c, r] == [f.shape[0], f.shape[1]] {
                return (
                    "transposed-matrix",
                    format!(
                        "the matrix is stored transposed; transpose it, or if every layer is stored this way, set layout = \"{}\"",
                        if split { "split-transposed" } else { "split" }
                    ),
                );
            }
            dense_plain(layer, inputs, units)
        }
        _ => dense_plain(layer, inputs, units),
    }
}

fn dense_plain(layer: usize, inputs: usize, units: usize) -> (&'static str, String) {
    (
        "wrong-shape",
        format!(
            "layer {layer} maps {inputs} inputs to {units} units; check the description's unit counts against the file"
        ),
    )
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
