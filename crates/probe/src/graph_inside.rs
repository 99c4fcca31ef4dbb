//! What plumb knows of a program's inside when a description of any kind says what it computes:
//! the reference's layer graph at the same parameters tells whether a step along a file
//! tensor's entry (or a direction) takes another branch at a non-smooth point — a ReLU-like
//! side, a max-pool window's argmax, a break in a derivative the methods rely on (elu, α = 1).
//! The program's own branches cannot be seen; its reference's are the same where it is right.

use ndarray::{Array2, ArrayD};
use plumb_engine::graph::{Branches, Graph, Trace};
use plumb_fd::graph_loss_magnitude;
use plumb_formats::GraphDescription;

/// The graph at the probe's base point, and where each file tensor's entries live in it.
pub(crate) struct GraphKinks<'a> {
    graph: &'a Graph,
    params: Vec<ArrayD<f64>>,
    x: Array2<f64>,
    trace: Trace<f64>,
    branches: Branches,
    breaks: Vec<Vec<bool>>,
    /// Per file tensor (the description's order), per flat file index: (graph tensor, flat index).
    places: Vec<Vec<(usize, usize)>>,
}

impl<'a> GraphKinks<'a> {
    pub(crate) fn new(desc: &'a GraphDescription, params: &[ArrayD<f64>], x: &Array2<f64>) -> Self {
        let graph = &desc.graph;
        let params: Vec<ArrayD<f64>> = params
            .iter()
            .map(|p| p.as_standard_layout().to_owned())
            .collect();
        let trace = graph.forward(&params, x.view());
        let branches = graph.branches(&trace);
        let breaks = trace
            .steps
            .iter()
            .enumerate()
            .map(|(j, s)| breaks(graph, j, &s.out))
            .collect();
        GraphKinks {
            graph,
            params,
            x: x.clone(),
            trace,
            branches,
            breaks,
            places: plumb_diagnose::file_places(desc),
        }
    }

    /// The bound on the loss's round-off pieces at the reference's base pass
    /// ([`graph_loss_magnitude`]), from the pass the kinks are read from.
    pub(crate) fn loss_gross(&self, y: &Array2<f64>) -> f64 {
        graph_loss_magnitude(self.graph, &self.params, &self.trace, y)
    }

    /// Whether adding `delta` to the listed (file tensor, flat file index) entries takes another
    /// branch than the base pass anywhere from the first layer they move.
    pub(crate) fn crossed(&self, changes: &[(usize, usize, f64)]) -> bool {
        let mut moved = self.params.clone();
        let mut from = usize::MAX;
        for &(file, k, delta) in changes {
            let Some(&(t, i)) = self.places.get(file).and_then(|p| p.get(k)) else {
                continue;
            };
            from = from.min(self.graph.tensors()[t].layer);
            if let Some(v) = moved[t].as_slice_mut().and_then(|s| s.get_mut(i)) {
                *v += delta;
            }
        }
        if from == usize::MAX {
            return false;
        }
        let tail = self
            .graph
            .forward_from(&moved, self.x.view(), &self.trace, from);
        let after = self.graph.branches_from(&tail);
        self.branches.layers[from..]
            .iter()
            .zip(&after.layers)
            .any(|(a, b)| a.kind != b.kind || a.sides != b.sides)
            || tail
                .steps
                .iter()
                .enumerate()
                .any(|(i, s)| breaks(self.graph, from + i, &s.out) != self.breaks[from + i])
    }
}

/// Per value of layer `j`'s pre-activation, which side of its activation's derivative break it
/// is on (elu with α = 1 has no kink but a break in its second derivative); empty otherwise.
fn breaks(graph: &Graph, j: usize, z: &Array2<f64>) -> Vec<bool> {
    let act = graph.nodes()[j].activation;
    match (act.kink(), act.break_point()) {
        (None, Some(b)) => z.iter().map(|v| *v > b).collect(),
        _ => Vec::new(),
    }
}
