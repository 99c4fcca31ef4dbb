//! The loss after one entry of a dense layer moved, through the response of the two layers above
//! it: a cheaper form of [`Graph::moved_loss_in`] for the finite-difference check, used only
//! where its error is known to be far below the round-off the check already assumes.
//!
//! For a dense layer L whose only reader is a dense layer L+1 with a smooth element-wise
//! activation σ, read by the dense output layer L+2 (softmax, cross-entropy), an entry of L moves
//! one unit u by d[n] per sample n (after L's activation). L+1's pre-activation then changes by
//! Δz[n, j] = w_j·d[n] (w = column u of W_{L+1}) and, by Taylor's theorem,
//!
//! σ(z + Δz) − σ(z) = σ′(z)·Δz + σ″(z)·Δz²/2 + σ‴(z)·Δz³/6 + R₄,  |R₄| ≤ max|σ⁗|/24 · Δz⁴,
//!
//! so L+2's pre-activation is z_{L+2}[n, c] + Σₖ M_k[n, c]·d[n]ᵏ with
//! M_k[n, c] = Σ_j W_{L+2}[c, j]·w_jᵏ·σ⁽ᵏ⁾(z_{L+1}[n, j])/k!: three small products per unit u,
//! shared by every entry that moves u (its fan-in and bias, each at ±h and 2h). A loss then costs
//! unit u's m activations, 3·m·outputs multiply-adds and the loss itself, where the plain path
//! takes m·units(L+1) activations and L+2's whole product.
//!
//! The bound (per output value; u = ε/2, J = L+2's fan-in, D_k = max|σ⁽ᵏ⁾|/k!,
//! B_k[c] = Σ_j |W_{L+2}[c, j]|·|w_j|ᵏ, d = max_n |d[n]|):
//!
//! - truncation: max|σ⁗|/24 · B₄[c] · d⁴;
//! - round-off of the change: (γ(J) + γ(5) + 4u)·D_k·B_k[c]·dᵏ for the products and Horner's
//!   sum (Higham §3.1, §5.1), plus 32u·B_k[c]·dᵏ for each σ⁽ᵏ⁾/k!, formed from L+1's activation
//!   (the engine's tanh and logistic within a few ulp, and each slope's polynomial in that value
//!   changing by at most 2 per unit of it).
//!
//! The data term of a softmax cross-entropy moves by at most r·(|Σ_c y| + Σ_c |y|) ≤ 2r·Σ_c |y|
//! per unit of a sample's largest output change (its gradient in z is r·(p·Σy − y), r the
//! reduction's factor), so the loss's error is at most 2r·Σ|y| times the largest bound above.
//! What the response does not count is shared with the plain path: the base's rounded z_{L+2}
//! (common to the base loss and every perturbed one, so it leaves every difference the check
//! takes), the one rounding of z_{L+2} + change (the plain path's product rounds its last sum
//! too), and the loss's own arithmetic (the same code). The response is used for a loss only
//! when that error bound is at most `limit`, which the check sets at a tenth of the round-off it
//! assumes for each loss (docs/engine.md, "The response"); otherwise the caller takes the plain
//! path. A verdict could then move only where the plain path's own round-off, ten times the
//! response's error, could move it as well. It is not bit for bit the plain path.
//!
//! Covered: σ = tanh, logistic sigmoid, identity (exact at first order: no truncation), and
//! relu and leaky relu, exact at first order (slope 1 above the kink, 0 or the leak below it)
//! while no value of L+1 changes side: per unit and sample the changes d[n] that keep every
//! side are an interval, worked out once ((k − z)/w_j per value, narrowed by a relative 1e-6
//! for the plain path's rounding), so a loss tests m values where the plain path's kink test
//! reads m·units(L+1); a change outside it takes the plain path, which finds the crossing. L's
//! own activation may have a kink or break (relu, elu, …): the moved unit's sides are compared
//! with the base's, as [`Graph::tail_crossed`] does. Anything else (other activations above L,
//! other kinds, a tap, another loss or output) has no response, nor has a layer whose kept values
//! would pass [`MOST_VALUES`].

use std::sync::OnceLock;

use ndarray::{Array2, ArrayD, ArrayView2};

use super::dense::{Dense, UNITS_PER_UPDATE};
use super::loss::gamma;
use super::network::Workspace;
use super::{Graph, LayerScalar, Moved, Shape, Trace};
use crate::product::matmul;
use crate::{Activation, Loss};

/// The most values a response keeps for a check's length — its coefficients (3 per output value,
/// sample and unit of L), the slopes (3 per sample and unit of L+1) and, above a kink, the
/// distances to it and each unit's windows: 16 MiB in f64. Past it (a wide layer on a large
/// batch) there is no response, and the plain path runs.
pub const MOST_VALUES: usize = 1 << 21;

/// The response of the two dense layers above a dense layer L (see the module doc), built at the
/// base point of a check; each unit's coefficients are formed the first time one of its entries
/// is asked for.
#[derive(Debug)]
pub struct Response<S> {
    layer: usize,
    /// Rows (samples) of the batch, units of L+1, outputs of L+2.
    m: usize,
    hidden: usize,
    outputs: usize,
    /// σ⁽ᵏ⁾(z_{L+1})/k! for k = 1, 2, 3, each m × hidden (sample rows).
    slopes: [Vec<S>; 3],
    /// max|σ⁗|/24, and D_k = max|σ⁽ᵏ⁾|/k!.
    fourth: f64,
    most: [f64; 3],
    /// 2r·Σ|y|: the data term's change per unit of the largest output change.
    lipschitz: f64,
    /// For a piecewise-linear L+1, k − z_{L+1} per value (m × hidden, k its kink); empty for a
    /// smooth one.
    lifts: Vec<f64>,
    limit: f64,
    units: Vec<OnceLock<Unit<S>>>,
    /// The units whose entries take the response ([`Response::for_entries`]; all by default).
    wanted: Vec<bool>,
    /// Whether the coefficients are formed in f64 and rounded once ([`Response::over_wide`]).
    wide: bool,
    /// The slopes in f64 (smooth L+1 over a wide base only).
    wide_slopes: Option<[Vec<f64>; 3]>,
    /// Per output value, what its error counts for in the loss ([`Response::over_wide`]).
    weights: Vec<f64>,
}

/// One unit's coefficients: M_k (m × outputs each) and the bound's factors per dᵏ.
#[derive(Debug)]
struct Unit<S> {
    m: [Vec<S>; 3],
    /// Whether every coefficient and factor is finite; a unit that is not never answers.
    finite: bool,
    /// Per output value: the truncation's factor of d⁴ and the round-off's of d, d², d³.
    truncation: f64,
    rounding: [f64; 3],
    /// Over a wide base, per sample: Σ_c weight·|M_k| for k = 1..3, max_c |M_k| for k = 1..3,
    /// and Σ_c weight (each taken 2u larger than the rounded coefficients say).
    sums: Vec<[f64; 7]>,

    /// For a piecewise-linear L+1, per sample the changes d[n] (lo, hi) within which no value
    /// of L+1 changes side, narrowed by [`KINK_MARGIN`]; empty for a smooth one.
    windows: Vec<(f64, f64)>,
}

/// A loss through the response.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Responded<S> {
    pub loss: S,
    /// Whether the moved unit took another side of L's kink than the base.
    pub crossed: bool,
    /// The bound on the loss's error beyond the plain path's own rounding (module doc).
    pub bound: f64,
}

/// The Taylor slopes σ⁽ᵏ⁾/k! (k = 1, 2, 3) from the activation's value a = σ(z), and the largest
/// |σ⁽ᵏ⁾|/k! and |σ⁗| over the real line; `None` for activations without them here.
/// tanh: σ′ = 1 − a², σ″ = −2a(1 − a²), σ‴ = −2(1 − a²)(1 − 3a²), σ⁗ = 8a(1 − a²)(2 − 3a²);
/// logistic: σ′ = a(1 − a), σ″ = σ′(1 − 2a), σ‴ = σ′(1 − 6a + 6a²),
/// σ⁗ = σ′(1 − 2a)(1 − 12a + 12a²).
/// The maxima are those polynomials' over a in [−1, 1] and [0, 1], rounded up (tested against
/// num-dual's derivatives on a grid).
/// relu and leaky relu are linear on each side of their kink: slope 1 above, `below` under it,
/// no higher terms while no value changes side ([`below_kink`]).
fn taylor(act: Activation) -> Option<([f64; 3], f64)> {
    match act {
        Activation::Tanh => Some(([1.0, 0.385, 0.33334], 4.09)),
        Activation::Sigmoid => Some(([0.25, 0.0482, 0.0209], 0.128)),
        Activation::Identity => Some(([1.0, 0.0, 0.0], 0.0)),
        _ => below_kink(act).map(|below| ([below.abs().max(1.0), 0.0, 0.0], 0.0)),
    }
}

/// The slope of a piecewise-linear activation at or below its kink (above it: 1).
fn below_kink(act: Activation) -> Option<f64> {
    match act {
        Activation::Relu => Some(0.0),
        Activation::LeakyRelu { slope } => Some(slope),
        _ => None,
    }
}

/// How close (relative) a change may come to moving a value of a piecewise-linear L+1 across
/// its kink before the plain path takes the loss: the plain path's rounded z + d·w decides the
/// side there, within a few units of rounding of the exact threshold.
const KINK_MARGIN: f64 = 1e-6;

/// σ⁽ᵏ⁾(z)/k! for k = 1, 2, 3 from a = σ(z) for the smooth activations (formulas in
/// [`taylor`]; identity and anything else: 1, 0, 0).
pub fn slopes<S: LayerScalar>(act: Activation, a: S) -> [S; 3] {
    let c = S::from_f64;
    let one = S::one();
    match act {
        Activation::Tanh => {
            let d = one - a * a;
            [d, -(a * d), -(d * (one - c(3.0) * a * a)) / c(3.0)]
        }
        Activation::Sigmoid => {
            let d = a * (one - a);
            [
                d,
                d * (one - c(2.0) * a) / c(2.0),
                d * (one - c(6.0) * a + c(6.0) * a * a) / c(6.0),
            ]
        }
        _ => [one, S::zero(), S::zero()],
    }
}

/// max|σ⁽ᵏ⁾|/k!, k = 1, 2, 3, over the real line as the response's round-off terms take them (see
/// [`taylor`]).
pub fn slope_bounds(act: Activation) -> Option<[f64; 3]> {
    taylor(act).map(|(most, _)| most)
}

/// max|σ⁗| over the real line as the response's bound takes it (see [`taylor`]).
pub fn fourth_bound(act: Activation) -> Option<f64> {
    taylor(act).map(|(_, f)| f)
}

impl<S: LayerScalar> Response<S> {
    /// The response above dense layer `layer` at the base pass `trace` (targets `y`), used for
    /// a loss when its bound is at most `limit`; `None` where the graph has none there (module
    /// doc).
    pub fn new(
        graph: &Graph,
        trace: &Trace<S>,
        y: ArrayView2<S>,
        layer: usize,
        limit: f64,
    ) -> Option<Response<S>> {
        Self::build(graph, trace, None, y, layer, limit)
    }

    /// The response over a base whose values were rounded once from the f64 pass `wide`, for
    /// the difference form ([`super::Difference`]): its slopes σ⁽ᵏ⁾/k! are formed in f64 from
    /// that pass and rounded once (so each is within u of its value, not 32u of the largest),
    /// and each unit also keeps G_k = Σ_j |W_{L+2}[c, j]|·|σ⁽ᵏ⁾/k!|·|w_j|ᵏ per sample and
    /// output, the magnitude its coefficients' rounding scales with ([`Response::top_change`]).
    /// `weights` (m × outputs) are what each output value's error counts for in the loss
    /// (the softmax cross-entropy's |Σy·p_c − y_c|): each unit keeps, per sample, Σ_c of them
    /// times |M_k| and the largest |M_k|, so that a loss's bound reads m values, not m·outputs.
    pub(crate) fn over_wide(
        graph: &Graph,
        trace: &Trace<S>,
        wide: &Trace<f64>,
        y: ArrayView2<S>,
        layer: usize,
        weights: &[f64],
    ) -> Option<Response<S>> {
        let mut r = Self::build(graph, trace, Some(wide), y, layer, f64::INFINITY)?;
        if weights.len() != r.m * r.outputs {
            return None;
        }
        r.weights = weights.to_vec();
        Some(r)
    }

    fn build(
        graph: &Graph,
        trace: &Trace<S>,
        wide: Option<&Trace<f64>>,
        y: ArrayView2<S>,
        layer: usize,
        limit: f64,
    ) -> Option<Response<S>> {
        let nodes = graph.nodes();
        if layer + 3 != nodes.len() {
            return None;
        }
        let (low, mid, top) = (&nodes[layer], &nodes[layer + 1], &nodes[layer + 2]);
        let flat = |s: Shape| matches!(s, Shape::Flat(_));
        let dense = [low, mid, top]
            .iter()
            .all(|n| n.layer.kind() == "dense" && flat(n.layer.input()) && flat(n.layer.output()));
        let loss = graph.loss_config();
        if !dense
            || low.activation == Activation::Softmax
            || top.activation != Activation::Softmax
            || loss.loss != Loss::CrossEntropy
        {
            return None;
        }
        let (most, fourth) = taylor(mid.activation)?;
        let m = trace.outputs[layer].nrows();
        let hidden = mid.layer.output().size();
        let outputs = top.layer.output().size();
        let units = low.layer.output().size();
        // Above a kink the response's margin assumes the plain path's z + d·w rounds relative
        // to the value near the kink: true of dense's rank-one update, not of the whole product
        // it recomputes below `UNITS_PER_UPDATE` units (its rounding scales with Σ|W||a|).
        if mid.activation.kink().is_some() && units < UNITS_PER_UPDATE {
            return None;
        }
        // Every unit's coefficients are kept for the check's length: not past a budget.
        let kinked = mid.activation.kink().is_some();
        let per_sample = units.saturating_mul(3 * outputs + 2 * kinked as usize)
            + hidden * (3 + kinked as usize);
        if per_sample.saturating_mul(m) > MOST_VALUES {
            return None;
        }
        let mut slopes: [Vec<S>; 3] = Default::default();
        let mut wide_slopes = None;
        let mut lifts = Vec::new();
        match (mid.activation.kink(), below_kink(mid.activation)) {
            (Some(k), Some(below)) => {
                // Linear on each side: the slope by the side the plain path's kink test reads.
                let z = trace.steps[layer + 1].out.as_slice()?;
                slopes[0] = z
                    .iter()
                    .map(|v| S::from_f64(if v.re() > k { 1.0 } else { below }))
                    .collect();
                slopes[1] = vec![S::zero(); z.len()];
                slopes[2] = vec![S::zero(); z.len()];
                lifts = z.iter().map(|v| k - v.re()).collect();
            }
            _ => match wide {
                Some(wide) => {
                    let mut exact: [Vec<f64>; 3] = Default::default();
                    for v in wide.outputs[layer + 1].as_slice()? {
                        let s = self::slopes(mid.activation, *v);
                        for k in 0..3 {
                            slopes[k].push(S::from_f64(s[k]));
                            exact[k].push(s[k]);
                        }
                    }
                    wide_slopes = Some(exact);
                }
                None => {
                    for v in trace.outputs[layer + 1].as_slice()? {
                        let s = self::slopes(mid.activation, *v);
                        for k in 0..3 {
                            slopes[k].push(s[k]);
                        }
                    }
                }
            },
        }
        let r = loss.reduction.factor(m);
        let lipschitz = 2.0 * r * y.iter().map(|v| v.re().abs()).sum::<f64>();
        Some(Response {
            layer,
            m,
            hidden,
            outputs,
            slopes,
            fourth: fourth / 24.0,
            most,
            lipschitz,
            lifts,
            limit,
            units: (0..units).map(|_| OnceLock::new()).collect(),
            wanted: vec![true; units],
            wide: wide.is_some(),
            wide_slopes,
            weights: Vec::new(),
        })
    }

    /// The layer L whose entries this response takes.
    pub fn layer(&self) -> usize {
        self.layer
    }

    /// Leaves out the units of L with fewer than `least` entries among `entries` ((tensor, flat
    /// index) pairs of the graph, those a check will move): a unit's coefficients cost about
    /// as much as three plain losses (one above a piecewise-linear layer), which a unit with
    /// few entries to check does not win back. Their losses take the plain path.
    pub fn for_entries(mut self, graph: &Graph, entries: &[(usize, usize)], least: usize) -> Self {
        let node = &graph.nodes()[self.layer];
        let mut counts = vec![0usize; self.units.len()];
        for &(t, index) in entries.iter().filter(|(t, _)| node.tensors().contains(t)) {
            let unit = node.layer.moved_channel(t - node.tensors().start, index);
            if let Some(c) = unit.and_then(|u| counts.get_mut(u)) {
                *c += 1;
            }
        }
        self.wanted = counts.into_iter().map(|c| c >= least).collect();
        self
    }

    /// Unit u's coefficients: M_k = (σ⁽ᵏ⁾/k! · wᵏ) · W_{L+2}ᵀ and the bound's factors.
    fn unit(&self, graph: &Graph, params: &[ArrayD<S>], u: usize) -> &Unit<S> {
        self.units[u].get_or_init(|| {
            let nodes = graph.nodes();
            let low = nodes[self.layer].layer.output().size();
            let w_mid = Dense::weight(&params[nodes[self.layer + 1].tensors()]);
            let w_top = Dense::weight(&params[nodes[self.layer + 2].tensors()]);
            let (w_mid, w_top) = (
                w_mid.as_slice().expect("standard layout"),
                w_top.as_slice().expect("standard layout"),
            );
            let (m, h, o) = (self.m, self.hidden, self.outputs);
            let w: Vec<S> = (0..h).map(|j| w_mid[j * low + u]).collect();
            let mut coeffs: [Vec<S>; 3] = Default::default();
            let mut g = vec![S::zero(); h];
            let mut wk = vec![S::one(); h];
            for (k, (slopes, out)) in self.slopes.iter().zip(&mut coeffs).enumerate() {
                for (p, wj) in wk.iter_mut().zip(&w) {
                    *p *= *wj;
                }
                if self.most[k] == 0.0 {
                    // No such term (identity, relu and leaky relu above the first).
                    out.resize(m * o, S::zero());
                    continue;
                }
                if self.wide {
                    // Over a wide base: each coefficient summed in f64 (once per unit, not per
                    // loss) from the f64 slopes, and rounded once; the sums as one product
                    // (σ⁽ᵏ⁾/k! · wᵏ by sample rows) · W_{L+2}ᵀ by gemm, where a scalar loop per
                    // value took a quarter of an f32 check at batch 256.
                    let wk: Vec<f64> = w.iter().map(|v| v.re().powi(k as i32 + 1)).collect();
                    let scaled: Vec<f64> = match &self.wide_slopes {
                        Some(exact) => exact[k]
                            .chunks_exact(h)
                            .flat_map(|s| s.iter().zip(&wk).map(|(sj, p)| sj * p))
                            .collect(),
                        None => slopes
                            .chunks_exact(h)
                            .flat_map(|s| s.iter().zip(&wk).map(|(sj, p)| sj.re() * p))
                            .collect(),
                    };
                    let scaled = Array2::from_shape_vec((m, h), scaled).expect("m × hidden");
                    let top: Vec<f64> = w_top.iter().map(|v| v.re()).collect();
                    let top = Array2::from_shape_vec((o, h), top).expect("outputs × hidden");
                    let sums = matmul(scaled.view(), top.t());
                    out.extend(sums.iter().map(|&v| S::from_f64(v)));
                    continue;
                }
                out.reserve(m * o);
                // Sample n's row: Σ_j W_{L+2}[c, j] · σ⁽ᵏ⁾(z[n, j])/k! · w_jᵏ for each output c.
                for s in slopes.chunks_exact(h) {
                    for ((gj, sj), p) in g.iter_mut().zip(s).zip(&wk) {
                        *gj = *sj * *p;
                    }
                    for row in w_top.chunks_exact(h) {
                        let mut sum = S::zero();
                        for (a, b) in row.iter().zip(&g) {
                            sum += *a * *b;
                        }
                        out.push(sum);
                    }
                }
            }
            // B_k = max_c Σ_j |W_{L+2}[c, j]|·|w_j|ᵏ, k = 1..4.
            let mut b = [0.0f64; 4];
            for row in w_top.chunks_exact(h) {
                let mut sums = [0.0f64; 4];
                for (v, wj) in row.iter().zip(&w) {
                    let (mut p, wj) = (v.re().abs(), wj.re().abs());
                    for s in &mut sums {
                        p *= wj;
                        *s += p;
                    }
                }
                for (bk, s) in b.iter_mut().zip(sums) {
                    *bk = bk.max(s);
                }
            }
            let ru = S::epsilon() / 2.0;
            let products = gamma(h, ru) + gamma(5, ru) + 4.0 * ru;
            let rounding = [0, 1, 2].map(|k| (products * self.most[k] + 32.0 * ru) * b[k]);
            // Per sample, the nearest change that moves a value of L+1 to the kink's other
            // side, below and above 0: z + d·w_j crosses at d = (k − z)/w_j (a value on the
            // kink, which is on its lower side, crosses at any d·w_j > 0).
            let windows = self
                .lifts
                .chunks_exact(h)
                .map(|lifts| {
                    let (mut lo, mut hi) = (f64::NEG_INFINITY, f64::INFINITY);
                    for (lift, wj) in lifts.iter().zip(&w) {
                        let wj = wj.re();
                        if wj == 0.0 {
                            continue;
                        }
                        let t = lift / wj;
                        if t.is_nan() {
                            return (0.0, 0.0);
                        }
                        if t < 0.0 || (t == 0.0 && wj < 0.0) {
                            lo = lo.max(t);
                        } else {
                            hi = hi.min(t);
                        }
                    }
                    (lo * (1.0 - KINK_MARGIN), hi * (1.0 - KINK_MARGIN))
                })
                .collect();
            // Coefficients or factors past the working precision's range (huge weights in f32)
            // make a loss no bound speaks for: such a unit never answers.
            let finite = coeffs.iter().flatten().all(|v| v.re().is_finite())
                && b.iter().all(|v| v.is_finite());
            let mut sums = Vec::new();
            if self.wide && self.weights.len() == m * o {
                let ru = S::epsilon() / 2.0;
                for (n, w) in self.weights.chunks_exact(o).enumerate() {
                    let mut row = [0.0f64; 7];
                    for (k, mk) in coeffs.iter().enumerate() {
                        for (c, wc) in w.iter().enumerate() {
                            let a = mk[n * o + c].re().abs() * (1.0 + 2.0 * ru);
                            row[k] += wc * a;
                            row[3 + k] = row[3 + k].max(a);
                        }
                    }
                    row[6] = w.iter().sum();
                    sums.push(row.map(|v| v * (1.0 + 1e-12)));
                }
            }
            Unit {
                sums,
                m: coeffs,
                finite,
                truncation: self.fourth * b[3],
                rounding,
                windows,
            }
        })
    }

    /// The loss after `moved` (an entry of layer L) through the response, in the buffers of
    /// `ws`; `None` when its bound exceeds the limit (or the entry is not L's), and the caller
    /// takes the plain path. `l2_sum` is the base's Σ w², as for [`Graph::moved_loss_in`].
    #[allow(clippy::too_many_arguments)]
    pub fn loss_in(
        &self,
        ws: &mut Workspace<S>,
        graph: &Graph,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        trace: &Trace<S>,
        y: ArrayView2<S>,
        l2_sum: S,
        moved: &Moved<S>,
    ) -> Option<Responded<S>> {
        let node = &graph.nodes()[self.layer];
        let tensors = node.tensors();
        if !tensors.contains(&moved.tensor) {
            return None;
        }
        let local = Moved {
            tensor: moved.tensor - tensors.start,
            ..*moved
        };
        let u = node.layer.moved_channel(local.tensor, local.index)?;
        if !self.wanted.get(u).copied().unwrap_or(false) {
            return None;
        }
        let input = if self.layer == 0 {
            x
        } else {
            trace.outputs[self.layer - 1].view()
        };
        let layer = S::layer(node.layer.as_ref());
        let mut z = ws.take(self.m);
        let mut d = ws.take(self.m);
        let answer = layer
            .moved_values(
                &params[tensors],
                input,
                &trace.steps[self.layer],
                &local,
                &mut z,
            )
            .then(|| self.respond(graph, params, trace, y, l2_sum, moved, u, &z, &mut d, ws))
            .flatten();
        ws.give(z);
        ws.give(d);
        answer
    }

    /// The change of L+2's z (m × outputs, sample rows, into `out`) when unit u of L changes
    /// its activation by `d` (one per sample) — the response's Σ_k M_k·dᵏ, already a change —
    /// and a bound on the error of its values, per sample as the loss reads it (into `err`:
    /// Σ_c weight·e_c and the largest e_c, [`Response::over_wide`]): the truncation (module
    /// doc), the coefficients' one rounding and Horner's, and what a relative error `rel` of
    /// each d moves it by. For a response [`Response::over_wide`] only, whose coefficients
    /// are formed in f64. `None` where the response would not answer (a unit it leaves out,
    /// a side change above a kink, a coefficient past the precision's range).
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn top_change(
        &self,
        graph: &Graph,
        params: &[ArrayD<S>],
        u: usize,
        d: &[S],
        rel: f64,
        out: &mut Vec<S>,
        err: &mut Vec<(f64, f64)>,
    ) -> Option<()> {
        if !self.wide {
            return None;
        }
        if !self.wanted.get(u).copied().unwrap_or(false) {
            return None;
        }
        let unit = self.unit(graph, params, u);
        if !unit.finite {
            return None;
        }
        let inside = |(dn, (lo, hi)): (&S, &(f64, f64))| *lo < dn.re() && dn.re() < *hi;
        if !unit.windows.is_empty() && !d.iter().zip(&unit.windows).all(inside) {
            return None;
        }
        let o = self.outputs;
        let ru = S::epsilon() / 2.0;
        // Each coefficient M_k is within u of its value (summed in f64 from f64 slopes, then
        // rounded once; the f64 sum's own error, about h·2⁻⁵³ of Σ|terms|, is left out);
        // Horner's form adds γ(6) of Σ_k|M_k|·|d|ᵏ (Higham §5.1), and a relative error `rel`
        // of d moves the k-th term by k·rel of it.
        let horner = gamma(6, ru);
        let factor = [1.0, 2.0, 3.0].map(|k| (ru + horner + rel * k) * (1.0 + 8.0 * ru));
        if unit.sums.len() != d.len() {
            return None;
        }
        err.clear();
        err.reserve(self.m);
        for (v, sums) in d.iter().zip(&unit.sums) {
            let t = v.re().abs();
            if !t.is_finite() {
                return None;
            }
            let shared = unit.truncation * t.powi(4);
            let f = [factor[0] * t, factor[1] * t * t, factor[2] * t * t * t];
            let along = shared * sums[6] + f[0] * sums[0] + f[1] * sums[1] + f[2] * sums[2];
            let most = shared + f[0] * sums[3] + f[1] * sums[4] + f[2] * sums[5];
            err.push((along, most));
        }
        out.clear();
        out.resize(self.m * o, S::zero());
        let [m1, m2, m3] = &unit.m;
        let coeffs = m1
            .chunks_exact(o)
            .zip(m2.chunks_exact(o))
            .zip(m3.chunks_exact(o));
        for ((now, &dn), ((a1, a2), a3)) in out.chunks_exact_mut(o).zip(d).zip(coeffs) {
            for (((v, a1), a2), a3) in now.iter_mut().zip(a1).zip(a2).zip(a3) {
                *v = dn * (*a1 + dn * (*a2 + dn * *a3));
            }
        }
        Some(())
    }

    /// [`Response::loss_in`] from the moved unit's new z.
    #[allow(clippy::too_many_arguments)]
    fn respond(
        &self,
        graph: &Graph,
        params: &[ArrayD<S>],
        trace: &Trace<S>,
        y: ArrayView2<S>,
        l2_sum: S,
        moved: &Moved<S>,
        u: usize,
        z: &[S],
        d: &mut Vec<S>,
        ws: &mut Workspace<S>,
    ) -> Option<Responded<S>> {
        let act = graph.nodes()[self.layer].activation;
        let base_z = trace.steps[self.layer].out.as_slice()?;
        let base_a = trace.outputs[self.layer].as_slice()?;
        let units = trace.outputs[self.layer].ncols();
        let crossed = act.sides_change(z.iter().zip(base_z[u..].iter().step_by(units)));
        // The change of unit u's activation, as the plain path's update takes it.
        d.extend_from_slice(z);
        act.apply_values(d);
        let mut largest = 0.0f64;
        for (n, v) in d.iter_mut().enumerate() {
            *v -= base_a[n * units + u];
            // Not `max`, which passes over a NaN: a non-finite change takes the plain path.
            let a = v.re().abs();
            if a.is_nan() || a > largest {
                largest = a;
            }
        }
        if !largest.is_finite() {
            return None;
        }
        let unit = self.unit(graph, params, u);
        if !unit.finite {
            return None;
        }
        // A piecewise-linear L+1: exact at first order only while no value changes side; near
        // or across the kink the plain path takes the loss (and its kink test).
        let inside = |(dn, (lo, hi)): (&S, &(f64, f64))| *lo < dn.re() && dn.re() < *hi;
        if !unit.windows.is_empty() && !d.iter().zip(&unit.windows).all(inside) {
            return None;
        }
        let t = largest;
        let per_value = unit.truncation * t.powi(4)
            + unit.rounding[0] * t
            + unit.rounding[1] * t * t
            + unit.rounding[2] * t.powi(3);
        let bound = self.lipschitz * per_value;
        // A NaN anywhere takes the plain path.
        if bound.is_nan() || bound > self.limit {
            return None;
        }
        let top = &trace.steps[self.layer + 2].out;
        let base = top.as_slice()?;
        let o = self.outputs;
        let mut out = ws.take(base.len());
        out.resize(base.len(), S::zero());
        let [m1, m2, m3] = &unit.m;
        // Horner's form per value, a sample's row at a time (slices of one length: vectorised).
        let rows = out
            .chunks_exact_mut(o)
            .zip(base.chunks_exact(o))
            .zip(d.iter());
        let coeffs = m1
            .chunks_exact(o)
            .zip(m2.chunks_exact(o))
            .zip(m3.chunks_exact(o));
        for (((now, was), &dn), ((a1, a2), a3)) in rows.zip(coeffs) {
            for ((((v, zb), a1), a2), a3) in now.iter_mut().zip(was).zip(a1).zip(a2).zip(a3) {
                *v = *zb + dn * (*a1 + dn * (*a2 + dn * *a3));
            }
        }
        let z_top = Array2::from_shape_vec(top.raw_dim(), out).expect("the output's size");
        let none = Array2::zeros((self.m, 0));
        let sq = graph.moved_l2_sum(params, l2_sum, moved);
        let loss = graph.loss_with(&z_top, &none, y, sq);
        ws.give_array(z_top);
        Some(Responded {
            loss,
            crossed,
            bound,
        })
    }
}
