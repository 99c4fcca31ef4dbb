//! Hostile files against plumb's readers (DESIGN §3: no input, however malformed, may make plumb
//! panic, hang, or allocate much more than the input could need; every exit-2 message names the
//! file and the place, says what is wrong and how to fix it). Runs that could allocate far past
//! what their files hold run under an address-space limit (`ulimit -v`), so a regression is an
//! allocation failure (abort, exit 134) here, not a machine out of memory.

use crate::util;

use std::path::Path;
use std::process::Command;

use util::{Run, fixture, plumb, plumb_in, refused, scratch};

/// Runs plumb in `dir` under an address-space limit of `kib` KiB (the shell's `ulimit -v`).
fn limited(dir: &Path, kib: u64, args: &[&str]) -> Run {
    let mut c = Command::new("sh");
    c.arg("-c")
        .arg(format!("ulimit -v {kib} && exec \"$0\" \"$@\""))
        .arg(env!("CARGO_BIN_EXE_plumb"))
        .args(args)
        .current_dir(dir)
        .env("NO_COLOR", "1");
    util::run(c)
}

/// Half a GiB: plumb's own runs on these small files need a few tens of MiB.
const HALF_GIB: u64 = 512 << 10;

/// What is wrong with how a run ended, if anything: an abort for memory (exit 134; -1 when the
/// signal is seen), a panic (101), or an exit code other than `codes`; a refusal (2) must name
/// each of `names`.
fn ended_badly(what: &str, run: &Run, codes: &[i32], names: &[&str]) -> Option<String> {
    let starved = run.stderr.contains("memory allocation of") || run.stderr.contains("panicked");
    let unnamed = run.code == 2 && names.iter().any(|n| !run.stderr.contains(n));
    (starved || !codes.contains(&run.code) || unnamed).then(|| {
        let head: String = run.stderr.lines().take(2).collect::<Vec<_>>().join(" / ");
        format!("{what}: exit {}: {head}", run.code)
    })
}

/// Fails with every case that ended badly, not only the first.
fn all_ended_well(failures: Vec<Option<String>>) {
    let failures: Vec<String> = failures.into_iter().flatten().collect();
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

/// A safetensors file in the format's published layout (an 8-byte little-endian header length,
/// the JSON header, the data), the header text given as is so that it can hold what a JSON
/// writer would not write.
fn safetensors_bytes(header: &str, data: &[u8]) -> Vec<u8> {
    let mut out = (header.len() as u64).to_le_bytes().to_vec();
    out.extend_from_slice(header.as_bytes());
    out.extend_from_slice(data);
    out
}

/// fixtures/malformed/inflates.npz (generate_hostile.py; NumPy's np.load reads its `notes` member
/// as 10^8 bools): about 100 KB whose unused member inflates to 100 MB, 800 MB once widened to
/// f64. Neither a shape audit nor a data file's reader needs that member's values: reading it
/// whole cost 907 MB here, and aborted under the limit.
#[test]
fn a_member_nothing_uses_is_not_inflated_and_widened() {
    let dir = fixture("");
    let names = ["inflates.npz", "notes.npy"];
    let file = "malformed/inflates.npz";
    let shapes = limited(&dir, HALF_GIB, &["shapes", "nets/small.toml", "-w", file]);
    let grad = limited(&dir, HALF_GIB, &["grad", "nets/small.toml", "-d", file]);
    let audit = limited(&dir, HALF_GIB, &["audit", "nets/small.toml", "-w", file]);
    let compare = limited(&dir, HALF_GIB, &["compare", "nets/small.toml", "-g", file]);
    let mut failures = vec![
        // Its tensors are not small.toml's (exit 1), or the member is refused by name (exit 2).
        ended_badly("shapes -w inflates.npz", &shapes, &[1, 2], &names),
        // x and y are good data for small.toml: used (exit 0), or the stray member refused.
        ended_badly("grad -d inflates.npz", &grad, &[0, 2], &names),
        // None of its tensors fits (exit 2, naming the file); as a gradient, `y` holds integers.
        ended_badly("audit -w inflates.npz", &audit, &[2], &["inflates.npz"]),
        ended_badly("compare -g inflates.npz", &compare, &[2], &["inflates.npz"]),
    ];
    // The audit lists the member from its header: the shape NumPy's np.load gives it.
    if !shapes.stdout.contains("(100000000,)") {
        failures.push(Some(format!(
            "shapes lists no (100000000,): {}",
            shapes.stdout
        )));
    }
    all_ended_well(failures);
}

/// A member no command uses is listed from its NPY header, not read; a header that no reader can
/// take is still refused naming the file and the member (generate_hostile.py; NumPy's np.load
/// refuses both members too): Python objects ('|O') in a deflated archive, and in a stored one
/// (read a piece at a time) a header declaring 8,000 bytes of data where the member holds 80.
#[test]
fn an_unused_member_with_a_hostile_header_is_refused_by_name() {
    let dir = fixture("");
    let mut failures = Vec::new();
    for (file, words) in [
        ("stray-object.npz", "'|O'"),
        ("stray-short.npz", "8000 bytes"),
    ] {
        let path = format!("malformed/{file}");
        for args in [
            ["shapes", "nets/small.toml", "-w", &path],
            ["grad", "nets/small.toml", "-w", &path],
            ["grad", "nets/small.toml", "-d", &path],
        ] {
            let run = limited(&dir, HALF_GIB, &args);
            let what = format!("{} {} {file}", args[0], args[2]);
            failures.push(ended_badly(&what, &run, &[2], &[file, "notes.npy", words]));
        }
    }
    all_ended_well(failures);
}

/// 200,000 one-element tensors, 17 MB of safetensors: the shape audit lists each as unexpected,
/// which cost 984 MB (58 times the file) and aborted under the limit.
#[test]
fn a_file_of_many_unexpected_tensors_costs_about_its_size() {
    let dir = scratch("many-tensors");
    let n = 200_000;
    let entries: Vec<String> = (0..n)
        .map(|i| {
            format!(
                "\"t{i}\":{{\"dtype\":\"F64\",\"shape\":[1],\"data_offsets\":[{},{}]}}",
                8 * i,
                8 * i + 8
            )
        })
        .collect();
    let header = format!("{{{}}}", entries.join(","));
    std::fs::write(
        dir.join("many.safetensors"),
        safetensors_bytes(&header, &vec![0u8; 8 * n]),
    )
    .unwrap();
    std::fs::copy(fixture("nets/small.toml"), dir.join("small.toml")).unwrap();
    let run = limited(
        &dir,
        HALF_GIB,
        &["shapes", "small.toml", "-w", "many.safetensors"],
    );
    all_ended_well(vec![ended_badly(
        "shapes -w many.safetensors",
        &run,
        &[1],
        &[],
    )]);
}

/// Descriptions of a hundred bytes whose passes need far more than the activation budget the
/// layers' outputs are counted against (`MAX_ACTIVATION_VALUES`, 2^27 values): a conv1d's window
/// matrix (1,024 taps × 64,513 positions × 32 samples: one request of 16.9 GB) and an attention
/// layer's scores (4,000² per sample × 32: one request of 4.1 GB). Each must be refused naming
/// the description (exit 2) before it is allocated, or run within what it needs.
#[test]
fn what_a_layer_holds_during_a_pass_is_budgeted_before_it_is_allocated() {
    let dir = scratch("workspace");
    let cases = [
        (
            "window.toml",
            "input = [1, 65536]\nloss = \"squared-error\"\n[[layer]]\nkind = \"conv1d\"\nchannels = 1\nkernel = 1024\n[[layer]]\nkind = \"global-avg-pool\"\n[[layer]]\nunits = 1\nactivation = \"identity\"\n",
        ),
        (
            "scores.toml",
            "input = { steps = 4000, features = 1 }\nloss = \"squared-error\"\n[[layer]]\nkind = \"attention\"\nheads = 1\n[[layer]]\nkind = \"rnn\"\nunits = 1\n[[layer]]\nunits = 1\nactivation = \"identity\"\n",
        ),
    ];
    let failures = cases
        .into_iter()
        .map(|(name, text)| {
            std::fs::write(dir.join(name), text).unwrap();
            let run = limited(&dir, 2 * HALF_GIB, &["grad", name, "--quiet"]);
            ended_badly(name, &run, &[0, 2], &[name])
        })
        .collect();
    all_ended_well(failures);
}

/// One sample of 10^7 steps through an rnn of one unit: 80 MB of input, and a trace of a few
/// values per step (h and its pre-activation: 160 MB more). `grad --batch 1` took 1.65 GB (about
/// 165 bytes a step) and 17 s, `check` over 60 s; under 1 GiB it aborted. Refused naming the
/// description, or run within what its values need.
#[test]
fn an_rnn_over_ten_million_steps_holds_what_its_trace_needs() {
    let dir = scratch("steps");
    std::fs::write(
        dir.join("steps.toml"),
        "input = { steps = 10000000, features = 1 }\nloss = \"squared-error\"\n[[layer]]\nkind = \"rnn\"\nunits = 1\n[[layer]]\nunits = 1\nactivation = \"identity\"\n",
    )
    .unwrap();
    let run = limited(
        &dir,
        2 * HALF_GIB,
        &["grad", "steps.toml", "--batch", "1", "--quiet"],
    );
    all_ended_well(vec![ended_badly(
        "steps.toml",
        &run,
        &[0, 2],
        &["steps.toml"],
    )]);
}

/// Bytes from a file are quoted in messages and tables; a control character among them (an
/// escape sequence that clears the screen or retitles the terminal) must not reach the terminal
/// as is. Under NO_COLOR plumb writes no escape of its own.
#[test]
fn control_characters_from_files_are_not_echoed_raw() {
    let dir = scratch("control-chars");
    // TOML's own escapes put ESC and BEL in a key and a string.
    std::fs::write(
        dir.join("key.toml"),
        "input = [4]\nloss = \"squared-error\"\n[[layer]]\n\"\\u001b[2J\" = 1\nunits = 1\nactivation = \"identity\"\n",
    )
    .unwrap();
    std::fs::write(
        dir.join("from.toml"),
        "input = [4]\nloss = \"squared-error\"\n[[layer]]\nunits = 4\nactivation = \"identity\"\n[[layer]]\nkind = \"add\"\nfrom = \"\\u001b]0;title\\u0007\"\n",
    )
    .unwrap();
    std::fs::write(
        dir.join("data.csv"),
        "f1,f2,f3,f4,label\n1,2,3,\u{1b}[2J\u{1b}[31mx,0\n",
    )
    .unwrap();
    std::fs::write(
        dir.join("names.safetensors"),
        safetensors_bytes(
            // JSON's escapes: a raw control character in a JSON string is itself an error.
            "{\"\\u001b[2J\\u001b[31mx\":{\"dtype\":\"F64\",\"shape\":[1],\"data_offsets\":[0,8]}}",
            &[0; 8],
        ),
    )
    .unwrap();
    std::fs::copy(fixture("nets/small.toml"), dir.join("small.toml")).unwrap();
    let runs = [
        ("key.toml", plumb_in(&dir, &["shapes", "key.toml"])),
        ("from.toml", plumb_in(&dir, &["shapes", "from.toml"])),
        (
            "data.csv",
            plumb_in(&dir, &["grad", "small.toml", "-d", "data.csv"]),
        ),
        (
            "names.safetensors",
            plumb_in(&dir, &["shapes", "small.toml", "-w", "names.safetensors"]),
        ),
    ];
    let mut failures = Vec::new();
    for (file, run) in runs {
        // A refusal names the file on stderr; a shape audit's report names it on stdout.
        failures.push(ended_badly(file, &run, &[1, 2], &[file]));
        if run.code == 1 && !run.stdout.contains(file) {
            failures.push(Some(format!("{file}: the report does not name the file")));
        }
        for (stream, text) in [("stderr", &run.stderr), ("stdout", &run.stdout)] {
            if let Some(line) = text.lines().find(|l| l.contains(['\u{1b}', '\u{7}'])) {
                failures.push(Some(format!(
                    "{file}: a control character from the file is on {stream}: {line:?}"
                )));
            }
        }
    }
    all_ended_well(failures);
}

/// The shards of a check in `dir` on its copy of small.toml, written there as a.json and b.json.
fn shards_in(dir: &Path) {
    std::fs::copy(fixture("nets/small.toml"), dir.join("net.toml")).unwrap();
    for (k, file) in [("1/2", "a.json"), ("2/2", "b.json")] {
        let run = plumb_in(
            dir,
            &[
                "check", "net.toml", "--seed", "4", "--shard", k, "--format", "json", "--quiet",
            ],
        );
        run.assert_code(0);
        std::fs::write(dir.join(file), &run.stdout).unwrap();
    }
}

/// `plumb merge` reads the description its shards name: that file is an input of the run, which
/// every other command refuses to replace even with --force. Merge replaced it with JUnit XML.
#[test]
fn merge_never_replaces_the_description_it_reads() {
    let dir = scratch("merge-input");
    shards_in(&dir);
    let before = std::fs::read_to_string(dir.join("net.toml")).unwrap();
    let run = plumb_in(
        &dir,
        &[
            "merge", "a.json", "b.json", "--junit", "net.toml", "--force", "--quiet",
        ],
    );
    let after = std::fs::read_to_string(dir.join("net.toml")).unwrap();
    assert!(
        after == before,
        "merge (exit {}) replaced the description it read; it now starts {:?}",
        run.code,
        after.lines().next().unwrap_or_default()
    );
    refused(&run, &["net.toml", "input of the run"]);
}

/// A merge run where the shards' relative description path does not resolve: the message named
/// only `net.toml` ("No such file or directory"), not the shard that recorded it nor that a
/// merge runs where the check ran.
#[test]
fn merge_names_the_shard_that_records_a_missing_description() {
    let dir = scratch("merge-elsewhere");
    shards_in(&dir);
    let elsewhere = scratch("merge-elsewhere-run");
    let (a, b) = (dir.join("a.json"), dir.join("b.json"));
    let run = plumb_in(
        &elsewhere,
        &["merge", a.to_str().unwrap(), b.to_str().unwrap(), "--quiet"],
    );
    refused(&run, &["net.toml"]);
    assert!(
        run.stderr.contains("a.json") || run.stderr.contains("b.json"),
        "no shard named: {}",
        run.stderr
    );
}

/// A safetensors header naming `layer1` twice: JSON keeps the last, and the message blamed the
/// data offsets ("invalid offset for tensor `layer1`") instead of the repeated name.
#[test]
fn a_name_twice_in_a_safetensors_header_is_called_so() {
    let dir = scratch("st-twice");
    let header = "{\"layer1\":{\"dtype\":\"F64\",\"shape\":[5,5],\"data_offsets\":[0,200]},\"layer1\":{\"dtype\":\"F64\",\"shape\":[3,6],\"data_offsets\":[200,344]}}";
    std::fs::write(
        dir.join("header.safetensors"),
        safetensors_bytes(header, &[0; 344]),
    )
    .unwrap();
    std::fs::copy(fixture("nets/small.toml"), dir.join("small.toml")).unwrap();
    let run = plumb_in(&dir, &["shapes", "small.toml", "-w", "header.safetensors"]);
    refused(&run, &["header.safetensors", "layer1"]);
    assert!(
        ["twice", "duplicate", "same name"]
            .iter()
            .any(|w| run.stderr.contains(w)),
        "the repeated name is not what the message says: {}",
        run.stderr
    );
}

/// A quote opened in a field and never closed swallows the rest of the file into that field;
/// the message counted the fields that were left ("3 fields where the header has 5") instead of
/// naming the open quote, which plumb's reader has its own message for.
#[test]
fn an_unclosed_quote_is_named_not_counted_as_fields() {
    let dir = scratch("csv-quote");
    std::fs::write(
        dir.join("field.csv"),
        "f1,f2,f3,f4,label\n1,2,\"3,4,0\n1,2,3,4,1\n",
    )
    .unwrap();
    std::fs::copy(fixture("nets/small.toml"), dir.join("small.toml")).unwrap();
    let run = plumb_in(&dir, &["grad", "small.toml", "-d", "field.csv"]);
    refused(&run, &["field.csv", "quote"]);
}

/// An NPY header declaring (0, 2^32, 2^32): no values at all, read in C order as an empty tensor
/// of that shape; in Fortran order the same header was refused with ndarray's own words
/// ("ShapeError/Overflow: arithmetic overflow") and no tensor name. One header, one reading.
#[test]
fn an_empty_shape_reads_alike_in_both_orders() {
    let dir = scratch("npy-orders");
    std::fs::copy(fixture("nets/small.toml"), dir.join("small.toml")).unwrap();
    let mut codes = Vec::new();
    for (file, fortran) in [("c.npy", "False"), ("f.npy", "True")] {
        // NPY 1.0 (NumPy's format description): magic, version, header length, the dict.
        let dict = format!(
            "{{'descr': '<f8', 'fortran_order': {fortran}, 'shape': (0, 4294967296, 4294967296), }}\n"
        );
        let mut bytes = b"\x93NUMPY\x01\x00".to_vec();
        bytes.extend_from_slice(&(dict.len() as u16).to_le_bytes());
        bytes.extend_from_slice(dict.as_bytes());
        std::fs::write(dir.join(file), bytes).unwrap();
        let run = plumb_in(&dir, &["shapes", "small.toml", "-w", file]);
        assert!(!run.stderr.contains("ShapeError"), "{file}: {}", run.stderr);
        codes.push(run.code);
    }
    assert_eq!(codes[0], codes[1], "C order and Fortran order read apart");
}

/// `sweep --coords` with one coordinate given again and again: each repeat was swept and reported
/// (20,000 repeats of `1:0:0` on small.toml's 43 parameters: 20.5 s and 766 MB). `--map` refuses
/// a name given twice; a repeated coordinate is refused naming it, or swept once.
#[test]
fn a_coordinate_given_twice_is_swept_once_or_refused() {
    let coords = ["1:0:0"; 3].join(",");
    let run = plumb(&[
        "sweep",
        "nets/small.toml",
        "--coords",
        &coords,
        "--format",
        "json",
        "--quiet",
    ]);
    if run.code == 2 {
        refused(&run, &["1:0:0"]);
        return;
    }
    run.assert_code(0);
    let swept = run.json()["coordinates"].as_array().map(Vec::len);
    assert_eq!(swept, Some(1), "one coordinate, swept {swept:?} times");
}

/// A layer named `input` under the augmented layout owns a tensor `input`, the name a gradient
/// file reserves for the input gradient (DESIGN §5): `grad -o` wrote a file that `compare -g` on
/// the same description refused (its parameter read as an input gradient of the wrong shape),
/// and `grad -o --input-gradient` failed at the write, after the work. The name is refused by
/// the description, naming its line, or the round trip holds.
#[test]
fn a_layer_named_input_does_not_break_the_gradient_round_trip() {
    let dir = scratch("named-input");
    std::fs::write(
        dir.join("net.toml"),
        "input = [4]\nloss = \"squared-error\"\n[[layer]]\nname = \"input\"\nunits = 1\nactivation = \"identity\"\n",
    )
    .unwrap();
    let run = plumb_in(&dir, &["grad", "net.toml", "-o", "g.npz", "--quiet"]);
    if run.code == 2 {
        refused(&run, &["net.toml:4", "input"]);
        return;
    }
    run.assert_code(0);
    let run = plumb_in(&dir, &["compare", "net.toml", "-g", "g.npz", "--quiet"]);
    run.assert_code(0);
    let run = plumb_in(
        &dir,
        &[
            "grad",
            "net.toml",
            "-o",
            "gi.npz",
            "--input-gradient",
            "--quiet",
        ],
    );
    run.assert_code(0);
}

/// Good small files for small.toml, each followed by a gigabyte of zeros (a sparse file: no
/// disk is written): the NPY header declares 200 bytes of data, the safetensors header 344, and
/// the zip's end record is no longer at the end. Each was read whole into one allocation of the
/// file's length before its header was looked at, which aborted under the limit; each header
/// says from its first bytes that the rest cannot be right. Refused naming the file (exit 2).
#[test]
fn a_file_far_longer_than_its_header_declares_is_refused_before_it_is_read() {
    let dir = scratch("long-files");
    std::fs::copy(fixture("nets/small.toml"), dir.join("small.toml")).unwrap();
    // NPY 1.0 (NumPy's format description) and safetensors (its published layout), by hand.
    let dict = "{'descr': '<f8', 'fortran_order': False, 'shape': (5, 5), }";
    let mut npy = b"\x93NUMPY\x01\x00".to_vec();
    let padded = format!("{dict:<117}\n");
    npy.extend_from_slice(&(padded.len() as u16).to_le_bytes());
    npy.extend_from_slice(padded.as_bytes());
    npy.extend_from_slice(&[0; 200]);
    let header = "{\"layer1\":{\"dtype\":\"F64\",\"shape\":[5,5],\"data_offsets\":[0,200]},\"layer2\":{\"dtype\":\"F64\",\"shape\":[3,6],\"data_offsets\":[200,344]}}";
    let st = safetensors_bytes(header, &[0; 344]);
    let npz = std::fs::read(fixture("weights/small-augmented.npz")).unwrap();
    let mut failures = Vec::new();
    for (file, bytes) in [
        ("long.npy", npy),
        ("long.safetensors", st),
        ("long.npz", npz),
    ] {
        let path = dir.join(file);
        std::fs::write(&path, &bytes).unwrap();
        let f = std::fs::OpenOptions::new().write(true).open(&path).unwrap();
        f.set_len(1 << 30).unwrap();
        let run = limited(&dir, HALF_GIB, &["shapes", "small.toml", "-w", file]);
        failures.push(ended_badly(file, &run, &[2], &[file]));
    }
    all_ended_well(failures);
}

/// Twelve class labels for a network of 2^25 − 1 classes (input 1, one softmax layer: within
/// `MAX_PARAMETERS`): one-hot, y is 12 × 33,554,431 values, 3.2 GB, from an 83-byte CSV or a
/// 682-byte NPZ (fixtures/malformed/labels.npz, generate_hostile.py). The rows were built before
/// any budget was asked (2.4 GB, then the allocator's refusal, for the CSV; 3.4 GB, then the
/// activation budget's refusal, for the NPZ). The labels' count is known from the file before a
/// row is built: refused naming the data file or the description (exit 2) within the limit.
#[test]
fn one_hot_rows_are_budgeted_before_they_are_built() {
    let dir = scratch("one-hot");
    std::fs::write(
        dir.join("wide.toml"),
        "input = 1\nloss = \"cross-entropy\"\n[[layer]]\nunits = 33554431\nactivation = \"softmax\"\n",
    )
    .unwrap();
    let rows: String = (0..12).map(|k| format!("0.5,{k}\n")).collect();
    std::fs::write(dir.join("labels.csv"), format!("x,label\n{rows}")).unwrap();
    std::fs::copy(fixture("malformed/labels.npz"), dir.join("labels.npz")).unwrap();
    let failures = ["labels.csv", "labels.npz"]
        .into_iter()
        .map(|data| {
            let run = limited(&dir, 2 * HALF_GIB, &["grad", "wide.toml", "-d", data]);
            let named = run.stderr.contains(data) || run.stderr.contains("wide.toml");
            ended_badly(data, &run, &[2], &[])
                .or_else(|| (!named).then(|| format!("{data}: names no file: {}", run.stderr)))
        })
        .collect();
    all_ended_well(failures);
}

/// An archive of no members (the 22-byte end record alone, as the zip format lays it out): the
/// audit's refusal read "none of its tensors fits small.toml in any layout (it holds )", the
/// list of what the file holds left blank. It holds no tensors, and the message says so.
#[test]
fn an_empty_archive_is_called_empty_by_the_audit() {
    let dir = scratch("empty-archive");
    std::fs::copy(fixture("nets/small.toml"), dir.join("small.toml")).unwrap();
    let mut end = b"PK\x05\x06".to_vec();
    end.extend_from_slice(&[0; 18]);
    std::fs::write(dir.join("none.npz"), end).unwrap();
    let run = plumb_in(&dir, &["audit", "small.toml", "-w", "none.npz"]);
    refused(&run, &["none.npz"]);
    assert!(!run.stderr.contains("holds )"), "{}", run.stderr);
}

/// A safetensors file of float64 tensors (name, shape, every value), in the published layout.
fn safetensors_f64(tensors: &[(&str, &[usize], f64)]) -> Vec<u8> {
    let (mut entries, mut data) = (Vec::new(), Vec::new());
    for (name, shape, value) in tensors {
        let n: usize = shape.iter().product();
        let dims: Vec<String> = shape.iter().map(usize::to_string).collect();
        entries.push(format!(
            "\"{name}\":{{\"dtype\":\"F64\",\"shape\":[{}],\"data_offsets\":[{},{}]}}",
            dims.join(","),
            data.len(),
            data.len() + 8 * n
        ));
        for _ in 0..n {
            data.extend_from_slice(&value.to_le_bytes());
        }
    }
    safetensors_bytes(&format!("{{{}}}", entries.join(",")), &data)
}

/// `input = { tokens, vocabulary }` read by a batch-norm, then an embedding: the description
/// was accepted (a dense layer there is refused: token ids are not features), the norm's output
/// kept the "token ids" shape, and the embedding looked its table up at the normalised values.
/// With the norm's scale 100 and shift 50 from a weight file, `grad`, `check` and `audit`
/// panicked (crates/engine/src/graph/embedding.rs:107, `index < dim`); with shift −500 every id
/// read as 0 and the run passed. Refused naming the description's line (exit 2), never a panic.
#[test]
fn a_norm_over_token_ids_is_refused_not_looked_up() {
    let dir = scratch("norm-tokens");
    std::fs::write(
        dir.join("net.toml"),
        "input = { tokens = 3, vocabulary = 4 }\nloss = \"squared-error\"\n[[layer]]\nkind = \"batch-norm\"\n[[layer]]\nkind = \"embedding\"\nsize = 2\n[[layer]]\nkind = \"flatten\"\n[[layer]]\nunits = 1\nactivation = \"identity\"\n",
    )
    .unwrap();
    std::fs::write(
        dir.join("w.safetensors"),
        safetensors_f64(&[
            ("layer1.scale", &[3], 100.0),
            ("layer1.shift", &[3], 50.0),
            ("layer2.table", &[4, 2], 1.0),
            ("layer4", &[1, 7], 1.0),
        ]),
    )
    .unwrap();
    let failures = ["grad", "check", "audit"]
        .into_iter()
        .map(|command| {
            let run = plumb_in(&dir, &[command, "net.toml", "-w", "w.safetensors"]);
            ended_badly(command, &run, &[2], &["net.toml"])
        })
        .collect();
    all_ended_well(failures);
    let run = plumb_in(&dir, &["shapes", "net.toml"]);
    refused(&run, &["net.toml:4", "batch-norm"]);
}

/// A shard cut in the middle of its JSON, and one whose coordinate index is negative: the
/// messages named the file and quoted the JSON reader ("EOF while parsing an object at line
/// 366", "invalid value: integer `-1`, expected usize") but said nothing of what to do.
/// The other refusals of a shard end "run the check again" or say the shard was edited.
#[test]
fn a_damaged_shard_says_how_to_get_a_good_one() {
    let dir = scratch("damaged-shard");
    shards_in(&dir);
    let b = std::fs::read_to_string(dir.join("b.json")).unwrap();
    std::fs::write(dir.join("cut.json"), &b[..b.len() / 2]).unwrap();
    let mut v: serde_json::Value = serde_json::from_str(&b).unwrap();
    v["coordinates"][0]["index"] = (-1).into();
    std::fs::write(dir.join("negative.json"), v.to_string()).unwrap();
    let failures = ["cut.json", "negative.json"]
        .into_iter()
        .map(|file| {
            let run = plumb_in(&dir, &["merge", "a.json", file, "--quiet"]);
            let fix = ["again", "edited"].iter().any(|w| run.stderr.contains(w));
            ended_badly(file, &run, &[2], &[file]).or_else(|| {
                (!fix).then(|| format!("{file}: no way to a good shard in: {}", run.stderr))
            })
        })
        .collect();
    all_ended_well(failures);
}

/// An output in a directory that does not exist was found out only when the report was written,
/// after the whole run (7.9 s of a check on a 1,000-layer network here, its report then lost):
/// `check_outputs` refuses an existing file before any work, not a missing directory. With
/// weights that are themselves refused at loading, the output is what a run refuses first, as it
/// is for an output that exists.
#[test]
fn an_output_in_a_missing_directory_is_refused_before_any_work() {
    let dir = scratch("missing-dir");
    let missing = dir.join("no-such-dir");
    let junit = missing.join("j.xml");
    let out = missing.join("g.npz");
    let int_weights = fixture("weights/mistakes/dtype-not-float.npz");
    let failures = [
        ("--junit", junit.to_str().unwrap()),
        ("-o", out.to_str().unwrap()),
    ]
    .into_iter()
    .map(|(flag, path)| {
        let run = plumb(&[
            "grad",
            "nets/small.toml",
            "-w",
            int_weights.to_str().unwrap(),
            flag,
            path,
        ]);
        ended_badly(flag, &run, &[2], &[path])
    })
    .collect();
    all_ended_well(failures);
}

/// fixtures/malformed/samples.npz (generate_hostile.py; np.load reads x as (25000000, 4) bool and
/// y as (25000000,) int8): 120 KB whose arrays declare 25 million samples, a batch the activation
/// budget refuses (6 × 10^8 values for small.toml) whatever is done with them. They were inflated
/// and widened first (1.59 GB, 3.9 s), then refused; under the limit, an abort. The headers say
/// how many samples there are before a byte of data is inflated.
#[test]
fn a_batch_past_the_budget_is_refused_from_its_headers() {
    let run = limited(
        &fixture(""),
        HALF_GIB,
        &["grad", "nets/small.toml", "-d", "malformed/samples.npz"],
    );
    let named = run.stderr.contains("samples.npz") || run.stderr.contains("small.toml");
    all_ended_well(vec![
        ended_badly("grad -d samples.npz", &run, &[2], &[])
            .or_else(|| (!named).then(|| format!("names no file: {}", run.stderr))),
    ]);
}

/// small.toml with every weight 10^5, on data/small.csv: each output unit has the same row and
/// bias, so the logits tie and the softmax is 1/3 everywhere; the loss's gradient in an output
/// bias is then mean(p_k − y_k) = 1/3 − (share of class k) (softmax with cross-entropy, Bishop,
/// Pattern Recognition and Machine Learning, 2006, eq. 4.109), which the reference gives. The
/// check found the bias coordinates unsettled — central differences with a step scaled to 10^5
/// cannot resolve them — and still failed the tensor on a random direction
/// ("direction-mismatch layer2"; seeds 2 to 5 of the synthetic batch as well): a false alarm on
/// a right gradient, which must pass or be inconclusive (DESIGN §3, §6).
#[test]
fn large_equal_weights_are_no_false_alarm() {
    let dir = scratch("equal-weights");
    std::fs::write(
        dir.join("w.safetensors"),
        safetensors_f64(&[("layer1", &[5, 5], 1e5), ("layer2", &[3, 6], 1e5)]),
    )
    .unwrap();
    let csv = fixture("data/small.csv");
    let text = std::fs::read_to_string(&csv).unwrap();
    let labels: Vec<usize> = text
        .lines()
        .skip(1)
        .map(|l| l.rsplit(',').next().unwrap().trim().parse().unwrap())
        .collect();
    let w = dir.join("w.safetensors");
    let run = plumb(&[
        "check",
        "nets/small.toml",
        "-w",
        w.to_str().unwrap(),
        "-d",
        csv.to_str().unwrap(),
        "--worst",
        "43",
        "--format",
        "json",
        "--quiet",
    ]);
    let report = run.json();
    // The reference is right at this point: the output biases (augmented column 0).
    let worst = report["worst"].as_array().unwrap();
    for k in 0..3 {
        let share = labels.iter().filter(|&&c| c == k).count() as f64 / labels.len() as f64;
        let bias = worst
            .iter()
            .find(|c| c["tensor"] == "layer2" && c["index"] == 6 * k)
            .unwrap_or_else(|| panic!("layer2[{}] not listed", 6 * k));
        let analytic = bias["analytic"].as_f64().unwrap();
        assert!(
            (analytic - (1.0 / 3.0 - share)).abs() < 1e-12,
            "bias {k}: {analytic}"
        );
    }
    let alarms: Vec<&serde_json::Value> = util::findings(&report)
        .iter()
        .filter(|f| f["code"].as_str().unwrap_or_default().contains("mismatch"))
        .collect();
    assert!(
        report["verdict"] != "fail" && alarms.is_empty(),
        "a right gradient failed: {alarms:?}"
    );
}

/// A float64 weight file holding 10^39, finite in f64 and past f32's largest finite value
/// (about 3.4 × 10^38, IEEE 754 binary32), checked with `--precision f32`: the weights became
/// infinite, every loss NaN, and the check failed all 43 coordinates as mismatches ("analytic
/// NaN, numeric NaN, relative error 0, relative bound 0"). Non-finite weights are refused at
/// loading (exit 2, naming the tensor); weights f32 cannot hold are refused the same way, or
/// the run is inconclusive — never a failure nobody's gradient caused.
#[test]
fn weights_past_f32_are_no_mismatch_in_f32() {
    let dir = scratch("past-f32");
    std::fs::write(
        dir.join("w.safetensors"),
        safetensors_f64(&[("layer1", &[5, 5], 1e39), ("layer2", &[3, 6], 0.5)]),
    )
    .unwrap();
    let w = dir.join("w.safetensors");
    let run = plumb(&[
        "check",
        "nets/small.toml",
        "-w",
        w.to_str().unwrap(),
        "--precision",
        "f32",
        "--format",
        "json",
        "--quiet",
    ]);
    if run.code == 2 {
        refused(&run, &["w.safetensors", "layer1"]);
        return;
    }
    let report = run.json();
    let alarms: Vec<&serde_json::Value> = util::findings(&report)
        .iter()
        .filter(|f| f["code"].as_str().unwrap_or_default().contains("mismatch"))
        .collect();
    assert!(
        report["verdict"] != "fail" && alarms.is_empty(),
        "weights f32 cannot hold failed the check: {} findings, the first {:?}",
        alarms.len(),
        alarms.first()
    );
}

/// The same for data: a CSV feature of 10^39 (finite in f64, past f32's range) made the f32
/// check fail layer1 (5 of 25 coordinates and the random directions "disagree") where the f64
/// check of the same file passes. Refused naming the file and line, or no mismatch.
#[test]
fn data_past_f32_is_no_mismatch_in_f32() {
    let dir = scratch("data-past-f32");
    std::fs::write(
        dir.join("big.csv"),
        "f1,f2,f3,f4,label\n1e39,2,3,4,0\n1,2,3,4,1\n",
    )
    .unwrap();
    std::fs::copy(fixture("nets/small.toml"), dir.join("small.toml")).unwrap();
    let run = plumb_in(
        &dir,
        &[
            "check",
            "small.toml",
            "-d",
            "big.csv",
            "--precision",
            "f32",
            "--format",
            "json",
            "--quiet",
        ],
    );
    if run.code == 2 {
        refused(&run, &["big.csv", "line 2"]);
        return;
    }
    let report = run.json();
    let alarms = util::findings(&report)
        .iter()
        .filter(|f| f["code"].as_str().unwrap_or_default().contains("mismatch"))
        .count();
    assert!(
        report["verdict"] != "fail" && alarms == 0,
        "data f32 cannot hold failed the check with {alarms} mismatch findings"
    );
}

/// A squared-error target of 10^20 is finite in f32, its square is not; 10^160 the same in f64.
/// The loss was infinite (written as null), every numeric derivative too, and the check failed
/// all 13 coordinates as mismatches against finite analytic values (in f64 the 10^20 file is
/// inconclusive; `grad` says "non-finite-loss" for 10^160). A loss the precision cannot hold is
/// said so (exit 2), or the check is inconclusive: it is not the gradient that is wrong.
#[test]
fn a_loss_past_the_precision_is_no_mismatch() {
    let dir = scratch("loss-past-range");
    std::fs::write(
        dir.join("net.toml"),
        "inputs = 2\nloss = \"squared-error\"\n[[layer]]\nunits = 3\nactivation = \"tanh\"\n[[layer]]\nunits = 1\nactivation = \"identity\"\n",
    )
    .unwrap();
    let mut failures = Vec::new();
    for (precision, file, target) in [("f32", "far32.csv", "1e20"), ("f64", "far64.csv", "1e160")] {
        std::fs::write(dir.join(file), format!("a,b,y\n1,2,{target}\n0.5,1,2\n")).unwrap();
        let run = plumb_in(
            &dir,
            &[
                "check",
                "net.toml",
                "-d",
                file,
                "--precision",
                precision,
                "--format",
                "json",
                "--quiet",
            ],
        );
        if run.code == 2 {
            failures.push(ended_badly(file, &run, &[2], &[file]));
            continue;
        }
        let report = run.json();
        let alarms = util::findings(&report)
            .iter()
            .filter(|f| f["code"].as_str().unwrap_or_default().contains("mismatch"))
            .count();
        if report["verdict"] == "fail" || alarms > 0 {
            failures.push(Some(format!(
                "{precision}, target {target}: {alarms} mismatch findings (loss {})",
                report["loss"]
            )));
        }
    }
    all_ended_well(failures);
}

/// fixtures/nets/pump-sequence.toml (an lstm, then the `classes` dense layer) with every weight
/// 10^30: the logits of the three classes tie at about 10^31, and at any step a weight of 10^30
/// can take the loss is a maximum of them — a kink the engine does not model. The softmax
/// cross-entropy's gradient in an output bias is mean(p_k − y_k) (Bishop, Pattern Recognition
/// and Machine Learning, 2006, eq. 4.109), which the reference gives; central differences across
/// the tie agree at h and 2h (the loss is piecewise linear there), so their bound was tiny and
/// `classes` failed on three biases and four directions. A right gradient passes or is
/// inconclusive, its unresolvable coordinates unreliable.
#[test]
fn tied_logits_at_huge_weights_are_no_false_alarm() {
    let dir = scratch("tied-logits");
    let net = fixture("nets/pump-sequence.toml");
    let shapes = plumb(&[
        "shapes",
        net.to_str().unwrap(),
        "--format",
        "json",
        "--quiet",
    ]);
    let report = shapes.json();
    let mut tensors: Vec<(String, Vec<usize>)> = Vec::new();
    for layer in report["layers"].as_array().unwrap() {
        for t in layer["tensors"].as_array().unwrap() {
            let shape = t["expected"].as_array().unwrap();
            tensors.push((
                t["name"].as_str().unwrap().to_string(),
                shape.iter().map(|d| d.as_u64().unwrap() as usize).collect(),
            ));
        }
    }
    let list: Vec<(&str, &[usize], f64)> = tensors
        .iter()
        .map(|(n, s)| (n.as_str(), s.as_slice(), 1e30))
        .collect();
    std::fs::write(dir.join("w.safetensors"), safetensors_f64(&list)).unwrap();
    let w = dir.join("w.safetensors");
    let run = plumb(&[
        "check",
        net.to_str().unwrap(),
        "-w",
        w.to_str().unwrap(),
        "--format",
        "json",
        "--quiet",
    ]);
    let report = run.json();
    let alarms: Vec<&serde_json::Value> = util::findings(&report)
        .iter()
        .filter(|f| f["code"].as_str().unwrap_or_default().contains("mismatch"))
        .collect();
    assert!(
        report["verdict"] != "fail" && alarms.is_empty(),
        "a right gradient failed: {alarms:?}"
    );
}
