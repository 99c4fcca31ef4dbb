//! The release audit on the layer graph, for a description of any kind (dense ones included):
//! every kind's health measures, as the findings and tables of the one [`Audit`] report (same
//! codes, same rules, same thresholds; the kinds add their own measures). Findings name the
//! weight file's own tensors (an augmented dense matrix `W1`, not the graph's `layer1.weight`).

use ndarray::{ArrayD, ArrayView2};
use plumb_engine::graph::{Graph, GraphError, LayerScalar, Node, Role};
use plumb_engine::{Activation, Batch, Init, Inputs, Rng};
use std::path::Path;

use plumb_formats::{DType, FileStorage, GraphDescription, Layout, TensorFile};
use plumb_report::{Finding, Verdict};

use crate::graph_health::{
    InsideHealth, KindThresholds, collapsed_scales, graph_symmetry, inside_findings, inside_health,
    output_units,
};
use crate::graph_shapes::find;
use crate::release::{flow_findings, health_findings, init_findings, symmetry_findings};
use crate::robust::{largest, norm, std_of};
use crate::shapes::by_name;
use crate::values::{Values, values_findings};
use crate::{
    Audit, GraphShapeAudit, LayerFlow, LayerHealth, LayerShapes, LayerTerms, Status, TensorShape,
    Thresholds, audit_graph_shapes, correct_across_layers, sigma_max, tensor_init, unit_health,
    verdict_at,
};

/// A graph with the parameters a weight file gave it.
#[derive(Clone, Copy, Debug)]
pub struct GraphWeights<'a> {
    pub graph: &'a Graph,
    /// One tensor per [`Graph::tensors`] entry, canonical shapes, widened to f64.
    pub params: &'a [ArrayD<f64>],
    /// The dtype each tensor was stored in.
    pub dtypes: &'a [DType],
}

impl GraphWeights<'_> {
    /// Whether the parameters and dtypes fit the graph.
    pub fn check(&self) -> Result<(), GraphError> {
        self.graph.check_params(self.params)?;
        if self.dtypes.len() != self.params.len() {
            return Err(GraphError::TensorCount {
                found: self.dtypes.len(),
                expected: self.params.len(),
            });
        }
        Ok(())
    }
}

/// The shape audit of tensors already fitted to the graph: every tensor present with its
/// expected shape. A caller that read a file with tensors that do not fit reports those through
/// its own shape audit instead.
pub fn fitted_shapes(w: &GraphWeights) -> GraphShapeAudit {
    let g = w.graph;
    let layers = g
        .nodes()
        .iter()
        .enumerate()
        .map(|(j, node)| {
            let tensors: Vec<TensorShape> = node
                .tensors()
                .map(|t| {
                    let spec = &g.tensors()[t];
                    TensorShape {
                        name: spec.name.clone(),
                        role: role_name(spec.spec.role),
                        expected: spec.spec.shape.clone(),
                        found: Some(spec.spec.shape.clone()),
                        dtype: w.dtypes.get(t).map(DType::name),
                        status: Status::Ok,
                    }
                })
                .collect();
            LayerShapes {
                layer: j + 1,
                terms: LayerTerms::of_node(node, false),
                parameters: tensors
                    .iter()
                    .map(|t| t.expected.iter().product::<usize>())
                    .sum(),
                tensors,
                verdict: "pass",
            }
        })
        .collect();
    GraphShapeAudit {
        verdict: Verdict::Pass,
        layout: Layout::Split,
        detected_layout: None,
        layers,
        unexpected: Vec::new(),
        total_parameters: g.parameters(),
        findings: Vec::new(),
    }
}

fn role_name(role: Role) -> &'static str {
    match role {
        Role::Weight => "weight",
        Role::Bias => "bias",
        Role::Scale => "scale",
        Role::Shift => "shift",
        Role::Table => "table",
    }
}

/// Audits a graph's weights on a probe batch (x of the input's size, y of the output's), after
/// the shape audit `shapes` that fitted them: values, duplicate units and channels, collapsed norm
/// scales, unit and channel health, the kinds' inside measures (gates, heads, table rows), the
/// initialisation scale per weight tensor (and the KS test against `claimed`, Holm-corrected
/// across the tensors), and the gradient's flow through the layers. Findings name the graph's
/// tensors. Parameters or a batch that do not fit the graph are an error, as they are for the
/// passes.
pub fn audit_graph(
    w: &GraphWeights,
    shapes: GraphShapeAudit,
    probe: &Batch,
    claimed: Option<Init>,
    t: &Thresholds,
    k: &KindThresholds,
    seed: u64,
) -> Result<Audit, GraphError> {
    w.check()?;
    w.graph.check_batch(probe.x.view(), probe.y.view())?;
    let mut findings = shapes.findings.clone();
    findings.extend(values_findings(&graph_values(w), t));
    let names: Vec<String> = w.graph.tensors().iter().map(|s| s.name.clone()).collect();
    let probe = Probe {
        x: Inputs::Own(probe.x.view()),
        y: probe.y.view(),
    };
    Ok(measure(
        w, &names, shapes, findings, probe, claimed, t, k, seed,
    ))
}

/// Audits a weight file (read from `path`) against a description of any kind on a probe batch:
/// the shape audit; the values of every file tensor present in a float dtype (as the file holds
/// it, indices in its own axis order); then, when every tensor fits, the measures of
/// [`audit_graph`] on the file's tensors in canonical shapes, each with the dtype the file
/// stored it in, the findings naming the file's tensors. When the tensors do not fit, the report
/// holds the shape and value findings and says what could not be checked. The probe's x may be
/// f32 as a data file stored it ([`plumb_engine::Features`]): the probe pass of an f32 file then
/// reads it without a copy.
#[allow(clippy::too_many_arguments)]
pub fn audit_graph_file<X>(
    desc: &GraphDescription,
    file: &TensorFile,
    path: &Path,
    probe: &Batch<X>,
    claimed: Option<Init>,
    t: &Thresholds,
    k: &KindThresholds,
    seed: u64,
) -> Result<Audit, GraphError>
where
    for<'a> &'a X: Into<Inputs<'a, f64>>,
{
    let probe = Probe {
        x: (&probe.x).into(),
        y: probe.y.view(),
    };
    match probe.x {
        Inputs::Own(x) => desc.graph.check_batch(x, probe.y)?,
        Inputs::F32(x) => desc.graph.check_batch(x, probe.y)?,
    }
    let shapes = audit_graph_shapes(desc, Some(file));
    let mut findings = shapes.findings.clone();
    findings.extend(values_findings(&file_values(desc, file), t));
    let params = match shapes.verdict {
        Verdict::Pass => desc.read_params(file, path).map_err(|e| e.to_string()),
        _ => Err("the tensors do not fit the description".into()),
    };
    let params = match params {
        Ok(p) => p,
        Err(why) => {
            return Ok(Audit {
                verdict: verdict_at(&findings, t.fail_on),
                fail_on: t.fail_on,
                shapes,
                health: Vec::new(),
                init: Vec::new(),
                flow: Vec::new(),
                inside: Vec::new(),
                skipped: vec![format!(
                    "duplicates, unit health, the layers' inside measures, initialisation and flow: {why}"
                )],
                findings,
            });
        }
    };
    let dtypes = stored_dtypes(desc, file);
    let w = GraphWeights {
        graph: &desc.graph,
        params: &params,
        dtypes: &dtypes,
    };
    Ok(measure(
        &w,
        &file_names(desc),
        shapes,
        findings,
        probe,
        claimed,
        t,
        k,
        seed,
    ))
}

/// The name of the file tensor that holds each graph tensor (an augmented dense matrix holds
/// its layer's weight and bias).
pub fn file_names(desc: &GraphDescription) -> Vec<String> {
    let mut out: Vec<String> = desc
        .graph
        .tensors()
        .iter()
        .map(|s| s.name.clone())
        .collect();
    for f in &desc.files {
        for &t in &f.tensors {
            out[t] = f.name.clone();
        }
    }
    out
}

/// Kinds whose inside measures ([`plumb_engine::graph::Kind::inside`]) read an f64 pass.
fn has_inside(node: &Node) -> bool {
    matches!(
        node.layer.kind(),
        "rnn" | "lstm" | "gru" | "attention" | "embedding"
    )
}

/// A probe batch as the audit reads it: x in f64, or as the f32 a data file stored it in (an f32
/// probe pass then reads it without a copy, an f64 one widens it).
#[derive(Clone, Copy)]
struct Probe<'a> {
    x: Inputs<'a, f64>,
    y: ArrayView2<'a, f64>,
}

impl Probe<'_> {
    fn len(&self) -> usize {
        self.x.nrows()
    }
}

/// Everything after the values: duplicates, norm scales, and on a finite file the probe pass's
/// unit health and inside measures, the initialisation scale and the flow. `names[t]` is the
/// name findings give graph tensor t.
#[allow(clippy::too_many_arguments)]
fn measure(
    w: &GraphWeights,
    names: &[String],
    shapes: GraphShapeAudit,
    mut findings: Vec<Finding>,
    probe: Probe<'_>,
    claimed: Option<Init>,
    t: &Thresholds,
    k: &KindThresholds,
    seed: u64,
) -> Audit {
    let (g, params) = (w.graph, w.params);
    let nodes = g.nodes();
    let last = nodes.len() - 1;
    // The tensor a layer's findings name: its first weight (or table), else its first tensor.
    let named: Vec<Option<String>> = nodes
        .iter()
        .map(|n| {
            let mut ts = n.tensors();
            let weight = ts
                .clone()
                .find(|&t| matches!(g.tensors()[t].spec.role, Role::Weight | Role::Table));
            weight.or_else(|| ts.next()).map(|t| names[t].clone())
        })
        .collect();
    for s in graph_symmetry(g, params, t.symmetry_tolerance) {
        let j = s.layer - 1;
        let channels = output_units(&nodes[j].layer.output()).name == "channel";
        let tensor = named[j].as_deref().unwrap_or_default();
        findings.extend(symmetry_findings(&s, tensor, j == last, channels));
    }
    let mut inside = Vec::new();
    for (h, tensor) in collapsed_scales(g, params, k) {
        // A norm's scale runs over its input's channels, or its features.
        let noun = match output_units(&nodes[h.layer - 1].layer.input()).name {
            "channel" => "channel",
            _ => "feature",
        };
        let tensor = g
            .tensors()
            .iter()
            .position(|s| s.name == tensor)
            .map_or(tensor, |i| names[i].clone());
        findings.extend(inside_findings(&h, &tensor, noun, probe.len(), t));
        inside.push(h);
    }
    let finite = params.iter().all(|p| p.iter().all(|v| v.is_finite()));
    let mut skipped = Vec::new();
    let (mut health, mut init, mut flow) = (Vec::new(), Vec::new(), Vec::new());
    if !finite {
        skipped.push(
            "unit health, the layers' inside measures, initialisation and flow: the weights hold non-finite values".into(),
        );
    } else {
        // A file stored in f32 (or narrower) runs its probe pass in f32, as it would be used,
        // at half the cost, unless a layer's inside measures need an f64 pass; should that pass
        // overflow where f64 might not, it runs again in f64.
        let single = w
            .dtypes
            .iter()
            .all(|d| matches!(d, DType::F32 | DType::F16 | DType::BF16))
            && !nodes.iter().any(has_inside);
        let in_f32 = single
            .then(|| {
                let p32: Vec<ArrayD<f32>> = params.iter().map(|p| p.mapv(|v| v as f32)).collect();
                let (x, y) = (probe.x.in_f32(), probe.y.mapv(|v| v as f32));
                probe_pass(g, &p32, params, x.view(), y.view(), &named, t, seed)
            })
            .flatten();
        let (h, f, mut pass_findings, ins) = match in_f32 {
            Some(done) => done,
            None => {
                let wide = probe.x.in_f64();
                let (x, y) = (wide.view(), probe.y);
                let trace = g.forward(params, x);
                let inside_of = |j: usize, node: &Node| {
                    let input = if j == 0 {
                        x
                    } else {
                        trace.outputs[j - 1].view()
                    };
                    node.layer.inside(input, &trace.steps[j])
                };
                probe_pass_with(g, params, params, x, y, &trace, &named, t, seed, inside_of)
            }
        };
        (health, flow) = (h, f);
        // The inside measures' findings and the health findings, layer by layer, as before.
        findings.append(&mut pass_findings);
        inside.extend(ins);
        for (i, spec) in g.tensors().iter().enumerate() {
            if spec.spec.role != Role::Weight {
                continue;
            }
            let node = &nodes[spec.layer];
            let act = node.layer.inner_activation().unwrap_or(node.activation);
            let values: Vec<f64> = params[i].iter().copied().collect();
            init.push(tensor_init(
                spec.layer + 1,
                &names[i],
                &values,
                (spec.spec.fan_in, spec.spec.fan_out),
                act.kink().is_some() || node.activation.kink().is_some(),
                claimed,
                t.ks_alpha,
            ));
        }
        correct_across_layers(&mut init, t.ks_alpha);
        for li in &init {
            let node = &nodes[li.layer - 1];
            let act = node.layer.inner_activation().unwrap_or(node.activation);
            init_findings(li, act.name(), t, &mut findings);
        }
        flow_findings(&flow, t, &mut findings);
    }
    Audit {
        verdict: verdict_at(&findings, t.fail_on),
        fail_on: t.fail_on,
        shapes,
        health,
        init,
        flow,
        inside,
        skipped,
        findings,
    }
}

/// What [`probe_pass_with`] gives: unit health, flow, their findings, the inside measures.
type Pass = (
    Vec<LayerHealth>,
    Vec<LayerFlow>,
    Vec<Finding>,
    Vec<InsideHealth>,
);

/// The probe pass in the narrower scalar `S` of a network without inside measures, `None` when
/// its outputs overflow.
#[allow(clippy::too_many_arguments)]
fn probe_pass<S: LayerScalar>(
    g: &Graph,
    params: &[ArrayD<S>],
    wide: &[ArrayD<f64>],
    x: ArrayView2<S>,
    y: ArrayView2<S>,
    named: &[Option<String>],
    t: &Thresholds,
    seed: u64,
) -> Option<Pass> {
    let trace = g.forward(params, x);
    let finite = trace
        .outputs
        .iter()
        .all(|o| o.iter().all(|v| v.re().is_finite()));
    let no_inside = |_: usize, _: &Node| Vec::new();
    finite.then(|| probe_pass_with(g, params, wide, x, y, &trace, named, t, seed, no_inside))
}

/// Unit health and the inside measures per layer (hidden layers only for health: a confident
/// output layer is not a defect), with their findings, and the flow, from a forward pass
/// `trace` in the scalar `S`; `wide` are the parameters in f64 for the singular values.
#[allow(clippy::too_many_arguments)]
fn probe_pass_with<S: LayerScalar>(
    g: &Graph,
    params: &[ArrayD<S>],
    wide: &[ArrayD<f64>],
    x: ArrayView2<S>,
    y: ArrayView2<S>,
    trace: &plumb_engine::graph::Trace<S>,
    named: &[Option<String>],
    t: &Thresholds,
    seed: u64,
    inside_of: impl Fn(usize, &Node) -> Vec<plumb_engine::graph::Inside>,
) -> Pass {
    let nodes = g.nodes();
    let last = nodes.len() - 1;
    let samples = x.nrows();
    let (mut health, mut findings, mut inside) = (Vec::new(), Vec::new(), Vec::new());
    for (j, node) in nodes.iter().enumerate() {
        let step = &trace.steps[j];
        for h in inside_health(g, j, &inside_of(j, node), t) {
            let tensor = named[j].as_deref().unwrap_or_default();
            findings.extend(inside_findings(&h, tensor, "unit", samples, t));
            inside.push(h);
        }
        if j == last || !measured(node) {
            continue;
        }
        let h = unit_health(
            j + 1,
            node.activation,
            step.out.view(),
            trace.outputs[j].view(),
            output_units(&node.layer.output()),
            t.saturation,
            t.saturated_fraction,
        );
        health_findings(&h, named[j].as_deref(), t, samples, &mut findings);
        health.push(h);
    }
    let flow = graph_flow(g, params, wide, x, y, trace, seed);
    (health, flow, findings, inside)
}

/// The dtype the file stored each graph tensor in (an augmented dense matrix gives its weight
/// and bias the matrix's).
fn stored_dtypes(desc: &GraphDescription, file: &TensorFile) -> Vec<DType> {
    let index = by_name(file);
    let mut out = vec![DType::F64; desc.graph.tensors().len()];
    for f in &desc.files {
        if let Some(found) = find(desc, file, &index, &f.name) {
            for &t in &f.tensors {
                out[t] = found.dtype;
            }
        }
    }
    out
}

/// The values of every file tensor the description uses that the file holds in a float dtype,
/// as the file holds them (an augmented matrix's column 0 is its bias).
fn file_values(desc: &GraphDescription, file: &TensorFile) -> Vec<Values> {
    let index = by_name(file);
    desc.files
        .iter()
        .filter_map(|f| {
            let tensor = find(desc, file, &index, &f.name)?;
            if !tensor.dtype.is_float() {
                return None; // the shape audit names it
            }
            let data = &tensor.data;
            let (weights, bias) = match (&f.storage, f.role) {
                (FileStorage::Augmented, _) => {
                    let cols = f.shape[1].max(1);
                    let (mut w, mut b) = (Vec::new(), Vec::new());
                    for (k, v) in data.iter().enumerate() {
                        if k % cols == 0 {
                            b.push(*v)
                        } else {
                            w.push(*v)
                        }
                    }
                    (Some(w), Some(b))
                }
                (_, Role::Weight | Role::Table) => (Some(data.clone()), None),
                (_, Role::Bias) => (None, Some(data.clone())),
                _ => (None, None),
            };
            Some(Values {
                name: f.name.clone(),
                layer: f.layer + 1,
                shape: tensor.shape.clone(),
                dtype: tensor.dtype,
                data: data.clone(),
                weights,
                bias,
            })
        })
        .collect()
}

/// Whether unit health measures anything after this activation (or the layer has weights whose
/// units the table should show).
fn measured(node: &Node) -> bool {
    !node.tensors().is_empty()
        || node.activation.kink().is_some()
        || matches!(node.activation, Activation::Sigmoid | Activation::Tanh)
}

/// Every tensor's values as the value checks read them: weights and tables may not be one
/// value throughout, biases are noted when all zero.
fn graph_values(w: &GraphWeights) -> Vec<Values> {
    w.graph
        .tensors()
        .iter()
        .zip(w.params)
        .zip(w.dtypes)
        .map(|((spec, p), &dtype)| {
            let data: Vec<f64> = p.iter().copied().collect();
            let role = spec.spec.role;
            Values {
                name: spec.name.clone(),
                layer: spec.layer + 1,
                shape: spec.spec.shape.clone(),
                dtype,
                weights: matches!(role, Role::Weight | Role::Table).then(|| data.clone()),
                bias: (role == Role::Bias).then(|| data.clone()),
                data,
            }
        })
        .collect()
}

/// Per layer with parameters: its activations' spread, its gradient's norm and RMS over all its
/// tensors, and the largest singular value of its first weight (or table) as a matrix of rows ×
/// the rest (a 1-D scale, a diagonal, gives its largest |entry|). The gradient is the backward
/// pass of the probe pass `trace` in its scalar; the figures are taken in f64 on the exactly
/// widened values.
fn graph_flow<S: LayerScalar>(
    g: &Graph,
    params: &[ArrayD<S>],
    wide: &[ArrayD<f64>],
    x: ArrayView2<S>,
    y: ArrayView2<S>,
    trace: &plumb_engine::graph::Trace<S>,
    seed: u64,
) -> Vec<LayerFlow> {
    let (grad, _) = g.backward(params, x, y, trace, None, false);
    let mut rng = Rng::new(seed ^ 0x5_1697);
    g.nodes()
        .iter()
        .enumerate()
        .filter(|(_, n)| !n.tensors().is_empty())
        .map(|(j, node)| {
            let gv: Vec<f64> = node
                .tensors()
                .flat_map(|t| grad[t].iter().map(|v| v.re()).collect::<Vec<_>>())
                .collect();
            let gn = norm(&gv);
            let main = node
                .tensors()
                .find(|&t| matches!(g.tensors()[t].spec.role, Role::Weight | Role::Table))
                .unwrap_or(node.tensors().start);
            let p = &wide[main];
            let sigma = if p.ndim() == 1 {
                largest(p.iter().copied())
            } else {
                let rows = p.shape()[0];
                let m = p
                    .view()
                    .into_shape_with_order((rows, p.len() / rows.max(1)))
                    .expect("standard layout");
                sigma_max(m, &mut rng)
            };
            let a = &trace.outputs[j];
            LayerFlow {
                layer: j + 1,
                activation_std: std_of(|| a.iter().map(|v| v.re())),
                gradient_norm: gn,
                gradient_rms: gn / (gv.len().max(1) as f64).sqrt(),
                sigma_max: sigma,
            }
        })
        .collect()
}
