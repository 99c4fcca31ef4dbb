//! Malformed input is an `Err` that names the file and the place in it — never a panic, a hang or
//! an allocation the file could not back. The inputs are built here, in a temporary directory, from
//! the NumPy-written fixtures (fixtures/numpy/generate.py) and from bytes laid out by hand.

use std::io::{Cursor, Write};
use std::path::{Path, PathBuf};

use plumb_formats::{read_data, read_tensors};
use zip::write::SimpleFileOptions;
use zip::{CompressionMethod, ZipWriter};

fn scratch(test: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!(
        "plumb-formats-malformed-{}-{test}",
        std::process::id()
    ));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

fn fixture(name: &str) -> Vec<u8> {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../fixtures/numpy")
        .join(name);
    std::fs::read(path).unwrap()
}

fn put(dir: &Path, name: &str, bytes: &[u8]) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, bytes).unwrap();
    path
}

/// The message of the error reading `path` must fail with; it always starts with the path.
fn tensor_error(path: &Path) -> String {
    match read_tensors(path) {
        Ok(file) => panic!("{} was accepted: {file:?}", path.display()),
        Err(e) => {
            let message = e.to_string();
            assert!(
                message.starts_with(&path.display().to_string()),
                "{message}"
            );
            assert_eq!(e.path(), path);
            message
        }
    }
}

fn data_error(path: &Path, inputs: usize, outputs: usize) -> String {
    match read_data(path, inputs, outputs) {
        Ok(batch) => panic!("{} was accepted: {batch:?}", path.display()),
        Err(e) => {
            let message = e.to_string();
            assert!(
                message.starts_with(&path.display().to_string()),
                "{message}"
            );
            message
        }
    }
}

#[track_caller]
fn assert_has(message: &str, parts: &[&str]) {
    for part in parts {
        assert!(message.contains(part), "`{part}` not in: {message}");
    }
}

/// An NPY 1.0 file with this header dict, padded as NumPy pads it, followed by `data`.
fn npy_with_header(dict: &str, data: &[u8]) -> Vec<u8> {
    let unpadded = 10 + dict.len() + 1;
    let pad = 64 - unpadded % 64;
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend_from_slice(&((dict.len() + pad + 1) as u16).to_le_bytes());
    out.extend_from_slice(dict.as_bytes());
    out.extend(std::iter::repeat_n(b' ', pad));
    out.push(b'\n');
    out.extend_from_slice(data);
    out
}

fn zip_of(members: &[(&str, &[u8])], method: CompressionMethod) -> Vec<u8> {
    let mut writer = ZipWriter::new(Cursor::new(Vec::new()));
    for (name, content) in members {
        let options = SimpleFileOptions::default().compression_method(method);
        writer.start_file(*name, options).unwrap();
        writer.write_all(content).unwrap();
    }
    writer.finish().unwrap().into_inner()
}

/// Deterministic noise (a 64-bit LCG), so a failure reproduces.
fn garbage(len: usize, seed: u64) -> Vec<u8> {
    let mut state = seed;
    (0..len)
        .map(|_| {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 56) as u8
        })
        .collect()
}

#[test]
fn truncated_npy_at_every_stage() {
    let dir = scratch("truncated-npy");
    // c_f8.npy: 10-byte preamble, a 118-byte header, data from byte 128 to 224.
    let good = fixture("c_f8.npy");
    assert_eq!(good.len(), 224);
    let cases: &[(usize, &[&str])] = &[
        (0, &["not an NPY file", "the file is empty"]),
        (3, &["byte 3", "inside the NPY preamble", "truncated"]),
        (9, &["header-length field", "truncated"]),
        (
            10,
            &["byte 8", "says 118 bytes but only 0 follow", "truncated"],
        ),
        (70, &["says 118 bytes but only 60 follow"]),
        (
            128,
            &[
                "byte 128",
                "shape (3, 4) of float64 (96 bytes) but only 0 bytes follow",
            ],
        ),
        (
            200,
            &[
                "byte 128",
                "(96 bytes) but only 72 bytes follow",
                "truncated — write it again",
            ],
        ),
        (223, &["(96 bytes) but only 95 bytes follow"]),
    ];
    for (cut, parts) in cases {
        let path = put(&dir, &format!("cut{cut}.npy"), &good[..*cut]);
        assert_has(&tensor_error(&path), parts);
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_header_claiming_more_data_than_present() {
    let dir = scratch("short-data");
    let good = fixture("c_f8.npy");
    let mut lying = good.clone();
    let at = find(&lying, b"(3, 4)");
    lying[at..at + 6].copy_from_slice(b"(5, 5)");
    let path = put(&dir, "layer1.npy", &lying);
    assert_has(
        &tensor_error(&path),
        &[
            "layer1.npy: byte 128: the header declares shape (5, 5) of float64 (200 bytes) but only 96 bytes follow; the file is truncated — write it again",
        ],
    );

    // The same member inside an archive names the member too.
    for method in [CompressionMethod::Stored, CompressionMethod::Deflated] {
        let path = put(
            &dir,
            "weights.npz",
            &zip_of(&[("layer1.npy", &lying)], method),
        );
        assert_has(
            &tensor_error(&path),
            &[
                "weights.npz: member `layer1.npy`, byte 128: the header declares shape (5, 5) of float64 (200 bytes) but only 96 bytes follow",
            ],
        );
    }

    // More data than declared is refused as well: the shape would be wrong.
    let mut long = good.clone();
    long.extend_from_slice(&[0; 8]);
    let path = put(&dir, "long.npy", &long);
    assert_has(
        &tensor_error(&path),
        &["byte 128", "but 104 bytes follow", "does not match"],
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_huge_shape_is_refused_without_allocating() {
    let dir = scratch("huge");
    // 2^40 × 2^40 elements overflow any size computation.
    let dict =
        "{'descr': '<f8', 'fortran_order': False, 'shape': (1099511627776, 1099511627776), }";
    let path = put(&dir, "huge.npy", &npy_with_header(dict, &[0; 16]));
    assert_has(
        &tensor_error(&path),
        &[
            "huge.npy: byte 128",
            "shape (1099511627776, 1099511627776) of float64",
            "more bytes than any file can hold",
        ],
    );
    // 2^40 × 8 float64s (2^46 bytes) do not overflow, but the 16 bytes present cannot hold them.
    let dict = "{'descr': '<f8', 'fortran_order': True, 'shape': (1099511627776, 8), }";
    let bytes = npy_with_header(dict, &[0; 16]);
    let path = put(&dir, "big.npy", &bytes);
    assert_has(
        &tensor_error(&path),
        &["(70368744177664 bytes) but only 16 bytes follow"],
    );
    let path = put(
        &dir,
        "big.npz",
        &zip_of(&[("w.npy", &bytes)], CompressionMethod::Deflated),
    );
    assert_has(
        &tensor_error(&path),
        &["member `w.npy`", "but only 16 bytes follow"],
    );
    // A dimension beyond any machine word.
    let dict = "{'descr': '<f8', 'fortran_order': False, 'shape': (99999999999999999999999,), }";
    let path = put(&dir, "digits.npy", &npy_with_header(dict, &[]));
    assert_has(
        &tensor_error(&path),
        &["byte 61", "too large for this machine"],
    );

    // The same in safetensors: the library's checked arithmetic refuses it.
    let header =
        br#"{"w":{"dtype":"F64","shape":[1099511627776,1099511627776],"data_offsets":[0,8]}}"#;
    let path = put(
        &dir,
        "huge.safetensors",
        &safetensors_bytes(header, &[0; 8]),
    );
    assert_has(
        &tensor_error(&path),
        &["huge.safetensors", "overflow", "write it again"],
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

fn safetensors_bytes(header: &[u8], data: &[u8]) -> Vec<u8> {
    let mut out = (header.len() as u64).to_le_bytes().to_vec();
    out.extend_from_slice(header);
    out.extend_from_slice(data);
    out
}

#[test]
fn bad_header_dicts_are_refused_where_they_go_wrong() {
    let dir = scratch("bad-header");
    let data = [0u8; 96];
    // (dict, substrings); offsets count from the file start, the dict starting at byte 10.
    let cases: &[(&str, &[&str])] = &[
        (
            "{'descr': '<f8', 'fortran_order': False, 'shape': (3, 4), 'extra': 1, }",
            &["byte 68", "unexpected key `extra`"],
        ),
        (
            "{'descr': '<f8', 'fortran_order': False, }",
            &["byte 10", "no 'shape' key"],
        ),
        (
            "{'descr': '<f8', 'fortran_order': False, 'shape': (12), }",
            &["byte 60", "(12) is the number 12 in Python", "(12,)"],
        ),
        (
            "{'descr': '<f8', 'fortran_order': False, 'shape': (-3, 4), }",
            &["byte 61", "non-negative integer dimension, found `-`"],
        ),
        (
            "{'descr': '<f8', 'fortran_order': 0, 'shape': (3, 4), }",
            &["byte 44", "expected a string, True, False or a tuple"],
        ),
        (
            "__import__('os').system('rm -rf /')",
            &["byte 10", "should be a dict", "found `_`"],
        ),
        (
            "{'descr': '<f8', 'descr': '<f8', 'fortran_order': False, 'shape': (3, 4), }",
            &["byte 27", "`descr` appears twice"],
        ),
        (
            "{'descr': '<f8', 'fortran_order': False, 'shape': (3, 4), } junk",
            &["byte 70", "unexpected text after the header dict"],
        ),
        (
            "{'descr': '<f8', 'fortran_order': False, 'shape': (3, 4)",
            &["expected `,` or `}`"],
        ),
        (
            "{'descr': '\\x3cf8', 'fortran_order': False, 'shape': (3, 4), }",
            &["escape"],
        ),
        (
            "{'descr': 8, 'fortran_order': False, 'shape': (3, 4), }",
            &["byte 20"],
        ),
    ];
    for (i, (dict, parts)) in cases.iter().enumerate() {
        let path = put(&dir, &format!("h{i}.npy"), &npy_with_header(dict, &data));
        let message = tensor_error(&path);
        assert_has(&message, parts);
        assert_has(&message, &["NPY header is damaged"]);
    }
    // An unknown format version.
    let mut v4 = fixture("c_f8.npy");
    v4[6] = 4;
    let path = put(&dir, "v4.npy", &v4);
    assert_has(
        &tensor_error(&path),
        &["byte 6", "format version 4.0", "1.0, 2.0 or 3.0"],
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn unsupported_dtypes_are_named() {
    let dir = scratch("dtype");
    let cases: &[(&str, usize, &[&str])] = &[
        (
            "'<c16'",
            48,
            &["tensor `cplx`", "'<c16' (complex)", "astype(np.float64)"],
        ),
        ("'|O'", 24, &["'|O' (Python objects)"]),
        ("'<U5'", 60, &["'<U5' (unicode strings)"]),
        ("'<f16'", 48, &["'<f16' (extended-precision float)"]),
        ("[('a', '<f8'), ('b', '<i4')]", 36, &["structured dtype"]),
    ];
    for (descr, len, parts) in cases {
        let dict = format!("{{'descr': {descr}, 'fortran_order': False, 'shape': (3,), }}");
        let path = put(&dir, "cplx.npy", &npy_with_header(&dict, &vec![0; *len]));
        let message = tensor_error(&path);
        // The descr value starts right after `{'descr': ` at byte 10.
        assert_has(
            &message,
            &["cplx.npy: byte 20", "which plumb does not read"],
        );
        assert_has(&message, parts);
    }
    let header = br#"{"q":{"dtype":"F8_E4M3","shape":[2],"data_offsets":[0,2]}}"#;
    let path = put(&dir, "q.safetensors", &safetensors_bytes(header, &[0, 0]));
    let offset = format!("byte {}", 8 + header.len());
    assert_has(&tensor_error(&path), &[&offset, "tensor `q`", "F8_E4M3"]);
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn garbage_wrong_magic_and_wrong_extensions() {
    let dir = scratch("magic");
    let noise = garbage(300, 7);
    let path = put(&dir, "noise.npy", &noise);
    assert_has(
        &tensor_error(&path),
        &[
            "not an NPY file: it starts with bytes",
            "instead of \\x93NUMPY",
        ],
    );
    let path = put(&dir, "noise.npz", &noise);
    assert_has(
        &tensor_error(&path),
        &["not a readable zip archive", "np.savez"],
    );
    let path = put(&dir, "noise.safetensors", &noise);
    assert_has(&tensor_error(&path), &["not a valid safetensors file"]);

    // Content of one format under the name of another.
    let npz = fixture("savez.npz");
    let path = put(&dir, "model.safetensors", &npz);
    assert_has(
        &tensor_error(&path),
        &[
            "the name says safetensors but the content is a zip archive (an NPZ file); rename the file to .npz",
        ],
    );
    let path = put(&dir, "w.npz", &fixture("c_f8.npy"));
    assert_has(
        &tensor_error(&path),
        &["a single NPY array", "rename the file to .npy"],
    );
    let path = put(&dir, "w.npy", &fixture("tensors.safetensors"));
    assert_has(&tensor_error(&path), &["content is a safetensors file"]);

    // Unknown extensions list the supported ones, and say what the content looks like.
    let path = put(&dir, "model.pt", &npz);
    assert_has(
        &tensor_error(&path),
        &[
            "unknown tensor file extension `.pt`",
            ".npy, .npz and .safetensors",
            "rename the file to .npz",
        ],
    );
    let path = put(&dir, "weights", &noise);
    assert_has(&tensor_error(&path), &["extension (none)"]);
    let missing = dir.join("missing.npz");
    assert_has(&tensor_error(&missing), &["cannot read the file"]);
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn corrupt_zip_archives() {
    let dir = scratch("zip");
    let good = fixture("savez.npz");
    for cut in [0, 4, 30, 100, 300, good.len() - 22, good.len() - 1] {
        let path = put(&dir, &format!("cut{cut}.npz"), &good[..cut]);
        assert_has(&tensor_error(&path), &[&format!("cut{cut}.npz")]);
    }

    // Damaged deflate data: inflating fails or the checksum does not match.
    let mut damaged = fixture("savez_compressed.npz");
    for b in &mut damaged[60..90] {
        *b ^= 0x5a;
    }
    let path = put(&dir, "damaged.npz", &damaged);
    assert_has(&tensor_error(&path), &["member `weights.npy`"]);

    // A declared size beyond what deflate can make of the compressed bytes: refused before
    // inflating anything. The size sits at byte 22 of the local header, 24 of the central one.
    let mut bomb = zip_of(
        &[("w.npy", &fixture("c_f8.npy"))],
        CompressionMethod::Deflated,
    );
    let central = find(&bomb, b"PK\x01\x02");
    for at in [22, central + 24] {
        bomb[at..at + 4].copy_from_slice(&0x7fff_0000u32.to_le_bytes());
    }
    let path = put(&dir, "bomb.npz", &bomb);
    assert_has(
        &tensor_error(&path),
        &[
            "bomb.npz: member `w.npy`",
            "declares 2147418112 bytes",
            "more than deflate can produce",
        ],
    );

    // A stored member whose declared size disagrees with its stored bytes.
    let mut stored = zip_of(
        &[("w.npy", &fixture("c_f8.npy"))],
        CompressionMethod::Stored,
    );
    let central = find(&stored, b"PK\x01\x02");
    for at in [22, central + 24] {
        stored[at..at + 4].copy_from_slice(&1000u32.to_le_bytes());
    }
    let path = put(&dir, "stored.npz", &stored);
    assert_has(
        &tensor_error(&path),
        &["member `w.npy`", "declares 1000 bytes"],
    );

    // A stored member's data damaged (its last byte, inside the array): read in place, it is
    // held to the CRC-32 the archive records for it (the zip format's own check).
    let mut flipped = zip_of(
        &[("w.npy", &fixture("c_f8.npy"))],
        CompressionMethod::Stored,
    );
    let local = find(&flipped, b"PK\x01\x02") - 1;
    flipped[local] ^= 0x01;
    let path = put(&dir, "flipped.npz", &flipped);
    assert_has(
        &tensor_error(&path),
        &["flipped.npz", "member `w.npy`", "checksum", "damaged"],
    );

    // Members that are not arrays, and two arrays of one name.
    let npy = fixture("c_f8.npy");
    let path = put(
        &dir,
        "notes.npz",
        &zip_of(
            &[("w.npy", &npy), ("notes.txt", b"hello")],
            CompressionMethod::Stored,
        ),
    );
    assert_has(
        &tensor_error(&path),
        &["member `notes.txt`", "only `.npy` members"],
    );
    let mut twice = zip_of(
        &[("a.npy", &npy), ("b.npy", &npy)],
        CompressionMethod::Stored,
    );
    replace_all(&mut twice, b"b.npy", b"a.npy");
    let path = put(&dir, "twice.npz", &twice);
    assert_has(
        &tensor_error(&path),
        &["two or more members have the same name"],
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

fn find(haystack: &[u8], needle: &[u8]) -> usize {
    haystack
        .windows(needle.len())
        .position(|w| w == needle)
        .unwrap()
}

fn replace_all(bytes: &mut [u8], from: &[u8], to: &[u8]) {
    let mut i = 0;
    while i + from.len() <= bytes.len() {
        if &bytes[i..i + from.len()] == from {
            bytes[i..i + from.len()].copy_from_slice(to);
        }
        i += 1;
    }
}

#[test]
fn corrupt_safetensors() {
    let dir = scratch("safetensors");
    let good = fixture("tensors.safetensors");
    for cut in [0, 4, 8, 20, 200, good.len() - 1] {
        let path = put(&dir, &format!("cut{cut}.safetensors"), &good[..cut]);
        assert_has(
            &tensor_error(&path),
            &["not a valid safetensors file", "write it again"],
        );
    }
    let header = br#"{"w":{"dtype":"F64","shape":[3],"data_offsets":[0,24]}}"#;
    let path = put(
        &dir,
        "short.safetensors",
        &safetensors_bytes(header, &[0; 8]),
    );
    assert_has(
        &tensor_error(&path),
        &["file not fully covered", "truncated"],
    );
    let path = put(
        &dir,
        "json.safetensors",
        &safetensors_bytes(b"{not json}", &[]),
    );
    assert_has(
        &tensor_error(&path),
        &["invalid JSON in header", "JSON header is damaged"],
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn malformed_csv_data() {
    let dir = scratch("csv");
    // A network with 2 inputs and 3 output units.
    let cases: &[(&str, &[&str])] = &[
        (
            "a,b,c\n1,2,0\n1,2\n",
            &["line 3: 2 fields where the header has 3"],
        ),
        (
            "a,b,c\n1,2,0\n1,abc,1\n",
            &["line 3, column `b`: `abc` is not a number"],
        ),
        ("a,b,c\n1,,0\n", &["line 2, column `b`: the field is empty"]),
        ("", &["the file is empty"]),
        ("a,b,c\n", &["a header row but no samples"]),
        (
            "a,b,c\n1,2,3\n",
            &[
                "line 2, column `c`: `3` is outside 0..=2",
                "integers 0 to 2",
            ],
        ),
        ("a,b,c\n1,2,-1\n", &["`-1` is outside 0..=2"]),
        (
            "a,b,c\n1,2,1.5\n",
            &["line 2, column `c`: `1.5` is not an integer class label"],
        ),
        (
            "a,b,c\n1,nan,0\n",
            &["line 2, column `b`: `nan` is not a finite number"],
        ),
        (
            "a,b,c,d\n1,2,3,4\n",
            &[
                "line 1: the header has 4 columns",
                "2 features + 3 targets = 5 columns, or 2 features + 1 label column = 3",
            ],
        ),
        (
            "1,2,0\n3,4,1\n",
            &["line 1 holds only numbers", "add a header row"],
        ),
    ];
    for (i, (text, parts)) in cases.iter().enumerate() {
        let path = put(&dir, &format!("d{i}.csv"), text.as_bytes());
        assert_has(&data_error(&path, 2, 3), parts);
    }
    // Long offending text is quoted, but cut short.
    let long = format!("a,b,c\n1,{},0\n", "x".repeat(500));
    let path = put(&dir, "long.csv", long.as_bytes());
    let message = data_error(&path, 2, 3);
    assert_has(&message, &["…` is not a number"]);
    assert!(message.len() < 300, "{message}");
    // Targets taken as values must be finite too.
    let path = put(&dir, "inf.csv", b"a,b,t\n1,2,inf\n");
    assert_has(
        &data_error(&path, 2, 1),
        &["line 2, column `t`: `inf` is not a finite number"],
    );
    // Not UTF-8.
    let path = put(&dir, "latin1.csv", b"a,b,c\n1,2,0\n\xff\xfe,2,0\n");
    assert_has(&data_error(&path, 2, 3), &["line 3"]);
    let path = put(&dir, "data.txt", b"a,b,c\n1,2,0\n");
    assert_has(
        &data_error(&path, 2, 3),
        &["unknown data file extension", ".csv", ".npz"],
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn malformed_npz_data() {
    use plumb_formats::{DType, FileFormat, Tensor, write_tensors};
    let dir = scratch("npz-data");
    let x = Tensor {
        name: "x".into(),
        shape: vec![3, 2],
        dtype: DType::F64,
        data: vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0],
    };
    let labels = |values: Vec<f64>| Tensor::from_vec1("y", values);
    let write = |name: &str, tensors: &[Tensor]| {
        let path = dir.join(name);
        write_tensors(&path, FileFormat::Npz, tensors, DType::F64).unwrap();
        path
    };
    let path = write("only_x.npz", std::slice::from_ref(&x));
    assert_has(
        &data_error(&path, 2, 3),
        &["no array `y` (the archive holds `x`)"],
    );
    let path = write("range.npz", &[x.clone(), labels(vec![0.0, 5.0, 1.0])]);
    assert_has(
        &data_error(&path, 2, 3),
        &["array `y`, element [1] (sample 1): the value 5 is outside 0..=2"],
    );
    let path = write("rows.npz", &[x.clone(), labels(vec![0.0, 1.0])]);
    assert_has(
        &data_error(&path, 2, 3),
        &["array `y` has shape (2,)", "y must be (3, 3)"],
    );
    let path = write("inputs.npz", &[x.clone(), labels(vec![0.0, 1.0, 2.0])]);
    assert_has(
        &data_error(&path, 4, 3),
        &["array `x` has shape (3, 2)", "4 inputs"],
    );
    let mut bad_x = x.clone();
    bad_x.data[2] = f64::NAN;
    let path = write("nan.npz", &[bad_x, labels(vec![0.0, 1.0, 2.0])]);
    assert_has(
        &data_error(&path, 2, 3),
        &["array `x`, element [1, 0] (sample 1, feature 0): NaN is not finite"],
    );
    let path = put(&dir, "noise.npz", &garbage(100, 3));
    assert_has(&data_error(&path, 2, 3), &["not a readable zip archive"]);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Every truncation of every fixture is an error, and no truncation or single-byte change makes a
/// reader panic. The file is grown and patched in place rather than rewritten: truncating a file
/// thousands of times is slow on some file systems.
#[test]
fn no_cut_or_flipped_byte_makes_a_reader_panic() {
    use std::io::{Seek, SeekFrom};
    let dir = scratch("sweep");
    let files = [
        "c_f8.npy",
        "fortran_f8.npy",
        "savez.npz",
        "savez_compressed.npz",
        "tensors.safetensors",
    ];
    for name in files {
        let good = fixture(name);
        let path = dir.join(name);
        let mut file = std::fs::File::create(&path).unwrap();
        for cut in 0..good.len() {
            if cut > 0 {
                file.write_all(&good[cut - 1..cut]).unwrap();
            }
            match std::panic::catch_unwind(|| read_tensors(&path).map(|_| ())) {
                Ok(Err(_)) => {}
                Ok(Ok(())) => panic!("{name} cut to {cut} bytes was accepted"),
                Err(_) => panic!("{name} cut to {cut} bytes panicked"),
            }
        }
        file.write_all(&good[good.len() - 1..]).unwrap();
        for at in 0..good.len() {
            for value in [good[at] ^ 0xff, 0x00, 0x7f] {
                file.seek(SeekFrom::Start(at as u64)).unwrap();
                file.write_all(&[value]).unwrap();
                let outcome = std::panic::catch_unwind(|| read_tensors(&path).map(|_| ()));
                assert!(
                    outcome.is_ok(),
                    "{name} with byte {at} set to {value:#04x} panicked"
                );
            }
            file.seek(SeekFrom::Start(at as u64)).unwrap();
            file.write_all(&good[at..=at]).unwrap();
        }
        assert!(read_tensors(&path).is_ok(), "{name} was not restored");
    }
    let good = fixture("data.csv");
    let path = put(&dir, "data.csv", &good);
    let mut file = std::fs::OpenOptions::new().write(true).open(&path).unwrap();
    for at in 0..good.len() {
        file.seek(SeekFrom::Start(at as u64)).unwrap();
        file.write_all(&[good[at] ^ 0x80]).unwrap();
        let outcome = std::panic::catch_unwind(|| read_data(&path, 2, 3).map(|_| ()));
        assert!(outcome.is_ok(), "data.csv with byte {at} changed panicked");
        file.seek(SeekFrom::Start(at as u64)).unwrap();
        file.write_all(&good[at..=at]).unwrap();
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

/// A stored member flagged as encrypted (bit 0 of the general-purpose flags, APPNOTE.TXT
/// §4.4.4) whose bytes are otherwise a valid array with a matching CRC-32: the zip reader asks
/// for a password and plumb refuses the archive naming the member — whether the archive is
/// read whole or streamed from the file a piece at a time (the streamed read must not take
/// what the whole-file read refuses). The flag sits at byte 6 of the local header, 8 of the
/// central one.
#[test]
fn a_member_flagged_encrypted_is_refused() {
    let dir = scratch("encrypted");
    for (name, flag_in) in [("both", [true, true]), ("central", [false, true])] {
        let mut bytes = zip_of(
            &[("w.npy", &fixture("c_f8.npy"))],
            CompressionMethod::Stored,
        );
        let central = find(&bytes, b"PK\x01\x02");
        for (at, on) in [6, central + 8].into_iter().zip(flag_in) {
            if on {
                bytes[at] |= 0x01;
            }
        }
        let path = put(&dir, &format!("{name}.npz"), &bytes);
        assert_has(&tensor_error(&path), &["member `w.npy`"]);
    }
    std::fs::remove_dir_all(&dir).unwrap();
}
