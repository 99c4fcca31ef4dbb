//! Where a graph parameter sits in the weight file (DESIGN §5, §6): a parameter is identified by
//! (tensor, flat index) in the FILE's own tensor — an augmented `W1`, a split-transposed `(in, out)`
//! weight, a conv weight stored `hwio` — with the layer's words for it beside. The file order comes
//! from the description's own file tensors (`formats::FileTensor`, `Storage::to_file`,
//! `Dense::join`), the mapping weights are loaded through, not a second one.

use std::sync::OnceLock;

use ndarray::{Array1, Array2, ArrayD, IxDyn};
use plumb_engine::graph::{Dense, Graph, Role};
use plumb_formats::{FileStorage, FileTensor, GraphDescription};
use serde::{Deserialize, Serialize};

/// A parameter located for people and for JSON.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct GraphPlace {
    /// The weight file's tensor, its flat index there (row-major in the file's own shape), and
    /// the 1-based layer.
    pub tensor: String,
    pub index: usize,
    pub layer: usize,
    /// The index in the layer's own terms (unit and input, channel, kernel position, gate, head).
    pub location: String,
}

impl GraphPlace {
    /// `W1[7]`, `conv1.weight[17]`.
    pub fn label(&self) -> String {
        format!("{}[{}]", self.tensor, self.index)
    }
}

/// The file tensors of a description and the place of each graph parameter in them.
pub struct Places<'a> {
    desc: &'a GraphDescription,
    /// Per graph tensor: its file tensor, and its offset in the file tensor's graph tensors
    /// (an augmented matrix holds the weight's entries, then the bias's).
    of_tensor: Vec<(usize, usize)>,
    /// Per file tensor, built when first asked: the file's flat index of each of its graph
    /// tensors' entries, in the order of `of_tensor`'s offsets; None when they coincide.
    order: Vec<OnceLock<Option<Vec<usize>>>>,
}

impl<'a> Places<'a> {
    pub fn new(desc: &'a GraphDescription) -> Places<'a> {
        let specs = desc.graph.tensors();
        let mut of_tensor = vec![(0, 0); specs.len()];
        for (f, file) in desc.files.iter().enumerate() {
            let mut offset = 0;
            for &t in &file.tensors {
                of_tensor[t] = (f, offset);
                offset += specs[t].spec.shape.iter().product::<usize>();
            }
        }
        Places {
            desc,
            of_tensor,
            order: desc.files.iter().map(|_| OnceLock::new()).collect(),
        }
    }

    pub fn graph(&self) -> &Graph {
        &self.desc.graph
    }

    /// The weight file's tensors, in the description's order.
    pub fn files(&self) -> &[FileTensor] {
        &self.desc.files
    }

    /// The file tensor (index into [`Places::files`]) holding graph tensor `t`.
    pub fn file_of(&self, t: usize) -> usize {
        self.of_tensor[t].0
    }

    /// Entries of file tensor `f`.
    pub fn file_size(&self, f: usize) -> usize {
        self.desc.files[f].shape.iter().product()
    }

    /// Flat index `index` of graph tensor `t` (canonical shape), in the file.
    pub fn place(&self, t: usize, index: usize) -> GraphPlace {
        let (f, offset) = self.of_tensor[t];
        let file = &self.desc.files[f];
        let at = offset + index;
        let flat = match self.order[f].get_or_init(|| file_order(self.desc, file)) {
            Some(order) => order[at],
            None => at,
        };
        GraphPlace {
            tensor: file.name.clone(),
            index: flat,
            layer: file.layer + 1,
            location: location(&self.desc.graph, t, index),
        }
    }

    /// The graph parameter (tensor, canonical flat index) at flat index `index` of file tensor
    /// `f` (the inverse of [`Places::place`]); None past its end.
    pub fn entry(&self, f: usize, index: usize) -> Option<(usize, usize)> {
        let file = &self.desc.files[f];
        if index >= self.file_size(f) {
            return None;
        }
        let at = match self.order[f].get_or_init(|| file_order(self.desc, file)) {
            Some(order) => order.iter().position(|&flat| flat == index)?,
            None => index,
        };
        let t = *file
            .tensors
            .iter()
            .rev()
            .find(|&&t| self.of_tensor[t].1 <= at)?;
        Some((t, at - self.of_tensor[t].1))
    }

    /// The file tensor named `name`, if the description has one.
    pub fn file_named(&self, name: &str) -> Option<usize> {
        self.desc.files.iter().position(|f| f.name == name)
    }

    /// How a direction over graph tensor `t` names its span: the file tensor, and when it holds
    /// more than this one graph tensor (an augmented matrix), which part.
    pub fn span(&self, t: usize) -> String {
        let file = &self.desc.files[self.file_of(t)];
        if file.tensors.len() == 1 {
            return file.name.clone();
        }
        let part = match self.desc.graph.tensors()[t].spec.role {
            Role::Bias => "bias column",
            _ => "weights",
        };
        format!("{} ({part})", file.name)
    }

    /// Whether a direction over graph tensor `t` spans the bias part of an augmented matrix
    /// (Some) or a whole file tensor (None).
    pub fn span_bias(&self, t: usize) -> Option<bool> {
        let file = &self.desc.files[self.file_of(t)];
        (file.tensors.len() > 1).then(|| self.desc.graph.tensors()[t].spec.role == Role::Bias)
    }
}

/// The file's flat index of each entry of `file`'s graph tensors, by the conversion weights are
/// written with: the graph tensors' entry numbers laid out as the file stores them.
fn file_order(desc: &GraphDescription, file: &FileTensor) -> Option<Vec<usize>> {
    let specs = desc.graph.tensors();
    let numbered = |t: usize, from: usize| {
        let shape = &specs[t].spec.shape;
        let n: usize = shape.iter().product();
        ArrayD::from_shape_vec(IxDyn(shape), (from..from + n).collect::<Vec<usize>>())
            .expect("the shape fits")
    };
    let laid_out: Vec<usize> = match &file.storage {
        FileStorage::Axes(s) if s.is_canonical() => return None,
        FileStorage::Axes(s) => s
            .to_file(&numbered(file.tensors[0], 0))
            .into_iter()
            .collect(),
        FileStorage::Augmented => {
            let (w, b) = (file.tensors[0], file.tensors[1]);
            let weight: Array2<usize> = numbered(w, 0)
                .into_dimensionality()
                .expect("a dense weight has two axes");
            let bias: Array1<usize> = numbered(b, weight.len())
                .into_dimensionality()
                .expect("a dense bias has one axis");
            Dense::join(&weight, &bias).into_iter().collect()
        }
    };
    let mut order = vec![0; laid_out.len()];
    for (flat, &entry) in laid_out.iter().enumerate() {
        order[entry] = flat;
    }
    Some(order)
}

/// The layer's words for flat index `index` of graph tensor `t`, counted from 0 like flat indices
/// and every kind's own words (`Kind::locate`): a dense layer's say which entries are the bias,
/// since an augmented file tensor holds the weight and the bias together.
pub fn location(graph: &Graph, t: usize, index: usize) -> String {
    let spec = &graph.tensors()[t];
    let node = &graph.nodes()[spec.layer];
    let local = t - node.tensors().start;
    if node.layer.kind() == "dense" {
        return match spec.spec.role {
            Role::Bias => format!("unit {index}, bias"),
            _ => {
                let fan_in = spec.spec.shape[1];
                format!("unit {}, input {}", index / fan_in, index % fan_in)
            }
        };
    }
    node.layer.locate(local, index)
}
