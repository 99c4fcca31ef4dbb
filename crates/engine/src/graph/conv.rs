//! `conv1d` and `conv2d`: cross-correlation (the kernel is not turned) with stride, padding,
//! dilation and an optional bias, by im2col and one matrix product. A conv1d is a conv2d of
//! height 1; its weight keeps its own canonical shape o × i × k.
//!
//! Incremental hint ([`Layer::forward_moved`]): a kernel entry (o, i, tap) moved by δ changes
//! out-channel o only, by δ times the column of the saved im2col matrix that multiplies it — a
//! rank-one update of that channel over every sample and position; bias o moves channel o by δ.
//! The other channels keep the base's values bit for bit; channel o differs from a full pass only
//! by rounding.
//!
//! Catalogued mistakes (DESIGN §7): `kernel-flipped` (weight and input gradients with the kernel
//! turned 180°), `channels-swapped` (the weight gradient's o and i axes exchanged, read back in
//! the canonical shape), `overlap-overwritten` (overlapping windows assign, the last in row-major
//! order wins), `padding-offset` (the input gradient cropped from the padded buffer at 0, not at
//! the leading padding).

use ndarray::{Array2, ArrayD, ArrayView2, Axis, IxDyn};

use super::window::{Scatter, Window};
use super::{
    Back, Kind, Layer, LayerScalar, Moved, ParamSpec, Role, Shape, ShapeError, Step, reshape,
    unravel,
};
use crate::Scalar;

/// How a convolution pads its input.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Padding {
    /// This many zeros at both ends of each axis, [height, width] (a conv1d uses the second).
    Explicit([usize; 2]),
    /// Whatever keeps the size at stride 1: d(k − 1) in all, one more at the end when odd.
    Same,
}

/// A convolution's settings, as a description gives them. 1-D settings sit in the second slot of
/// each pair, the first being 1 (or 0 for padding).
#[derive(Clone, Debug, PartialEq)]
pub struct ConvSettings {
    /// 1 or 2.
    pub dims: usize,
    /// Output channels.
    pub channels: usize,
    pub kernel: [usize; 2],
    pub stride: [usize; 2],
    pub dilation: [usize; 2],
    pub padding: Padding,
    pub bias: bool,
}

impl ConvSettings {
    /// A conv1d with kernel length `k`, stride 1, no padding, dilation 1, with bias.
    pub fn conv1d(channels: usize, k: usize) -> Self {
        ConvSettings {
            dims: 1,
            channels,
            kernel: [1, k],
            stride: [1, 1],
            dilation: [1, 1],
            padding: Padding::Explicit([0, 0]),
            bias: true,
        }
    }

    /// A conv2d with kernel [h, w], stride 1, no padding, dilation 1, with bias.
    pub fn conv2d(channels: usize, kernel: [usize; 2]) -> Self {
        ConvSettings {
            dims: 2,
            kernel,
            ..ConvSettings::conv1d(channels, 1)
        }
    }
}

/// A convolution bound to its input shape.
#[derive(Clone, Debug)]
pub struct Conv {
    settings: ConvSettings,
    input: Shape,
    window: Window,
}

const MISTAKES: &[&str] = &[
    "kernel-flipped",
    "channels-swapped",
    "overlap-overwritten",
    "padding-offset",
];

impl Conv {
    pub fn new(settings: &ConvSettings, input: &Shape) -> Result<Conv, ShapeError> {
        let (kind, needs, fix) = if settings.dims == 1 {
            (
                "conv1d",
                "[channels, length]",
                "use conv2d for images, or give the input as [channels, length]",
            )
        } else {
            (
                "conv2d",
                "[channels, height, width]",
                "use conv1d for signals, or give the input as [channels, height, width]",
            )
        };
        let (in_channels, hw) = match (settings.dims, input) {
            (1, Shape::Signal { .. }) | (2, Shape::Image { .. }) => input.spatial().unwrap(),
            _ => {
                return Err(ShapeError::Input {
                    kind,
                    needs,
                    found: *input,
                    fix,
                });
            }
        };
        if settings.channels == 0 {
            return Err(ShapeError::Zero { key: "channels" });
        }
        // A conv1d is a conv2d of height 1: its first slots are fixed whatever they hold.
        let mut settings = settings.clone();
        if settings.dims == 1 {
            settings.kernel[0] = 1;
            settings.stride[0] = 1;
            settings.dilation[0] = 1;
            if let Padding::Explicit(p) = &mut settings.padding {
                p[0] = 0;
            }
        }
        let (before, after) = match settings.padding {
            Padding::Explicit(p) => (p, p),
            Padding::Same => {
                let stride = settings.stride[0].max(settings.stride[1]);
                if stride != 1 {
                    return Err(ShapeError::SameNeedsStride1 { stride });
                }
                let mut before = [0; 2];
                let mut after = [0; 2];
                for a in 0..2 {
                    let total = settings.dilation[a] * settings.kernel[a].saturating_sub(1);
                    before[a] = total / 2;
                    after[a] = total - total / 2;
                }
                (before, after)
            }
        };
        let axes = if settings.dims == 1 {
            ["height", "length"]
        } else {
            ["height", "width"]
        };
        let window = Window::new(
            in_channels,
            hw,
            settings.kernel,
            settings.stride,
            settings.dilation,
            before,
            after,
            axes,
        )?;
        Ok(Conv {
            settings,
            input: *input,
            window,
        })
    }

    fn weight_shape(&self) -> Vec<usize> {
        let (o, i) = (self.settings.channels, self.window.channels);
        if self.settings.dims == 1 {
            vec![o, i, self.window.kernel[1]]
        } else {
            vec![o, i, self.window.kernel[0], self.window.kernel[1]]
        }
    }

    /// The padding actually applied, [before, after] per axis ([height, width]).
    pub fn padding(&self) -> [[usize; 2]; 2] {
        [self.window.before, self.window.after]
    }

    /// The weight as a matrix, out-channels × (in-channels · taps), optionally turned 180°.
    fn matrix<S: Scalar>(&self, w: &ArrayD<S>, flipped: bool) -> Array2<S> {
        let (o, taps) = (self.settings.channels, self.window.taps());
        let cols = self.window.channels * taps;
        let w = w
            .view()
            .into_shape_with_order((o, cols))
            .expect("weight shape checked");
        if flipped {
            Array2::from_shape_fn((o, cols), |(r, c)| {
                w[[r, c - c % taps + taps - 1 - c % taps]]
            })
        } else {
            w.to_owned()
        }
    }
}

impl Kind for Conv {
    fn kind(&self) -> &'static str {
        if self.settings.dims == 1 {
            "conv1d"
        } else {
            "conv2d"
        }
    }

    fn input(&self) -> Shape {
        self.input
    }

    fn output(&self) -> Shape {
        self.input
            .with_spatial(self.settings.channels, self.window.output)
    }

    fn params(&self) -> Vec<ParamSpec> {
        let taps = self.window.taps();
        let mut specs = vec![ParamSpec {
            suffix: "weight",
            shape: self.weight_shape(),
            role: Role::Weight,
            decays: true,
            fan_in: self.window.channels * taps,
            fan_out: self.settings.channels * taps,
        }];
        if self.settings.bias {
            specs.push(ParamSpec {
                suffix: "bias",
                shape: vec![self.settings.channels],
                role: Role::Bias,
                decays: false,
                fan_in: 1,
                fan_out: self.window.out_positions(),
            });
        }
        specs
    }

    fn mistakes(&self) -> &'static [&'static str] {
        MISTAKES
    }

    fn unit_tensors(&self) -> Vec<usize> {
        if self.settings.bias {
            vec![0, 1]
        } else {
            vec![0]
        }
    }

    fn input_unit_tensor(&self) -> Option<usize> {
        Some(0)
    }

    fn moved_channel(&self, tensor: usize, index: usize) -> Option<usize> {
        Some(if tensor == 0 {
            index / (self.window.channels * self.window.taps())
        } else {
            index
        })
    }

    fn locate(&self, tensor: usize, flat: usize) -> String {
        if tensor == 1 {
            return format!("out-channel {flat}");
        }
        let ix = unravel(flat, &self.weight_shape());
        let at = if self.settings.dims == 1 {
            format!("kernel {}", ix[2])
        } else {
            format!("kernel ({}, {})", ix[2], ix[3])
        };
        format!("out-channel {}, in-channel {}, {at}", ix[0], ix[1])
    }
}

impl<S: LayerScalar> Layer<S> for Conv {
    fn forward(&self, params: &[ArrayD<S>], x: ArrayView2<S>, _: Option<ArrayView2<S>>) -> Step<S> {
        let (m, o, op) = (
            x.nrows(),
            self.settings.channels,
            self.window.out_positions(),
        );
        let cols = self.window.columns(x);
        let z = cols.dot(&self.matrix(&params[0], false).t());
        // z's rows are (sample, position) × out-channels; the output is channel-major per sample.
        let z = z.as_standard_layout();
        let zs = z.as_slice().expect("standard layout");
        let bias = self
            .settings
            .bias
            .then(|| params[1].as_slice().expect("standard layout"));
        let mut out = vec![S::zero(); m * o * op];
        for (i, row) in out.chunks_mut((o * op).max(1)).enumerate() {
            for (c, channel) in row.chunks_mut(op.max(1)).enumerate() {
                let b = bias.map_or(S::zero(), |b| b[c]);
                for (p, v) in channel.iter_mut().enumerate() {
                    *v = zs[(i * op + p) * o + c] + b;
                }
            }
        }
        let out = Array2::from_shape_vec((m, o * op), out).expect("sized above");
        Step {
            out,
            saved: vec![cols.into_dyn()],
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
    ) -> Back<S> {
        let (m, o, op) = (
            x.nrows(),
            self.settings.channels,
            self.window.out_positions(),
        );
        let cols = step.saved[0]
            .view()
            .into_dimensionality::<ndarray::Ix2>()
            .expect("conv saves its columns");
        // dout as rows (sample, position) × out-channels, the layout of the forward product.
        let d = Array2::from_shape_fn((m * op, o), |(r, c)| dout[[r / op, c * op + r % op]]);
        let flipped = mistake == Some("kernel-flipped");
        let mut dw = d.t().dot(&cols);
        if flipped {
            let taps = self.window.taps();
            dw = Array2::from_shape_fn(dw.raw_dim(), |(r, c)| {
                dw[[r, c - c % taps + taps - 1 - c % taps]]
            });
        }
        let shape = self.weight_shape();
        let dims = dw.dim();
        let mut dw = reshape(dw, dims)
            .into_shape_with_order(IxDyn(&shape))
            .expect("weight shape");
        if mistake == Some("channels-swapped") {
            let mut axes: Vec<usize> = (0..shape.len()).collect();
            axes.swap(0, 1);
            let swapped = dw.view().permuted_axes(IxDyn(&axes));
            let flat: Vec<S> = swapped.iter().copied().collect();
            dw = ArrayD::from_shape_vec(IxDyn(&shape), flat).expect("same element count");
        }
        let dcols = d.dot(&self.matrix(&params[0], flipped));
        let scatter = if mistake == Some("overlap-overwritten") {
            Scatter::Overwrite
        } else {
            Scatter::Sum
        };
        let offset = if mistake == Some("padding-offset") {
            [0, 0]
        } else {
            self.window.before
        };
        let dx = self.window.scatter(dcols.view(), m, scatter, offset);
        let mut grads = vec![dw];
        if self.settings.bias {
            grads.push(d.sum_axis(Axis(0)).into_dyn());
        }
        Back {
            params: grads,
            dx,
            dskip: None,
        }
    }

    fn forward_moved(
        &self,
        _: &[ArrayD<S>],
        _: ArrayView2<S>,
        base: &Step<S>,
        moved: &Moved<S>,
    ) -> Option<Step<S>> {
        let op = self.window.out_positions();
        let per_channel = self.window.channels * self.window.taps();
        let (channel, column) = if moved.tensor == 0 {
            (moved.index / per_channel, Some(moved.index % per_channel))
        } else {
            (moved.index, None)
        };
        let mut out = base.out.clone();
        let mut block = out.slice_mut(ndarray::s![.., channel * op..(channel + 1) * op]);
        match column {
            Some(c) => {
                // Rows of the columns matrix are (sample, position), the base's layout.
                let cols = base.saved[0]
                    .view()
                    .into_dimensionality::<ndarray::Ix2>()
                    .expect("conv saves its columns");
                let taps = cols.column(c);
                for (i, mut row) in block.outer_iter_mut().enumerate() {
                    let from = taps.slice(ndarray::s![i * op..(i + 1) * op]);
                    row.zip_mut_with(&from, |z, &v| *z += moved.delta * v);
                }
            }
            None => block.mapv_inplace(|z| z + moved.delta),
        }
        Some(Step::plain(out))
    }
}
