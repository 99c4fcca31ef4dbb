//! File tensors against graph tensors: storage orders read and written through files NumPy wrote
//! (fixtures/storage/generate.py, numpy.transpose of the canonical arrays), and dense descriptions
//! giving the same loss and gradient through the graph as through the dense engine.

use std::path::{Path, PathBuf};

use ndarray::{Array2, ArrayD};
use plumb_engine::Weights;
use plumb_formats::{
    DType, Description, FileFormat, GraphDescription, Layout, Tensor, TensorFile, disassemble,
    read_tensors,
};

const SOURCE: &str = "written by NumPy 2.4.6 via fixtures/storage/generate.py";

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../fixtures/storage")
        .join(name)
}

#[test]
fn storage_orders_round_trip_through_files_numpy_wrote() {
    for name in ["image", "signal", "sequence"] {
        let d = GraphDescription::read(&fixture(&format!("{name}.toml"))).unwrap();
        let weights_path = fixture(&format!("{name}-weights.npz"));
        let weights = read_tensors(&weights_path).unwrap();
        let canonical = read_tensors(&fixture(&format!("{name}-canonical.npz"))).unwrap();
        let params = d.read_params(&weights, &weights_path).unwrap();
        assert_eq!(params.len(), d.graph.tensors().len());
        for (p, spec) in params.iter().zip(d.graph.tensors()) {
            let want = canonical
                .get(&spec.name)
                .unwrap_or_else(|| panic!("{name}: {} not in the canonical file", spec.name));
            assert_eq!(
                p.shape(),
                &want.shape[..],
                "{name} {} ({SOURCE})",
                spec.name
            );
            assert_eq!(
                p.iter().copied().collect::<Vec<_>>(),
                want.data,
                "{name} {} ({SOURCE})",
                spec.name
            );
        }
        // And back: the canonical arrays written in the declared storage are NumPy's bytes.
        let written = d.to_file(&params).unwrap();
        assert_eq!(written.len(), weights.tensors.len(), "{name}");
        for t in &written {
            let want = weights.get(&t.name).unwrap();
            assert_eq!(t.shape, want.shape, "{name} {}", t.name);
            assert_eq!(t.data, want.data, "{name} {} ({SOURCE})", t.name);
        }
    }
}

#[test]
fn a_file_that_does_not_fit_names_the_tensor_the_shape_and_the_storage() {
    let path = fixture("image-weights.npz");
    let d = GraphDescription::read(&fixture("image.toml")).unwrap();
    let mut file = read_tensors(&path).unwrap();
    // The hwio weight stored in the canonical oihw order instead.
    let t = file
        .tensors
        .iter_mut()
        .find(|t| t.name == "layer1.weight")
        .unwrap();
    t.shape = vec![3, 2, 3, 2];
    let e = d.read_params(&file, &path).unwrap_err().to_string();
    for part in [
        "image-weights.npz",
        "`layer1.weight`",
        "(3, 2, 3, 2)",
        "(3, 2, 2, 3)",
        "storage \"hwio\" declared",
    ] {
        assert!(e.contains(part), "`{part}` not in: {e}");
    }
    file.tensors.retain(|t| t.name != "layer2.bias");
    let e = d.read_params(&file, &path).unwrap_err().to_string();
    assert!(e.contains("`layer1.weight`"), "{e}");
    let mut file = read_tensors(&path).unwrap();
    file.tensors.retain(|t| t.name != "layer2.bias");
    let e = d.read_params(&file, &path).unwrap_err().to_string();
    assert!(
        e.contains("`layer2.bias`: missing: layer 2 (conv2d) needs its bias as (2,)"),
        "{e}"
    );
    let mut file = read_tensors(&path).unwrap();
    file.tensors[0].dtype = DType::I32;
    let e = d.read_params(&file, &path).unwrap_err().to_string();
    assert!(e.contains("holds int32 values"), "{e}");
}

#[test]
fn the_input_gradient_is_written_in_the_input_shape() {
    let d = GraphDescription::read(&fixture("image.toml")).unwrap();
    let g = Array2::from_shape_fn((3, 50), |(i, j)| (i * 50 + j) as f64);
    let t = d.input_tensor(g.view());
    assert_eq!(
        (t.name.as_str(), &t.shape[..]),
        ("input", &[3, 2, 5, 5][..])
    );
    assert_eq!(t.data[57], 57.0);
}

/// Deterministic values in [-1, 1) (a 64-bit LCG), so a failure reproduces.
fn values(n: usize, seed: u64) -> Vec<f64> {
    let mut s = seed;
    (0..n)
        .map(|_| {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (s >> 11) as f64 / (1u64 << 53) as f64 * 2.0 - 1.0
        })
        .collect()
}

#[test]
fn a_dense_description_gives_the_same_loss_and_gradient_through_the_graph() {
    let body = r#"
loss = "LOSS"
layout = "LAYOUT"
l2 = 0.3
CONVENTIONS

[[layer]]
units = 5
activation = "tanh"

[[layer]]
name = "mid"
units = 4
activation = "leaky-relu"
slope = 0.2

[[layer]]
units = 3
activation = "OUT"
"#;
    let mut cases = 0;
    for layout in Layout::ALL {
        for (loss, out) in [("cross-entropy", "softmax"), ("squared-error", "elu")] {
            for conventions in [
                "",
                "reduction = \"sum\"\nl2-divisor = \"1\"\nl2-on-bias = true",
            ] {
                let text = format!("inputs = 4\n{body}")
                    .replace("LOSS", loss)
                    .replace("LAYOUT", layout.name())
                    .replace("CONVENTIONS", conventions)
                    .replace("OUT", out);
                let dense = Description::parse(Path::new("net.toml"), &text).unwrap();
                let graph = GraphDescription::parse(Path::new("net.toml"), &text).unwrap();
                let net = &dense.network;
                let layers: Vec<Array2<f64>> = net
                    .layers()
                    .iter()
                    .enumerate()
                    .map(|(l, s)| {
                        let (r, c) = s.shape();
                        Array2::from_shape_vec((r, c), values(r * c, 7 + l as u64)).unwrap()
                    })
                    .collect();
                let weights = Weights::new(layers);
                let m = 6;
                let x = Array2::from_shape_vec((m, 4), values(m * 4, 99)).unwrap();
                let y = if loss == "cross-entropy" {
                    Array2::from_shape_fn((m, 3), |(i, k)| f64::from(i % 3 == k))
                } else {
                    Array2::from_shape_vec((m, 3), values(m * 3, 5)).unwrap()
                };
                let (loss_dense, grad_dense) = net.gradient(&weights, x.view(), y.view());

                // The dense engine's weights as the file's tensors, read onto the graph.
                let file = TensorFile {
                    format: FileFormat::Npz,
                    tensors: disassemble(&dense, &weights),
                };
                let params: Vec<ArrayD<f64>> =
                    graph.read_params(&file, Path::new("w.npz")).unwrap();
                let g = graph.graph.gradient(&params, x.view(), y.view(), None);
                let what = format!("{layout} {loss} [{conventions}]");
                assert!(
                    (g.loss - loss_dense).abs() <= 1e-13 * loss_dense.abs(),
                    "{what}: {} vs {loss_dense}",
                    g.loss
                );
                let ours: Vec<Tensor> = graph.to_file(&g.params).unwrap();
                let theirs = disassemble(&dense, &grad_dense);
                assert_eq!(ours.len(), theirs.len(), "{what}");
                for (a, b) in ours.iter().zip(&theirs) {
                    assert_eq!((&a.name, &a.shape), (&b.name, &b.shape), "{what}");
                    for (u, v) in a.data.iter().zip(&b.data) {
                        assert!(
                            (u - v).abs() <= 1e-12 * u.abs().max(v.abs()).max(1e-3),
                            "{what} {}: {u} vs {v}",
                            a.name
                        );
                    }
                }
                cases += 1;
            }
        }
    }
    assert_eq!(cases, 12);
}
