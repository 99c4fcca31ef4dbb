//! Weight initialisation schemes, with the scales their papers give.
//!
//! - Glorot & Bengio, AISTATS 2010: uniform on ±√(6 / (fan_in + fan_out)), or normal with variance
//!   2 / (fan_in + fan_out).
//! - He, Zhang, Ren & Sun, ICCV 2015: variance 2 / fan_in; uniform on ±√(6 / fan_in).
//! - LeCun, Bottou, Orr & Müller, "Efficient BackProp", 1998: variance 1 / fan_in.
//!
//! Normals are plain (not truncated). Bias weights start at zero.

use std::fmt;

use ndarray::Array2;

use crate::{Network, Rng, Weights};

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

    /// Draws weights for a network: non-bias weights from the scheme, bias weights zero.
    pub fn weights(&self, network: &Network, rng: &mut Rng) -> Weights<f64> {
        let layers = network
            .layers()
            .iter()
            .map(|spec| {
                let sd = self.std_dev(spec.inputs, spec.units);
                let limit = 3f64.sqrt() * sd;
                Array2::from_shape_fn(spec.shape(), |(_, c)| match c {
                    0 => 0.0,
                    _ if self.is_uniform() => rng.range(-limit, limit),
                    _ => sd * rng.normal(),
                })
            })
            .collect();
        Weights::new(layers)
    }
}

impl fmt::Display for Init {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}
