//! `rnn`: h = g(W x + U h₋ + b) per step from h = 0, g the layer's `activation` (default tanh;
//! any element-wise activation). Its mistakes are the time ones of [`super::recurrent`].

use ndarray::{Array2, ArrayD, ArrayView2, Axis};

use super::recurrent::{Cell, Recurrent, TIME_MISTAKES, affine, mat, vector};
use super::{LayerScalar, Shape, ShapeError};
use crate::Activation;

/// The element-wise activations a cell may use.
const ELEMENT_WISE: &[&str] = &[
    "identity",
    "sigmoid",
    "tanh",
    "relu",
    "leaky-relu",
    "elu",
    "softplus",
    "gelu",
];

/// The Elman cell.
#[derive(Clone, Debug)]
pub struct RnnCell {
    activation: Activation,
}

/// An rnn layer bound to its input shape.
pub type Rnn = Recurrent<RnnCell>;

impl Rnn {
    /// `output` is "last" or "all".
    pub fn new(
        units: usize,
        activation: Activation,
        output: &str,
        input: &Shape,
    ) -> Result<Rnn, ShapeError> {
        if activation == Activation::Softmax {
            return Err(ShapeError::Choice {
                key: "activation",
                kind: "rnn",
                found: "softmax".into(),
                allowed: ELEMENT_WISE,
            });
        }
        Recurrent::build(RnnCell { activation }, units, output, input)
    }
}

impl Cell for RnnCell {
    fn kind(&self) -> &'static str {
        "rnn"
    }
    fn letters(&self) -> Vec<char> {
        Vec::new()
    }
    fn blocks(&self) -> usize {
        1
    }
    fn biases(&self) -> &'static [&'static str] {
        &["bias"]
    }
    fn mistakes(&self) -> &'static [&'static str] {
        &TIME_MISTAKES
    }
    fn kink(&self) -> Option<f64> {
        self.activation.kink()
    }
    fn activation(&self) -> Activation {
        self.activation
    }

    fn forward<S: LayerScalar>(
        &self,
        p: &[ArrayD<S>],
        x: ArrayView2<S>,
        prev: &[Array2<S>],
    ) -> (Vec<Array2<S>>, Array2<S>) {
        let a = affine(x, mat(&p[0]), prev[0].view(), mat(&p[1]), vector(&p[2]));
        (vec![self.activation.apply(a.view())], a)
    }

    fn backward<S: LayerScalar>(
        &self,
        p: &[ArrayD<S>],
        x: ArrayView2<S>,
        prev: &[Array2<S>],
        cur: &[Array2<S>],
        saved: ArrayView2<S>,
        d: &[Array2<S>],
    ) -> (Vec<ArrayD<S>>, Array2<S>, Vec<Array2<S>>) {
        let da = self.activation.backward(saved, cur[0].view(), d[0].clone());
        let terms = vec![
            da.t().dot(&x).into_dyn(),
            da.t().dot(&prev[0]).into_dyn(),
            da.sum_axis(Axis(0)).into_dyn(),
        ];
        let dprev = vec![da.dot(&mat(&p[1]))];
        (terms, da, dprev)
    }
}
