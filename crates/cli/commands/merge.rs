//! `plumb merge SHARD...`: reads the shards of a `plumb check --shard K/N` and the description they
//! name; `plumb_fd::report::Shards` checks and joins them into the whole check's report — a dense
//! check's or, for a description of another kind, the layer graph's.

use anyhow::{Context, Result};
use plumb_fd::report::{GraphPlace, Place, Shards, shard_description};
use plumb_formats::{AnyDescription, MAX_REPORT_BYTES, read_input};
use plumb_report::{Block, Verdict};

use crate::args::MergeArgs;
use crate::commands::check::{
    cases, document, graph_document, insert_before_findings, strip_plot, worst_table,
};
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
    let desc = match AnyDescription::read(&shard_description(&files)?)? {
        AnyDescription::Dense(desc, _) => desc,
        AnyDescription::Graph(desc) => {
            let report = Shards::<GraphPlace>::parse(&files)?.merge_graph(&desc, args.worst)?;
            let doc = graph_document(&report, &desc, settings);
            return settings.emit(&report, doc);
        }
    };
    let report = Shards::<Place>::parse(&files)?.merge(&desc, args.worst)?;
    let mut doc = document(&report, Block::Table(worst_table(&report.worst)));
    if settings.html.is_some() {
        // The strip of every coordinate; the V-curve needs the weights and data, which a merge
        // does not load (run `plumb sweep` on the worst coordinates for it).
        insert_before_findings(
            &mut doc,
            strip_plot(
                "relative error |a − n| / max(|a|, |n|, floor) of every checked coordinate",
                &report.rel_errors,
                report.tolerance,
                &report.precision,
            )
            .into_iter()
            .collect(),
        );
    }
    doc.command = "check".into();
    doc.network = Some(network_id(&desc));
    doc.cases = cases(&report);
    settings.emit(&report, doc)
}
