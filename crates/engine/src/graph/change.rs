//! The loss's change after one entry of a dense layer moved, carried up the layers as changes
//! rather than values, with a bound on its error: the difference form of the f32 check
//! (docs/engine.md, "Losses as changes").
//!
//! A whole f32 loss J carries round-off of some ε·|J|, so a finite difference of two of them at
//! a step h errs by about ε·|J|/h, far above a gradient entry's tolerance at f32's steps. Here
//! nothing of size |J| is ever formed: an entry (u, j) of dense layer L moves z[n, u] by δ·x[n, j]
//! (a bias entry: by δ); unit u's activation then changes by [`Activation::change`] (a few ulp
//! of the change); a dense layer above changes its z by the change of its input times its
//! weights (no bias), and so on up to the output, whose data term's change is
//! `LossConfig::data_change`; the L2 term changes by (λ/divisor)·δ·(2w + δ). Every value is a
//! change, so its rounding scales with the change, about h times the gradient, and a central
//! quotient errs by a few ε of the quotient, whatever h is.
//!
//! The bound is a running error bound in the style of Higham (Accuracy and Stability of
//! Numerical Algorithms, §3.1: a sum of n terms errs by at most γ(n) times the sum of their
//! absolute values), carried alongside each change: a relative error per value while a change
//! passes through products and activations one value at a time, an absolute one per value once
//! a sum mixes several (γ(J)·Σ|w||Δa| plus the incoming errors through |W|). It also counts the
//! base point's own rounding: the base is the engine's pass in f64 at the parameters the check
//! holds, each value rounded once (`Difference::new`), so its z of each layer differs from that
//! pass by at most `base_error[layer]` (measured), which moves each slope by up to
//! [`Activation::curvature`] times that, relative. Two dense
//! layers above L with a softmax cross-entropy on top take the change of the top z from the
//! [`Response`] (Σ_k M_k·dᵏ), with its own bound.
//!
//! Covered: flat dense layers from L to the output, with activations that have a difference
//! form ([`Activation::change`]: not gelu) and losses that have one (softmax and logistic
//! cross-entropy, squared error; mean or sum; one output vector per sample). A change that
//! moves a piecewise activation across its kink has none: the caller takes the plain path and
//! its kink test. Anything else (other kinds, sequences, gelu) returns `None`.

use std::sync::OnceLock;

use ndarray::{Array2, ArrayD, ArrayView2};

use super::dense::Dense;
use super::loss::{Errors, OutputBase, gamma};
use super::{Graph, LayerScalar, Moved, Response, Shape, Step, Trace, Workspace};
use crate::product::{add_matmul, matmul};
use crate::{Activation, Loss};

/// The base point's values the difference form reads, built once per check.
#[derive(Debug)]
pub struct Difference<S> {
    /// The lowest layer from which every layer is a flat dense one with a difference form.
    first: usize,
    /// The base pass computed in f64 and rounded once per value to S (z and a of each layer).
    trace: Trace<S>,
    /// That f64 pass.
    wide: Trace<f64>,
    /// Per layer, the largest |error| of `trace`'s z against the f64 pass it was rounded from.
    base_error: Vec<f64>,
    /// The output's softmax probabilities at the base (m × outputs), rounded once from f64;
    /// empty for another output.
    p: Vec<S>,
    /// Per layer from `first`, its input transposed (fan-in × m, x's for layer 0).
    columns: Vec<Vec<S>>,
    /// Per tanh layer, g′(z) of each base value in f64, rounded once (empty for the others:
    /// only tanh's form reads it, [`Activation::change_from`]).
    slopes_at: Vec<Vec<S>>,
    /// Per value, |Σy·p_c − y_c| at the base (softmax only; see `OutputBase`).
    slopes: Vec<f64>,
    /// Per sample, Σy rounded once and Σ|y| (softmax only; see `OutputBase`).
    ysums: Vec<(S, f64)>,
    /// Per layer, its [`Response`] over `trace` where it has one and was asked for.
    responses: Vec<Option<Response<S>>>,
    /// Per layer, its weight widened to f64 and that weight's magnitudes, for [`weighted`]:
    /// formed the first time a change passes through the layer, from the parameters every
    /// call passes (the check's own), where each change had copied them again.
    weights: Vec<OnceLock<Widened>>,
}

/// A dense layer's weight in f64 and its magnitudes ([`Difference::widened`]).
type Widened = (Array2<f64>, Array2<f64>);

/// A loss's change and the bound on its error (absolute, in the loss's units).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Changed<S> {
    pub change: S,
    pub bound: f64,
}

impl<S: LayerScalar> Difference<S> {
    /// The difference form over `wide`, the base pass computed in f64 at the parameters the
    /// check holds in S (so that the base's values carry one rounding each: a pass in S would
    /// carry γ(fan-in) of Σ|w·x|, which moves every slope, and so every change, by as much);
    /// `None` where no layer has one (module doc). The base pass is computed once, not in the
    /// loop of losses.
    pub fn new(
        graph: &Graph,
        wide: &Trace<f64>,
        x: ArrayView2<S>,
        y: ArrayView2<f64>,
    ) -> Option<Difference<S>> {
        let nodes = graph.nodes();
        let loss = graph.loss_config();
        let last = nodes.last()?;
        let output_ok = match (loss.loss, last.activation) {
            (Loss::CrossEntropy, Activation::Softmax | Activation::Sigmoid) => true,
            (Loss::SquaredError, act) => act.change_ulps().is_some(),
            _ => false,
        };
        if !output_ok || wide.steps.len() != nodes.len() {
            return None;
        }
        let mut first = nodes.len();
        for (j, node) in nodes.iter().enumerate().rev() {
            let flat = |s: Shape| matches!(s, Shape::Flat(_));
            let dense = node.layer.kind() == "dense"
                && flat(node.layer.input())
                && flat(node.layer.output());
            let smooth_enough = j + 1 == nodes.len() || node.activation.change_ulps().is_some();
            if !(dense && smooth_enough) {
                break;
            }
            first = j;
        }
        if first == nodes.len() {
            return None;
        }
        let narrow = |a: &ndarray::Array2<f64>| a.mapv(S::from_f64);
        let steps: Vec<Step<S>> = wide
            .steps
            .iter()
            .map(|s| Step {
                out: narrow(&s.out),
                saved: Vec::new(),
                branches: Vec::new(),
                ties: 0,
            })
            .collect();
        let base_error = steps
            .iter()
            .zip(&wide.steps)
            .map(|(ours, w)| {
                ours.out
                    .iter()
                    .zip(&w.out)
                    .fold(0.0f64, |m, (a, b)| m.max((a.re() - b).abs()))
            })
            .collect();
        let slopes_at = nodes
            .iter()
            .zip(&wide.steps)
            .map(|(node, z)| match node.activation {
                // 1 − tanh² z as sech² z = 1/cosh² z, which keeps its relative accuracy where
                // tanh z is near ±1 (1 − a² there would be 0 or a few ulp of 1).
                Activation::Tanh => z
                    .out
                    .iter()
                    .map(|&z| S::from_f64(z.cosh().powi(-2)))
                    .collect(),
                _ => Vec::new(),
            })
            .collect();
        // Each dense layer's input by columns (fan-in × m): a weight entry reads one column,
        // contiguous here, strided (one cache line per sample) in the batch's rows.
        let columns = (0..nodes.len())
            .map(|j| {
                if j < first {
                    return Vec::new();
                }
                let input = if j == 0 {
                    x.to_owned()
                } else {
                    wide.outputs[j - 1].mapv(S::from_f64)
                };
                input.t().iter().copied().collect()
            })
            .collect();
        let trace = Trace {
            steps,
            outputs: wide.outputs.iter().map(narrow).collect(),
        };
        let (mut p, mut slopes, mut ysums) = (Vec::new(), Vec::new(), Vec::new());
        if last.activation == Activation::Softmax {
            let z = &wide.steps[nodes.len() - 1].out;
            p.reserve(z.len());
            for (row, yr) in z.rows().into_iter().zip(y.rows()) {
                let top = row.iter().fold(f64::NEG_INFINITY, |m, v| m.max(*v));
                let e: Vec<f64> = row.iter().map(|v| (v - top).exp()).collect();
                let sum: f64 = e.iter().sum();
                let sy: f64 = yr.iter().sum();
                ysums.push((S::from_f64(sy), yr.iter().map(|v| v.abs()).sum::<f64>()));
                // With room for this f64 sum's own rounding.
                slopes.extend(
                    e.iter()
                        .zip(yr)
                        .map(|(v, yc)| (sy * v / sum - yc).abs() * (1.0 + 1e-12)),
                );
                p.extend(e.iter().map(|v| S::from_f64(v / sum)));
            }
        }
        Some(Difference {
            first,
            columns,
            trace,
            wide: Trace {
                steps: wide
                    .steps
                    .iter()
                    .map(|s| Step {
                        out: s.out.clone(),
                        saved: Vec::new(),
                        branches: Vec::new(),
                        ties: 0,
                    })
                    .collect(),
                outputs: wide.outputs.clone(),
            },
            base_error,
            p,
            slopes_at,
            slopes,
            ysums,
            responses: Vec::new(),
            weights: (0..nodes.len()).map(|_| OnceLock::new()).collect(),
        })
    }

    /// Takes the two layers above a dense layer through its [`Response`] (over this base) for
    /// the units with at least `least` of the `entries` to move, as the plain path does.
    pub fn respond(
        &mut self,
        graph: &Graph,
        y: ArrayView2<S>,
        entries: &[(usize, usize)],
        least: usize,
    ) {
        self.responses = (0..graph.nodes().len())
            .map(|j| {
                Response::over_wide(graph, &self.trace, &self.wide, y, j, &self.slopes)
                    .map(|r| r.for_entries(graph, entries, least))
            })
            .collect();
    }

    /// g′(z) at value k of layer j's base where its form reads it (see `slopes_at`), else 0.
    fn slope(&self, j: usize, k: usize) -> S {
        self.slopes_at[j].get(k).copied().unwrap_or(S::zero())
    }

    /// The change of the loss after `moved` (an entry of the graph's tensors), with its
    /// bound. `None` where there is no difference form (module doc): the caller takes the
    /// plain path.
    #[allow(clippy::too_many_arguments)]
    pub fn loss_change(
        &self,
        ws: &mut Workspace<S>,
        graph: &Graph,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        y: ArrayView2<S>,
        moved: &Moved<S>,
    ) -> Option<Changed<S>> {
        let trace = &self.trace;
        let nodes = graph.nodes();
        let layer = graph.tensors()[moved.tensor].layer;
        if layer < self.first {
            return None;
        }
        let node = &nodes[layer];
        let tensors = node.tensors();
        let local = moved.tensor - tensors.start;
        let u = node.layer.moved_channel(local, moved.index)?;
        let units = node.layer.output().size();
        let m = x.nrows();
        let columns = &self.columns[layer];
        let fan_in = columns.len() / m.max(1);
        let ru = S::epsilon() / 2.0;
        // Above the first layer the column is the f64 pass's output rounded once: one more
        // rounding in δ·x than the product's own.
        let column = if layer > 0 && local == 0 { ru } else { 0.0 };
        // Unit u's change of z: δ·x[n, j] for a weight, δ for a bias (one rounding each).
        let mut dz = ws.take(m);
        if local == 0 {
            let j = moved.index % fan_in;
            dz.extend(columns[j * m..(j + 1) * m].iter().map(|&v| moved.delta * v));
        } else {
            dz.resize(m, moved.delta);
        }
        let (z, a) = (
            trace.steps[layer].out.as_slice()?,
            trace.outputs[layer].as_slice()?,
        );
        let last = layer + 1 == nodes.len();
        let (top, err) = if last {
            // The output's own unit moved: the top's change is that column alone.
            let o = units;
            let mut top = vec![S::zero(); m * o];
            let mut err = vec![0.0; m * o];
            for (n, d) in dz.iter().enumerate() {
                top[n * o + u] = *d;
                err[n * o + u] = (ru + column) * d.re().abs();
            }
            (top, Ok(err))
        } else {
            let act = node.activation;
            let ulps = act.change_ulps()?;
            let mut da = ws.take(m);
            for (n, &d) in dz.iter().enumerate() {
                let at = n * units + u;
                da.push(act.change_from(z[at], a[at], self.slope(layer, at), d)?);
            }
            // Relative error of each change of unit u: δ·x's rounding, the change's own, and
            // the base's error in z through the activation's curvature.
            let rel = (1.0 + ulps) * ru + column + act.curvature() * self.base_error[layer];
            let response = self.responses.get(layer).and_then(Option::as_ref);
            let mut top = ws.take(m * nodes[nodes.len() - 1].layer.output().size());
            let responded = response.and_then(|r| {
                let mut err = Vec::new();
                r.top_change(graph, params, u, &da, rel, &mut top, &mut err)?;
                Some(err)
            });
            let made = match responded {
                Some(per_sample) => (top, Err(per_sample)),
                None => {
                    ws.give(top);
                    let (top, err) = self.up_from(graph, params, layer, u, &da, rel)?;
                    (top, Ok(err))
                }
            };
            ws.give(da);
            made
        };
        ws.give(dz);
        let base = OutputBase {
            z: trace.steps[nodes.len() - 1].out.as_slice()?,
            a: trace.outputs[nodes.len() - 1].as_slice()?,
            p: &self.p,
            y: y.to_slice()?,
            slopes: &self.slopes,
            ysums: &self.ysums,
            base_error: self.base_error[nodes.len() - 1],
        };
        let loss = graph.loss_config();
        let outputs = nodes[nodes.len() - 1].layer.output().size();
        let mut grown = ws.take(top.len());
        let (mut change, mut bound) = loss.data_change(
            nodes[nodes.len() - 1].activation,
            outputs,
            &base,
            &top,
            match &err {
                Ok(values) => Errors::Values(values),
                Err(samples) => Errors::Samples(samples),
            },
            &mut grown,
        )?;
        ws.give(grown);
        ws.give(top);
        let factor = loss.l2_factor(m);
        if factor != 0.0 && graph.decays(moved.tensor) {
            let w = params[moved.tensor].as_slice()?[moved.index];
            let l2 = S::from_f64(factor) * moved.delta * (w + w + moved.delta);
            // Four roundings of a product of three factors and a sum, and the final sum's.
            bound += 5.0 * ru * l2.re().abs();
            change += l2;
            bound += ru * change.re().abs();
        }
        Some(Changed { change, bound })
    }

    /// What the steps along a direction v share (one vector per tensor of the graph, empty
    /// outside its span), where every layer v moves is at or above the lowest with a difference
    /// form: v's entries rounded to S, and the lowest moved layer's change of z per unit step,
    /// a·Vᵀ + v_b, with its bound. `None` where v moves a layer below it (module doc).
    pub fn along(
        &self,
        graph: &Graph,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        v: &[Vec<f64>],
    ) -> Option<Along<S>> {
        let nodes = graph.nodes();
        let moves = |t: usize| v.get(t).is_some_and(|vt| vt.iter().any(|w| *w != 0.0));
        let t0 = (0..graph.tensors().len()).find(|&t| moves(t))?;
        let from = graph.tensors()[t0].layer;
        if from < self.first {
            return None;
        }
        let ru = S::epsilon() / 2.0;
        let narrow: Vec<Vec<S>> = v
            .iter()
            .map(|vt| {
                if vt.iter().any(|w| *w != 0.0) {
                    vt.iter().map(|&w| S::from_f64(w)).collect()
                } else {
                    Vec::new()
                }
            })
            .collect();
        let input = if from == 0 {
            x
        } else {
            self.trace.outputs[from - 1].view()
        };
        let (start, start_err) = spanned(
            &nodes[from]
                .tensors()
                .map(|t| narrow[t].as_slice())
                .collect::<Vec<_>>(),
            &params[nodes[from].tensors()],
            input,
            // Above the first layer the input is the f64 pass's output rounded once.
            if from == 0 { 0.0 } else { ru },
        )?;
        // The L2 term's change at step d is factor·(2d·Σ w·v + d²·Σ v²) over the decaying
        // tensors, in f64 (each product of an S value and a rounded v exact there).
        let (mut wv, mut wv_gross, mut vv, mut count) = (0.0f64, 0.0f64, 0.0f64, 0usize);
        for (t, vt) in narrow.iter().enumerate() {
            if vt.is_empty() || !graph.decays(t) {
                continue;
            }
            let w = params[t].as_slice()?;
            for (&wk, &vk) in w.iter().zip(vt) {
                let p = wk.re() * vk.re();
                wv += p;
                wv_gross += p.abs();
                vv += vk.re() * vk.re();
            }
            count += vt.len();
        }
        Some(Along {
            from,
            v: narrow,
            start,
            start_err,
            l2: (wv, wv_gross, vv, count),
        })
    }

    /// The change of the loss after the step `d` along a direction ([`Difference::along`]), in
    /// f64 (the data term's change computed in S, the L2 term's in f64), with its bound: layer
    /// by layer from the lowest moved one, each activation's change as for one entry, and each
    /// dense layer above's z changed by Δa·Wᵀ plus, where v moves that layer, d·((a + Δa)·Vᵀ +
    /// v_b), every product's rounding bounded by γ(n) of its terms' magnitudes (Higham §3.1)
    /// and the incoming errors carried through |W| and |V|. The step taken is d·v with v's
    /// entries rounded to S (at most u of each, which moves the directional derivative by at
    /// most u·Σ|g·v|, within the verdict's allowance for the analytic side). `None` where a
    /// change has no difference form (a kink crossed, a range left): the caller takes the
    /// whole loss.
    pub fn along_change(
        &self,
        graph: &Graph,
        params: &[ArrayD<S>],
        y: ArrayView2<S>,
        along: &Along<S>,
        d: S,
    ) -> Option<Changed<f64>> {
        let nodes = graph.nodes();
        let trace = &self.trace;
        let ru = S::epsilon() / 2.0;
        let dr = d.re().abs();
        let mut dz: Vec<S> = along.start.iter().map(|&c| d * c).collect();
        let mut err: Vec<f64> = along
            .start_err
            .iter()
            .zip(&dz)
            .map(|(&e, v)| dr * e + ru * v.re().abs())
            .collect();
        let m = y.nrows();
        for j in along.from..nodes.len() - 1 {
            // Layer j's activation changes, then layer j + 1's z.
            let a = trace.outputs[j].as_slice()?;
            let (da, da_err) = self.activation_change(graph, j, &dz, &err)?;
            let next = &params[nodes[j + 1].tensors()];
            let ins = da.len() / m.max(1);
            (dz, err) = weighted(self.widened(j + 1, next), &da, &da_err, m);
            let spans: Vec<&[S]> = nodes[j + 1]
                .tensors()
                .map(|t| along.v[t].as_slice())
                .collect();
            if spans.iter().any(|s| !s.is_empty()) {
                // a + Δa, one rounding; a itself the f64 pass's output rounded once.
                let moved: Vec<S> = a.iter().zip(&da).map(|(&a, &c)| a + c).collect();
                let column: Vec<f64> = moved
                    .iter()
                    .zip(a)
                    .zip(&da_err)
                    .map(|((v, a), e)| ru * (v.re().abs() + a.re().abs()) + e)
                    .collect();
                let moved = ndarray::Array2::from_shape_vec((m, ins), moved).ok()?;
                let (own_change, own_err) = spanned_with(&spans, next, moved.view(), &column)?;
                for (k, (&c, &e)) in own_change.iter().zip(&own_err).enumerate() {
                    let t = d * c;
                    let sum = dz[k] + t;
                    err[k] += dr * e + ru * t.re().abs() + ru * sum.re().abs();
                    dz[k] = sum;
                }
            }
        }
        let top = nodes.len() - 1;
        let base = OutputBase {
            z: trace.steps[top].out.as_slice()?,
            a: trace.outputs[top].as_slice()?,
            p: &self.p,
            y: y.to_slice()?,
            slopes: &self.slopes,
            ysums: &self.ysums,
            base_error: self.base_error[top],
        };
        let loss = graph.loss_config();
        let outputs = nodes[top].layer.output().size();
        let mut grown = Vec::new();
        let (data, data_bound) = loss.data_change(
            nodes[top].activation,
            outputs,
            &base,
            &dz,
            Errors::Values(&err),
            &mut grown,
        )?;
        let mut change = data.re();
        let mut bound = data_bound;
        let factor = loss.l2_factor(m);
        let (wv, wv_gross, vv, count) = along.l2;
        if factor != 0.0 && count > 0 {
            let dw = d.re();
            let l2 = factor * (2.0 * dw * wv + dw * dw * vv);
            let e64 = f64::EPSILON / 2.0;
            bound += gamma(count + 4, e64) * factor * (2.0 * dw.abs() * wv_gross + dw * dw * vv);
            change += l2;
        }
        bound += f64::EPSILON * change.abs();
        Some(Changed { change, bound })
    }

    /// Layer j's activation's change from its z's change `dz` (each value within `err`), with
    /// each value's bound: the change form's own ulps, the base's error in z through the
    /// curvature, and the incoming error through the largest slope. `None` where a value has no
    /// difference form (a kink crossed, a range left).
    fn activation_change(
        &self,
        graph: &Graph,
        j: usize,
        dz: &[S],
        err: &[f64],
    ) -> Option<(Vec<S>, Vec<f64>)> {
        let ru = S::epsilon() / 2.0;
        let act = graph.nodes()[j].activation;
        let ulps = act.change_ulps()?;
        let trace = &self.trace;
        let (z, a) = (trace.steps[j].out.as_slice()?, trace.outputs[j].as_slice()?);
        let own = ulps * ru + act.curvature() * self.base_error[j];
        let slope = act.max_slope();
        let mut change = Vec::with_capacity(dz.len());
        let mut change_err = Vec::with_capacity(dz.len());
        for (k, (&d, &e)) in dz.iter().zip(err).enumerate() {
            let c = act.change_from(z[k], a[k], self.slope(j, k), d)?;
            change_err.push(own * c.re().abs() + slope * e * (1.0 + own));
            change.push(c);
        }
        Some((change, change_err))
    }

    /// The top layer's change and the error bound of each of its values, from unit u of
    /// `layer` changing its activation by `da` (each within `rel` of its value, relative),
    /// through every dense layer above: the first by a rank-one product (relative errors), the
    /// others by whole products summed in f64 and rounded once (absolute errors, Higham §3.1).
    fn up_from(
        &self,
        graph: &Graph,
        params: &[ArrayD<S>],
        layer: usize,
        u: usize,
        da: &[S],
        rel: f64,
    ) -> Option<(Vec<S>, Vec<f64>)> {
        let nodes = graph.nodes();
        let ru = S::epsilon() / 2.0;
        let m = da.len();
        // Layer + 1: dz[n, i] = da[n]·W[i, u], one rounding: relative errors still.
        let next = layer + 1;
        let w = Dense::weight(&params[nodes[next].tensors()]);
        let width = w.nrows();
        let column: Vec<S> = w.column(u).iter().copied().collect();
        let mut dz = Vec::with_capacity(m * width);
        for &d in da {
            dz.extend(column.iter().map(|&c| d * c));
        }
        let mut err: Vec<f64> = dz.iter().map(|v| (rel + ru) * v.re().abs()).collect();
        for j in next..nodes.len() - 1 {
            // Layer j's activation changes, then layer j + 1's z by that times its weights.
            let (change, change_err) = self.activation_change(graph, j, &dz, &err)?;
            let w = self.widened(j + 1, &params[nodes[j + 1].tensors()]);
            (dz, err) = weighted(w, &change, &change_err, m);
        }
        Some((dz, err))
    }
}

impl<S: LayerScalar> Difference<S> {
    /// Dense layer j's weight (from its tensors `own`) in f64, and its magnitudes.
    /// Formed from the first call's tensors: every call passes the check's own parameters
    /// (checked in debug builds on the weight's shape and its first and last entries).
    fn widened(&self, j: usize, own: &[ArrayD<S>]) -> &Widened {
        let widened = self.weights[j].get_or_init(|| {
            let w = Dense::weight(own).mapv(|v| v.re());
            let magnitudes = w.mapv(f64::abs);
            (w, magnitudes)
        });
        debug_assert!({
            let (w, given) = (&widened.0, Dense::weight(own));
            let ends = |a: &ndarray::ArrayView2<'_, S>| {
                (a.first().map(|v| v.re()), a.last().map(|v| v.re()))
            };
            w.dim() == given.dim() && (w.first().copied(), w.last().copied()) == ends(&given.view())
        });
        widened
    }
}

/// A direction's shared values ([`Difference::along`]).
#[derive(Debug)]
pub struct Along<S> {
    /// The lowest layer the direction moves.
    from: usize,
    /// Per tensor, v's entries rounded to S (empty outside its span).
    v: Vec<Vec<S>>,
    /// Layer `from`'s change of z per unit step (m × units, sample rows) and each value's bound.
    start: Vec<S>,
    start_err: Vec<f64>,
    /// Over the decaying tensors: Σ w·v, Σ |w·v|, Σ v² (f64) and how many entries.
    l2: (f64, f64, f64, usize),
}

/// A dense layer's change of z from its input's change `change` (m samples × fan-in, each
/// value within `change_err`), Δa·Wᵀ with W the layer's own weight (no bias), and each value's
/// bound. Each sum formed in f64 (a product of two f32 values is exact there) and rounded
/// once: γ(fan-in) in S of the terms' magnitudes, which cancel, kept most losses of a wide relu
/// layer's units off one step (784-512-512-10 in f32: 950 of its first layer's 1,000
/// coordinates unsettled). The products by gemm in f64: Δa·Wᵀ, and (γ|Δa| + e)·|W|ᵀ for the
/// bound, times (1 + γ) for the carried errors' own sums, plus the final rounding.
fn weighted<S: LayerScalar>(
    (w64, magnitudes): &Widened,
    change: &[S],
    change_err: &[f64],
    m: usize,
) -> (Vec<S>, Vec<f64>) {
    let ins = w64.ncols();
    let ru = S::epsilon() / 2.0;
    let g = gamma(ins, f64::EPSILON / 2.0);
    let wide: Vec<f64> = change.iter().map(|v| v.re()).collect();
    let carried: Vec<f64> = wide
        .iter()
        .zip(change_err)
        .map(|(v, e)| g * v.abs() + e)
        .collect();
    let as_rows = |v: Vec<f64>| Array2::from_shape_vec((m, ins), v).expect("m × fan-in values");
    let sums = matmul(as_rows(wide).view(), w64.t());
    let bounds = matmul(as_rows(carried).view(), magnitudes.t());
    sums.iter()
        .zip(&bounds)
        .map(|(&s, &b)| {
            let rounded = S::from_f64(s);
            (rounded, b * (1.0 + g) + ru * rounded.re().abs())
        })
        .unzip()
}

/// A dense layer's change of z per unit step along its share `v` of a direction (weight then
/// bias, each empty where v does not move it), a·Vᵀ + v_b, and a bound on each value's error:
/// the product's γ(fan-in + 1) of its terms' magnitudes, plus each input's rounding, `column`
/// relative to its value.
fn spanned<S: LayerScalar>(
    v: &[&[S]],
    own: &[ArrayD<S>],
    input: ArrayView2<S>,
    column: f64,
) -> Option<(Vec<S>, Vec<f64>)> {
    let errors: Vec<f64> = input.iter().map(|a| column * a.re().abs()).collect();
    spanned_with(v, own, input, &errors)
}

/// [`spanned`] with a bound per input value (m × fan-in, sample rows).
fn spanned_with<S: LayerScalar>(
    v: &[&[S]],
    own: &[ArrayD<S>],
    input: ArrayView2<S>,
    input_err: &[f64],
) -> Option<(Vec<S>, Vec<f64>)> {
    let w = Dense::weight(own);
    let (units, fan_in) = w.dim();
    let m = input.nrows();
    let ru = S::epsilon() / 2.0;
    let g = gamma(fan_in + 1, ru);
    let weight = v.first().copied().unwrap_or(&[]);
    let bias = v.get(1).copied().unwrap_or(&[]);
    let mut out = ndarray::Array2::from_elem((m, units), S::zero());
    if !bias.is_empty() {
        for mut row in out.rows_mut() {
            row.iter_mut().zip(bias).for_each(|(o, &b)| *o = b);
        }
    }
    let mut bound = ndarray::Array2::from_elem((m, units), 0.0f64);
    if !weight.is_empty() {
        let vw = ArrayView2::from_shape((units, fan_in), weight).ok()?;
        add_matmul(&mut out, input, vw.t());
        // Σ|V|·(γ|a| + e) per value, then (1 + γ) for the carried errors' own sums.
        let carried: Vec<f64> = input
            .iter()
            .zip(input_err)
            .map(|(a, e)| g * a.re().abs() + e)
            .collect();
        let carried = ndarray::Array2::from_shape_vec((m, fan_in), carried).ok()?;
        bound = matmul(carried.view(), vw.mapv(|x| x.re().abs()).t());
        bound.mapv_inplace(|b| b * (1.0 + g));
    }
    if !bias.is_empty() {
        for mut row in bound.rows_mut() {
            row.iter_mut()
                .zip(bias)
                .for_each(|(e, b)| *e += g * b.re().abs());
        }
    }
    Some((out.into_iter().collect(), bound.into_iter().collect()))
}
