//! `plumb check --shard K/N` and `plumb merge` on descriptions of other kinds than dense (the
//! layer graph): the merged report is the unsharded run's, and an edited shard — a coordinate
//! dropped or repeated, a tensor the description does not have, an index outside its tensor,
//! another split, another description — is refused with exit 2 naming the file and what is wrong.
//! The reference is plumb's own unsharded run: what is tested is that splitting and joining
//! change nothing.

use crate::util;

use std::path::Path;

use serde_json::Value;
use util::{fixture, merge, plumb, refused, scratch, write};

/// `plumb check` on `args` with `--format json`, exit 0 or 1 as its verdict says.
fn check(args: &[&str]) -> (i32, Value) {
    let mut all = vec!["check", "--format", "json", "--quiet", "--seed", "3"];
    all.extend_from_slice(args);
    let run = plumb(&all);
    assert!(
        run.code == 0 || run.code == 1,
        "exit {}: {}",
        run.code,
        run.stderr
    );
    (run.code, run.json())
}

/// The N shards of a check, written to `dir`; their paths.
fn shards(dir: &Path, args: &[&str], n: usize) -> Vec<String> {
    (1..=n)
        .map(|k| {
            let spec = format!("{k}/{n}");
            let mut a = args.to_vec();
            a.extend(["--shard", &spec]);
            let (_, v) = check(&a);
            write(dir, &format!("shard{k}.json"), &v)
        })
        .collect()
}

/// The merge of a conv network's check in f64 and of a sequence network's in f32 is the
/// unsharded run's report: the same JSON apart from `shard` (null) and the list of every
/// coordinate a merge adds, and the same exit code.
#[test]
fn merged_graph_shards_equal_the_whole_check() {
    let dir = scratch("graph-shards");
    let cases: [(&[&str], usize); 2] = [
        (&["nets/pump-cnn.toml", "--directions", "2"], 3),
        (
            &[
                "nets/pump-sequence.toml",
                "--precision",
                "f32",
                "--batch",
                "4",
                "--sample",
                "60",
                "--directions",
                "1",
            ],
            2,
        ),
    ];
    for (i, (args, n)) in cases.into_iter().enumerate() {
        let sub = dir.join(i.to_string());
        std::fs::create_dir_all(&sub).unwrap();
        let files = shards(&sub, args, n);
        let (code, plain) = check(args);
        let mut a = args.to_vec();
        a.extend(["--shard", "1/1"]);
        let (_, whole) = check(&a);
        // Out of order: the order given must not matter.
        let mut given: Vec<&str> = files.iter().map(String::as_str).collect();
        given.reverse();
        let run = merge(&given);
        run.assert_code(code);
        let mut merged = run.json();
        assert!(merged["shard"].is_null(), "{}", args[0]);
        merged["shard"] = whole["shard"].clone();
        assert_eq!(merged, whole, "{}: merged ≠ --shard 1/1", args[0]);
        merged["shard"] = Value::Null;
        merged.as_object_mut().unwrap().remove("coordinates");
        assert_eq!(merged, plain, "{}: merged ≠ the plain run", args[0]);
        // The shards really split the work, and each coordinate is (tensor, flat index).
        let mut counts = Vec::new();
        for f in &files {
            let v: Value = serde_json::from_str(&std::fs::read_to_string(f).unwrap()).unwrap();
            let c = v["coordinates"].as_array().unwrap();
            assert!(
                c[0]["tensor"].is_string() && c[0]["index"].is_u64(),
                "{}",
                c[0]
            );
            counts.push(c.len() as u64);
        }
        assert!(counts.iter().all(|&c| c > 0), "{counts:?}");
        assert_eq!(
            counts.iter().sum::<u64>(),
            plain["coverage"]["checked"].as_u64().unwrap()
        );
    }
    // The table names the graph's tensors.
    let files = shards(&dir, &["nets/pump-cnn.toml", "--directions", "1"], 2);
    let run = plumb(&["merge", &files[0], &files[1]]);
    run.assert_code(0);
    assert!(run.stdout.contains("block.weight"), "{}", run.stdout);
}

#[test]
fn edited_graph_shards_exit_2_naming_the_file() {
    let dir = scratch("graph-shards-edited");
    let base = ["nets/pump-cnn.toml", "--directions", "1"];
    let files = shards(&dir, &base, 2);
    let b: Value = serde_json::from_str(&std::fs::read_to_string(&files[1]).unwrap()).unwrap();
    let edit = |name: &str, f: &dyn Fn(&mut Value)| {
        let mut v = b.clone();
        f(&mut v);
        write(&dir, name, &v)
    };
    let cases: Vec<(String, Vec<&str>)> = vec![
        (
            edit("dropped.json", &|v| {
                coords(v).remove(4);
            }),
            vec!["cut short"],
        ),
        (
            edit("duplicated.json", &|v| {
                let c = coords(v)[0].clone();
                coords(v)[1] = c;
            }),
            vec!["coordinate 2", "edited"],
        ),
        (
            edit("foreign.json", &|v| {
                coords(v)[0]["tensor"] = "encoder.weight".into()
            }),
            vec![
                "coordinate 1",
                "`encoder.weight` is not a tensor of nets/pump-cnn.toml",
            ],
        ),
        (
            edit("range.json", &|v| coords(v)[0]["index"] = 99.into()),
            vec!["coordinate 1", "index 99 is outside", "0 to"],
        ),
        (
            edit("scope.json", &|v| {
                v["directions"][0]["scope"] = "block.weight".into();
                v["directions"][0]["layer"] = 3.into();
            }),
            vec!["direction 1", "spans block.weight", "edited"],
        ),
        (
            edit("split.json", &|v| v["shard"] = serde_json::json!([2, 3])),
            vec!["split 3 ways"],
        ),
    ];
    for (file, says) in &cases {
        let name = Path::new(file).file_name().unwrap().to_str().unwrap();
        let mut all = says.clone();
        all.push(name);
        refused(&merge(&[&files[0], file]), &all);
        assert!(
            !merge(&[&files[0], file]).stderr.contains("shard1.json:"),
            "the other shard is blamed"
        );
    }
    // A shard of another description: the conv layers' four channels become five.
    let text = std::fs::read_to_string(fixture("nets/pump-cnn.toml"))
        .unwrap()
        .replace("channels = 4", "channels = 5");
    let other = dir.join("other.toml");
    std::fs::write(&other, &text).unwrap();
    let other_dir = dir.join("other");
    std::fs::create_dir_all(&other_dir).unwrap();
    let foreign = shards(
        &other_dir,
        &[other.to_str().unwrap(), "--directions", "1"],
        2,
    );
    refused(
        &merge(&[&files[0], &foreign[1]]),
        &["other/shard2.json", "`description` differs"],
    );
    // The description changed after the shards were made: the description file is named.
    std::fs::write(&other, text.replace("channels = 5", "channels = 6")).unwrap();
    refused(
        &merge(&[&foreign[0], &foreign[1]]),
        &["other.toml", "not the one the shards were run on"],
    );
}

/// A shard's list of coordinates, to edit.
fn coords(v: &mut Value) -> &mut Vec<Value> {
    v["coordinates"].as_array_mut().unwrap()
}
