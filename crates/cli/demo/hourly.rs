//! The demo's scenario (c): the invented pump's state told at every hour of a day of hourly
//! readings by an LSTM (the network of examples/pump-lstm.toml, which
//! examples/python/lstm_numpy.py writes by hand).
//!
//! The days are invented and generated from the seed: a third run normally all day, a third start
//! to cavitate and a third show bearing wear from an hour drawn at random, the readings drifting
//! around the state's invented profile (scenario (a)'s). No pump was measured.

use ndarray::Array2;
use plumb_engine::{Batch, Rng};

use super::layered::{Bug, Scenario};
use super::pump::{PROFILES, STATES};

/// The description: the example's own file, so that the hand-written NumPy LSTM fits it.
pub const DESCRIPTION: &str = include_str!("../../../examples/pump-lstm.toml");

/// Hours per day, readings per hour, days per kind of day.
const HOURS: usize = 24;
const FEATURES: usize = 4;
const PER_KIND: usize = 10;

/// How much of an hour's noise carries over to the next (the readings drift, not jump).
const CARRY: f64 = 0.6;

/// The "hand-written" implementation's backpropagation-through-time bugs, one picked by the seed.
const BUGS: [Bug; 4] = [
    Bug {
        code: "state-gradient-dropped",
        layer: "lstm",
        label: "the gradient of the lstm's states is not carried back to the hour before",
    },
    Bug {
        code: "time-truncated",
        layer: "lstm",
        label: "backpropagation through time stops after the last hour",
    },
    Bug {
        code: "time-overwritten",
        layer: "lstm",
        label: "each hour's share of the lstm's weight gradient is assigned instead of added",
    },
    Bug {
        code: "gates-reordered",
        layer: "lstm",
        label: "the lstm's gradient stacks its gate blocks in the reverse of the declared order",
    },
];

/// The invented days (m × 24·4, hour by hour) and their one-hot state at every hour.
pub fn batch(seed: u64) -> Batch {
    let mut rng = Rng::new(seed ^ 0x9a3b_0003);
    let m = PER_KIND * STATES.len();
    let mut raw = Array2::zeros((m, HOURS * FEATURES));
    let mut y = Array2::zeros((m, HOURS * STATES.len()));
    for i in 0..m {
        let kind = i % STATES.len();
        let onset = if kind == 0 {
            HOURS
        } else {
            4 + rng.below(HOURS - 8)
        };
        let mut drift = [0.0; FEATURES];
        for hour in 0..HOURS {
            let state = if hour >= onset { kind } else { 0 };
            y[[i, hour * STATES.len() + state]] = 1.0;
            for (f, d) in drift.iter_mut().enumerate() {
                let (mean, sd) = PROFILES[state][f];
                *d = CARRY * *d + (1.0 - CARRY * CARRY).sqrt() * rng.normal();
                raw[[i, hour * FEATURES + f]] = mean + sd * *d;
            }
        }
    }
    // Each sensor to zero mean and unit standard deviation over every day and hour.
    let mut x = raw;
    for f in 0..FEATURES {
        let values: Vec<f64> = (0..HOURS)
            .flat_map(|h| x.column(h * FEATURES + f).to_vec())
            .collect();
        let n = values.len() as f64;
        let mean = values.iter().sum::<f64>() / n;
        let sd = (values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n)
            .sqrt()
            .max(1e-12);
        for h in 0..HOURS {
            x.column_mut(h * FEATURES + f)
                .mapv_inplace(|v| (v - mean) / sd);
        }
    }
    Batch { x, y }
}

/// Scenario (c) for `seed`.
pub fn scenario(seed: u64) -> Scenario {
    Scenario {
        stem: "pump-lstm",
        description: DESCRIPTION,
        batch: batch(seed),
        bug: BUGS[(seed % BUGS.len() as u64) as usize],
        seed: seed ^ 0x9a3b_0013,
        steps: 150,
        rate: 0.5,
        example: "examples/python/lstm_numpy.py",
        plant: |b| b.code.to_string(),
    }
}
