//! `gru` (Cho et al. 2014): with r, z, n the reset, update and candidate blocks,
//! r = σ(Wᵣx + bᵣ + Uᵣh₋ + b′ᵣ), z = σ(W_z x + b_z + U_z h₋ + b′_z),
//! `reset = "after"`: n = tanh(Wₙx + bₙ + r⊙(Uₙh₋ + b′ₙ)); `"before"`: n = tanh(Wₙx + bₙ +
//! Uₙ(r⊙h₋) + b′ₙ); h = (1 − z)⊙n + z⊙h₋ (b the input bias, b′ the recurrent bias). The blocks
//! are stacked in the declared `gate-order` (default "rzn"). Mistakes: the time ones of
//! [`super::recurrent`] and `gates-reordered`.

use ndarray::{Array2, ArrayD, ArrayView2, Axis, Zip, concatenate, s};

use super::recurrent::{
    Cell, Recurrent, TIME_MISTAKES, block, declared, gate_order, mat, sigmoid, vector,
};
use super::{LayerScalar, Shape, ShapeError};
use crate::Scalar;

const LETTERS: &str = "rzn";
const MISTAKES: [&str; 4] = [
    TIME_MISTAKES[0],
    TIME_MISTAKES[1],
    TIME_MISTAKES[2],
    "gates-reordered",
];

/// Where the reset gate acts.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Reset {
    /// On the recurrent product: r⊙(Uₙh₋ + b′ₙ).
    After,
    /// On the state before the product: Uₙ(r⊙h₋).
    Before,
}

impl Reset {
    pub const NAMES: &'static [&'static str] = &["after", "before"];

    pub fn parse(value: &str) -> Result<Reset, ShapeError> {
        match value {
            "after" => Ok(Reset::After),
            "before" => Ok(Reset::Before),
            _ => Err(ShapeError::Choice {
                key: "reset",
                kind: "gru",
                found: value.to_string(),
                allowed: Reset::NAMES,
            }),
        }
    }
}

/// The gated recurrent unit.
#[derive(Clone, Debug)]
pub struct GruCell {
    /// The block of r, z, n.
    order: [usize; 3],
    reset: Reset,
}

/// A gru layer bound to its input shape.
pub type Gru = Recurrent<GruCell>;

impl Gru {
    /// `gate-order` a permutation of "rzn", `reset` "after" or "before", `output` "last" or
    /// "all".
    pub fn new(
        units: usize,
        gate_order_: &str,
        reset: &str,
        output: &str,
        input: &Shape,
    ) -> Result<Gru, ShapeError> {
        let cell = GruCell {
            order: gate_order("gru", LETTERS, gate_order_)?,
            reset: Reset::parse(reset)?,
        };
        Recurrent::build(cell, units, output, input)
    }
}

impl Cell for GruCell {
    fn kind(&self) -> &'static str {
        "gru"
    }
    fn letters(&self) -> Vec<char> {
        declared(LETTERS, &self.order)
    }
    fn blocks(&self) -> usize {
        3
    }
    fn biases(&self) -> &'static [&'static str] {
        &["input.bias", "recurrent.bias"]
    }
    fn mistakes(&self) -> &'static [&'static str] {
        &MISTAKES
    }
    /// The saved values start with r and z whatever the declared order.
    fn gates(&self) -> Vec<(char, usize)> {
        vec![('r', 0), ('z', 1)]
    }

    fn forward<S: LayerScalar>(
        &self,
        p: &[ArrayD<S>],
        x: ArrayView2<S>,
        prev: &[Array2<S>],
    ) -> (Vec<Array2<S>>, Array2<S>) {
        let h = &prev[0];
        let units = h.ncols();
        let [kr, kz, kn] = self.order;
        let ax = x.dot(&mat(&p[0]).t()) + vector(&p[2]);
        let ah = h.dot(&mat(&p[1]).t()) + vector(&p[3]);
        let gate =
            |k: usize| (&block(ax.view(), k, units) + &block(ah.view(), k, units)).mapv(sigmoid);
        let (r, z) = (gate(kr), gate(kz));
        let extra = match self.reset {
            Reset::After => block(ah.view(), kn, units).to_owned(),
            Reset::Before => &r * h,
        };
        let mut n = block(ax.view(), kn, units).to_owned();
        match self.reset {
            Reset::After => n += &(&r * &extra),
            Reset::Before => {
                let un = mat(&p[1]).slice_move(s![kn * units..(kn + 1) * units, ..]);
                n += &extra.dot(&un.t());
                n += &vector(&p[3]).slice(s![kn * units..(kn + 1) * units]);
            }
        }
        n.mapv_inplace(Scalar::tanh);
        let mut next = n.clone();
        Zip::from(&mut next)
            .and(&z)
            .and(h)
            .for_each(|v, &z, &h| *v = (S::one() - z) * *v + z * h);
        let saved = concatenate![Axis(1), r, z, n, extra];
        (vec![next], saved)
    }

    fn backward<S: LayerScalar>(
        &self,
        p: &[ArrayD<S>],
        x: ArrayView2<S>,
        prev: &[Array2<S>],
        _: &[Array2<S>],
        saved: ArrayView2<S>,
        d: &[Array2<S>],
    ) -> (Vec<ArrayD<S>>, Array2<S>, Vec<Array2<S>>) {
        let (h, dh) = (&prev[0], &d[0]);
        let units = h.ncols();
        let [kr, kz, kn] = self.order;
        let (r, z, n, extra) = (
            block(saved, 0, units),
            block(saved, 1, units),
            block(saved, 2, units),
            block(saved, 3, units),
        );
        let uw = mat(&p[1]);
        let one = S::one();
        let dz = Zip::from(dh)
            .and(h)
            .and(n)
            .map_collect(|&d, &h, &n| d * (h - n));
        let dan = Zip::from(dh)
            .and(z)
            .and(n)
            .map_collect(|&d, &z, &n| d * (one - z) * (one - n * n));
        let mut dhp = dh * &z;
        let dr = match self.reset {
            Reset::After => &dan * &extra,
            Reset::Before => {
                let un = uw.slice(s![kn * units..(kn + 1) * units, ..]);
                let drh = dan.dot(&un);
                dhp += &(&drh * &r);
                &drh * h
            }
        };
        let dar = Zip::from(&dr)
            .and(r)
            .map_collect(|&d, &r| d * r * (one - r));
        let daz = Zip::from(&dz)
            .and(z)
            .map_collect(|&d, &z| d * z * (one - z));
        let mut dax = Array2::zeros((h.nrows(), 3 * units));
        let mut dah = Array2::zeros((h.nrows(), 3 * units));
        for (k, g) in [(kr, &dar), (kz, &daz), (kn, &dan)] {
            dax.slice_mut(s![.., k * units..(k + 1) * units]).assign(g);
            dah.slice_mut(s![.., k * units..(k + 1) * units]).assign(g);
        }
        let nb = s![.., kn * units..(kn + 1) * units];
        let mut du;
        match self.reset {
            Reset::After => {
                dah.slice_mut(nb).assign(&(&dan * &r));
                du = dah.t().dot(h);
                dhp += &dah.dot(&uw);
            }
            Reset::Before => {
                du = dah.t().dot(h);
                du.slice_mut(s![kn * units..(kn + 1) * units, ..])
                    .assign(&dan.t().dot(&extra));
                let mut rz = dah.clone();
                rz.slice_mut(nb).fill(S::zero());
                dhp += &rz.dot(&uw);
            }
        }
        let terms = vec![
            dax.t().dot(&x).into_dyn(),
            du.into_dyn(),
            dax.sum_axis(Axis(0)).into_dyn(),
            dah.sum_axis(Axis(0)).into_dyn(),
        ];
        (terms, dax, vec![dhp])
    }
}
