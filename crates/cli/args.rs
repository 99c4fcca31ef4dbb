//! The command line as parsed, before validation (see `main.rs` for how each command validates it).

use std::path::{Path, PathBuf};

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
    /// Also write the report as JUnit XML (one test case per tensor or check) to FILE.
    #[arg(long, global = true, value_name = "FILE")]
    pub junit: Option<PathBuf>,
    /// Also write the report as one self-contained HTML page (with plots) to FILE.
    #[arg(long, global = true, value_name = "FILE")]
    pub html: Option<PathBuf>,
    /// Record this run's figures as a baseline in FILE (a passing run only).
    #[arg(long, global = true, value_name = "FILE")]
    pub save_baseline: Option<PathBuf>,
    /// Fail when a figure got worse than in the baseline FILE, a new finding appeared, or the
    /// network changed shape.
    #[arg(long, global = true, value_name = "FILE")]
    pub baseline: Option<PathBuf>,
    /// Let outputs (-o, --plot, --write, --junit, --html, --save-baseline) replace existing files.
    #[arg(long, global = true)]
    pub force: bool,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the whole workflow on the built-in example (an invented pump-state classifier) and explain it.
    Demo(DemoArgs),
    /// Dimension audit: the shapes the description implies against those in a weight file.
    Shapes(ShapesArgs),
    /// The reference loss and gradient (to a file with -o).
    Grad(GradArgs),
    /// Finite-difference check of the reference engine's gradient on this network.
    Check(CheckArgs),
    /// Error against step size for chosen coordinates, per method (the V-curve).
    Sweep(SweepArgs),
    /// An outside gradient file against the reference, with the diagnosis of what is wrong.
    Compare(CompareArgs),
    /// Drive your own program over plumb's wire protocol and check its loss and gradient.
    Probe(ProbeArgs),
    /// Release audit of a weight file on probe data: shapes, values, symmetry, unit health,
    /// initialisation, signal and gradient flow.
    Audit(AuditArgs),
    /// Join the JSON reports of the N shards of a `plumb check --shard K/N` into one report.
    Merge(MergeArgs),
}

#[derive(Debug, Args)]
pub struct MergeArgs {
    /// The shards' JSON reports (`plumb check --shard K/N --format json`), one per shard.
    #[arg(value_name = "SHARD", required = true)]
    pub shards: Vec<PathBuf>,
    /// How many of the worst coordinates to list.
    #[arg(long, value_name = "N", default_value_t = 5)]
    pub worst: usize,
}

#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Also write the example's files (description, weights, data) into this directory.
    #[arg(long, value_name = "DIR")]
    pub write: Option<PathBuf>,
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
#[derive(Clone, Debug, Args)]
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
    /// Samples in the synthetic batch drawn without --data [default: 32] (refused with --data,
    /// whose file sets the samples).
    #[arg(long, value_name = "M", conflicts_with = "data")]
    pub batch: Option<usize>,
    /// The data file's spatial arrays are (m, length, channels) or (m, height, width, channels)
    /// instead of channels first (networks with a signal or image input).
    #[arg(long, requires = "data")]
    pub channels_last: bool,
}

#[derive(Debug, Args)]
pub struct GradArgs {
    #[command(flatten)]
    pub inputs: Inputs,
    /// Write the gradient here, in the description's layout; the format follows the extension
    /// (.npz, .safetensors, or .npy for a one-tensor layout).
    #[arg(short, long, value_name = "G")]
    pub output: Option<PathBuf>,
    /// Element type of the gradient file [default: f32 with --precision f32 or weights other than
    /// float64, else f64].
    #[arg(long, value_enum)]
    pub dtype: Option<DTypeArg>,
    /// Arithmetic to compute in: f64, the reference; f32, as an f32 implementation computes
    /// (weights and data rounded to f32, every sum in f32).
    #[arg(long, value_enum, default_value_t = PrecisionArg::F64)]
    pub precision: PrecisionArg,
    /// Also give the gradient with respect to the input: the tensor `input`, (m, *input), in the
    /// data's axis order.
    #[arg(long)]
    pub input_gradient: bool,
}

#[derive(Debug, Args)]
pub struct CheckArgs {
    #[command(flatten)]
    pub inputs: Inputs,
    /// Arithmetic to run the engine in; f32 sets the tolerances from f32's epsilon.
    #[arg(long, value_enum, default_value_t = PrecisionArg::F64)]
    pub precision: PrecisionArg,
    /// Finite-difference method.
    #[arg(long, value_enum, default_value_t = MethodArg::Central)]
    pub method: MethodArg,
    /// A fixed step for every coordinate, instead of the method's rule scaled to each parameter.
    #[arg(long, value_name = "H", allow_hyphen_values = true)]
    pub step: Option<f64>,
    /// Coordinates to check: `all`, a number N (N in total, spread over the layers by size), or
    /// `per-layer:N` [default: all up to 20000 parameters, else per-layer:1000].
    #[arg(long, value_name = "SAMPLE")]
    pub sample: Option<String>,
    /// Random directions per tensor part and over the whole network (J(θ ± h·v) against g·v).
    #[arg(long, value_name = "K", default_value_t = 4)]
    pub directions: usize,
    /// Relative error above which a coordinate can be a mismatch [default: 1e-6 in f64, 1e-3 in f32].
    #[arg(long, value_name = "T", allow_hyphen_values = true)]
    pub tolerance: Option<f64>,
    /// How many of the worst coordinates to list.
    #[arg(long, value_name = "N", default_value_t = 5)]
    pub worst: usize,
    /// Check only the K-th of N deterministic shares of the coordinates and directions (for a
    /// check split over N CI jobs); join the shards' JSON with `plumb merge`.
    #[arg(long, value_name = "K/N")]
    pub shard: Option<String>,
}

#[derive(Debug, Args)]
pub struct SweepArgs {
    #[command(flatten)]
    pub inputs: Inputs,
    /// Arithmetic to run the engine in.
    #[arg(long, value_enum, default_value_t = PrecisionArg::F64)]
    pub precision: PrecisionArg,
    /// Coordinates as LAYER:ROW:COL in the augmented matrix (layer from 1, row and column from 0,
    /// column 0 the bias) for a dense description, TENSOR:INDEX (a tensor's name and a flat index
    /// in its canonical shape) for other kinds, comma-separated [default: the worst of a quick
    /// central check and 3 random ones].
    #[arg(long, value_name = "LIST")]
    pub coords: Option<String>,
    /// Steps FROM:TO:N, log-spaced.
    #[arg(long, value_name = "FROM:TO:N", default_value = "1e-1:1e-14:27")]
    pub steps: String,
    /// Methods to sweep, comma-separated [default: all five].
    #[arg(long, value_name = "LIST")]
    pub methods: Option<String>,
    /// Write the curves as an SVG plot (log-log, one line per method).
    #[arg(long, value_name = "FILE")]
    pub plot: Option<PathBuf>,
}

#[derive(Debug, Args)]
pub struct CompareArgs {
    #[command(flatten)]
    pub inputs: Inputs,
    /// The outside gradient (.npy, .npz, .safetensors): one tensor per weight tensor, same shapes,
    /// named as the parameters or by a common habit (dW1, grad_W1, W1.grad…). Its dtype sets the
    /// precision expected.
    #[arg(short, long = "gradient", value_name = "G")]
    pub gradient: PathBuf,
    /// Which gradient tensor is which parameter, where the names do not say: FILE=PARAM pairs,
    /// comma-separated (e.g. `--map gw1=W1,gb1=b1`); may be repeated.
    #[arg(long, value_name = "FILE=PARAM,…")]
    pub map: Vec<String>,
    /// The loss the outside code computed for the same weights and data, to compare as well.
    #[arg(long, value_name = "VALUE", allow_hyphen_values = true)]
    pub loss: Option<f64>,
}

#[derive(Debug, Args)]
pub struct ProbeArgs {
    /// The network description (TOML); optional with --blackbox, where the program's hello names
    /// and shapes the tensors.
    #[arg(value_name = "NET")]
    pub net: Option<PathBuf>,
    /// Weight file (.npy, .npz, .safetensors); under --blackbox its tensors are taken by the names
    /// the program declares. Without it, weights are drawn from --seed.
    #[arg(short, long, value_name = "W")]
    pub weights: Option<PathBuf>,
    /// Data file (CSV with a header row, or .npz with x and y); without it, a seeded synthetic batch.
    #[arg(short, long, value_name = "D")]
    pub data: Option<PathBuf>,
    /// Initialisation scheme for weights drawn without --weights (with a description).
    #[arg(long, value_enum, default_value_t = InitArg::GlorotUniform)]
    pub init: InitArg,
    /// Samples in the synthetic batch drawn without --data [default: 32].
    #[arg(long, value_name = "M")]
    pub batch: Option<usize>,
    /// The data file's spatial arrays are (m, length, channels) or (m, height, width, channels)
    /// instead of channels first (networks with a signal or image input); the program gets x so.
    #[arg(long, requires = "data")]
    pub channels_last: bool,
    /// Finite-difference method for checking the program against its own loss (the complex step
    /// needs complex arithmetic inside the program, so it is not offered).
    #[arg(long, value_enum, default_value_t = ProbeMethodArg::Central)]
    pub method: ProbeMethodArg,
    /// A fixed step for every coordinate.
    #[arg(long, value_name = "H", allow_hyphen_values = true)]
    pub step: Option<f64>,
    /// Coordinates to check against the program's own loss: `all`, N (N in total, spread over the
    /// tensors by size, as `check` spreads them), or `per-layer:N` (per tensor) [default: all up to
    /// 20000 parameters, else per-layer:1000].
    #[arg(long, value_name = "SAMPLE")]
    pub sample: Option<String>,
    /// Random directions per tensor and over all of them.
    #[arg(long, value_name = "K", default_value_t = 4)]
    pub directions: usize,
    /// Seconds to wait for each reply before stopping the program.
    #[arg(long, value_name = "SECS", default_value_t = 60.0)]
    pub timeout: f64,
    /// A model the description cannot express: use only the program's own tensors, and check it
    /// against its own loss only (no comparison with the reference).
    #[arg(long)]
    pub blackbox: bool,
    /// The program and its arguments, after `--`.
    #[arg(last = true, required = true, value_name = "CMD")]
    pub command: Vec<String>,
}

#[derive(Debug, Args)]
pub struct AuditArgs {
    /// The network description (TOML).
    #[arg(value_name = "NET")]
    pub net: PathBuf,
    /// The weight file to audit (.npy, .npz, .safetensors).
    #[arg(short, long, value_name = "W")]
    pub weights: PathBuf,
    /// Probe data (CSV with a header row, or .npz with x and y); without it, a seeded synthetic batch.
    #[arg(short, long, value_name = "PROBE")]
    pub data: Option<PathBuf>,
    /// Samples in the synthetic probe batch drawn without --data (refused with --data, whose file
    /// sets the samples).
    #[arg(
        long,
        value_name = "M",
        default_value_t = 1000,
        conflicts_with = "data"
    )]
    pub batch: usize,
    /// The scheme the weights are said to be drawn from: test every layer against it (KS test).
    #[arg(long, value_enum, value_name = "SCHEME")]
    pub init: Option<InitArg>,
    /// The lowest severity that fails the run (exit 1).
    #[arg(long, value_enum, default_value_t = FailOn::Error)]
    pub fail_on: FailOn,
    /// |w| beyond which a value is implausible for a trained network.
    #[arg(long, value_name = "X", default_value_t = 1e6)]
    pub max_magnitude: f64,
    /// Relative distance under which two units' incoming (or outgoing) weights count as identical.
    #[arg(long, value_name = "X", default_value_t = 1e-6)]
    pub symmetry_tolerance: f64,
    /// Distance from an asymptote within which a sigmoid or tanh output counts as saturated.
    #[arg(long, value_name = "X", default_value_t = 0.01)]
    pub saturation: f64,
    /// Fraction of probe samples on which a unit must be saturated to be reported.
    #[arg(long, value_name = "F", default_value_t = 0.99)]
    pub saturated_fraction: f64,
    /// Fraction of a layer's units dead or saturated that makes it a layer-wide error.
    #[arg(long, value_name = "F", default_value_t = 0.5)]
    pub layer_fraction: f64,
    /// Mean fraction over a layer's units (inactive for ReLU, saturated for sigmoid and tanh) at
    /// which the layer is flagged even when no unit reaches the per-unit rule.
    #[arg(long, value_name = "F", default_value_t = 0.85)]
    pub layer_mean: f64,
    /// Factor off the scale the layer's activation calls for (He or Glorot) that is flagged.
    #[arg(long, value_name = "X", default_value_t = 10.0)]
    pub scale_factor: f64,
    /// Orders of magnitude of gradient change across the layers that is flagged.
    #[arg(long, value_name = "N", default_value_t = 3.0)]
    pub flow_orders: f64,
    /// Family-wise level of the Kolmogorov–Smirnov tests against --init (Holm's correction across
    /// the layers).
    #[arg(long, value_name = "A", default_value_t = 0.01)]
    pub ks_alpha: f64,
    /// |scale| of a norm layer below which its channel or feature has collapsed (networks of
    /// other kinds than dense).
    #[arg(long, value_name = "X", default_value_t = 1e-3)]
    pub collapsed_scale: f64,
    /// The probe file's spatial arrays are (m, length, channels) or (m, height, width, channels)
    /// instead of channels first (networks with a signal or image input).
    #[arg(long, requires = "data")]
    pub channels_last: bool,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum FailOn {
    Warning,
    Error,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum MethodArg {
    Central,
    Forward,
    FivePoint,
    Richardson,
    ComplexStep,
}

/// The methods `probe` offers for an outside program: all but the complex step, which is accepted
/// only to be refused with the reason (its help and its list of values do not show it).
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum ProbeMethodArg {
    Central,
    Forward,
    FivePoint,
    Richardson,
    #[value(hide = true)]
    ComplexStep,
}

impl From<ProbeMethodArg> for MethodArg {
    fn from(m: ProbeMethodArg) -> MethodArg {
        match m {
            ProbeMethodArg::Central => MethodArg::Central,
            ProbeMethodArg::Forward => MethodArg::Forward,
            ProbeMethodArg::FivePoint => MethodArg::FivePoint,
            ProbeMethodArg::Richardson => MethodArg::Richardson,
            ProbeMethodArg::ComplexStep => MethodArg::ComplexStep,
        }
    }
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum PrecisionArg {
    F64,
    F32,
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

impl Inputs {
    fn paths(&self) -> Vec<&Path> {
        let mut out = vec![self.net.as_path()];
        out.extend(self.weights.as_deref());
        out.extend(self.data.as_deref());
        out
    }
}

impl ProbeArgs {
    /// The common inputs, when a description is given.
    pub fn inputs(&self) -> Option<Inputs> {
        self.net.clone().map(|net| Inputs {
            net,
            weights: self.weights.clone(),
            data: self.data.clone(),
            init: self.init,
            batch: self.batch,
            channels_last: self.channels_last,
        })
    }
}

impl Command {
    /// The command its report names (a merge reports a check).
    pub fn report_name(&self) -> &'static str {
        match self {
            Command::Demo(_) => "demo",
            Command::Shapes(_) => "shapes",
            Command::Grad(_) => "grad",
            Command::Check(_) | Command::Merge(_) => "check",
            Command::Sweep(_) => "sweep",
            Command::Compare(_) => "compare",
            Command::Probe(_) => "probe",
            Command::Audit(_) => "audit",
        }
    }

    /// The files the command itself writes (besides the report files of the common flags).
    pub fn outputs(&self) -> Vec<&Path> {
        match self {
            Command::Grad(a) => a.output.iter().map(PathBuf::as_path).collect(),
            Command::Sweep(a) => a.plot.iter().map(PathBuf::as_path).collect(),
            _ => Vec::new(),
        }
    }

    /// The files the run reads, which no output of it may replace (not even with --force).
    pub fn inputs(&self) -> Vec<&Path> {
        match self {
            Command::Demo(_) => Vec::new(),
            Command::Shapes(a) => std::iter::once(a.net.as_path())
                .chain(a.weights.as_deref())
                .collect(),
            Command::Grad(a) => a.inputs.paths(),
            Command::Check(a) => a.inputs.paths(),
            Command::Sweep(a) => a.inputs.paths(),
            Command::Compare(a) => {
                let mut v = a.inputs.paths();
                v.push(&a.gradient);
                v
            }
            Command::Probe(a) => a
                .net
                .as_deref()
                .into_iter()
                .chain(a.weights.as_deref())
                .chain(a.data.as_deref())
                .collect(),
            Command::Audit(a) => std::iter::once(a.net.as_path())
                .chain(std::iter::once(a.weights.as_path()))
                .chain(a.data.as_deref())
                .collect(),
            Command::Merge(a) => a.shards.iter().map(PathBuf::as_path).collect(),
        }
    }
}
