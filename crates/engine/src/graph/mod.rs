//! The layer graph: a chain of layers of many kinds (dense, convolution, pooling, normalisation,
//! residual additions, embeddings, recurrent cells, attention) with named taps, its loss under the description's conventions, and the
//! analytic backward pass with the input gradient and per-kind catalogued mistakes.
//!
//! Each kind is one module that provides everything about it: the output shape from the input
//! shape (with typed errors), its parameter tensors ([`ParamSpec`]), the forward and backward pass
//! generic over the scalar ([`Layer`]), the branches it takes at non-smooth points, and its
//! mistakes. The graph never matches on kinds: it holds `Box<dyn AnyLayer>` and asks each scalar
//! for its view of the layer ([`LayerScalar::layer`]). Adding a kind is adding a file.
//!
//! Activations flow between layers as `Array2<S>`: one sample per row, the sample's values in C
//! order of its [`Shape`] ([channels, height, width] for an image).
//!
//! ```
//! use ndarray::{Array2, ArrayD, IxDyn};
//! use plumb_engine::Activation;
//! use plumb_engine::graph::{Conv, ConvSettings, Dense, Flatten, GraphBuilder, LossConfig, Shape};
//!
//! let mut b = GraphBuilder::new(Shape::Signal { channels: 2, length: 9 }, LossConfig::squared_error());
//! b.push(None, Activation::Relu, |s| Conv::new(&ConvSettings::conv1d(3, 3), s))?;
//! b.push(None, Activation::Identity, |s| Flatten::new(s))?;
//! b.push(None, Activation::Identity, |s| Dense::new(1, s))?;
//! let g = b.finish()?;
//! let params: Vec<ArrayD<f64>> =
//!     g.tensors().iter().map(|t| ArrayD::from_elem(IxDyn(&t.spec.shape), 0.1)).collect();
//! let x = Array2::from_elem((4, 18), 0.5);
//! let y = Array2::zeros((4, 1));
//! let grad = g.gradient(&params, x.view(), y.view(), None);
//! assert_eq!(grad.params[0].shape(), &[3, 2, 3]); // out-channels × in-channels × kernel
//! assert_eq!(grad.input.dim(), (4, 18));
//! # Ok::<(), plumb_engine::graph::GraphError>(())
//! ```

mod add;
mod attention;
mod batch_norm;
mod change;
mod conv;
mod dense;
mod embedding;
mod flatten;
mod global_pool;
mod gru;
mod health;
mod hooks;
mod layer_norm;
mod loss;
mod lstm;
mod network;
mod norm;
mod pool;
mod recurrent;
mod response;
mod rms_norm;
mod rnn;
mod sequence;
mod shape;
mod storage;
mod window;

use std::fmt::Debug;

use ndarray::{Array2, ArrayD, ArrayView2};
use num_complex::{Complex32, Complex64};
use thiserror::Error;

use crate::Scalar;

pub use crate::convention::{L2Divisor, Reduction};
pub use add::Add;
pub use attention::Attention;
pub use batch_norm::BatchNorm;
pub use change::{Along, Changed, Difference};
pub use conv::{Conv, ConvSettings, Padding};
pub use dense::Dense;
pub use embedding::Embedding;
pub use flatten::Flatten;
pub use global_pool::GlobalAvgPool;
pub use gru::{Gru, GruCell, Reset};
pub use health::Inside;
pub use hooks::{Hooks, Regularization, Samples, Slope};
pub use layer_norm::LayerNorm;
pub use loss::LossConfig;
pub use lstm::{Lstm, LstmCell};
pub use network::{
    Branches, Gradient, Graph, GraphBuilder, GraphError, LayerBranches, Moving, Node, Planted,
    Tail, TensorSpec, Trace, Workspace,
};
pub use pool::{Pool, PoolKind};
pub use recurrent::{Output, Recurrent};
pub use response::{MOST_VALUES, Responded, Response, fourth_bound, slope_bounds, slopes};
pub use rms_norm::RmsNorm;
pub use rnn::{Rnn, RnnCell};
pub use shape::Shape;
pub use storage::{Storage, StorageError};
pub use window::output_size;

/// What a parameter tensor is for: it decides L2 decay, initialisation and the audit's measures.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Role {
    Weight,
    Bias,
    Scale,
    Shift,
    Table,
}

/// One parameter tensor a layer declares, in its canonical axis order.
#[derive(Clone, Debug, PartialEq)]
pub struct ParamSpec {
    /// The name after the layer's prefix: "weight", "bias", "scale", "shift".
    pub suffix: &'static str,
    /// Canonical shape: a dense weight is units × fan-in, a conv weight o × i × (h × w | k).
    pub shape: Vec<usize>,
    pub role: Role,
    /// Whether the L2 term covers it (weights do; biases only under `l2-on-bias`).
    pub decays: bool,
    /// The values one output reads (a conv's fan-in is in-channels × kernel area, He et al. 2015).
    pub fan_in: usize,
    /// The outputs one input value feeds through this tensor.
    pub fan_out: usize,
}

/// What a layer's forward pass hands on: its output (before the graph's activation) and what its
/// backward pass needs again.
#[derive(Clone, Debug)]
pub struct Step<S> {
    /// m × output size.
    pub out: Array2<S>,
    /// Whatever the kind keeps for its backward pass (columns of a convolution, a norm's x̂ …).
    pub saved: Vec<ArrayD<S>>,
    /// The branch the kind took at each non-smooth point (max-pool: the argmax of each window as
    /// an index into the sample's input); empty for smooth kinds.
    pub branches: Vec<u32>,
    /// How many of those choices were ties at this point (a tie is itself a non-smooth point).
    pub ties: usize,
}

impl<S> Step<S> {
    /// A step that keeps nothing and branches nowhere.
    pub fn plain(out: Array2<S>) -> Self {
        Step {
            out,
            saved: Vec::new(),
            branches: Vec::new(),
            ties: 0,
        }
    }
}

/// What a layer's backward pass returns.
#[derive(Clone, Debug)]
pub struct Back<S> {
    /// One gradient per declared parameter tensor, canonical shapes.
    pub params: Vec<ArrayD<S>>,
    /// The gradient with respect to the layer's input (m × input size); `None` when the pass was
    /// told nobody reads it (the first layer's, unless the caller wants the input gradient).
    pub dx: Option<Array2<S>>,
    /// The gradient with respect to the tapped layer's output (`add` only); `None` when none
    /// flows there.
    pub dskip: Option<Array2<S>>,
}

/// The scalar-free side of a layer kind: shapes, parameters, mistakes.
pub trait Kind: Send + Sync + Debug {
    /// The description's name of the kind ("conv2d", "batch-norm", …).
    fn kind(&self) -> &'static str;
    /// One sample's shape going in.
    fn input(&self) -> Shape;
    /// One sample's shape coming out.
    fn output(&self) -> Shape;
    /// Values one sample's pass holds at once besides its input and output — saved tensors and
    /// scratch (a convolution's window matrix, attention's weights, a recurrent layer's states
    /// and gates over every step): what a caller budgets before a pass allocates them.
    fn held(&self) -> usize {
        0
    }
    /// The parameter tensors, in the order [`Layer`] receives them.
    fn params(&self) -> Vec<ParamSpec> {
        Vec::new()
    }
    /// The catalogued mistake codes (DESIGN §7) this kind's backward pass can reproduce.
    fn mistakes(&self) -> &'static [&'static str] {
        &[]
    }
    /// The earlier layer whose output this one reads besides its input (`add`'s `from`).
    fn tap(&self) -> Option<&str> {
        None
    }
    /// Whether the forward pass records branch choices in [`Step::branches`].
    fn branches(&self) -> bool {
        false
    }
    /// A flat index of parameter tensor `tensor` in the layer's own terms (unit, channel, kernel
    /// position). The default names the canonical multi-index.
    fn locate(&self, tensor: usize, flat: usize) -> String {
        let shape = &self.params()[tensor].shape;
        format!("index {:?}", unravel(flat, shape))
    }
    /// How many blocks tensor `tensor` holds that a sampled check must each reach (an lstm's or
    /// gru's gate blocks, an attention projection's heads), and the block of flat index `flat`:
    /// a mistake may sit in one block alone. One block by default.
    fn sample_blocks(&self, tensor: usize) -> usize {
        let _ = tensor;
        1
    }
    fn sample_block(&self, tensor: usize, flat: usize) -> usize {
        let _ = (tensor, flat);
        0
    }
    /// The parameter tensors whose first axis runs over this layer's output units (channels):
    /// unit u's incoming parameters are slice u of each (the audit's duplicate units). Empty when
    /// a unit owns no such slices (gate blocks, attention heads, norms).
    fn unit_tensors(&self) -> Vec<usize> {
        Vec::new()
    }
    /// The parameter tensor whose second axis runs over the units (channels) of this layer's
    /// input, read directly: slice [:, u, …] holds input unit u's outgoing weights.
    fn input_unit_tensor(&self) -> Option<usize> {
        None
    }
    /// The activation applied inside the kind (a recurrent cell's), when there is one: the audit
    /// picks the initialisation scale it calls for.
    fn inner_activation(&self) -> Option<crate::Activation> {
        None
    }
    /// The one channel of the output's feature axis (a unit, a conv's out-channel, a norm's
    /// feature) that the kind's [hint](Layer::forward_moved) changes when entry `index` of its
    /// tensor `tensor` moves; the graph then recomputes only that channel in the channel-wise
    /// layers above ([`Layer::forward_channels`]). `None` when the hint does not say.
    fn moved_channel(&self, tensor: usize, index: usize) -> Option<usize> {
        let _ = (tensor, index);
        None
    }
    /// Whether z, at a fixed input, is linear in the layer's tensors together (a product plus a
    /// bias, γ·x̂ + β): then z(θ + t·v) = z(θ) + t·z_v with z_v the pass with tensors v, which
    /// several steps along one direction can share ([`Graph::along_change`]).
    fn linear_in_params(&self) -> bool {
        false
    }
    /// What the forward step `step` on batch `x` shows the release audit inside the layer.
    fn inside(&self, x: ArrayView2<f64>, step: &Step<f64>) -> Vec<Inside> {
        let _ = (x, step);
        Vec::new()
    }
}

/// The forward and backward pass of a kind in one scalar type.
pub trait Layer<S: LayerScalar>: Send + Sync {
    /// The layer's output for a batch `x` (m × input size); `skip` is the tapped layer's output
    /// when the kind has a [tap](Kind::tap).
    fn forward(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        skip: Option<ArrayView2<S>>,
    ) -> Step<S>;

    /// [`forward`](Layer::forward) with its output written into `buffer` (any length and
    /// contents on entry) when the kind can: what the graph's perturbed passes call with a
    /// [`Workspace`]'s buffer. The same values as `forward`; by default that, `buffer` unused.
    fn forward_into(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        skip: Option<ArrayView2<S>>,
        buffer: &mut Vec<S>,
    ) -> Step<S> {
        let _ = buffer;
        self.forward(params, x, skip)
    }

    /// The gradients of the layer's parameters and input from `dout`, the gradient of its output.
    /// `mistake`, one of the kind's [catalogued codes](Kind::mistakes), asks for the gradient that
    /// mistake would produce instead. `need_input` false says nobody reads the input gradient:
    /// the kind leaves [`Back::dx`] `None` and skips its work (for a dense first layer over many
    /// inputs, a third of the backward pass). `step.out` may be empty: the graph's whole-batch
    /// gradient frees it once the activation's backward has read it; a kind reads what it saved.
    fn backward(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        step: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S>;

    /// [`forward`](Layer::forward) of the graph's first layer on a batch a file stored in f32,
    /// widened to S where it is read rather than as a whole first: the same values bit for bit
    /// as `forward` on the widened batch. `None`: the kind reads no f32 batch (the graph then
    /// widens the whole batch), and [`backward_f32`](Layer::backward_f32) is not called.
    fn forward_f32(&self, params: &[ArrayD<S>], x: ArrayView2<f32>) -> Option<Step<S>> {
        let _ = (params, x);
        None
    }

    /// [`backward`](Layer::backward) over the f32 batch of a step that
    /// [`forward_f32`](Layer::forward_f32) made, with the same values bit for bit as on the
    /// widened batch.
    fn backward_f32(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<f32>,
        step: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let x = x.mapv(|v| S::from_f64(f64::from(v)));
        self.backward(params, x.view(), step, dout, mistake, need_input)
    }

    /// The kind's incremental-evaluation hint: the step after one parameter entry moved
    /// (`moved`), from the `base` step of the same input `x` at `params` (the unmoved values),
    /// doing less work than [`forward`](Layer::forward). `None` when the kind has no hint and the
    /// graph recomputes the layer. The step serves loss evaluations only: it may keep nothing in
    /// [`Step::saved`].
    fn forward_moved(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Step<S>,
        moved: &Moved<S>,
    ) -> Option<Step<S>> {
        let _ = (params, x, base, moved);
        None
    }

    /// The step for an input `x` (and `skip`) that differs from the base step's input only in
    /// the channels `changed` of its feature axis. A channel-wise kind (each output channel
    /// reads its own input channel: batch norm, `add`, global average pool) recomputes those
    /// channels with the arithmetic of [`forward`](Layer::forward), so they equal a full pass
    /// bit for bit, and keeps the base's others; the output's changed channels are the same
    /// indices. `None` for kinds that mix channels (the graph recomputes the layer). The step
    /// serves loss evaluations only: it may keep nothing in [`Step::saved`].
    fn forward_channels(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        skip: Option<ArrayView2<S>>,
        base: &Step<S>,
        changed: &[usize],
    ) -> Option<Step<S>> {
        let _ = (params, x, skip, base, changed);
        None
    }

    /// The step for an input that differs from `base_x`, the base step's input, only in the
    /// units (channels) `changed` of its feature axis, whose new values are `now`: each changed
    /// channel in turn, over its runs in flat order (a dense layer's unit is one value per
    /// sample and step, a conv's channel one run of positions per sample) — all such a kind
    /// reads of the new input, so the graph need not build it whole. For a kind whose output is
    /// linear in its input (dense, conv): the base output plus the change's product with those
    /// units' weights, a rank-k update instead of the whole product. Every output channel may
    /// change. Not bit for bit a full pass — the update adds to the base's rounded sums where a
    /// full pass sums again; docs/engine.md gives the bound — so a kind offers it only where it
    /// saves most of the work (few units against its fan-in), and `None` otherwise (the graph
    /// recomputes the layer). The step serves loss evaluations only: it may keep nothing in
    /// [`Step::saved`].
    fn forward_units(
        &self,
        params: &[ArrayD<S>],
        base_x: ArrayView2<S>,
        base: &Step<S>,
        changed: &[usize],
        now: &[S],
    ) -> Option<Step<S>> {
        let _ = (params, base_x, base, changed, now);
        None
    }

    /// [`forward_units`](Layer::forward_units) with its output written into `buffer` (any
    /// length and contents on entry) when the kind can, rather than into a new array: the graph
    /// hands in a [`Workspace`]'s buffer, so a check's perturbed passes allocate nothing in the
    /// steady state. The same values as `forward_units`; by default that, and `buffer` unused.
    fn forward_units_into(
        &self,
        params: &[ArrayD<S>],
        base_x: ArrayView2<S>,
        base: &Step<S>,
        changed: &[usize],
        now: &[S],
        buffer: &mut Vec<S>,
    ) -> Option<Step<S>> {
        let _ = buffer;
        self.forward_units(params, base_x, base, changed, now)
    }

    /// The values of the one output channel the kind's [hint](Layer::forward_moved) changes
    /// ([`Kind::moved_channel`]) after `moved`, over its runs in flat order (as
    /// [`forward_units`](Layer::forward_units) reads them), written to `out` — without building
    /// the output, most of which is the base's: what the graph needs of the moved layer when
    /// only the next layer reads it and updates from its changed channels. The same values as
    /// the hint's step holds there. `false` (and `out` untouched) when the kind has no such
    /// path; the graph then takes the hint's whole step.
    fn moved_values(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Step<S>,
        moved: &Moved<S>,
        out: &mut Vec<S>,
    ) -> bool {
        let _ = (params, x, base, moved, out);
        false
    }
}

/// One parameter entry moved by `delta`: entry `index` (flat, C order) of tensor `tensor`,
/// counted within the layer's tensors (in [`Layer::forward_moved`]) or the graph's (in
/// [`Graph::forward_moved`]).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Moved<S> {
    pub tensor: usize,
    pub index: usize,
    pub delta: S,
}

/// Dual numbers join the scalars a layer must support when the `dual` feature is on.
#[cfg(feature = "dual")]
pub trait DualLayer: Layer<num_dual::Dual64> {}
#[cfg(feature = "dual")]
impl<T: Layer<num_dual::Dual64> + ?Sized> DualLayer for T {}
/// Dual numbers join the scalars a layer must support when the `dual` feature is on.
#[cfg(not(feature = "dual"))]
pub trait DualLayer {}
#[cfg(not(feature = "dual"))]
impl<T: ?Sized> DualLayer for T {}

/// A layer in every scalar the engine computes in: what the graph holds.
pub trait AnyLayer:
    Kind + Layer<f64> + Layer<f32> + Layer<Complex64> + Layer<Complex32> + DualLayer
{
}

impl<T> AnyLayer for T where
    T: Kind + Layer<f64> + Layer<f32> + Layer<Complex64> + Layer<Complex32> + DualLayer
{
}

/// Boxes each kind as the graph holds it. These impls are not generic, so the passes of every
/// kind in every scalar are compiled here once; a generic boxing in
/// [`GraphBuilder::push`] compiled them again in every crate (and test binary) that builds a graph.
macro_rules! boxed_kinds {
    ($($kind:ty),* $(,)?) => {
        $(
            impl From<$kind> for Box<dyn AnyLayer> {
                #[inline(never)]
                fn from(layer: $kind) -> Self {
                    Box::new(layer)
                }
            }
        )*
    };
}

boxed_kinds!(
    Add,
    Attention,
    BatchNorm,
    Conv,
    Dense,
    Embedding,
    Flatten,
    GlobalAvgPool,
    Gru,
    LayerNorm,
    Lstm,
    Pool,
    RmsNorm,
    Rnn,
);

/// The scalars the graph computes in: [`Scalar`] plus what the new kinds need (a square root for
/// the norms) and the way to see a layer in this scalar.
///
/// Kept apart from [`Scalar`], which the dense engine used alone; now that the graph is the only
/// engine the two could merge.
pub trait LayerScalar: Scalar + 'static {
    fn sqrt(self) -> Self;
    /// This scalar's view of a layer (trait upcasting).
    fn layer(layer: &dyn AnyLayer) -> &dyn Layer<Self>;
}

macro_rules! layer_scalar {
    ($t:ty, $sqrt:expr) => {
        impl LayerScalar for $t {
            #[inline]
            fn sqrt(self) -> Self {
                $sqrt(self)
            }
            fn layer(layer: &dyn AnyLayer) -> &dyn Layer<Self> {
                layer
            }
        }
    };
}

layer_scalar!(f64, f64::sqrt);
layer_scalar!(f32, f32::sqrt);
layer_scalar!(Complex64, Complex64::sqrt);
layer_scalar!(Complex32, Complex32::sqrt);
#[cfg(feature = "dual")]
layer_scalar!(num_dual::Dual64, |v: num_dual::Dual64| {
    num_dual::DualNum::sqrt(&v)
});

/// Why a layer cannot take the shape it is given.
#[derive(Clone, Debug, PartialEq, Error)]
pub enum ShapeError {
    #[error("{kind} reads {needs}, but its input is {found}; {fix}")]
    Input {
        kind: &'static str,
        needs: &'static str,
        found: Shape,
        fix: &'static str,
    },
    #[error("`{key}` is 0; it must be at least 1")]
    Zero { key: &'static str },
    #[error(
        "the {axis} kernel spans {extent} positions (kernel {kernel}, dilation {dilation}) but the padded input has {padded}; use a smaller kernel or dilation, or pad by at least {need} more"
    )]
    KernelTooLarge {
        axis: &'static str,
        kernel: usize,
        dilation: usize,
        extent: usize,
        padded: usize,
        need: usize,
    },
    #[error(
        "the {axis} window has {size} positions but the input has {found}; use a window of at most {found}"
    )]
    WindowTooLarge {
        axis: &'static str,
        size: usize,
        found: usize,
    },
    #[error(
        "`padding = \"same\"` needs stride 1 (stride is {stride}); give the padding as a number"
    )]
    SameNeedsStride1 { stride: usize },
    #[error("`{key}` has {found} values; {kind} takes {needs}")]
    Arity {
        key: &'static str,
        kind: &'static str,
        found: usize,
        needs: usize,
    },
    #[error("`epsilon` is {value}; it must be a finite number > 0")]
    Epsilon { value: f64 },
    #[error("`{key}` is \"{found}\"; {kind} takes one of {allowed:?}")]
    Choice {
        key: &'static str,
        kind: &'static str,
        found: String,
        allowed: &'static [&'static str],
    },
    #[error(
        "`gate-order` is \"{found}\"; {kind} takes each of the letters \"{letters}\" exactly once, in the order the file stacks the gate blocks"
    )]
    GateOrder {
        kind: &'static str,
        found: String,
        letters: &'static str,
    },
    #[error(
        "the width {width} is not divisible by `heads = {heads}`; use a number of heads that divides {width}"
    )]
    Heads { width: usize, heads: usize },
}

/// A matrix reshaped in C order whatever its memory layout (a matrix product may hand back a
/// column-major result).
pub(crate) fn reshape<S: Clone>(a: Array2<S>, shape: (usize, usize)) -> Array2<S> {
    let a = if a.is_standard_layout() {
        a
    } else {
        a.as_standard_layout().into_owned()
    };
    a.into_shape_with_order(shape).expect("same element count")
}

/// The multi-index of flat index `flat` in C order of `shape`.
pub(crate) fn unravel(mut flat: usize, shape: &[usize]) -> Vec<usize> {
    let mut index = vec![0; shape.len()];
    for (slot, &n) in index.iter_mut().zip(shape).rev() {
        *slot = flat % n.max(1);
        flat /= n.max(1);
    }
    index
}
