//! The demo scenario: an invented centrifugal-pump state classifier (what `plumb demo` runs on).
//!
//! Everything here is invented and generated from a seed: the sensor readings, the class means and
//! spreads, and the weights (trained by plumb's own engine). No real pump data is involved.

use std::path::Path;

use ndarray::{Array2, ArrayD};
use plumb_engine::{Batch, Init, Rng};
use plumb_formats::GraphDescription;

/// The sensor readings, in the order of the input columns (standardised: z-scores, no units).
pub const FEATURES: [&str; 4] = [
    "suction_pressure_z",
    "discharge_pressure_z",
    "vibration_rms_z",
    "motor_current_z",
];

/// The pump states, in the order of the output units.
pub const STATES: [&str; 3] = ["normal", "cavitating", "bearing-wear"];

/// The invented class means and spreads per feature: (mean, sd).
pub const PROFILES: [[(f64, f64); 4]; 3] = [
    // normal: steady pressures, low vibration
    [(180.0, 10.0), (620.0, 20.0), (2.0, 0.4), (41.0, 1.5)],
    // cavitating: suction pressure collapses, discharge fluctuates, vibration rises, current drops
    [(95.0, 15.0), (560.0, 35.0), (4.5, 1.0), (38.0, 2.5)],
    // bearing wear: pressures normal, strong vibration, the motor works harder
    [(178.0, 10.0), (610.0, 20.0), (7.5, 1.5), (44.0, 2.0)],
];

/// Samples per state.
const PER_STATE: usize = 20;

/// Gradient-descent steps the demo trains for, and their rate.
const STEPS: usize = 300;
const RATE: f64 = 0.5;

pub const DESCRIPTION: &str = r#"# plumb demo: an invented centrifugal-pump state classifier (all data invented).
# Inputs: suction pressure, discharge pressure, vibration RMS, motor current (standardised).
# Outputs: normal, cavitating, bearing wear.
inputs = 4
loss = "cross-entropy"
l2 = 0.01
layout = "augmented"

[[layer]]
units = 8
activation = "tanh"

[[layer]]
units = 6
activation = "tanh"

[[layer]]
units = 3
activation = "softmax"
"#;

/// The generated example: description, raw and standardised data, trained weights.
pub struct Pump {
    pub description: GraphDescription,
    /// Class of each sample (index into [`STATES`]).
    pub labels: Vec<usize>,
    /// The standardised batch the network trains and is checked on.
    pub batch: Batch,
    /// The trained parameters, in the graph's tensor order.
    pub params: Vec<ArrayD<f64>>,
    /// Training loss before and after.
    pub loss_before: f64,
    pub loss_after: f64,
}

impl Pump {
    pub fn generate(seed: u64) -> Pump {
        let description = GraphDescription::parse(Path::new("pump.toml"), DESCRIPTION)
            .expect("the demo's description is valid");
        let net = &description.graph;
        let mut rng = Rng::new(seed ^ 0x9a3b_0001);
        let m = PER_STATE * STATES.len();
        let mut raw = Array2::zeros((m, 4));
        let mut labels = Vec::with_capacity(m);
        for (i, mut row) in raw.rows_mut().into_iter().enumerate() {
            let state = i % STATES.len();
            labels.push(state);
            for (f, v) in row.iter_mut().enumerate() {
                let (mean, sd) = PROFILES[state][f];
                *v = mean + sd * rng.normal();
            }
        }
        let x = standardise(&raw);
        let mut y = Array2::zeros((m, STATES.len()));
        for (i, &c) in labels.iter().enumerate() {
            y[[i, c]] = 1.0;
        }
        let batch = Batch { x, y };
        let mut params = Init::GlorotUniform.graph_params(net, &mut rng);
        let loss_before = net.loss(&params, batch.x.view(), batch.y.view());
        for _ in 0..STEPS {
            let (_, g) = net.parameter_gradient(&params, batch.x.view(), batch.y.view(), None);
            for (w, gw) in params.iter_mut().zip(&g) {
                w.scaled_add(-RATE, gw);
            }
        }
        let loss_after = net.loss(&params, batch.x.view(), batch.y.view());
        Pump {
            description,
            labels,
            batch,
            params,
            loss_before,
            loss_after,
        }
    }

    /// The standardised readings with their state label, as CSV text with a header.
    pub fn csv(&self) -> String {
        let mut out = format!("{},state\n", FEATURES.join(","));
        for (row, &label) in self.batch.x.rows().into_iter().zip(&self.labels) {
            let cells: Vec<String> = row.iter().map(|v| format!("{v}")).collect();
            out.push_str(&format!("{},{label}\n", cells.join(",")));
        }
        out
    }
}

/// Each column to zero mean and unit standard deviation.
fn standardise(raw: &Array2<f64>) -> Array2<f64> {
    let mut x = raw.clone();
    for mut col in x.columns_mut() {
        let mean = col.mean().unwrap_or(0.0);
        let sd = col.std(0.0).max(1e-12);
        col.mapv_inplace(|v| (v - mean) / sd);
    }
    x
}
