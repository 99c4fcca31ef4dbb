//! The command line as parsed, before validation (see `main.rs` for how each command validates it).

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand, ValueEnum};

/// plumb: prove a hand-written backpropagation right, check every weight matrix's shape, and audit
/// weight files before they ship.
#[derive(Debug, Parser)]
#[command(
    name = "plumb",
    version,
    propagate_version = true,
    max_term_width = 100
)]
#[command(
    after_help = "Exit codes: 0 everything checked holds; 1 a finding of severity error; \
                        2 the input could not be used."
)]
pub struct Cli {
    #[command(flatten)]
    pub common: Common,
    #[command(subcommand)]
    pub command: Command,
}

/// Flags every command takes.
#[derive(Debug, Args)]
pub struct Common {
    /// Output format of the report on stdout.
    #[arg(long, global = true, value_enum, default_value_t = FormatArg::Table)]
    pub format: FormatArg,
    /// Colour the table output: auto (only on a terminal, not under NO_COLOR or TERM=dumb), always, never.
    #[arg(long, global = true, value_enum, default_value_t = ColorArg::Auto)]
    pub color: ColorArg,
    /// Seed for initialised weights and synthetic data.
    #[arg(long, global = true, default_value_t = 0)]
    pub seed: u64,
    /// No notes or progress on stderr; the report still goes to stdout.
    #[arg(long, short = 'q', global = true)]
    pub quiet: bool,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the whole workflow on the built-in example (an invented pump-state classifier) and explain it.
    Demo(DemoArgs),
    /// Dimension audit: the shapes the description implies against those in a weight file.
    Shapes(ShapesArgs),
    /// The reference loss and gradient (to a file with -o).
    Grad(GradArgs),
}

#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Also write the example's files (description, weights, data) into this directory.
    #[arg(long, value_name = "DIR")]
    pub write: Option<PathBuf>,
    /// Let --write replace files that already exist.
    #[arg(long)]
    pub force: bool,
}

#[derive(Debug, Args)]
pub struct ShapesArgs {
    /// The network description (TOML).
    #[arg(value_name = "NET")]
    pub net: PathBuf,
    /// The weight file to audit (.npy, .npz, .safetensors).
    #[arg(short, long, value_name = "W")]
    pub weights: Option<PathBuf>,
}

/// Where the weights and data come from; shared by the commands that run the engine.
#[derive(Debug, Args)]
pub struct Inputs {
    /// The network description (TOML).
    #[arg(value_name = "NET")]
    pub net: PathBuf,
    /// Weight file (.npy, .npz, .safetensors); without it, weights are drawn with --init from --seed.
    #[arg(short, long, value_name = "W")]
    pub weights: Option<PathBuf>,
    /// Data file (CSV with a header row, or .npz with arrays x and y); without it, a seeded synthetic batch.
    #[arg(short, long, value_name = "D")]
    pub data: Option<PathBuf>,
    /// Initialisation scheme for weights drawn without --weights.
    #[arg(long, value_enum, default_value_t = InitArg::GlorotUniform)]
    pub init: InitArg,
    /// Samples in the synthetic batch drawn without --data.
    #[arg(long, value_name = "M", default_value_t = 32)]
    pub batch: usize,
}

#[derive(Debug, Args)]
pub struct GradArgs {
    #[command(flatten)]
    pub inputs: Inputs,
    /// Write the gradient here, in the description's layout; the format follows the extension
    /// (.npz, .safetensors, or .npy for a one-tensor layout).
    #[arg(short, long, value_name = "G")]
    pub output: Option<PathBuf>,
    /// Element type of the gradient file [default: that of the weight file, f64 without one].
    #[arg(long, value_enum)]
    pub dtype: Option<DTypeArg>,
    /// Let -o replace a file that already exists.
    #[arg(long)]
    pub force: bool,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum FormatArg {
    Table,
    Json,
    Markdown,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum ColorArg {
    Auto,
    Always,
    Never,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum InitArg {
    GlorotUniform,
    GlorotNormal,
    HeUniform,
    HeNormal,
    LecunNormal,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum DTypeArg {
    F32,
    F64,
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn the_command_line_is_well_formed() {
        Cli::command().debug_assert();
    }
}
