//! File tensors against graph tensors: storage orders read and written through files NumPy wrote
//! (fixtures/storage/generate.py, numpy.transpose of the canonical arrays). A dense description's
//! layouts are held end to end by tests/it/grad.rs (gradient files against a NumPy
//! backpropagation in every layout) and its gradient by the engine's num-dual tests.

use std::path::{Path, PathBuf};

use ndarray::Array2;
use plumb_formats::{DType, GraphDescription, read_tensors};

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
