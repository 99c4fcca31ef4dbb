//! The loss at a perturbed parameter, recomputing only what the perturbation changes.
//!
//! Moving one weight of layer l by δ changes one column of that layer's pre-activations (z[l][:, r]
//! += δ·a[l][:, c], or += δ for the bias weight). Below layer l nothing changes; in layer l + 1 only
//! that one unit's activation changes, so the next pre-activations move by a rank-one update. Only
//! the layers above that are recomputed in full. For a first-layer weight of a 784-128-64-10 network
//! that is two orders of magnitude less work than a whole forward pass.
//!
//! The evaluator also reports whether any unit with a kink (ReLU-like) changed side relative to the
//! unperturbed pass: then the loss is not smooth along this step and a difference quotient is not
//! to be trusted.
//!
//! A perturbation that dies out stops costing: once a layer's pre-activations above everything
//! moved are the base pass's bit for bit, every layer above would repeat the base pass, so the
//! data term is the base's (a deep stack of squashing layers rounds a small step away within
//! a few dozen layers). Exact, not an approximation: the comparison is of bits.

use ndarray::{Array1, Array2, ArrayView2};
use plumb_engine::{Activation, Coord, Network, Scalar, Trace, Weights};

/// The unperturbed forward pass, kept for every perturbed evaluation.
pub struct Base<'a, S> {
    net: &'a Network,
    weights: &'a Weights<S>,
    y: &'a Array2<S>,
    trace: Trace<S>,
    /// Σ w² over the weights that decay, for the L2 term.
    l2_sum: S,
    /// The same sum, as it stands before each layer: a direction from layer l on adds its terms
    /// to `l2_before[l]` in the order `Network::l2_sum` does, so its loss is the whole pass's.
    l2_before: Vec<S>,
    loss: S,
    /// The data term as a perturbed evaluation computes it from the output layer's z: what one
    /// whose change has died out comes to.
    data: S,
}

impl<'a, S: Scalar> Base<'a, S> {
    /// Runs the forward pass once. `x` and `y` must fit the network (see `Network::check_batch`).
    pub fn new(
        net: &'a Network,
        weights: &'a Weights<S>,
        x: ArrayView2<S>,
        y: &'a Array2<S>,
    ) -> Self {
        let trace = net.forward(weights, x);
        let l2_sum = net.l2_sum(weights);
        let l2_before = if net.l2() == 0.0 {
            Vec::new()
        } else {
            let mut sum = S::zero();
            let mut before = Vec::with_capacity(weights.layers().len());
            for l in 0..weights.layers().len() {
                before.push(sum);
                sum = l2_add(net, sum, weights.layer(l).view());
            }
            before
        };
        let m = x.nrows();
        let loss = net.data_loss(&trace, y.view()) + net.l2_term(l2_sum, m);
        let mut base = Base {
            net,
            weights,
            y,
            trace,
            l2_sum,
            l2_before,
            loss,
            data: S::zero(),
        };
        base.data = base.output_loss(base.trace.z.last().expect("a network has a layer"));
        base
    }

    /// J(θ), the unperturbed loss.
    pub fn loss(&self) -> S {
        self.loss
    }

    pub fn samples(&self) -> usize {
        self.trace.a[0].nrows()
    }

    pub fn trace(&self) -> &Trace<S> {
        &self.trace
    }

    /// J(θ + δ·e_c) and whether a kinked unit changed side; `delta` may be complex (complex step).
    pub fn perturbed(&self, c: Coord, delta: S) -> (S, bool) {
        let net = self.net;
        let layers = net.layers();
        let last = layers.len() - 1;
        let l = c.layer;
        let t = &self.trace;
        let m = self.samples();

        let mut zcol: Array1<S> = t.z[l].column(c.row).to_owned();
        if c.col == 0 {
            zcol.mapv_inplace(|v| v + delta);
        } else {
            zcol.zip_mut_with(&t.a[l].column(c.col - 1), |z, &a| *z += delta * a);
        }
        let mut crossed = crosses(layers[l].activation, t.z[l].column(c.row), zcol.iter());

        let data = if l == last {
            let mut z = t.z[l].clone();
            z.column_mut(c.row).assign(&zcol);
            self.output_loss(&z)
        } else {
            let act = layers[l].activation;
            let acol = zcol.mapv(|v| act.value(v));
            let dcol = &acol - &t.a[l + 1].column(c.row);
            // z[l+1] += dcol ⊗ (column of the next matrix that multiplies unit `row`).
            let next = self.weights.layer(l + 1);
            let wcol = next.column(c.row + 1);
            let mut z = t.z[l + 1].clone();
            for (mut zrow, &d) in z.rows_mut().into_iter().zip(dcol.iter()) {
                zrow.zip_mut_with(&wcol, |zv, &wv| *zv += d * wv);
            }
            crossed |= crosses(layers[l + 1].activation, t.z[l + 1].iter(), z.iter());
            // The layers above, without keeping a trace: each pre-activation is compared with the
            // unperturbed one for kinks as it is made, then only its activation is kept; once it
            // is the base pass's bit for bit, so is everything above.
            // Two buffers take turns as a layer's input and output: no allocation per layer.
            let mut data = None;
            let mut spare = Array2::zeros((0, 0));
            for layer in l + 2..=last {
                if same_bits(&z, &t.z[layer - 1]) {
                    data = Some(self.data);
                    break;
                }
                let mut a = z;
                layers[layer - 1].activation.apply_in_place(&mut a);
                Network::affine_into(self.weights.layer(layer).view(), a.view(), &mut spare);
                z = spare;
                spare = a;
                crossed |= crosses(layers[layer].activation, t.z[layer].iter(), z.iter());
            }
            data.unwrap_or_else(|| self.output_loss(&z))
        };
        let mut l2_sum = self.l2_sum;
        if net.decays(c) && net.l2() != 0.0 {
            let w = *self.weights.get(c);
            let moved = w + delta;
            l2_sum = l2_sum - w * w + moved * moved;
        }
        (data + net.l2_term(l2_sum, m), crossed)
    }

    /// J(θ + δ·v) for a whole direction v (one matrix per layer), and whether a kinked unit
    /// changed side.
    pub fn along(&self, direction: &Weights<S>, delta: S) -> (S, bool) {
        self.along_from(0, direction.layers(), delta)
    }

    /// J(θ + δ·v) for a direction v that moves layers `first`, `first + 1`, … (`direction[i]` is
    /// layer `first + i`, zero outside the span), and whether a kinked unit changed side. The
    /// layers below `first` are the base pass's; only one moved layer is held at a time, so a
    /// direction costs a layer's memory, not a weight set's. Bit for bit the loss of a whole
    /// forward pass at the moved weights.
    pub fn along_from(&self, first: usize, direction: &[Array2<S>], delta: S) -> (S, bool) {
        let net = self.net;
        let layers = net.layers();
        let last = layers.len() - 1;
        let t = &self.trace;
        let moved = |l: usize| {
            let v = direction.get(l.checked_sub(first)?)?;
            let mut w = self.weights.layer(l).clone();
            w.zip_mut_with(v, |o, &d| *o += delta * d);
            Some(w)
        };
        // The layers from here on are not moved.
        let unmoved = first + direction.len();
        let mut crossed = false;
        // A layer's input (none: the base pass's at `first`) and a buffer for its output; the two
        // take turns, so a layer allocates nothing.
        let mut input: Option<Array2<S>> = None;
        let mut z = Array2::zeros((0, 0));
        let mut l2_sum = self.l2_before.get(first).copied().unwrap_or(S::zero());
        let mut data = None;
        for (l, layer) in layers.iter().enumerate().skip(first) {
            if data.is_some() {
                // The data term is settled; the L2 sum still takes every layer, in order.
                if self.l2_before.is_empty() {
                    break;
                }
                l2_sum = l2_add(net, l2_sum, self.weights.layer(l).view());
                continue;
            }
            let theta = moved(l);
            let theta = theta.as_ref().unwrap_or(self.weights.layer(l));
            if !self.l2_before.is_empty() {
                l2_sum = l2_add(net, l2_sum, theta.view());
            }
            let a = input.as_ref().unwrap_or(&t.a[first]);
            Network::affine_into(theta.view(), a.view(), &mut z);
            crossed |= crosses(layer.activation, t.z[l].iter(), z.iter());
            if l == last {
                data = Some(self.output_loss(&z));
            } else if l + 1 >= unmoved && same_bits(&z, &t.z[l]) {
                // Nothing above moves and this layer is the base's again: so is the rest.
                data = Some(self.data);
            } else {
                layer.activation.apply_in_place(&mut z);
                let used = input.replace(z);
                z = used.unwrap_or_else(|| Array2::zeros((0, 0)));
            }
        }
        let data = data.expect("the output layer is reached or the base's data term taken");
        (data + net.l2_term(l2_sum, self.samples()), crossed)
    }

    fn output_loss(&self, z: &Array2<S>) -> S {
        let act = self.net.layers()[self.net.layers().len() - 1].activation;
        let loss = self.net.loss();
        // Cross-entropy needs only z: skip the output activations (a softmax is an exp per value).
        let a = if loss.reads_activations() {
            act.apply(z.view())
        } else {
            Array2::zeros((0, 0))
        };
        loss.value_with(
            self.net.conventions().reduction,
            act,
            z.view(),
            a.view(),
            self.y.view(),
        )
    }
}

/// The loss of a fully perturbed copy of the weights, by a whole forward pass: the naive way, kept
/// as the reference the incremental evaluator is tested and benchmarked against.
pub fn full_loss<S: Scalar>(
    net: &Network,
    weights: &Weights<S>,
    x: ArrayView2<S>,
    y: ArrayView2<S>,
    c: Coord,
    delta: S,
) -> S {
    let mut moved = weights.clone();
    *moved.get_mut(c) += delta;
    net.loss_value(&moved, x, y)
}

/// Whether two arrays hold the same values bit for bit.
fn same_bits<S: Scalar>(a: &Array2<S>, b: &Array2<S>) -> bool {
    a.dim() == b.dim() && a.iter().zip(b.iter()).all(|(&x, &y)| x.same_bits(y))
}

/// `sum` plus the squares of the weights of one layer that decay, in `Network::l2_sum`'s order.
fn l2_add<S: Scalar>(net: &Network, mut sum: S, theta: ArrayView2<S>) -> S {
    let first = usize::from(!net.conventions().l2_on_bias);
    for &v in theta.slice(ndarray::s![.., first..]).iter() {
        sum += v * v;
    }
    sum
}

/// The side of a kink a pre-activation is on, as the activation's own branch decides it.
fn side<S: Scalar>(v: S, kink: f64) -> bool {
    v.re() > kink
}

/// Whether any pre-activation moved across the activation's kink, or a break in a derivative the
/// methods' bounds rely on (false for smooth activations).
fn crosses<'x, S: Scalar>(
    act: Activation,
    before: impl IntoIterator<Item = &'x S>,
    after: impl IntoIterator<Item = &'x S>,
) -> bool {
    match act.break_point() {
        None => false,
        Some(k) => before
            .into_iter()
            .zip(after)
            .any(|(&b, &a)| side(b, k) != side(a, k)),
    }
}
