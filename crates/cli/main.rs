//! The `plumb` command: parses the command line, runs the command, renders its report and sets the
//! exit code (0 everything checked holds, 1 a finding of severity error, 2 unusable input).

mod args;
mod commands;
mod demo;
mod inputs;
mod output;
mod progress;

use std::process::ExitCode;

use clap::Parser;
use plumb_report::{Verdict, visible};

use args::{Cli, Command};
use output::Settings;

fn main() -> ExitCode {
    plumb_fd::keep_freed_memory();
    let cli = Cli::parse();
    let settings = Settings::from_args(&cli.common);
    if let Err(e) = settings.check_outputs(
        cli.command.report_name(),
        &cli.command.inputs(),
        &cli.command.outputs(),
    ) {
        eprintln!("plumb: error: {}", visible(&message(&e), false));
        return ExitCode::from(2);
    }
    let result = match &cli.command {
        Command::Demo(a) => demo::run(a, &settings),
        Command::Shapes(a) => commands::shapes::run(a, &settings),
        Command::Grad(a) => commands::grad::run(a, &settings),
        Command::Check(a) => commands::check::run(a, &settings),
        Command::Sweep(a) => commands::sweep::run(a, &settings),
        Command::Compare(a) => commands::compare::run(a, &settings),
        Command::Probe(a) => commands::probe::run(a, &settings),
        Command::Audit(a) => commands::audit::run(a, &settings),
        Command::Merge(a) => commands::merge::run(a, &settings),
    };
    match result {
        Ok(Verdict::Pass) => ExitCode::SUCCESS,
        Ok(Verdict::Fail | Verdict::Inconclusive) => ExitCode::from(1),
        Err(e) => {
            eprintln!("plumb: error: {}", visible(&message(&e), false));
            ExitCode::from(2)
        }
    }
}

/// The error and its causes, leaving out a cause whose text the message already carries.
fn message(e: &anyhow::Error) -> String {
    let mut out = e.to_string();
    for cause in e.chain().skip(1) {
        let text = cause.to_string();
        if !out.contains(&text) {
            out.push_str(": ");
            out.push_str(&text);
        }
    }
    out
}
