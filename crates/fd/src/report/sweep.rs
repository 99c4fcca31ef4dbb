//! The report of `plumb sweep`: for each chosen coordinate, every method's relative error against
//! the step (the V-curve), and the sweep's one verdict rule — a coordinate where no method agrees
//! with the analytic value at any step is an error.

use std::path::PathBuf;

use plumb_engine::Rng;
use plumb_report::{DataSource, Finding, SCHEMA_VERSION, Severity, Verdict, WeightsSource, number};
use serde::{Deserialize, Serialize};

use super::{GraphLoaded, GraphPlace, Places};
use crate::{
    CheckConfig, CheckError, Method, Precision, Sample, SweepPlan, check_graph, sweep_graph,
    worse_error,
};

/// Coordinates the default choice adds at random to the worst one.
const RANDOM_COORDS: usize = 3;

/// The coordinates of the quick check that picks the worst one (at most).
const QUICK_COORDS: usize = 2000;

/// One method's curve at one coordinate.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct MethodCurve {
    pub method: String,
    /// Relative error at each step (null where not finite).
    pub errors: Vec<f64>,
    pub best_step: f64,
    pub best_error: f64,
}

/// A swept coordinate, located in the weight file ([`GraphPlace`]).
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct CoordSweep {
    #[serde(flatten)]
    pub place: GraphPlace,
    pub analytic: f64,
    /// Why this coordinate was swept: "asked", "worst" or "random".
    pub chosen: String,
    pub methods: Vec<MethodCurve>,
}

impl CoordSweep {
    /// The smallest error any method reaches at any step.
    pub fn best_error(&self) -> f64 {
        self.methods
            .iter()
            .map(|m| m.best_error)
            .fold(f64::INFINITY, f64::min)
    }

    /// Whether some method at some step agrees with the analytic value within `tolerance` — the
    /// rule behind the `no-agreement` finding and each test case.
    pub fn agrees_within(&self, tolerance: f64) -> bool {
        self.best_error() <= tolerance
    }
}

/// The JSON report of `plumb sweep` (docs/json.md).
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SweepReport {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: String,
    pub description: PathBuf,
    pub weights: WeightsSource,
    pub data: DataSource,
    pub precision: String,
    pub tolerance: f64,
    pub steps: Vec<f64>,
    pub coordinates: Vec<CoordSweep>,
    pub plot: Option<PathBuf>,
    pub findings: Vec<Finding>,
}

impl SweepReport {
    /// Whether `c` agrees within the report's tolerance ([`CoordSweep::agrees_within`]).
    pub fn agrees(&self, c: &CoordSweep) -> bool {
        c.agrees_within(self.tolerance)
    }
}

/// What to sweep: the coordinates asked for ((graph tensor, flat index); `None`: the worst of a
/// quick central check and a few at random, drawn from `seed`), the methods, the steps, the
/// precision, and where the plot goes (reported, not written here).
pub struct SweepAsk {
    pub coords: Option<Vec<(usize, usize)>>,
    pub methods: Vec<Method>,
    pub steps: Vec<f64>,
    pub precision: Precision,
    pub seed: u64,
    pub plot: Option<PathBuf>,
}

/// Sweeps the loaded network and builds the report. The analytic gradient is the reference
/// engine's in the precision swept.
pub fn sweep_report(loaded: &GraphLoaded, ask: &SweepAsk) -> Result<SweepReport, CheckError> {
    let graph = &loaded.desc.graph;
    let b = &loaded.batch;
    let mut config = CheckConfig::new(Method::Central, ask.precision);
    config.sample = Some(Sample::Total(graph.parameters().min(QUICK_COORDS)));
    config.directions = Some(0);
    config.seed = ask.seed;
    let quick = check_graph(
        graph,
        &loaded.params,
        b.x.view(),
        b.y.view(),
        &config,
        &|_, _| {},
    )
    .map_err(|e| super::graph_check::said_where(loaded, e))?;
    let chosen: Vec<((usize, usize), &str)> = match &ask.coords {
        Some(c) => c.iter().map(|&c| (c, "asked")).collect(),
        None => {
            let worst = quick
                .coords
                .iter()
                .min_by(|a, b| worse_error(a.rel_error, b.rel_error))
                .map(|c| (c.coord.tensor, c.coord.index))
                .expect("a network has parameters");
            let sizes: Vec<usize> = quick.analytic.iter().map(|a| a.len()).collect();
            let mut out = vec![(worst, "worst")];
            out.extend(random_coords(&sizes, &[worst], ask.seed));
            out
        }
    };
    let plan = SweepPlan {
        coords: chosen.iter().map(|(c, _)| *c).collect(),
        methods: ask.methods.clone(),
        steps: ask.steps.clone(),
        precision: ask.precision,
    };
    let curves = sweep_graph(
        graph,
        &loaded.params,
        b.x.view(),
        b.y.view(),
        &quick.analytic,
        &plan,
    )?;
    let places = Places::new(&loaded.desc);
    let tolerance = ask.precision.tolerance();
    let mut findings = Vec::new();
    let mut coordinates = Vec::new();
    for (curve, (_, why)) in curves.iter().zip(&chosen) {
        let (t, k) = curve.coord;
        let place = places.place(t, k);
        let methods: Vec<MethodCurve> = ask
            .methods
            .iter()
            .enumerate()
            .map(|(m, method)| {
                let best = curve.best(m, 0.0);
                MethodCurve {
                    method: method.name().into(),
                    errors: (0..ask.steps.len())
                        .map(|i| curve.error(m, i, 0.0))
                        .collect(),
                    best_step: ask.steps[best],
                    best_error: curve.error(m, best, 0.0),
                }
            })
            .collect();
        let c = CoordSweep {
            place,
            analytic: curve.analytic,
            chosen: (*why).into(),
            methods,
        };
        if !c.agrees_within(tolerance) {
            let best = c.best_error();
            findings.push(
                Finding::new(
                    "no-agreement",
                    Severity::Error,
                    format!(
                        "no method at any step brings the numeric derivative within {tolerance:e} of the analytic one at {} (best {}): the gradient is likely wrong here, or the loss is not smooth at this point",
                        c.place.label(),
                        number(best)
                    ),
                )
                .tensor(&c.place.tensor)
                .layer(c.place.layer)
                .figure("best_error", best),
            );
        }
        coordinates.push(c);
    }
    Ok(SweepReport {
        verdict: Verdict::of(&findings),
        schema_version: SCHEMA_VERSION,
        command: "sweep".into(),
        description: loaded.desc.path.clone(),
        weights: loaded.weights_source.clone(),
        data: loaded.data_source.clone(),
        precision: ask.precision.name().into(),
        tolerance,
        steps: ask.steps.clone(),
        coordinates,
        plot: ask.plot.clone(),
        findings,
    })
}

/// Up to [`RANDOM_COORDS`] coordinates drawn uniformly over every parameter (tensor sizes
/// `sizes`), none of them in `taken` or drawn twice.
fn random_coords(
    sizes: &[usize],
    taken: &[(usize, usize)],
    seed: u64,
) -> Vec<((usize, usize), &'static str)> {
    let mut rng = Rng::new(seed ^ 0x5ee9);
    let all: usize = sizes.iter().sum();
    let mut out: Vec<((usize, usize), &'static str)> = Vec::new();
    let mut tries = 0;
    while taken.len() + out.len() < (RANDOM_COORDS + taken.len()).min(all) && tries < 100 {
        tries += 1;
        let mut k = rng.below(all);
        let mut t = 0;
        while k >= sizes[t] {
            k -= sizes[t];
            t += 1;
        }
        if !taken.contains(&(t, k)) && !out.iter().any(|(o, _)| *o == (t, k)) {
            out.push(((t, k), "random"));
        }
    }
    out
}
