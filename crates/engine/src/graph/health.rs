//! What a layer's forward step shows the release audit beyond its output: the values inside a
//! kind that the audit judges (a recurrent cell's gates, attention weights, the table rows a batch
//! reads). Each kind says what it has through [`super::Kind::inside`]; the audit crate holds the
//! rules and thresholds.

use ndarray::{Array2, Array4};

/// One measure from inside a layer's forward step, in f64.
#[derive(Clone, Debug, PartialEq)]
pub enum Inside {
    /// A sigmoid gate of a recurrent cell: its values, one row per (step, sample) and one column
    /// per unit, each in (0, 1). `letter` is the gate's letter (lstm i, f, o; gru r, z).
    Gate { letter: char, values: Array2<f64> },
    /// Attention weights, samples × heads × query steps × key steps, each row summing to 1;
    /// under `causal`, query step t sees key steps 0..=t only.
    Attention { weights: Array4<f64>, causal: bool },
    /// How many times the batch reads each row of the layer's parameter tensor `tensor`
    /// (an embedding table: one count per token id).
    Rows { tensor: usize, reads: Vec<usize> },
}
