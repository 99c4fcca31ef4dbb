//! The diagnosis on the layer graph (`plumb_engine::graph`), for every kind.
//!
//! The hypotheses are the catalogue of docs/mistakes.md as departures from the graph's reference
//! backward pass: the mistakes any graph can make go in as [`Hooks`] (the data term's factor and
//! samples, the other loss's output delta, an activation derivative left out or taken at the
//! output in one layer, the L2 term's form), each kind's own mistakes as [`Graph::plant`] in one
//! layer at a time, and the rest (a sign, a transposition, a swap, a missing bias, a fitted
//! factor) are read off the reference gradient. The verdict rule is the one of every source
//! ([`crate::judge`]), shared.
//!
//! Tensors are the graph's, in canonical order and shape, named `layer.suffix`; the input
//! gradient, when given, is one more tensor named [`INPUT`].

use ndarray::{Array2, ArrayD, ArrayView2};
use plumb_engine::graph::{
    Graph, GraphError, Hooks, Planted, Reduction, Regularization, Role, Samples, Shape, Slope,
    Trace,
};
use plumb_engine::{Activation, L2Divisor};

use crate::catalogue::{CONSTANT_FACTOR, Hypothesis, fitted_factor, scaled, slope_text, swaps};
use crate::diagnose::Hypotheses;
use crate::judge::{Expected, TensorJudgement, Tolerances, judge};
use plumb_formats::Tensor;

/// The name the input gradient goes by among the tensors.
pub const INPUT: &str = plumb_formats::INPUT_GRADIENT;

/// A graph at given parameters and batch, with its reference gradient: the source of the graph's
/// hypotheses.
pub struct GraphProblem<'a> {
    graph: &'a Graph,
    params: &'a [ArrayD<f64>],
    x: ArrayView2<'a, f64>,
    y: ArrayView2<'a, f64>,
    trace: Trace<f64>,
    /// Whether the input gradient is among the tensors (last).
    with_input: bool,
    reference: Vec<Tensor>,
}

impl<'a> GraphProblem<'a> {
    /// Checks the parameters and the batch against the graph and computes the reference.
    pub fn new(
        graph: &'a Graph,
        params: &'a [ArrayD<f64>],
        x: ArrayView2<'a, f64>,
        y: ArrayView2<'a, f64>,
        with_input: bool,
    ) -> Result<GraphProblem<'a>, GraphError> {
        graph.check_params(params)?;
        graph.check_batch(x, y)?;
        let trace = graph.forward(params, x);
        let mut p = GraphProblem {
            graph,
            params,
            x,
            y,
            trace,
            with_input,
            reference: Vec::new(),
        };
        p.reference = p.departed(None, &Hooks::REFERENCE);
        Ok(p)
    }

    /// The tensors' names in order (the input gradient last, when it is among them).
    pub fn names(&self) -> Vec<String> {
        self.reference.iter().map(|t| t.name.clone()).collect()
    }

    /// The gradient of a backward pass with a kind's mistake planted and the departures of
    /// `hooks`, as named tensors.
    pub fn departed(&self, planted: Option<&Planted>, hooks: &Hooks) -> Vec<Tensor> {
        let (params, input) = self.graph.backward_hooked(
            self.params,
            self.x,
            self.y,
            &self.trace,
            planted,
            hooks,
            self.with_input,
        );
        self.named(params, input)
    }

    fn named(&self, params: Vec<ArrayD<f64>>, input: Option<Array2<f64>>) -> Vec<Tensor> {
        let mut out: Vec<Tensor> = self
            .graph
            .tensors()
            .iter()
            .zip(params)
            .map(|(t, g)| {
                Tensor::new(
                    t.name.clone(),
                    g.shape().to_vec(),
                    g.iter().copied().collect(),
                )
            })
            .collect();
        if let Some(input) = input {
            out.push(Tensor::new(
                INPUT,
                vec![input.nrows(), input.ncols()],
                input.iter().copied().collect(),
            ));
        }
        out
    }

    fn hooked(&self, change: impl FnOnce(&mut Hooks)) -> Vec<Tensor> {
        let mut hooks = Hooks::REFERENCE;
        change(&mut hooks);
        self.departed(None, &hooks)
    }

    fn m(&self) -> f64 {
        self.x.nrows() as f64
    }

    /// Output vectors per sample: the steps of a per-step output, else 1.
    fn steps(&self) -> usize {
        match self.graph.output() {
            Shape::Sequence { steps, .. } => steps,
            _ => 1,
        }
    }

    /// "layer J (\"name\")", J from 1.
    fn layer_label(&self, j: usize) -> String {
        format!("layer {} (\"{}\")", j + 1, self.graph.nodes()[j].name)
    }

    /// The layers whose activation derivative a backward pass uses between layers: every layer
    /// but the last whose activation is not the identity (whose derivative is 1 wherever taken).
    fn hidden(&self) -> Vec<usize> {
        let nodes = self.graph.nodes();
        (0..nodes.len() - 1)
            .filter(|&j| nodes[j].activation != Activation::Identity)
            .collect()
    }

    fn per_layer(&self, slope: Slope) -> Vec<Hypothesis> {
        self.hidden()
            .into_iter()
            .map(|j| self.in_layer(j, self.hooked(|h| h.slope = Some((j, slope)))))
            .collect()
    }

    fn in_layer(&self, j: usize, tensors: Vec<Tensor>) -> Hypothesis {
        let mut h = Hypothesis::at(self.layer_label(j), tensors);
        h.layer = Some(j);
        h
    }

    /// The data term's factors of the batch-mean codes: (factor, label).
    fn batch_factors(&self, up: bool) -> Vec<(f64, String)> {
        let (m, steps) = (self.m(), self.steps() as f64);
        let reduction = self.graph.loss_config().reduction;
        let mut out = Vec::new();
        match (up, reduction) {
            (true, Reduction::Mean) => {
                let label = if steps > 1.0 {
                    "summed over the samples, averaged over the steps"
                } else {
                    ""
                };
                out.push((m, label.into()));
                if steps > 1.0 {
                    out.push((m * steps, "summed over samples and steps".into()));
                }
            }
            // A sum has no mean to miss.
            (true, Reduction::Sum) => {}
            (false, Reduction::Mean) => out.push((1.0 / m, String::new())),
            (false, Reduction::Sum) => {
                out.push((
                    1.0 / m,
                    "averaged over the batch, though reduction = \"sum\"".into(),
                ));
                if steps > 1.0 {
                    out.push((
                        1.0 / (m * steps),
                        "averaged over samples and steps, though reduction = \"sum\"".into(),
                    ));
                }
            }
        }
        out
    }
}

impl Hypotheses for GraphProblem<'_> {
    fn reference(&self) -> &[Tensor] {
        &self.reference
    }

    fn hypotheses(&self, outside: &[Tensor]) -> Vec<(&'static str, Hypothesis)> {
        let r = &self.reference;
        let config = self.graph.loss_config();
        let mut out: Vec<(&'static str, Hypothesis)> = Vec::new();
        let mut add = |code: &'static str, hs: Vec<Hypothesis>| {
            out.extend(hs.into_iter().map(|h| (code, h)));
        };
        add("sign-flipped", vec![Hypothesis::plain(scaled(r, -1.0))]);
        let mut missing: Vec<Hypothesis> = self
            .batch_factors(true)
            .into_iter()
            .map(|(f, label)| Hypothesis::at(label, self.hooked(|h| h.data_scale = f)))
            .collect();
        if config.reduction == Reduction::Mean {
            missing.push(Hypothesis::at(
                "the L2 term summed too".into(),
                scaled(r, self.m()),
            ));
        }
        add("missing-batch-mean", missing);
        let mut double: Vec<Hypothesis> = self
            .batch_factors(false)
            .into_iter()
            .map(|(f, label)| Hypothesis::at(label, self.hooked(|h| h.data_scale = f)))
            .collect();
        double.push(Hypothesis::at(
            match config.reduction {
                Reduction::Mean => "the L2 term divided by m too",
                Reduction::Sum => {
                    "the whole loss averaged, L2 term included, though reduction = \"sum\""
                }
            }
            .into(),
            scaled(r, 1.0 / self.m()),
        ));
        add("double-batch-mean", double);
        let label = if config.l2_on_bias {
            "the biases not decayed, though l2-on-bias = true"
        } else {
            ""
        };
        add(
            "bias-regularized",
            vec![Hypothesis::at(
                label.into(),
                self.hooked(|h| h.regularization = Regularization::BiasToggled),
            )],
        );
        add(
            "regularization-missing",
            vec![Hypothesis::plain(
                self.hooked(|h| h.regularization = Regularization::Missing),
            )],
        );
        let declared = config.l2_divisor;
        add(
            "regularization-unscaled",
            L2Divisor::ALL
                .into_iter()
                .filter(|&d| d != declared)
                .map(|d| {
                    Hypothesis::at(
                        format!(
                            "{} instead of {}: as if l2-divisor = \"{d}\", not \"{declared}\"",
                            slope_text(d),
                            slope_text(declared)
                        ),
                        self.hooked(|h| h.regularization = Regularization::Divisor(d)),
                    )
                })
                .collect(),
        );
        add(
            "activation-derivative-missing",
            self.per_layer(Slope::Missing),
        );
        add("derivative-at-output", self.per_layer(Slope::AtOutput));
        add(
            "output-delta-mismatch",
            vec![Hypothesis::plain(
                self.hooked(|h| h.other_loss_delta = true),
            )],
        );
        add(
            "transposed",
            vec![Hypothesis::plain(
                r.iter().map(Tensor::transposed).collect(),
            )],
        );
        let biases: Vec<Tensor> = self
            .graph
            .tensors()
            .iter()
            .zip(r)
            .filter(|(t, _)| t.spec.role == Role::Bias)
            .map(|(_, g)| Tensor::new(g.name.clone(), g.shape.clone(), vec![0.0; g.data.len()]))
            .collect();
        add("bias-gradient-missing", vec![Hypothesis::plain(biases)]);
        add(
            "partial-batch",
            vec![
                Hypothesis::at(
                    "last sample".into(),
                    self.hooked(|h| h.samples = Samples::Last),
                ),
                Hypothesis::at(
                    "first sample".into(),
                    self.hooked(|h| h.samples = Samples::First),
                ),
            ],
        );
        add("layers-swapped", swaps(r));
        // Each kind's own mistakes, one layer at a time.
        for (j, node) in self.graph.nodes().iter().enumerate() {
            for &code in node.layer.mistakes() {
                let planted = self
                    .graph
                    .plant(&node.name, code)
                    .expect("a kind's own code plants in its layer");
                let tensors = self.departed(Some(&planted), &Hooks::REFERENCE);
                let mut h = self.in_layer(j, tensors);
                if code == "bias-rows-shifted" && j > 0 {
                    // It shifts the rows of the gradient that reaches the layer below: named for
                    // that layer, whose rows they are.
                    h.label = format!("hidden layer {j}");
                }
                add(code, vec![h]);
            }
        }
        add(CONSTANT_FACTOR, vec![fitted_factor(r, outside)]);
        out
    }
}

/// Judges an outside gradient of a graph tensor by tensor and names the mistake behind each wrong
/// one (docs/mistakes.md).
///
/// `outside` holds one entry per [`Graph::tensors`] entry, in that order and in canonical shape;
/// `None` is a tensor the outside gradient lacks (a missing bias is `bias-gradient-missing`). A
/// tensor of another shape is judged only against hypotheses of that shape (a non-square
/// `transposed`). `input` is the outside input gradient, when there is one (m × input size).
/// `tolerances` gives each tensor's (by name; [`INPUT`] for the input gradient) from the precision
/// it was computed in. The result follows the tensors' order, the input gradient last; each
/// judgement carries where the tensor is worst in its layer's terms ([`TensorJudgement::place`]).
pub fn judge_graph(
    graph: &Graph,
    params: &[ArrayD<f64>],
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    outside: &[Option<ArrayD<f64>>],
    input: Option<ArrayView2<f64>>,
    tolerances: &dyn Fn(&str) -> Tolerances,
) -> Result<Vec<TensorJudgement>, GraphError> {
    let specs = graph.tensors();
    if outside.len() != specs.len() {
        return Err(GraphError::TensorCount {
            found: outside.len(),
            expected: specs.len(),
        });
    }
    let problem = GraphProblem::new(graph, params, x, y, input.is_some())?;
    let mut given: Vec<Tensor> = specs
        .iter()
        .zip(outside)
        .filter_map(|(t, u)| {
            u.as_ref().map(|u| {
                Tensor::new(
                    t.name.clone(),
                    u.shape().to_vec(),
                    u.iter().copied().collect(),
                )
            })
        })
        .collect();
    let mut expected: Vec<Expected> = specs
        .iter()
        .map(|t| Expected {
            name: t.name.clone(),
            layer: t.layer,
            shape: t.spec.shape.clone(),
            bias: t.spec.role == Role::Bias,
        })
        .collect();
    if let Some(dx) = input {
        given.push(Tensor::new(
            INPUT,
            vec![dx.nrows(), dx.ncols()],
            dx.iter().copied().collect(),
        ));
        expected.push(Expected {
            name: INPUT.into(),
            layer: 0,
            shape: vec![x.nrows(), x.ncols()],
            bias: false,
        });
    }
    let mut judged = judge(&problem, &given, &expected, tolerances);
    for (t, j) in judged.iter_mut().enumerate().take(specs.len()) {
        if let Some(c) = &j.comparison {
            let node = &graph.nodes()[specs[t].layer];
            let first = node.tensors().start;
            j.place = Some(node.layer.locate(t - first, c.worst));
        }
    }
    Ok(judged)
}
