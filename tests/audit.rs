//! `plumb audit` end to end on weight files with one planted fault each, written by a NumPy script
//! (fixtures/audit/generate.py) that also verified each fault numerically; the expected findings
//! are in fixtures/audit/expected.json.

mod util;

use util::{fixture, plumb};

fn strip(p: &str) -> &str {
    p.strip_prefix("fixtures/").unwrap_or(p)
}

#[test]
fn each_planted_fault_is_found_at_its_tensor_and_unit_and_healthy_files_pass() {
    let text = std::fs::read_to_string(fixture("audit/expected.json")).unwrap();
    let cases: Vec<serde_json::Value> = serde_json::from_str(&text).unwrap();
    let mut seen = std::collections::BTreeSet::new();
    for c in &cases {
        let mut args = vec![
            "audit".to_string(),
            strip(c["net"].as_str().unwrap()).to_string(),
            "-w".into(),
            strip(c["weights"].as_str().unwrap()).to_string(),
            "-d".into(),
            strip(c["data"].as_str().unwrap()).to_string(),
            "--format".into(),
            "json".into(),
        ];
        if let Some(init) = c["init"].as_str() {
            args.extend(["--init".to_string(), init.to_string()]);
        }
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let run = plumb(&args);
        let file = c["weights"].as_str().unwrap();
        assert!(run.code == 0 || run.code == 1, "{file}: {}", run.stderr);
        let j = run.json();
        let findings = j["findings"].as_array().unwrap();
        let expect = c["expect"].as_array().unwrap();
        if expect.is_empty() {
            let errors: Vec<_> = findings
                .iter()
                .filter(|f| f["severity"] == "error")
                .collect();
            assert!(errors.is_empty(), "{file}: {errors:#?}");
            assert_eq!(run.code, 0, "{file}");
        }
        for e in expect {
            let code = e["code"].as_str().unwrap();
            let found = findings.iter().any(|f| {
                f["code"] == code
                    && f["tensor"] == e["tensor"]
                    && (e["unit"].is_null() || f["figures"]["unit"] == e["unit"])
            });
            assert!(
                found,
                "{file}: no {code} at {} unit {}: {findings:#?}",
                e["tensor"], e["unit"]
            );
            seen.insert(code.to_string());
        }
    }
    for code in [
        "non-finite",
        "implausible-magnitude",
        "dead-unit",
        "saturated-layer",
        "symmetric-units",
        "constant-weights",
        "transposed-matrix",
        "init-mismatch",
    ] {
        assert!(seen.contains(code), "{code} not exercised");
    }
}

#[test]
fn the_symmetric_group_and_the_byte_order_are_named() {
    let run = plumb(&[
        "audit",
        "nets/audit.toml",
        "-w",
        "audit/identical-rows.npz",
        "-d",
        "data/audit.csv",
        "--format",
        "json",
    ]);
    let j = run.json();
    let f = j["findings"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["code"] == "symmetric-units")
        .unwrap();
    assert_eq!(f["figures"]["units"], serde_json::json!([4, 8]));
    let run = plumb(&[
        "audit",
        "nets/audit.toml",
        "-w",
        "audit/byte-swapped.npz",
        "-d",
        "data/audit.csv",
    ]);
    run.assert_code(1);
    assert!(run.stdout.contains("wrong byte order"), "{}", run.stdout);
}

#[test]
fn the_report_says_which_probe_data_it_used_and_is_not_a_safety_assessment() {
    let run = plumb(&["audit", "nets/audit.toml", "-w", "audit/healthy.npz"]);
    run.assert_code(0);
    assert!(
        run.stdout.contains("synthetic batch of 1000 samples"),
        "{}",
        run.stdout
    );
    let words = run.stdout.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(words.contains("not a safety assessment"), "{words}");
    assert!(run.stdout.contains("unit health on the probe data"));
    // --fail-on warning turns warnings into a failing run.
    let run = plumb(&[
        "audit",
        "nets/audit.toml",
        "-w",
        "audit/dead-unit.npz",
        "-d",
        "data/audit.csv",
        "--fail-on",
        "warning",
    ]);
    run.assert_code(1);
}

#[test]
fn unusable_audit_input_exits_2() {
    let dir = util::scratch("audit-bad");
    let wrong = dir.join("wrong.csv");
    std::fs::write(&wrong, "a,b,label\n1,2,0\n").unwrap();
    let empty = dir.join("empty.csv");
    std::fs::write(&empty, "").unwrap();
    for (args, needle) in [
        (
            vec![
                "audit",
                "nets/audit.toml",
                "-w",
                "audit/healthy.npz",
                "-d",
                wrong.to_str().unwrap(),
            ],
            "columns",
        ),
        (
            vec![
                "audit",
                "nets/audit.toml",
                "-w",
                "audit/healthy.npz",
                "-d",
                empty.to_str().unwrap(),
            ],
            "empty",
        ),
        (
            vec!["audit", "nets/audit.toml", "-w", "weights/compare.npz"],
            "another network",
        ),
        (
            vec![
                "audit",
                "nets/audit.toml",
                "-w",
                "audit/healthy.npz",
                "--saturation",
                "0.7",
            ],
            "--saturation",
        ),
        (vec!["audit", "nets/audit.toml"], "--weights"),
    ] {
        let run = plumb(&args);
        run.assert_code(2);
        assert!(run.stderr.contains(needle), "{args:?}: {}", run.stderr);
    }
}
