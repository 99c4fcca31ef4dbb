//! `max-pool1d`, `max-pool2d`, `avg-pool1d`, `avg-pool2d`: windows of `size` every `stride`
//! positions, no padding, a ragged tail dropped. A max-pool window's gradient goes to its first
//! maximum in row-major window order; which position that is, is the branch the forward pass
//! records, and a shared maximum is a tie (a non-smooth point).
//!
//! Channel-wise ([`Layer::forward_channels`]): output channel c reads input channel c alone, so
//! when only some input channels changed, those output channels (with their branches and ties)
//! are recomputed by the function a full pass uses and the others kept; a max-pool keeps its
//! ties per channel in [`Step::saved`] for that.
//!
//! Catalogued mistake: `pool-gradient-spread` — max-pool's gradient sent to every position of the
//! window, avg-pool's not divided by the window's element count.

use ndarray::{Array1, Array2, ArrayD, ArrayView2};

use super::window::Window;
use super::{Back, Kind, Layer, LayerScalar, Shape, ShapeError, Step};

/// Which value a window yields.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum PoolKind {
    Max,
    Avg,
}

/// A pooling layer bound to its input shape.
#[derive(Clone, Debug)]
pub struct Pool {
    op: PoolKind,
    dims: usize,
    input: Shape,
    window: Window,
}

impl Pool {
    /// `size` and `stride` per axis [height, width]; a 1-D pool (`dims` 1) uses the second slot.
    pub fn new(
        op: PoolKind,
        dims: usize,
        size: [usize; 2],
        stride: [usize; 2],
        input: &Shape,
    ) -> Result<Pool, ShapeError> {
        let kind = kind_name(op, dims);
        let (channels, hw) = match (dims, input) {
            (1, Shape::Signal { .. }) | (2, Shape::Image { .. }) => input.spatial().unwrap(),
            _ => {
                return Err(ShapeError::Input {
                    kind,
                    needs: if dims == 1 {
                        "[channels, length]"
                    } else {
                        "[channels, height, width]"
                    },
                    found: *input,
                    fix: "use the pool of the input's dimensionality",
                });
            }
        };
        let (mut size, mut stride) = (size, stride);
        if dims == 1 {
            size[0] = 1;
            stride[0] = 1;
        }
        let axes = if dims == 1 {
            ["height", "length"]
        } else {
            ["height", "width"]
        };
        for a in 0..2 {
            if size[a] == 0 {
                return Err(ShapeError::Zero { key: "size" });
            }
            if stride[a] == 0 {
                return Err(ShapeError::Zero { key: "stride" });
            }
            if size[a] > hw[a] {
                return Err(ShapeError::WindowTooLarge {
                    axis: axes[a],
                    size: size[a],
                    found: hw[a],
                });
            }
        }
        let window = Window::new(channels, hw, size, stride, [1, 1], [0; 2], [0; 2], axes)?;
        Ok(Pool {
            op,
            dims,
            input: *input,
            window,
        })
    }
}

fn kind_name(op: PoolKind, dims: usize) -> &'static str {
    match (op, dims) {
        (PoolKind::Max, 1) => "max-pool1d",
        (PoolKind::Max, _) => "max-pool2d",
        (PoolKind::Avg, 1) => "avg-pool1d",
        (PoolKind::Avg, _) => "avg-pool2d",
    }
}

impl Kind for Pool {
    fn kind(&self) -> &'static str {
        kind_name(self.op, self.dims)
    }

    fn input(&self) -> Shape {
        self.input
    }

    fn output(&self) -> Shape {
        self.input
            .with_spatial(self.window.channels, self.window.output)
    }

    fn mistakes(&self) -> &'static [&'static str] {
        &["pool-gradient-spread"]
    }

    fn branches(&self) -> bool {
        self.op == PoolKind::Max
    }
}

impl Pool {
    /// One sample's channel: its input values `xc` (the channel's positions), its outputs `out`,
    /// and for a max-pool each window's argmax as an index into the sample's input (channel `c`)
    /// in `branches`; returns how many windows were tied. Every pass that pools a channel goes
    /// through here, so they all agree bit for bit.
    fn channel<S: LayerScalar>(
        &self,
        xc: &[S],
        c: usize,
        out: &mut [S],
        branches: &mut [u32],
    ) -> usize {
        let w = &self.window;
        let base = (c * w.in_positions()) as u32;
        if self.op == PoolKind::Max && w.kernel[0] == 1 {
            match w.kernel[1] {
                2 => return self.max_rows::<S, 2>(xc, base, out, branches),
                3 => return self.max_rows::<S, 3>(xc, base, out, branches),
                _ => {}
            }
        }
        let scale = S::one() / S::from_f64(w.taps() as f64);
        let ([kh, kw], [sy, sx], iw) = (w.kernel, w.stride, w.input[1]);
        let mut ties = 0;
        // A pool has no padding and its windows fit the input (Pool::new), so every tap of every
        // window is inside: no test per tap. Taps in row-major order.
        for oy in 0..w.output[0] {
            for ox in 0..w.output[1] {
                let o = oy * w.output[1] + ox;
                let corner = oy * sy * iw + ox * sx;
                let rows = (0..kh).map(|ky| &xc[corner + ky * iw..][..kw]);
                match self.op {
                    PoolKind::Avg => {
                        let mut sum = S::zero();
                        rows.flatten().for_each(|&v| sum += v);
                        out[o] = sum * scale;
                    }
                    PoolKind::Max => {
                        // Selects, not branches: which value wins is data, and a branch on it
                        // was mispredicted half the time.
                        let (mut best, mut at, mut tied) = (xc[corner].re(), corner, false);
                        for (ky, row) in rows.enumerate() {
                            for (kx, v) in row.iter().enumerate() {
                                let (v, first) = (v.re(), ky == 0 && kx == 0);
                                let (above, level) = (v > best, v == best && !first);
                                tied = !above & (tied | level);
                                at = if above { corner + ky * iw + kx } else { at };
                                best = if above { v } else { best };
                            }
                        }
                        out[o] = xc[at];
                        branches[o] = base + at as u32;
                        ties += tied as usize;
                    }
                }
            }
        }
        ties
    }

    /// [`Pool::channel`] for a max-pool whose windows are K values of one row (the 1-D pools
    /// of 2 and 3): the same choices, with the window's length known to the compiler (the
    /// general loop's bookkeeping cost more than the comparisons).
    fn max_rows<S: LayerScalar, const K: usize>(
        &self,
        xc: &[S],
        base: u32,
        out: &mut [S],
        branches: &mut [u32],
    ) -> usize {
        let w = &self.window;
        let ([sy, sx], iw, ow) = (w.stride, w.input[1], w.output[1]);
        let mut ties = 0;
        let rows = out.chunks_exact_mut(ow).zip(branches.chunks_exact_mut(ow));
        for (oy, (out, branches)) in rows.enumerate() {
            let row = &xc[oy * sy * iw..][..iw];
            for (ox, (o, b)) in out.iter_mut().zip(branches.iter_mut()).enumerate() {
                let start = ox * sx;
                let window: &[S; K] = row[start..start + K].try_into().expect("inside");
                let (mut best, mut at, mut tied) = (window[0].re(), 0, false);
                for (k, v) in window.iter().enumerate().skip(1) {
                    let v = v.re();
                    let above = v > best;
                    tied = !above & (tied | (v == best));
                    at = if above { k } else { at };
                    best = if above { v } else { best };
                }
                *o = window[at];
                *b = base + (oy * sy * iw + start + at) as u32;
                ties += tied as usize;
            }
        }
        ties
    }

    /// Pools channels `channels` of every sample of `x` into `out` (and `branches`, laid out as
    /// `out`), returning each channel's ties over the samples.
    fn channels<S: LayerScalar>(
        &self,
        x: ArrayView2<S>,
        channels: impl Iterator<Item = usize> + Clone,
        out: &mut [S],
        branches: &mut [u32],
    ) -> Vec<(usize, usize)> {
        let w = &self.window;
        let (ip, op) = (w.in_positions(), w.out_positions());
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("standard layout");
        let width = w.channels * op;
        let mut ties: Vec<(usize, usize)> = channels.clone().map(|c| (c, 0)).collect();
        for (i, xi) in xs.chunks_exact(w.channels * ip).enumerate() {
            for (slot, c) in ties.iter_mut().zip(channels.clone()) {
                let at = i * width + c * op..i * width + (c + 1) * op;
                let b = if self.op == PoolKind::Max {
                    &mut branches[at.clone()]
                } else {
                    &mut []
                };
                slot.1 += self.channel(&xi[c * ip..(c + 1) * ip], c, &mut out[at], b);
            }
        }
        ties
    }
}

impl<S: LayerScalar> Layer<S> for Pool {
    fn forward(&self, _: &[ArrayD<S>], x: ArrayView2<S>, _: Option<ArrayView2<S>>) -> Step<S> {
        let w = &self.window;
        let (m, size) = (x.nrows(), w.channels * w.out_positions());
        let mut out = vec![S::zero(); m * size];
        let max = self.op == PoolKind::Max;
        let mut branches = vec![0; if max { m * size } else { 0 }];
        let ties = self.channels(x, 0..w.channels, &mut out, &mut branches);
        let saved = if max {
            // Ties per channel (small whole numbers, exact in every scalar), for the update.
            let per = ties.iter().map(|&(_, t)| S::from_f64(t as f64));
            vec![Array1::from_iter(per).into_dyn()]
        } else {
            Vec::new()
        };
        Step {
            out: Array2::from_shape_vec((m, size), out).expect("sized above"),
            saved,
            branches,
            ties: ties.iter().map(|&(_, t)| t).sum(),
        }
    }

    fn forward_channels(
        &self,
        _: &[ArrayD<S>],
        x: ArrayView2<S>,
        _: Option<ArrayView2<S>>,
        base: &Step<S>,
        changed: &[usize],
    ) -> Option<Step<S>> {
        let mut out = base.out.clone();
        let mut branches = base.branches.clone();
        let ties = self.channels(
            x,
            changed.iter().copied(),
            out.as_slice_mut()?,
            &mut branches,
        );
        let mut saved = base.saved.clone();
        let mut total = base.ties;
        if let Some(per) = saved.first_mut() {
            for (c, t) in ties {
                let slot = per.as_slice_mut()?.get_mut(c)?;
                total = total - slot.re() as usize + t;
                *slot = S::from_f64(t as f64);
            }
        }
        Some(Step {
            out,
            saved,
            branches,
            ties: total,
        })
    }

    fn backward(
        &self,
        _: &[ArrayD<S>],
        x: ArrayView2<S>,
        step: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        if !need_input {
            return Back {
                params: Vec::new(),
                dx: None,
                dskip: None,
            };
        }
        let w = &self.window;
        let (m, c_n, ip, op) = (x.nrows(), w.channels, w.in_positions(), w.out_positions());
        let spread = mistake == Some("pool-gradient-spread");
        let mut dx = Array2::zeros(x.raw_dim());
        let scale = S::one() / S::from_f64(w.taps() as f64);
        for i in 0..m {
            for c in 0..c_n {
                for oy in 0..w.output[0] {
                    for ox in 0..w.output[1] {
                        let o = c * op + oy * w.output[1] + ox;
                        let g = dout[[i, o]];
                        match (self.op, spread) {
                            (PoolKind::Max, false) => {
                                let q = step.branches[i * c_n * op + o] as usize;
                                dx[[i, q]] += g;
                            }
                            (PoolKind::Max, true) => {
                                w.for_each_tap(oy, ox, |_, q| dx[[i, c * ip + q]] += g)
                            }
                            (PoolKind::Avg, false) => {
                                w.for_each_tap(oy, ox, |_, q| dx[[i, c * ip + q]] += g * scale)
                            }
                            (PoolKind::Avg, true) => {
                                w.for_each_tap(oy, ox, |_, q| dx[[i, c * ip + q]] += g)
                            }
                        }
                    }
                }
            }
        }
        Back {
            params: Vec::new(),
            dx: Some(dx),
            dskip: None,
        }
    }
}
