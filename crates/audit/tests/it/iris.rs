//! Unit health on real data: the Iris measurements (Fisher 1936, the UCI version in
//! fixtures/data/iris.csv), standardised, through a He-initialised 4-16-16-3 ReLU network. The dead and inactive fractions
//! the audit reports must be those a direct count over the engine's activations gives.

use std::path::Path;

use plumb_audit::{GraphWeights, KindThresholds, Thresholds, audit_graph, fitted_shapes};
use plumb_engine::{Batch, Init, Rng};
use plumb_formats::{DType, GraphDescription, read_data};

/// fixtures/data/iris.csv (its provenance is in fixtures/data/README.md) read as `plumb audit -d`
/// reads it (four measurements, the species 0–2 one-hot encoded), then standardised per column.
fn iris() -> Batch {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../fixtures/data/iris.csv");
    let mut batch = read_data(&path, 4, 3).unwrap();
    for mut col in batch.x.columns_mut() {
        let mean = col.mean().unwrap();
        let sd = col.std(0.0);
        col.mapv_inplace(|v| (v - mean) / sd);
    }
    // Fisher (1936) measured 50 flowers of each of the three species.
    assert_eq!(batch.y.sum_axis(ndarray::Axis(0)).to_vec(), [50.0; 3]);
    batch
}

#[test]
fn reported_dead_fractions_match_a_direct_count() {
    let text = "inputs = 4\nloss = \"cross-entropy\"\n[[layer]]\nunits = 16\nactivation = \"relu\"\n[[layer]]\nunits = 16\nactivation = \"relu\"\n[[layer]]\nunits = 3\nactivation = \"softmax\"\n";
    let desc = GraphDescription::parse(Path::new("iris.toml"), text).unwrap();
    let g = &desc.graph;
    let batch = iris();
    let mut saw_dead = false;
    for seed in 0..10 {
        let params = Init::HeNormal.graph_params(g, &mut Rng::new(seed));
        let dtypes = vec![DType::F64; params.len()];
        let w = GraphWeights {
            graph: g,
            params: &params,
            dtypes: &dtypes,
        };
        let audit = audit_graph(
            &w,
            fitted_shapes(&w),
            &batch,
            None,
            &Thresholds::default(),
            &KindThresholds::default(),
            1,
        )
        .unwrap();
        let trace = g.forward(&params, batch.x.view());
        let health = &audit.health;
        assert_eq!(health.len(), 2);
        for h in health {
            let a = &trace.outputs[h.layer - 1];
            for u in 0..16 {
                let zero = a.column(u).iter().filter(|&&v| v == 0.0).count();
                assert_eq!(
                    h.fractions[u],
                    zero as f64 / 150.0,
                    "seed {seed} layer {} unit {}",
                    h.layer,
                    u + 1
                );
                assert_eq!(h.flagged.contains(&(u + 1)), zero == 150);
            }
            saw_dead |= !h.flagged.is_empty();
        }
    }
    // Zero biases and 16 ReLU units on 4 inputs: some unit is dead on all 150 flowers for some seed.
    assert!(saw_dead, "the test exercised a dead unit");
}
