//! The release audit on the layer graph: each finding raised on a network built to have it and
//! absent on a healthy one, and a dense description's weight file audited as `plumb audit` reads
//! it, in both layouts, against the audit of the same parameters. Thresholds are plumb's defaults (docs/audit.md).

use crate::graph_common;

use std::path::Path;

use graph_common::{alarms, has, healthy, probe, run};

use ndarray::{ArrayD, IxDyn};
use plumb_audit::{
    GraphWeights, KindThresholds, Thresholds, audit_graph, audit_graph_file, fitted_shapes,
};
use plumb_engine::graph::{
    BatchNorm, Conv, ConvSettings, Dense, Flatten, Graph, GraphBuilder, LayerNorm, LossConfig,
    Shape,
};
use plumb_engine::{Activation, Init};
use plumb_formats::{DType, FileFormat, GraphDescription, TensorFile};
use plumb_report::Severity;

/// conv1d (3 → 4 channels, kernel 3) with `act`, flatten, dense softmax over 3 classes.
fn conv_net(act: Activation) -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 3,
            length: 12,
        },
        LossConfig::cross_entropy(),
    );
    b.push(None, act, |s| Conv::new(&ConvSettings::conv1d(4, 3), s))
        .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

#[test]
fn a_healthy_conv_network_raises_no_alarm() {
    let g = conv_net(Activation::Relu);
    for seed in 0..5 {
        let a = run(&g, &healthy(&g, seed), &probe(&g, 64, seed + 100));
        assert!(alarms(&a).is_empty(), "seed {seed}: {:?}", a.findings);
        // Flatten, with no parameters and no activation, has no health row.
        assert_eq!(a.health.len(), 1);
        assert_eq!(a.health[0].unit_name, "channel");
        assert_eq!(a.health[0].units, 4);
    }
}

// A channel whose bias is far below anything its kernel can reach outputs 0 at every position of
// every sample: dead. The fraction is counted over (sample, position) values.
#[test]
fn a_dead_channel_is_found_across_positions_and_samples() {
    let g = conv_net(Activation::Relu);
    let mut p = healthy(&g, 1);
    p[1][[2]] = -100.0;
    let batch = probe(&g, 64, 2);
    let a = run(&g, &p, &batch);
    let dead: Vec<_> = a
        .findings
        .iter()
        .filter(|f| f.code == "dead-channel")
        .collect();
    assert_eq!(dead.len(), 1, "{:?}", a.findings);
    assert_eq!(dead[0].figures["unit"], 3);
    assert_eq!(dead[0].tensor.as_deref(), Some("layer1.weight"));
    assert_eq!(a.health[0].fractions[2], 1.0);
    // The fraction of another channel is a direct count of its zero outputs over the 64 × 10
    // (sample, position) values.
    let trace = g.forward(&p, batch.x.view());
    let zeros = (0..64)
        .flat_map(|i| (0..10).map(move |t| (i, t)))
        .filter(|&(i, t)| trace.outputs[0][[i, 10 + t]] == 0.0)
        .count();
    assert_eq!(a.health[0].fractions[1], zeros as f64 / 640.0);
    // Half the channels dead: the layer is an error.
    p[1][[0]] = -100.0;
    let a = run(&g, &p, &batch);
    assert!(has(&a, "dead-layer"), "{:?}", a.findings);
}

// A sigmoid channel with a large bias sits near 1 everywhere: saturated (σ(z) > 0.99 for
// z > ln 99 ≈ 4.595); just under that bias on a zero kernel, it is not.
#[test]
fn a_saturated_channel_is_found_and_the_boundary_holds() {
    let g = conv_net(Activation::Sigmoid);
    let mut p = healthy(&g, 3);
    let batch = probe(&g, 64, 4);
    for (o, _) in [(0, ()), (1, ()), (2, ()), (3, ())] {
        p[1][[o]] = 0.0;
    }
    let a = run(&g, &p, &batch);
    assert!(!has(&a, "saturated-channel"), "{:?}", a.findings);
    // Channel 2: a zero kernel and bias ln 99 + 0.01 → every output is above 0.99.
    for v in p[0].slice_mut(ndarray::s![1, .., ..]).iter_mut() {
        *v = 0.0;
    }
    p[1][[1]] = 99f64.ln() + 0.01;
    let a = run(&g, &p, &batch);
    let f: Vec<_> = a
        .findings
        .iter()
        .filter(|f| f.code == "saturated-channel")
        .collect();
    assert_eq!(f.len(), 1, "{:?}", a.findings);
    assert_eq!(f[0].figures["unit"], 2);
    // Bias ln 99 − 0.01: σ = 0.98990… < 0.99, not saturated.
    p[1][[1]] = 99f64.ln() - 0.01;
    let a = run(&g, &p, &batch);
    assert!(!has(&a, "saturated-channel"), "{:?}", a.findings);
}

// Two out-channels with the same kernel and bias compute the same activation: duplicates. When
// the next convolution also reads them with the same weights, they are inseparable.
#[test]
fn duplicate_and_symmetric_channels() {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 2,
            length: 10,
        },
        LossConfig::cross_entropy(),
    );
    b.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv1d(4, 3), s)
    })
    .unwrap();
    b.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv1d(3, 3), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(2, s))
        .unwrap();
    let g = b.finish().unwrap();
    let batch = probe(&g, 32, 5);
    let p = healthy(&g, 6);
    assert!(alarms(&run(&g, &p, &batch)).is_empty());
    // Out-channels 1 and 3 of layer 1 (1-based) alike: duplicates only.
    let mut q = p.clone();
    let row = q[0].slice(ndarray::s![0, .., ..]).to_owned();
    q[0].slice_mut(ndarray::s![2, .., ..]).assign(&row);
    q[1][[2]] = q[1][[0]];
    let a = run(&g, &q, &batch);
    let dup: Vec<_> = a
        .findings
        .iter()
        .filter(|f| f.code == "duplicate-channels")
        .collect();
    assert_eq!(dup.len(), 1, "{:?}", a.findings);
    assert_eq!(dup[0].figures["units"].to_string(), "[1,3]");
    assert!(!has(&a, "symmetric-channels"));
    // The next layer reads in-channels 0 and 2 with the same weights: inseparable.
    let col = q[2].slice(ndarray::s![.., 0, ..]).to_owned();
    q[2].slice_mut(ndarray::s![.., 2, ..]).assign(&col);
    let a = run(&g, &q, &batch);
    assert!(has(&a, "symmetric-channels"), "{:?}", a.findings);
    assert!(!has(&a, "duplicate-channels"), "{:?}", a.findings);
}

/// conv1d → batch-norm (relu) → flatten → layer-norm → dense.
fn norm_net() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 2,
            length: 8,
        },
        LossConfig::cross_entropy(),
    );
    b.push(None, Activation::Identity, |s| {
        Conv::new(&ConvSettings::conv1d(6, 3), s)
    })
    .unwrap();
    b.push(None, Activation::Relu, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Identity, |s| LayerNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

// A scale near 0 makes its channel output the shift whatever the input. The threshold is
// |scale| < 1e-3 (plumb's figure); one channel is a warning, half of them an error.
#[test]
fn collapsed_norm_scales_and_their_boundary() {
    let g = norm_net();
    let batch = probe(&g, 32, 8);
    let mut p = healthy(&g, 9);
    let a = run(&g, &p, &batch);
    assert!(alarms(&a).is_empty(), "{:?}", a.findings);
    assert_eq!(a.inside.len(), 2, "one row per norm scale");
    // Batch-norm's scale is tensor 2 (after the conv's weight and bias).
    p[2][[4]] = 0.9e-3;
    let a = run(&g, &p, &batch);
    let f: Vec<_> = a
        .findings
        .iter()
        .filter(|f| f.code == "collapsed-scale")
        .collect();
    assert_eq!(f.len(), 1, "{:?}", a.findings);
    assert_eq!(f[0].tensor.as_deref(), Some("layer2.scale"));
    assert_eq!(f[0].figures["units"].to_string(), "[5]");
    assert!(f[0].message.contains("channel 5"), "{}", f[0].message);
    p[2][[4]] = -1.1e-3;
    assert!(!has(&run(&g, &p, &batch), "collapsed-scale"));
    // Three of six collapsed: the norm itself, an error; the layer-norm's features are "features".
    for c in [0, 1, 2] {
        p[2][[c]] = 0.0;
    }
    let n = p[4].len();
    p[4][[n - 1]] = 1e-9;
    let a = run(&g, &p, &batch);
    assert!(
        a.findings
            .iter()
            .any(|f| f.code == "collapsed-norm" && f.severity == Severity::Error),
        "{:?}",
        a.findings
    );
    let ln = a
        .findings
        .iter()
        .find(|f| f.tensor.as_deref() == Some("layer4.scale"))
        .expect("the layer norm's collapsed feature");
    assert!(
        ln.message.contains(&format!("feature {n}")),
        "{}",
        ln.message
    );
    // The report shows the measures in a table of their own.
    assert!(
        a.sections()
            .iter()
            .any(|b| matches!(b, plumb_report::Block::Heading(h) if h == "inside the layers"))
    );
    // The failing scale tensor has a test case of its own.
    assert!(a.cases().iter().any(|c| c.name == "audit layer2.scale"));
}

// Values per tensor: non-finite entries stop the measures that need a forward pass; a tensor
// stored narrower than the rest is named; an all-zero bias is a note.
#[test]
fn values_of_graph_tensors() {
    let g = norm_net();
    let batch = probe(&g, 16, 10);
    let mut p = healthy(&g, 11);
    for v in p[1].iter_mut() {
        *v = 0.0;
    }
    let mut dtypes = vec![DType::F64; p.len()];
    dtypes[0] = DType::F16;
    let w = GraphWeights {
        graph: &g,
        params: &p,
        dtypes: &dtypes,
    };
    let t = Thresholds::default();
    let k = KindThresholds::default();
    let a = audit_graph(&w, fitted_shapes(&w), &batch, None, &t, &k, 1).unwrap();
    let mixed: Vec<_> = a
        .findings
        .iter()
        .filter(|f| f.code == "mixed-precision")
        .collect();
    assert_eq!(mixed.len(), 1);
    assert_eq!(mixed[0].tensor.as_deref(), Some("layer1.weight"));
    assert!(has(&a, "zero-bias"));
    p[0][[1, 0, 2]] = f64::NAN;
    let w = GraphWeights {
        graph: &g,
        params: &p,
        dtypes: &dtypes,
    };
    let a = audit_graph(&w, fitted_shapes(&w), &batch, None, &t, &k, 1).unwrap();
    let nf = a.findings.iter().find(|f| f.code == "non-finite").unwrap();
    assert_eq!(nf.figures["first_index"].to_string(), "[1,0,2]");
    assert!(a.health.is_empty() && a.flow.is_empty() && a.init.is_empty());
    assert_eq!(a.skipped.len(), 1);
    // Parameters of the wrong shape are an error, not a panic.
    p[0] = ArrayD::zeros(IxDyn(&[2, 2]));
    let w = GraphWeights {
        graph: &g,
        params: &p,
        dtypes: &dtypes,
    };
    assert!(audit_graph(&w, fitted_shapes(&w), &batch, None, &t, &k, 1).is_err());
}

// Five convolutions with identity activations, the middle three scaled by 0.01: the gradient of
// the first layer is about 1e-6 of the last's, past the 3 orders plumb flags.
#[test]
fn vanishing_gradient_through_convolutions() {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 2,
            length: 16,
        },
        LossConfig::squared_error(),
    );
    for _ in 0..5 {
        b.push(None, Activation::Identity, |s| {
            Conv::new(&ConvSettings::conv1d(3, 3), s)
        })
        .unwrap();
    }
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    let g = b.finish().unwrap();
    let batch = probe(&g, 16, 12);
    let p = healthy(&g, 13);
    let a = run(&g, &p, &batch);
    assert!(!has(&a, "vanishing-gradient"), "{:?}", a.findings);
    assert_eq!(a.flow.len(), 6, "the layers with parameters");
    let mut q = p.clone();
    for t in [2, 3, 4, 5, 6, 7] {
        q[t].mapv_inplace(|v| v * 0.01);
    }
    let a = run(&g, &q, &batch);
    assert!(has(&a, "vanishing-gradient"), "{:?}", a.flow);
    assert!(has(&a, "scale-too-small"));
}

const DENSE: &str = r#"
inputs = 6
loss = "cross-entropy"
layout = "split"
l2 = 0.01
[[layer]]
units = 8
activation = "relu"
[[layer]]
units = 5
activation = "tanh"
[[layer]]
units = 3
activation = "softmax"
"#;

// A dense description's file audited through `audit_graph_file` (as `plumb audit` runs it) against
// `audit_graph` on the same parameters: the same findings (codes, severities, layers, figures and
// messages), the same unit health, initialisation and flow; findings name the file's tensors, the
// graph's under the split layout and the augmented matrix `layerJ` under the augmented one. The
// audit's figures come from plumb's own passes; what is checked here is that the file path and
// the parameter path agree and name the tensors the file holds. Planted: a dead unit, two units
// with identical rows and next-layer columns, a saturated tanh unit, a zero bias.
#[test]
fn a_dense_file_audit_agrees_with_the_graph_audit_and_names_the_file_tensors() {
    let split = GraphDescription::parse(Path::new("net.toml"), DENSE).unwrap();
    let augmented = GraphDescription::parse(
        Path::new("net.toml"),
        &DENSE.replace("layout = \"split\"", "layout = \"augmented\""),
    )
    .unwrap();
    let g = &split.graph;
    for variant in 0..3 {
        let mut p = healthy(g, 20 + variant);
        if variant > 0 {
            // Layer 1 unit 3 dead; units 5 and 6 alike, read alike by layer 2.
            p[0].slice_mut(ndarray::s![2, ..]).fill(0.0);
            p[1][[2]] = -1.0;
            let row = p[0].slice(ndarray::s![4, ..]).to_owned();
            p[0].slice_mut(ndarray::s![5, ..]).assign(&row);
            p[1][[5]] = p[1][[4]];
            let col = p[2].slice(ndarray::s![.., 4]).to_owned();
            p[2].slice_mut(ndarray::s![.., 5]).assign(&col);
            // Layer 2 unit 2 saturated; layer 3's bias zero.
            p[2].slice_mut(ndarray::s![1, ..]).fill(0.0);
            p[3][[1]] = 4.0;
            p[5].fill(0.0);
        }
        if variant == 2 {
            // Most of layer 1 dead: a layer finding.
            for u in [0, 1, 3, 6] {
                p[1][[u]] = -50.0;
            }
        }
        let batch = probe(g, 100, 30 + variant);
        let t = Thresholds::default();
        let k = KindThresholds::default();
        let dtypes = vec![DType::F64; p.len()];
        let w = GraphWeights {
            graph: g,
            params: &p,
            dtypes: &dtypes,
        };
        let graph = audit_graph(
            &w,
            fitted_shapes(&w),
            &batch,
            Some(Init::HeNormal),
            &t,
            &k,
            5,
        )
        .unwrap();
        if variant > 0 {
            // Units alike in and out are inseparable only (no duplicate-units beside them).
            // Past half the layer dead, the layer finding stands for its units.
            let dead = if variant == 1 {
                "dead-unit"
            } else {
                "dead-layer"
            };
            for code in [dead, "symmetric-units", "saturated-unit", "zero-bias"] {
                assert!(has(&graph, code), "variant {variant}: {code} planted");
            }
            assert!(!has(&graph, "duplicate-units"), "variant {variant}");
        }
        for (desc, file_name) in [
            (&split, None),
            (
                &augmented,
                Some(|t: &str| t.split('.').next().unwrap().to_string()),
            ),
        ] {
            let file = TensorFile {
                format: FileFormat::Npz,
                unread: Vec::new(),
                tensors: desc.to_file(&p).unwrap(),
            };
            let read = audit_graph_file(
                desc,
                &file,
                Path::new("w.npz"),
                &batch,
                Some(Init::HeNormal),
                &t,
                &k,
                5,
            )
            .unwrap();
            let mut want = graph.findings.clone();
            if let Some(rename) = file_name {
                for f in &mut want {
                    f.tensor = f.tensor.as_deref().map(rename);
                }
                for f in &read.findings {
                    let t = f.tensor.as_deref().unwrap_or("layer1");
                    assert!(["layer1", "layer2", "layer3"].contains(&t), "{f:?}");
                }
            }
            assert_eq!(read.findings, want, "variant {variant}");
            assert_eq!(read.health.len(), graph.health.len());
            for (d, h) in read.health.iter().zip(&graph.health) {
                assert_eq!(d.fractions, h.fractions);
                assert_eq!(d.flagged, h.flagged);
                assert_eq!(d.histogram, h.histogram);
            }
            assert_eq!(read.init.len(), graph.init.len());
            for (d, h) in read.init.iter().zip(&graph.init) {
                assert_eq!((d.fan_in, d.fan_out, d.std), (h.fan_in, h.fan_out, h.std));
                let (dt, ht) = (d.test.as_ref().unwrap(), h.test.as_ref().unwrap());
                assert_eq!(dt.adjusted_p_value, ht.adjusted_p_value);
            }
            assert_eq!(read.flow.len(), graph.flow.len());
            for (d, h) in read.flow.iter().zip(&graph.flow) {
                assert_eq!(d.activation_std, h.activation_std);
                assert_eq!(d.gradient_norm, h.gradient_norm);
                assert_eq!(d.sigma_max, h.sigma_max);
            }
        }
    }
}
