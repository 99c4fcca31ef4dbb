//! The parameters of a network: one augmented matrix per layer.

use ndarray::Array2;

use crate::Scalar;

/// One augmented matrix per layer, units × (fan-in + 1), column 0 multiplying the bias unit.
#[derive(Clone, Debug, PartialEq)]
pub struct Weights<S> {
    layers: Vec<Array2<S>>,
}

/// Where one parameter sits: layer (0-based), row (the unit of the layer above it feeds) and
/// column (0 for the bias weight, c for input unit c, 1-based like the augmented matrix).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Coord {
    pub layer: usize,
    pub row: usize,
    pub col: usize,
}

impl Coord {
    /// Whether this parameter is a bias weight (column 0 of the augmented matrix).
    pub fn is_bias(&self) -> bool {
        self.col == 0
    }
}

impl<S> Weights<S> {
    pub fn new(layers: Vec<Array2<S>>) -> Self {
        Weights { layers }
    }

    pub fn layers(&self) -> &[Array2<S>] {
        &self.layers
    }

    pub fn layers_mut(&mut self) -> &mut [Array2<S>] {
        &mut self.layers
    }

    pub fn into_layers(self) -> Vec<Array2<S>> {
        self.layers
    }

    /// Layer `l` (0-based).
    pub fn layer(&self, l: usize) -> &Array2<S> {
        &self.layers[l]
    }

    /// Every parameter, bias weights included.
    pub fn parameters(&self) -> usize {
        self.layers.iter().map(Array2::len).sum()
    }

    /// The parameter at a coordinate.
    pub fn get(&self, c: Coord) -> &S {
        &self.layers[c.layer][[c.row, c.col]]
    }

    pub fn get_mut(&mut self, c: Coord) -> &mut S {
        &mut self.layers[c.layer][[c.row, c.col]]
    }

    /// The coordinate of the k-th parameter in layer-major, row-major order.
    pub fn coord(&self, mut k: usize) -> Option<Coord> {
        for (layer, w) in self.layers.iter().enumerate() {
            if k < w.len() {
                let cols = w.ncols();
                return Some(Coord {
                    layer,
                    row: k / cols,
                    col: k % cols,
                });
            }
            k -= w.len();
        }
        None
    }

    /// The same weights in another number type.
    pub fn map<T>(&self, f: impl Fn(&S) -> T + Copy) -> Weights<T> {
        Weights {
            layers: self.layers.iter().map(|w| w.map(f)).collect(),
        }
    }
}

impl Weights<f64> {
    /// The weights embedded in another scalar type (f32, complex, dual) with no perturbation part.
    pub fn cast<T: Scalar>(&self) -> Weights<T> {
        self.map(|&v| T::from_f64(v))
    }
}
