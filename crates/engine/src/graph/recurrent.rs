//! The recurrent core rnn, lstm and gru share: the loop over steps from a zero initial state, the
//! `output` ("last" or "all"), and backpropagation through time with the recurrent mistakes.
//! Each cell ([`Cell`]) supplies one step's forward and backward arithmetic.
//!
//! Tensors: `input.weight` (blocks · units × fan-in), `recurrent.weight` (blocks · units × units),
//! then the cell's biases (blocks · units each); the blocks are stacked in the declared gate order.
//!
//! Catalogued mistakes (DESIGN §7):
//! - `time-truncated`: only the last step's backward pass runs, from that step's incoming gradient
//!   alone; the parameters' gradient is that step's term, the input gradient is zero on earlier
//!   steps;
//! - `state-gradient-dropped`: the state's gradient (h, and c for lstm) is not carried to the step
//!   before: each step starts from its own incoming gradient only;
//! - `time-overwritten`: the parameters' gradient is assigned per step, not summed; the loop runs
//!   last to first, so the first step's term remains (the input gradient is right);
//! - `gates-reordered` (lstm, gru): the parameters' gradient with its gate blocks in the reverse of
//!   the declared order (block k holds the gradient of block blocks − 1 − k).
//!
//! Incremental hint: none; one entry moves every later step's state, so the graph recomputes the
//! layer.

use std::fmt::Debug;

use ndarray::{Array2, Array3, Array4, ArrayD, ArrayView1, ArrayView2, Axis, Ix1, Ix2, Slice, s};

use super::sequence::Steps;
use super::{Back, Kind, Layer, LayerScalar, ParamSpec, Role, Shape, ShapeError, Step, reshape};
use crate::Scalar;

/// The codes every recurrent kind reproduces.
pub(crate) const TIME_MISTAKES: [&str; 3] = [
    "time-truncated",
    "state-gradient-dropped",
    "time-overwritten",
];

/// What a recurrent layer passes on.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Output {
    /// The last step's state: [units].
    Last,
    /// Every step's state: [steps, units].
    All,
}

impl Output {
    pub const NAMES: &'static [&'static str] = &["last", "all"];

    /// The description's `output` value.
    pub fn parse(kind: &'static str, value: &str) -> Result<Output, ShapeError> {
        match value {
            "last" => Ok(Output::Last),
            "all" => Ok(Output::All),
            _ => Err(ShapeError::Choice {
                key: "output",
                kind,
                found: value.to_string(),
                allowed: Output::NAMES,
            }),
        }
    }
}

/// One step of a recurrent cell. States are m × units; state 0 is h, the one passed on.
pub trait Cell: Clone + Debug + Send + Sync + 'static {
    fn kind(&self) -> &'static str;
    /// The gate letters in the declared block order (empty for a single block).
    fn letters(&self) -> Vec<char>;
    /// Gate blocks stacked in each tensor.
    fn blocks(&self) -> usize;
    /// States carried between steps (lstm: h and c).
    fn states(&self) -> usize {
        1
    }
    /// The bias tensors' suffixes.
    fn biases(&self) -> &'static [&'static str];
    fn mistakes(&self) -> &'static [&'static str];
    /// The kink of the cell's activation, when it has one: the forward pass records the side of
    /// every value it saves.
    fn kink(&self) -> Option<f64> {
        None
    }
    /// The cell's activation (the candidate's for lstm and gru).
    fn activation(&self) -> crate::Activation {
        crate::Activation::Tanh
    }
    /// The sigmoid gates the cell saves each step: (letter, block of `units` columns in the saved
    /// values). Empty for a cell without gates.
    fn gates(&self) -> Vec<(char, usize)> {
        Vec::new()
    }
    /// The new states from step input `x` (m × fan-in) and the previous states, and what the
    /// backward pass needs (m × anything).
    fn forward<S: LayerScalar>(
        &self,
        p: &[ArrayD<S>],
        x: ArrayView2<S>,
        prev: &[Array2<S>],
    ) -> (Vec<Array2<S>>, Array2<S>);
    /// From the gradients `d` of this step's states: the parameters' terms, the gradient of the
    /// input's pre-activations (m × blocks · units: dx is it times the input weight, formed by
    /// the layer only when someone reads it), and the gradients of the previous states.
    #[allow(clippy::too_many_arguments)]
    fn backward<S: LayerScalar>(
        &self,
        p: &[ArrayD<S>],
        x: ArrayView2<S>,
        prev: &[Array2<S>],
        cur: &[Array2<S>],
        saved: ArrayView2<S>,
        d: &[Array2<S>],
    ) -> (Vec<ArrayD<S>>, Array2<S>, Vec<Array2<S>>);
}

/// A recurrent layer bound to its input shape.
#[derive(Clone, Debug)]
pub struct Recurrent<C> {
    cell: C,
    units: usize,
    input: Shape,
    seq: Steps,
    output: Output,
}

impl<C: Cell> Recurrent<C> {
    pub(crate) fn build(
        cell: C,
        units: usize,
        output: &str,
        input: &Shape,
    ) -> Result<Self, ShapeError> {
        let output = Output::parse(cell.kind(), output)?;
        if units == 0 {
            return Err(ShapeError::Zero { key: "units" });
        }
        Ok(Recurrent {
            seq: Steps::of(cell.kind(), input)?,
            cell,
            units,
            input: *input,
            output,
        })
    }

    pub fn cell(&self) -> &C {
        &self.cell
    }

    fn zeros<S: Scalar>(&self, m: usize) -> Vec<Array2<S>> {
        vec![Array2::zeros((m, self.units)); self.cell.states()]
    }
}

impl<C: Cell> Kind for Recurrent<C> {
    fn kind(&self) -> &'static str {
        self.cell.kind()
    }

    fn input(&self) -> Shape {
        self.input
    }

    /// Every step's states and what the cell saves (at most one pre-activation per gate block
    /// and unit, and the candidate's), and the input in time-major order.
    fn held(&self) -> usize {
        let per_step = (self.cell.states() + self.cell.blocks() + 1).saturating_mul(self.units);
        self.seq
            .steps
            .saturating_add(1)
            .saturating_mul(per_step.saturating_add(self.seq.width))
    }

    fn output(&self) -> Shape {
        match self.output {
            Output::Last => Shape::Flat(self.units),
            Output::All => Shape::Sequence {
                steps: self.seq.steps,
                width: self.units,
            },
        }
    }

    fn params(&self) -> Vec<ParamSpec> {
        let rows = self.cell.blocks() * self.units;
        let weight = |suffix, cols| ParamSpec {
            suffix,
            shape: vec![rows, cols],
            role: Role::Weight,
            decays: true,
            fan_in: cols,
            fan_out: rows,
        };
        let mut specs = vec![
            weight("input.weight", self.seq.width),
            weight("recurrent.weight", self.units),
        ];
        specs.extend(self.cell.biases().iter().map(|&suffix| ParamSpec {
            suffix,
            shape: vec![rows],
            role: Role::Bias,
            decays: false,
            fan_in: 1,
            fan_out: rows,
        }));
        specs
    }

    fn mistakes(&self) -> &'static [&'static str] {
        self.cell.mistakes()
    }

    fn branches(&self) -> bool {
        self.cell.kink().is_some()
    }

    fn inner_activation(&self) -> Option<crate::Activation> {
        Some(self.cell.activation())
    }

    fn inside(&self, _: ArrayView2<f64>, step: &Step<f64>) -> Vec<super::Inside> {
        let saved = step.saved[1]
            .view()
            .into_dimensionality::<ndarray::Ix3>()
            .expect("saved");
        let (steps, m, u) = (saved.shape()[0], saved.shape()[1], self.units);
        self.cell
            .gates()
            .into_iter()
            .map(|(letter, k)| {
                let block = saved.slice(s![.., .., k * u..(k + 1) * u]);
                super::Inside::Gate {
                    letter,
                    values: block
                        .to_owned()
                        .into_shape_with_order((steps * m, u))
                        .expect("same size"),
                }
            })
            .collect()
    }

    fn sample_blocks(&self, _: usize) -> usize {
        self.cell.blocks()
    }

    fn sample_block(&self, tensor: usize, flat: usize) -> usize {
        let cols = match tensor {
            0 => self.seq.width,
            1 => self.units,
            _ => 1,
        };
        flat / cols / self.units
    }

    fn locate(&self, tensor: usize, flat: usize) -> String {
        let shape = &self.params()[tensor].shape;
        let cols = if shape.len() == 2 { shape[1] } else { 1 };
        let row = flat / cols;
        let (block, unit) = (row / self.units, row % self.units);
        let gate = match self.cell.letters().get(block) {
            Some(letter) => format!("gate {letter}, "),
            None => String::new(),
        };
        match tensor {
            0 => format!("{gate}unit {unit}, input {}", flat % cols),
            1 => format!("{gate}unit {unit}, state {}", flat % cols),
            _ => format!("{gate}unit {unit}"),
        }
    }
}

impl<S: LayerScalar, C: Cell> Layer<S> for Recurrent<C> {
    fn forward(&self, params: &[ArrayD<S>], x: ArrayView2<S>, _: Option<ArrayView2<S>>) -> Step<S> {
        let xs = self.seq.time_major(x);
        let (m, u, steps) = (x.nrows(), self.units, self.seq.steps);
        let ns = self.cell.states();
        let mut states = Array4::zeros((steps + 1, ns, m, u));
        // What the cell saves goes straight into one array (its width known from the first
        // step): no array per step, and no second copy to stack them.
        let mut saved: Option<Array3<S>> = None;
        let mut prev = self.zeros(m);
        for t in 0..steps {
            let (next, kept) = self.cell.forward(params, xs.index_axis(Axis(0), t), &prev);
            for (k, state) in next.iter().enumerate() {
                states.slice_mut(s![t + 1, k, .., ..]).assign(state);
            }
            saved
                .get_or_insert_with(|| Array3::zeros((steps, kept.nrows(), kept.ncols())))
                .index_axis_mut(Axis(0), t)
                .assign(&kept);
            prev = next;
        }
        let saved = saved.unwrap_or_else(|| Array3::zeros((0, m, 0)));
        let out = match self.output {
            Output::Last => reshape(prev.swap_remove(0), (m, u)),
            Output::All => {
                Array2::from_shape_fn((m, steps * u), |(i, j)| states[[j / u + 1, 0, i, j % u]])
            }
        };
        let (mut branches, mut ties) = (Vec::new(), 0);
        if let Some(k) = self.cell.kink() {
            for v in saved.iter() {
                branches.push((v.re() > k) as u32);
                ties += (v.re() == k) as usize;
            }
        }
        Step {
            out,
            saved: vec![states.into_dyn(), saved.into_dyn()],
            branches,
            ties,
        }
    }

    fn backward(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        step: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let xs = self.seq.time_major(x);
        let (m, u, steps) = (x.nrows(), self.units, self.seq.steps);
        let states = step.saved[0]
            .view()
            .into_dimensionality::<ndarray::Ix4>()
            .expect("states");
        let saved = step.saved[1]
            .view()
            .into_dimensionality::<ndarray::Ix3>()
            .expect("saved");
        let mut incoming = Array3::zeros((steps, m, u));
        match self.output {
            Output::Last => incoming.index_axis_mut(Axis(0), steps - 1).assign(&dout),
            Output::All => {
                for ((t, i, j), v) in incoming.indexed_iter_mut() {
                    *v = dout[[i, t * u + j]];
                }
            }
        }
        let state = |t: usize| -> Vec<Array2<S>> {
            (0..self.cell.states())
                .map(|k| states.slice(s![t, k, .., ..]).to_owned())
                .collect()
        };
        let mut grads: Vec<ArrayD<S>> = params.iter().map(|p| ArrayD::zeros(p.raw_dim())).collect();
        let mut dxs = need_input.then(|| Array3::zeros((steps, m, self.seq.width)));
        let w_in = mat(&params[0]);
        let mut carry = self.zeros(m);
        let first = if mistake == Some("time-truncated") {
            steps - 1
        } else {
            0
        };
        for t in (first..steps).rev() {
            let mut d = carry;
            d[0] += &incoming.index_axis(Axis(0), t);
            let (terms, dgates, dprev) = self.cell.backward(
                params,
                xs.index_axis(Axis(0), t),
                &state(t),
                &state(t + 1),
                saved.index_axis(Axis(0), t),
                &d,
            );
            for (acc, term) in grads.iter_mut().zip(terms) {
                if mistake == Some("time-overwritten") {
                    *acc = term;
                } else {
                    *acc += &term;
                }
            }
            if let Some(dxs) = dxs.as_mut() {
                dxs.index_axis_mut(Axis(0), t).assign(&dgates.dot(&w_in));
            }
            carry = if mistake == Some("state-gradient-dropped") {
                self.zeros(m)
            } else {
                dprev
            };
        }
        if mistake == Some("gates-reordered") {
            let blocks = self.cell.blocks();
            grads = grads.iter().map(|g| reverse_blocks(g, blocks)).collect();
        }
        Back {
            params: grads,
            dx: dxs.map(|dxs| self.seq.batch_of_time_major(&dxs)),
            dskip: None,
        }
    }
}

/// A tensor with its blocks along axis 0 in reverse order.
fn reverse_blocks<S: Clone>(g: &ArrayD<S>, blocks: usize) -> ArrayD<S> {
    let n = g.shape()[0] / blocks;
    let mut out = g.clone();
    for k in 0..blocks {
        let from = (blocks - 1 - k) * n;
        out.slice_axis_mut(Axis(0), Slice::from(k * n..(k + 1) * n))
            .assign(&g.slice_axis(Axis(0), Slice::from(from..from + n)));
    }
    out
}

/// For each canonical gate letter (in `letters` order), the block it takes in the declared
/// order `given`, which must hold each letter once.
pub(crate) fn gate_order<const N: usize>(
    kind: &'static str,
    letters: &'static str,
    given: &str,
) -> Result<[usize; N], ShapeError> {
    let bad = || ShapeError::GateOrder {
        kind,
        found: given.to_string(),
        letters,
    };
    let given: Vec<char> = given.chars().collect();
    if given.len() != N {
        return Err(bad());
    }
    let mut order = [0; N];
    for (c, letter) in letters.chars().enumerate() {
        let at: Vec<usize> = (0..N).filter(|&k| given[k] == letter).collect();
        match at[..] {
            [k] => order[c] = k,
            _ => return Err(bad()),
        }
    }
    Ok(order)
}

/// The declared letters from a canonical-to-block map.
pub(crate) fn declared<const N: usize>(letters: &str, order: &[usize; N]) -> Vec<char> {
    let mut out = vec![' '; N];
    for (c, letter) in letters.chars().enumerate() {
        out[order[c]] = letter;
    }
    out
}

pub(crate) fn mat<S>(p: &ArrayD<S>) -> ArrayView2<'_, S> {
    p.view().into_dimensionality::<Ix2>().expect("a matrix")
}

pub(crate) fn vector<S>(p: &ArrayD<S>) -> ArrayView1<'_, S> {
    p.view().into_dimensionality::<Ix1>().expect("a vector")
}

/// Columns k·units .. (k + 1)·units.
pub(crate) fn block<S>(a: ArrayView2<'_, S>, k: usize, units: usize) -> ArrayView2<'_, S> {
    a.slice_move(s![.., k * units..(k + 1) * units])
}

pub(crate) fn sigmoid<S: Scalar>(v: S) -> S {
    S::one() / (S::one() + (-v).exp())
}

/// x Wᵀ + h Uᵀ + b.
pub(crate) fn affine<S: Scalar>(
    x: ArrayView2<S>,
    w: ArrayView2<S>,
    h: ArrayView2<S>,
    u: ArrayView2<S>,
    b: ArrayView1<S>,
) -> Array2<S> {
    let mut a = x.dot(&w.t()) + h.dot(&u.t());
    a += &b;
    a
}
