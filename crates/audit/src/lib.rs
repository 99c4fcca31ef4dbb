//! Audits of a weight file against its network description.
//!
//! [`audit_shapes`] is the dimension audit (`plumb shapes`); [`audit`] is the release audit
//! (`plumb audit`): the shapes, then the values (non-finite, implausible magnitudes, constant
//! tensors), symmetric units, unit health on probe data, the initialisation scale (and a
//! Kolmogorov–Smirnov test against a claimed scheme), and the flow of signal and gradient.
//!
//! ```
//! use std::path::Path;
//! use plumb_audit::audit_shapes;
//! use plumb_formats::{Description, DType, FileFormat, Tensor, TensorFile};
//!
//! let text = "inputs = 4\nloss = \"cross-entropy\"\n[[layer]]\nunits = 3\nactivation = \"softmax\"\n";
//! let desc = Description::parse(Path::new("net.toml"), text)?;
//! // Layer 1 should be 3 × (4 + 1); this file stores it transposed.
//! let t = Tensor { name: "layer1".into(), shape: vec![5, 3], dtype: DType::F32, data: vec![0.0; 15] };
//! let file = TensorFile { format: FileFormat::Npz, tensors: vec![t] };
//! let audit = audit_shapes(&desc, Some(&file));
//! assert_eq!(audit.findings[0].code, "transposed-matrix");
//! # Ok::<(), plumb_formats::DescriptionError>(())
//! ```

mod flow;
mod graph_shapes;
mod health;
mod init;
mod release;
mod report;
mod robust;
mod shapes;
mod symmetry;
mod units;
mod values;

pub use flow::{LayerFlow, layer_flow, sigma_max};
pub use graph_shapes::{GraphShapeAudit, KindShapes, audit_graph_shapes};
pub use health::{BINS, LayerHealth, layer_health, sparkline};
pub use init::{
    KsTest, LayerInit, correct_across_layers, holm, ks_test, layer_init, q_ks, scheme_cdf,
};
pub use release::{Audit, Thresholds, audit, verdict_at};
pub use robust::{Moments, largest, moments, norm};
pub use shapes::{LayerShapes, ShapeAudit, Status, StrayTensor, TensorShape, audit_shapes};
pub use symmetry::{SymmetricGroup, symmetric_groups, symmetry};
pub use units::{unit_ranges, units_phrase};
pub use values::check_values;
