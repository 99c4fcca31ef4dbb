//! Files written by NumPy 2.4.6 and by the safetensors 0.8.0 Python library, via
//! fixtures/numpy/generate.py, load to exactly the values that script wrote. The expected values are
//! spelled out here, not computed by our own code, so a reader and a writer that agree on a mistake
//! cannot both pass.

use std::path::{Path, PathBuf};

use plumb_formats::{DType, FileFormat, Tensor, read_data, read_tensors, write_tensors};

const SOURCE: &str = "written by NumPy 2.4.6 via fixtures/numpy/generate.py";
const SAFETENSORS_SOURCE: &str =
    "written by safetensors 0.8.0 (Python, save_file) via fixtures/numpy/generate.py";

/// `np.arange(12).reshape(3, 4) / 8 - 0.5`, row-major.
const A: [f64; 12] = [
    -0.5, -0.375, -0.25, -0.125, 0.0, 0.125, 0.25, 0.375, 0.5, 0.625, 0.75, 0.875,
];

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../fixtures/numpy")
        .join(name)
}

fn single(name: &str) -> Tensor {
    let file = read_tensors(&fixture(name)).unwrap_or_else(|e| panic!("{name} ({SOURCE}): {e}"));
    assert_eq!(file.format, FileFormat::Npy, "{name}");
    assert_eq!(file.tensors.len(), 1, "{name}");
    file.tensors.into_iter().next().unwrap()
}

fn assert_tensor(
    t: &Tensor,
    name: &str,
    shape: &[usize],
    dtype: DType,
    data: &[f64],
    source: &str,
) {
    assert_eq!(t.name, name, "name ({source})");
    assert_eq!(t.shape, shape, "{name}: shape ({source})");
    assert_eq!(t.dtype, dtype, "{name}: dtype ({source})");
    assert_eq!(t.data, data, "{name}: values ({source})");
}

#[test]
fn float64_in_c_and_fortran_order_both_endians_and_every_header_version() {
    // Written by NumPy 2.4.6 via fixtures/numpy/generate.py: np.save of A, of
    // np.asfortranarray(A), of A.astype('>f8'), and np.lib.format.write_array with version (2, 0)
    // and (3, 0).
    for (file, stem) in [
        ("c_f8.npy", "c_f8"),
        ("fortran_f8.npy", "fortran_f8"),
        ("big_f8.npy", "big_f8"),
        ("v2_f8.npy", "v2_f8"),
        ("v3_f8.npy", "v3_f8"),
    ] {
        let t = single(file);
        assert_tensor(&t, stem, &[3, 4], DType::F64, &A, SOURCE);
        let matrix = t.to_array2().unwrap();
        assert_eq!(matrix[[1, 2]], 0.25, "{file}: A[1, 2] ({SOURCE})");
        assert_eq!(matrix[[2, 0]], 0.5, "{file}: A[2, 0] ({SOURCE})");
    }
}

#[test]
fn float32_both_endians_and_float16() {
    // Written by NumPy 2.4.6 via fixtures/numpy/generate.py: A.astype('<f4'), A.astype('>f4'),
    // A.astype('<f2'); every value of A is exact in all three.
    assert_tensor(&single("f4.npy"), "f4", &[3, 4], DType::F32, &A, SOURCE);
    assert_tensor(
        &single("big_f4.npy"),
        "big_f4",
        &[3, 4],
        DType::F32,
        &A,
        SOURCE,
    );
    assert_tensor(&single("f2.npy"), "f2", &[3, 4], DType::F16, &A, SOURCE);
}

#[test]
fn integers_bools_and_a_zero_dimensional_array() {
    // Written by NumPy 2.4.6 via fixtures/numpy/generate.py.
    let int64 = [-3.0, 0.0, 7.0, 1_099_511_627_776.0, -1.0, 5.0]; // 2**40 is exact in f64
    assert_tensor(&single("i8.npy"), "i8", &[2, 3], DType::I64, &int64, SOURCE);
    assert_tensor(
        &single("big_i4.npy"),
        "big_i4",
        &[3],
        DType::I32,
        &[-2.0, 1.0, 300.0],
        SOURCE,
    );
    assert_tensor(
        &single("u1.npy"),
        "u1",
        &[3],
        DType::U8,
        &[0.0, 7.0, 255.0],
        SOURCE,
    );
    assert_tensor(
        &single("bool.npy"),
        "bool",
        &[4],
        DType::Bool,
        &[1.0, 0.0, 1.0, 1.0],
        SOURCE,
    );
    let scalar = single("scalar.npy");
    assert_tensor(&scalar, "scalar", &[], DType::F64, &[2.5], SOURCE);
    assert_eq!(scalar.len(), 1);
    assert!(scalar.to_array2().is_none());
}

#[test]
fn savez_and_savez_compressed_archives() {
    // Written by NumPy 2.4.6 via fixtures/numpy/generate.py:
    // np.savez(_compressed)(path, weights=A, bias=np.array([0.25, -1.5, 3.0], dtype='<f4')).
    for name in ["savez.npz", "savez_compressed.npz"] {
        let file = read_tensors(&fixture(name)).unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!(file.format, FileFormat::Npz);
        let names: Vec<&str> = file.tensors.iter().map(|t| t.name.as_str()).collect();
        assert_eq!(
            names,
            ["weights", "bias"],
            "{name}: archive order ({SOURCE})"
        );
        assert_tensor(&file.tensors[0], "weights", &[3, 4], DType::F64, &A, SOURCE);
        let bias = file.get("bias").unwrap();
        assert_tensor(bias, "bias", &[3], DType::F32, &[0.25, -1.5, 3.0], SOURCE);
        assert!(file.get("missing").is_none());
    }
}

#[test]
fn numpy_archives_carry_zip64_extra_fields() {
    // Guards the claim that the zip64 members NumPy writes (force_zip64=True) are what the test
    // above loads: the first local header of savez.npz has an extra field of id 0x0001 (zip64).
    let bytes = std::fs::read(fixture("savez.npz")).unwrap();
    assert_eq!(&bytes[..4], b"PK\x03\x04");
    let name_len = u16::from_le_bytes([bytes[26], bytes[27]]) as usize;
    let extra_len = u16::from_le_bytes([bytes[28], bytes[29]]) as usize;
    assert!(extra_len >= 4, "no extra field ({SOURCE})");
    let id = u16::from_le_bytes([bytes[30 + name_len], bytes[31 + name_len]]);
    assert_eq!(id, 0x0001, "first extra field is not zip64 ({SOURCE})");
}

#[test]
fn safetensors_from_the_python_library_in_data_offset_order() {
    // Written by safetensors 0.8.0 (Python) via fixtures/numpy/generate.py. The library lays the
    // data out by descending dtype alignment, then by name: w64, w32, h16.
    let file = read_tensors(&fixture("tensors.safetensors")).unwrap();
    assert_eq!(file.format, FileFormat::Safetensors);
    let names: Vec<&str> = file.tensors.iter().map(|t| t.name.as_str()).collect();
    assert_eq!(names, ["w64", "w32", "h16"], "{SAFETENSORS_SOURCE}");
    let w64 = [-1.5, 2.25, 1e-3];
    assert_tensor(
        &file.tensors[0],
        "w64",
        &[3],
        DType::F64,
        &w64,
        SAFETENSORS_SOURCE,
    );
    let w32 = [1.0, -2.0, 0.5, 0.125, 4.0, -0.75];
    assert_tensor(
        &file.tensors[1],
        "w32",
        &[2, 3],
        DType::F32,
        &w32,
        SAFETENSORS_SOURCE,
    );
    let h16 = [0.5, -0.25, 2.0, 65504.0]; // 65504 is float16's largest finite value
    assert_tensor(
        &file.tensors[2],
        "h16",
        &[2, 2],
        DType::F16,
        &h16,
        SAFETENSORS_SOURCE,
    );
}

#[test]
fn bfloat16_from_known_bit_patterns() {
    // bfloat16 is the top half of an IEEE-754 binary32: 0x3F80 = 1.0, 0xC000 = -2.0 and
    // 0x3EAA = 0x3EAA0000 as f32 = 0.33203125. NumPy has no bfloat16, so these bytes are laid out
    // here by hand following the safetensors format (u64 header length, JSON header, data).
    let header = br#"{"b":{"dtype":"BF16","shape":[3],"data_offsets":[0,6]}}"#;
    let mut bytes = (header.len() as u64).to_le_bytes().to_vec();
    bytes.extend_from_slice(header);
    for bits in [0x3F80u16, 0xC000, 0x3EAA] {
        bytes.extend_from_slice(&bits.to_le_bytes());
    }
    let dir = std::env::temp_dir().join(format!("plumb-formats-bf16-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("bf16.safetensors");
    std::fs::write(&path, &bytes).unwrap();
    let file = read_tensors(&path).unwrap();
    assert_tensor(
        &file.tensors[0],
        "b",
        &[3],
        DType::BF16,
        &[1.0, -2.0, 0.332_031_25],
        "bfloat16 bit patterns",
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn our_npy_writer_reproduces_np_save_byte_for_byte() {
    // c_f8.npy and f4.npy were written by NumPy 2.4.6 (np.save) via fixtures/numpy/generate.py:
    // same header text, same padding to 64 bytes, same data.
    let dir = std::env::temp_dir().join(format!("plumb-formats-npysave-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let tensor = Tensor {
        name: "a".into(),
        shape: vec![3, 4],
        dtype: DType::F64,
        data: A.to_vec(),
    };
    for (fixture_name, dtype) in [("c_f8.npy", DType::F64), ("f4.npy", DType::F32)] {
        let ours = dir.join(fixture_name);
        write_tensors(&ours, FileFormat::Npy, std::slice::from_ref(&tensor), dtype).unwrap();
        assert_eq!(
            std::fs::read(&ours).unwrap(),
            std::fs::read(fixture(fixture_name)).unwrap(),
            "{fixture_name} ({SOURCE})"
        );
    }
    let scalar = Tensor {
        name: "s".into(),
        shape: vec![],
        dtype: DType::F64,
        data: vec![2.5],
    };
    let ours = dir.join("scalar.npy");
    write_tensors(&ours, FileFormat::Npy, &[scalar], DType::F64).unwrap();
    assert_eq!(
        std::fs::read(&ours).unwrap(),
        std::fs::read(fixture("scalar.npy")).unwrap(),
        "scalar.npy ({SOURCE})"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn data_files_with_integer_labels_are_one_hot_encoded() {
    // data.npz (np.savez, x float64 5 x 2, y int64 labels) and data.csv (np.savetxt with a header
    // row) were written by NumPy 2.4.6 via fixtures/numpy/generate.py.
    let x = [0.5, -1.0, 1.5, 2.0, -0.25, 0.0, 3.0, 1.0, 0.0, -2.5];
    let labels = [0, 2, 1, 1, 0];
    for name in ["data.npz", "data.csv"] {
        let batch = read_data(&fixture(name), 2, 3).unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!(batch.x.dim(), (5, 2), "{name} ({SOURCE})");
        assert_eq!(
            batch.x.iter().copied().collect::<Vec<_>>(),
            x,
            "{name} ({SOURCE})"
        );
        assert_eq!(batch.y.dim(), (5, 3), "{name} ({SOURCE})");
        for (row, &label) in labels.iter().enumerate() {
            for class in 0..3 {
                let expected = if class == label { 1.0 } else { 0.0 };
                assert_eq!(
                    batch.y[[row, class]],
                    expected,
                    "{name}: y[{row}, {class}] ({SOURCE})"
                );
            }
        }
    }
}
