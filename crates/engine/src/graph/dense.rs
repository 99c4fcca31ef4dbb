//! `dense`: z = W x + b, W units × fan-in. On a sequence it applies to every step.
//!
//! Storage (DESIGN §4.3): the canonical tensors are the split ones (`weight` units × fan-in,
//! `bias`); `split-transposed` is the permutation `io` of `oi` ([`super::Storage`]); the augmented
//! matrix is [`Dense::join`] / [`Dense::split`].
//!
//! Incremental hint ([`Layer::forward_moved`]): weight (r, c) moved by δ changes unit r only, by
//! δ · x[:, c] on every sample (and step) — a rank-one update of the base output; bias r moves
//! unit r by δ. The other units keep the base's values bit for bit; unit r differs from a full
//! pass only by rounding (the update adds δ·x to the rounded sum, the full pass sums again).
//!
//! Moved units ([`Layer::forward_units`]): above a moved entry, an input that changed in k units
//! of a fan-in of at least 8k changes the output by Σ (x − x_base)[:, c] ⊗ W[:, c] over those
//! units — a rank-k update of the base output instead of the product (the dense engine's rank-one
//! path). Up to rounding a full pass; docs/engine.md gives the bound and its tests.
//!
//! Catalogued mistake: `bias-rows-shifted` — the input gradient formed with the augmented matrix
//! [b, W] (bias column first) and its last column dropped instead of its first, so the gradient
//! of input k is that of input k − 1 and input 0 gets the bias column's; the layer's own
//! parameter gradients are right, the layers below change.

use ndarray::{Array1, Array2, ArrayD, ArrayView2, Axis, Ix1, Ix2, concatenate, s};

use super::{
    Back, Kind, Layer, LayerScalar, Moved, ParamSpec, Role, Shape, ShapeError, Step, reshape,
};
use crate::Scalar;
use crate::product::{add_matmul, matmul};

/// A dense layer bound to its input shape.
#[derive(Clone, Debug)]
pub struct Dense {
    units: usize,
    input: Shape,
}

impl Dense {
    pub fn new(units: usize, input: &Shape) -> Result<Dense, ShapeError> {
        if units == 0 {
            return Err(ShapeError::Zero { key: "units" });
        }
        match input {
            Shape::Flat(_) | Shape::Sequence { .. } => Ok(Dense {
                units,
                input: *input,
            }),
            _ => Err(ShapeError::Input {
                kind: "dense",
                needs: "[features] or [steps, width]",
                found: *input,
                fix: "put a flatten or global-avg-pool layer before it",
            }),
        }
    }

    fn fan_in(&self) -> usize {
        self.input.size() / self.input.rows()
    }

    /// The augmented matrix units × (fan-in + 1), column 0 the bias, from the split tensors.
    pub fn join<T: Clone>(weight: &Array2<T>, bias: &Array1<T>) -> Array2<T> {
        concatenate![Axis(1), bias.view().insert_axis(Axis(1)), weight.view()]
    }

    /// The split tensors (weight, bias) of an augmented matrix.
    pub fn split<T: Clone>(augmented: &Array2<T>) -> (Array2<T>, Array1<T>) {
        (
            augmented.slice(s![.., 1..]).to_owned(),
            augmented.column(0).to_owned(),
        )
    }

    /// The weight, units × fan-in in standard layout, from a dense layer's own tensors (the
    /// engine's canonical storage whatever the file's layout): for code that reads a dense
    /// layer's entries by unit without a pass.
    pub(super) fn weight<S>(params: &[ArrayD<S>]) -> ArrayView2<'_, S> {
        params[0]
            .view()
            .into_dimensionality::<Ix2>()
            .expect("a dense weight has two axes")
    }

    /// Whether [`Layer::forward_f32`] reads a batch of `m` samples in blocks (F32_BLOCK): a
    /// flat input, a batch of two blocks or more, and a product that gemm computes on its
    /// general path whole and in blocks alike (more than 64 units or inputs; gemm's vector
    /// paths for one unit or a fan-in of two sum in their own order).
    fn reads_f32(&self, m: usize) -> bool {
        matches!(self.input, Shape::Flat(_))
            && m >= 2 * F32_BLOCK
            && self.units >= 2
            && self.fan_in() >= 3
            && self.units.max(self.fan_in()) > 64
    }

    /// The gradients from dW and the output's gradient d (one row per sample and step) over a
    /// batch of `m` samples: what [`Layer::backward`] and [`Layer::backward_f32`] share.
    fn back<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        dw: Array2<S>,
        d: ArrayView2<S>,
        m: usize,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let w = Dense::weight(params);
        let db = d.sum_axis(Axis(0));
        let dx = need_input.then(|| {
            let dx = if mistake == Some("bias-rows-shifted") {
                let b = params[1].view().into_dimensionality::<Ix1>().expect("bias");
                let augmented = Dense::join(&w.to_owned(), &b.to_owned());
                matmul(d, augmented.slice(s![.., ..self.fan_in()]))
            } else {
                matmul(d, w)
            };
            reshape(dx, (m, self.input.size()))
        });
        Back {
            params: vec![dw.into_dyn(), db.into_dyn()],
            dx,
            dskip: None,
        }
    }

    /// (m · rows) × fan-in: one row per sample and step.
    fn rows<'a, S>(&self, x: ArrayView2<'a, S>) -> ArrayView2<'a, S> {
        let r = self.input.rows();
        x.into_shape_with_order((x.nrows() * r, self.fan_in()))
            .expect("the graph hands layers standard-layout batches")
    }
}

impl Kind for Dense {
    fn linear_in_params(&self) -> bool {
        true
    }

    fn kind(&self) -> &'static str {
        "dense"
    }

    fn input(&self) -> Shape {
        self.input
    }

    fn output(&self) -> Shape {
        match self.input {
            Shape::Sequence { steps, .. } => Shape::Sequence {
                steps,
                width: self.units,
            },
            _ => Shape::Flat(self.units),
        }
    }

    fn params(&self) -> Vec<ParamSpec> {
        vec![
            ParamSpec {
                suffix: "weight",
                shape: vec![self.units, self.fan_in()],
                role: Role::Weight,
                decays: true,
                fan_in: self.fan_in(),
                fan_out: self.units,
            },
            ParamSpec {
                suffix: "bias",
                shape: vec![self.units],
                role: Role::Bias,
                decays: false,
                fan_in: 1,
                fan_out: self.units,
            },
        ]
    }

    fn unit_tensors(&self) -> Vec<usize> {
        vec![0, 1]
    }

    fn input_unit_tensor(&self) -> Option<usize> {
        Some(0)
    }

    fn moved_channel(&self, tensor: usize, index: usize) -> Option<usize> {
        Some(if tensor == 0 {
            index / self.fan_in()
        } else {
            index
        })
    }

    fn mistakes(&self) -> &'static [&'static str] {
        &["bias-rows-shifted"]
    }

    fn locate(&self, tensor: usize, flat: usize) -> String {
        if tensor == 1 {
            format!("unit {flat}")
        } else {
            let n = self.fan_in();
            format!("unit {}, input {}", flat / n, flat % n)
        }
    }
}

impl<S: LayerScalar> Layer<S> for Dense {
    fn forward(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        skip: Option<ArrayView2<S>>,
    ) -> Step<S> {
        self.forward_into(params, x, skip, &mut Vec::new())
    }

    fn forward_into(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        _: Option<ArrayView2<S>>,
        buffer: &mut Vec<S>,
    ) -> Step<S> {
        let w = params[0]
            .view()
            .into_dimensionality::<Ix2>()
            .expect("weight");
        let b = params[1].view().into_dimensionality::<Ix1>().expect("bias");
        let rows = self.rows(x);
        // The bias in every row first and the product added to it: one pass over z.
        let mut z = std::mem::take(buffer);
        z.clear();
        z.reserve(rows.nrows() * self.units);
        for _ in 0..rows.nrows() {
            match b.as_slice() {
                Some(bias) => z.extend_from_slice(bias),
                None => z.extend(b.iter().copied()),
            }
        }
        let mut z =
            Array2::from_shape_vec((rows.nrows(), self.units), z).expect("one bias per unit");
        add_matmul(&mut z, rows, w.t());
        let m = x.nrows();
        let out = reshape(z, (m, self.output().size()));
        Step::plain(out)
    }

    fn backward(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        _: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let r = self.input.rows();
        // dout as it lies when it is standard layout (the graph's always are), not a copy: at a
        // batch of 8,192 that copy was 17 MB of fresh memory per layer.
        let dout = dout.as_standard_layout();
        let d = dout
            .view()
            .into_shape_with_order((dout.nrows() * r, self.units))
            .expect("standard layout, one row per sample and step");
        let dw = matmul(d.t(), self.rows(x));
        self.back(params, dw, d, x.nrows(), mistake, need_input)
    }

    fn forward_f32(&self, params: &[ArrayD<S>], x: ArrayView2<f32>) -> Option<Step<S>> {
        if !self.reads_f32(x.nrows()) {
            return None;
        }
        let w = Dense::weight(params);
        let b = params[1].view().into_dimensionality::<Ix1>().expect("bias");
        let x = x.as_standard_layout();
        let m = x.nrows();
        let bias = b.to_vec();
        let mut z = Vec::with_capacity(m * self.units);
        for _ in 0..m {
            z.extend_from_slice(&bias);
        }
        let mut z = Array2::from_shape_vec((m, self.units), z).expect("one bias per unit");
        // Row blocks: each value's sum is the whole product's, as F32_BLOCK says.
        let mut block = Vec::new();
        let starts: Vec<usize> = (0..m / F32_BLOCK).map(|i| i * F32_BLOCK).collect();
        for (i, &start) in starts.iter().enumerate() {
            let end = starts.get(i + 1).copied().unwrap_or(m);
            let rows = widened(x.slice(s![start..end, ..]), &mut block);
            add_matmul(&mut z.slice_mut(s![start..end, ..]), rows, w.t());
        }
        Some(Step::plain(z))
    }

    fn backward_f32(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<f32>,
        _: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let x = x.as_standard_layout();
        let dout = dout.as_standard_layout();
        let d = dout.view();
        let m = x.nrows();
        // dW = dzᵀ·x summed over the samples in blocks, each added to the sum of those before
        // it in order: the whole product's depth blocks, as F32_BLOCK says.
        let mut dw = Vec::with_capacity(self.units * self.fan_in());
        dw.resize(self.units * self.fan_in(), S::zero());
        let mut dw =
            Array2::from_shape_vec((self.units, self.fan_in()), dw).expect("units × fan-in");
        let depth = m.div_ceil(m.div_ceil(F32_BLOCK));
        let mut block = Vec::new();
        for start in (0..m).step_by(depth) {
            let end = (start + depth).min(m);
            let rows = widened(x.slice(s![start..end, ..]), &mut block);
            add_matmul(&mut dw, d.slice(s![start..end, ..]).t(), rows);
        }
        self.back(params, dw, d, m, mistake, need_input)
    }

    fn forward_moved(
        &self,
        _: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Step<S>,
        moved: &Moved<S>,
    ) -> Option<Step<S>> {
        let (unit, input) = if moved.tensor == 0 {
            (
                moved.index / self.fan_in(),
                Some(moved.index % self.fan_in()),
            )
        } else {
            (moved.index, None)
        };
        let x = self.rows(x);
        let mut out = base.out.clone();
        let m = out.nrows();
        // One row per sample and step, as the forward product's; unit r is column r.
        let mut z = out
            .view_mut()
            .into_shape_with_order((m * self.input.rows(), self.units))
            .expect("the base output is standard layout");
        let mut column = z.column_mut(unit);
        match input {
            Some(c) => column.zip_mut_with(&x.column(c), |z, &v| *z += moved.delta * v),
            None => column.mapv_inplace(|z| z + moved.delta),
        }
        Some(Step::plain(out))
    }

    fn forward_units(
        &self,
        params: &[ArrayD<S>],
        base_x: ArrayView2<S>,
        base: &Step<S>,
        changed: &[usize],
        now: &[S],
    ) -> Option<Step<S>> {
        self.forward_units_into(params, base_x, base, changed, now, &mut Vec::new())
    }

    fn forward_units_into(
        &self,
        params: &[ArrayD<S>],
        base_x: ArrayView2<S>,
        base: &Step<S>,
        changed: &[usize],
        now: &[S],
        buffer: &mut Vec<S>,
    ) -> Option<Step<S>> {
        // The update costs k/n of the product's multiplications, but a product runs several
        // times faster per multiplication (packed, vectorised): below an eighth the update wins
        // clearly, and a small layer keeps the full pass's bits.
        if changed.is_empty() || UNITS_PER_UPDATE * changed.len() > self.fan_in() {
            return None;
        }
        let w = params[0].view().into_dimensionality::<Ix2>().ok()?;
        let xb = self.rows(base_x);
        let rows = xb.nrows();
        let start = base.out.as_slice()?;
        if now.len() != rows * changed.len() {
            return None;
        }
        // The base output, then each changed unit's update: z[i, :] += (x[i, c] − x_base[i, c])
        // · W[:, c], one row per sample and step. A row whose input did not move keeps the
        // base's bits (equal inputs give +0 exactly). The first unit's update reads the base's
        // row and writes the result (z + d·w, as adding to a copy would), so the base is not
        // copied first.
        let mut z = std::mem::take(buffer);
        z.clear();
        z.reserve(start.len());
        let mut column = Vec::with_capacity(self.units);
        for (i, (&c, now)) in changed.iter().zip(now.chunks_exact(rows)).enumerate() {
            column.clear();
            column.extend(w.column(c).iter().copied());
            let moved = now.iter().zip(xb.column(c));
            if i == 0 {
                for (row, (&now, &was)) in start.chunks_exact(self.units).zip(moved) {
                    let d = now - was;
                    if d.same_bits(S::zero()) {
                        z.extend_from_slice(row);
                    } else {
                        z.extend(row.iter().zip(&column).map(|(&z, &w)| z + d * w));
                    }
                }
                continue;
            }
            for (row, (&now, &was)) in z.chunks_exact_mut(self.units).zip(moved) {
                let d = now - was;
                if d.same_bits(S::zero()) {
                    continue;
                }
                for (z, &w) in row.iter_mut().zip(&column) {
                    *z += d * w;
                }
            }
        }
        let out = Array2::from_shape_vec(base.out.raw_dim(), z).ok()?;
        Some(Step::plain(out))
    }

    fn moved_values(
        &self,
        _: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Step<S>,
        moved: &Moved<S>,
        out: &mut Vec<S>,
    ) -> bool {
        let Some(z) = base.out.as_slice() else {
            return false;
        };
        let unit = self.moved_channel(moved.tensor, moved.index).unwrap_or(0);
        // An entry past the tensor would read a shifted column without complaint (the checker
        // only asks for entries it sampled within their tensors).
        debug_assert!(
            unit < self.units,
            "entry {} past the layer's units",
            moved.index
        );
        // Unit r is column r of one row per sample and step; z + δ·x[:, c] (bias: z + δ), as
        // [`Layer::forward_moved`] adds it to its copy of the base.
        let column = z.iter().skip(unit).step_by(self.units);
        out.clear();
        if moved.tensor == 0 {
            let x = self.rows(x);
            let c = moved.index % self.fan_in();
            out.extend(column.zip(x.column(c)).map(|(&z, &v)| z + moved.delta * v));
        } else {
            out.extend(column.map(|&z| z + moved.delta));
        }
        true
    }
}

/// Samples per block when the first dense layer reads an f32 batch ([`Layer::forward_f32`]).
/// The forward product runs over blocks of rows (the last one takes the rest): a value's sum
/// runs over the fan-in alone, which gemm cuts into the same depth blocks whatever the rows.
/// dW = dzᵀ·x sums over the samples, and gemm 0.19 cuts that depth k into blocks of
/// ⌈k / ⌈k / kc⌉⌉, the first added to c's zeros and each next one to c, with kc from the
/// machine's caches (gemm-common's `kernel_params`: at least 512, and 512 on the machines
/// measured). Blocks of ⌈m / ⌈m / 512⌉⌉ samples summed in order are those blocks, so dW has the
/// whole product's bits wherever kc is 512; each block is within one of gemm's depth blocks on
/// any machine, so where kc is larger dW differs from the whole product's last bits but not
/// from machine to machine — the whole product's bits depend on kc already.
const F32_BLOCK: usize = 512;

/// Rows of an f32 batch widened to S in `buffer` (reused from block to block).
fn widened<'a, S: Scalar>(x: ArrayView2<f32>, buffer: &'a mut Vec<S>) -> ArrayView2<'a, S> {
    buffer.clear();
    let widen = |&v: &f32| S::from_f64(f64::from(v));
    // A block of whole rows of a standard-layout batch is one slice: a loop that vectorises.
    match x.as_slice() {
        Some(values) => buffer.extend(values.iter().map(widen)),
        None => buffer.extend(x.iter().map(widen)),
    }
    ArrayView2::from_shape(x.dim(), buffer).expect("the block's rows")
}

/// A dense layer updates its output from the base by the change of at most one input unit in
/// this many ([`Layer::forward_units`]); above that it recomputes the product.
pub(super) const UNITS_PER_UPDATE: usize = 8;

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    // DESIGN §4.3: the augmented matrix is units × (fan-in + 1) with column 0 the bias.
    #[test]
    fn augmented_matrix_puts_the_bias_in_column_zero_and_splits_back() {
        let w = array![[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]];
        let b = array![7.0, 8.0];
        let aug = Dense::join(&w, &b);
        assert_eq!(aug, array![[7.0, 1.0, 2.0, 3.0], [8.0, 4.0, 5.0, 6.0]]);
        assert_eq!(Dense::split(&aug), (w, b));
    }
}
