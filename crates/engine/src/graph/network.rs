//! The graph: a chain of layers with named taps, its forward pass (with the branches taken at
//! non-smooth points), its loss and the backward pass down to the input.

use std::collections::HashMap;
use std::ops::Range;

use ndarray::{Array2, ArrayD, ArrayView2, Zip};
use thiserror::Error;

use super::hooks::{Hooks, Regularization, Samples, Slope};
use super::loss::by_rows;
use super::{AnyLayer, LayerScalar, LossConfig, Moved, ParamSpec, Role, Shape, ShapeError, Step};
use crate::{Activation, Inputs, Loss, Scalar};

/// One layer of the graph: its kind, the activation the graph applies after it, its name.
#[derive(Debug)]
pub struct Node {
    /// The description's `name`, default `layerJ` (J counting every layer from 1).
    pub name: String,
    pub layer: Box<dyn AnyLayer>,
    pub activation: Activation,
    /// The index of the layer named by the kind's tap.
    tap: Option<usize>,
    /// This layer's tensors in the graph's list.
    tensors: Range<usize>,
}

impl Node {
    /// The indices of this layer's tensors in [`Graph::tensors`].
    pub fn tensors(&self) -> Range<usize> {
        self.tensors.clone()
    }
}

/// One parameter tensor of the graph: a parameter is identified by (tensor index, flat index).
#[derive(Clone, Debug, PartialEq)]
pub struct TensorSpec {
    /// `prefix.suffix`, the prefix being the layer's name.
    pub name: String,
    /// The index of its layer.
    pub layer: usize,
    pub spec: ParamSpec,
}

/// Why a graph cannot be built, or a request on it not served. Layers are numbered from 1.
#[derive(Clone, Debug, PartialEq, Error)]
pub enum GraphError {
    #[error("layer {layer} (\"{name}\"): {source}")]
    Layer {
        layer: usize,
        name: String,
        source: ShapeError,
    },
    #[error("the network has no layers: add at least one [[layer]]")]
    NoLayers,
    #[error("the input has a zero-length axis ({shape}); every axis needs at least 1")]
    EmptyInput { shape: Shape },
    #[error(
        "layer {layer}: the name \"{name}\" is already used by layer {first}; names must be unique"
    )]
    DuplicateName {
        layer: usize,
        name: String,
        first: usize,
    },
    #[error(
        "layer {layer} (\"{name}\"): `from = \"{from}\"` names no earlier layer; name one of the layers above it"
    )]
    TapUnknown {
        layer: usize,
        name: String,
        from: String,
    },
    #[error(
        "layer {layer} (\"{name}\"): `from = \"{from}\"` has output {found} but the layer's input is {expected}; the two must have the same shape"
    )]
    TapShape {
        layer: usize,
        name: String,
        from: String,
        found: Shape,
        expected: Shape,
    },
    #[error(
        "layer {layer} (\"{name}\") uses softmax, which is only allowed on the last layer; use another activation there"
    )]
    SoftmaxHidden { layer: usize, name: String },
    #[error(
        "layer {layer} (\"{name}\"): softmax is over the last axis of [features] or [steps, width] outputs, but this output is {shape}; add flatten or global-avg-pool and a dense layer"
    )]
    SoftmaxShape {
        layer: usize,
        name: String,
        shape: Shape,
    },
    #[error(
        "layer {layer} (\"{name}\"): a softmax over a single value is always 1; use sigmoid for one output"
    )]
    SoftmaxSingle { layer: usize, name: String },
    #[error(
        "cross-entropy needs sigmoid or softmax outputs, but the last layer uses {activation}; change its activation or use squared-error"
    )]
    LossNeedsProbabilities { activation: String },
    #[error("layer {layer} (\"{name}\"): {what} is {value}; {rule}")]
    ActivationParameter {
        layer: usize,
        name: String,
        what: &'static str,
        value: f64,
        rule: &'static str,
    },
    #[error("l2 is {value}; it must be a finite number ≥ 0")]
    BadL2 { value: f64 },
    #[error("{found} parameter tensors were given; the network has {expected}")]
    TensorCount { found: usize, expected: usize },
    #[error("tensor {name} has shape {found:?}; the network expects {expected:?}")]
    TensorShape {
        name: String,
        found: Vec<usize>,
        expected: Vec<usize>,
    },
    #[error("the batch {what}")]
    Batch { what: String },
    #[error("no layer is named \"{name}\"")]
    UnknownLayer { name: String },
    #[error(
        "layer \"{name}\" is a {kind}, whose mistakes are {known:?}; \"{code}\" is not one of them"
    )]
    UnknownMistake {
        name: String,
        kind: &'static str,
        code: String,
        known: &'static [&'static str],
    },
}

/// What [`Graph::forward_from_moving`] asks of each recomputed layer j with its tensors `own`:
/// the layer's tensors moved, or `None` where they are not.
pub type Moving<'a, S> = dyn FnMut(usize, &[ArrayD<S>]) -> Option<Vec<ArrayD<S>>> + 'a;

/// Builds a graph layer by layer; each layer is made from the shape the previous one produces.
#[derive(Debug)]
pub struct GraphBuilder {
    input: Shape,
    loss: LossConfig,
    nodes: Vec<Node>,
    tensors: Vec<TensorSpec>,
    /// Each layer's index by its name: a repeated name and a tap's source are looked up, not
    /// searched for (a scan per layer was quadratic: seconds for a description of 29,000 layers).
    names: HashMap<String, usize>,
}

/// How [`GraphBuilder::push`] hands a layer's construction on: from the shape it reads.
type BuildLayer<'a> = dyn FnOnce(&Shape) -> Result<Box<dyn AnyLayer>, ShapeError> + 'a;

impl GraphBuilder {
    pub fn new(input: Shape, loss: LossConfig) -> Self {
        GraphBuilder {
            input,
            loss,
            nodes: Vec::new(),
            tensors: Vec::new(),
            names: HashMap::new(),
        }
    }

    /// The shape the next layer reads.
    pub fn shape(&self) -> Shape {
        self.nodes.last().map_or(self.input, |n| n.layer.output())
    }

    /// Appends a layer built by `build` from the current shape. `name` defaults to `layerJ`.
    ///
    /// The layer is boxed by its kind's `From` impl in this crate, so the passes of every kind in
    /// every scalar are compiled once, in the engine, not again in each crate that builds a graph.
    pub fn push<L: Into<Box<dyn AnyLayer>>>(
        &mut self,
        name: Option<&str>,
        activation: Activation,
        build: impl FnOnce(&Shape) -> Result<L, ShapeError>,
    ) -> Result<&mut Self, GraphError> {
        self.push_boxed(
            name,
            activation,
            Box::new(|s: &Shape| build(s).map(Into::into)),
        )
    }

    fn push_boxed(
        &mut self,
        name: Option<&str>,
        activation: Activation,
        build: Box<BuildLayer<'_>>,
    ) -> Result<&mut Self, GraphError> {
        let layer = self.nodes.len() + 1;
        let name = name.map_or_else(|| format!("layer{layer}"), str::to_string);
        if let Some(&first) = self.names.get(&name) {
            return Err(GraphError::DuplicateName {
                layer,
                name,
                first: first + 1,
            });
        }
        let bad = |what, value, rule| GraphError::ActivationParameter {
            layer,
            name: name.clone(),
            what,
            value,
            rule,
        };
        if let Err((what, value, rule)) = activation.check_parameter() {
            return Err(bad(what, value, rule));
        }
        let input = self.shape();
        let built = build(&input).map_err(|source| GraphError::Layer {
            layer,
            name: name.clone(),
            source,
        })?;
        // Token ids are indices: only an embedding looks them up. Any other kind would compute
        // with them as values and hand an embedding above it ids that are no longer ids.
        if matches!(input, Shape::Tokens { .. }) && built.kind() != "embedding" {
            return Err(GraphError::Layer {
                layer,
                name,
                source: ShapeError::Input {
                    kind: built.kind(),
                    needs: "float values",
                    found: input,
                    fix: "token ids are indices, not values: put an embedding first",
                },
            });
        }
        let tap = match built.tap() {
            None => None,
            Some(from) => {
                let t = *self.names.get(from).ok_or_else(|| GraphError::TapUnknown {
                    layer,
                    name: name.clone(),
                    from: from.to_string(),
                })?;
                let found = self.nodes[t].layer.output();
                if found != input {
                    return Err(GraphError::TapShape {
                        layer,
                        name,
                        from: from.to_string(),
                        found,
                        expected: input,
                    });
                }
                Some(t)
            }
        };
        let start = self.tensors.len();
        for spec in built.params() {
            self.tensors.push(TensorSpec {
                name: format!("{name}.{}", spec.suffix),
                layer: layer - 1,
                spec,
            });
        }
        self.names.insert(name.clone(), self.nodes.len());
        self.nodes.push(Node {
            name,
            layer: built,
            activation,
            tap,
            tensors: start..self.tensors.len(),
        });
        Ok(self)
    }

    /// Checks the rules that concern the whole chain and returns the graph.
    pub fn finish(self) -> Result<Graph, GraphError> {
        if self.nodes.is_empty() {
            return Err(GraphError::NoLayers);
        }
        if self.input.dims().contains(&0)
            || matches!(self.input, Shape::Tokens { vocabulary: 0, .. })
        {
            return Err(GraphError::EmptyInput { shape: self.input });
        }
        if !(self.loss.l2.is_finite() && self.loss.l2 >= 0.0) {
            return Err(GraphError::BadL2 {
                value: self.loss.l2,
            });
        }
        let last = self.nodes.len() - 1;
        for (j, node) in self.nodes.iter().enumerate() {
            if node.activation != Activation::Softmax {
                continue;
            }
            let (layer, name) = (j + 1, node.name.clone());
            let shape = node.layer.output();
            if j != last {
                return Err(GraphError::SoftmaxHidden { layer, name });
            }
            if !matches!(shape, Shape::Flat(_) | Shape::Sequence { .. }) {
                return Err(GraphError::SoftmaxShape { layer, name, shape });
            }
            if shape.size() / shape.rows() == 1 {
                return Err(GraphError::SoftmaxSingle { layer, name });
            }
        }
        let output = self.nodes[last].activation;
        if !self.loss.loss.accepts(output) {
            return Err(GraphError::LossNeedsProbabilities {
                activation: output.to_string(),
            });
        }
        // The last layer that reads each layer's output: the next one, or a later tap.
        let mut last_readers: Vec<usize> = (1..=self.nodes.len()).collect();
        for (k, node) in self.nodes.iter().enumerate() {
            if let Some(t) = node.tap {
                last_readers[t] = last_readers[t].max(k);
            }
        }
        Ok(Graph {
            input: self.input,
            loss: self.loss,
            nodes: self.nodes,
            tensors: self.tensors,
            last_readers,
        })
    }
}

/// A chain of layers with taps, its loss and conventions: the architecture without its values.
#[derive(Debug)]
pub struct Graph {
    input: Shape,
    loss: LossConfig,
    nodes: Vec<Node>,
    tensors: Vec<TensorSpec>,
    /// Per layer, the last layer that reads its output (the next one, or a later tap).
    last_readers: Vec<usize>,
}

/// What the forward pass leaves for the backward pass and for inspection.
#[derive(Clone, Debug)]
pub struct Trace<S> {
    /// Per layer, its kind's step (output before the activation, and what it saved).
    pub steps: Vec<Step<S>>,
    /// Per layer, its output after the activation.
    pub outputs: Vec<Array2<S>>,
}

impl<S> Trace<S> {
    /// The network's output for the batch.
    pub fn output(&self) -> &Array2<S> {
        self.outputs.last().expect("a graph has at least one layer")
    }
}

/// A forward pass's trace as a backward pass reads it. An owned one is freed layer by layer as
/// the pass goes down: at a batch of 8,192 the layers above hold tens of megabytes that the
/// gradients formed below can then reuse instead of fresh pages.
enum Spent<'a, S> {
    Borrowed(&'a Trace<S>),
    /// With, per layer, whether its z went already ([`Graph::forward_spare`]).
    Owned(Trace<S>, Vec<bool>),
}

impl<S> Spent<'_, S> {
    fn get(&self) -> &Trace<S> {
        match self {
            Spent::Borrowed(t) => t,
            Spent::Owned(t, _) => t,
        }
    }

    /// Whether layer j's activation's backward reads its output in place of z (gone).
    fn spared(&self, j: usize) -> bool {
        matches!(self, Spent::Owned(_, spared) if spared[j])
    }

    /// Frees layer j's z and output (a kind's backward reads its step's `saved` and `branches`,
    /// never `out`).
    fn free_outputs(&mut self, j: usize) {
        if let Spent::Owned(t, _) = self {
            t.outputs[j] = empty();
            t.steps[j].out = empty();
        }
    }

    /// Frees what layer j's kind kept for its backward pass.
    fn free_step(&mut self, j: usize) {
        if let Spent::Owned(t, _) = self {
            t.steps[j].saved = Vec::new();
        }
    }
}

/// An array of no values, where a freed one was.
fn empty<S>() -> Array2<S> {
    Array2::from_shape_vec((0, 0), Vec::new()).expect("no values")
}

/// The layers from `from` on of a forward pass whose parameters differ from a base pass's only in
/// those layers ([`Graph::forward_from`]): what a finite-difference check recomputes when it moves
/// one parameter of layer `from`. Entry i of `steps` and `outputs` is layer `from + i`.
#[derive(Clone, Debug)]
pub struct Tail<S> {
    pub from: usize,
    pub steps: Vec<Step<S>>,
    pub outputs: Vec<Array2<S>>,
    /// Set when the recomputed layers stop short of the output layer ([`Graph::forward_moved`]):
    /// the last one's output is the base pass's again bit for bit and nothing above reads one
    /// that is not, so every layer above is the base's. Holds the output layer's z and output,
    /// copied from the base.
    pub settled: Option<(Array2<S>, Array2<S>)>,
    /// Set when the moved layer's output was not built ([`Graph::moved_loss`] for the loss
    /// alone, where the next layer updates from the one channel the hint changed): its step's
    /// `out` has no columns, and this is that channel and its z over the channel's runs in flat
    /// order; the layer's other values are the base pass's.
    pub moved_channel: Option<(usize, Vec<S>)>,
    /// Per recomputed layer (entry i is layer `from + i`), the channels of its output that may
    /// differ from the base's when known ([`Graph::moved_loss`] follows them); the others hold
    /// the base's values and branches bit for bit. Empty, or `None` for a layer: unknown.
    pub changed: Vec<Option<Vec<usize>>>,
}

impl<S> Tail<S> {
    /// The output layer's z (before its activation) and output.
    pub fn output_layer(&self) -> (&Array2<S>, &Array2<S>) {
        match &self.settled {
            Some((z, a)) => (z, a),
            None => (
                &self
                    .steps
                    .last()
                    .expect("a tail holds the output layer")
                    .out,
                self.outputs.last().expect("a tail holds the output layer"),
            ),
        }
    }
}

/// The branches one layer took: its kind's choices and its activation's sides.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct LayerBranches {
    /// The kind's choices ([`Step::branches`]).
    pub kind: Vec<u32>,
    /// For a ReLU-like activation, per value whether z > 0; empty for smooth activations.
    pub sides: Vec<bool>,
    /// Choices that were ties (max-pool) plus values sitting exactly on the activation's kink.
    pub ties: usize,
}

/// The branches a forward pass took at every non-smooth point: two evaluations whose branches are
/// equal lie on one smooth piece (as far as the graph's kinks go).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Branches {
    pub layers: Vec<LayerBranches>,
}

impl Branches {
    /// The layers (0-based) whose branches differ between two evaluations of the same graph.
    pub fn changed(&self, other: &Branches) -> Vec<usize> {
        self.layers
            .iter()
            .zip(&other.layers)
            .enumerate()
            .filter(|(_, (a, b))| a.kind != b.kind || a.sides != b.sides)
            .map(|(j, _)| j)
            .collect()
    }

    /// Whether the evaluation sat on a tie or a kink itself.
    pub fn ties(&self) -> usize {
        self.layers.iter().map(|l| l.ties).sum()
    }
}

/// A catalogued mistake planted in one layer's backward pass (checked against its kind).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Planted {
    layer: usize,
    code: &'static str,
}

impl Planted {
    /// The layer (0-based) whose backward pass departs.
    pub fn layer(&self) -> usize {
        self.layer
    }

    pub fn code(&self) -> &'static str {
        self.code
    }
}

/// The loss and its gradient with respect to every parameter tensor and to the input.
#[derive(Clone, Debug)]
pub struct Gradient<S> {
    pub loss: S,
    /// One per [`Graph::tensors`] entry, canonical shapes.
    pub params: Vec<ArrayD<S>>,
    /// m × input size.
    pub input: Array2<S>,
}

impl Graph {
    pub fn input(&self) -> Shape {
        self.input
    }

    pub fn output(&self) -> Shape {
        self.nodes.last().expect("non-empty").layer.output()
    }

    pub fn loss_config(&self) -> LossConfig {
        self.loss
    }

    pub fn nodes(&self) -> &[Node] {
        &self.nodes
    }

    pub fn tensors(&self) -> &[TensorSpec] {
        &self.tensors
    }

    /// Parameters over all tensors.
    pub fn parameters(&self) -> usize {
        self.tensors
            .iter()
            .map(|t| t.spec.shape.iter().product::<usize>())
            .sum()
    }

    /// The index of the layer with this name.
    pub fn layer(&self, name: &str) -> Result<usize, GraphError> {
        self.nodes
            .iter()
            .position(|n| n.name == name)
            .ok_or_else(|| GraphError::UnknownLayer {
                name: name.to_string(),
            })
    }

    /// A mistake of layer `name`'s kind, to hand to [`Graph::gradient`].
    pub fn plant(&self, name: &str, code: &str) -> Result<Planted, GraphError> {
        let layer = self.layer(name)?;
        let kind = &self.nodes[layer].layer;
        let known = kind.mistakes();
        let code =
            known
                .iter()
                .find(|&&c| c == code)
                .ok_or_else(|| GraphError::UnknownMistake {
                    name: name.to_string(),
                    kind: kind.kind(),
                    code: code.to_string(),
                    known,
                })?;
        Ok(Planted { layer, code })
    }

    /// Whether the L2 term covers tensor `t`.
    pub fn decays(&self, t: usize) -> bool {
        let spec = &self.tensors[t].spec;
        spec.decays || (self.loss.l2_on_bias && spec.role == Role::Bias)
    }

    /// The forward pass over a batch (m × input size).
    pub fn forward<S: LayerScalar>(&self, params: &[ArrayD<S>], x: ArrayView2<S>) -> Trace<S> {
        if let Err(e) = self.check_params(params) {
            panic!("{e} (check_params before a pass)");
        }
        let x = x.as_standard_layout();
        let mut steps: Vec<Step<S>> = Vec::with_capacity(self.nodes.len());
        let mut outputs: Vec<Array2<S>> = Vec::with_capacity(self.nodes.len());
        for (j, node) in self.nodes.iter().enumerate() {
            let input = if j == 0 {
                x.view()
            } else {
                outputs[j - 1].view()
            };
            let skip = node.tap.map(|t| outputs[t].view());
            let step = S::layer(node.layer.as_ref()).forward(&params[node.tensors()], input, skip);
            let a = self.activate(node, &step.out);
            steps.push(step);
            outputs.push(a);
        }
        Trace { steps, outputs }
    }

    /// [`Graph::forward`] for a gradient: a layer below the output whose activation's backward
    /// can work from its output alone (ReLU through the output's sign, which is z's; tanh, the
    /// logistic and the identity through the output itself) gets its activation applied where
    /// its kind wrote z, and its step keeps no z (an empty `out`): one batch-sized array per
    /// such layer instead of two, the same values. Entry j of the second vector says layer j's
    /// z went.
    fn forward_spare<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: Inputs<'_, S>,
    ) -> Option<(Trace<S>, Vec<bool>)> {
        if let Err(e) = self.check_params(params) {
            panic!("{e} (check_params before a pass)");
        }
        let n = self.nodes.len();
        let mut steps: Vec<Step<S>> = Vec::with_capacity(n);
        let mut outputs: Vec<Array2<S>> = Vec::with_capacity(n);
        let mut spared = Vec::with_capacity(n);
        for (j, node) in self.nodes.iter().enumerate() {
            let layer = S::layer(node.layer.as_ref());
            let own = &params[node.tensors()];
            let mut step = match (j, x) {
                (0, Inputs::Own(x)) => layer.forward(own, x.as_standard_layout().view(), None),
                // The first layer only can read an f32 batch; it says whether it does.
                (0, Inputs::F32(x)) => layer.forward_f32(own, x)?,
                _ => {
                    let skip = node.tap.map(|t| outputs[t].view());
                    layer.forward(own, outputs[j - 1].view(), skip)
                }
            };
            let from_output = j + 1 < n
                && matches!(
                    node.activation,
                    Activation::Relu
                        | Activation::Tanh
                        | Activation::Sigmoid
                        | Activation::Identity
                );
            let a = if from_output {
                let mut a = std::mem::replace(&mut step.out, empty());
                node.activation.apply_in_place(&mut a);
                a
            } else {
                self.activate(node, &step.out)
            };
            steps.push(step);
            outputs.push(a);
            spared.push(from_output);
        }
        Some((Trace { steps, outputs }, spared))
    }

    /// The forward pass from layer `from` on, over a `base` pass of the same batch `x` whose
    /// parameters equal `params` in every layer below `from`: the layers below are read from the
    /// base (an `add` above tapping one of them too), the rest recomputed (the steps keep what
    /// [`Graph::forward_from_moving`] says).
    pub fn forward_from<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Trace<S>,
        from: usize,
    ) -> Tail<S> {
        self.forward_from_moving(params, x, base, from, &mut |_, _| None)
    }

    /// [`Graph::forward_from`] over a base pass at `params`, with the layers from `from` on
    /// moved where `moving(j, own)` says so. The tail's steps keep nothing for a backward pass,
    /// and a layer below the output with the identity activation keeps no z (its step's `out`
    /// has no columns; its output is z): it returns layer j's tensors moved (a copy of
    /// `own`, the layer's tensors in `params`, with its changes), or `None` where the layer
    /// keeps `own`. Each copy lives for its layer's pass alone, so a change of many layers (a
    /// random direction) holds one layer's tensors at a time, not a whole weight set.
    pub fn forward_from_moving<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Trace<S>,
        from: usize,
        moving: &mut Moving<'_, S>,
    ) -> Tail<S> {
        self.forward_tail(params, x, base, from, None, moving)
    }

    /// The change of layer `from`'s z per unit step along `v` (the layer's tensors of a
    /// direction), when its kind's z is linear in its tensors ([`Kind::linear_in_params`](super::Kind::linear_in_params)): the
    /// layer's pass with tensors `v` over the base's input. `None` for other kinds.
    pub fn along_change<S: LayerScalar>(
        &self,
        x: ArrayView2<S>,
        base: &Trace<S>,
        from: usize,
        v: &[ArrayD<S>],
    ) -> Option<Array2<S>> {
        let node = &self.nodes[from];
        if !node.layer.linear_in_params() {
            return None;
        }
        let x = x.as_standard_layout();
        let input = if from == 0 {
            x.view()
        } else {
            base.outputs[from - 1].view()
        };
        let skip = node.tap.map(|t| base.outputs[t].view());
        Some(S::layer(node.layer.as_ref()).forward(v, input, skip).out)
    }

    /// [`Graph::forward_from_moving`] with layer `from`'s z taken as the base's plus `t` times
    /// `change` ([`Graph::along_change`]) instead of recomputed: several steps along one
    /// direction share one pass of that layer. z + t·change rounds twice per value (the
    /// product t·change, the sum) where the recomputed pass rounds a whole product: about the
    /// same round-off, within what a loss is assumed to carry (crates/fd/tests/it/graph_along.rs
    /// measures at most 0.32 of it per loss in f32), not bit for bit the pass at θ + t·v.
    #[allow(clippy::too_many_arguments)]
    pub fn forward_along<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Trace<S>,
        from: usize,
        change: &Array2<S>,
        t: S,
        moving: &mut Moving<'_, S>,
    ) -> Tail<S> {
        self.forward_tail(params, x, base, from, Some((change, t)), moving)
    }

    fn forward_tail<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Trace<S>,
        from: usize,
        start: Option<(&Array2<S>, S)>,
        moving: &mut Moving<'_, S>,
    ) -> Tail<S> {
        if let Err(e) = self.check_params(params) {
            panic!("{e} (check_params before a pass)");
        }
        assert!(from < self.nodes.len(), "layer {from} is not in the graph");
        let x = x.as_standard_layout();
        let mut steps: Vec<Step<S>> = Vec::with_capacity(self.nodes.len() - from);
        let mut outputs: Vec<Array2<S>> = Vec::with_capacity(self.nodes.len() - from);
        for (j, node) in self.nodes.iter().enumerate().skip(from) {
            let output = |i: usize| {
                if i < from {
                    base.outputs[i].view()
                } else {
                    outputs[i - from].view()
                }
            };
            let input = if j == 0 { x.view() } else { output(j - 1) };
            let skip = node.tap.map(output);
            let own = &params[node.tensors()];
            let moved = moving(j, own);
            let own = moved.as_deref().unwrap_or(own);
            // What the backward pass would need (a norm's x̂) is not kept: a tail serves losses.
            let layer = S::layer(node.layer.as_ref());
            let mut step = match start {
                Some((change, t)) if j == from => {
                    let mut z = base.steps[j].out.clone();
                    // Same shape, or zip_mut_with would broadcast a wrong change silently.
                    assert_eq!(z.dim(), change.dim(), "a change of layer {j}'s z");
                    z.zip_mut_with(change, |z, &c| *z += t * c);
                    Step::plain(z)
                }
                _ => layer.forward_into(own, input, skip, &mut Vec::new()),
            };
            let a = if node.activation == Activation::Identity && j + 1 < self.nodes.len() {
                // z is the output: moved there, not copied (a step without z, as below).
                let rows = step.out.nrows();
                std::mem::replace(&mut step.out, Array2::zeros((rows, 0)))
            } else {
                self.activate(node, &step.out)
            };
            steps.push(step);
            outputs.push(a);
        }
        Tail {
            from,
            steps,
            outputs,
            settled: None,
            moved_channel: None,
            changed: Vec::new(),
        }
    }

    /// The forward pass after one parameter entry moved (`moved`, its tensor counted over
    /// [`Graph::tensors`]), over a `base` pass of the same batch `x` at `params` (the unmoved
    /// values): the layers below the entry's are read from the base, its layer by its kind's
    /// [hint](super::Layer::forward_moved) (or recomputed with the entry moved when the kind has
    /// none), the layers above recomputed — a channel-wise layer only in the channels that
    /// changed ([`Layer::forward_channels`](super::Layer::forward_channels)), bit for bit what a
    /// full pass gives them; a dense layer whose input changed in a few units by the change
    /// alone ([`Layer::forward_units`](super::Layer::forward_units), a rank-k update, equal to
    /// a full pass up to rounding). The tail's steps keep nothing for a backward pass. It stops at a
    /// layer whose output is the base's again bit for bit when no layer above taps one that is
    /// not ([`Tail::settled`]): a change that has died out costs nothing further.
    pub fn forward_moved<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Trace<S>,
        moved: &Moved<S>,
    ) -> Tail<S> {
        self.moved_tail(&mut Workspace::new(), params, x, base, moved, true)
    }

    /// The loss after one parameter entry moved and the tail it came from: [`Graph::forward_moved`]
    /// then [`Graph::loss_moved`], except that the output layer's activation is left out (its
    /// entry of the tail's outputs has no columns) where the loss reads only z — cross-entropy
    /// takes its log-sum-exp from z, so a softmax would be computed for nothing — that the
    /// moved layer's output is not built (its entry has no columns either) when only the next
    /// layer reads it and that layer updates from the changed channels alone (its z is then
    /// built only where the kind can give the changed channel alone, [`Tail::moved_channel`]),
    /// and that a layer below the output whose activation has no break point keeps no z (its
    /// step's `out` has no columns: the activation is made in its place). What a check reads of
    /// the tail is there: the loss, and whether it took another branch than the base
    /// ([`Graph::tail_crossed`]).
    pub fn moved_loss<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Trace<S>,
        y: ArrayView2<S>,
        l2_sum: S,
        moved: &Moved<S>,
    ) -> (S, Tail<S>) {
        let mut ws = Workspace::new();
        let loss = self.moved_loss_in(&mut ws, params, x, base, y, l2_sum, moved);
        (loss, ws.tail.take().expect("left by the call"))
    }

    /// [`Graph::moved_loss`] in the buffers of `ws`, one workspace per thread: the tail stays in
    /// the workspace ([`Workspace::tail`]) until the next call takes its arrays back, so a check
    /// evaluating many losses allocates nothing per loss once the buffers have their sizes. The
    /// same bits as `moved_loss`, whatever the workspace held before.
    #[allow(clippy::too_many_arguments)]
    pub fn moved_loss_in<S: LayerScalar>(
        &self,
        ws: &mut Workspace<S>,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Trace<S>,
        y: ArrayView2<S>,
        l2_sum: S,
        moved: &Moved<S>,
    ) -> S {
        ws.recycle();
        let reads = self.loss.loss.reads_activations();
        let tail = self.moved_tail(ws, params, x, base, moved, reads);
        let loss = self.loss_moved(params, &tail, y, l2_sum, moved);
        ws.tail = Some(tail);
        loss
    }

    /// Whether a tail of [`Graph::moved_loss`] took another branch than the `base` pass it was
    /// computed over: a kind's choice ([`Step::branches`]), or a value on the other side of its
    /// activation's kink or of a break in a derivative (elu with α = 1), compared value by value
    /// with nothing collected; the moved layer's changed channel alone where that is all the
    /// tail holds of it ([`Tail::moved_channel`]), and a layer's changed channels alone where
    /// the tail knows them ([`Tail::changed`]).
    pub fn tail_crossed<S: LayerScalar>(&self, base: &Trace<S>, tail: &Tail<S>) -> bool {
        if let Some((c, z)) = &tail.moved_channel {
            let j = tail.from;
            let shape = self.nodes[j].layer.output();
            let was = base.steps[j].out.as_slice().expect("standard layout");
            let m = base.steps[j].out.nrows();
            let runs = shape.channel_runs(m, *c).flat_map(|run| &was[run]);
            if self.nodes[j].activation.sides_change(z.iter().zip(runs)) {
                return true;
            }
        }
        tail.steps.iter().enumerate().any(|(i, step)| {
            let j = tail.from + i;
            let was = &base.steps[j];
            let lean = i == 0 && tail.moved_channel.is_some();
            let kink = self.nodes[j].activation.break_point().filter(|_| !lean);
            match tail.changed.get(i).and_then(|c| c.as_deref()) {
                Some(channels) => self.channels_crossed(j, was, step, channels, kink),
                None => {
                    branches_differ(&step.branches, &was.branches)
                        || kink.is_some_and(|k| sides_differ(&step.out, &was.out, k))
                }
            }
        })
    }

    /// [`Graph::tail_crossed`] for recomputed layer j whose output differs from the base's in
    /// `channels` alone: the branches and kink sides of those channels compared, not the whole
    /// layer's (the rest are the base's bit for bit). Branches laid out otherwise than one per
    /// output value are compared whole.
    fn channels_crossed<S: Scalar>(
        &self,
        j: usize,
        was: &Step<S>,
        step: &Step<S>,
        channels: &[usize],
        kink: Option<f64>,
    ) -> bool {
        let shape = self.nodes[j].layer.output();
        let m = was.out.nrows();
        let per_value = m * shape.size();
        let branched = if step.branches.len() == per_value && was.branches.len() == per_value {
            runs_differ(shape, m, channels, &step.branches, &was.branches, |a, b| {
                a != b
            })
        } else {
            branches_differ(&step.branches, &was.branches)
        };
        if branched {
            return true;
        }
        let Some(k) = kink else {
            return false;
        };
        let (Some(now), Some(then)) = (step.out.as_slice(), was.out.as_slice()) else {
            return sides_differ(&step.out, &was.out, k);
        };
        if now.len() != then.len() {
            // No z kept to compare: the side cannot be told, so the step counts as crossed (the
            // coordinate unreliable, never a false mismatch). No path drops z at a kink today.
            debug_assert!(false, "a layer with a kink kept no z");
            return true;
        }
        let side = |v: &S| v.re() > k;
        runs_differ(shape, m, channels, now, then, |a, b| side(a) != side(b))
    }

    /// [`Graph::forward_moved`] in the buffers of `ws`, with the output layer's activation only
    /// when `output_activation` (and then every layer's output built whole).
    fn moved_tail<S: LayerScalar>(
        &self,
        ws: &mut Workspace<S>,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Trace<S>,
        moved: &Moved<S>,
        output_activation: bool,
    ) -> Tail<S> {
        if let Err(e) = self.check_params(params) {
            panic!("{e} (check_params before a pass)");
        }
        let from = self.tensors[moved.tensor].layer;
        let node = &self.nodes[from];
        let x = x.as_standard_layout();
        let input = if from == 0 {
            x.view()
        } else {
            base.outputs[from - 1].view()
        };
        let layer = S::layer(node.layer.as_ref());
        let own = &params[node.tensors()];
        let local = Moved {
            tensor: moved.tensor - node.tensors.start,
            ..*moved
        };
        let last = self.nodes.len() - 1;
        let m = x.nrows();
        // For the loss alone, when only the next layer reads the moved one, the moved layer's
        // changed channels are activated by themselves and its output built whole only if the
        // next layer cannot update from them (`Layer::forward_units`): a first dense layer's
        // output is copied per loss otherwise, twice (its z and its activation).
        let lean = !output_activation
            && from < last
            && self.last_readers[from] == from + 1
            && self.nodes[from + 1].tap.is_none()
            && node.activation != Activation::Softmax;
        let channel = node.layer.moved_channel(local.tensor, local.index);
        let mut steps = std::mem::take(&mut ws.steps);
        let mut outputs = std::mem::take(&mut ws.outputs);
        let mut changed = std::mem::take(&mut ws.changed);
        // The moved layer's changed channel and its activated values, when the next layer
        // reads them alone; and its z there when the layer's output is not built at all.
        let mut fresh: Option<(usize, Vec<S>)> = None;
        let mut moved_channel = None;
        if let Some(c) = channel.filter(|_| lean && !node.layer.branches()) {
            let mut z = ws.take(m);
            if layer.moved_values(own, input, &base.steps[from], &local, &mut z) {
                let mut a = ws.take(z.len());
                a.extend_from_slice(&z);
                node.activation.apply_values(&mut a);
                fresh = Some((c, a));
                moved_channel = Some((c, z));
                steps.push(Step::plain(Array2::zeros((m, 0))));
                outputs.push(Array2::zeros((m, 0)));
            } else {
                ws.give(z);
            }
        }
        if fresh.is_none() {
            // The channels of each recomputed layer's output that differ from the base's, when
            // known: the moved layer's hint names one; channel-wise layers above keep the set.
            let (step, hinted) = match layer.forward_moved(own, input, &base.steps[from], &local) {
                Some(step) => (step, true),
                None => {
                    let mut own = own.to_vec();
                    let slot = own[local.tensor]
                        .as_slice_mut()
                        .expect("parameters in standard layout")
                        .get_mut(local.index)
                        .expect("index within its tensor");
                    *slot += local.delta;
                    let skip = node.tap.map(|t| base.outputs[t].view());
                    (layer.forward(&own, input, skip), false)
                }
            };
            let first = channel.filter(|_| hinted);
            match first.filter(|_| lean) {
                Some(c) => {
                    let mut a = ws.take(m);
                    gather_into(node.layer.output(), m, &[c], &step.out, &mut a);
                    node.activation.apply_values(&mut a);
                    fresh = Some((c, a));
                    steps.push(step);
                    outputs.push(Array2::zeros((m, 0)));
                }
                None => {
                    let set = first.map(|c| ws.set(&[c]));
                    let (step, a) =
                        self.finish(ws, base, from, step, set.as_deref(), output_activation);
                    steps.push(step);
                    outputs.push(a);
                    changed.push(set);
                }
            }
        }
        if let Some((c, _)) = &fresh {
            changed.push(Some(ws.set(&[*c])));
        }
        // The last layer that reads any recomputed layer but the newest (the next one, or a tap).
        let mut open = 0;
        let mut settled = None;
        for (j, node) in self.nodes.iter().enumerate().skip(from + 1) {
            let below = j - 1;
            let is_next = j == from + 1;
            let done = match (&fresh, is_next) {
                (Some((c, now)), true) => {
                    let was = self.nodes[below].layer.output();
                    same_channel(was, m, *c, now, &base.outputs[below])
                }
                _ => open < j && same_bits(&outputs[below - from], &base.outputs[below]),
            };
            if done {
                settled = Some((
                    ws.copy_of(&base.steps[last].out),
                    ws.copy_of(&base.outputs[last]),
                ));
                break;
            }
            open = open.max(self.last_readers[below]);
            let layer = S::layer(node.layer.as_ref());
            let own = &params[node.tensors()];
            if let (Some((c, now)), true) = (&fresh, is_next) {
                let (step, base_input) = (&base.steps[j], base.outputs[below].view());
                let mut buffer = ws.take(step.out.len());
                let units = layer.forward_units_into(
                    own,
                    base_input,
                    step,
                    std::slice::from_ref(c),
                    now,
                    &mut buffer,
                );
                ws.give(buffer);
                if let Some(step) = units {
                    let (step, a) = self.finish(ws, base, j, step, None, output_activation);
                    steps.push(step);
                    outputs.push(a);
                    changed.push(None);
                    continue;
                }
                // The next layer needs the whole input after all.
                let shape = self.nodes[below].layer.output();
                let mut whole = ws.copy_of(&base.outputs[below]);
                put(shape, m, &[*c], now, &mut whole);
                outputs[0] = whole;
            }
            let output = |i: usize| {
                if i < from {
                    base.outputs[i].view()
                } else {
                    outputs[i - from].view()
                }
            };
            let skip = node.tap.map(output);
            // What differs in the input and the tap: a tap below the moved layer differs nowhere.
            let differs = match node.tap {
                Some(t) if t >= from => union(
                    changed[j - 1 - from].as_deref(),
                    changed[t - from].as_deref(),
                ),
                _ => changed[j - 1 - from].as_deref().map(|c| ws.set(c)),
            };
            let input = output(j - 1);
            let step = &base.steps[j];
            let local = differs
                .as_deref()
                .and_then(|c| layer.forward_channels(own, input, skip, step, c));
            let (step, now) = match local {
                Some(step) => (step, differs),
                None => {
                    let base_input = base.outputs[j - 1].view();
                    let was = self.nodes[j - 1].layer.output();
                    let mut units = None;
                    if let Some(c) = differs.as_deref().filter(|_| node.tap.is_none()) {
                        let mut now = ws.take(m * was.size() / was.feature_axis().1 * c.len());
                        gather_into(was, m, c, &outputs[j - 1 - from], &mut now);
                        let mut buffer = ws.take(step.out.len());
                        units =
                            layer.forward_units_into(own, base_input, step, c, &now, &mut buffer);
                        ws.give(buffer);
                        ws.give(now);
                    }
                    if let Some(set) = differs {
                        ws.give_set(set);
                    }
                    let step = units.unwrap_or_else(|| {
                        let mut buffer = ws.take(m * node.layer.output().size());
                        let step = layer.forward_into(own, input, skip, &mut buffer);
                        ws.give(buffer);
                        step
                    });
                    (step, None)
                }
            };
            let (step, a) = self.finish(ws, base, j, step, now.as_deref(), output_activation);
            steps.push(step);
            outputs.push(a);
            changed.push(now);
        }
        if let Some((_, a)) = fresh {
            ws.give(a);
        }
        Tail {
            from,
            steps,
            outputs,
            settled,
            moved_channel,
            changed,
        }
    }

    /// A recomputed layer's step and activation (nothing for an output layer the loss does not
    /// read), `changed` the channels of z that differ from the base's when known. For the loss
    /// alone (not `output_activation`), a layer below the output whose activation has no break
    /// point keeps no z (the check reads a tail's z only for the sides of a kink): its
    /// activation is made in z's place, no copy.
    fn finish<S: LayerScalar>(
        &self,
        ws: &mut Workspace<S>,
        base: &Trace<S>,
        j: usize,
        mut step: Step<S>,
        changed: Option<&[usize]>,
        output_activation: bool,
    ) -> (Step<S>, Array2<S>) {
        let node = &self.nodes[j];
        let act = node.activation;
        let rows = step.out.nrows();
        let last = j == self.nodes.len() - 1;
        if last && !output_activation {
            return (step, Array2::zeros((rows, 0)));
        }
        let keep_z =
            output_activation || last || act.break_point().is_some() || act == Activation::Softmax;
        if !keep_z && (changed.is_none() || act == Activation::Identity) {
            let mut a = std::mem::replace(&mut step.out, Array2::zeros((rows, 0)));
            act.apply_in_place(&mut a);
            return (step, a);
        }
        let a = self.activate_changed(ws, node, &step.out, &base.outputs[j], changed);
        (step, a)
    }

    /// The activation of `z`, a layer's output that differs from the base pass's only in the
    /// channels `changed` (when known): those channels from z, the rest the base's `a`.
    fn activate_changed<S: Scalar>(
        &self,
        ws: &mut Workspace<S>,
        node: &Node,
        z: &Array2<S>,
        base: &Array2<S>,
        changed: Option<&[usize]>,
    ) -> Array2<S> {
        let Some(changed) = changed.filter(|_| node.activation != Activation::Softmax) else {
            return self.activate(node, z);
        };
        if !(z.is_standard_layout() && base.is_standard_layout()) {
            return self.activate(node, z);
        }
        let shape = node.layer.output();
        let mut now = ws.take(z.len() / shape.feature_axis().1 * changed.len());
        gather_into(shape, z.nrows(), changed, z, &mut now);
        node.activation.apply_values(&mut now);
        let mut a = ws.copy_of(base);
        put(shape, z.nrows(), changed, &now, &mut a);
        ws.give(now);
        a
    }

    fn activate<S: Scalar>(&self, node: &Node, z: &Array2<S>) -> Array2<S> {
        match node.activation {
            Activation::Identity => z.clone(),
            Activation::Softmax => {
                let rows = node.layer.output().rows();
                let n = z.nrows() * rows;
                let mut a = by_rows(z.view(), n).to_owned();
                Activation::Softmax.apply_in_place(&mut a);
                a.into_shape_with_order(z.raw_dim()).expect("same size")
            }
            act => act.apply(z.view()),
        }
    }

    /// Whether the pass `moved` took some value of a layer's activation past `share` of the
    /// radius of convergence of its Taylor series around the `base` pass
    /// ([`Activation::bends`]); for a softmax, each value's gap to its row's largest in the
    /// base, whose log-sum-exp is singular where two values differ by iπ (radius
    /// √(gap² + π²)). Both passes must keep every z ([`Graph::forward`]). What a checker asks
    /// before it trusts a disagreement whose error estimate assumed the loss near its Taylor
    /// polynomial. The kinds' own nonlinearities (recurrent gates, attention's softmax, a
    /// norm's 1/√var) are not looked at: the activations the graph applies only.
    pub fn bent<S: LayerScalar>(&self, base: &Trace<S>, moved: &Trace<S>, share: f64) -> bool {
        self.nodes
            .iter()
            .zip(base.steps.iter().zip(&moved.steps))
            .any(|(node, (was, now))| match node.activation {
                Activation::Softmax => {
                    let width = node.layer.output().dims().last().copied().unwrap_or(1);
                    let (Some(was), Some(now)) = (was.out.as_slice(), now.out.as_slice()) else {
                        return false;
                    };
                    was.chunks(width.max(1))
                        .zip(now.chunks(width.max(1)))
                        .any(|(w, n)| softmax_bends(w, n, share))
                }
                act => was
                    .out
                    .iter()
                    .zip(&now.out)
                    .any(|(a, b)| act.bends(a.re(), b.re(), share)),
            })
    }

    /// The branches a forward pass took (see [`Branches`]).
    pub fn branches<S: Scalar>(&self, trace: &Trace<S>) -> Branches {
        let layers = self
            .nodes
            .iter()
            .zip(&trace.steps)
            .map(|(node, step)| layer_branches(node, step))
            .collect();
        Branches { layers }
    }

    /// The branches of the layers a [`Tail`] recomputed: entry i is layer `tail.from + i`, to be
    /// compared with the base pass's layers from `tail.from` on. For tails of
    /// [`Graph::forward_from`] (which keeps z wherever an activation has a kink) and
    /// [`Graph::forward_moved`], which keeps every z; a tail of [`Graph::moved_loss`] keeps z
    /// only where a kink test reads it ([`Graph::tail_crossed`]).
    pub fn branches_from<S: Scalar>(&self, tail: &Tail<S>) -> Branches {
        let layers = self.nodes[tail.from..]
            .iter()
            .zip(&tail.steps)
            .map(|(node, step)| layer_branches(node, step))
            .collect();
        Branches { layers }
    }

    /// The loss of a batch: the data term under the declared reduction plus the L2 term.
    pub fn loss<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> S {
        let trace = self.forward(params, x);
        self.loss_of(params, &trace, y)
    }

    /// The loss from a forward pass already made.
    pub fn loss_of<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        trace: &Trace<S>,
        y: ArrayView2<S>,
    ) -> S {
        let z = &trace.steps.last().expect("non-empty").out;
        self.loss_at(params, z, trace.output(), y)
    }

    /// The loss from a [`Tail`] (its last layer is the output layer).
    pub fn loss_from<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        tail: &Tail<S>,
        y: ArrayView2<S>,
    ) -> S {
        let (z, a) = tail.output_layer();
        self.loss_at(params, z, a, y)
    }

    /// The loss from a [`Tail`] with `l2_sum` as its Σ w² (the L2 term's sum, kept by a caller
    /// that moved the parameters itself).
    pub fn loss_from_sum<S: LayerScalar>(&self, tail: &Tail<S>, y: ArrayView2<S>, l2_sum: S) -> S {
        let (z, a) = tail.output_layer();
        self.loss_with(z, a, y, l2_sum)
    }

    /// The loss from a [`Graph::forward_moved`] tail: `params` are the unmoved values and
    /// `l2_sum` their [`Graph::l2_sum`]; the L2 term takes the one entry's change rather than
    /// summing again (which differs from the full sum by rounding only).
    pub fn loss_moved<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        tail: &Tail<S>,
        y: ArrayView2<S>,
        l2_sum: S,
        moved: &Moved<S>,
    ) -> S {
        let (z, a) = tail.output_layer();
        self.loss_with(z, a, y, self.moved_l2_sum(params, l2_sum, moved))
    }

    /// Σ w² after one entry moved, from the base's `l2_sum`: the entry's change alone.
    pub(super) fn moved_l2_sum<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        l2_sum: S,
        moved: &Moved<S>,
    ) -> S {
        if !(self.decays(moved.tensor) && self.loss.l2 != 0.0) {
            return l2_sum;
        }
        let p = &params[moved.tensor];
        let w = match p.as_slice() {
            Some(values) => values[moved.index],
            None => *p.iter().nth(moved.index).expect("index within its tensor"),
        };
        let w1 = w + moved.delta;
        l2_sum - w * w + w1 * w1
    }

    /// Σ w² over the tensors the L2 term covers.
    pub fn l2_sum<S: LayerScalar>(&self, params: &[ArrayD<S>]) -> S {
        let mut sq = S::zero();
        for (t, p) in params.iter().enumerate() {
            if self.decays(t) {
                p.iter().for_each(|&w| sq += w * w);
            }
        }
        sq
    }

    /// The loss from the output layer's z and activation a.
    fn loss_at<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        z: &Array2<S>,
        a: &Array2<S>,
        y: ArrayView2<S>,
    ) -> S {
        let sq = if self.loss.l2_factor(z.nrows()) != 0.0 {
            self.l2_sum(params)
        } else {
            S::zero()
        };
        self.loss_with(z, a, y, sq)
    }

    /// The loss from the output layer's z and activation a, and Σ w² for the L2 term.
    pub(super) fn loss_with<S: LayerScalar>(
        &self,
        z: &Array2<S>,
        a: &Array2<S>,
        y: ArrayView2<S>,
        sq: S,
    ) -> S {
        let last = self.nodes.last().expect("non-empty");
        let m = z.nrows();
        let y = y.as_standard_layout();
        let mut total = self.loss.data(
            last.activation,
            last.layer.output().rows(),
            z.view(),
            a.view(),
            y.view(),
        );
        let factor = self.loss.l2_factor(m);
        if factor != 0.0 {
            total += S::from_f64(factor) * sq;
        }
        total
    }

    /// The loss and its analytic gradient, the input gradient included; `planted` makes one
    /// layer's backward pass reproduce a catalogued mistake. x is a batch in S, or one a file
    /// stored in f32 ([`Inputs::F32`]: the same values as on the batch widened).
    pub fn gradient<'x, S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: impl Into<Inputs<'x, S>>,
        y: ArrayView2<S>,
        planted: Option<&Planted>,
    ) -> Gradient<S> {
        let (loss, params_grad, input) = self.spent_gradient(params, x.into(), y, planted, true);
        Gradient {
            loss,
            params: params_grad,
            input: input.expect("asked for"),
        }
    }

    /// The loss and the parameters' gradient without the input gradient, which no user of the
    /// loss's gradient needs (at a dense first layer over many inputs it is a third of the
    /// backward pass). x as [`Graph::gradient`] takes it.
    pub fn parameter_gradient<'x, S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: impl Into<Inputs<'x, S>>,
        y: ArrayView2<S>,
        planted: Option<&Planted>,
    ) -> (S, Vec<ArrayD<S>>) {
        let (loss, grads, _) = self.spent_gradient(params, x.into(), y, planted, false);
        (loss, grads)
    }

    /// The loss and gradients from a forward pass whose trace the backward pass owns and frees
    /// layer by layer ([`Spent`]): what `gradient` and `parameter_gradient` share. An f32 batch
    /// whose first layer does not read f32 is widened whole first.
    fn spent_gradient<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: Inputs<'_, S>,
        y: ArrayView2<S>,
        planted: Option<&Planted>,
        input_gradient: bool,
    ) -> (S, Vec<ArrayD<S>>, Option<Array2<S>>) {
        let Some((trace, spared)) = self.forward_spare(params, x) else {
            let widened = x.widened();
            let x = Inputs::Own(widened.view());
            return self.spent_gradient(params, x, y, planted, input_gradient);
        };
        let loss = self.loss_of(params, &trace, y);
        let spent = Spent::Owned(trace, spared);
        let (grads, input) = self.backward_through(
            params,
            x,
            y,
            spent,
            planted,
            &Hooks::REFERENCE,
            input_gradient,
        );
        (loss, grads, input)
    }

    /// The backward pass from a forward pass already made: the parameter gradients, and the input
    /// gradient when `input_gradient` asks for it.
    pub fn backward<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        y: ArrayView2<S>,
        trace: &Trace<S>,
        planted: Option<&Planted>,
        input_gradient: bool,
    ) -> (Vec<ArrayD<S>>, Option<Array2<S>>) {
        self.backward_hooked(
            params,
            x,
            y,
            trace,
            planted,
            &Hooks::REFERENCE,
            input_gradient,
        )
    }

    /// The backward pass with the departures of `hooks` (the mistakes any graph can make, as the
    /// diagnosis's hypotheses) besides a kind's `planted` one; [`Hooks::REFERENCE`] departs
    /// nowhere. A layer's input gradient is formed only where something reads it: the layers
    /// below with parameters, or the caller when `input_gradient` asks for the input's.
    #[allow(clippy::too_many_arguments)]
    pub fn backward_hooked<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        y: ArrayView2<S>,
        trace: &Trace<S>,
        planted: Option<&Planted>,
        hooks: &Hooks,
        input_gradient: bool,
    ) -> (Vec<ArrayD<S>>, Option<Array2<S>>) {
        self.backward_through(
            params,
            Inputs::Own(x),
            y,
            Spent::Borrowed(trace),
            planted,
            hooks,
            input_gradient,
        )
    }

    /// [`Graph::backward_hooked`] over a trace that is borrowed, or owned and freed layer by
    /// layer as the pass goes down.
    #[allow(clippy::too_many_arguments)]
    fn backward_through<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: Inputs<'_, S>,
        y: ArrayView2<S>,
        mut trace: Spent<'_, S>,
        planted: Option<&Planted>,
        hooks: &Hooks,
        input_gradient: bool,
    ) -> (Vec<ArrayD<S>>, Option<Array2<S>>) {
        let own = match &x {
            Inputs::Own(x) => Some(x.as_standard_layout()),
            Inputs::F32(_) => None,
        };
        let y = y.as_standard_layout();
        let m = x.nrows();
        let n = self.nodes.len();
        let mut grads: Vec<ArrayD<S>> = params.iter().map(|p| ArrayD::zeros(p.raw_dim())).collect();
        // The gradient with respect to each layer's output (after its activation), gathered from
        // the layer above and from every `add` that taps it.
        let mut upstream: Vec<Option<Array2<S>>> = vec![None; n];
        let mut input_grad = None;
        // Layer j's input gradient is read when the caller wants the input's or a layer below j
        // has parameters (every gradient reaching a layer below comes through layer j's input or
        // through a tap, which `add` hands on whatever this says).
        let lowest = self.nodes.iter().position(|n| !n.tensors().is_empty());
        for j in (0..n).rev() {
            if !input_gradient && lowest.is_none_or(|l| j < l) {
                break; // nothing at or below layer j has a gradient anyone reads
            }
            let node = &self.nodes[j];
            let t = trace.get();
            let step = &t.steps[j];
            let dz = if j == n - 1 {
                self.output_delta(hooks, step.out.view(), t.outputs[j].view(), y.view())
            } else {
                let a = t.outputs[j].view();
                let da = upstream[j]
                    .take()
                    .unwrap_or_else(|| Array2::zeros(a.raw_dim()));
                // A spared layer's activation reads z only through its sign (ReLU), which
                // its output shares, or not at all.
                let z = if trace.spared(j) { a } else { step.out.view() };
                match hooks.slope.filter(|&(l, _)| l == j).map(|(_, s)| s) {
                    None => node.activation.backward(z, a, da),
                    Some(Slope::Missing) => da,
                    Some(Slope::AtOutput) => {
                        let at_a = node.activation.apply(a);
                        node.activation.backward(a, at_a.view(), da)
                    }
                }
            };
            // Layer j's z and output are read by nothing below: every reader is above it.
            trace.free_outputs(j);
            let t = trace.get();
            let step = &t.steps[j];
            let mistake = planted.filter(|p| p.layer == j).map(|p| p.code);
            let layer = S::layer(node.layer.as_ref());
            let own_params = &params[node.tensors()];
            let need_input = input_gradient || lowest.is_some_and(|l| l < j);
            let back = match (j, x, &own) {
                // An f32 batch reaches here only when the first layer's forward read it.
                (0, Inputs::F32(x), _) => {
                    layer.backward_f32(own_params, x, step, dz.view(), mistake, need_input)
                }
                (0, _, Some(x)) => {
                    layer.backward(own_params, x.view(), step, dz.view(), mistake, need_input)
                }
                _ => layer.backward(
                    own_params,
                    t.outputs[j - 1].view(),
                    step,
                    dz.view(),
                    mistake,
                    need_input,
                ),
            };
            trace.free_step(j);
            for (t, g) in node.tensors().zip(back.params) {
                grads[t] = g;
            }
            if let (Some(t), Some(ds)) = (node.tap, back.dskip) {
                accumulate(&mut upstream[t], ds);
            }
            match back.dx {
                Some(dx) if j == 0 => input_grad = Some(dx),
                Some(dx) => accumulate(&mut upstream[j - 1], dx),
                None => {}
            }
        }
        let (factor, toggled) = match hooks.regularization {
            Regularization::Declared => (self.loss.l2_factor(m), false),
            Regularization::Missing => (0.0, false),
            Regularization::Divisor(d) => (self.loss.l2 / d.value(m), false),
            Regularization::BiasToggled => (self.loss.l2_factor(m), true),
        };
        if factor != 0.0 {
            let two = S::from_f64(2.0 * factor);
            for (t, (g, p)) in grads.iter_mut().zip(params).enumerate() {
                let bias = self.tensors[t].spec.role == Role::Bias;
                if self.decays(t) != (toggled && bias) {
                    Zip::from(g).and(p).for_each(|g, &w| *g += two * w);
                }
            }
        }
        (grads, input_grad)
    }

    /// dJ/dz of the output layer's data term, with the departures of `hooks`.
    fn output_delta<S: LayerScalar>(
        &self,
        hooks: &Hooks,
        z: ArrayView2<S>,
        a: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> Array2<S> {
        let last = self.nodes.last().expect("non-empty");
        let rows = last.layer.output().rows();
        let mut d = if hooks.other_loss_delta {
            // Cross-entropy's delta is (a − y) over the reduction with no activation step, which
            // is what it is for a sigmoid output; squared error's takes the activation's step.
            let (loss, activation) = match self.loss.loss {
                Loss::CrossEntropy => (Loss::SquaredError, last.activation),
                Loss::SquaredError => (Loss::CrossEntropy, Activation::Sigmoid),
            };
            let other = LossConfig { loss, ..self.loss };
            other.delta(activation, rows, z, a, y)
        } else {
            self.loss.delta(last.activation, rows, z, a, y)
        };
        if hooks.data_scale != 1.0 {
            let f = S::from_f64(hooks.data_scale);
            d.mapv_inplace(|v| v * f);
        }
        let m = d.nrows();
        let keep = match hooks.samples {
            Samples::All => 0..m,
            Samples::First => 0..1,
            Samples::Last => m - 1..m,
        };
        for (i, mut row) in d.outer_iter_mut().enumerate() {
            if !keep.contains(&i) {
                row.fill(S::zero());
            }
        }
        d
    }

    /// Whether a parameter list fits the graph: one tensor per [`TensorSpec`], canonical shapes.
    /// The passes assume it (and panic otherwise): callers check first.
    pub fn check_params<S>(&self, params: &[ArrayD<S>]) -> Result<(), GraphError> {
        if params.len() != self.tensors.len() {
            return Err(GraphError::TensorCount {
                found: params.len(),
                expected: self.tensors.len(),
            });
        }
        for (p, t) in params.iter().zip(&self.tensors) {
            if p.shape() != &t.spec.shape[..] {
                return Err(GraphError::TensorShape {
                    name: t.name.clone(),
                    found: p.shape().to_vec(),
                    expected: t.spec.shape.clone(),
                });
            }
        }
        Ok(())
    }

    /// Whether a batch fits the graph: m ≥ 1 samples of the input's size, targets of the output's.
    /// Token inputs must be whole numbers below the vocabulary (the first one that is not is
    /// named by sample and step).
    pub fn check_batch<S: Scalar, T: Scalar>(
        &self,
        x: ArrayView2<S>,
        y: ArrayView2<T>,
    ) -> Result<(), GraphError> {
        let what = if x.nrows() == 0 {
            "has no samples".to_string()
        } else if x.nrows() != y.nrows() {
            format!("has {} input rows but {} target rows", x.nrows(), y.nrows())
        } else if x.ncols() != self.input.size() {
            format!(
                "has {} values per sample; the input {} holds {}",
                x.ncols(),
                self.input,
                self.input.size()
            )
        } else if y.ncols() != self.output().size() {
            format!(
                "has {} targets per sample; the output {} holds {}",
                y.ncols(),
                self.output(),
                self.output().size()
            )
        } else if let Some(what) = self.bad_token(x) {
            what
        } else {
            return Ok(());
        };
        Err(GraphError::Batch { what })
    }

    /// The first token id that is not a whole number in 0..vocabulary, for token inputs.
    fn bad_token<S: Scalar>(&self, x: ArrayView2<S>) -> Option<String> {
        let Shape::Tokens { vocabulary, .. } = self.input else {
            return None;
        };
        x.indexed_iter().find_map(|((i, t), v)| {
            let id = v.re();
            (id.fract() != 0.0 || !(0.0..vocabulary as f64).contains(&id)).then(|| {
                format!(
                    "has token id {id} at sample {i}, step {t}; ids must be whole numbers from 0 to {}",
                    vocabulary - 1
                )
            })
        })
    }
}

/// Whether two arrays hold the same values bit for bit.
fn same_bits<S: Scalar>(a: &Array2<S>, b: &Array2<S>) -> bool {
    a.dim() == b.dim() && a.iter().zip(b.iter()).all(|(&x, &y)| x.same_bits(y))
}

/// The channels in either set; `None` (unknown: all may differ) when either is.
fn union(a: Option<&[usize]>, b: Option<&[usize]>) -> Option<Vec<usize>> {
    let mut all: Vec<usize> = a?.iter().chain(b?).copied().collect();
    all.sort_unstable();
    all.dedup();
    Some(all)
}

/// Appends to `out` the values of channels `changed` of a standard-layout batch `a` of `m`
/// samples of `shape`: each channel in turn, over its [runs](Shape::channel_runs) in order —
/// what [`Layer::forward_units`](super::Layer::forward_units) reads of a changed input.
fn gather_into<S: Copy>(
    shape: Shape,
    m: usize,
    changed: &[usize],
    a: &Array2<S>,
    out: &mut Vec<S>,
) {
    let values = a
        .as_slice()
        .expect("the graph's batches are standard layout");
    for &c in changed {
        for run in shape.channel_runs(m, c) {
            out.extend_from_slice(&values[run]);
        }
    }
}

/// Sets channels `changed` of `a` to `now` ([`gather_into`]'s order).
fn put<S: Copy>(shape: Shape, m: usize, changed: &[usize], now: &[S], a: &mut Array2<S>) {
    let values = a
        .as_slice_mut()
        .expect("the graph's batches are standard layout");
    let mut rest = now;
    for &c in changed {
        for run in shape.channel_runs(m, c) {
            let (these, more) = rest.split_at(run.len());
            values[run].copy_from_slice(these);
            rest = more;
        }
    }
}

/// Whether channel `c` of `a` holds `now` ([`gather_into`]'s order) bit for bit.
fn same_channel<S: Scalar>(shape: Shape, m: usize, c: usize, now: &[S], a: &Array2<S>) -> bool {
    let values = a
        .as_slice()
        .expect("the graph's batches are standard layout");
    let mut was = shape.channel_runs(m, c).flat_map(|run| &values[run]);
    now.iter()
        .all(|v| was.next().is_some_and(|w| v.same_bits(*w)))
        && was.next().is_none()
}

/// Whether `differ` holds for any value of `channels` in `now` against `then` (both one value
/// per output value, over `m` samples of `shape`). A fold per run, not a slice comparison or an
/// early exit per value: runs are short, and memcmp's call per run cost more than the
/// comparisons.
fn runs_differ<T>(
    shape: Shape,
    m: usize,
    channels: &[usize],
    now: &[T],
    then: &[T],
    differ: impl Fn(&T, &T) -> bool,
) -> bool {
    channels.iter().any(|&c| {
        shape.channel_runs(m, c).any(|run| {
            now[run.clone()]
                .iter()
                .zip(&then[run])
                .fold(false, |any, (a, b)| any | differ(a, b))
        })
    })
}

/// [`Graph::bent`] for one softmax row: whether some value's gap to the base's largest moved
/// past `share` of √(gap² + π²), the distance to log-sum-exp's nearest singularity.
fn softmax_bends<S: Scalar>(was: &[S], now: &[S], share: f64) -> bool {
    let Some(top) = (0..was.len()).max_by(|&a, &b| was[a].re().total_cmp(&was[b].re())) else {
        return false;
    };
    was.iter().zip(now).any(|(w, n)| {
        let gap = w.re() - was[top].re();
        let moved = n.re() - now[top].re() - gap;
        moved.abs() > share * gap.hypot(std::f64::consts::PI)
    })
}

/// Whether two lists of branch choices differ; two empty lists (a kind without choices) are
/// told apart without a call to memcmp, which a slice comparison makes even for none.
fn branches_differ(a: &[u32], b: &[u32]) -> bool {
    !(a.is_empty() && b.is_empty()) && a != b
}

/// Whether any value of `a` lies on the other side of `k` than the same value of `b`: blocks
/// without a branch per value (they vectorise, for AVX2 where the CPU has it), stopping at the
/// first block that differs.
fn sides_differ<S: Scalar>(a: &Array2<S>, b: &Array2<S>, k: f64) -> bool {
    if a.dim() != b.dim() {
        // Nothing to pair value by value (no z kept on one side): counted as crossed, as above.
        return true;
    }
    let differs = |(x, y): (&S, &S)| (x.re() > k) != (y.re() > k);
    match (a.as_slice(), b.as_slice()) {
        #[cfg(target_arch = "x86_64")]
        (Some(a), Some(b)) if std::arch::is_x86_feature_detected!("avx2") => {
            // SAFETY: the CPU has just been found to support AVX2, all that the function needs.
            unsafe { blocks_differ_avx2(a, b, k) }
        }
        (Some(a), Some(b)) => blocks_differ(a, b, k),
        _ => a.iter().zip(b).any(differs),
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn blocks_differ_avx2<S: Scalar>(a: &[S], b: &[S], k: f64) -> bool {
    blocks_differ(a, b, k)
}

/// [`sides_differ`] over two lists of values, in blocks of 64.
#[inline(always)]
fn blocks_differ<S: Scalar>(a: &[S], b: &[S], k: f64) -> bool {
    let differs = |(x, y): (&S, &S)| (x.re() > k) != (y.re() > k);
    a.chunks(64)
        .zip(b.chunks(64))
        .any(|(x, y)| x.iter().zip(y).fold(false, |any, p| any | differs(p)))
}

/// The buffers one thread reuses across the perturbed losses of a check
/// ([`Graph::moved_loss_in`]): the last tail (which the caller reads until the next loss) and
/// the arrays, value lists and channel sets of the tails before it. Nothing in it carries
/// values from one loss to the next: each buffer is written whole before it is read.
#[derive(Debug)]
pub struct Workspace<S> {
    tail: Option<Tail<S>>,
    /// Spare value buffers, any length (an array's is taken back as its list of values).
    spare: Vec<Vec<S>>,
    /// Spare channel sets.
    sets: Vec<Vec<usize>>,
    /// The tail's lists, emptied.
    steps: Vec<Step<S>>,
    outputs: Vec<Array2<S>>,
    changed: Vec<Option<Vec<usize>>>,
}

/// Spare buffers a workspace keeps: a tail holds a few per layer it recomputes.
const SPARE: usize = 16;

impl<S: Copy> Workspace<S> {
    pub fn new() -> Self {
        Workspace {
            tail: None,
            spare: Vec::new(),
            sets: Vec::new(),
            steps: Vec::new(),
            outputs: Vec::new(),
            changed: Vec::new(),
        }
    }

    /// The tail of the last [`Graph::moved_loss_in`].
    pub fn tail(&self) -> Option<&Tail<S>> {
        self.tail.as_ref()
    }

    /// An empty buffer: the smallest spare that holds `len` values, else the largest (which
    /// grows), else a new one with no room yet (a kind that does not use it costs nothing).
    pub(super) fn take(&mut self, len: usize) -> Vec<S> {
        let fits = (0..self.spare.len())
            .filter(|&i| self.spare[i].capacity() >= len)
            .min_by_key(|&i| self.spare[i].capacity());
        let largest = || (0..self.spare.len()).max_by_key(|&i| self.spare[i].capacity());
        let mut v = match fits.or_else(largest) {
            Some(i) => self.spare.swap_remove(i),
            None => Vec::new(),
        };
        v.clear();
        v
    }

    pub(super) fn give(&mut self, v: Vec<S>) {
        if v.capacity() > 0 && self.spare.len() < SPARE {
            self.spare.push(v);
        }
    }

    /// A copy of `a` (standard layout) in a spare buffer.
    fn copy_of(&mut self, a: &Array2<S>) -> Array2<S> {
        let mut v = self.take(a.len());
        match a.as_slice() {
            Some(values) => v.extend_from_slice(values),
            None => v.extend(a.iter().copied()),
        }
        Array2::from_shape_vec(a.raw_dim(), v).expect("as many values as the shape")
    }

    /// A channel set holding `c`.
    fn set(&mut self, c: &[usize]) -> Vec<usize> {
        let mut v = self.sets.pop().unwrap_or_default();
        v.clear();
        v.extend_from_slice(c);
        v
    }

    fn give_set(&mut self, v: Vec<usize>) {
        if self.sets.len() < SPARE {
            self.sets.push(v);
        }
    }

    pub(super) fn give_array(&mut self, a: Array2<S>) {
        let (v, offset) = a.into_raw_vec_and_offset();
        if offset.is_none_or(|o| o == 0) {
            self.give(v);
        }
    }

    /// Takes the last tail's buffers back.
    fn recycle(&mut self) {
        let Some(tail) = self.tail.take() else {
            return;
        };
        let Tail {
            mut steps,
            mut outputs,
            settled,
            moved_channel,
            mut changed,
            ..
        } = tail;
        for set in changed.drain(..).flatten() {
            self.give_set(set);
        }
        self.changed = changed;
        for step in steps.drain(..) {
            self.give_array(step.out);
        }
        for a in outputs.drain(..) {
            self.give_array(a);
        }
        if let Some((z, a)) = settled {
            self.give_array(z);
            self.give_array(a);
        }
        if let Some((_, z)) = moved_channel {
            self.give(z);
        }
        self.steps = steps;
        self.outputs = outputs;
    }
}

impl<S: Copy> Default for Workspace<S> {
    fn default() -> Self {
        Workspace::new()
    }
}

/// One layer's branches from its step: the kind's choices and the activation's sides.
fn layer_branches<S: Scalar>(node: &Node, step: &Step<S>) -> LayerBranches {
    let (sides, on_kink) = match node.activation.kink() {
        Some(k) => (
            step.out.iter().map(|v| v.re() > k).collect(),
            step.out.iter().filter(|v| v.re() == k).count(),
        ),
        None => (Vec::new(), 0),
    };
    LayerBranches {
        kind: step.branches.clone(),
        sides,
        ties: step.ties + on_kink,
    }
}

fn accumulate<S: Scalar>(slot: &mut Option<Array2<S>>, g: Array2<S>) {
    match slot {
        Some(acc) => *acc += &g,
        None => *slot = Some(g),
    }
}
