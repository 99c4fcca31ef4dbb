//! `lstm` (Hochreiter & Schmidhuber 1997, with the forget gate of Gers, Schmidhuber & Cummins
//! 2000; no peepholes, one bias): with a = W x + U h₋ + b cut into the blocks i, f, g, o of the
//! declared `gate-order` (default "ifgo"), i, f, o = σ(aᵢ), σ(a_f), σ(aₒ), g = tanh(a_g),
//! c = f⊙c₋ + i⊙g, h = o⊙tanh c, from h = c = 0. Mistakes: the time ones of
//! [`super::recurrent`] (`state-gradient-dropped` drops both h's and c's) and `gates-reordered`.

use ndarray::{Array2, ArrayD, ArrayView2, Axis, Zip, s};

use super::recurrent::{
    Cell, Recurrent, TIME_MISTAKES, affine, block, declared, gate_order, mat, sigmoid, vector,
};
use super::{LayerScalar, Shape, ShapeError};
use crate::Scalar;

const LETTERS: &str = "ifgo";
const MISTAKES: [&str; 4] = [
    TIME_MISTAKES[0],
    TIME_MISTAKES[1],
    TIME_MISTAKES[2],
    "gates-reordered",
];

/// The long short-term memory cell.
#[derive(Clone, Debug)]
pub struct LstmCell {
    /// The block of i, f, g, o.
    order: [usize; 4],
}

/// An lstm layer bound to its input shape.
pub type Lstm = Recurrent<LstmCell>;

impl Lstm {
    /// `gate-order` a permutation of "ifgo", `output` "last" or "all".
    pub fn new(
        units: usize,
        gate_order_: &str,
        output: &str,
        input: &Shape,
    ) -> Result<Lstm, ShapeError> {
        let cell = LstmCell {
            order: gate_order("lstm", LETTERS, gate_order_)?,
        };
        Recurrent::build(cell, units, output, input)
    }
}

impl Cell for LstmCell {
    fn kind(&self) -> &'static str {
        "lstm"
    }
    fn letters(&self) -> Vec<char> {
        declared(LETTERS, &self.order)
    }
    fn blocks(&self) -> usize {
        4
    }
    fn states(&self) -> usize {
        2
    }
    fn biases(&self) -> &'static [&'static str] {
        &["bias"]
    }
    fn mistakes(&self) -> &'static [&'static str] {
        &MISTAKES
    }
    /// The saved values are the blocks after their activations, in the declared order.
    fn gates(&self) -> Vec<(char, usize)> {
        let [ki, kf, _, ko] = self.order;
        vec![('i', ki), ('f', kf), ('o', ko)]
    }

    fn forward<S: LayerScalar>(
        &self,
        p: &[ArrayD<S>],
        x: ArrayView2<S>,
        prev: &[Array2<S>],
    ) -> (Vec<Array2<S>>, Array2<S>) {
        let units = prev[0].ncols();
        let mut a = affine(x, mat(&p[0]), prev[0].view(), mat(&p[1]), vector(&p[2]));
        let [ki, kf, kg, ko] = self.order;
        for k in [ki, kf, ko] {
            a.slice_mut(s![.., k * units..(k + 1) * units])
                .mapv_inplace(sigmoid);
        }
        a.slice_mut(s![.., kg * units..(kg + 1) * units])
            .mapv_inplace(Scalar::tanh);
        let (i, f, g, o) = (
            block(a.view(), ki, units),
            block(a.view(), kf, units),
            block(a.view(), kg, units),
            block(a.view(), ko, units),
        );
        let c = Zip::from(f)
            .and(&prev[1])
            .and(i)
            .and(g)
            .map_collect(|&f, &c, &i, &g| f * c + i * g);
        let h = Zip::from(o).and(&c).map_collect(|&o, &c| o * c.tanh());
        (vec![h, c], a)
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
        let units = prev[0].ncols();
        let [ki, kf, kg, ko] = self.order;
        let (i, f, g, o) = (
            block(saved, ki, units),
            block(saved, kf, units),
            block(saved, kg, units),
            block(saved, ko, units),
        );
        let one = S::one();
        let tc = cur[1].mapv(Scalar::tanh);
        // The cell state's whole gradient: carried from the step after, and through h.
        let dc = Zip::from(&d[1])
            .and(&d[0])
            .and(o)
            .and(&tc)
            .map_collect(|&dc, &dh, &o, &t| dc + dh * o * (one - t * t));
        let mut da = Array2::zeros((x.nrows(), 4 * units));
        let mut put =
            |k: usize, v: Array2<S>| da.slice_mut(s![.., k * units..(k + 1) * units]).assign(&v);
        put(
            ki,
            Zip::from(&dc)
                .and(g)
                .and(i)
                .map_collect(|&dc, &g, &i| dc * g * i * (one - i)),
        );
        put(
            kf,
            Zip::from(&dc)
                .and(&prev[1])
                .and(f)
                .map_collect(|&dc, &c, &f| dc * c * f * (one - f)),
        );
        put(
            kg,
            Zip::from(&dc)
                .and(i)
                .and(g)
                .map_collect(|&dc, &i, &g| dc * i * (one - g * g)),
        );
        put(
            ko,
            Zip::from(&d[0])
                .and(&tc)
                .and(o)
                .map_collect(|&dh, &t, &o| dh * t * o * (one - o)),
        );
        let dc_prev = &dc * &f;
        let terms = vec![
            da.t().dot(&x).into_dyn(),
            da.t().dot(&prev[0]).into_dyn(),
            da.sum_axis(Axis(0)).into_dyn(),
        ];
        let dprev = vec![da.dot(&mat(&p[1])), dc_prev];
        (terms, da, dprev)
    }
}
