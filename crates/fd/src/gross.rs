//! How large the pieces of the loss and of the gradient are, as opposed to their sums: round-off
//! follows the pieces. A confident network's loss is a small difference of large terms (softplus(z)
//! − y·z for z ≈ 10 is 10.00005 − 10), and its gradient a small difference a − y of numbers near 1;
//! judging their round-off by |J| or |g| alone would call correct gradients wrong.

use ndarray::{Array2, ArrayD, ArrayView2, Axis, Ix2};
use plumb_engine::graph::{Graph, Shape};
use plumb_engine::{Activation, Loss};

/// A bound on each gradient entry's pieces, for a chain of dense layers on a flat input (what a
/// dense description builds): backpropagation of absolute values (|a| + |y| at the output, |W| and
/// the size of g′'s terms on the way down, [`Activation::slope_terms`]), so that rounding in
/// a − y, in a saturated unit's slope and in the sums is allowed for; per graph
/// tensor (weight, bias of each layer). None for any other graph, whose entries are judged
/// without it.
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
                act.slope_terms(z[[i, k]], a_out[[i, k]])
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
                Array2::from_shape_fn(up.raw_dim(), |(i, k)| act.slope_terms(z[[i, k]], a[[i, k]]));
            delta = up * slope;
        }
    }
    Some(out_tensors)
}
