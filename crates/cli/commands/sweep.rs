//! `plumb sweep`: the error of each method against step size, for chosen coordinates.

use anyhow::{Context, Result, bail};
use plumb_engine::graph::Graph;
use plumb_fd::report::{CoordSweep, GraphLoaded, Places, SweepAsk, SweepReport, sweep_report};
use plumb_fd::{Method, steps};
use plumb_formats::write_file;
use plumb_report::{Block, Case, Cell, Document, StepPanel, Table, Tone, Verdict, step_plot};

use crate::args::SweepArgs;
use crate::commands::check::precision;
use crate::inputs::{check_output, load_graph};
use crate::output::{Settings, num};

/// The most steps a sweep takes (each costs a few loss evaluations per method and coordinate).
const MAX_STEPS: usize = 200;

/// Parses FROM:TO:N.
fn parse_steps(text: &str) -> Result<Vec<f64>> {
    let parts: Vec<&str> = text.split(':').collect();
    let usage = "write --steps FROM:TO:N, e.g. 1e-1:1e-14:27";
    let [from, to, n] = parts.as_slice() else {
        bail!("--steps `{text}`: {usage}");
    };
    let num = |s: &str| {
        s.trim()
            .parse::<f64>()
            .ok()
            .filter(|v| v.is_finite() && *v > 0.0)
    };
    let (Some(from), Some(to)) = (num(from), num(to)) else {
        bail!("--steps `{text}`: the steps must be finite numbers > 0; {usage}");
    };
    let Ok(n) = n.trim().parse::<usize>() else {
        bail!("--steps `{text}`: N must be a whole number; {usage}");
    };
    if !(1e-30..=10.0).contains(&from) || !(1e-30..=10.0).contains(&to) {
        bail!("--steps `{text}`: steps must lie between 1e-30 and 10; {usage}");
    }
    if !(2..=MAX_STEPS).contains(&n) || from == to {
        bail!("--steps `{text}`: give two different steps and 2 ≤ N ≤ {MAX_STEPS}; {usage}");
    }
    Ok(steps(from, to, n))
}

fn parse_methods(text: Option<&str>) -> Result<Vec<Method>> {
    let Some(text) = text else {
        return Ok(Method::ALL.to_vec());
    };
    text.split(',')
        .map(|m| {
            Method::from_name(m.trim()).with_context(|| {
                let names: Vec<&str> = Method::ALL.iter().map(Method::name).collect();
                format!(
                    "--methods: unknown method `{}`; the methods are {}",
                    m.trim(),
                    names.join(", ")
                )
            })
        })
        .collect()
}

/// Parses LAYER:ROW:COL (a dense description's augmented matrix: layer from 1, row and column
/// from 0, column 0 the bias) as the graph's (tensor, flat index): layer J's weight and bias are
/// its graph tensors 2(J − 1) and 2(J − 1) + 1.
fn dense_coord(item: &str, graph: &Graph) -> Result<(usize, usize)> {
    let nums: Vec<Option<usize>> = item.split(':').map(|s| s.trim().parse().ok()).collect();
    let [Some(layer), Some(row), Some(col)] = nums.as_slice() else {
        bail!(
            "--coords: `{item}` is not LAYER:ROW:COL (e.g. 2:0:3 — layer from 1, row and column from 0, column 0 the bias) or TENSOR:INDEX"
        );
    };
    let depth = graph.nodes().len();
    if *layer == 0 || *layer > depth {
        bail!("--coords: `{item}`: the network has layers 1 to {depth}");
    }
    let w = graph.nodes()[layer - 1].tensors().start;
    let shape = &graph.tensors()[w].spec.shape;
    let (units, cols) = (shape[0], shape[1] + 1);
    if *row >= units || *col >= cols {
        bail!(
            "--coords: `{item}`: layer {layer}'s augmented matrix is {units} × {cols}: rows 0 to {}, columns 0 to {}",
            units - 1,
            cols - 1
        );
    }
    Ok(if *col == 0 {
        (w + 1, *row)
    } else {
        (w, row * (cols - 1) + col - 1)
    })
}

pub fn run(args: &SweepArgs, settings: &Settings) -> Result<Verdict> {
    let hs = parse_steps(&args.steps)?;
    let methods = parse_methods(args.methods.as_deref())?;
    if let Some(p) = &args.plot {
        let mut ins = vec![args.inputs.net.as_path()];
        ins.extend(args.inputs.weights.as_deref());
        ins.extend(args.inputs.data.as_deref());
        check_output(p, settings.force, &ins)?;
    }
    // A dense description runs on its layer graph like every other kind, and also takes its
    // augmented matrix's LAYER:ROW:COL.
    let (loaded, network) = load_graph(&args.inputs, settings.seed)?;
    let places = Places::new(&loaded.desc);
    let coords = args
        .coords
        .as_deref()
        .map(|t| parse_graph_coords(t, &places, &loaded))
        .transpose()?;
    let ask = SweepAsk {
        coords,
        methods: methods.clone(),
        steps: hs,
        precision: precision(args.precision),
        seed: settings.seed,
        plot: args.plot.clone(),
    };
    let report = sweep_report(&loaded, &ask)?;
    let eps = ask.precision.epsilon();
    let panels = step_panels(&report.coordinates, &report.steps, eps);
    if let Some(p) = &args.plot {
        let svg = step_plot(&panels).map_err(|e| anyhow::anyhow!("cannot draw the plot: {e}"))?;
        write_file(p, svg.as_bytes(), settings.existing())
            .with_context(|| format!("{}: cannot write the plot", p.display()))?;
        settings.note(&format!("wrote the plot to {}", p.display()));
    }
    let mut doc = document(&report, &methods, eps);
    doc.command = "sweep".into();
    doc.network = Some(network);
    doc.cases = report
        .coordinates
        .iter()
        .map(|c| {
            let best = c.best_error();
            let mut case = Case::new(format!("sweep {}", c.place.label()), report.agrees(c))
                .figure("best_error", best);
            for m in &c.methods {
                case = case.figure(&format!("{} best_error", m.method), m.best_error);
            }
            if report.agrees(c) {
                case
            } else {
                case.failing("no-agreement", "no method agrees at any step")
            }
        })
        .collect();
    if settings.html.is_some()
        && let Ok(svg) = step_plot(&panels)
    {
        let b = crate::commands::check::plot("Error against step size, per method", svg);
        crate::commands::check::insert_before_findings(&mut doc, vec![b]);
    }
    settings.emit(&report, doc)
}

/// Parses TENSOR:INDEX,… against the description: a tensor of the weight file and a flat index
/// in its shape there, or a graph tensor (`layer.suffix`) and a flat index in its canonical
/// shape; for a dense description also LAYER:ROW:COL.
fn parse_graph_coords(
    text: &str,
    places: &Places,
    loaded: &GraphLoaded,
) -> Result<Vec<(usize, usize)>> {
    let desc = &loaded.desc;
    let dense = desc.is_dense();
    let tensors = desc.graph.tensors();
    let names: Vec<&str> = desc.files.iter().map(|f| f.name.as_str()).collect();
    let parsed = text
        .split(',')
        .map(|item| {
            let item = item.trim();
            if dense && item.split(':').count() == 3 {
                return dense_coord(item, &desc.graph);
            }
            let Some((name, index)) = item.rsplit_once(':') else {
                bail!(
                    "--coords: `{item}` is not TENSOR:INDEX (e.g. {}:0 — a tensor of the weight file and a flat index from 0 in its shape there){}",
                    names[0],
                    if dense { " or LAYER:ROW:COL" } else { "" }
                );
            };
            let index = index.trim().parse::<usize>().ok();
            if let Some(f) = places.file_named(name) {
                let file = &desc.files[f];
                return match index.and_then(|k| places.entry(f, k)) {
                    Some(c) => Ok(c),
                    None => bail!(
                        "--coords: `{item}`: the index must be a whole number from 0 to {} (tensor `{name}` has shape {:?} in the weight file, read flat in row-major order)",
                        places.file_size(f).saturating_sub(1),
                        file.shape
                    ),
                };
            }
            let Some(t) = tensors.iter().position(|t| t.name == name) else {
                bail!(
                    "--coords: `{item}`: {} has no tensor `{name}`; its weight file's tensors are {}",
                    desc.path.display(),
                    names.join(", ")
                );
            };
            let size: usize = tensors[t].spec.shape.iter().product();
            match index {
                Some(k) if k < size => Ok((t, k)),
                _ => bail!(
                    "--coords: `{item}`: the index must be a whole number from 0 to {} (graph tensor `{name}` has shape {:?}, read flat in row-major order)",
                    size.saturating_sub(1),
                    tensors[t].spec.shape
                ),
            }
        })
        .collect::<Result<Vec<_>>>()?;
    // A coordinate given twice would be swept and reported twice (and 20,000 times over).
    let items: Vec<&str> = text.split(',').map(str::trim).collect();
    let mut first = std::collections::HashMap::new();
    for (item, c) in items.iter().zip(&parsed) {
        if let Some(earlier) = first.insert(*c, *item) {
            bail!(
                "--coords: `{earlier}` and `{item}` name the same coordinate; give each coordinate once"
            );
        }
    }
    Ok(parsed)
}

/// One plot panel per swept coordinate: every method's error against the step.
fn step_panels(coords: &[CoordSweep], steps: &[f64], eps: f64) -> Vec<StepPanel> {
    coords
        .iter()
        .map(|c| StepPanel {
            title: format!(
                "{} ({}), analytic {:.4e}",
                c.place.label(),
                c.chosen,
                c.analytic
            ),
            steps: steps.to_vec(),
            series: c
                .methods
                .iter()
                .map(|m| (m.method.to_string(), m.errors.clone()))
                .collect(),
            marks: vec![("∛ε".into(), eps.cbrt()), ("√ε".into(), eps.sqrt())],
        })
        .collect()
}

fn document(r: &SweepReport, methods: &[Method], eps: f64) -> Document {
    let mut doc = Document::new("plumb sweep — error against step size");
    doc.push(Block::Facts(vec![
        ("description".into(), r.description.display().to_string()),
        ("weights".into(), r.weights.describe()),
        ("data".into(), r.data.describe()),
        ("precision".into(), format!("{} (∛ε = {:.2e}, √ε = {:.2e})", r.precision, eps.cbrt(), eps.sqrt())),
        (
            "error".into(),
            "|numeric − analytic| / max(|analytic|, |numeric|) at each absolute step h; * marks each method's best".into(),
        ),
    ]));
    doc.push(Block::Text(
        "Truncation error falls as h grows small (as h² for central differences, h for forward), until \
         round-off, growing as ε/h, takes over: the best step sits near ∛ε for central and √ε for forward \
         differences (Numerical Recipes §5.7). The complex step has no round-off from cancellation."
            .into(),
    ));
    for c in &r.coordinates {
        doc.push(Block::Heading(format!(
            "{} — layer {}, {} ({}); analytic {:.6e}",
            c.place.label(),
            c.place.layer,
            c.place.location,
            c.chosen,
            c.analytic
        )));
        let mut header = vec!["step h".to_string()];
        header.extend(methods.iter().map(|m| m.name().to_string()));
        let mut t = Table::new(header);
        for (i, h) in r.steps.iter().enumerate() {
            let mut row = vec![Cell::from(format!("{h:.1e}"))];
            for m in &c.methods {
                let e = m.errors[i];
                let best = m.best_step == *h;
                let text = if best { format!("{}*", num(e)) } else { num(e) };
                row.push(Cell::new(text, if best { Tone::Good } else { Tone::Plain }));
            }
            t.push(row);
        }
        doc.push(Block::Table(t));
    }
    if let Some(p) = &r.plot {
        doc.push(Block::Facts(vec![("plot".into(), p.display().to_string())]));
    }
    doc.push(Block::Findings(r.findings.clone()));
    let summary = if r.verdict == Verdict::Pass {
        "every coordinate swept has a step where the numeric derivative agrees with the analytic one".to_string()
    } else {
        "some coordinate agrees at no step".to_string()
    };
    doc.push(Block::Verdict(r.verdict, summary));
    doc
}
