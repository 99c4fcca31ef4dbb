//! The layer graph's diagnosis seen through the weight file's own tensors.
//!
//! A dense description's file holds the graph's tensors in its layout — an augmented matrix with
//! a layer's weight and bias, a transposed weight, the names `W1`, `b1`, `layer1` — and an outside
//! gradient is written in that layout. Judging it there keeps what a user reads about the file's
//! tensor: a `transposed` augmented matrix is the whole matrix turned (its bias column included),
//! `layers-swapped` trades two file tensors, a mistake in the bias column is found on `W1`. The
//! hypotheses are the graph's ([`GraphProblem`]: hooks and each kind's planted mistakes) converted
//! to the file's tensors; the ones read off the reference (a transposition, a swap, a fitted
//! factor) are formed on the file's tensors themselves.

use ndarray::{Array2, ArrayD, ArrayView2, Ix2, IxDyn};
use plumb_engine::graph::{Dense, GraphError, Role};
use plumb_formats::{AxisOrder, FileStorage, GraphDescription, Tensor};

use crate::catalogue::{CONSTANT_FACTOR, Hypothesis, fitted_factor, swaps};
use crate::diagnose::Hypotheses;
use crate::graph::{GraphProblem, INPUT};
use crate::judge::{Expected, TensorJudgement, Tolerances, judge};

/// Per file tensor of `desc` (its order), per flat file index: the (graph tensor, flat index) it
/// holds. The file's indices run through the same conversion the values do.
pub fn file_places(desc: &GraphDescription) -> Vec<Vec<(usize, usize)>> {
    desc.files
        .iter()
        .map(|f| {
            let n: usize = f.shape.iter().product();
            let mut out = vec![(0, 0); n];
            let index = ArrayD::from_shape_vec(IxDyn(&f.shape), (0..n).collect::<Vec<usize>>())
                .expect("the file shape holds n values");
            let mut put = |t: usize, canonical: &ArrayD<usize>| {
                for (i, &k) in canonical.iter().enumerate() {
                    out[k] = (t, i);
                }
            };
            match &f.storage {
                FileStorage::Axes(s) => put(f.tensors[0], &s.to_canonical(&index)),
                FileStorage::Augmented => {
                    let matrix = index
                        .into_dimensionality::<Ix2>()
                        .expect("an augmented matrix has two axes");
                    let (w, b) = Dense::split(&matrix);
                    put(f.tensors[0], &w.into_dyn());
                    put(f.tensors[1], &b.into_dyn());
                }
            }
            out
        })
        .collect()
}

/// The file tensors a gradient of `desc` holds, under their file names and file shapes (an
/// augmented matrix is a weight: its role), and the input gradient when its shape is given.
pub(crate) fn expected_files(desc: &GraphDescription, input: Option<Vec<usize>>) -> Vec<Expected> {
    let mut out: Vec<Expected> = desc
        .files
        .iter()
        .map(|f| Expected {
            name: f.name.clone(),
            layer: f.layer,
            shape: f.shape.clone(),
            bias: f.role == Role::Bias,
        })
        .collect();
    out.extend(input.map(|shape| Expected {
        name: INPUT.into(),
        layer: 0,
        shape,
        bias: false,
    }));
    out
}

/// The graph's hypotheses as the file's tensors.
struct FileView<'a> {
    problem: GraphProblem<'a>,
    desc: &'a GraphDescription,
    order: AxisOrder,
    reference: Vec<Tensor>,
}

impl<'a> FileView<'a> {
    fn new(problem: GraphProblem<'a>, desc: &'a GraphDescription, order: AxisOrder) -> Self {
        let mut view = FileView {
            problem,
            desc,
            order,
            reference: Vec::new(),
        };
        view.reference = view.to_file(view.problem.reference());
        view
    }

    /// Graph tensors (by name; one a hypothesis leaves out, or gives in another shape, is the
    /// reference's) as the file's tensors, the input gradient last when the problem has it.
    fn to_file(&self, graph: &[Tensor]) -> Vec<Tensor> {
        let reference = self.problem.reference();
        let pick = |r: &Tensor| -> ArrayD<f64> {
            let t = graph
                .iter()
                .find(|t| t.name == r.name && t.shape == r.shape)
                .unwrap_or(r);
            ArrayD::from_shape_vec(IxDyn(&t.shape), t.data.clone()).expect("the shape fits")
        };
        let specs = self.desc.graph.tensors();
        let arrays: Vec<ArrayD<f64>> = reference[..specs.len()].iter().map(pick).collect();
        let mut out = self
            .desc
            .to_file(&arrays)
            .expect("a hypothesis has the graph's canonical shapes");
        if let Some(r) = reference.get(specs.len()) {
            let dx = pick(r)
                .into_dimensionality::<Ix2>()
                .expect("the input gradient is m × input");
            out.push(self.desc.input_tensor_in(dx.view(), self.order));
        }
        out
    }
}

impl Hypotheses for FileView<'_> {
    fn reference(&self) -> &[Tensor] {
        &self.reference
    }

    fn hypotheses(&self, outside: &[Tensor]) -> Vec<(&'static str, Hypothesis)> {
        let mut out = Vec::new();
        let mut swapped = false;
        // The graph's, in its order; those read off the reference are formed on the file's
        // tensors in their place (the graph's fitted factor, given no outside tensors, is empty).
        for (code, h) in self.problem.hypotheses(&[]) {
            match code {
                "transposed" => out.push((
                    code,
                    Hypothesis::plain(self.reference.iter().map(Tensor::transposed).collect()),
                )),
                "layers-swapped" if !swapped => {
                    swapped = true;
                    out.extend(swaps(&self.reference).into_iter().map(|h| (code, h)));
                }
                "layers-swapped" => {}
                CONSTANT_FACTOR => out.push((code, fitted_factor(&self.reference, outside))),
                _ => out.push((
                    code,
                    Hypothesis {
                        tensors: self.to_file(&h.tensors),
                        ..h
                    },
                )),
            }
        }
        out
    }
}

/// Judges an outside gradient of a description's file tensors (under the file's names, in the
/// declared layout and storage; a tensor of another shape is judged only against hypotheses of
/// that shape, an absent one reported absent) and, when `outside` holds [`INPUT`], its input
/// gradient (shape (m, *input) in the data's axis order `order`). The result follows the file's
/// tensors, the input gradient last; each judgement's `place` says where the tensor is worst in
/// its layer's terms, naming the graph tensor when the file tensor holds more than one.
pub fn judge_files(
    desc: &GraphDescription,
    params: &[ArrayD<f64>],
    x: ArrayView2<f64>,
    y: ArrayView2<f64>,
    order: AxisOrder,
    outside: &[Tensor],
    tolerances: &dyn Fn(&str) -> Tolerances,
) -> Result<Vec<TensorJudgement>, GraphError> {
    let graph = &desc.graph;
    let input = outside.iter().find(|u| u.name == INPUT);
    let problem = GraphProblem::new(graph, params, x, y, input.is_some())?;
    let view = FileView::new(problem, desc, order);
    let input_shape = input.map(|_| {
        let zeros = Array2::<f64>::zeros((x.nrows(), x.ncols()));
        desc.input_tensor_in(zeros.view(), order).shape
    });
    let expected = expected_files(desc, input_shape);
    let mut judged = judge(&view, outside, &expected, tolerances);
    let places = file_places(desc);
    let specs = graph.tensors();
    for (f, j) in judged.iter_mut().enumerate().take(desc.files.len()) {
        let Some(c) = &j.comparison else { continue };
        let (t, flat) = places[f][c.worst];
        let node = &graph.nodes()[specs[t].layer];
        let words = node.layer.locate(t - node.tensors().start, flat);
        j.place = Some(if desc.files[f].tensors.len() > 1 {
            format!("{}: {words}", specs[t].name)
        } else {
            words
        });
    }
    Ok(judged)
}
