//! Weight initialisation schemes, with the scales their papers give.
//!
//! - Glorot & Bengio, AISTATS 2010: uniform on ±√(6 / (fan_in + fan_out)), or normal with variance
//!   2 / (fan_in + fan_out).
//! - He, Zhang, Ren & Sun, ICCV 2015: variance 2 / fan_in; uniform on ±√(6 / fan_in).
//! - LeCun, Bottou, Orr & Müller, "Efficient BackProp", 1998: variance 1 / fan_in.
//!
//! Normals are plain (not truncated). Bias weights start at zero.
//!
//! For the layer graph ([`Init::graph_params`]) every tensor is drawn by its [`Role`]:
//!
//! - weights (dense, convolution, recurrent input and recurrent, attention projections): the
//!   scheme, with the tensor's own fan-in and fan-out from its [`ParamSpec`] — a convolution's
//!   fan-in is in-channels × kernel area (He et al. 2015), a stacked recurrent weight's fan-out is
//!   blocks × units, as the matrix the file holds;
//! - biases and norm shifts: 0, so that a fresh layer adds nothing of its own;
//! - norm scales: 1, so that a fresh norm passes the normalised values through unchanged;
//! - embedding tables: standard normal whatever the scheme. A row is not a product of inputs but
//!   the next layer's input itself, and the schemes size the next layer's weights for inputs of
//!   about unit variance; fan-in and fan-out have no meaning for a lookup.

use std::fmt;

use ndarray::{ArrayD, IxDyn};

use crate::Rng;
use crate::graph::{Graph, ParamSpec, Role};

/// An initialisation scheme.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Init {
    GlorotUniform,
    GlorotNormal,
    HeUniform,
    HeNormal,
    LecunNormal,
}

impl Init {
    pub const ALL: [Init; 5] = [
        Init::GlorotUniform,
        Init::GlorotNormal,
        Init::HeUniform,
        Init::HeNormal,
        Init::LecunNormal,
    ];

    pub fn name(&self) -> &'static str {
        match self {
            Init::GlorotUniform => "glorot-uniform",
            Init::GlorotNormal => "glorot-normal",
            Init::HeUniform => "he-uniform",
            Init::HeNormal => "he-normal",
            Init::LecunNormal => "lecun-normal",
        }
    }

    pub fn from_name(name: &str) -> Option<Init> {
        Init::ALL.into_iter().find(|i| i.name() == name)
    }

    /// The standard deviation of a weight under this scheme.
    pub fn std_dev(&self, fan_in: usize, fan_out: usize) -> f64 {
        let (i, o) = (fan_in as f64, fan_out as f64);
        match self {
            Init::GlorotUniform | Init::GlorotNormal => (2.0 / (i + o)).sqrt(),
            Init::HeUniform | Init::HeNormal => (2.0 / i).sqrt(),
            Init::LecunNormal => (1.0 / i).sqrt(),
        }
    }

    /// Whether the scheme draws from a uniform distribution (on ±√3·σ) rather than a normal one.
    pub fn is_uniform(&self) -> bool {
        matches!(self, Init::GlorotUniform | Init::HeUniform)
    }

    /// One weight of standard deviation `sd`, from the scheme's distribution.
    fn draw(&self, sd: f64, rng: &mut Rng) -> f64 {
        if self.is_uniform() {
            let limit = 3f64.sqrt() * sd;
            rng.range(-limit, limit)
        } else {
            sd * rng.normal()
        }
    }

    /// Draws one parameter tensor of the graph by its role (see the module doc), in its
    /// canonical shape; values are drawn in C order, and only weights and tables take draws.
    pub fn tensor(&self, spec: &ParamSpec, rng: &mut Rng) -> ArrayD<f64> {
        let shape = IxDyn(&spec.shape);
        match spec.role {
            Role::Weight => {
                let sd = self.std_dev(spec.fan_in, spec.fan_out);
                ArrayD::from_shape_simple_fn(shape, || self.draw(sd, rng))
            }
            Role::Bias | Role::Shift => ArrayD::zeros(shape),
            Role::Scale => ArrayD::ones(shape),
            Role::Table => ArrayD::from_shape_simple_fn(shape, || rng.normal()),
        }
    }

    /// Draws every parameter tensor of a graph, in the order of [`Graph::tensors`]. The same
    /// seed gives the same values; on a graph of dense layers they are the values plumb's dense
    /// engine drew (its augmented matrices row by row, the bias column taking no draw).
    pub fn graph_params(&self, graph: &Graph, rng: &mut Rng) -> Vec<ArrayD<f64>> {
        graph
            .tensors()
            .iter()
            .map(|t| self.tensor(&t.spec, rng))
            .collect()
    }
}

impl fmt::Display for Init {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}
