//! The release audit on the layer graph: every kind's health measures, as the findings and tables
//! of the one [`Audit`] report the dense audit produces (same codes, same rules, same thresholds;
//! the kinds add their own measures).

use ndarray::ArrayD;
use plumb_engine::graph::{Graph, GraphError, Node, Role};
use plumb_engine::{Activation, Batch, Init, Rng};
use std::path::Path;

use plumb_formats::{DType, FileFormat, GraphDescription, Layout, TensorFile};
use plumb_report::Verdict;

use crate::graph_health::{
    KindThresholds, collapsed_scales, graph_symmetry, inside_findings, inside_health, output_units,
};
use crate::release::{flow_findings, health_findings, init_findings, symmetry_findings};
use crate::robust::{largest, moments, norm};
use crate::values::{Values, values_findings};
use crate::{
    Audit, AuditShapes, LayerFlow, LayerShapes, LayerTerms, ShapeAudit, Status, TensorShape,
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
pub fn fitted_shapes(w: &GraphWeights) -> ShapeAudit {
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
                terms: LayerTerms::of_node(node),
                parameters: tensors
                    .iter()
                    .map(|t| t.expected.iter().product::<usize>())
                    .sum(),
                tensors,
                verdict: "pass",
            }
        })
        .collect();
    ShapeAudit {
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
/// across the tensors), and the gradient's flow through the layers. Parameters or a batch that do
/// not fit the graph are an error, as they are for the passes.
pub fn audit_graph(
    w: &GraphWeights,
    shapes: impl Into<AuditShapes>,
    probe: &Batch,
    claimed: Option<Init>,
    t: &Thresholds,
    k: &KindThresholds,
    seed: u64,
) -> Result<Audit, GraphError> {
    w.check()?;
    let (g, params) = (w.graph, w.params);
    g.check_batch(probe.x.view(), probe.y.view())?;
    let shapes = shapes.into();
    let mut findings = shapes.findings().to_vec();
    findings.extend(values_findings(&values(w), t));
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
            weight
                .or_else(|| ts.next())
                .map(|t| g.tensors()[t].name.clone())
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
        let trace = g.forward(params, probe.x.view());
        for (j, node) in nodes.iter().enumerate() {
            let step = &trace.steps[j];
            let input = if j == 0 {
                probe.x.view()
            } else {
                trace.outputs[j - 1].view()
            };
            let measures = inside_health(g, j, &node.layer.inside(input, step), t);
            for h in measures {
                let tensor = named[j].as_deref().unwrap_or_default();
                findings.extend(inside_findings(&h, tensor, "unit", probe.len(), t));
                inside.push(h);
            }
            // Hidden layers only: a confident output layer is not a defect.
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
            health_findings(&h, named[j].as_deref(), t, probe.len(), &mut findings);
            health.push(h);
        }
        for (i, spec) in g.tensors().iter().enumerate() {
            if spec.spec.role != Role::Weight {
                continue;
            }
            let node = &nodes[spec.layer];
            let act = node.layer.inner_activation().unwrap_or(node.activation);
            let values: Vec<f64> = params[i].iter().copied().collect();
            init.push(tensor_init(
                spec.layer + 1,
                &spec.name,
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
        flow = graph_flow(g, params, &trace.outputs, probe, seed);
        flow_findings(&flow, t, &mut findings);
    }
    Ok(Audit {
        verdict: verdict_at(&findings, t.fail_on),
        fail_on: t.fail_on,
        shapes,
        health,
        init,
        flow,
        inside,
        skipped,
        findings,
    })
}

/// Audits a weight file (read from `path`) against a description of any kind on a probe batch:
/// the graph shapes audit, then, when every tensor fits, [`audit_graph`] on the file's tensors
/// in canonical shapes, each with the dtype the file stored it in. When the tensors do not fit,
/// the report holds the shape findings and says what could not be checked.
#[allow(clippy::too_many_arguments)]
pub fn audit_graph_file(
    desc: &GraphDescription,
    file: &TensorFile,
    path: &Path,
    probe: &Batch,
    claimed: Option<Init>,
    t: &Thresholds,
    k: &KindThresholds,
    seed: u64,
) -> Result<Audit, GraphError> {
    let shapes = audit_graph_shapes(desc, Some(file));
    let params = match shapes.verdict {
        Verdict::Pass => desc.read_params(file, path).map_err(|e| e.to_string()),
        _ => Err("the tensors do not fit the description".into()),
    };
    let params = match params {
        Ok(p) => p,
        Err(why) => {
            let findings = shapes.findings.clone();
            return Ok(Audit {
                verdict: verdict_at(&findings, t.fail_on),
                fail_on: t.fail_on,
                shapes: shapes.into(),
                health: Vec::new(),
                init: Vec::new(),
                flow: Vec::new(),
                inside: Vec::new(),
                skipped: vec![format!(
                    "values, duplicates, unit health, the layers' inside measures, initialisation and flow: {why}"
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
    audit_graph(&w, shapes, probe, claimed, t, k, seed)
}

/// The dtype the file stored each graph tensor in (an augmented dense matrix gives its weight
/// and bias the matrix's).
fn stored_dtypes(desc: &GraphDescription, file: &TensorFile) -> Vec<DType> {
    let single = file.format == FileFormat::Npy && file.tensors.len() == 1 && desc.files.len() == 1;
    let mut out = vec![DType::F64; desc.graph.tensors().len()];
    for f in &desc.files {
        let found = if single {
            file.tensors.first()
        } else {
            file.tensors.iter().find(|t| t.name == f.name)
        };
        if let Some(found) = found {
            for &t in &f.tensors {
                out[t] = found.dtype;
            }
        }
    }
    out
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
fn values(w: &GraphWeights) -> Vec<Values> {
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
/// the rest (a 1-D scale, a diagonal, gives its largest |entry|).
fn graph_flow(
    g: &Graph,
    params: &[ArrayD<f64>],
    outputs: &[ndarray::Array2<f64>],
    probe: &Batch,
    seed: u64,
) -> Vec<LayerFlow> {
    let grad = g.gradient(params, probe.x.view(), probe.y.view(), None);
    let mut rng = Rng::new(seed ^ 0x5_1697);
    g.nodes()
        .iter()
        .enumerate()
        .filter(|(_, n)| !n.tensors().is_empty())
        .map(|(j, node)| {
            let a: Vec<f64> = outputs[j].iter().copied().collect();
            let gv: Vec<f64> = node
                .tensors()
                .flat_map(|t| grad.params[t].iter().copied().collect::<Vec<_>>())
                .collect();
            let gn = norm(&gv);
            let main = node
                .tensors()
                .find(|&t| matches!(g.tensors()[t].spec.role, Role::Weight | Role::Table))
                .unwrap_or(node.tensors().start);
            let p = &params[main];
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
            LayerFlow {
                layer: j + 1,
                activation_std: moments(&a).std,
                gradient_norm: gn,
                gradient_rms: gn / (gv.len().max(1) as f64).sqrt(),
                sigma_max: sigma,
            }
        })
        .collect()
}
