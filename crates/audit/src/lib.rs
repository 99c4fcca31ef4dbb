//! Audits of a weight file against its network description, on the layer graph for every kind of
//! layer (dense descriptions included).
//!
//! [`audit_graph_shapes`] is the dimension audit (`plumb shapes`); [`audit_graph_file`] is the
//! release audit (`plumb audit`): the shapes, then the values (non-finite, implausible
//! magnitudes, constant tensors), duplicate units, unit health on probe data, the initialisation
//! scale (and a Kolmogorov–Smirnov test against a claimed scheme), and the flow of signal and
//! gradient, with each kind's own measures besides (channels, norm scales, gates, attention
//! heads, table rows); [`audit_graph`] runs the same on parameters already in the graph's shapes.
//!
//! ```
//! use std::path::Path;
//! use plumb_audit::audit_graph_shapes;
//! use plumb_formats::{DType, FileFormat, GraphDescription, Tensor, TensorFile};
//!
//! let text = "inputs = 4\nloss = \"cross-entropy\"\n[[layer]]\nunits = 3\nactivation = \"softmax\"\n";
//! let desc = GraphDescription::parse(Path::new("net.toml"), text)?;
//! // Layer 1 should be 3 × (4 + 1); this file stores it transposed.
//! let t = Tensor { name: "layer1".into(), shape: vec![5, 3], dtype: DType::F32, data: vec![0.0; 15] };
//! let file = TensorFile::new(FileFormat::Npz, vec![t]);
//! let audit = audit_graph_shapes(&desc, Some(&file));
//! assert_eq!(audit.findings[0].code, "transposed-matrix");
//! # Ok::<(), plumb_formats::DescriptionError>(())
//! ```

mod flow;
mod graph_audit;
mod graph_health;
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

pub use flow::{LayerFlow, sigma_max};
pub use graph_audit::{GraphWeights, audit_graph, audit_graph_file, fitted_shapes};
pub use graph_health::{
    InsideHealth, KindThresholds, collapsed_scales, graph_symmetry, inside_findings, inside_health,
    output_units,
};
pub use graph_shapes::{GraphShapeAudit, audit_graph_shapes, refuse_misfit};
pub use health::{BINS, LayerHealth, Units, sparkline, unit_health};
pub use init::{
    KsTest, LayerInit, correct_across_layers, holm, ks_test, q_ks, scheme_cdf, tensor_init,
};
pub use release::{Audit, Thresholds, verdict_at};
pub use robust::{Moments, largest, moments, moments_of, norm, std_of};
pub use shapes::{LayerShapes, LayerTerms, STRAY_LISTED, Status, StrayTensor, TensorShape};
pub use symmetry::SymmetricGroup;
pub use units::{unit_ranges, units_phrase};
pub use values::{Values, values_findings};
