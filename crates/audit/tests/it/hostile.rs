//! The dimension audit on hostile files: work near-linear in the tensors a file holds.

use std::path::Path;

use plumb_audit::{KindThresholds, Thresholds, audit_graph_file, audit_graph_shapes};
use plumb_engine::{Batch, Rng};
use plumb_formats::{DType, FileFormat, GraphDescription, Tensor, TensorFile};

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
    let desc = GraphDescription::parse(Path::new("deep.toml"), &text).unwrap();
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
        unread: Vec::new(),
        tensors,
    };
    let audit = audit_graph_shapes(&desc, Some(&file));
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
    // A repeated layer name is looked up in a map (a scan of the names so far per layer took
    // seconds here).
    let graph = GraphDescription::parse(Path::new("wide.toml"), &text).unwrap();
    assert!(graph.layers.len() > 29_000);
    assert_eq!(graph.layers[29_000].line, 3 + 3 * 29_000);
    assert_eq!(graph.graph.nodes().len(), graph.layers.len());
    assert_eq!(graph.graph.nodes()[29_000].name, "layer29001");
}

/// The release audit of a file that holds a 2,000-layer description's tensors and 98,000 stray
/// tensors beside them: every stray is named (an error, so the shapes fail and the measures are
/// skipped, saying why), and the JUnit cases are built from the 98,000 findings in one pass
/// through a map (a scan of the findings per tensor and per finding was quadratic: over two
/// minutes for `plumb audit` on such a file). Time is not asserted; what the report holds is.
#[test]
fn a_release_audit_of_100000_tensors_matches_findings_to_cases_in_near_linear_time() {
    let mut text = String::from("inputs = 1\nloss = \"squared-error\"\n");
    for _ in 0..2_000 {
        text.push_str("[[layer]]\nunits = 1\nactivation = \"tanh\"\n");
    }
    let desc = GraphDescription::parse(Path::new("deep.toml"), &text).unwrap();
    let mut rng = Rng::new(3);
    let mut tensors: Vec<Tensor> = (1..=2_000)
        .map(|j| Tensor {
            name: format!("layer{j}"),
            shape: vec![1, 2],
            dtype: DType::F32,
            data: vec![0.0, rng.normal()],
        })
        .collect();
    tensors.extend((0..98_000).map(|i| Tensor {
        name: format!("t{i}"),
        shape: vec![1],
        dtype: DType::F32,
        data: vec![0.0],
    }));
    let file = TensorFile {
        format: FileFormat::Npz,
        unread: Vec::new(),
        tensors,
    };
    let batch = Batch::graph_synthetic(&desc.graph, 8, 1);
    let audit = audit_graph_file(
        &desc,
        &file,
        Path::new("deep.npz"),
        &batch,
        None,
        &Thresholds::default(),
        &KindThresholds::default(),
        1,
    )
    .unwrap();
    assert!(audit.init.is_empty());
    assert_eq!(
        audit.skipped,
        [
            "duplicates, unit health, the layers' inside measures, initialisation and flow: the tensors do not fit the description"
        ]
    );
    // The first STRAY_LISTED stray tensors are named one by one, the rest counted in one more.
    let strays: Vec<_> = audit
        .findings
        .iter()
        .filter(|f| f.code == "tensor-unexpected")
        .collect();
    assert_eq!(strays.len(), plumb_audit::STRAY_LISTED + 1);
    let rest = 98_000 - plumb_audit::STRAY_LISTED;
    assert!(
        strays[plumb_audit::STRAY_LISTED]
            .message
            .starts_with(&format!("{rest} more"))
    );
    let cases = audit.cases();
    // A stray tensor's finding is a shape finding, which has a case among the shape cases, not
    // here; with the measures skipped, the network's case is all that is left.
    assert_eq!(cases.len(), 1);
    assert_eq!(cases[0].name, "audit network");
}
