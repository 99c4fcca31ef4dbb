//! `attention`: multi-head scaled dot-product self-attention (Vaswani et al. 2017). Per sample,
//! with X the steps × width input: Q = X W_qᵀ + b_q, K = X W_kᵀ + b_k, V = X W_vᵀ + b_v; head h
//! takes the contiguous columns h·d .. (h + 1)·d (d = width / heads) of each; its weights are
//! P = softmax(Q_h K_hᵀ / √d) row by row (with `causal`, step t attends to steps ≤ t only);
//! O_h = P V_h; the output is O W_oᵀ + b_o, [steps, width]. No residual inside the layer.
//!
//! Backward, per head: dV_h = Pᵀ dO_h, dP = dO_h V_hᵀ, dS = P⊙(dP − rowsum(dP⊙P)),
//! dQ_h = dS K_h / √d, dK_h = dSᵀ Q_h / √d.
//!
//! Catalogued mistakes (DESIGN §7):
//! - `attention-scale-missing`: dQ_h = dS K_h and dK_h = dSᵀ Q_h (no 1/√d);
//! - `mask-ignored-in-backward`: P recomputed without the causal mask in both of its uses
//!   (dV_h and dS); no change when the layer is not causal;
//! - `softmax-jacobian-diagonal`: dS = P⊙(1 − P)⊙dP.
//!
//! Incremental hint: none; one projection entry moves a whole head's weights, so the graph
//! recomputes the layer.

use ndarray::{Array2, Array4, ArrayD, ArrayView2, Axis, s};

use super::recurrent::{mat, vector};
use super::sequence::Steps;
use super::{Back, Kind, Layer, LayerScalar, ParamSpec, Role, Shape, ShapeError, Step, reshape};
use crate::Scalar;

const MISTAKES: &[&str] = &[
    "attention-scale-missing",
    "mask-ignored-in-backward",
    "softmax-jacobian-diagonal",
];

/// The four projections, in the order of the layer's tensors (each a weight then a bias).
const PROJECTIONS: [&str; 4] = ["query", "key", "value", "output"];

/// An attention layer bound to its input shape.
#[derive(Clone, Debug)]
pub struct Attention {
    heads: usize,
    causal: bool,
    input: Shape,
    seq: Steps,
}

impl Attention {
    pub fn new(heads: usize, causal: bool, input: &Shape) -> Result<Attention, ShapeError> {
        if heads == 0 {
            return Err(ShapeError::Zero { key: "heads" });
        }
        let seq = Steps::of("attention", input)?;
        if seq.width % heads != 0 {
            return Err(ShapeError::Heads {
                width: seq.width,
                heads,
            });
        }
        Ok(Attention {
            heads,
            causal,
            input: *input,
            seq,
        })
    }

    fn head_width(&self) -> usize {
        self.seq.width / self.heads
    }

    /// Attention weights of every sample and head (m × heads × steps × steps) from Q and K
    /// ((m · steps) × width), masked when `masked`.
    fn weights<S: Scalar>(&self, q: &Array2<S>, k: &Array2<S>, masked: bool) -> Array4<S> {
        let (t, d) = (self.seq.steps, self.head_width());
        let m = q.nrows() / t;
        let scale = S::from_f64(1.0 / (d as f64).sqrt());
        let mut p = Array4::zeros((m, self.heads, t, t));
        for i in 0..m {
            for h in 0..self.heads {
                let qh = q.slice(s![i * t..(i + 1) * t, h * d..(h + 1) * d]);
                let kh = k.slice(s![i * t..(i + 1) * t, h * d..(h + 1) * d]);
                let scores = qh.dot(&kh.t());
                for a in 0..t {
                    let seen = if masked { a + 1 } else { t };
                    let row = scores.row(a);
                    let shift = (0..seen).fold(f64::NEG_INFINITY, |acc, b| acc.max(row[b].re()));
                    let shift = S::from_f64(shift);
                    let mut total = S::zero();
                    for b in 0..seen {
                        let e = (row[b] * scale - shift * scale).exp();
                        p[[i, h, a, b]] = e;
                        total += e;
                    }
                    for b in 0..seen {
                        p[[i, h, a, b]] = p[[i, h, a, b]] / total;
                    }
                }
            }
        }
        p
    }
}

impl Kind for Attention {
    fn kind(&self) -> &'static str {
        "attention"
    }

    fn input(&self) -> Shape {
        self.input
    }

    fn output(&self) -> Shape {
        Shape::Sequence {
            steps: self.seq.steps,
            width: self.seq.width,
        }
    }

    /// The weights of every head (heads × steps², and one head's scores as they are formed)
    /// and the four projections' steps × width.
    fn held(&self) -> usize {
        let t = self.seq.steps;
        let square = t.saturating_mul(t);
        square
            .saturating_mul(self.heads.saturating_add(1))
            .saturating_add(t.saturating_mul(self.seq.width).saturating_mul(4))
    }

    fn params(&self) -> Vec<ParamSpec> {
        let w = self.seq.width;
        PROJECTIONS
            .iter()
            .zip([
                ["query.weight", "query.bias"],
                ["key.weight", "key.bias"],
                ["value.weight", "value.bias"],
                ["output.weight", "output.bias"],
            ])
            .flat_map(|(_, [weight, bias])| {
                [
                    ParamSpec {
                        suffix: weight,
                        shape: vec![w, w],
                        role: Role::Weight,
                        decays: true,
                        fan_in: w,
                        fan_out: w,
                    },
                    ParamSpec {
                        suffix: bias,
                        shape: vec![w],
                        role: Role::Bias,
                        decays: false,
                        fan_in: 1,
                        fan_out: w,
                    },
                ]
            })
            .collect()
    }

    fn mistakes(&self) -> &'static [&'static str] {
        MISTAKES
    }

    fn inside(&self, _: ArrayView2<f64>, step: &Step<f64>) -> Vec<super::Inside> {
        let weights = step.saved[3]
            .view()
            .into_dimensionality::<ndarray::Ix4>()
            .expect("attention weights")
            .to_owned();
        vec![super::Inside::Attention {
            weights,
            causal: self.causal,
        }]
    }

    /// Every projection but the output bias is cut by head: the query, key and value rows, the
    /// output weight's columns.
    fn sample_blocks(&self, tensor: usize) -> usize {
        if tensor == 7 { 1 } else { self.heads }
    }

    fn sample_block(&self, tensor: usize, flat: usize) -> usize {
        let w = self.seq.width;
        match tensor {
            7 => 0,
            6 => flat % w / self.head_width(),
            t if t % 2 == 0 => flat / w / self.head_width(),
            _ => flat / self.head_width(),
        }
    }

    fn locate(&self, tensor: usize, flat: usize) -> String {
        let w = self.seq.width;
        let weight = tensor.is_multiple_of(2);
        let row = if weight { flat / w } else { flat };
        let projection = PROJECTIONS[tensor / 2];
        // The query, key and value rows belong to a head; the output projection's columns do.
        let head = if tensor / 2 < 3 { row } else { flat % w } / self.head_width();
        if weight {
            format!("{projection}, head {head}, out {row}, in {}", flat % w)
        } else {
            format!("{projection}, head {head}, out {row}")
        }
    }
}

/// x Wᵀ + b for rows x.
fn project<S: Scalar>(x: &Array2<S>, p: &[ArrayD<S>], k: usize) -> Array2<S> {
    x.dot(&mat(&p[2 * k]).t()) + vector(&p[2 * k + 1])
}

impl<S: LayerScalar> Layer<S> for Attention {
    fn forward(&self, params: &[ArrayD<S>], x: ArrayView2<S>, _: Option<ArrayView2<S>>) -> Step<S> {
        let (t, d) = (self.seq.steps, self.head_width());
        let rows = self.seq.rows(x);
        let (q, k, v) = (
            project(&rows, params, 0),
            project(&rows, params, 1),
            project(&rows, params, 2),
        );
        let p = self.weights(&q, &k, self.causal);
        let mut o = Array2::zeros(rows.raw_dim());
        for i in 0..x.nrows() {
            for h in 0..self.heads {
                let vh = v.slice(s![i * t..(i + 1) * t, h * d..(h + 1) * d]);
                let oh = p.slice(s![i, h, .., ..]).dot(&vh);
                o.slice_mut(s![i * t..(i + 1) * t, h * d..(h + 1) * d])
                    .assign(&oh);
            }
        }
        let y = project(&o, params, 3);
        let out = reshape(y, (x.nrows(), t * self.seq.width));
        Step {
            out,
            saved: vec![
                q.into_dyn(),
                k.into_dyn(),
                v.into_dyn(),
                p.into_dyn(),
                o.into_dyn(),
            ],
            branches: Vec::new(),
            ties: 0,
        }
    }

    fn backward(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        step: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let (t, d, w) = (self.seq.steps, self.head_width(), self.seq.width);
        let m = x.nrows();
        let (q, k, v, o) = (
            mat(&step.saved[0]),
            mat(&step.saved[1]),
            mat(&step.saved[2]),
            mat(&step.saved[4]),
        );
        let p = if mistake == Some("mask-ignored-in-backward") {
            self.weights(&q.to_owned(), &k.to_owned(), false)
        } else {
            step.saved[3]
                .view()
                .into_dimensionality::<ndarray::Ix4>()
                .expect("weights")
                .to_owned()
        };
        let scale = if mistake == Some("attention-scale-missing") {
            S::one()
        } else {
            S::from_f64(1.0 / (d as f64).sqrt())
        };
        let diagonal = mistake == Some("softmax-jacobian-diagonal");
        let dy = reshape(dout.to_owned(), (m * t, w));
        let mut grads = vec![ArrayD::zeros(ndarray::IxDyn(&[0])); 8];
        grads[6] = dy.t().dot(&o).into_dyn();
        grads[7] = dy.sum_axis(Axis(0)).into_dyn();
        let d_o = dy.dot(&mat(&params[6]));
        let (mut dq, mut dk, mut dv) = (
            Array2::zeros((m * t, w)),
            Array2::zeros((m * t, w)),
            Array2::zeros((m * t, w)),
        );
        for i in 0..m {
            for h in 0..self.heads {
                let (rows, cols) = (i * t..(i + 1) * t, h * d..(h + 1) * d);
                let at = s![rows.clone(), cols.clone()];
                let ph = p.slice(s![i, h, .., ..]);
                let doh = d_o.slice(at);
                dv.slice_mut(at).assign(&ph.t().dot(&doh));
                let dp = doh.dot(&v.slice(at).t());
                let mut ds = Array2::zeros((t, t));
                for a in 0..t {
                    let dot = (0..t).fold(S::zero(), |acc, b| acc + dp[[a, b]] * ph[[a, b]]);
                    for b in 0..t {
                        let pv = ph[[a, b]];
                        ds[[a, b]] = if diagonal {
                            pv * (S::one() - pv) * dp[[a, b]]
                        } else {
                            pv * (dp[[a, b]] - dot)
                        };
                    }
                }
                ds.mapv_inplace(|v| v * scale);
                dq.slice_mut(at).assign(&ds.dot(&k.slice(at)));
                dk.slice_mut(at).assign(&ds.t().dot(&q.slice(at)));
            }
        }
        let rows = self.seq.rows(x);
        let mut dx = need_input.then(|| Array2::zeros((m * t, w)));
        for (j, g) in [dq, dk, dv].into_iter().enumerate() {
            grads[2 * j] = g.t().dot(&rows).into_dyn();
            grads[2 * j + 1] = g.sum_axis(Axis(0)).into_dyn();
            if let Some(dx) = dx.as_mut() {
                *dx += &g.dot(&mat(&params[2 * j]));
            }
        }
        Back {
            params: grads,
            dx: dx.map(|dx| self.seq.batch_of_rows(&dx)),
            dskip: None,
        }
    }
}
