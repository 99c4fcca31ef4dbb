//! Where a coordinate of the engine's augmented matrices sits in the weight file's own tensors.

use plumb_engine::Coord;
use plumb_formats::{Description, ExpectedTensor, Layout, Role, expected_tensors};
use serde::{Deserialize, Serialize};

use crate::Part;

/// A coordinate located for people and for JSON.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Place {
    /// The tensor of the weight file, under the description's layout.
    pub tensor: String,
    /// Its index in that tensor's own shape.
    pub index: Vec<usize>,
    /// 1-based layer, and the augmented matrix's row and column (column 0: the bias weight).
    pub layer: usize,
    pub row: usize,
    pub column: usize,
    /// 1-based unit of layer j+1 the weight feeds.
    pub unit: usize,
    pub bias: bool,
}

impl Place {
    /// `layer2.weight[3, 1]`.
    pub fn label(&self) -> String {
        let idx: Vec<String> = self.index.iter().map(usize::to_string).collect();
        format!("{}[{}]", self.tensor, idx.join(", "))
    }
}

/// The tensors of the description's layout, as parts of the network with their sizes.
pub struct Tensors {
    pub expected: Vec<ExpectedTensor>,
    layout: Layout,
    /// The indices into `expected` of each layer's tensors (one or two), so that locating a
    /// coordinate looks at its layer only, not at every tensor of a deep network.
    by_layer: Vec<Vec<usize>>,
}

impl Tensors {
    pub fn new(desc: &Description) -> Tensors {
        let expected = expected_tensors(desc, desc.layout);
        let mut by_layer = vec![Vec::new(); desc.layers.len()];
        for (i, e) in expected.iter().enumerate() {
            if e.layer >= by_layer.len() {
                by_layer.resize(e.layer + 1, Vec::new());
            }
            by_layer[e.layer].push(i);
        }
        Tensors {
            expected,
            layout: desc.layout,
            by_layer,
        }
    }

    /// The indices (into `expected` and `parts()`) of layer `layer`'s tensors, in the layout's order.
    pub(crate) fn indices_of_layer(&self, layer: usize) -> impl Iterator<Item = usize> + '_ {
        self.by_layer.get(layer).into_iter().flatten().copied()
    }

    /// The tensors of layer `layer` (0-based), in the layout's order.
    fn of_layer(&self, layer: usize) -> impl Iterator<Item = &ExpectedTensor> {
        self.indices_of_layer(layer).map(|i| &self.expected[i])
    }

    /// Each tensor as an fd part, with its parameter count.
    pub fn parts(&self) -> Vec<(Part, usize)> {
        self.expected
            .iter()
            .map(|e| {
                let part = Part {
                    layer: e.layer,
                    bias: e.role != Role::Weight,
                    weights: e.role != Role::Bias,
                };
                (part, e.shape.iter().product())
            })
            .collect()
    }

    /// The tensor holding a coordinate and its index there.
    pub fn place(&self, c: Coord) -> Place {
        let e = self
            .of_layer(c.layer)
            .find(|e| match e.role {
                Role::Augmented => true,
                Role::Bias => c.col == 0,
                Role::Weight => c.col > 0,
            })
            .expect("every coordinate belongs to a tensor of the layout");
        let index = match (e.role, self.layout) {
            (Role::Augmented, _) => vec![c.row, c.col],
            (Role::Bias, _) => vec![c.row],
            (Role::Weight, Layout::SplitTransposed) => vec![c.col - 1, c.row],
            (Role::Weight, _) => vec![c.row, c.col - 1],
        };
        Place {
            tensor: e.name.clone(),
            index,
            layer: c.layer + 1,
            row: c.row,
            column: c.col,
            unit: c.row + 1,
            bias: c.col == 0,
        }
    }

    /// The 1-based layer of a tensor.
    pub fn layer_of(&self, name: &str) -> Option<usize> {
        self.expected
            .iter()
            .find(|e| e.name == name)
            .map(|e| e.layer + 1)
    }

    /// The coordinate of an index in a tensor of the layout (the inverse of [`Tensors::place`]).
    pub fn coord_of(&self, name: &str, index: &[usize]) -> Option<Coord> {
        let e = self.expected.iter().find(|e| e.name == name)?;
        let layer = e.layer;
        let (row, col) = match (e.role, self.layout, index) {
            (Role::Augmented, _, &[r, c]) => (r, c),
            (Role::Bias, _, &[r]) => (r, 0),
            (Role::Weight, Layout::SplitTransposed, &[c, r]) => (r, c + 1),
            (Role::Weight, _, &[r, c]) => (r, c + 1),
            _ => return None,
        };
        Some(Coord { layer, row, col })
    }

    /// The tensor a direction's span belongs to.
    pub fn name_of(&self, layer: usize, bias: bool) -> String {
        self.of_layer(layer)
            .find(|e| match e.role {
                Role::Augmented => true,
                Role::Bias => bias,
                Role::Weight => !bias,
            })
            .map(|e| {
                if e.role == Role::Augmented {
                    format!(
                        "{} ({})",
                        e.name,
                        if bias { "bias column" } else { "weights" }
                    )
                } else {
                    e.name.clone()
                }
            })
            .unwrap_or_default()
    }
}
