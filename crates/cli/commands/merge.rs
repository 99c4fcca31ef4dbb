//! `plumb merge SHARD...`: the shards of a `plumb check --shard K/N` joined into the report the
//! whole check would have given (same coordinates, same figures, same verdicts).

use std::path::Path;

use anyhow::{Context, Result, bail};
use plumb_engine::{Coord, Network, Weights};
use plumb_fd::{
    CheckResult, CoordCheck, Coverage, DirectionCheck, Method, Precision, Sample, Scope, Status,
};
use plumb_formats::{Description, MAX_REPORT_BYTES, read_input};
use plumb_report::Verdict;
use serde_json::Value;

use crate::args::MergeArgs;
use crate::commands::check::{
    RunFacts, build, cases, document, insert_before_findings, strip_plot,
};
use crate::commands::locate::Tensors;
use crate::output::{SCHEMA_VERSION, Settings, network_id};

/// The most shards a check can be split into (the bound `--shard` gives).
const MAX_SHARDS: u64 = 10_000;

/// One shard's report, with what identifies its place.
struct Shard<'a> {
    path: &'a Path,
    k: usize,
    n: usize,
    v: Value,
}

impl<'a> Shard<'a> {
    fn read(path: &'a Path) -> Result<Shard<'a>> {
        let bytes = read_input(path, MAX_REPORT_BYTES)
            .with_context(|| format!("{}: cannot read the shard", path.display()))?;
        let v: Value = serde_json::from_slice(&bytes)
            .with_context(|| format!("{}: not a JSON report", path.display()))?;
        check_shard(path, &v)?;
        let (k, n) = match (v["shard"][0].as_u64(), v["shard"][1].as_u64()) {
            (Some(k), Some(n)) if (1..=MAX_SHARDS).contains(&n) && (1..=n).contains(&k) => {
                (k as usize, n as usize)
            }
            _ => bail!(
                "{}: `shard` is {}, not [K, N] with 1 ≤ K ≤ N ≤ {MAX_SHARDS}",
                path.display(),
                v["shard"]
            ),
        };
        Ok(Shard { path, k, n, v })
    }

    fn list(&self, key: &str) -> &[Value] {
        self.v[key].as_array().map_or(&[], Vec::as_slice)
    }
}

pub fn run(args: &MergeArgs, settings: &Settings) -> Result<Verdict> {
    let shards: Vec<Shard> = args
        .shards
        .iter()
        .map(|p| Shard::read(p))
        .collect::<Result<_>>()?;
    let first = &shards[0];
    let n = first.n;
    // The same run split the same n ways: same inputs and settings, each share once.
    for s in &shards {
        if s.n != n {
            bail!(
                "{}: shard {}/{} of a run split {} ways, and {} is {}/{n}: merge the shards of one split",
                s.path.display(),
                s.k,
                s.n,
                s.n,
                first.path.display(),
                first.k
            );
        }
        for key in [
            "description",
            "description_hash",
            "weights",
            "data",
            "seed",
            "samples",
            "method",
            "step_rule",
            "precision",
            "tolerance",
            "floors",
            "coverage/sample",
            "coverage/parameters",
            "coverage/default_sample",
            "coverage/directions_per_part",
        ] {
            let pointer = format!("/{key}");
            if s.v.pointer(&pointer) != first.v.pointer(&pointer) {
                bail!(
                    "{}: `{key}` differs from {}'s: these are shards of different runs",
                    s.path.display(),
                    first.path.display()
                );
            }
        }
    }
    each_share_once(&shards, n)?;
    let path = first.v["description"].as_str().unwrap_or_default();
    let desc = Description::read(Path::new(path))?;
    let id = network_id(&desc);
    if first.v["description_hash"].as_str() != Some(id.hash.as_str()) {
        bail!(
            "{path}: the description is not the one the shards were run on (its hash is {}, the \
             shards' {}): merge where the shards' inputs are, unchanged",
            id.hash,
            first.v["description_hash"]
        );
    }
    let tensors = Tensors::new(&desc);
    let net = &desc.network;
    // Shard k of n holds items k-1, k-1+n, k-1+2n, … of the whole run's lists (fd::check). The
    // whole lists are known without the shards: the coordinates are the sample drawn from the seed,
    // the directions K per part. So each item is checked against the one that belongs in its
    // place: a dropped, repeated or invented item is refused, naming its shard.
    let cov = &first.v["coverage"];
    let sample = Sample::parse(cov["sample"].as_str().unwrap_or_default())
        .map_err(|e| anyhow::anyhow!("{}: `coverage.sample`: {e}", first.path.display()))?;
    let seed = first.v["seed"]
        .as_u64()
        .with_context(|| format!("{}: `seed` is not a whole number", first.path.display()))?;
    let whole = plumb_fd::select(net, sample, seed)
        .map_err(|e| anyhow::anyhow!("{}: `coverage.sample`: {e}", first.path.display()))?;
    let per_part = cov["directions_per_part"].as_u64().with_context(|| {
        format!(
            "{}: `coverage.directions_per_part` is not a whole number",
            first.path.display()
        )
    })? as usize;
    let parts = 1 + 2 * net.layers().len();
    let whole_directions = per_part.saturating_mul(parts);
    let mut coords = Vec::new();
    let mut directions = Vec::new();
    for s in &shards {
        for (key, total) in [
            ("coordinates", whole.len()),
            ("directions", whole_directions),
        ] {
            let expected = (total + n - s.k) / n;
            if s.list(key).len() != expected {
                bail!(
                    "{}: {} {key} where shard {}/{n} of the run's {total} must have {expected}: \
                     this shard was cut short or edited",
                    s.path.display(),
                    s.list(key).len(),
                    s.k
                );
            }
        }
        for (j, c) in s.list("coordinates").iter().enumerate() {
            let at = s.k - 1 + j * n;
            let c = coord(c, net)
                .with_context(|| format!("{}: coordinate {}", s.path.display(), j + 1))?;
            if c.coord != whole[at] {
                bail!(
                    "{}: coordinate {} is {}, and the run's item {} is {}: the shard was edited",
                    s.path.display(),
                    j + 1,
                    place(c.coord),
                    at + 1,
                    place(whole[at])
                );
            }
            coords.push((at, c));
        }
        for (j, d) in s.list("directions").iter().enumerate() {
            let at = s.k - 1 + j * n;
            let d = direction(d, net)
                .with_context(|| format!("{}: direction {}", s.path.display(), j + 1))?;
            let part = at / per_part.max(1);
            let expected = match part {
                0 => Scope::Global,
                p => Scope::Part {
                    layer: (p - 1) / 2,
                    bias: (p - 1) % 2 == 1,
                },
            };
            if d.scope != expected {
                bail!(
                    "{}: direction {} spans {}, and the run's item {} spans {}: the shard was edited",
                    s.path.display(),
                    j + 1,
                    span(d.scope),
                    at + 1,
                    span(expected)
                );
            }
            directions.push((at, d));
        }
    }
    coords.sort_by_key(|(i, _)| *i);
    directions.sort_by_key(|(i, _)| *i);
    let coords: Vec<CoordCheck> = coords.into_iter().map(|(_, c)| c).collect();
    let directions: Vec<DirectionCheck> = directions.into_iter().map(|(_, d)| d).collect();
    let at = |key: &str| format!("{}: `{key}`", first.path.display());
    let floors: Vec<f64> = first
        .list("floors")
        .iter()
        .map(|f| f.as_f64().unwrap_or(f64::NAN))
        .collect();
    if floors.len() != net.layers().len() {
        bail!(
            "{} lists {} floors for a network of {} layers",
            at("floors"),
            floors.len(),
            net.layers().len()
        );
    }
    let norms: Vec<f64> = first
        .list("tensors")
        .iter()
        .map(|t| t["gradient_norm"].as_f64().unwrap_or(f64::NAN))
        .collect();
    if norms.len() != tensors.expected.len() {
        bail!(
            "{} lists {} tensors, and the description's layout has {}",
            at("tensors"),
            norms.len(),
            tensors.expected.len()
        );
    }
    let method = Method::from_name(first.v["method"].as_str().unwrap_or_default())
        .with_context(|| format!("{} is not a method plumb knows", at("method")))?;
    let precision = if first.v["precision"] == "f32" {
        Precision::F32
    } else {
        Precision::F64
    };
    let result = CheckResult {
        method,
        precision,
        loss: first.v["loss"].as_f64().unwrap_or(f64::NAN),
        coverage: Coverage {
            sample,
            default_sample: cov["default_sample"].as_bool().unwrap_or(false),
            directions: cov["directions_per_part"].as_u64().unwrap_or(0) as usize,
            parameters: cov["parameters"].as_u64().unwrap_or(0) as usize,
            checked: coords.len(),
        },
        tolerance: first.v["tolerance"].as_f64().unwrap_or(0.0),
        floors,
        coords,
        directions,
        analytic: Weights::new(Vec::new()),
    };
    let facts = RunFacts {
        description: path.into(),
        description_hash: id.hash.clone(),
        weights: serde_json::from_value(first.v["weights"].clone())
            .with_context(|| at("weights"))?,
        data: serde_json::from_value(first.v["data"].clone()).with_context(|| at("data"))?,
        seed,
        samples: first.v["samples"].as_u64().unwrap_or(0) as usize,
        step: first.v["step_rule"]
            .as_str()
            .and_then(|r| r.strip_prefix("fixed h = "))
            .and_then(|r| r.split(' ').next())
            .and_then(|h| h.parse().ok()),
        shard: None,
        // The reference gradient's norms are the whole tensor's, the same in every shard.
        gradient_norms: norms,
    };
    let mut report = build(&facts, &tensors, &result, args.worst);
    report.coordinates = Some(
        (0..result.coords.len())
            .map(|i| crate::commands::check::coord_report(&tensors, &result, i))
            .collect(),
    );
    let mut doc = document(&report);
    if settings.html.is_some() {
        // The strip of every coordinate; the V-curve needs the weights and data, which a merge
        // does not load (run `plumb sweep` on the worst coordinates for it).
        insert_before_findings(
            &mut doc,
            strip_plot(
                "relative error |a − n| / max(|a|, |n|, floor) of every checked coordinate",
                &report.rel_errors,
                report.tolerance,
                report.precision,
            )
            .into_iter()
            .collect(),
        );
    }
    doc.command = "check".into();
    doc.network = Some(id);
    doc.cases = cases(&report);
    settings.emit(&report, doc)
}

fn check_shard(p: &Path, v: &Value) -> Result<()> {
    if v["command"] != "check" {
        bail!("{}: not a `plumb check` report", p.display());
    }
    if v["schema_version"].as_u64() != Some(SCHEMA_VERSION.into()) {
        bail!(
            "{}: `schema_version` is {}, and this plumb reads {SCHEMA_VERSION}: run the check again \
             with this plumb",
            p.display(),
            v["schema_version"]
        );
    }
    if !v["shard"].is_array() || !v["coordinates"].is_array() {
        bail!(
            "{}: not a shard: run the check with --shard K/N --format json",
            p.display()
        );
    }
    Ok(())
}

fn status(s: &str) -> Result<Status> {
    match Status::from_name(s) {
        Some(st) => Ok(st),
        None => bail!("an unknown status `{s}`"),
    }
}

/// A figure: a number, or null (NaN and infinities are written as null). Any other value, or
/// none, is an edited report.
fn num(v: &Value, key: &str) -> Result<f64> {
    match v.get(key) {
        Some(Value::Null) => Ok(f64::NAN),
        Some(x) if x.is_number() => Ok(x.as_f64().unwrap_or(f64::NAN)),
        Some(x) => bail!("`{key}` is {x}, not a number or null"),
        None => bail!("`{key}` is missing"),
    }
}

/// Each share of the split exactly once, naming the files that repeat a share or the shares
/// missing.
fn each_share_once(shards: &[Shard], n: usize) -> Result<()> {
    let mut given: Vec<Option<&Path>> = vec![None; n];
    for s in shards {
        if let Some(other) = given[s.k - 1] {
            bail!(
                "{} and {} are both shard {}/{n}: give each of 1 to {n} exactly once",
                other.display(),
                s.path.display(),
                s.k
            );
        }
        given[s.k - 1] = Some(s.path);
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
        bail!(
            "shard{} {} missing; given: {}. Give each of 1 to {n} exactly once",
            if missing.len() == 1 { " is" } else { "s are" },
            list_some(&missing),
            have.join(", ")
        );
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
fn layer_of(v: &Value, net: &Network) -> Result<usize> {
    match v["layer"].as_u64() {
        Some(l) if (1..=net.layers().len() as u64).contains(&l) => Ok(l as usize - 1),
        _ => bail!(
            "`layer` is {}, not a layer of this {}-layer network",
            v["layer"],
            net.layers().len()
        ),
    }
}

fn coord(c: &Value, net: &Network) -> Result<CoordCheck> {
    let layer = layer_of(c, net)?;
    let (rows, cols) = net.layers()[layer].shape();
    let (row, col) = match (c["row"].as_u64(), c["column"].as_u64()) {
        (Some(r), Some(k)) if r < rows as u64 && k < cols as u64 => (r as usize, k as usize),
        _ => bail!(
            "(row {}, column {}) is not in layer {}'s {rows} × {cols} matrix",
            c["row"],
            c["column"],
            layer + 1
        ),
    };
    Ok(CoordCheck {
        coord: Coord { layer, row, col },
        analytic: num(c, "analytic")?,
        numeric: num(c, "numeric")?,
        abs_error: num(c, "abs_error")?,
        rel_error: num(c, "rel_error")?,
        bound: num(c, "bound")?,
        step: num(c, "step")?,
        status: status(c["status"].as_str().unwrap_or_default())?,
        retried: c["retried"].as_bool().unwrap_or(false),
    })
}

fn direction(d: &Value, net: &Network) -> Result<DirectionCheck> {
    let scope = if d["layer"].is_null() {
        Scope::Global
    } else {
        let bias = d["bias"]
            .as_bool()
            .context("a direction over a layer without `bias`")?;
        Scope::Part {
            layer: layer_of(d, net)?,
            bias,
        }
    };
    Ok(DirectionCheck {
        scope,
        analytic: num(d, "analytic")?,
        numeric: num(d, "numeric")?,
        abs_error: (num(d, "analytic")? - num(d, "numeric")?).abs(),
        rel_error: num(d, "rel_error")?,
        bound: num(d, "bound")?,
        step: 0.0,
        status: status(d["status"].as_str().unwrap_or_default())?,
    })
}
