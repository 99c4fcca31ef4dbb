//! A probe run: start the program, hand it the parameters and the data, and check it three ways —
//! its gradient against finite differences of its own loss (the outside checker, the one
//! sampler), its loss against the reference loss, and its gradient (and input gradient, when it
//! sends one) against the reference gradient with the diagnosis — then build the report.

use std::path::PathBuf;
use std::time::{Duration, Instant};

use ndarray::ArrayD;
use plumb_diagnose::report::{certify_graph, judge_graph_gradient, judge_graph_loss};
use plumb_diagnose::{INPUT, Tolerances};
use plumb_engine::Batch;
use plumb_fd::report::GraphLoaded;
use plumb_fd::{
    Change, ExternalConfig, Inside, Method, OutsideTensor, Precision, Sample, check_external,
    graph_gradient_magnitude,
};
use plumb_formats::Tensor;
use plumb_formats::shape_text;
use plumb_report::{DataSource, SCHEMA_VERSION, Severity, Verdict};

use crate::blackbox::{blackbox_batch, blackbox_parameters};
use crate::graph_inside::GraphKinks;
use crate::report::{ProbeReport, ProgramReport};
use crate::self_check::self_check_report;
use crate::{Hello, Program, RunError, TensorSpec};

/// How to probe a program.
#[derive(Clone, Debug)]
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

/// What a probe runs on: a description of any kind with its weights and data (the layer graph),
/// or a black box whose tensors its hello declares and whose data is drawn once the hello is
/// known.
pub enum Source<'a> {
    Graph(&'a GraphLoaded),
    Blackbox {
        description: Option<PathBuf>,
        batch: BatchFor<'a>,
    },
}

/// The batch (and where it came from) for a black box, from its hello.
pub type BatchFor<'a> = Box<dyn FnOnce(&Hello) -> Result<(Batch, DataSource), RunError> + 'a>;

/// The batch for a black box without a description: see [`blackbox_batch`].
pub fn blackbox_data(
    hello: &Hello,
    data: Option<&std::path::Path>,
    samples: usize,
    seed: u64,
) -> Result<(Batch, DataSource), RunError> {
    blackbox_batch(hello, data, samples, seed)
}

/// Runs the program through the three checks and builds the report. `seed` draws the sample, the
/// directions and a black box's parameters and data; `note` takes progress lines for people
/// (`None`: quiet, the program's stderr is kept back too).
pub fn probe(
    src: Source<'_>,
    opts: &ProbeOptions,
    seed: u64,
    note: Option<&dyn Fn(&str)>,
) -> Result<ProbeReport, RunError> {
    let (reference, description, batch_for) = match src {
        Source::Graph(l) => (Some(l), Some(l.desc.path.clone()), None),
        Source::Blackbox { description, batch } => (None, description, Some(batch)),
    };
    // The tensors a description expects, with the values sent: the file tensors in their declared
    // layout and storage.
    let layout: Vec<Tensor> = match reference {
        Some(l) => l
            .desc
            .to_file(&l.params)
            .map_err(|e| RunError::Input(format!("{}: {e}", l.desc.path.display())))?,
        None => Vec::new(),
    };
    let specs: Vec<TensorSpec> = layout
        .iter()
        .map(|t| TensorSpec {
            name: t.name.clone(),
            shape: t.shape.clone(),
        })
        .collect();

    let started = Instant::now();
    let mut program = Program::start_with(
        &opts.command,
        Duration::from_secs_f64(opts.timeout),
        note.is_none(),
    )?;
    let hello = program.hello(reference.is_some().then_some(&specs[..]))?;
    let declared: usize = hello.tensors.iter().map(TensorSpec::len).sum();
    if declared > plumb_formats::MAX_PARAMETERS {
        bail!(
            "the program declares {declared} parameters, more than the {} plumb handles",
            plumb_formats::MAX_PARAMETERS
        );
    }
    let (params, weights_source) = match reference {
        Some(l) => (layout, l.weights_source.clone()),
        None => blackbox_parameters(&hello.tensors, &opts.weights, seed)?,
    };
    let (batch, data_source) = match (reference, batch_for) {
        (Some(l), _) => (l.batch.clone(), l.data_source.clone()),
        (None, Some(f)) => f(&hello)?,
        (None, None) => unreachable!("a black box comes with its batch"),
    };
    let b = &batch;
    // x and y as the program receives them: a description's with the input's and the output's
    // axes (the input in the data's axis order), a black box's batch as (samples, values).
    let (x_shape, x, y_shape) = match reference {
        Some(l) => {
            let t = l.desc.input_tensor_in(b.x.view(), l.order);
            let mut y_shape = vec![b.len()];
            y_shape.extend(l.desc.graph.output().dims());
            (t.shape, t.data, y_shape)
        }
        None => (
            vec![b.len(), b.x.ncols()],
            b.x.iter().copied().collect(),
            vec![b.len(), b.y.ncols()],
        ),
    };
    let y: Vec<f64> = b.y.iter().copied().collect();
    let with_data: Vec<(TensorSpec, &[f64])> = hello
        .tensors
        .iter()
        .zip(&params)
        .map(|(s, p)| (s.clone(), p.data.as_slice()))
        .collect();
    program.load(&with_data, (&x_shape, &x), (&y_shape, &y))?;
    let (loss, mut grads) = program.gradient()?;
    let input_gradient = split_input_gradient(&hello, &mut grads, &x_shape)?;
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
    // A dense description's entries carry the bound on their pieces that `check` gives them,
    // from the reference (the program computes the same sums, so its round-off follows them);
    // other kinds and a black box are judged without it.
    let mut gross = reference.map_or_else(Vec::new, |l| file_gross(l, b));
    let outside: Vec<OutsideTensor> = fitting
        .iter()
        .map(|&i| OutsideTensor {
            name: params[i].name.clone(),
            values: params[i].data.clone(),
            gradient: grads[i].1.clone(),
            gross: gross.get_mut(i).map(std::mem::take).unwrap_or_default(),
        })
        .collect();
    let total: usize = params.iter().map(|p| p.data.len()).sum();
    let sample = opts.sample.unwrap_or(Sample::default_for_parameters(total));
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
        seed,
        eps: precision.epsilon(),
        tolerance: precision.tolerance(),
    };
    // Kinks are seen through the reference, which runs the same network (not for a black box).
    let kinks = reference.map(|l| GraphKinks::new(&l.desc, &l.params, &b.x));
    let crossed = |t: usize, flat: usize, d: f64| -> bool {
        kinks
            .as_ref()
            .is_some_and(|k| k.crossed(&[(fitting[t], flat, d)]))
    };
    // Along a direction: the direction's entries placed into the reference's own parameters.
    let crossed_along = |v: &[Vec<f64>], d: f64| -> bool {
        kinks.as_ref().is_some_and(|k| {
            let changes: Vec<(usize, usize, f64)> = v
                .iter()
                .enumerate()
                .flat_map(|(t, vt)| {
                    let file = fitting[t];
                    vt.iter()
                        .enumerate()
                        .filter(|(_, w)| **w != 0.0)
                        .map(move |(k, &w)| (file, k, d * w))
                })
                .collect();
            k.crossed(&changes)
        })
    };
    let loss_gross = kinks.as_ref().map_or(0.0, |k| k.loss_gross(&b.y));
    let inside = Inside {
        crossed: &crossed,
        crossed_along: &crossed_along,
        loss_gross,
        sees_kinks: reference.is_some(),
        differences: None,
        widens: false,
        differences_along: None,
        bent: None,
        bent_along: None,
        round_off: None,
        round_off_along: None,
    };
    let mut ask = |count: usize, changes: &[Change]| {
        let wire: Vec<crate::Change> = changes
            .iter()
            .map(|c| crate::Change {
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
    let tolerance = |_: &str| Tolerances::for_precision(single);
    let outside: Vec<Tensor> = grads
        .iter()
        .map(|(s, d)| Tensor::new(s.name.clone(), s.shape.clone(), d.clone()))
        .collect();
    let (loss_report, certification, tensors) = match reference {
        Some(l) => {
            let (lr, lf) = judge_graph_loss(l, loss, single);
            findings.extend(lf);
            let mut given = outside;
            if let Some(dx) = input_gradient {
                given.push(Tensor::new(INPUT, x_shape.clone(), dx));
            }
            let (tr, tf) = judge_graph_gradient(l, &given, &tolerance)
                .map_err(|e| RunError::Input(format!("the program's gradient: {e}")))?;
            findings.extend(tf);
            let cert = certify_graph(l, seed)?;
            if !cert.certified {
                findings.push(plumb_diagnose::report::uncertified_finding());
            }
            (Some(lr), Some(cert), tr)
        }
        None => (None, None, Vec::new()),
    };
    // With a description, the comparison with the reference engine settles the gradient by
    // itself: a loss that matches the certified reference's and a gradient that matches its
    // gradient in every tensor are consistent with each other to the precision judged. A
    // self-check left unsettled (f32 round-off over a deep loss, kinks) then no longer holds the
    // verdict back; its finding stays, as a note that says what the verdict rests on.
    let settled_by_reference = loss_report.as_ref().is_some_and(|l| l.matches)
        && certification.as_ref().is_some_and(|c| c.certified)
        && !tensors.is_empty()
        && tensors.iter().all(|t| t.verdict == Verdict::Pass);
    if settled_by_reference && !self_check.conclusive {
        for f in findings.iter_mut().filter(|f| f.code == "inconclusive") {
            f.severity = Severity::Note;
            f.message = format!(
                "{}. The verdict rests on the comparison with the reference engine instead: the program's loss and every tensor of its gradient match the reference's.",
                f.message.trim_end_matches('.')
            );
        }
    }
    let conclusive = self_check.conclusive || settled_by_reference;
    let command = program.command().to_string();
    let (requests, asked) = program.traffic();
    if let Some(note) = note {
        note(&format!(
            "{requests} requests to the program, {asked} losses at perturbed parameters, {:.1} s",
            started.elapsed().as_secs_f64()
        ));
    }
    program.finish();

    Ok(ProbeReport {
        verdict: Verdict::of_check(&findings, conclusive),
        schema_version: SCHEMA_VERSION,
        command: "probe".into(),
        program: ProgramReport {
            command,
            name: hello.name,
            dtype: hello.dtype,
        },
        blackbox: reference.is_none(),
        description,
        weights: weights_source,
        data: data_source,
        self_check,
        loss: loss_report,
        reference: certification,
        tensors,
        findings,
    })
}

/// The input gradient a program said it sends (hello `"input_gradient": true`): the gradient
/// reply's last tensor, named `input`, of the loaded x's shape; taken off the parameters' list.
fn split_input_gradient(
    hello: &Hello,
    grads: &mut Vec<(TensorSpec, Vec<f64>)>,
    x_shape: &[usize],
) -> Result<Option<Vec<f64>>, RunError> {
    if !hello.input_gradient {
        return Ok(None);
    }
    match grads.last() {
        Some((s, _)) if s.name == INPUT && grads.len() == hello.tensors.len() + 1 => {
            if s.shape != x_shape {
                bail!(
                    "the program's input gradient `{INPUT}` has shape {}, but x was loaded as {}; the input gradient has x's shape",
                    shape_text(&s.shape),
                    shape_text(x_shape)
                );
            }
            Ok(grads.pop().map(|(_, d)| d))
        }
        _ => bail!(
            "the program's hello says it sends the input gradient, but its gradient reply does not end with a tensor `{INPUT}` after its {} declared tensors (docs/protocol.md)",
            hello.tensors.len()
        ),
    }
}

/// A gradient tensor of another shape than declared is a protocol failure, unless (outside a black
/// box) it has the shape of a rearrangement the diagnosis can test: reversed, or another tensor's.
fn check_reply_shapes(
    declared: &[TensorSpec],
    grads: &[(TensorSpec, Vec<f64>)],
    blackbox: bool,
) -> Result<(), RunError> {
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
                shape_text(&s.shape),
                shape_text(&d.shape)
            );
        }
    }
    Ok(())
}

/// [`graph_gradient_magnitude`] of the reference, as the file's tensors (an augmented dense
/// matrix holds its weight's and bias's bounds as it holds their values); empty when the graph
/// has none (not a chain of dense layers).
fn file_gross(l: &GraphLoaded, b: &Batch) -> Vec<Vec<f64>> {
    let g = &l.desc.graph;
    let Some(per_tensor) = graph_gradient_magnitude(g, &l.params, b.x.view(), b.y.view()) else {
        return Vec::new();
    };
    let arrays: Option<Vec<ArrayD<f64>>> = per_tensor
        .into_iter()
        .zip(g.tensors())
        .map(|(v, s)| ArrayD::from_shape_vec(s.spec.shape.clone(), v).ok())
        .collect();
    arrays
        .and_then(|a| l.desc.to_file(&a).ok())
        .map_or_else(Vec::new, |files| {
            files.into_iter().map(|t| t.data).collect()
        })
}

#[cfg(test)]
mod tests {
    use std::path::Path;

    use plumb_engine::Init;
    use plumb_fd::report::GraphInputs;
    use plumb_formats::GraphDescription;

    use super::*;

    /// The triangle inequality: a sum's bound Σ|pieces| is at least |Σ pieces|, so the bound of
    /// every file entry is at least the reference gradient's magnitude there — which also shows
    /// that each bound went to its own entry of the augmented matrices (bias column 0 included).
    #[test]
    fn a_dense_file_entrys_bound_covers_its_gradient() {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../examples/pump.toml");
        let desc = GraphDescription::read(&path).unwrap();
        let inputs = GraphInputs::drawn(Init::GlorotUniform, 5, 12);
        let l = GraphLoaded::load(desc, &inputs).unwrap();
        let g = &l.desc.graph;
        let grad = g.gradient(&l.params, l.batch.x.view(), l.batch.y.view(), None);
        let files = l.desc.to_file(&grad.params).unwrap();
        let gross = file_gross(&l, &l.batch);
        assert_eq!(gross.len(), files.len());
        for (f, b) in files.iter().zip(&gross) {
            assert_eq!(f.data.len(), b.len(), "{}", f.name);
            for (k, (a, m)) in f.data.iter().zip(b).enumerate() {
                assert!(a.abs() <= m * (1.0 + 1e-12), "{}[{k}]: |{a}| > {m}", f.name);
                assert!(*m > 0.0, "{}[{k}]", f.name);
            }
        }
    }
}
