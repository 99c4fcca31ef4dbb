//! `plumb merge SHARD...`: the shards of a `plumb check --shard K/N` joined into the report the
//! whole check would have given (same coordinates, same figures, same verdicts).

use std::path::Path;

use anyhow::{Context, Result, bail};
use plumb_engine::{Coord, Weights};
use plumb_fd::{
    CheckResult, CoordCheck, Coverage, DirectionCheck, Method, Precision, Sample, Scope, Status,
};
use plumb_formats::Description;
use plumb_report::Verdict;
use serde_json::Value;

use crate::args::MergeArgs;
use crate::commands::check::{RunFacts, build, cases, document};
use crate::commands::locate::Tensors;
use crate::output::{Settings, network_id};

pub fn run(args: &MergeArgs, settings: &Settings) -> Result<Verdict> {
    let shards: Vec<(usize, Value)> = args
        .shards
        .iter()
        .map(|p| {
            let text = std::fs::read_to_string(p)
                .with_context(|| format!("{}: cannot read the shard", p.display()))?;
            let v: Value = serde_json::from_str(&text)
                .with_context(|| format!("{}: not a JSON report", p.display()))?;
            check_shard(p, &v)?;
            Ok((v["shard"][0].as_u64().unwrap_or(0) as usize, v))
        })
        .collect::<Result<_>>()?;
    let first = &shards[0].1;
    let n = first["shard"][1].as_u64().unwrap_or(0) as usize;
    // The same run split n ways: same inputs and settings, each share once.
    for key in [
        "description",
        "weights",
        "data",
        "seed",
        "samples",
        "method",
        "step_rule",
        "precision",
        "tolerance",
        "floors",
        "coverage",
    ] {
        for (p, (_, v)) in args.shards.iter().zip(&shards) {
            let same = if key == "coverage" {
                v[key]["sample"] == first[key]["sample"]
                    && v[key]["parameters"] == first[key]["parameters"]
            } else {
                v[key] == first[key]
            };
            if !same {
                bail!(
                    "{}: `{key}` differs from {}'s: these are shards of different runs",
                    p.display(),
                    args.shards[0].display()
                );
            }
        }
    }
    let mut seen: Vec<usize> = shards.iter().map(|(k, _)| *k).collect();
    seen.sort_unstable();
    if seen != (1..=n).collect::<Vec<_>>() {
        bail!("the shards are {seen:?} of {n}: give each of 1 to {n} exactly once");
    }
    let path = first["description"].as_str().unwrap_or_default();
    let desc = Description::read(Path::new(path))?;
    let tensors = Tensors::new(&desc);
    // Shard k of n holds items k-1, k-1+n, k-1+2n, … of the whole run's lists (fd::check): put
    // each back in its place, so the merged lists are in the unsharded run's order.
    let mut coords = Vec::new();
    let mut directions = Vec::new();
    for (k, v) in &shards {
        for (j, c) in v["coordinates"]
            .as_array()
            .into_iter()
            .flatten()
            .enumerate()
        {
            coords.push((k - 1 + j * n, coord(c)?));
        }
        for (j, d) in v["directions"].as_array().into_iter().flatten().enumerate() {
            directions.push((k - 1 + j * n, direction(d)?));
        }
    }
    coords.sort_by_key(|(i, _)| *i);
    directions.sort_by_key(|(i, _)| *i);
    let coords: Vec<CoordCheck> = coords.into_iter().map(|(_, c)| c).collect();
    let directions: Vec<DirectionCheck> = directions.into_iter().map(|(_, d)| d).collect();
    let method = Method::from_name(first["method"].as_str().unwrap_or_default())
        .context("an unknown method in the shards")?;
    let precision = if first["precision"] == "f32" {
        Precision::F32
    } else {
        Precision::F64
    };
    let cov = &first["coverage"];
    let result = CheckResult {
        method,
        precision,
        loss: first["loss"].as_f64().unwrap_or(f64::NAN),
        coverage: Coverage {
            sample: Sample::parse(cov["sample"].as_str().unwrap_or("all"))
                .map_err(anyhow::Error::msg)?,
            default_sample: cov["default_sample"].as_bool().unwrap_or(false),
            directions: cov["directions_per_part"].as_u64().unwrap_or(0) as usize,
            parameters: cov["parameters"].as_u64().unwrap_or(0) as usize,
            checked: coords.len(),
        },
        tolerance: first["tolerance"].as_f64().unwrap_or(0.0),
        floors: first["floors"]
            .as_array()
            .into_iter()
            .flatten()
            .map(|f| f.as_f64().unwrap_or(0.0))
            .collect(),
        coords,
        directions,
        analytic: Weights::new(Vec::new()),
    };
    let facts = RunFacts {
        description: path.into(),
        weights: serde_json::from_value(first["weights"].clone())
            .context("the shards' `weights`")?,
        data: serde_json::from_value(first["data"].clone()).context("the shards' `data`")?,
        seed: first["seed"].as_u64().unwrap_or(0),
        samples: first["samples"].as_u64().unwrap_or(0) as usize,
        step: first["step_rule"]
            .as_str()
            .and_then(|r| r.strip_prefix("fixed h = "))
            .and_then(|r| r.split(' ').next())
            .and_then(|h| h.parse().ok()),
        shard: None,
        // The reference gradient's norms are the whole tensor's, the same in every shard.
        gradient_norms: first["tensors"]
            .as_array()
            .into_iter()
            .flatten()
            .map(|t| t["gradient_norm"].as_f64().unwrap_or(f64::NAN))
            .collect(),
    };
    let mut report = build(&facts, &tensors, &result, args.worst);
    report.coordinates = Some(
        (0..result.coords.len())
            .map(|i| crate::commands::check::coord_report(&tensors, &result, i))
            .collect(),
    );
    let mut doc = document(&report);
    doc.command = "check".into();
    doc.network = Some(network_id(&desc));
    doc.cases = cases(&report);
    settings.emit(&report, doc)
}

fn check_shard(p: &Path, v: &Value) -> Result<()> {
    if v["command"] != "check" {
        bail!("{}: not a `plumb check` report", p.display());
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
    Ok(match s {
        "match" => Status::Match,
        "mismatch" => Status::Mismatch,
        "unreliable" => Status::Unreliable,
        other => bail!("an unknown status `{other}` in a shard"),
    })
}

fn num(v: &Value, key: &str) -> Result<f64> {
    // NaN and infinities are written as null.
    Ok(v.get(key).and_then(Value::as_f64).unwrap_or(f64::NAN))
}

fn coord(c: &Value) -> Result<CoordCheck> {
    let idx = |k: &str| {
        c[k].as_u64()
            .map(|v| v as usize)
            .with_context(|| format!("a coordinate without `{k}` in a shard"))
    };
    Ok(CoordCheck {
        coord: Coord {
            layer: idx("layer")? - 1,
            row: idx("row")?,
            col: idx("column")?,
        },
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

fn direction(d: &Value) -> Result<DirectionCheck> {
    let scope = match (d["layer"].as_u64(), d["bias"].as_bool()) {
        (Some(l), Some(b)) => Scope::Part {
            layer: l as usize - 1,
            bias: b,
        },
        _ => Scope::Global,
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
