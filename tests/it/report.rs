//! The report layer end to end: every renderer against a golden file, JUnit XML against the schema
//! CI systems read, baselines, the HTML report in headless Chromium, and sharded checks merged.
//!
//! Golden files live in fixtures/golden/. After an intended change to a report, rerun with
//! `PLUMB_BLESS=1 cargo test --test it report::` and review the diff before committing it.
//!
//! The schema and browser tests need python3 with `xmlschema` and `pillow`, and Chromium; `.ci/run`
//! installs them. Where they are missing the test says so and skips, except under CI (`CI` set),
//! where a missing tool is a failure.

use crate::util;

use std::path::{Path, PathBuf};
use std::process::Command;

use plumb_formats::{DType, FileFormat, read_tensors, write_tensors};
use util::{Run, fixture, plumb, scratch};

// ---------------------------------------------------------------------------------------------
// Golden files

/// Compares a report with its golden file (or writes the file under PLUMB_BLESS).
fn golden(name: &str, actual: &str) {
    let path = fixture("golden").join(name);
    if std::env::var_os("PLUMB_BLESS").is_some() {
        std::fs::create_dir_all(path.parent().unwrap()).unwrap();
        std::fs::write(&path, actual).unwrap();
        return;
    }
    let expected = std::fs::read_to_string(&path).unwrap_or_else(|_| {
        panic!(
            "{}: no golden file; run with PLUMB_BLESS=1 to write it",
            path.display()
        )
    });
    if expected != actual {
        let line = expected
            .lines()
            .zip(actual.lines())
            .position(|(e, a)| e != a)
            .unwrap_or(expected.lines().count().min(actual.lines().count()));
        panic!(
            "{name} differs from its golden file at line {}:\n  golden: {:?}\n  now:    {:?}\n\
             (if the change is intended, rerun with PLUMB_BLESS=1 and review the diff)\n--- now:\n{actual}",
            line + 1,
            expected.lines().nth(line).unwrap_or("<end>"),
            actual.lines().nth(line).unwrap_or("<end>"),
        );
    }
}

/// The report with every non-integer number replaced by `#`, rules shortened and runs of spaces
/// collapsed: what stays is its structure, wording, counts and verdicts, which must not change,
/// while the last digits of a finite difference may differ between machines.
fn masked(text: &str) -> String {
    let chars: Vec<char> = text.chars().collect();
    let mut out = String::new();
    let mut i = 0;
    while i < chars.len() {
        let c = chars[i];
        let after_word = i > 0 && (chars[i - 1].is_alphanumeric() || chars[i - 1] == '_');
        let starts_number = c.is_ascii_digit()
            || (c == '-' && chars.get(i + 1).is_some_and(|d| d.is_ascii_digit()));
        if starts_number && !after_word {
            let mut j = i + 1;
            let mut real = false;
            while j < chars.len() {
                let d = chars[j];
                if d.is_ascii_digit() {
                    j += 1;
                } else if d == '.' && chars.get(j + 1).is_some_and(|e| e.is_ascii_digit()) {
                    real = true;
                    j += 1;
                } else if d == 'e'
                    && chars
                        .get(j + 1)
                        .is_some_and(|e| e.is_ascii_digit() || *e == '-' || *e == '+')
                {
                    real = true;
                    j += 2;
                } else {
                    break;
                }
            }
            if real {
                out.push('#');
            } else {
                out.extend(&chars[i..j]);
            }
            i = j;
        } else {
            if c != '─' || !out.ends_with('─') {
                out.push(c);
            }
            i += 1;
        }
    }
    out.lines()
        .map(|l| l.split_whitespace().collect::<Vec<_>>().join(" "))
        .collect::<Vec<_>>()
        .join("\n")
        + "\n"
}

#[test]
fn masking_keeps_words_and_counts_and_hides_figures() {
    assert_eq!(
        masked("layer2[3, 8]  1.259e-7  0.0021 -4.5e+3 of 115  f64\n─────  ───"),
        "layer2[3, 8] # # # of 115 f64\n─ ─\n"
    );
}

/// `plumb shapes` on a file with its layers stored in the wrong order: a fixed input, a fixed
/// report, in every renderer.
#[test]
fn every_renderer_matches_its_golden_file() {
    let dir = scratch("golden-shapes");
    let (junit, html) = (dir.join("shapes.xml"), dir.join("shapes.html"));
    let args = |format: &str| {
        vec![
            "shapes".to_string(),
            "nets/small.toml".into(),
            "-w".into(),
            "weights/mistakes/layers-out-of-order.npz".into(),
            "--format".into(),
            format.into(),
        ]
    };
    for (format, ext) in [("table", "txt"), ("markdown", "md"), ("json", "json")] {
        let a = args(format);
        let run = plumb(&a.iter().map(String::as_str).collect::<Vec<_>>());
        run.assert_code(1);
        golden(&format!("shapes-layers-out-of-order.{ext}"), &run.stdout);
    }
    let mut a = args("table");
    a.extend([
        "--junit".into(),
        junit.display().to_string(),
        "--html".into(),
        html.display().to_string(),
    ]);
    plumb(&a.iter().map(String::as_str).collect::<Vec<_>>()).assert_code(1);
    golden(
        "shapes-layers-out-of-order.xml",
        &std::fs::read_to_string(&junit).unwrap(),
    );
    golden(
        "shapes-layers-out-of-order.html",
        &std::fs::read_to_string(&html).unwrap(),
    );
}

/// A seeded finite-difference check, with its figures masked. Which coordinates are the worst
/// depends on the last bits of round-off, which a matrix kernel chosen for another CPU may change:
/// `--worst 0` leaves that list out.
#[test]
fn a_seeded_check_matches_its_golden_files() {
    let dir = scratch("golden-check");
    let junit = dir.join("check.xml");
    let base = [
        "check",
        "nets/small.toml",
        "-d",
        "data/small.csv",
        "--seed",
        "7",
        "--worst",
        "0",
    ];
    for (format, ext) in [("table", "txt"), ("markdown", "md")] {
        let mut a = base.to_vec();
        a.extend(["--format", format, "--quiet"]);
        let run = plumb(&a);
        run.assert_code(0);
        golden(&format!("check-small-seed7.{ext}"), &masked(&run.stdout));
    }
    let mut a = base.to_vec();
    a.extend(["--quiet", "--junit", junit.to_str().unwrap()]);
    plumb(&a).assert_code(0);
    golden(
        "check-small-seed7.xml",
        &masked(&std::fs::read_to_string(&junit).unwrap()),
    );
}

// ---------------------------------------------------------------------------------------------
// Outside tools

/// Whether python3 can import the modules; panics under CI, where .ci/run installs them.
fn python_has(modules: &str) -> bool {
    let ok = Command::new("python3")
        .args(["-c", &format!("import {modules}")])
        .output()
        .is_ok_and(|o| o.status.success());
    if !ok {
        assert!(
            std::env::var_os("CI").is_none(),
            "CI must have python3 with {modules} (.ci/run installs them)"
        );
        eprintln!("SKIPPED: needs python3 with {modules} (python3 -m pip install {modules})");
    }
    ok
}

/// Chromium, if installed; panics under CI, where .ci/run installs it.
fn chromium() -> Option<PathBuf> {
    let path = std::env::var_os("PLUMB_CHROMIUM")
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from("/usr/bin/chromium"));
    if path.exists() {
        return Some(path);
    }
    assert!(
        std::env::var_os("CI").is_none(),
        "CI must have Chromium at {} (.ci/run installs Debian's chromium)",
        path.display()
    );
    eprintln!(
        "SKIPPED: needs Chromium at {} (apt-get install chromium, or set PLUMB_CHROMIUM)",
        path.display()
    );
    None
}

/// Runs a Python script; its stdout is JSON.
fn python(script: &str, args: &[&Path]) -> serde_json::Value {
    let out = Command::new("python3")
        .arg("-c")
        .arg(script)
        .args(args)
        .output()
        .expect("run python3");
    assert!(
        out.status.success(),
        "python3 failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("python3 printed JSON")
}

// ---------------------------------------------------------------------------------------------
// JUnit XML

/// Validates each file against the committed schema and lists its test cases as passed or failed.
const JUNIT_SCRIPT: &str = r#"
import json, sys
import xml.etree.ElementTree as ET
import xmlschema
schema = xmlschema.XMLSchema(sys.argv[1])
out = {}
for path in sys.argv[2:]:
    root = ET.parse(path).getroot()
    cases = {}
    for case in root.iter("testcase"):
        failed = case.find("failure") is not None or case.find("error") is not None
        cases[case.get("name")] = "failed" if failed else "passed"
    out[path] = {
        "errors": [str(e.reason) for e in schema.iter_errors(path)],
        "cases": cases,
        "failures": root.get("failures"),
    }
print(json.dumps(out))
"#;

fn junit_of(dir: &Path, name: &str, args: &[&str], code: i32) -> PathBuf {
    let path = dir.join(format!("{name}.xml"));
    let mut a = args.to_vec();
    a.extend(["--quiet", "--junit", path.to_str().unwrap()]);
    plumb(&a).assert_code(code);
    path
}

/// Every command's JUnit XML validates against the Jenkins JUnit schema (fixtures/junit), and a
/// failing tensor is a failing test case, the others passing.
#[test]
fn junit_validates_against_the_schema_and_fails_the_right_case() {
    if !python_has("xmlschema") {
        return;
    }
    let dir = scratch("junit");
    let cmp = [
        "nets/compare.toml",
        "-w",
        "weights/compare.npz",
        "-d",
        "data/compare.csv",
    ];
    let with = |cmd: &'static str, rest: &[&'static str]| {
        let mut a = vec![cmd];
        a.extend(cmp);
        a.extend(rest);
        a
    };
    let shapes = junit_of(
        &dir,
        "shapes",
        &[
            "shapes",
            "nets/small.toml",
            "-w",
            "weights/mistakes/layers-out-of-order.npz",
        ],
        1,
    );
    let check = junit_of(&dir, "check", &with("check", &[]), 0);
    let right = junit_of(
        &dir,
        "compare-right",
        &with("compare", &["-g", "compare/correct-f64.npz"]),
        0,
    );
    let wrong = junit_of(
        &dir,
        "compare-wrong",
        &with("compare", &["-g", "compare/sign-flipped-layer2.npz"]),
        1,
    );
    let audit = junit_of(
        &dir,
        "audit",
        &[
            "audit",
            "nets/audit.toml",
            "-w",
            "audit/zero-layer.npz",
            "-d",
            "data/audit.csv",
        ],
        1,
    );
    let sweep = junit_of(&dir, "sweep", &with("sweep", &[]), 0);
    let xsd = fixture("junit/junit-10.xsd");
    let files = [&shapes, &check, &right, &wrong, &audit, &sweep];
    let mut args: Vec<&Path> = vec![&xsd];
    args.extend(files.iter().map(|p| p.as_path()));
    let report = python(JUNIT_SCRIPT, &args);
    let of = |p: &Path| &report[p.to_str().unwrap()];
    for f in files {
        let errors = of(f)["errors"].as_array().unwrap();
        assert!(errors.is_empty(), "{}: {errors:?}", f.display());
    }
    let cases = |p: &Path| of(p)["cases"].as_object().unwrap().clone();
    // shapes: one case per tensor, both failing.
    let c = cases(&shapes);
    assert_eq!(c["shape layer1"], "failed");
    assert_eq!(c["shape layer2"], "failed");
    // compare: the flipped tensor fails, the two others pass.
    let c = cases(&wrong);
    assert_eq!(c["gradient layer2"], "failed", "{c:?}");
    assert_eq!(c["gradient layer1"], "passed", "{c:?}");
    assert_eq!(c["gradient layer3"], "passed", "{c:?}");
    assert_eq!(of(&wrong)["failures"], "1");
    let c = cases(&right);
    assert!(c.values().all(|v| v == "passed"), "{c:?}");
    assert!(c.contains_key("gradient layer2"), "{c:?}");
    let c = cases(&check);
    assert!(c.len() >= 3 && c.values().all(|v| v == "passed"), "{c:?}");
    let c = cases(&audit);
    assert!(c.values().any(|v| v == "failed"), "{c:?}");
    let c = cases(&sweep);
    assert!(!c.is_empty(), "{c:?}");
}

/// The validation is not vacuous: a test case without its name, or a failure outside a test case,
/// is rejected by the same schema.
#[test]
fn the_schema_rejects_broken_junit() {
    if !python_has("xmlschema") {
        return;
    }
    let dir = scratch("junit-broken");
    let nameless = dir.join("nameless.xml");
    std::fs::write(
        &nameless,
        "<testsuites><testsuite name=\"s\" tests=\"1\"><testcase classname=\"c\"/></testsuite></testsuites>",
    )
    .unwrap();
    let stray = dir.join("stray.xml");
    std::fs::write(
        &stray,
        "<testsuites><testsuite name=\"s\" tests=\"1\"><failure message=\"m\"/></testsuite></testsuites>",
    )
    .unwrap();
    let xsd = fixture("junit/junit-10.xsd");
    let report = python(JUNIT_SCRIPT, &[&xsd, &nameless, &stray]);
    for f in [&nameless, &stray] {
        let errors = report[f.to_str().unwrap()]["errors"].as_array().unwrap();
        assert!(!errors.is_empty(), "{} passed the schema", f.display());
    }
}

// ---------------------------------------------------------------------------------------------
// Baselines

const COMPARE: [&str; 7] = [
    "compare",
    "nets/compare.toml",
    "-w",
    "weights/compare.npz",
    "-d",
    "data/compare.csv",
    "-g",
];

fn compare(gradient: &str, extra: &[&str]) -> Run {
    let mut a = COMPARE.to_vec();
    a.push(gradient);
    a.extend(extra);
    a.push("--quiet");
    plumb(&a)
}

fn findings(run: &Run) -> Vec<serde_json::Value> {
    run.json()["findings"].as_array().unwrap().clone()
}

#[test]
fn a_run_passes_against_its_own_baseline() {
    let dir = scratch("baseline-own");
    let b = dir.join("compare.baseline.json");
    let b = b.to_str().unwrap();
    compare("compare/correct-f64.npz", &["--save-baseline", b]).assert_code(0);
    let saved: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(b).unwrap()).unwrap();
    assert_eq!(saved["command"], "compare", "{saved}");
    let run = compare(
        "compare/correct-f64.npz",
        &["--baseline", b, "--format", "json"],
    );
    run.assert_code(0);
    assert_eq!(run.json()["baseline"]["worse"], 0, "{}", run.stdout);
    // The same for check, whose figures are finite differences.
    let cb = dir.join("check.baseline.json");
    let cb = cb.to_str().unwrap();
    let check = ["check", "nets/small.toml", "--seed", "3", "--quiet"];
    let mut a = check.to_vec();
    a.extend(["--save-baseline", cb]);
    plumb(&a).assert_code(0);
    let mut a = check.to_vec();
    a.extend(["--baseline", cb]);
    plumb(&a).assert_code(0);
}

/// One entry of layer2 off by 1%: the baseline names the tensor and the figure that got worse.
#[test]
fn a_planted_one_percent_error_fails_against_the_baseline() {
    let dir = scratch("baseline-planted");
    let b = dir.join("baseline.json");
    let b = b.to_str().unwrap();
    compare("compare/correct-f64.npz", &["--save-baseline", b]).assert_code(0);
    let mut file = read_tensors(&fixture("compare/correct-f64.npz")).unwrap();
    let t = file
        .tensors
        .iter_mut()
        .find(|t| t.name == "layer2")
        .unwrap();
    let largest = (0..t.data.len())
        .max_by(|&i, &j| t.data[i].abs().total_cmp(&t.data[j].abs()))
        .unwrap();
    t.data[largest] *= 1.01;
    let planted = dir.join("planted.npz");
    write_tensors(&planted, FileFormat::Npz, &file.tensors, DType::F64).unwrap();
    let run = compare(
        planted.to_str().unwrap(),
        &["--baseline", b, "--format", "json"],
    );
    run.assert_code(1);
    let fs = findings(&run);
    let regressed: Vec<_> = fs
        .iter()
        .filter(|f| f["code"].as_str().unwrap().starts_with("baseline-"))
        .collect();
    assert!(
        regressed
            .iter()
            .any(|f| f["tensor"] == "layer2"
                && f["message"].as_str().unwrap().contains("max_rel_error")),
        "{regressed:#?}"
    );
    assert!(
        regressed
            .iter()
            .all(|f| f["tensor"] == "layer2" || f["tensor"].is_null()),
        "only layer2 changed: {regressed:#?}"
    );
    // The table says it too.
    let text = compare(planted.to_str().unwrap(), &["--baseline", b]);
    text.assert_code(1);
    assert!(
        text.stdout.contains("max_rel_error") && text.stdout.contains("layer2"),
        "{}",
        text.stdout
    );
}

/// A network whose hidden layer grew from 5 to 6 units: the baseline names both tensors and shapes.
#[test]
fn a_changed_layer_width_fails_against_the_baseline() {
    let dir = scratch("baseline-width");
    let b = dir.join("baseline.json");
    let b = b.to_str().unwrap();
    plumb(&[
        "check",
        "nets/small.toml",
        "--seed",
        "3",
        "--quiet",
        "--save-baseline",
        b,
    ])
    .assert_code(0);
    let wider = dir.join("small.toml");
    let text = std::fs::read_to_string(fixture("nets/small.toml")).unwrap();
    assert!(text.contains("units = 5"));
    std::fs::write(&wider, text.replace("units = 5", "units = 6")).unwrap();
    let run = plumb(&[
        "check",
        wider.to_str().unwrap(),
        "--seed",
        "3",
        "--quiet",
        "--baseline",
        b,
        "--format",
        "json",
    ]);
    run.assert_code(1);
    let fs = findings(&run);
    let shape = |tensor: &str| {
        fs.iter()
            .find(|f| f["code"] == "baseline-shape-changed" && f["tensor"] == tensor)
            .unwrap_or_else(|| panic!("no shape change named for {tensor}: {fs:#?}"))["message"]
            .as_str()
            .unwrap()
            .to_string()
    };
    let m = shape("layer1");
    assert!(m.contains("(5, 5)") && m.contains("(6, 5)"), "{m}");
    let m = shape("layer2");
    assert!(m.contains("(3, 6)") && m.contains("(3, 7)"), "{m}");
}

#[test]
fn a_baseline_is_never_overwritten_unless_asked() {
    let dir = scratch("baseline-keep");
    let b = dir.join("baseline.json");
    std::fs::write(&b, "mine").unwrap();
    let b = b.to_str().unwrap();
    let run = compare("compare/correct-f64.npz", &["--save-baseline", b]);
    run.assert_code(2);
    assert!(
        run.stderr.contains(b) && run.stderr.contains("--force"),
        "{}",
        run.stderr
    );
    assert_eq!(std::fs::read_to_string(b).unwrap(), "mine");
    compare(
        "compare/correct-f64.npz",
        &["--save-baseline", b, "--force"],
    )
    .assert_code(0);
    assert!(std::fs::read_to_string(b).unwrap().contains("\"compare\""));
    // A failing run records nothing: a baseline holds the figures of a passing run.
    let failed = dir.join("failed.json");
    let run = compare(
        "compare/sign-flipped-layer2.npz",
        &["--save-baseline", failed.to_str().unwrap()],
    );
    assert_ne!(run.code, 0);
    assert!(!failed.exists(), "{}", run.stderr);
}

#[test]
fn an_unusable_baseline_exits_2_naming_it() {
    let dir = scratch("baseline-bad");
    let garbled = dir.join("garbled.json");
    std::fs::write(&garbled, "{ not json").unwrap();
    let other = dir.join("other.json");
    plumb(&[
        "check",
        "nets/small.toml",
        "--quiet",
        "--save-baseline",
        other.to_str().unwrap(),
    ])
    .assert_code(0);
    let missing = dir.join("missing.json");
    for b in [&garbled, &other, &missing] {
        let run = compare(
            "compare/correct-f64.npz",
            &["--baseline", b.to_str().unwrap()],
        );
        run.assert_code(2);
        assert!(
            run.stderr.contains(b.to_str().unwrap()),
            "{}: {}",
            b.display(),
            run.stderr
        );
    }
}

// ---------------------------------------------------------------------------------------------
// The HTML report

/// The demo's report, beside the files of the shared demo run.
fn demo_report() -> PathBuf {
    util::demo::written().dir.join("pump-report.html")
}

/// Every `<svg …>` start tag's width and height attributes.
fn svg_sizes(html: &str) -> Vec<(u32, u32)> {
    let attr = |tag: &str, name: &str| -> u32 {
        let at = tag.find(&format!(" {name}=\"")).expect("a size attribute") + name.len() + 3;
        tag[at..].split('"').next().unwrap().parse().unwrap()
    };
    html.match_indices("<svg")
        .map(|(i, _)| {
            let tag = &html[i..i + html[i..].find('>').unwrap()];
            (attr(tag, "width"), attr(tag, "height"))
        })
        .collect()
}

#[test]
fn the_html_report_is_self_contained_and_says_its_data_is_invented() {
    let html = std::fs::read_to_string(demo_report()).unwrap();
    for banned in [
        "<script", "<link", "<img", "<iframe", "@import", "url(", "src=",
    ] {
        assert!(!html.contains(banned), "the report holds {banned}");
    }
    // The only URLs are XML namespace names, which nothing fetches.
    for (i, _) in html.match_indices("http") {
        let rest = &html[i..];
        assert!(
            rest.starts_with("http://www.w3.org/"),
            "a URL: {}",
            &rest[..60.min(rest.len())]
        );
    }
    let verdict = html.find("id=\"verdict\"").expect("a verdict");
    let first_table = html.find("<table").expect("a table");
    assert!(verdict < first_table, "the verdict comes first");
    assert!(html.contains("invented"));
    assert!(html.contains("not a safety assessment"));
    // Error strips (the reference's check, the planted bug), the V-curve, the unit heatmap, and a
    // weight histogram per layer.
    let sizes = svg_sizes(&html);
    assert_eq!(sizes.len(), 7, "{sizes:?}");
    for caption in [
        "Relative error per tensor",
        "Error against step size",
        "Unit health",
        "Weights of layer1",
        "Weights of layer3",
    ] {
        assert!(html.contains(caption), "no plot captioned {caption}");
    }
}

const CHROMIUM_FLAGS: [&str; 9] = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--hide-scrollbars",
];

/// Runs Chromium on a local page; returns its stdout and its console messages.
fn chromium_run(chrome: &Path, page: &Path, extra: &[String]) -> (String, Vec<String>) {
    let profile = scratch("chromium-profile");
    let out = Command::new(chrome)
        .args(CHROMIUM_FLAGS)
        .arg(format!("--user-data-dir={}", profile.display()))
        .args(["--enable-logging=stderr", "--v=0"])
        .args(extra)
        .arg(format!("file://{}", page.display()))
        .output()
        .expect("run chromium");
    let stderr = String::from_utf8_lossy(&out.stderr);
    let console = stderr
        .lines()
        .filter(|l| l.contains(":CONSOLE"))
        .map(str::to_string)
        .collect();
    (String::from_utf8_lossy(&out.stdout).into_owned(), console)
}

/// For each PNG: its size, and how much of it is not background (white).
const PNG_SCRIPT: &str = r#"
import json, sys
from PIL import Image
out = []
for path in sys.argv[1:]:
    im = Image.open(path).convert("RGB")
    pixels = list(im.getdata())
    ink = sum(1 for p in pixels if min(p) < 235)
    colours = len(set(p for p in pixels if min(p) < 235))
    out.append({"size": im.size, "ink": ink / len(pixels), "colours": colours})
print(json.dumps(out))
"#;

/// The demo report opens in headless Chromium without a console message; every plot renders as
/// a non-blank image of the size it declares, with its drawing elements in the DOM.
#[test]
fn the_html_report_renders_in_chromium() {
    let Some(chrome) = chromium() else { return };
    if !python_has("PIL") {
        return;
    }
    // The console check must be able to fail: a page with a planted error is caught.
    let dir = scratch("html-chromium");
    let bad = dir.join("bad.html");
    std::fs::write(
        &bad,
        "<!DOCTYPE html><p>x</p><script>console.error('planted'); missingFunction();</script>",
    )
    .unwrap();
    let (_, console) = chromium_run(&chrome, &bad, &["--dump-dom".into()]);
    assert!(
        console.iter().any(|l| l.contains("planted")),
        "the console check sees nothing: {console:?}"
    );

    let report = demo_report();
    let html = std::fs::read_to_string(&report).unwrap();
    let (dom, console) = chromium_run(&chrome, &report, &["--dump-dom".into()]);
    assert!(console.is_empty(), "console messages: {console:#?}");
    assert_eq!(dom.matches("<svg").count(), 7, "the DOM lost plots");
    for element in ["<circle", "<polyline", "<rect", "<text"] {
        assert!(dom.contains(element), "no {element} in the rendered plots");
    }

    // The whole page, then each plot on a page of its own at its declared size.
    let page = dir.join("page.png");
    chromium_run(
        &chrome,
        &report,
        &[
            "--window-size=1200,2400".into(),
            format!("--screenshot={}", page.display()),
        ],
    );
    let sizes = svg_sizes(&html);
    let mut shots = vec![page.clone()];
    for (k, (start, _)) in html.match_indices("<svg").enumerate() {
        let end = start + html[start..].find("</svg>").unwrap() + "</svg>".len();
        let alone = dir.join(format!("plot{k}.html"));
        std::fs::write(
            &alone,
            format!(
                "<!DOCTYPE html><html><body style=\"margin:0\">{}</body></html>",
                &html[start..end]
            ),
        )
        .unwrap();
        let png = dir.join(format!("plot{k}.png"));
        let (w, h) = sizes[k];
        chromium_run(
            &chrome,
            &alone,
            &[
                format!("--window-size={w},{h}"),
                format!("--screenshot={}", png.display()),
            ],
        );
        shots.push(png);
    }
    let paths: Vec<&Path> = shots.iter().map(|p| p.as_path()).collect();
    let stats = python(PNG_SCRIPT, &paths);
    let stats = stats.as_array().unwrap();
    assert_eq!(stats[0]["size"], serde_json::json!([1200, 2400]));
    assert!(stats[0]["ink"].as_f64().unwrap() > 0.02, "{:?}", stats[0]);
    for (k, s) in stats[1..].iter().enumerate() {
        let (w, h) = sizes[k];
        assert_eq!(s["size"], serde_json::json!([w, h]), "plot {k}");
        // Axes, labels and data: a blank or one-colour image would fail both.
        assert!(s["ink"].as_f64().unwrap() > 0.01, "plot {k} is blank: {s}");
        assert!(s["colours"].as_u64().unwrap() > 3, "plot {k}: {s}");
    }
}

// ---------------------------------------------------------------------------------------------
// Shards

/// Four shards merged give the whole check: the same coordinates, figures and verdicts.
#[test]
fn four_merged_shards_equal_the_whole_check() {
    let dir = scratch("shards");
    let base = [
        "check",
        "nets/compare.toml",
        "-w",
        "weights/compare.npz",
        "-d",
        "data/compare.csv",
        "--format",
        "json",
        "--quiet",
    ];
    let run_with = |extra: &[&str]| {
        let mut a = base.to_vec();
        a.extend(extra);
        let run = plumb(&a);
        run.assert_code(0);
        run
    };
    let mut shards = Vec::new();
    for k in 1..=4 {
        let spec = format!("{k}/4");
        let run = run_with(&["--shard", &spec]);
        let path = dir.join(format!("shard{k}.json"));
        std::fs::write(&path, &run.stdout).unwrap();
        shards.push(path);
    }
    let whole: serde_json::Value = run_with(&["--shard", "1/1"]).json();
    let plain: serde_json::Value = run_with(&[]).json();
    // Merge them out of order: the order given must not matter.
    let mut args = vec!["merge", "--format", "json", "--quiet"];
    for i in [2, 0, 3, 1] {
        args.push(shards[i].to_str().unwrap());
    }
    let merged = plumb(&args);
    merged.assert_code(0);
    let mut merged = merged.json();
    assert!(merged["shard"].is_null());
    merged["shard"] = whole["shard"].clone();
    assert_eq!(
        merged, whole,
        "the merged report differs from the whole run's"
    );
    // And the plain run holds the same report, without the list of every coordinate.
    let mut merged = merged;
    merged["shard"] = serde_json::Value::Null;
    merged.as_object_mut().unwrap().remove("coordinates");
    assert_eq!(merged, plain);
    // The shards really split the work.
    let counts: Vec<u64> = shards
        .iter()
        .map(|p| {
            let v: serde_json::Value =
                serde_json::from_str(&std::fs::read_to_string(p).unwrap()).unwrap();
            v["coverage"]["checked"].as_u64().unwrap()
        })
        .collect();
    assert_eq!(
        counts.iter().sum::<u64>(),
        plain["coverage"]["checked"].as_u64().unwrap()
    );
    assert!(counts.iter().all(|&c| c > 0), "{counts:?}");
}

#[test]
fn shards_that_do_not_belong_together_exit_2() {
    let dir = scratch("shards-bad");
    let shard = |k: &str, seed: &str| {
        let path = dir.join(format!("s{}-{seed}.json", k.replace('/', "of")));
        let run = plumb(&[
            "check",
            "nets/compare.toml",
            "-w",
            "weights/compare.npz",
            "-d",
            "data/compare.csv",
            "--seed",
            seed,
            "--shard",
            k,
            "--format",
            "json",
            "--quiet",
        ]);
        run.assert_code(0);
        std::fs::write(&path, &run.stdout).unwrap();
        path.to_str().unwrap().to_string()
    };
    let (a, b, b_other_seed) = (shard("1/2", "1"), shard("2/2", "1"), shard("2/2", "2"));
    for (args, says) in [
        (vec![a.clone()], "exactly once"),
        (vec![a.clone(), a.clone()], "exactly once"),
        (vec![a.clone(), b_other_seed.clone()], "seed"),
    ] {
        let mut full = vec!["merge".to_string()];
        full.extend(args);
        let run = plumb(&full.iter().map(String::as_str).collect::<Vec<_>>());
        run.assert_code(2);
        assert!(run.stderr.contains(says), "{says}: {}", run.stderr);
    }
    let merged = plumb(&["merge", &a, &b, "--quiet"]);
    merged.assert_code(0);
}

/// Shards that do not form one split, or were edited, are refused with the file named — never a
/// panic, never a report of something that was not checked.
#[test]
fn broken_or_foreign_shards_exit_2_naming_the_file() {
    let dir = scratch("shards-hostile");
    let run_shard = |spec: &str, extra: &[&str]| {
        let mut a = vec![
            "check",
            "nets/small.toml",
            "--seed",
            "4",
            "--shard",
            spec,
            "--format",
            "json",
            "--quiet",
        ];
        a.extend(extra);
        let run = plumb(&a);
        run.assert_code(0);
        run.json()
    };
    let write = |name: &str, v: &serde_json::Value| {
        let p = dir.join(name);
        std::fs::write(&p, v.to_string()).unwrap();
        p.to_str().unwrap().to_string()
    };
    let half1 = run_shard("1/2", &[]);
    let half2 = run_shard("2/2", &[]);
    let quarter2 = run_shard("2/4", &[]);
    let fewer_dirs = run_shard("2/2", &["--directions", "1"]);
    let h1 = write("h1.json", &half1);
    let mut cases: Vec<(String, Vec<String>, &str)> = vec![
        (
            "another split".into(),
            vec![h1.clone(), write("q2.json", &quarter2)],
            "ways",
        ),
        (
            "other directions".into(),
            vec![h1.clone(), write("d.json", &fewer_dirs)],
            "directions_per_part",
        ),
    ];
    let edit = |name: &str, f: &dyn Fn(&mut serde_json::Value)| {
        let mut v = half2.clone();
        f(&mut v);
        write(name, &v)
    };
    for (name, says, f) in [
        (
            "layer0.json",
            "the shard was edited",
            &(|v: &mut serde_json::Value| v["coordinates"][0]["layer"] = 0.into())
                as &dyn Fn(&mut serde_json::Value),
        ),
        ("layer99.json", "the shard was edited", &|v| {
            v["coordinates"][0]["layer"] = 99.into()
        }),
        ("index.json", "is outside", &|v| {
            v["coordinates"][0]["index"] = 1_000_000.into()
        }),
        ("huge-n.json", "not [K, N]", &|v| {
            v["shard"] = serde_json::json!([2, 4_611_686_018_427_387_904u64])
        }),
        ("floors.json", "differs", &|v| {
            v["floors"] = serde_json::json!([])
        }),
        ("short.json", "cut short", &|v| {
            v["coordinates"].as_array_mut().unwrap().pop();
        }),
        ("status.json", "unknown status", &|v| {
            v["coordinates"][0]["status"] = "fine".into()
        }),
    ] {
        cases.push((name.into(), vec![h1.clone(), edit(name, f)], says));
    }
    for (what, files, says) in &cases {
        let mut args = vec!["merge"];
        args.extend(files.iter().map(String::as_str));
        let run = plumb(&args);
        run.assert_code(2);
        assert!(
            run.stderr.contains(says) && !run.stderr.contains("panicked"),
            "{what}: {}",
            run.stderr
        );
        assert!(
            files.iter().any(|f| run.stderr.contains(f.as_str())),
            "{what}: no file named in {}",
            run.stderr
        );
    }
    // The description changed under the shards: refused as well.
    let mut other = half2.clone();
    other["description"] = "nets/five-four-four.toml".into();
    let mut first = half1.clone();
    first["description"] = "nets/five-four-four.toml".into();
    let run = plumb(&[
        "merge",
        &write("o1.json", &first),
        &write("o2.json", &other),
    ]);
    run.assert_code(2);
    assert!(
        run.stderr.contains("not the one the shards were run on"),
        "{}",
        run.stderr
    );
}

/// A regression the baseline finds fails the JUnit case of the tensor it names.
#[test]
fn a_baseline_regression_is_a_failing_junit_case() {
    let dir = scratch("baseline-junit");
    let b = dir.join("baseline.json");
    compare(
        "compare/correct-f64.npz",
        &["--save-baseline", b.to_str().unwrap()],
    )
    .assert_code(0);
    let mut file = read_tensors(&fixture("compare/correct-f64.npz")).unwrap();
    let t = file
        .tensors
        .iter_mut()
        .find(|t| t.name == "layer3")
        .unwrap();
    // Within compare's own tolerance (1e-6), beyond the baseline's tenfold.
    t.data.iter_mut().for_each(|v| *v *= 1.0 + 1e-9);
    let nudged = dir.join("nudged.npz");
    write_tensors(&nudged, FileFormat::Npz, &file.tensors, DType::F64).unwrap();
    let junit = dir.join("junit.xml");
    let run = compare(
        nudged.to_str().unwrap(),
        &[
            "--baseline",
            b.to_str().unwrap(),
            "--junit",
            junit.to_str().unwrap(),
        ],
    );
    run.assert_code(1);
    let xml = std::fs::read_to_string(&junit).unwrap();
    let case = xml
        .split("<testcase ")
        .find(|c| c.contains("name=\"gradient layer3\""))
        .expect("a case for layer3");
    assert!(case.contains("<failure type=\"baseline-worse\""), "{case}");
    assert!(!xml.contains("failures=\"0\""), "{xml}");
}

#[test]
fn no_output_replaces_an_input_even_with_force() {
    let dir = scratch("output-input");
    let net = dir.join("net.toml");
    std::fs::copy(fixture("nets/small.toml"), &net).unwrap();
    let before = std::fs::read(&net).unwrap();
    for flag in ["--html", "--junit", "--save-baseline"] {
        let run = plumb(&[
            "check",
            net.to_str().unwrap(),
            "--quiet",
            flag,
            net.to_str().unwrap(),
            "--force",
        ]);
        run.assert_code(2);
        assert!(
            run.stderr.contains("an input of the run"),
            "{flag}: {}",
            run.stderr
        );
    }
    assert_eq!(std::fs::read(&net).unwrap(), before);
}

/// A dead ReLU unit (bias −100, no L2) has every error exactly 0: the V-curve of its weight has
/// nothing a log axis can show, and the report says so instead of hanging.
#[test]
fn a_plot_with_nothing_to_show_says_so() {
    let dir = scratch("plot-empty");
    let net = dir.join("dead.toml");
    std::fs::write(
        &net,
        "inputs = 4\nloss = \"cross-entropy\"\n[[layer]]\nunits = 5\nactivation = \"relu\"\n\
         [[layer]]\nunits = 3\nactivation = \"softmax\"\n",
    )
    .unwrap();
    let tensor = |name: &str, rows: usize, cols: usize| plumb_formats::Tensor {
        name: name.into(),
        shape: vec![rows, cols],
        dtype: DType::F64,
        data: (0..rows * cols)
            .map(|i| {
                if name == "layer1" && i == 0 {
                    -100.0
                } else {
                    ((i * 37 % 11) as f64 - 5.0) / 10.0
                }
            })
            .collect(),
    };
    let weights = dir.join("dead.npz");
    write_tensors(
        &weights,
        FileFormat::Npz,
        &[tensor("layer1", 5, 5), tensor("layer2", 3, 6)],
        DType::F64,
    )
    .unwrap();
    let html = dir.join("dead.html");
    let run = plumb(&[
        "sweep",
        net.to_str().unwrap(),
        "-w",
        weights.to_str().unwrap(),
        "--coords",
        "1:0:2",
        "--html",
        html.to_str().unwrap(),
        "--quiet",
    ]);
    run.assert_code(0);
    assert!(
        std::fs::read_to_string(&html)
            .unwrap()
            .contains("no finite values")
    );
}
