//! How large the pieces of the loss and of the gradient are, as opposed to their sums: round-off
//! follows the pieces. A confident network's loss is a small difference of large terms (softplus(z)
//! − y·z for z ≈ 10 is 10.00005 − 10), and its gradient a small difference a − y of numbers near 1;
//! judging their round-off by |J| or |g| alone would call correct gradients wrong.

use ndarray::{Array2, ArrayD, ArrayView2, Axis, Ix2, s};
use plumb_engine::graph::{Graph, Shape};
use plumb_engine::{Activation, Loss, Network, Trace, Weights};

/// Σ of the absolute values of the terms the loss sums (times 1/m under the mean reduction), plus
/// the L2 term.
pub fn loss_magnitude(
    net: &Network,
    weights: &Weights<f64>,
    trace: &Trace<f64>,
    y: &Array2<f64>,
) -> f64 {
    let depth = net.layers().len();
    let out = net.layers()[depth - 1].activation;
    let (z, a) = (&trace.z[depth - 1], &trace.a[depth]);
    let reduce = net.conventions().reduction.factor(z.nrows());
    let data: f64 = match (net.loss(), out) {
        (Loss::CrossEntropy, Activation::Softmax) => z
            .rows()
            .into_iter()
            .zip(y.rows())
            .map(|(zr, yr)| {
                let shift = zr.iter().fold(f64::NEG_INFINITY, |m, v| m.max(*v));
                let lse = shift + zr.iter().map(|v| (v - shift).exp()).sum::<f64>().ln();
                zr.iter()
                    .zip(yr)
                    .map(|(zv, yv)| yv.abs() * (lse.abs() + zv.abs()))
                    .sum::<f64>()
            })
            .sum(),
        (Loss::CrossEntropy, _) => z
            .iter()
            .zip(y.iter())
            .map(|(&zv, &yv)| Activation::Softplus.value(zv).abs() + (yv * zv).abs())
            .sum(),
        (Loss::SquaredError, _) => {
            0.5 * a
                .iter()
                .zip(y.iter())
                .map(|(av, yv)| (av.abs() + yv.abs()).powi(2))
                .sum::<f64>()
        }
    };
    data * reduce + net.l2_penalty(weights, z.nrows())
}

/// A bound on each gradient entry's pieces: backpropagation of absolute values (|a| + |y| at the
/// output, |W| and |g′| on the way down), so that rounding in a − y and in the sums is allowed for.
pub fn gradient_magnitude(
    net: &Network,
    weights: &Weights<f64>,
    trace: &Trace<f64>,
    y: &Array2<f64>,
) -> Weights<f64> {
    let depth = net.layers().len();
    let m = trace.a[0].nrows();
    let conventions = net.conventions();
    let out = net.layers()[depth - 1].activation;
    let a_out = &trace.a[depth];
    let mut delta = (a_out.mapv(f64::abs) + y.mapv(f64::abs)) * conventions.reduction.factor(m);
    if net.loss() == Loss::SquaredError && out != Activation::Identity {
        let slope = match out {
            // |∂softmax| is bounded by a(1 + a) per entry.
            Activation::Softmax => a_out.mapv(|v| v.abs() * (1.0 + v.abs())),
            act => Array2::from_shape_fn(a_out.raw_dim(), |(i, k)| {
                act.slope(trace.z[depth - 1][[i, k]], a_out[[i, k]]).abs()
            }),
        };
        delta = delta * slope;
    }
    let mut grads = Vec::with_capacity(depth);
    for l in (0..depth).rev() {
        let theta = weights.layer(l);
        let mut g = Array2::zeros(theta.raw_dim());
        g.column_mut(0).assign(&delta.sum_axis(Axis(0)));
        g.slice_mut(s![.., 1..])
            .assign(&delta.t().dot(&trace.a[l].mapv(f64::abs)));
        if net.l2() != 0.0 {
            let reg = conventions.l2_slope(net.l2(), m);
            let from = usize::from(!conventions.l2_on_bias);
            g.slice_mut(s![.., from..])
                .zip_mut_with(&theta.slice(s![.., from..]), |gv, wv| *gv += reg * wv.abs());
        }
        grads.push(g);
        if l > 0 {
            let up = delta.dot(&theta.slice(s![.., 1..]).mapv(f64::abs));
            let act = net.layers()[l - 1].activation;
            let slope = Array2::from_shape_fn(up.raw_dim(), |(i, k)| {
                act.slope(trace.z[l - 1][[i, k]], trace.a[l][[i, k]]).abs()
            });
            delta = up * slope;
        }
    }
    grads.reverse();
    Weights::new(grads)
}

/// [`gradient_magnitude`] on the layer graph, for a chain of dense layers on a flat input (what a
/// dense description builds): per graph tensor (weight, bias of each layer), a bound on each
/// entry's pieces. None for any other graph, whose entries are judged without it.
pub fn graph_gradient_magnitude(
    graph: &Graph,
    params: &[ArrayD<f64>],
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
) -> Option<Vec<Vec<f64>>> {
    let nodes = graph.nodes();
    let dense = matches!(graph.input(), Shape::Flat(_))
        && nodes
            .iter()
            .all(|n| n.layer.kind() == "dense" && n.layer.tap().is_none());
    if !dense {
        return None;
    }
    let trace = graph.forward(params, x);
    let depth = nodes.len();
    let m = x.nrows();
    let config = graph.loss_config();
    let out = nodes[depth - 1].activation;
    let a_out = trace.output();
    let mut delta = (a_out.mapv(f64::abs) + y.mapv(f64::abs)) * config.reduction.factor(m);
    if config.loss == Loss::SquaredError && out != Activation::Identity {
        let z = &trace.steps[depth - 1].out;
        let slope = match out {
            // |∂softmax| is bounded by a(1 + a) per entry.
            Activation::Softmax => a_out.mapv(|v| v.abs() * (1.0 + v.abs())),
            act => Array2::from_shape_fn(a_out.raw_dim(), |(i, k)| {
                act.slope(z[[i, k]], a_out[[i, k]]).abs()
            }),
        };
        delta = delta * slope;
    }
    let mut out_tensors = vec![Vec::new(); 2 * depth];
    for l in (0..depth).rev() {
        let (wt, bt) = (nodes[l].tensors().start, nodes[l].tensors().start + 1);
        let w = params[wt].view().into_dimensionality::<Ix2>().ok()?;
        let input = if l == 0 {
            x
        } else {
            trace.outputs[l - 1].view()
        };
        let mut gw = delta.t().dot(&input.mapv(f64::abs));
        let mut gb = delta.sum_axis(Axis(0));
        let reg = 2.0 * config.l2_factor(m);
        if reg != 0.0 {
            if graph.decays(wt) {
                gw.zip_mut_with(&w, |g, v| *g += reg * v.abs());
            }
            if graph.decays(bt) {
                gb.zip_mut_with(&params[bt], |g, v| *g += reg * v.abs());
            }
        }
        out_tensors[wt] = gw.iter().copied().collect();
        out_tensors[bt] = gb.to_vec();
        if l > 0 {
            let up = delta.dot(&w.mapv(f64::abs));
            let act = nodes[l - 1].activation;
            let (z, a) = (&trace.steps[l - 1].out, &trace.outputs[l - 1]);
            let slope =
                Array2::from_shape_fn(up.raw_dim(), |(i, k)| act.slope(z[[i, k]], a[[i, k]]).abs());
            delta = up * slope;
        }
    }
    Some(out_tensors)
}
