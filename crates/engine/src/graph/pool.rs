//! `max-pool1d`, `max-pool2d`, `avg-pool1d`, `avg-pool2d`: windows of `size` every `stride`
//! positions, no padding, a ragged tail dropped. A max-pool window's gradient goes to its first
//! maximum in row-major window order; which position that is, is the branch the forward pass
//! records, and a shared maximum is a tie (a non-smooth point).
//!
//! Catalogued mistake: `pool-gradient-spread` — max-pool's gradient sent to every position of the
//! window, avg-pool's not divided by the window's element count.

use ndarray::{Array2, ArrayD, ArrayView2};

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

impl<S: LayerScalar> Layer<S> for Pool {
    fn forward(&self, _: &[ArrayD<S>], x: ArrayView2<S>, _: Option<ArrayView2<S>>) -> Step<S> {
        let w = &self.window;
        let (m, c_n, ip, op) = (x.nrows(), w.channels, w.in_positions(), w.out_positions());
        let mut out = Array2::zeros((m, c_n * op));
        let mut branches = Vec::new();
        let mut ties = 0;
        let scale = S::one() / S::from_f64(w.taps() as f64);
        for i in 0..m {
            let xi = x.row(i);
            for c in 0..c_n {
                for oy in 0..w.output[0] {
                    for ox in 0..w.output[1] {
                        let o = c * op + oy * w.output[1] + ox;
                        match self.op {
                            PoolKind::Avg => {
                                let mut sum = S::zero();
                                w.for_each_tap(oy, ox, |_, q| sum += xi[c * ip + q]);
                                out[[i, o]] = sum * scale;
                            }
                            PoolKind::Max => {
                                let mut best: Option<usize> = None;
                                let mut tied = false;
                                w.for_each_tap(oy, ox, |_, q| {
                                    let v = xi[c * ip + q].re();
                                    match best {
                                        Some(b) if v > xi[c * ip + b].re() => {
                                            best = Some(q);
                                            tied = false;
                                        }
                                        Some(b) if v == xi[c * ip + b].re() => tied = true,
                                        Some(_) => {}
                                        None => best = Some(q),
                                    }
                                });
                                let q = best.expect("a window holds at least one position");
                                out[[i, o]] = xi[c * ip + q];
                                branches.push((c * ip + q) as u32);
                                ties += tied as usize;
                            }
                        }
                    }
                }
            }
        }
        Step {
            out,
            saved: Vec::new(),
            branches,
            ties,
        }
    }

    fn backward(
        &self,
        _: &[ArrayD<S>],
        x: ArrayView2<S>,
        step: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
    ) -> Back<S> {
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
            dx,
            dskip: None,
        }
    }
}
