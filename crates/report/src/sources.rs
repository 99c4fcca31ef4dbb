//! What every report says of its inputs: where the weights and the data came from, the schema
//! version, and how a figure that may be NaN is read back (JSON writes NaN and infinities as null).

use std::path::PathBuf;

use serde::{Deserialize, Deserializer, Serialize};

/// The version of every JSON report's schema (docs/json.md). Bumped on any incompatible change.
pub const SCHEMA_VERSION: u32 = 2;

/// Where the weights came from.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "source", rename_all = "kebab-case")]
pub enum WeightsSource {
    File {
        path: PathBuf,
        format: String,
        dtype: String,
    },
    Init {
        scheme: String,
        seed: u64,
    },
}

impl WeightsSource {
    pub fn describe(&self) -> String {
        match self {
            WeightsSource::File {
                path,
                format,
                dtype,
            } => {
                format!("{} ({format}, {dtype})", path.display())
            }
            WeightsSource::Init { scheme, seed } => {
                format!("drawn {scheme} from seed {seed} (no --weights given)")
            }
        }
    }
}

/// Where the data came from.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "source", rename_all = "kebab-case")]
pub enum DataSource {
    File { path: PathBuf, samples: usize },
    Synthetic { samples: usize, seed: u64 },
}

impl DataSource {
    pub fn describe(&self) -> String {
        match self {
            DataSource::File { path, samples } => format!("{} ({samples} samples)", path.display()),
            DataSource::Synthetic { samples, seed } => {
                format!("synthetic batch of {samples} samples (seed {seed}; no --data given)")
            }
        }
    }
}

/// A figure read back from a report: a number, or null for the NaN or infinity it was written
/// from. Anything else (a string, a missing key) is refused by the caller's type.
pub fn figure<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
    Ok(Option::<f64>::deserialize(d)?.unwrap_or(f64::NAN))
}
