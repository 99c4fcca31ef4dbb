//! Sliding windows over [channels, height, width] samples: the output-size arithmetic shared by
//! convolution and pooling, the taps of each output position, and the window ↔ column copies
//! (im2col) the convolution's backward pass uses. A signal is an image of height 1.

use ndarray::{Array2, ArrayView2};

use super::ShapeError;
use crate::Scalar;

/// out = ⌊(in + before + after − d(k − 1) − 1)/s⌋ + 1 (Dumoulin & Visin, arXiv 1603.07285, with
/// the padding split into its two ends); `None` when the dilated kernel does not fit the padded
/// input or a setting is 0.
pub fn output_size(
    input: usize,
    kernel: usize,
    stride: usize,
    before: usize,
    after: usize,
    dilation: usize,
) -> Option<usize> {
    if kernel == 0 || stride == 0 || dilation == 0 {
        return None;
    }
    let padded = input + before + after;
    let extent = dilation * (kernel - 1) + 1;
    (extent <= padded).then(|| (padded - extent) / stride + 1)
}

/// The geometry of a windowed layer over one sample.
#[derive(Clone, Debug, PartialEq, Eq)]
pub(crate) struct Window {
    pub channels: usize,
    pub input: [usize; 2],
    pub kernel: [usize; 2],
    pub stride: [usize; 2],
    pub dilation: [usize; 2],
    pub before: [usize; 2],
    pub after: [usize; 2],
    pub output: [usize; 2],
}

/// How a column of window gradients goes back into the input.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Scatter {
    /// Overlapping windows' contributions add (the reference).
    Sum,
    /// Each window assigns its contribution, windows in row-major order: the last one wins.
    Overwrite,
}

impl Window {
    /// Checks the settings against the input and computes the output size; `axes` names the two
    /// axes for messages.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        channels: usize,
        input: [usize; 2],
        kernel: [usize; 2],
        stride: [usize; 2],
        dilation: [usize; 2],
        before: [usize; 2],
        after: [usize; 2],
        axes: [&'static str; 2],
    ) -> Result<Window, ShapeError> {
        let mut output = [0; 2];
        for a in 0..2 {
            for (key, v) in [
                ("kernel", kernel[a]),
                ("stride", stride[a]),
                ("dilation", dilation[a]),
            ] {
                if v == 0 {
                    return Err(ShapeError::Zero { key });
                }
            }
            let padded = input[a] + before[a] + after[a];
            let extent = dilation[a] * (kernel[a] - 1) + 1;
            output[a] = output_size(
                input[a],
                kernel[a],
                stride[a],
                before[a],
                after[a],
                dilation[a],
            )
            .ok_or(ShapeError::KernelTooLarge {
                axis: axes[a],
                kernel: kernel[a],
                dilation: dilation[a],
                extent,
                padded,
                need: extent.saturating_sub(padded),
            })?;
        }
        Ok(Window {
            channels,
            input,
            kernel,
            stride,
            dilation,
            before,
            after,
            output,
        })
    }

    pub fn in_positions(&self) -> usize {
        self.input[0] * self.input[1]
    }

    pub fn out_positions(&self) -> usize {
        self.output[0] * self.output[1]
    }

    pub fn taps(&self) -> usize {
        self.kernel[0] * self.kernel[1]
    }

    /// Calls `f(kernel tap, input position)` for every tap of output position (oy, ox) that
    /// falls inside the unpadded input, taps in row-major order.
    #[inline]
    pub fn for_each_tap(&self, oy: usize, ox: usize, mut f: impl FnMut(usize, usize)) {
        for ky in 0..self.kernel[0] {
            let y =
                (oy * self.stride[0] + ky * self.dilation[0]) as isize - self.before[0] as isize;
            if y < 0 || y >= self.input[0] as isize {
                continue;
            }
            for kx in 0..self.kernel[1] {
                let x = (ox * self.stride[1] + kx * self.dilation[1]) as isize
                    - self.before[1] as isize;
                if x < 0 || x >= self.input[1] as isize {
                    continue;
                }
                f(
                    ky * self.kernel[1] + kx,
                    y as usize * self.input[1] + x as usize,
                );
            }
        }
    }

    /// The windows as rows: (m · out positions) × (channels · taps), row (i, p), column (c, tap);
    /// padding reads 0.
    pub fn columns<S: Scalar>(&self, x: ArrayView2<S>) -> Array2<S> {
        let (m, op, taps, ip) = (
            x.nrows(),
            self.out_positions(),
            self.taps(),
            self.in_positions(),
        );
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("standard layout");
        let (width, sample) = (self.channels * taps, self.channels * ip);
        let mut cols = vec![S::zero(); m * op * width];
        for (r, row) in cols.chunks_mut(width.max(1)).enumerate() {
            let (i, p) = (r / op, r % op);
            let xi = &xs[i * sample..(i + 1) * sample];
            self.for_each_tap(p / self.output[1], p % self.output[1], |t, q| {
                for c in 0..self.channels {
                    row[c * taps + t] = xi[c * ip + q];
                }
            });
        }
        Array2::from_shape_vec((m * op, width), cols).expect("sized above")
    }

    /// The inverse gather of [`Window::columns`]: each column entry goes back to the input
    /// position it was read from. The input is laid out in a padded buffer first and cropped at
    /// `offset` per axis (the reference crops at the leading padding).
    pub fn scatter<S: Scalar>(
        &self,
        cols: ArrayView2<S>,
        m: usize,
        scatter: Scatter,
        offset: [usize; 2],
    ) -> Array2<S> {
        let (op, taps) = (self.out_positions(), self.taps());
        let ph = self.input[0] + self.before[0] + self.after[0];
        let pw = self.input[1] + self.before[1] + self.after[1];
        let mut dx = Array2::zeros((m, self.channels * self.in_positions()));
        let mut padded = vec![S::zero(); self.channels * ph * pw];
        for i in 0..m {
            padded.iter_mut().for_each(|v| *v = S::zero());
            for oy in 0..self.output[0] {
                for ox in 0..self.output[1] {
                    let row = cols.row(i * op + oy * self.output[1] + ox);
                    for c in 0..self.channels {
                        for ky in 0..self.kernel[0] {
                            let y = oy * self.stride[0] + ky * self.dilation[0];
                            for kx in 0..self.kernel[1] {
                                let x = ox * self.stride[1] + kx * self.dilation[1];
                                let v = row[c * taps + ky * self.kernel[1] + kx];
                                let slot = &mut padded[(c * ph + y) * pw + x];
                                match scatter {
                                    Scatter::Sum => *slot += v,
                                    Scatter::Overwrite => *slot = v,
                                }
                            }
                        }
                    }
                }
            }
            let mut di = dx.row_mut(i);
            for c in 0..self.channels {
                for y in 0..self.input[0] {
                    for x in 0..self.input[1] {
                        let (py, px) = (y + offset[0], x + offset[1]);
                        if py < ph && px < pw {
                            di[(c * self.input[0] + y) * self.input[1] + x] =
                                padded[(c * ph + py) * pw + px];
                        }
                    }
                }
            }
        }
        dx
    }
}
