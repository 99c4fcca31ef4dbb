//! `plumb merge SHARD...`: reads the shards of a `plumb check --shard K/N` and the description they
//! name; `plumb_fd::report::Shards` checks and joins them into the whole check's report, on the
//! description's layer graph (a dense description's too).

use std::path::Path;

use anyhow::{Context, Result, bail};
use plumb_fd::report::{GraphPlace, Shards, shard_description};
use plumb_formats::{GraphDescription, MAX_REPORT_BYTES, read_input};
use plumb_report::Verdict;

use crate::args::MergeArgs;
use crate::commands::check::graph_document;
use crate::output::{Settings, network_id};

pub fn run(args: &MergeArgs, settings: &Settings) -> Result<Verdict> {
    let files = args
        .shards
        .iter()
        .map(|p| {
            read_input(p, MAX_REPORT_BYTES)
                .map(|bytes| (p.clone(), bytes))
                .with_context(|| format!("{}: cannot read the shard", p.display()))
        })
        .collect::<Result<Vec<_>>>()?;
    // A dense description's shards are its layer graph's, as its check is.
    let path = shard_description(&files)?;
    // The description is an input of this run too: no report may be written over it.
    let mut inputs: Vec<&Path> = files.iter().map(|(p, _)| p.as_path()).collect();
    inputs.push(&path);
    settings.check_outputs("check", &inputs, &[])?;
    if !path.exists() {
        bail!(
            "{}: the shards were run on the description `{}`, which is not there from this \
             directory: run plumb merge where the check ran, or put the description at that path",
            files[0].0.display(),
            path.display()
        );
    }
    let desc = GraphDescription::read(&path)?;
    let report = Shards::<GraphPlace>::parse(&files)?.merge_graph(&desc, args.worst)?;
    let network = network_id(&desc);
    // The strip of every coordinate; the V-curve needs the weights and data, which a merge does
    // not load (run `plumb sweep` on the worst coordinates for it).
    let doc = graph_document(&report, network, settings);
    settings.emit(&report, doc)
}
