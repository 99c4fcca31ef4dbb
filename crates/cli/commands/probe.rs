//! `plumb probe NET -- CMD ARGS`: drive the user's program over the wire protocol and check it three
//! ways — against its own loss (is it self-consistent?), its loss against the reference loss, and
//! its gradient against the reference gradient, with the diagnosis.

use std::path::PathBuf;
use std::time::Duration;

use anyhow::{Context, Result, bail};
use plumb_diagnose::{Named, Tolerances};
use plumb_engine::{Batch, Rng};
use plumb_fd::{
    Base, Change, ExternalConfig, ExternalResult, Inside, Method, OutsideTensor, Precision, SETTLE,
    Sample, Settlement, Status, UNSETTLED_SHARE, check_external, gradient_magnitude,
    loss_magnitude,
};
use plumb_formats::read_tensors;
use plumb_probe::{Program, TensorSpec};
use plumb_report::{Block, Case, Cell, Document, Finding, Severity, Table, Tone, Verdict};
use serde::Serialize;

use crate::args::ProbeArgs;
use crate::commands::check::{method, step, verdict_cell};
use crate::commands::compare::{
    certification_text, error_plot, gradient_cases, loss_case, tensor_table,
};
use crate::inputs::{DataSource, Loaded, WeightsSource, load, load_batch};
use crate::output::{SCHEMA_VERSION, Settings, network_id, num, shape};
use plumb_diagnose::report::{
    Certification, LossReport, TensorReport, certify, judge_gradient, judge_loss, layout_tensors,
};
use plumb_fd::report::Tensors;
use plumb_fd::report::{MAX_DIRECTIONS, remedies};

#[derive(Clone, Debug, Serialize)]
pub struct ProgramReport {
    pub command: String,
    pub name: String,
    pub dtype: String,
}

/// The worst coordinate of a tensor in the self-check.
#[derive(Clone, Debug, Serialize)]
pub struct SelfWorst {
    pub index: Vec<usize>,
    pub gradient: f64,
    pub differences: f64,
    pub rel_error: f64,
    pub bound: f64,
    pub status: &'static str,
}

/// One tensor of the self-check: the program's gradient against differences of its own loss.
#[derive(Clone, Debug, Serialize)]
pub struct SelfTensor {
    pub name: String,
    pub verdict: Verdict,
    pub parameters: usize,
    pub checked: usize,
    pub max_rel_error: f64,
    pub median_rel_error: f64,
    pub mismatches: usize,
    pub unreliable: usize,
    /// Coordinates neither a match nor a mismatch (the method's bound exceeds a tenth of the value).
    pub unsettled: usize,
    pub directions: usize,
    pub direction_mismatches: usize,
    pub worst: Option<SelfWorst>,
}

#[derive(Clone, Debug, Serialize)]
pub struct SelfCheck {
    pub method: &'static str,
    pub step_rule: String,
    pub tolerance: f64,
    pub sample: String,
    pub checked: usize,
    pub parameters: usize,
    pub directions_per_tensor: usize,
    /// Whether enough was settled for a verdict (docs/json.md: the settled share).
    pub conclusive: bool,
    pub tensors: Vec<SelfTensor>,
}

/// The JSON report of `plumb probe` (docs/json.md).
#[derive(Serialize)]
pub struct ProbeReport {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: &'static str,
    pub program: ProgramReport,
    pub blackbox: bool,
    /// The network description; null for a black box probed without one.
    pub description: Option<PathBuf>,
    pub weights: WeightsSource,
    pub data: DataSource,
    pub self_check: SelfCheck,
    pub loss: Option<LossReport>,
    pub reference: Option<Certification>,
    pub tensors: Vec<TensorReport>,
    pub findings: Vec<Finding>,
}

pub fn run(args: &ProbeArgs, settings: &Settings) -> Result<Verdict> {
    let method = method(args.method.into());
    if method == Method::ComplexStep {
        bail!(
            "--method complex-step: the complex step needs the program to compute with complex numbers, which an outside program does not; use central, forward, five-point or richardson"
        );
    }
    let fixed = step(args.step)?;
    let sample = args
        .sample
        .as_deref()
        .map(Sample::parse)
        .transpose()
        .map_err(|e| anyhow::anyhow!("--sample: {e}"))?;
    if args.directions > MAX_DIRECTIONS {
        bail!(
            "--directions {}: at most {} random directions per tensor",
            args.directions,
            MAX_DIRECTIONS
        );
    }
    if !(args.timeout.is_finite() && args.timeout > 0.0 && args.timeout <= 86_400.0) {
        bail!(
            "--timeout {}: give the seconds to wait for each reply, between 0 and 86400",
            args.timeout
        );
    }
    let opts = ProbeOptions {
        command: args.command.clone(),
        method,
        step: fixed,
        sample,
        directions: args.directions,
        timeout: args.timeout,
        blackbox: args.blackbox,
        weights: args.weights.clone(),
    };
    let (report, doc) = match (args.inputs(), args.blackbox) {
        (Some(inputs), false) => {
            let loaded = load(&inputs, settings.seed)?;
            let report = compute(Source::Described(&loaded), &opts, settings)?;
            let mut doc = document(&report, Some(&loaded));
            doc.network = Some(network_id(&loaded.desc));
            (report, doc)
        }
        (None, false) => bail!(
            "give the network description NET (e.g. plumb probe net.toml -- CMD), or --blackbox to check the program against its own loss with the tensors its hello declares"
        ),
        (inputs, true) => {
            // A black box: the tensors are the program's; a description, if given, only sizes
            // the data. The weights are read by name (never fitted to a description).
            let desc = args
                .net
                .as_deref()
                .map(plumb_formats::Description::read)
                .transpose()?;
            let seed = settings.seed;
            let data = args.data.clone();
            let batch_size = args.batch;
            let batch = move |hello: &plumb_probe::Hello| match (&desc, &inputs) {
                (Some(d), Some(i)) => load_batch(i, d, seed, 32),
                _ => blackbox_batch(hello, data.as_deref(), batch_size.unwrap_or(32), seed),
            };
            let report = compute(
                Source::Blackbox {
                    description: args.net.clone(),
                    batch: Box::new(batch),
                },
                &opts,
                settings,
            )?;
            let doc = document(&report, None);
            (report, doc)
        }
    };
    let mut doc = doc;
    doc.command = "probe".into();
    doc.cases = report
        .self_check
        .tensors
        .iter()
        .map(|t| {
            let c = Case::new(format!("self-check {}", t.name), t.verdict == Verdict::Pass)
                .about(&t.name)
                .figure("max_rel_error", t.max_rel_error)
                .figure("mismatches", t.mismatches as f64)
                .figure("unsettled", t.unsettled as f64)
                .figure("direction_mismatches", t.direction_mismatches as f64);
            match t.verdict {
                Verdict::Pass => c,
                Verdict::Inconclusive => c.failing(
                    "inconclusive",
                    "too few coordinates or directions settled to tell a match from a mismatch",
                ),
                Verdict::Fail => c.failing(
                    "self-inconsistent",
                    "the gradient disagrees with differences of the program's own loss",
                ),
            }
        })
        .collect();
    doc.cases
        .extend(gradient_cases("reference ", &report.tensors));
    doc.cases.extend(report.loss.as_ref().map(loss_case));
    settings.emit(&report, doc)
}

/// How to probe a program.
pub struct ProbeOptions {
    pub command: Vec<String>,
    pub method: Method,
    pub step: Option<f64>,
    pub sample: Option<Sample>,
    pub directions: usize,
    pub timeout: f64,
    pub blackbox: bool,
    /// The weight file (a black box's parameters come from it by name).
    pub weights: Option<PathBuf>,
}

/// What a probe runs on: a description with its weights and data, or a black box whose tensors
/// its hello declares and whose data is drawn once the hello is known.
pub enum Source<'a> {
    Described(&'a Loaded),
    Blackbox {
        description: Option<PathBuf>,
        batch: BatchFor<'a>,
    },
}

/// The batch (and where it came from) for a black box, from its hello.
pub type BatchFor<'a> = Box<dyn FnOnce(&plumb_probe::Hello) -> Result<(Batch, DataSource)> + 'a>;

/// Runs the program through the three checks and builds the report (shared with the demo).
pub fn compute(src: Source<'_>, opts: &ProbeOptions, settings: &Settings) -> Result<ProbeReport> {
    let (loaded, description, batch_for) = match src {
        Source::Described(l) => (Some(l), Some(l.desc.path.clone()), None),
        Source::Blackbox { description, batch } => (None, description, Some(batch)),
    };
    let layout: Vec<Named> = loaded.map_or_else(Vec::new, |l| layout_tensors(&l.desc, &l.weights));
    let specs: Vec<TensorSpec> = layout
        .iter()
        .map(|t| TensorSpec {
            name: t.name.clone(),
            shape: t.shape.clone(),
        })
        .collect();

    let started = std::time::Instant::now();
    let mut program = Program::start_with(
        &opts.command,
        Duration::from_secs_f64(opts.timeout),
        settings.quiet,
    )?;
    let hello = program.hello(loaded.is_some().then_some(&specs[..]))?;
    let declared: usize = hello.tensors.iter().map(TensorSpec::len).sum();
    if declared > plumb_formats::MAX_PARAMETERS {
        bail!(
            "the program declares {declared} parameters, more than the {} plumb handles",
            plumb_formats::MAX_PARAMETERS
        );
    }
    let (params, weights_source) = match loaded {
        Some(l) => (layout, l.weights_source.clone()),
        None => blackbox_parameters(&hello.tensors, &opts.weights, settings.seed)?,
    };
    let (batch, data_source) = match (loaded, batch_for) {
        (Some(l), _) => (l.batch.clone(), l.data_source.clone()),
        (None, Some(f)) => f(&hello)?,
        (None, None) => unreachable!("a black box comes with its batch"),
    };
    let b = &batch;
    let (m, n, k) = (b.len(), b.x.ncols(), b.y.ncols());
    let x: Vec<f64> = b.x.iter().copied().collect();
    let y: Vec<f64> = b.y.iter().copied().collect();
    let with_data: Vec<(TensorSpec, &[f64])> = hello
        .tensors
        .iter()
        .zip(&params)
        .map(|(s, p)| (s.clone(), p.data.as_slice()))
        .collect();
    program.load(&with_data, (&[m, n], &x), (&[m, k], &y))?;
    let (loss, grads) = program.gradient()?;
    check_reply_shapes(&hello.tensors, &grads, opts.blackbox)?;

    // (a) The program against its own loss, on the tensors whose gradient fits their parameters.
    let single = hello.dtype == "f32";
    let precision = if single {
        Precision::F32
    } else {
        Precision::F64
    };
    let fitting: Vec<usize> = (0..params.len())
        .filter(|&i| grads[i].0.shape == params[i].shape)
        .collect();
    let mut outside: Vec<OutsideTensor> = fitting
        .iter()
        .map(|&i| OutsideTensor {
            name: params[i].name.clone(),
            values: params[i].data.clone(),
            gradient: grads[i].1.clone(),
            gross: Vec::new(),
        })
        .collect();
    let sample = opts.sample.unwrap_or(
        if params.iter().map(|p| p.data.len()).sum::<usize>() <= plumb_fd::FULL_CHECK_LIMIT {
            Sample::All
        } else {
            Sample::PerLayer(plumb_fd::DEFAULT_PER_LAYER)
        },
    );
    if let Sample::Total(s) = sample {
        let total: usize = outside.iter().map(|t| t.values.len()).sum();
        if s > total {
            bail!(
                "--sample {s} is more than the program's {total} parameters; use `all` or a smaller number"
            );
        }
    }
    let cfg = ExternalConfig {
        method: opts.method,
        step: opts.step,
        sample,
        directions: opts.directions,
        seed: settings.seed,
        eps: precision.epsilon(),
        tolerance: precision.tolerance(),
    };
    // Kinks are seen through the reference engine, which runs the same network (not for a black box).
    let reference_tensors = loaded.map(|l| Tensors::new(&l.desc));
    let base = loaded.map(|l| Base::new(&l.desc.network, &l.weights, b.x.view(), &b.y));
    let crossed = |t: usize, flat: usize, d: f64| -> bool {
        let (Some(base), Some(reference_tensors)) = (&base, &reference_tensors) else {
            return false;
        };
        let p = &params[fitting[t]];
        let index = Named::index_of(p, flat);
        reference_tensors
            .coord_of(&p.name, &index)
            .is_some_and(|c| base.perturbed(c, d).1)
    };
    // Along a direction: the direction's entries placed into the augmented matrices.
    let crossed_along = |v: &[Vec<f64>], d: f64| -> bool {
        let (Some(base), Some(reference_tensors), Some(l)) = (&base, &reference_tensors, loaded)
        else {
            return false;
        };
        let mut dir = l.weights.map(|_| 0.0);
        for (t, vt) in v.iter().enumerate() {
            let p = &params[fitting[t]];
            for (k, &x) in vt.iter().enumerate() {
                if x != 0.0
                    && let Some(c) = reference_tensors.coord_of(&p.name, &Named::index_of(p, k))
                {
                    *dir.get_mut(c) = x;
                }
            }
        }
        base.along(&dir, d).1
    };
    let loss_gross = match (&base, loaded) {
        (Some(bs), Some(l)) => loss_magnitude(&l.desc.network, &l.weights, bs.trace(), &b.y),
        _ => 0.0,
    };
    if let (Some(bs), Some(l)) = (&base, loaded) {
        let gross = layout_tensors(
            &l.desc,
            &gradient_magnitude(&l.desc.network, &l.weights, bs.trace(), &b.y),
        );
        for (o, &i) in outside.iter_mut().zip(&fitting) {
            o.gross = gross
                .iter()
                .find(|g| g.name == params[i].name)
                .map(|g| g.data.clone())
                .unwrap_or_default();
        }
    }
    let inside = Inside {
        crossed: &crossed,
        crossed_along: &crossed_along,
        loss_gross,
        sees_kinks: base.is_some(),
    };
    let mut ask = |count: usize, changes: &[Change]| {
        let wire: Vec<plumb_probe::Change> = changes
            .iter()
            .map(|c| plumb_probe::Change {
                perturbation: c.perturbation,
                tensor: fitting[c.tensor as usize] as u32,
                index: c.index,
                delta: c.delta,
            })
            .collect();
        program.losses(count, &wire)
    };
    let result = check_external(&outside, loss, &mut ask, &inside, &cfg)?;
    let mut findings = Vec::new();
    let self_check = self_check_report(
        &params,
        &fitting,
        &grads,
        &result,
        &cfg,
        precision,
        &mut findings,
    );

    // (b) and (c): the loss and the gradient against the reference.
    let (loss_report, reference, tensors) = if let Some(loaded) = loaded {
        let (lr, lf) = judge_loss(loaded, loss, single);
        findings.extend(lf);
        let outside: Vec<Named> = grads
            .iter()
            .map(|(s, d)| Named::new(s.name.clone(), s.shape.clone(), d.clone()))
            .collect();
        let (tr, tf) = judge_gradient(loaded, &outside, &|_| Tolerances::for_precision(single));
        findings.extend(tf);
        let cert = certify(loaded, settings.seed)?;
        (Some(lr), Some(cert), tr)
    } else {
        (None, None, Vec::new())
    };
    let command = program.command().to_string();
    let (requests, asked) = program.traffic();
    settings.note(&format!(
        "{requests} requests to the program, {asked} losses at perturbed parameters, {:.1} s",
        started.elapsed().as_secs_f64()
    ));
    program.finish();

    let report = ProbeReport {
        verdict: Verdict::of_check(&findings, self_check.conclusive),
        schema_version: SCHEMA_VERSION,
        command: "probe",
        program: ProgramReport {
            command,
            name: hello.name,
            dtype: hello.dtype,
        },
        blackbox: loaded.is_none(),
        description,
        weights: weights_source,
        data: data_source,
        self_check,
        loss: loss_report,
        reference,
        tensors,
        findings,
    };
    Ok(report)
}

/// A gradient tensor of another shape than declared is a protocol failure, unless (outside a black
/// box) it has the shape of a rearrangement the diagnosis can test: reversed, or another tensor's.
fn check_reply_shapes(
    declared: &[TensorSpec],
    grads: &[(TensorSpec, Vec<f64>)],
    blackbox: bool,
) -> Result<()> {
    let names: Vec<&str> = grads.iter().map(|(s, _)| s.name.as_str()).collect();
    let want: Vec<&str> = declared.iter().map(|s| s.name.as_str()).collect();
    if names != want {
        bail!(
            "the program's gradient lists the tensors {names:?}; it declared {want:?} in its hello, in that order"
        );
    }
    for ((s, _), d) in grads.iter().zip(declared) {
        if s.shape == d.shape {
            continue;
        }
        let reversed: Vec<usize> = d.shape.iter().rev().copied().collect();
        let another = declared.iter().any(|o| o.shape == s.shape);
        if blackbox || !(s.shape == reversed || another) {
            bail!(
                "the program returned the gradient of `{}` with shape {}, but declared {}; a gradient must have its tensor's shape",
                s.name,
                shape(&s.shape),
                shape(&d.shape)
            );
        }
    }
    Ok(())
}

/// A black box's parameters: from the weight file by name, or drawn from the seed with a 1/√fan-in
/// scale (fan-in: a matrix's last dimension; vectors start at 0.1 scale).
fn blackbox_parameters(
    tensors: &[TensorSpec],
    weights: &Option<PathBuf>,
    seed: u64,
) -> Result<(Vec<Named>, WeightsSource)> {
    match weights {
        Some(path) => {
            let file = read_tensors(path)?;
            let source = WeightsSource::File {
                path: path.clone(),
                format: file.format.name().into(),
                dtype: crate::inputs::widest_float(&file).into(),
            };
            let named = tensors
                .iter()
                .map(|s| {
                    let t = file.get(&s.name).with_context(|| {
                        format!(
                            "{}: no tensor `{}`, which the program declares",
                            path.display(),
                            s.name
                        )
                    })?;
                    if t.shape != s.shape {
                        bail!(
                            "{}: tensor `{}` is {}, the program declares {}: save it in the program's shape",
                            path.display(),
                            s.name,
                            shape(&t.shape),
                            shape(&s.shape)
                        );
                    }
                    Ok(Named::new(s.name.clone(), s.shape.clone(), t.data.clone()))
                })
                .collect::<Result<_>>()?;
            Ok((named, source))
        }
        None => {
            let mut rng = Rng::new(seed ^ 0xb1ac_b0c5);
            let named = tensors
                .iter()
                .map(|s| {
                    let sd = match s.shape.as_slice() {
                        [.., fan_in] if s.shape.len() >= 2 => 1.0 / (*fan_in.max(&1) as f64).sqrt(),
                        _ => 0.1,
                    };
                    Named::new(
                        s.name.clone(),
                        s.shape.clone(),
                        (0..s.len()).map(|_| sd * rng.normal()).collect(),
                    )
                })
                .collect();
            Ok((
                named,
                WeightsSource::Init {
                    scheme: "1/√fan-in normal".into(),
                    seed,
                },
            ))
        }
    }
}

/// A black box's data without a description: an `.npz` with `x` (m, inputs) and `y` (m, targets)
/// as it is; a CSV split by the sample shapes the hello declares (`x`, `y`); or, without data, a
/// seeded batch of those shapes (standard-normal x, one-hot rows of y).
fn blackbox_batch(
    hello: &plumb_probe::Hello,
    data: Option<&std::path::Path>,
    m: usize,
    seed: u64,
) -> Result<(Batch, DataSource)> {
    let flat = |s: &Option<Vec<usize>>| s.as_ref().map(|s| s.iter().product::<usize>());
    let sizes = flat(&hello.x).zip(flat(&hello.y));
    let npz = data.is_some_and(|p| p.extension().is_some_and(|e| e.eq_ignore_ascii_case("npz")));
    if let Some(path) = data {
        let batch = if npz {
            let file = read_tensors(path)?;
            let two_d = |name: &str| -> Result<ndarray::Array2<f64>> {
                let t = file.get(name).with_context(|| {
                    format!("{}: no array `{name}`; a black box's .npz data holds x (samples, inputs) and y (samples, targets)", path.display())
                })?;
                let (rows, cols) = match t.shape.as_slice() {
                    [r, c] => (*r, *c),
                    [r] => (*r, 1),
                    other => bail!(
                        "{}: `{name}` is {}; without a description give it as (samples, values)",
                        path.display(),
                        shape(other)
                    ),
                };
                Ok(ndarray::Array2::from_shape_vec(
                    (rows, cols),
                    t.data.clone(),
                )?)
            };
            let (x, y) = (two_d("x")?, two_d("y")?);
            if x.nrows() != y.nrows() || x.nrows() == 0 {
                bail!(
                    "{}: x has {} samples and y {}: give both the same number, at least one",
                    path.display(),
                    x.nrows(),
                    y.nrows()
                );
            }
            Batch { x, y }
        } else {
            let Some((n, k)) = sizes else {
                bail!(
                    "{}: a CSV file cannot say which columns are inputs without a description: give NET, an .npz with x and y, or have the program declare one sample's \"x\" and \"y\" shapes in its hello (docs/protocol.md)",
                    path.display()
                );
            };
            plumb_formats::read_data(path, n, k)?
        };
        let samples = batch.len();
        return Ok((
            batch,
            DataSource::File {
                path: path.to_path_buf(),
                samples,
            },
        ));
    }
    let Some((n, k)) = sizes else {
        bail!(
            "the program's hello declares no sample shapes (\"x\", \"y\"), so plumb cannot draw data for it: give -d with the data, or NET, or declare them (docs/protocol.md)"
        );
    };
    if m == 0 || m.saturating_mul(n + k) > plumb_formats::MAX_PARAMETERS {
        bail!("--batch {m}: give between 1 and a batch whose values fit in memory");
    }
    let mut rng = Rng::new(seed ^ 0x5eed_da7a);
    let x = ndarray::Array2::from_shape_fn((m, n), |_| rng.normal());
    let mut y = ndarray::Array2::zeros((m, k));
    for mut row in y.rows_mut() {
        row[rng.below(k)] = 1.0;
    }
    Ok((Batch { x, y }, DataSource::Synthetic { samples: m, seed }))
}

fn self_check_report(
    params: &[Named],
    fitting: &[usize],
    grads: &[(TensorSpec, Vec<f64>)],
    r: &ExternalResult,
    cfg: &ExternalConfig,
    precision: Precision,
    findings: &mut Vec<Finding>,
) -> SelfCheck {
    let mut tensors = Vec::new();
    let mut conclusive = true;
    for (i, p) in params.iter().enumerate() {
        let Some(t) = fitting.iter().position(|&f| f == i) else {
            findings.push(
                Finding::new(
                    "self-inconsistent",
                    Severity::Error,
                    format!(
                        "the program's gradient of this tensor has shape {}, its parameters {}: it cannot be the gradient of its own loss",
                        shape(&grads[i].0.shape),
                        shape(&p.shape)
                    ),
                )
                .tensor(&p.name),
            );
            tensors.push(SelfTensor {
                name: p.name.clone(),
                verdict: Verdict::Fail,
                parameters: p.data.len(),
                checked: 0,
                max_rel_error: f64::NAN,
                median_rel_error: f64::NAN,
                mismatches: 0,
                unreliable: 0,
                unsettled: 0,
                directions: 0,
                direction_mismatches: 0,
                worst: None,
            });
            continue;
        };
        let coords: Vec<_> = r.coords.iter().filter(|c| c.tensor == t).collect();
        let dirs: Vec<_> = r
            .directions
            .iter()
            .filter(|d| d.tensor == Some(t))
            .collect();
        let mut rel: Vec<f64> = coords.iter().map(|c| c.rel_error).collect();
        rel.sort_by(f64::total_cmp);
        let worst = coords
            .iter()
            .min_by(|a, b| plumb_fd::worst_first((a.status, a.rel_error), (b.status, b.rel_error)));
        let mismatches = coords
            .iter()
            .filter(|c| c.status == Status::Mismatch)
            .count();
        let unreliable = coords
            .iter()
            .filter(|c| c.status == Status::Unreliable)
            .count();
        let direction_mismatches = dirs.iter().filter(|d| d.status == Status::Mismatch).count();
        let worst = worst.map(|w| SelfWorst {
            index: Named::index_of(p, w.index),
            gradient: w.analytic,
            differences: w.numeric,
            rel_error: w.rel_error,
            bound: w.bound,
            status: w.status.name(),
        });
        if mismatches > 0 || direction_mismatches > 0 {
            // Only a coordinate that disagrees is quoted (not an unreliable one).
            let at = worst.as_ref().filter(|w| w.status == "mismatch").map_or(String::new(), |w| {
                format!(
                    "; worst at {}{:?}: gradient {:.6e}, differences {:.6e} (relative error {}, bound {})",
                    p.name,
                    w.index,
                    w.gradient,
                    w.differences,
                    num(w.rel_error),
                    num(w.bound)
                )
            });
            findings.push(
                Finding::new(
                    "self-inconsistent",
                    Severity::Error,
                    format!(
                        "the program's gradient disagrees with {} differences of its own loss at {mismatches} of {} coordinates and {direction_mismatches} of {} directions{at}",
                        cfg.method,
                        coords.len(),
                        dirs.len()
                    ),
                )
                .tensor(&p.name)
                .figure("mismatches", mismatches)
                .figure("direction_mismatches", direction_mismatches),
            );
        }
        if unreliable > 0 {
            findings.push(
                Finding::new(
                    "kink-unreliable",
                    Severity::Note,
                    format!("{unreliable} coordinates straddle a kink (or a break in a derivative the method relies on) at every step tried; not judged"),
                )
                .tensor(&p.name),
            );
        }
        let unsettled = coords
            .iter()
            .filter(|c| c.status == Status::Unsettled)
            .count();
        let settled_coords = Settlement::of(coords.iter().map(|c| c.status));
        let settled_dirs = Settlement::of(dirs.iter().map(|d| d.status));
        // Directions stand in for unchecked coordinates (plumb_fd::PartSummary::conclusive).
        let settled = settled_coords.conclusive()
            && (coords.len() >= p.data.len() || settled_dirs.conclusive());
        conclusive &= settled;
        if settled_coords.unsettled > 0 || settled_dirs.unsettled > 0 {
            findings.push(
                Finding::new(
                    "unsettled",
                    if settled {
                        Severity::Note
                    } else {
                        Severity::Warning
                    },
                    format!(
                        "{} of {} coordinates ({unreliable} unreliable at kinks) and {} of {} directions are unsettled: {} differences in {} cannot tell a match from a mismatch there (their error bound exceeds {}% of the value){}",
                        settled_coords.unsettled,
                        coords.len(),
                        settled_dirs.unsettled,
                        dirs.len(),
                        cfg.method,
                        precision.name(),
                        SETTLE * 100.0,
                        if settled {
                            String::new()
                        } else {
                            format!(
                                "; more than the {}% a check may leave open, so this tensor is inconclusive",
                                UNSETTLED_SHARE * 100.0
                            )
                        }
                    ),
                )
                .tensor(&p.name)
                .figure("unsettled", unsettled)
                .figure("unreliable", unreliable)
                .figure("settled_share", settled_coords.share()),
            );
        }
        tensors.push(SelfTensor {
            name: p.name.clone(),
            verdict: if mismatches > 0 || direction_mismatches > 0 {
                Verdict::Fail
            } else if !settled {
                Verdict::Inconclusive
            } else {
                Verdict::Pass
            },
            parameters: p.data.len(),
            checked: coords.len(),
            max_rel_error: rel.last().copied().unwrap_or(0.0),
            median_rel_error: rel.get(rel.len() / 2).copied().unwrap_or(0.0),
            mismatches,
            unreliable,
            unsettled,
            directions: dirs.len(),
            direction_mismatches,
            worst,
        });
    }
    let global_bad = r
        .directions
        .iter()
        .filter(|d| d.tensor.is_none() && d.status == Status::Mismatch)
        .count();
    if global_bad > 0 {
        findings.push(Finding::new(
            "self-inconsistent",
            Severity::Error,
            format!("{global_bad} random directions over all tensors disagree with differences of the program's own loss"),
        ));
    }
    let global = Settlement::of(
        r.directions
            .iter()
            .filter(|d| d.tensor.is_none())
            .map(|d| d.status),
    );
    conclusive &=
        global.conclusive() || r.coords.len() >= params.iter().map(|p| p.data.len()).sum();
    if !conclusive {
        let all = Settlement::of(r.coords.iter().map(|c| c.status));
        let unreliable = r
            .coords
            .iter()
            .filter(|c| c.status == Status::Unreliable)
            .count();
        // The complex step does not apply to an outside program, and --step is its larger step.
        let what = remedies(cfg.method, precision, unreliable, all.unsettled)
            .split("; ")
            .filter(|r| !r.contains("complex"))
            .collect::<Vec<_>>()
            .join("; ");
        findings.push(
            Finding::new(
                "inconclusive",
                Severity::Warning,
                format!(
                    "{} of {} checked coordinates and {} of {} directions over all tensors are unsettled: more than the {}% a check may leave open, so the program's gradient can neither pass nor fail against its own loss. What would settle them: {}",
                    all.unsettled,
                    all.checked,
                    global.unsettled,
                    global.checked,
                    UNSETTLED_SHARE * 100.0,
                    if precision == Precision::F32 {
                        what.replace("(--precision f64)", "(the program computing in float64)")
                    } else {
                        what
                    }
                ),
            )
            .figure("unsettled", all.unsettled)
            .figure("checked", all.checked)
            .figure("settled_share", all.share()),
        );
    }
    SelfCheck {
        conclusive,
        method: cfg.method.name(),
        step_rule: cfg.step.map_or_else(
            || cfg.method.step_rule(cfg.eps).to_string(),
            |h| format!("fixed h = {h:e} (--step)"),
        ),
        tolerance: cfg.tolerance,
        sample: cfg.sample.to_string(),
        checked: r.coords.len(),
        parameters: params.iter().map(|p| p.data.len()).sum(),
        directions_per_tensor: cfg.directions,
        tensors,
    }
}

pub fn document(r: &ProbeReport, loaded: Option<&Loaded>) -> Document {
    let mut doc =
        Document::new("plumb probe — your program against its own loss and the reference");
    let p = &r.program;
    let mut facts = vec![
        (
            "program".to_string(),
            format!(
                "{} ({}, computes in {})",
                p.command,
                if p.name.is_empty() {
                    "unnamed"
                } else {
                    &p.name
                },
                p.dtype
            ),
        ),
        (
            "description".to_string(),
            r.description.as_ref().map_or_else(
                || "none (a black box: the tensors its hello declares)".to_string(),
                |p| p.display().to_string(),
            ),
        ),
        (
            "weights".to_string(),
            if r.blackbox && matches!(r.weights, WeightsSource::Init { .. }) {
                "drawn from the seed for the program's own tensors (--blackbox)".to_string()
            } else {
                r.weights.describe()
            },
        ),
        ("data".to_string(), r.data.describe()),
    ];
    if let Some(c) = &r.reference {
        facts.push(("reference".to_string(), certification_text(c)));
    }
    doc.push(Block::Facts(facts));

    let s = &r.self_check;
    doc.push(Block::Heading(
        "1. Is it self-consistent? Its gradient against differences of its own loss".into(),
    ));
    doc.push(Block::Text(format!(
        "{} differences ({}), tolerance {:e}; {} of {} parameters, {} random directions per tensor.",
        s.method, s.step_rule, s.tolerance, s.checked, s.parameters, s.directions_per_tensor
    )));
    let mut t = Table::new([
        "tensor",
        "parameters",
        "checked",
        "max rel",
        "median rel",
        "mismatch",
        "unreliable",
        "unsettled",
        "directions",
        "verdict",
    ]);
    for st in &s.tensors {
        let bad = |n: usize| if n > 0 { Tone::Bad } else { Tone::Plain };
        t.push([
            Cell::from(st.name.clone()),
            Cell::from(st.parameters.to_string()),
            Cell::from(st.checked.to_string()),
            Cell::new(num(st.max_rel_error), bad(st.mismatches)),
            Cell::from(num(st.median_rel_error)),
            Cell::new(st.mismatches.to_string(), bad(st.mismatches)),
            Cell::from(st.unreliable.to_string()),
            Cell::new(
                st.unsettled.to_string(),
                if st.unsettled > 0 {
                    Tone::Warn
                } else {
                    Tone::Plain
                },
            ),
            Cell::new(
                format!(
                    "{}/{}",
                    st.directions - st.direction_mismatches,
                    st.directions
                ),
                bad(st.direction_mismatches),
            ),
            verdict_cell(st.verdict),
        ]);
    }
    doc.push(Block::Table(t));

    if let (Some(l), Some(loaded)) = (&r.loss, loaded) {
        doc.push(Block::Heading(
            "2. Does it compute the loss the description says?".into(),
        ));
        doc.push(Block::Text(format!(
            "program {:.12e}, reference {:.12e} ({} {}): {}{}",
            l.outside,
            l.reference,
            loaded.desc.network.loss(),
            if loaded.desc.network.l2() > 0.0 {
                "with L2"
            } else {
                "without L2"
            },
            if l.matches {
                "they agree"
            } else {
                "they differ"
            },
            l.explanation
                .as_deref()
                .map_or(String::new(), |e| format!(" — {e}")),
        )));
        doc.push(Block::Heading(
            "3. Its gradient against the reference gradient".into(),
        ));
        doc.push(Block::Table(tensor_table(&r.tensors)));
        let single = r.program.dtype == "f32";
        let tolerance = Tolerances::for_precision(single).agreement;
        if let Some(p) = error_plot(&r.tensors, tolerance, if single { "f32" } else { "f64" }) {
            doc.push(p);
        }
    }
    doc.push(Block::Findings(r.findings.clone()));
    let summary = match r.verdict {
        Verdict::Pass if r.blackbox => {
            "the program's gradient is consistent with its own loss".to_string()
        }
        Verdict::Pass => "self-consistent, the right loss, and the reference gradient".to_string(),
        Verdict::Inconclusive => {
            "nothing found wrong, but too little of the check against the program's own loss was settled to pass".to_string()
        }
        Verdict::Fail => {
            let n = r
                .findings
                .iter()
                .filter(|f| f.severity == Severity::Error)
                .count();
            format!("{n} error finding{}", if n == 1 { "" } else { "s" })
        }
    };
    doc.push(Block::Verdict(r.verdict, summary));
    doc
}
