//! `plumb merge`: the shards of a `plumb check --shard K/N` read back into their report type and
//! joined into the report the whole check would have given (same coordinates, same figures, same
//! verdicts) — after making sure they are the shares of one run, each once and unedited.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use plumb_formats::GraphDescription;
use plumb_report::SCHEMA_VERSION;
use serde::Deserialize;
use serde::de::DeserializeOwned;
use serde_json::Value;

use super::check::{CheckReport, CoordReport, DirectionReport, RunFacts};
use super::description_hash;
use super::graph_check::{GraphCheckReport, build_graph, coord_report as graph_coord_report};
use super::place::{GraphPlace, Places};
use crate::{
    Coverage, Entry, GraphCheck, Method, OutsideDirection, Precision, Sample, graph_sample,
};

/// The most shards a check can be split into (the bound `--shard` gives).
pub const MAX_SHARDS: usize = 10_000;

/// Why shards cannot be merged; the message names the file at fault and how to fix it.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct ShardError(String);

fn refuse<T>(message: String) -> Result<T, ShardError> {
    Err(ShardError(message))
}

/// One shard's report, with its place in the split; `P` locates its coordinates (a graph's
/// [`GraphPlace`]).
#[derive(Debug)]
struct Shard<P> {
    path: PathBuf,
    k: usize,
    n: usize,
    report: CheckReport<CoordReport<P>>,
}

/// The checks every shard passes before its network's kind matters: a JSON `plumb check` report
/// of this schema version with a `shard` and its coordinates.
fn header(path: &Path, bytes: &[u8]) -> Result<Value, ShardError> {
    let at = path.display();
    let v: Value = serde_json::from_slice(bytes).map_err(|e| {
        ShardError(format!(
            "{at}: not a JSON report ({e}): the file is cut short or was edited; run that \
                 share of the check again (--shard K/N --format json)"
        ))
    })?;
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
    Ok(v)
}

/// The description the first of `files` was run on, as it names it: what decides whether the
/// shards are read as a dense check's or a layer graph's.
pub fn shard_description(files: &[(PathBuf, Vec<u8>)]) -> Result<PathBuf, ShardError> {
    let Some((path, bytes)) = files.first() else {
        return refuse("no shard given: name the files of every share of the split".into());
    };
    let v = header(path, bytes)?;
    match v["description"].as_str() {
        Some(d) => Ok(PathBuf::from(d)),
        None => refuse(format!(
            "{}: `description` is {}, not the path of a description",
            path.display(),
            v["description"]
        )),
    }
}

impl<P: DeserializeOwned> Shard<P> {
    /// A shard from the bytes of `path`: its [`header`], then every item of the type the report
    /// writes.
    fn read(path: &Path, bytes: &[u8]) -> Result<Shard<P>, ShardError> {
        let at = path.display();
        let mut v = header(path, bytes)?;
        // The lists are read item by item, so that an error names the item.
        let coords = v["coordinates"].take();
        let dirs = v["directions"].take();
        v["coordinates"] = Value::Null;
        v["directions"] = Value::Array(Vec::new());
        let mut report = CheckReport::<CoordReport<P>>::deserialize(&v).map_err(|e| {
            ShardError(format!(
                "{at}: not a check report as plumb writes it ({e}): the shard was edited; \
                     run that share of the check again"
            ))
        })?;
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
}

impl<P> Shard<P> {
    fn coordinates(&self) -> &[CoordReport<P>] {
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
        return refuse(format!(
            "{at}: the {what}s are not a list: the shard was edited; run that share of the \
             check again"
        ));
    };
    list.iter()
        .enumerate()
        .map(|(j, item)| {
            T::deserialize(item).map_err(|e| {
                ShardError(format!(
                    "{at}: {what} {}: {e}: the shard was edited; run that share of the check \
                     again",
                    j + 1
                ))
            })
        })
        .collect()
}

/// The shards of one split: the same run (inputs and settings) split the same n ways, each share
/// given exactly once. `P` locates the coordinates: [`GraphPlace`], as every description's check
/// runs on the layer graph (the dense engine's merge went with its check).
#[derive(Debug)]
pub struct Shards<P = GraphPlace> {
    list: Vec<Shard<P>>,
}

impl<P: DeserializeOwned> Shards<P> {
    /// Reads the shards from their files' bytes and checks they belong together.
    pub fn parse(files: &[(PathBuf, Vec<u8>)]) -> Result<Shards<P>, ShardError> {
        let list: Vec<Shard<P>> = files
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
}

impl<P> Shards<P> {
    /// The description the shards were run on, as they name it.
    pub fn description(&self) -> &Path {
        &self.list[0].report.description
    }

    /// Refuses a description whose hash is not the one the shards recorded.
    fn same_description(&self, path: &Path, hash: &str) -> Result<(), ShardError> {
        let recorded = &self.list[0].report.description_hash;
        if recorded != hash {
            return refuse(format!(
                "{}: the description is not the one the shards were run on (its hash is {hash}, \
                 the shards' {recorded}): merge where the shards' inputs are, unchanged",
                path.display(),
            ));
        }
        Ok(())
    }

    /// The run's settings as the shards record them (they agree: [`Shards::parse`]).
    fn settings(&self) -> Result<Settings, ShardError> {
        let first = &self.list[0];
        let r = &first.report;
        let at = |key: &str| format!("{}: `{key}`", first.path.display());
        let sample = Sample::parse(&r.coverage.sample)
            .map_err(|e| ShardError(format!("{}: {e}", at("coverage.sample"))))?;
        let method = Method::from_name(&r.method)
            .ok_or_else(|| ShardError(format!("{} is not a method plumb knows", at("method"))))?;
        let precision = match r.precision.as_str() {
            "f64" => Precision::F64,
            "f32" => Precision::F32,
            _ => return refuse(format!("{} is neither f64 nor f32", at("precision"))),
        };
        let step = r
            .step_rule
            .strip_prefix("fixed h = ")
            .and_then(|rule| rule.split(' ').next())
            .and_then(|h| h.parse().ok());
        Ok(Settings {
            sample,
            method,
            precision,
            step,
        })
    }

    /// Every shard's items of one list (`what`: coordinate or direction) in the whole run's
    /// order. Shard k of n holds items k-1, k-1+n, k-1+2n, … of the run's `total` (the split of
    /// `fd::check` and `fd::check_graph`); the whole list is known without the shards (the sample
    /// is drawn from the seed, the directions are K per scope), so each shard must hold as many
    /// as its place implies, and `place` checks each item against the run's item `at` and turns
    /// it into the checker's record. A dropped, repeated, invented or edited item is refused,
    /// naming its shard.
    fn rejoin<I, T>(
        &self,
        what: &str,
        total: usize,
        items: impl Fn(&Shard<P>) -> &[I],
        mut place: impl FnMut(&I, usize) -> Result<T, String>,
    ) -> Result<Vec<T>, ShardError> {
        let n = self.list[0].n;
        let mut out = Vec::new();
        for s in &self.list {
            let file = s.path.display();
            let given = items(s);
            // The items i < total with i % n == k - 1.
            let expected = total / n + usize::from(s.k - 1 < total % n);
            if given.len() != expected {
                return refuse(format!(
                    "{file}: {} {what}s where shard {}/{n} of the run's {total} must have \
                     {expected}: this shard was cut short or edited",
                    given.len(),
                    s.k
                ));
            }
            for (j, item) in given.iter().enumerate() {
                let at = s.k - 1 + j * n;
                let checked = place(item, at)
                    .map_err(|e| ShardError(format!("{file}: {what} {}: {e}", j + 1)))?;
                out.push((at, checked));
            }
        }
        out.sort_by_key(|(at, _)| *at);
        Ok(out.into_iter().map(|(_, t)| t).collect())
    }
}

/// What the shards record of how the run was made, read back.
struct Settings {
    sample: Sample,
    method: Method,
    precision: Precision,
    step: Option<f64>,
}

/// The scope of the run's direction `at` when there are `per_part` per scope: the first
/// `per_part` over everything, then `per_part` over each part (dense) or tensor (graph) in order.
fn scope_at(at: usize, per_part: usize) -> Option<usize> {
    (at / per_part.max(1)).checked_sub(1)
}

impl Shards<GraphPlace> {
    /// The whole run's report of a layer-graph check from its shares, refusing a description
    /// that is not the one the shards ran on and a dropped, repeated, invented or edited item,
    /// naming its shard: a coordinate is (tensor, flat index), each the one of the run's sample that
    /// belongs in its place, named as the graph names it; a direction spans every tensor or the
    /// one its place in the run implies.
    pub fn merge_graph(
        &self,
        desc: &GraphDescription,
        worst_n: usize,
    ) -> Result<GraphCheckReport, ShardError> {
        let first = &self.list[0];
        let at = |key: &str| format!("{}: `{key}`", first.path.display());
        let r = &first.report;
        self.same_description(&desc.path, &description_hash(desc))?;
        let graph = &desc.graph;
        let specs = graph.tensors();
        let places = Places::new(desc);
        let files = places.files();
        let by_name: HashMap<&str, usize> = files
            .iter()
            .enumerate()
            .map(|(f, file)| (file.name.as_str(), f))
            .collect();
        let set = self.settings()?;
        let whole = graph_sample(graph, set.sample, r.seed)
            .map_err(|e| ShardError(format!("{}: {e}", at("coverage.sample"))))?;
        let per_part = r.coverage.directions_per_part;
        let coords = self.rejoin(
            "coordinate",
            whole.len(),
            |s| s.coordinates(),
            |c, at| {
                let Some(&f) = by_name.get(c.place.tensor.as_str()) else {
                    let names: Vec<String> =
                        files.iter().map(|f| format!("`{}`", f.name)).collect();
                    return Err(format!(
                        "`{}` is not a tensor of {}'s weight file (its tensors: {})",
                        c.place.tensor,
                        desc.path.display(),
                        list_some(&names)
                    ));
                };
                let (index, size) = (c.place.index, places.file_size(f));
                if index >= size {
                    return Err(format!(
                        "index {index} is outside `{}`, whose flat indices run from 0 to {}",
                        files[f].name,
                        size - 1
                    ));
                }
                let (wt, wk) = whole[at];
                let expected = places.place(wt, wk);
                if c.place != expected {
                    return Err(format!(
                        "{} (layer {}, {}) is not the run's item {}, {} (layer {}, {}): the shard \
                         was edited",
                        c.place.label(),
                        c.place.layer,
                        c.place.location,
                        at + 1,
                        expected.label(),
                        expected.layer,
                        expected.location
                    ));
                }
                Ok(c.check_at(Entry {
                    tensor: wt,
                    index: wk,
                }))
            },
        )?;
        let spans = |t: Option<usize>| t.map_or("every tensor".to_string(), |t| places.span(t));
        let directions = self.rejoin(
            "direction",
            per_part.saturating_mul(1 + specs.len()),
            |s| &s.report.directions,
            |d: &DirectionReport, at| {
                let expected = scope_at(at, per_part);
                let scope = expected.map_or("all".to_string(), |t| places.span(t));
                if d.scope != scope {
                    return Err(format!(
                        "spans {}, and the run's item {} spans {}: the shard was edited",
                        d.scope,
                        at + 1,
                        spans(expected)
                    ));
                }
                let layer = expected.map(|t| specs[t].layer + 1);
                let bias = expected.and_then(|t| places.span_bias(t));
                if d.layer != layer || d.bias != bias {
                    return Err(format!(
                        "`layer` {} and `bias` {} are not those of its scope `{}`: the shard was \
                         edited",
                        d.layer.map_or("null".into(), |l| l.to_string()),
                        d.bias.map_or("null".into(), |b| b.to_string()),
                        d.scope
                    ));
                }
                Ok(OutsideDirection {
                    tensor: expected,
                    analytic: d.analytic,
                    numeric: d.numeric,
                    rel_error: d.rel_error,
                    bound: d.bound,
                    status: d.status,
                    one_step: d.one_step,
                    wide: d.wide,
                })
            },
        )?;
        if r.floors.len() != specs.len() {
            return refuse(format!(
                "{} lists {} floors, and the graph has {} tensors",
                at("floors"),
                r.floors.len(),
                specs.len()
            ));
        }
        if r.tensors.len() != files.len()
            || r.tensors.iter().zip(files).any(|(a, b)| a.name != b.name)
        {
            return refuse(format!(
                "{} are not the weight file's tensors in the description's order: the shard was \
                 edited",
                at("tensors")
            ));
        }
        let result = GraphCheck {
            method: set.method,
            precision: set.precision,
            loss: r.loss,
            coverage: self.coverage(set.sample, coords.len()),
            tolerance: r.tolerance,
            floors: r.floors.clone(),
            coords,
            directions,
            analytic: Vec::new(),
        };
        let facts = self.facts(description_hash(desc), set.step);
        let mut report = build_graph(&facts, &places, &result, worst_n);
        report.coordinates = Some(
            result
                .coords
                .iter()
                .map(|c| graph_coord_report(&places, &result, c))
                .collect(),
        );
        Ok(report)
    }
}

impl<P> Shards<P> {
    /// What the merged run covered: the shards' sample and directions per part, `checked`
    /// coordinates joined, and their losses through a response summed (each coordinate's are
    /// taken in its one shard as the whole check takes them).
    fn coverage(&self, sample: Sample, checked: usize) -> Coverage {
        let r = &self.list[0].report.coverage;
        Coverage {
            sample,
            default_sample: r.default_sample,
            directions: r.directions_per_part,
            parameters: r.parameters,
            checked,
            responded: self.list.iter().map(|s| s.report.coverage.responded).sum(),
            shared: self.list.iter().map(|s| s.report.coverage.shared).sum(),
        }
    }

    /// What the merged report says of the run besides its results: the shards' inputs and
    /// settings, no shard, and the reference gradient's norms, which are the whole tensor's, the
    /// same in every shard.
    fn facts(&self, description_hash: String, step: Option<f64>) -> RunFacts {
        let r = &self.list[0].report;
        RunFacts {
            description: r.description.clone(),
            description_hash,
            weights: r.weights.clone(),
            data: r.data.clone(),
            seed: r.seed,
            samples: r.samples,
            step,
            shard: None,
            gradient_norms: r.tensors.iter().map(|t| t.gradient_norm).collect(),
        }
    }
}

/// The first setting in which two shards' runs differ, by its key in the report.
fn differs<C>(a: &CheckReport<C>, b: &CheckReport<C>) -> Option<&'static str> {
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
fn each_share_once<P>(shards: &[Shard<P>], n: usize) -> Result<(), ShardError> {
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

/// The fuzz target's entry (fuzz/fuzz_targets/shard.rs) and the corpus replay's: `bytes` read as
/// one shard and as a split of one (every description's check runs on its layer graph, so that is
/// how a merge reads them); its count of coordinates or its error's message.
pub fn fuzz_shard(bytes: &[u8]) -> Result<usize, String> {
    let files = [(PathBuf::from("fuzz.json"), bytes.to_vec())];
    let _ = shard_description(&files);
    let shards = Shards::<GraphPlace>::parse(&files).map_err(|e| e.to_string())?;
    Ok(shards.list[0].coordinates().len())
}
