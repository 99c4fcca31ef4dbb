//! What plumb writes, plumb reads back exactly: every format, in float32 and float64.

use std::path::PathBuf;

use ndarray::array;
use plumb_formats::{DType, FileFormat, Tensor, TensorFileError, read_tensors, write_tensors};

fn scratch(test: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!(
        "plumb-formats-roundtrip-{}-{test}",
        std::process::id()
    ));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// Tensors of several ranks, with names as layouts produce them (dots included). The values are
/// exact in float32 so one set serves both precisions; float64-only values are checked separately.
fn tensors() -> Vec<Tensor> {
    vec![
        Tensor::from_array2(
            "layer1",
            &array![[0.5, -1.25, 3.0], [1e-3_f32 as f64, -0.0, 7.5]],
        ),
        Tensor::from_vec1("layer1.bias", vec![0.25, -2.0]),
        Tensor::from_array2("layer2.weight", &array![[1.0], [-0.125]].t().to_owned()),
        Tensor {
            name: "scale".into(),
            shape: vec![],
            dtype: DType::F64,
            data: vec![4.0],
        },
        Tensor {
            name: "empty".into(),
            shape: vec![0, 3],
            dtype: DType::F64,
            data: vec![],
        },
    ]
}

fn assert_same(read: &Tensor, written: &Tensor, dtype: DType) {
    assert_eq!(read.name, written.name);
    assert_eq!(read.shape, written.shape, "{}", written.name);
    assert_eq!(read.dtype, dtype, "{}", written.name);
    // Bit equality: -0.0 must stay -0.0.
    let bits = |t: &Tensor| t.data.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
    assert_eq!(bits(read), bits(written), "{}", written.name);
}

#[test]
fn npz_and_safetensors_in_float32_and_float64() {
    let dir = scratch("multi");
    let written = tensors();
    for format in [FileFormat::Npz, FileFormat::Safetensors] {
        for dtype in [DType::F32, DType::F64] {
            let ext = if format == FileFormat::Npz {
                "npz"
            } else {
                "safetensors"
            };
            let path = dir.join(format!("w-{}.{ext}", dtype.name()));
            write_tensors(&path, format, &written, dtype).unwrap();
            let file = read_tensors(&path).unwrap();
            assert_eq!(file.format, format);
            assert_eq!(file.tensors.len(), written.len(), "{format} {dtype}");
            let names: Vec<&str> = file.tensors.iter().map(|t| t.name.as_str()).collect();
            match format {
                // An archive keeps the order given.
                FileFormat::Npz => {
                    assert_eq!(
                        names,
                        ["layer1", "layer1.bias", "layer2.weight", "scale", "empty"]
                    );
                }
                // The safetensors library lays tensors of one dtype out by name.
                _ => assert_eq!(
                    names,
                    ["empty", "layer1", "layer1.bias", "layer2.weight", "scale"]
                ),
            }
            for t in &written {
                assert_same(file.get(&t.name).unwrap(), t, dtype);
            }
        }
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn npy_in_float32_and_float64() {
    let dir = scratch("npy");
    for t in tensors() {
        for dtype in [DType::F32, DType::F64] {
            let path = dir.join(format!("{}-{}.npy", t.name, dtype.name()));
            write_tensors(&path, FileFormat::Npy, std::slice::from_ref(&t), dtype).unwrap();
            let file = read_tensors(&path).unwrap();
            let read = &file.tensors[0];
            // A single .npy is named after its file.
            assert_eq!(read.name, path.file_stem().unwrap().to_str().unwrap());
            assert_eq!(read.shape, t.shape);
            assert_eq!(read.dtype, dtype);
            assert_eq!(read.data, t.data);
            // NumPy's alignment: the data starts on a 64-byte boundary.
            let bytes = std::fs::read(&path).unwrap();
            let header_len = u16::from_le_bytes([bytes[8], bytes[9]]) as usize;
            assert_eq!((10 + header_len) % 64, 0, "{}", path.display());
        }
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn float64_keeps_every_bit_and_float32_rounds_to_nearest() {
    let dir = scratch("precision");
    let values = vec![
        0.1,
        1.0 / 3.0,
        1e-300,
        -2.5e300,
        f64::MIN_POSITIVE,
        123_456_789.123_456_79,
    ];
    let t = Tensor::from_vec1("v", values.clone());
    for format in [FileFormat::Npy, FileFormat::Npz, FileFormat::Safetensors] {
        let ext = match format {
            FileFormat::Npy => "npy",
            FileFormat::Npz => "npz",
            FileFormat::Safetensors => "safetensors",
        };
        let path = dir.join(format!("v.{ext}"));
        write_tensors(&path, format, std::slice::from_ref(&t), DType::F64).unwrap();
        assert_eq!(
            read_tensors(&path).unwrap().tensors[0].data,
            values,
            "{format} f64"
        );

        // Huge values overflow float32 to infinity, as a cast does; the rest round to nearest.
        write_tensors(&path, format, std::slice::from_ref(&t), DType::F32).unwrap();
        let expected: Vec<f64> = values.iter().map(|&v| v as f32 as f64).collect();
        assert_eq!(
            read_tensors(&path).unwrap().tensors[0].data,
            expected,
            "{format} f32"
        );
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn matrices_round_trip_through_ndarray() {
    let m = array![[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]];
    let t = Tensor::from_array2("m", &m);
    assert_eq!(t.shape, [2, 3]);
    assert_eq!(t.dtype, DType::F64);
    assert_eq!(t.to_array2().unwrap(), m);
    // A transposed view is stored in its logical order, not its memory order.
    let tt = Tensor::from_array2("mt", &m.t().to_owned());
    assert_eq!(tt.data, [1.0, 4.0, 2.0, 5.0, 3.0, 6.0]);
    let tv = Tensor::from_array2("mv", &m.t().to_owned());
    assert_eq!(tv.to_array2().unwrap(), m.t());
    assert!(Tensor::from_vec1("b", vec![1.0]).to_array2().is_none());
}

#[test]
fn overwriting_replaces_the_file_atomically() {
    let dir = scratch("overwrite");
    let path = dir.join("w.npz");
    write_tensors(&path, FileFormat::Npz, &tensors(), DType::F64).unwrap();
    let second = vec![Tensor::from_vec1("only", vec![9.0])];
    write_tensors(&path, FileFormat::Npz, &second, DType::F64).unwrap();
    assert_eq!(read_tensors(&path).unwrap().tensors, second);
    let entries: Vec<_> = std::fs::read_dir(&dir).unwrap().collect();
    assert_eq!(entries.len(), 1, "a temporary file was left behind");
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn refuses_to_write_what_would_read_back_differently() {
    let dir = scratch("refuse");
    let path = dir.join("w.npz");
    let err = write_tensors(&path, FileFormat::Npz, &tensors(), DType::I64).unwrap_err();
    assert!(matches!(err, TensorFileError::WriteDType { .. }), "{err}");
    assert!(err.to_string().contains("float32 or float64"), "{err}");

    let npy = dir.join("w.npy");
    let err = write_tensors(&npy, FileFormat::Npy, &tensors(), DType::F64).unwrap_err();
    assert!(err.to_string().contains("exactly one tensor"), "{err}");

    let mut bad = Tensor::from_vec1("short", vec![1.0, 2.0]);
    bad.shape = vec![3];
    let err = write_tensors(&path, FileFormat::Npz, &[bad], DType::F64).unwrap_err();
    assert!(err.to_string().contains("tensor `short`"), "{err}");
    assert!(err.to_string().contains("(3,)"), "{err}");

    let twice = vec![
        Tensor::from_vec1("a", vec![1.0]),
        Tensor::from_vec1("a", vec![2.0]),
    ];
    for format in [FileFormat::Npz, FileFormat::Safetensors] {
        let err = write_tensors(&path, format, &twice, DType::F64).unwrap_err();
        assert!(err.to_string().contains("given twice"), "{err}");
    }
    assert!(
        !path.exists(),
        "nothing is written when the tensors are refused"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}
