//! The report of `plumb compare` on a description of any kind (the layer graph): the gradient
//! file read through the description's file tensors and judged on the layer graph, with the worst
//! place in the layer's own terms. A dense description's gradient is judged in the file's own
//! tensors ([`crate::judge_files`]: its layout's names, augmented matrices, transposed weights);
//! any other kind's is converted from its declared storage to the graph's canonical shape, as its
//! parameter is, and judged by [`crate::judge_graph`].

use std::collections::{HashMap, HashSet};
use std::path::Path;

use ndarray::{Array2, ArrayD, Ix2, IxDyn};
use plumb_engine::graph::{Dense, GraphError, Shape};
use plumb_fd::report::GraphLoaded;
use plumb_fd::{CheckConfig, Method, Precision, Status, check_graph};
use plumb_formats::{AxisOrder, DType, FileStorage, GraphDescription, TensorFile};
use plumb_report::{SCHEMA_VERSION, Verdict};

use plumb_report::Finding;

use super::{
    Certification, CompareError, CompareReport, ConventionsReport, LossReport, NameReport,
    TensorReport, epsilon, loss_verdict, mismatch_finding, name_findings, stored_dtypes,
    tensor_report, uncertified_finding, widened_finding,
};
use crate::file_view::expected_files;
use crate::names::NameList;
use crate::{
    Expected, INPUT, NameError, Tolerances, bind_gradient, judge_files, judge_graph, may_bind,
    parse_map,
};
use plumb_formats::Tensor;

/// The outside gradient per graph tensor, canonical shapes: a file tensor of the declared shape is
/// converted from its storage; one of another shape is passed as found, to be judged only against
/// hypotheses of that shape; an absent one is `None`.
fn canonical(desc: &GraphDescription, outside: &[Tensor]) -> Vec<Option<ArrayD<f64>>> {
    let mut out: Vec<Option<ArrayD<f64>>> = vec![None; desc.graph.tensors().len()];
    for f in &desc.files {
        let Some(u) = outside.iter().find(|u| u.name == f.name) else {
            continue;
        };
        if !f.fits(&u.shape) {
            let found = ArrayD::from_shape_vec(IxDyn(&u.shape), u.data.clone());
            out[f.tensors[0]] = found.ok();
            continue;
        }
        let array = ArrayD::from_shape_vec(IxDyn(&f.shape), u.data.clone())
            .expect("a fitting shape holds the file shape's values");
        match &f.storage {
            FileStorage::Axes(s) => out[f.tensors[0]] = Some(s.to_canonical(&array)),
            FileStorage::Augmented => {
                let matrix = array.into_dimensionality::<Ix2>().expect("two axes");
                let (w, b) = Dense::split(&matrix);
                out[f.tensors[0]] = Some(w.into_dyn());
                out[f.tensors[1]] = Some(b.into_dyn());
            }
        }
    }
    out
}

/// The reference certified by the complex step on the default sample of the graph's parameters.
pub fn certify_graph(loaded: &GraphLoaded, seed: u64) -> Result<Certification, CompareError> {
    let mut cfg = CheckConfig::new(Method::ComplexStep, Precision::F64);
    cfg.directions = Some(0);
    cfg.seed = seed;
    let b = &loaded.batch;
    let r = check_graph(
        &loaded.desc.graph,
        &loaded.params,
        b.x.view(),
        b.y.view(),
        &cfg,
        &|_, _| {},
    )?;
    Ok(Certification {
        method: "complex-step".into(),
        checked: r.coverage.checked,
        parameters: r.coverage.parameters,
        max_rel_error: r.coords.iter().map(|c| c.rel_error).fold(0.0, f64::max),
        certified: r.coords.iter().all(|c| c.status != Status::Mismatch),
    })
}

/// Compares the outside gradient `file` (read from `gradient`) of a network of any kind with the
/// reference on the layer graph, and builds the report: names matched against the description's
/// file tensors (and `input`, the input gradient, shape (m, *input) in the data's axis order),
/// each tensor held to the precision it was stored or computed in. Tensors are reported under the
/// file's names and shapes for a dense description, else under the graph's names
/// (`layer.suffix`) in canonical shape; the input gradient last.
pub fn compare_graph_report(
    loaded: &GraphLoaded,
    gradient: &Path,
    file: TensorFile,
    map: &str,
    loss: Option<f64>,
    seed: u64,
) -> Result<CompareReport, CompareError> {
    let desc = &loaded.desc;
    let graph = &desc.graph;
    let names_error = |error| CompareError::Names {
        path: gradient.to_path_buf(),
        error,
    };
    let (widened, dtypes) = stored_dtypes(&file);
    let f64_listed = file.unread.iter().any(|u| u.dtype == DType::F64);
    let single = !dtypes.contains(&DType::F64) && !f64_listed;
    let map = parse_map(map).map_err(names_error)?;
    let expected = expected_files(desc, Some(graph_input_shape(loaded)));
    // Every name the file holds, read or listed, for a map that names none of them.
    let held: Vec<String> = file.listing().map(|(name, ..)| name.to_string()).collect();
    let TensorFile {
        format,
        tensors: outside,
        unread,
    } = file;
    let (outside, bindings) = bind_gradient(&expected, outside, &map)
        .map_err(|error| match error {
            NameError::MapNoTensor {
                file, parameter, ..
            } => NameError::MapNoTensor {
                file,
                parameter,
                held: NameList(held),
            },
            error => error,
        })
        .map_err(names_error)?;
    // Each graph tensor is held to the precision its file tensor was stored (or computed) in.
    let eps_file: HashMap<&str, f64> = outside
        .iter()
        .zip(&dtypes)
        .map(|(t, d)| (t.name.as_str(), epsilon(*d)))
        .collect();
    let specs = graph.tensors();
    let mut eps_of: HashMap<String, f64> = HashMap::new();
    for f in &desc.files {
        if let Some(&e) = eps_file.get(f.name.as_str()) {
            eps_of.extend(f.tensors.iter().map(|&t| (specs[t].name.clone(), e)));
        }
    }
    // The file's own names too (a dense description is judged in them), and the input gradient.
    eps_of.extend(eps_file.iter().map(|(n, &e)| (n.to_string(), e)));
    let tol_of =
        |name: &str| Tolerances::for_epsilon(eps_of.get(name).copied().unwrap_or(f64::EPSILON));
    let (tensors, mut findings) =
        judge_graph_gradient(loaded, &outside, &tol_of).map_err(|message| CompareError::Input {
            path: gradient.to_path_buf(),
            message,
        })?;
    let input = outside.iter().find(|u| u.name == INPUT);
    // Names: against the file tensors, the input gradient optional.
    let files: Vec<Expected> = expected
        .into_iter()
        .filter(|e| e.name != INPUT || input.is_some())
        .collect();
    let bound = TensorFile {
        format,
        tensors: outside,
        unread,
    };
    findings.extend(name_findings(&files, &bound));
    if widened {
        findings.push(widened_finding());
    }
    let reference = certify_graph(loaded, seed)?;
    if !reference.certified {
        findings.push(uncertified_finding());
    }
    let config = graph.loss_config();
    let loss = loss.map(|v| {
        let (r, f) = judge_graph_loss(loaded, v, single);
        findings.extend(f);
        r
    });
    let tol = Tolerances::for_precision(single);
    Ok(CompareReport {
        verdict: Verdict::of(&findings),
        schema_version: SCHEMA_VERSION,
        command: "compare",
        description: desc.path.clone(),
        weights: loaded.weights_source.clone(),
        data: loaded.data_source.clone(),
        gradient: gradient.to_path_buf(),
        precision: if single { "f32" } else { "f64" },
        precision_from: if widened { "values" } else { "dtype" },
        conventions: ConventionsReport::of_config(&config),
        names: bindings.iter().map(NameReport::of).collect(),
        tolerance: tol.agreement,
        residual_tolerance: tol.residual,
        reference,
        loss,
        tensors,
        findings,
    })
}

/// The gradient file at `path` that `compare` judges against `loaded` with the `--map` pairs
/// `map`: the tensors a parameter or the input gradient can be bound to ([`may_bind`]) read,
/// any other listed from its header alone, its values neither inflated nor widened.
pub fn read_gradient(
    loaded: &GraphLoaded,
    path: &Path,
    map: &str,
) -> Result<TensorFile, CompareError> {
    let map = parse_map(map).map_err(|error| CompareError::Names {
        path: path.to_path_buf(),
        error,
    })?;
    let expected = expected_files(&loaded.desc, Some(graph_input_shape(loaded)));
    let parameters: HashSet<&str> = expected.iter().map(|e| e.name.as_str()).collect();
    let wanted = |name: &str| may_bind(&parameters, &map, name);
    Ok(plumb_formats::read_tensors_for(path, &wanted)?)
}

/// The shape of the batch's input gradient as a program or a file gives it: (m, *input) in the
/// data's axis order.
pub fn graph_input_shape(loaded: &GraphLoaded) -> Vec<usize> {
    let zeros = Array2::<f64>::zeros((loaded.batch.len(), loaded.desc.graph.input().size()));
    loaded
        .desc
        .input_tensor_in(zeros.view(), loaded.order)
        .shape
}

/// An outside loss of a network of any kind against the reference (data term and L2 term), with
/// the likely reason when they differ (shared by compare and probe).
pub fn judge_graph_loss(
    loaded: &GraphLoaded,
    outside: f64,
    single: bool,
) -> (LossReport, Option<Finding>) {
    let graph = &loaded.desc.graph;
    let b = &loaded.batch;
    let config = graph.loss_config();
    let total = graph.loss(&loaded.params, b.x.view(), b.y.view());
    let l2 = config.l2_factor(b.len())
        * loaded
            .params
            .iter()
            .enumerate()
            .filter(|(t, _)| graph.decays(*t))
            .map(|(_, p)| p.iter().map(|w| w * w).sum::<f64>())
            .sum::<f64>();
    loss_verdict(
        outside,
        (total - l2, l2),
        b.len(),
        config.reduction,
        config.l2_divisor,
        single,
    )
}

/// An outside gradient of a network of any kind against the reference, with the diagnosis
/// (shared by compare and probe): `outside` holds the description's file tensors under their
/// file names, in their declared storage (a tensor of another shape is judged only against
/// hypotheses of that shape; an absent one is reported absent), and optionally `input`, the input
/// gradient of shape [`graph_input_shape`]. Each tensor is held to `tol_of(its name)`. A dense
/// description's are judged and reported as the file's tensors (names, shapes, layout); any other
/// kind's under the graph's names in canonical shape. The input gradient comes last; a finding
/// per wrong tensor. `Err` says what is wrong with the input gradient's shape or the batch.
pub fn judge_graph_gradient(
    loaded: &GraphLoaded,
    outside: &[Tensor],
    tol_of: &dyn Fn(&str) -> Tolerances,
) -> Result<(Vec<TensorReport>, Vec<Finding>), String> {
    let desc = &loaded.desc;
    let graph = &desc.graph;
    let b = &loaded.batch;
    let specs = graph.tensors();
    let input_shape = graph_input_shape(loaded);
    let input = match outside.iter().find(|u| u.name == INPUT) {
        None => None,
        Some(u) if u.shape != input_shape => {
            return Err(format!(
                "tensor `{INPUT}` (the input gradient) has shape {}, but the batch's input gradient is {} (samples, then the input's axes in the data's order); write it so, or leave it out",
                super::shape(&u.shape),
                super::shape(&input_shape)
            ));
        }
        Some(u) => Some(input_matrix(desc, u, loaded.order)),
    };
    if desc.is_dense() {
        return judge_file_gradient(loaded, outside, tol_of);
    }
    let params = canonical(desc, outside);
    let judged = judge_graph(
        graph,
        &loaded.params,
        b.x.view(),
        b.y.view(),
        &params,
        input.as_ref().map(|a| a.view()),
        tol_of,
    )
    .map_err(|e: GraphError| e.to_string())?;
    // The canonical tensors, for the worst entry's index.
    let mut given: Vec<Tensor> = specs
        .iter()
        .zip(&params)
        .filter_map(|(t, p)| {
            p.as_ref().map(|p| {
                Tensor::new(
                    t.name.clone(),
                    p.shape().to_vec(),
                    p.iter().copied().collect(),
                )
            })
        })
        .collect();
    if let Some(dx) = &input {
        given.push(Tensor::new(
            INPUT,
            vec![dx.nrows(), dx.ncols()],
            dx.iter().copied().collect(),
        ));
    }
    let mut findings = Vec::new();
    let mut tensors = Vec::new();
    for (t, j) in judged.iter().enumerate() {
        let report = tensor_report(j, &given, specs.get(t).map(|s| s.layer + 1));
        if report.verdict == Verdict::Fail {
            findings.push(mismatch_finding(&report, report.layer));
        }
        tensors.push(report);
    }
    Ok((tensors, findings))
}

/// [`judge_graph_gradient`] of a dense description: in the file's own tensors.
fn judge_file_gradient(
    loaded: &GraphLoaded,
    outside: &[Tensor],
    tol_of: &dyn Fn(&str) -> Tolerances,
) -> Result<(Vec<TensorReport>, Vec<Finding>), String> {
    let desc = &loaded.desc;
    let b = &loaded.batch;
    let judged = judge_files(
        desc,
        &loaded.params,
        b.x.view(),
        b.y.view(),
        loaded.order,
        outside,
        tol_of,
    )
    .map_err(|e| e.to_string())?;
    let mut findings = Vec::new();
    let mut tensors = Vec::new();
    for (f, j) in judged.iter().enumerate() {
        let report = tensor_report(j, outside, desc.files.get(f).map(|f| f.layer + 1));
        if report.verdict == Verdict::Fail {
            findings.push(mismatch_finding(&report, report.layer));
        }
        tensors.push(report);
    }
    Ok((tensors, findings))
}

/// The input gradient as the graph holds it (m × input size): a channels-last file's channel
/// axis moved back to follow the samples (the inverse of `GraphDescription::input_tensor_in`).
fn input_matrix(desc: &GraphDescription, u: &Tensor, order: AxisOrder) -> Array2<f64> {
    let array = ArrayD::from_shape_vec(IxDyn(&u.shape), u.data.clone()).expect("shape checked");
    let spatial = matches!(
        desc.graph.input(),
        Shape::Signal { .. } | Shape::Image { .. }
    );
    let n = u.shape.len();
    let array = if order == AxisOrder::ChannelsLast && spatial {
        // (m, *spatial, c) → (m, c, *spatial).
        let axes: Vec<usize> = std::iter::once(0).chain([n - 1]).chain(1..n - 1).collect();
        array.permuted_axes(IxDyn(&axes))
    } else {
        array
    };
    let m = u.shape[0];
    let values: Vec<f64> = array.iter().copied().collect();
    Array2::from_shape_vec((m, values.len() / m.max(1)), values).expect("m rows")
}
