//! Audits of a weight file against its network description.
//!
//! So far: the dimension audit ([`audit_shapes`]), which compares the tensors a description implies
//! with those a file holds and names the usual mistakes (transposed matrix, missing or extra bias
//! column, wrong bias length, another layout, layers out of order, missing or unexpected tensors,
//! non-float dtypes).

mod shapes;

pub use shapes::{LayerShapes, ShapeAudit, Status, StrayTensor, TensorShape, audit_shapes};
