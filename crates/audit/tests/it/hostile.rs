//! The dimension audit on hostile files: work near-linear in the tensors a file holds.

use std::path::Path;

use plumb_audit::audit_shapes;
use plumb_formats::{DType, Description, FileFormat, Tensor, TensorFile};

/// A file of 100,000 stray tensors against a 2,000-layer description: every expected tensor is
/// looked up by name and every stray one checked once. The scans this replaced (each stray tensor
/// against every finding so far, each expected tensor across the file) cost about 10^10 string
/// comparisons here — minutes; this runs in well under a second.
#[test]
fn shapes_of_a_file_with_100000_tensors_are_audited_in_near_linear_time() {
    let mut text = String::from("inputs = 1\nloss = \"squared-error\"\n");
    for _ in 0..2_000 {
        text.push_str("[[layer]]\nunits = 1\nactivation = \"tanh\"\n");
    }
    let desc = Description::parse(Path::new("deep.toml"), &text).unwrap();
    assert_eq!(desc.layers.len(), 2_000);
    let tensors = (0..100_000)
        .map(|i| Tensor {
            name: format!("t{i}"),
            shape: vec![1],
            dtype: DType::F32,
            data: vec![0.0],
        })
        .collect();
    let file = TensorFile {
        format: FileFormat::Safetensors,
        tensors,
    };
    let audit = audit_shapes(&desc, Some(&file));
    assert_eq!(audit.unexpected.len(), 100_000);
    assert_eq!(audit.layers.len(), 2_000);
}

/// A 1 MiB description of 29,000 layers: a line number is a search, not a scan of the text before
/// it, and repeated tensor names are found with a map.
#[test]
fn a_description_of_29000_layers_parses_in_near_linear_time() {
    let mut text = String::from("inputs = 1\nloss = \"squared-error\"\n");
    while text.len() < (1 << 20) - 40 {
        text.push_str("[[layer]]\nunits=1\nactivation=\"tanh\"\n");
    }
    let desc = Description::parse(Path::new("wide.toml"), &text).unwrap();
    assert!(desc.layers.len() > 29_000);
    assert_eq!(desc.layers[29_000].line, 3 + 3 * 29_000);
}
