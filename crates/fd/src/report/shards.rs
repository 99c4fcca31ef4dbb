//! `plumb merge`: the shards of a `plumb check --shard K/N` read back into their report type and
//! joined into the report the whole check would have given (same coordinates, same figures, same
//! verdicts) — after making sure they are the shares of one run, each once and unedited.

use std::path::{Path, PathBuf};

use plumb_engine::{Coord, Network, Weights};
use plumb_formats::Description;
use plumb_report::SCHEMA_VERSION;
use serde::Deserialize;
use serde_json::Value;

use super::check::{CheckReport, CoordReport, DirectionReport, RunFacts, build, coord_report};
use super::locate::Tensors;
use crate::{CheckResult, CoordCheck, Coverage, DirectionCheck, Method, Precision, Sample, Scope};

/// The most shards a check can be split into (the bound `--shard` gives).
pub const MAX_SHARDS: usize = 10_000;

/// Why shards cannot be merged; the message names the file at fault and how to fix it.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct ShardError(String);

fn refuse<T>(message: String) -> Result<T, ShardError> {
    Err(ShardError(message))
}

/// One shard's report, with its place in the split.
#[derive(Debug)]
struct Shard {
    path: PathBuf,
    k: usize,
    n: usize,
    report: CheckReport,
}

impl Shard {
    /// A shard from the bytes of `path`: a `plumb check` report of this schema version with a
    /// `shard` and its coordinates, every item of the type the report writes.
    fn read(path: &Path, bytes: &[u8]) -> Result<Shard, ShardError> {
        let at = path.display();
        let mut v: Value = serde_json::from_slice(bytes)
            .map_err(|e| ShardError(format!("{at}: not a JSON report: {e}")))?;
        if v["command"] != "check" {
            return refuse(format!("{at}: not a `plumb check` report"));
        }
        if v["schema_version"].as_u64() != Some(SCHEMA_VERSION.into()) {
            return refuse(format!(
                "{at}: `schema_version` is {}, and this plumb reads {SCHEMA_VERSION}: run the \
                 check again with this plumb",
                v["schema_version"]
            ));
        }
        if !v["shard"].is_array() || !v["coordinates"].is_array() {
            return refuse(format!(
                "{at}: not a shard: run the check with --shard K/N --format json"
            ));
        }
        // The lists are read item by item, so that an error names the item.
        let coords = v["coordinates"].take();
        let dirs = v["directions"].take();
        v["coordinates"] = Value::Null;
        v["directions"] = Value::Array(Vec::new());
        let mut report = CheckReport::deserialize(&v)
            .map_err(|e| ShardError(format!("{at}: not a check report as plumb writes it: {e}")))?;
        report.coordinates = Some(items(&coords, "coordinate", &at)?);
        report.directions = items(&dirs, "direction", &at)?;
        let (k, n) = match report.shard {
            Some([k, n]) if (1..=MAX_SHARDS).contains(&n) && (1..=n).contains(&k) => (k, n),
            _ => {
                return refuse(format!(
                    "{at}: `shard` is {}, not [K, N] with 1 ≤ K ≤ N ≤ {MAX_SHARDS}",
                    v["shard"]
                ));
            }
        };
        Ok(Shard {
            path: path.to_path_buf(),
            k,
            n,
            report,
        })
    }

    fn coordinates(&self) -> &[CoordReport] {
        self.report.coordinates.as_deref().unwrap_or_default()
    }
}

/// Each item of a JSON list as a `T`, an error naming the 1-based item.
fn items<T: for<'de> Deserialize<'de>>(
    list: &Value,
    what: &str,
    at: &impl std::fmt::Display,
) -> Result<Vec<T>, ShardError> {
    let Some(list) = list.as_array() else {
        return refuse(format!("{at}: the {what}s are not a list"));
    };
    list.iter()
        .enumerate()
        .map(|(j, item)| {
            T::deserialize(item).map_err(|e| ShardError(format!("{at}: {what} {}: {e}", j + 1)))
        })
        .collect()
}

/// The shards of one split: the same run (inputs and settings) split the same n ways, each share
/// given exactly once.
#[derive(Debug)]
pub struct Shards {
    list: Vec<Shard>,
}

impl Shards {
    /// Reads the shards from their files' bytes and checks they belong together.
    pub fn parse(files: &[(PathBuf, Vec<u8>)]) -> Result<Shards, ShardError> {
        let list: Vec<Shard> = files
            .iter()
            .map(|(p, b)| Shard::read(p, b))
            .collect::<Result<_, _>>()?;
        let Some(first) = list.first() else {
            return refuse("no shard given: name the files of every share of the split".into());
        };
        let n = first.n;
        for s in &list {
            if s.n != n {
                return refuse(format!(
                    "{}: shard {}/{} of a run split {} ways, and {} is {}/{n}: merge the shards of \
                     one split",
                    s.path.display(),
                    s.k,
                    s.n,
                    s.n,
                    first.path.display(),
                    first.k
                ));
            }
            if let Some(key) = differs(&first.report, &s.report) {
                return refuse(format!(
                    "{}: `{key}` differs from {}'s: these are shards of different runs",
                    s.path.display(),
                    first.path.display()
                ));
            }
        }
        each_share_once(&list, n)?;
        Ok(Shards { list })
    }

    /// The description the shards were run on, as they name it.
    pub fn description(&self) -> &Path {
        &self.list[0].report.description
    }

    /// The whole run's report from its shares, `worst_n` coordinates in its worst list. Refuses a
    /// description that is not the one the shards ran on, and a dropped, repeated, invented or
    /// edited item, naming its shard.
    pub fn merge(&self, desc: &Description, worst_n: usize) -> Result<CheckReport, ShardError> {
        let first = &self.list[0];
        let at = |key: &str| format!("{}: `{key}`", first.path.display());
        let r = &first.report;
        let hash = super::description_hash(desc);
        if r.description_hash != hash {
            return refuse(format!(
                "{}: the description is not the one the shards were run on (its hash is {hash}, \
                 the shards' {}): merge where the shards' inputs are, unchanged",
                desc.path.display(),
                r.description_hash
            ));
        }
        let tensors = Tensors::new(desc);
        let net = &desc.network;
        let n = first.n;
        // Shard k of n holds items k-1, k-1+n, k-1+2n, … of the whole run's lists (fd::check).
        // The whole lists are known without the shards: the coordinates are the sample drawn from
        // the seed, the directions K per part. So each item is checked against the one that belongs
        // in its place: a dropped, repeated or invented item is refused, naming its shard.
        let sample = Sample::parse(&r.coverage.sample)
            .map_err(|e| ShardError(format!("{}: {e}", at("coverage.sample"))))?;
        let whole = crate::select(net, sample, r.seed)
            .map_err(|e| ShardError(format!("{}: {e}", at("coverage.sample"))))?;
        let per_part = r.coverage.directions_per_part;
        let parts = 1 + 2 * net.layers().len();
        let whole_directions = per_part.saturating_mul(parts);
        let mut coords = Vec::new();
        let mut directions = Vec::new();
        for s in &self.list {
            let file = s.path.display();
            for (what, given, total) in [
                ("coordinates", s.coordinates().len(), whole.len()),
                ("directions", s.report.directions.len(), whole_directions),
            ] {
                let expected = (total + n - s.k) / n;
                if given != expected {
                    return refuse(format!(
                        "{file}: {given} {what} where shard {}/{n} of the run's {total} must have \
                         {expected}: this shard was cut short or edited",
                        s.k
                    ));
                }
            }
            for (j, c) in s.coordinates().iter().enumerate() {
                let at = s.k - 1 + j * n;
                let check = coord_check(c, net)
                    .map_err(|e| ShardError(format!("{file}: coordinate {}: {e}", j + 1)))?;
                if check.coord != whole[at] || c.place != tensors.place(check.coord) {
                    return refuse(format!(
                        "{file}: coordinate {} is {} ({}), and the run's item {} is {} ({}): the \
                         shard was edited",
                        j + 1,
                        place(check.coord),
                        c.place.label(),
                        at + 1,
                        place(whole[at]),
                        tensors.place(whole[at]).label()
                    ));
                }
                coords.push((at, check));
            }
            for (j, d) in s.report.directions.iter().enumerate() {
                let at = s.k - 1 + j * n;
                let check = direction_check(d, net)
                    .map_err(|e| ShardError(format!("{file}: direction {}: {e}", j + 1)))?;
                let expected = match at / per_part.max(1) {
                    0 => Scope::Global,
                    p => Scope::Part {
                        layer: (p - 1) / 2,
                        bias: (p - 1) % 2 == 1,
                    },
                };
                if check.scope != expected {
                    return refuse(format!(
                        "{file}: direction {} spans {}, and the run's item {} spans {}: the shard \
                         was edited",
                        j + 1,
                        span(check.scope),
                        at + 1,
                        span(expected)
                    ));
                }
                directions.push((at, check));
            }
        }
        coords.sort_by_key(|(i, _)| *i);
        directions.sort_by_key(|(i, _)| *i);
        let coords: Vec<CoordCheck> = coords.into_iter().map(|(_, c)| c).collect();
        let directions: Vec<DirectionCheck> = directions.into_iter().map(|(_, d)| d).collect();
        if r.floors.len() != net.layers().len() {
            return refuse(format!(
                "{} lists {} floors for a network of {} layers",
                at("floors"),
                r.floors.len(),
                net.layers().len()
            ));
        }
        if r.tensors.len() != tensors.expected.len() {
            return refuse(format!(
                "{} lists {} tensors, and the description's layout has {}",
                at("tensors"),
                r.tensors.len(),
                tensors.expected.len()
            ));
        }
        let method = Method::from_name(&r.method)
            .ok_or_else(|| ShardError(format!("{} is not a method plumb knows", at("method"))))?;
        let precision = match r.precision.as_str() {
            "f64" => Precision::F64,
            "f32" => Precision::F32,
            _ => return refuse(format!("{} is neither f64 nor f32", at("precision"))),
        };
        let result = CheckResult {
            method,
            precision,
            loss: r.loss,
            coverage: Coverage {
                sample,
                default_sample: r.coverage.default_sample,
                directions: per_part,
                parameters: r.coverage.parameters,
                checked: coords.len(),
            },
            tolerance: r.tolerance,
            floors: r.floors.clone(),
            coords,
            directions,
            analytic: Weights::new(Vec::new()),
        };
        let facts = RunFacts {
            description: r.description.clone(),
            description_hash: hash,
            weights: r.weights.clone(),
            data: r.data.clone(),
            seed: r.seed,
            samples: r.samples,
            step: r
                .step_rule
                .strip_prefix("fixed h = ")
                .and_then(|rule| rule.split(' ').next())
                .and_then(|h| h.parse().ok()),
            shard: None,
            // The reference gradient's norms are the whole tensor's, the same in every shard.
            gradient_norms: r.tensors.iter().map(|t| t.gradient_norm).collect(),
        };
        let mut report = build(&facts, &tensors, &result, worst_n);
        report.coordinates = Some(
            (0..result.coords.len())
                .map(|i| coord_report(&tensors, &result, i))
                .collect(),
        );
        Ok(report)
    }
}

/// The first setting in which two shards' runs differ, by its key in the report.
fn differs(a: &CheckReport, b: &CheckReport) -> Option<&'static str> {
    let same_figures = |x: &[f64], y: &[f64]| {
        x.len() == y.len() && x.iter().zip(y).all(|(p, q)| p.to_bits() == q.to_bits())
    };
    [
        ("description", a.description == b.description),
        ("description_hash", a.description_hash == b.description_hash),
        ("weights", a.weights == b.weights),
        ("data", a.data == b.data),
        ("seed", a.seed == b.seed),
        ("samples", a.samples == b.samples),
        ("method", a.method == b.method),
        ("step_rule", a.step_rule == b.step_rule),
        ("precision", a.precision == b.precision),
        ("tolerance", a.tolerance.to_bits() == b.tolerance.to_bits()),
        ("floors", same_figures(&a.floors, &b.floors)),
        ("coverage/sample", a.coverage.sample == b.coverage.sample),
        (
            "coverage/parameters",
            a.coverage.parameters == b.coverage.parameters,
        ),
        (
            "coverage/default_sample",
            a.coverage.default_sample == b.coverage.default_sample,
        ),
        (
            "coverage/directions_per_part",
            a.coverage.directions_per_part == b.coverage.directions_per_part,
        ),
    ]
    .into_iter()
    .find(|(_, same)| !same)
    .map(|(key, _)| key)
}

/// Each share of the split exactly once, naming the files that repeat a share or the shares
/// missing.
fn each_share_once(shards: &[Shard], n: usize) -> Result<(), ShardError> {
    let mut given: Vec<Option<&Path>> = vec![None; n];
    for s in shards {
        if let Some(other) = given[s.k - 1] {
            return refuse(format!(
                "{} and {} are both shard {}/{n}: give each of 1 to {n} exactly once",
                other.display(),
                s.path.display(),
                s.k
            ));
        }
        given[s.k - 1] = Some(&s.path);
    }
    let missing: Vec<String> = (1..=n)
        .filter(|&k| given[k - 1].is_none())
        .map(|k| format!("{k}/{n}"))
        .collect();
    if !missing.is_empty() {
        let have: Vec<String> = shards
            .iter()
            .map(|s| format!("{} ({}/{n})", s.path.display(), s.k))
            .collect();
        return refuse(format!(
            "shard{} {} missing; given: {}. Give each of 1 to {n} exactly once",
            if missing.len() == 1 { " is" } else { "s are" },
            list_some(&missing),
            have.join(", ")
        ));
    }
    Ok(())
}

/// The first few items of a list, and how many more.
fn list_some(items: &[String]) -> String {
    const SHOWN: usize = 8;
    let mut text = items[..items.len().min(SHOWN)].join(", ");
    if items.len() > SHOWN {
        text.push_str(&format!(" and {} more", items.len() - SHOWN));
    }
    text
}

fn place(c: Coord) -> String {
    format!("layer {} (row {}, column {})", c.layer + 1, c.row, c.col)
}

fn span(s: Scope) -> String {
    match s {
        Scope::Global => "every parameter".into(),
        Scope::Part { layer, bias: true } => format!("layer {}'s biases", layer + 1),
        Scope::Part { layer, bias: false } => format!("layer {}'s other weights", layer + 1),
    }
}

/// A 1-based layer of the network, as a 0-based index.
fn layer_index(layer: usize, net: &Network) -> Result<usize, String> {
    if (1..=net.layers().len()).contains(&layer) {
        Ok(layer - 1)
    } else {
        Err(format!(
            "`layer` is {layer}, not a layer of this {}-layer network",
            net.layers().len()
        ))
    }
}

/// The checker's record of a coordinate the report lists, refusing one outside the network.
fn coord_check(c: &CoordReport, net: &Network) -> Result<CoordCheck, String> {
    let layer = layer_index(c.place.layer, net)?;
    let (rows, cols) = net.layers()[layer].shape();
    let (row, col) = (c.place.row, c.place.column);
    if row >= rows || col >= cols {
        return Err(format!(
            "(row {row}, column {col}) is not in layer {}'s {rows} × {cols} matrix",
            layer + 1
        ));
    }
    Ok(c.check_at(Coord { layer, row, col }))
}

/// The checker's record of a direction the report lists.
fn direction_check(d: &DirectionReport, net: &Network) -> Result<DirectionCheck, String> {
    let scope = match (d.layer, d.bias) {
        (None, _) => Scope::Global,
        (Some(layer), Some(bias)) => Scope::Part {
            layer: layer_index(layer, net)?,
            bias,
        },
        (Some(_), None) => return Err("a direction over a layer without `bias`".into()),
    };
    Ok(DirectionCheck {
        scope,
        analytic: d.analytic,
        numeric: d.numeric,
        abs_error: (d.analytic - d.numeric).abs(),
        rel_error: d.rel_error,
        bound: d.bound,
        step: 0.0,
        status: d.status,
        one_step: d.one_step,
    })
}

/// The fuzz target's entry (fuzz/fuzz_targets/shard.rs) and the corpus replay's: `bytes` read as
/// one shard and as a split of one; the error's message, if any.
pub fn fuzz_shard(bytes: &[u8]) -> Result<usize, String> {
    let shards = Shards::parse(&[(PathBuf::from("fuzz.json"), bytes.to_vec())])
        .map_err(|e| e.to_string())?;
    Ok(shards.list[0].coordinates().len())
}
