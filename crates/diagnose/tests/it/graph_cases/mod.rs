//! The fixtures of fixtures/graph/ read as graphs, parameters, batches and gradients: the
//! reference gradient and the gradients of planted mistakes, all computed by NumPy and autograd
//! apart from plumb (generate.py, generate_sequence.py, generate_diagnosis.py there).

#![allow(dead_code)]

use ndarray::{Array2, ArrayD, IxDyn};
use plumb_engine::graph::{
    Add, Attention, BatchNorm, Conv, ConvSettings, Dense, Embedding, Flatten, GlobalAvgPool, Graph,
    GraphBuilder, Gru, L2Divisor, LayerNorm, LossConfig, Lstm, Padding, Pool, PoolKind, Reduction,
    RmsNorm, Rnn, Shape, Storage,
};
use plumb_engine::{Activation, Loss};
use serde_json::Value;

/// A gradient in the graph's canonical order and shapes; the input gradient is absent for token
/// inputs.
#[derive(Clone, Debug)]
pub struct Grad {
    pub params: Vec<ArrayD<f64>>,
    pub input: Option<Array2<f64>>,
}

/// A planted mistake's gradient: the layer's name (per-kind codes) or index (activation codes).
#[derive(Clone, Debug)]
pub struct Planted {
    pub code: String,
    pub layer: Option<String>,
    pub at: Option<usize>,
    pub label: String,
    pub grad: Grad,
}

pub struct Case {
    pub name: String,
    pub file: &'static str,
    json: Value,
    storages: Vec<Option<Storage>>,
    pub params: Vec<ArrayD<f64>>,
    pub x: Array2<f64>,
    pub y: Array2<f64>,
    pub reference: Grad,
    /// Each kind's own mistakes.
    pub kinds: Vec<Planted>,
    /// The mistakes any network can make.
    pub any: Vec<Planted>,
}

impl Case {
    /// The case's graph under its own conventions.
    pub fn graph(&self) -> Graph {
        self.graph_with(self.config())
    }

    pub fn config(&self) -> LossConfig {
        let c = &self.json;
        LossConfig {
            loss: match c["loss"].as_str().unwrap() {
                "cross-entropy" => Loss::CrossEntropy,
                _ => Loss::SquaredError,
            },
            reduction: match c["reduction"].as_str().unwrap() {
                "sum" => Reduction::Sum,
                _ => Reduction::Mean,
            },
            l2: c["l2"].as_f64().unwrap(),
            l2_divisor: match c["l2_divisor"].as_str().unwrap() {
                "2m" => L2Divisor::TwoM,
                "2" => L2Divisor::Two,
                "m" => L2Divisor::M,
                _ => L2Divisor::One,
            },
            l2_on_bias: c["l2_on_bias"].as_bool().unwrap_or(false),
        }
    }

    /// The case's layers under other conventions.
    pub fn graph_with(&self, config: LossConfig) -> Graph {
        build(&self.json, self.file, config)
    }
}

fn usizes(v: &Value) -> Vec<usize> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|n| n.as_u64().expect("integer") as usize)
        .collect()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|n| n.as_f64().expect("number"))
        .collect()
}

fn tensor(v: &Value) -> ArrayD<f64> {
    ArrayD::from_shape_vec(IxDyn(&usizes(&v["shape"])), floats(&v["values"])).expect("shape")
}

fn matrix(v: &Value) -> Array2<f64> {
    let t = tensor(v);
    let m = t.shape()[0];
    let n = t.len() / m;
    t.into_shape_with_order((m, n)).unwrap()
}

fn pair(v: &Value) -> [usize; 2] {
    let u = usizes(v);
    [u[0], u[1]]
}

fn activation(name: &str) -> Activation {
    match name {
        "identity" => Activation::Identity,
        "relu" => Activation::Relu,
        "tanh" => Activation::Tanh,
        "sigmoid" => Activation::Sigmoid,
        "gelu" => Activation::Gelu,
        "softmax" => Activation::Softmax,
        other => panic!("activation {other}"),
    }
}

fn input_shape(case: &Value, file: &str) -> Shape {
    let input = &case["input"];
    if let Some(steps) = input["steps"].as_u64() {
        let steps = steps as usize;
        return match input["vocabulary"].as_u64() {
            Some(v) => Shape::Tokens {
                steps,
                vocabulary: v as usize,
            },
            None => Shape::Sequence {
                steps,
                width: input["features"].as_u64().unwrap() as usize,
            },
        };
    }
    let dims = usizes(input);
    match (dims.len(), file) {
        (2, "sequence.json") if case["tokens"].as_bool() == Some(true) => Shape::Tokens {
            steps: dims[0],
            vocabulary: dims[1],
        },
        (2, "sequence.json") => Shape::Sequence {
            steps: dims[0],
            width: dims[1],
        },
        (1, _) => Shape::Flat(dims[0]),
        (2, _) => Shape::Signal {
            channels: dims[0],
            length: dims[1],
        },
        _ => Shape::Image {
            channels: dims[0],
            height: dims[1],
            width: dims[2],
        },
    }
}

fn build(case: &Value, file: &str, config: LossConfig) -> Graph {
    let mut b = GraphBuilder::new(input_shape(case, file), config);
    for layer in case["layers"].as_array().unwrap() {
        let kind = layer["kind"].as_str().unwrap();
        let name = layer["name"].as_str();
        let act = activation(layer["activation"].as_str().unwrap_or("identity"));
        let eps = layer["epsilon"].as_f64().unwrap_or(0.0);
        let units = layer["units"].as_u64().unwrap_or(0) as usize;
        let text = |key: &str| layer[key].as_str().unwrap().to_string();
        let pool = |op, dims| {
            let (size, stride) = (pair(&layer["size"]), pair(&layer["stride"]));
            move |s: &Shape| Pool::new(op, dims, size, stride, s)
        };
        match kind {
            "conv1d" | "conv2d" => {
                let settings = ConvSettings {
                    dims: if kind == "conv1d" { 1 } else { 2 },
                    channels: layer["channels"].as_u64().unwrap() as usize,
                    kernel: pair(&layer["kernel"]),
                    stride: pair(&layer["stride"]),
                    dilation: pair(&layer["dilation"]),
                    padding: match layer["padding"].as_str() {
                        Some(_) => Padding::Same,
                        None => Padding::Explicit(pair(&layer["padding"])),
                    },
                    bias: layer["bias"].as_bool().unwrap(),
                };
                b.push(name, act, |s| Conv::new(&settings, s))
            }
            "max-pool1d" => b.push(name, act, pool(PoolKind::Max, 1)),
            "max-pool2d" => b.push(name, act, pool(PoolKind::Max, 2)),
            "avg-pool1d" => b.push(name, act, pool(PoolKind::Avg, 1)),
            "avg-pool2d" => b.push(name, act, pool(PoolKind::Avg, 2)),
            "global-avg-pool" => b.push(name, act, GlobalAvgPool::new),
            "flatten" => b.push(name, act, Flatten::new),
            "dense" => b.push(name, act, |s| Dense::new(units, s)),
            "batch-norm" => b.push(name, act, |s| BatchNorm::new(eps, s)),
            "layer-norm" => b.push(name, act, |s| LayerNorm::new(eps, s)),
            "rms-norm" => b.push(name, act, |s| RmsNorm::new(eps, s)),
            "add" => b.push(name, act, |s| Add::new(layer["from"].as_str().unwrap(), s)),
            "embedding" => b.push(name, act, |s| {
                Embedding::new(layer["size"].as_u64().unwrap() as usize, s)
            }),
            // The cell's activation (`cell` in sequence.json, `activation` in diagnosis.json;
            // tanh by default); the node after it takes the identity.
            "rnn" => b.push(name, Activation::Identity, |s| {
                let cell = layer["cell"].as_str().or(layer["activation"].as_str());
                let cell = activation(cell.unwrap_or("tanh"));
                Rnn::new(units, cell, &text("output"), s)
            }),
            "lstm" => b.push(name, act, |s| {
                Lstm::new(units, &text("gate-order"), &text("output"), s)
            }),
            "gru" => b.push(name, act, |s| {
                Gru::new(
                    units,
                    &text("gate-order"),
                    &text("reset"),
                    &text("output"),
                    s,
                )
            }),
            "attention" => b.push(name, act, |s| {
                Attention::new(
                    layer["heads"].as_u64().unwrap() as usize,
                    layer["causal"].as_bool().unwrap(),
                    s,
                )
            }),
            other => panic!("kind {other}"),
        }
        .unwrap();
    }
    b.finish().unwrap()
}

/// Per graph tensor, the storage order its fixture values are in (conv `storage`).
fn storages(case: &Value, g: &Graph) -> Vec<Option<Storage>> {
    let mut out = Vec::new();
    for layer in case["layers"].as_array().unwrap() {
        let kind = layer["kind"].as_str().unwrap();
        let name = layer["name"].as_str().unwrap();
        let j = g.layer(name).unwrap();
        let n = g.nodes()[j].tensors().len();
        let canonical = if kind == "conv1d" { "oik" } else { "oihw" };
        for t in 0..n {
            out.push(match (t, layer["storage"].as_str()) {
                (0, Some(order)) => Some(Storage::parse(order, canonical).unwrap()),
                _ => None,
            });
        }
    }
    out
}

fn grad_of(
    grads: &Value,
    input: &Value,
    shapes: &[ArrayD<f64>],
    st: &[Option<Storage>],
    x: &Array2<f64>,
) -> Grad {
    let params = grads
        .as_array()
        .unwrap()
        .iter()
        .zip(shapes)
        .zip(st)
        .map(|((g, p), s)| {
            let file_shape: Vec<usize> = match s {
                Some(s) => s.to_file(p).shape().to_vec(),
                None => p.shape().to_vec(),
            };
            let t = ArrayD::from_shape_vec(IxDyn(&file_shape), floats(g)).unwrap();
            match s {
                Some(s) => s.to_canonical(&t),
                None => t,
            }
        })
        .collect();
    let input =
        (!input.is_null()).then(|| Array2::from_shape_vec(x.raw_dim(), floats(input)).unwrap());
    Grad { params, input }
}

/// Every case of one fixture file.
pub fn cases(file: &'static str) -> Vec<Case> {
    let path = format!("{}/../../fixtures/graph/{file}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    let doc: Value = serde_json::from_str(&text).expect("valid JSON");
    doc["cases"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| {
            let g = build(c, file, LossConfig::squared_error());
            let st = storages(c, &g);
            let params: Vec<ArrayD<f64>> = c["params"]
                .as_array()
                .unwrap()
                .iter()
                .zip(&st)
                .map(|(p, s)| match s {
                    Some(s) => s.to_canonical(&tensor(p)),
                    None => tensor(p),
                })
                .collect();
            let (x, y) = (matrix(&c["x"]), matrix(&c["y"]));
            let reference = grad_of(&c["grads"], &c["input_grad"], &params, &st, &x);
            let planted = |key: &str| -> Vec<Planted> {
                c[key]
                    .as_array()
                    .map(|list| {
                        list.iter()
                            .map(|p| Planted {
                                code: p["code"].as_str().unwrap().to_string(),
                                layer: p["layer"].as_str().map(str::to_string),
                                at: p["layer"].as_u64().map(|v| v as usize),
                                label: p["label"].as_str().unwrap_or("").to_string(),
                                grad: grad_of(&p["grads"], &p["input_grad"], &params, &st, &x),
                            })
                            .collect()
                    })
                    .unwrap_or_default()
            };
            Case {
                name: c["name"].as_str().unwrap().to_string(),
                file,
                kinds: planted("mistakes"),
                any: planted("any_kind"),
                json: c.clone(),
                storages: st,
                params,
                x,
                y,
                reference,
            }
        })
        .collect()
}

/// Every case of every fixture file.
pub fn all_cases() -> Vec<Case> {
    let mut out = cases("cases.json");
    out.extend(cases("sequence.json"));
    out.extend(cases("diagnosis.json"));
    out
}
