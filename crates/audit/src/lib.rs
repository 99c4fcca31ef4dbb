//! Audits of a weight file against its network description.
//!
//! So far: the dimension audit ([`audit_shapes`]), which compares the tensors a description implies
//! with those a file holds and names the usual mistakes (transposed matrix, missing or extra bias
//! column, wrong bias length, another layout, layers out of order, missing or unexpected tensors,
//! non-float dtypes).
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

mod shapes;

pub use shapes::{LayerShapes, ShapeAudit, Status, StrayTensor, TensorShape, audit_shapes};
