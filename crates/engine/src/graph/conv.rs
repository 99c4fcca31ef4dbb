//! `conv1d` and `conv2d`: cross-correlation (the kernel is not turned) with stride, padding,
//! dilation and an optional bias. The forward pass is a direct loop ([`Conv::correlate`]): per
//! sample and out-channel, each output value sums w · x over the in-channels and each one's taps
//! in row-major order over the input laid out with its zero padding, in register blocks of
//! consecutive values, then adds the bias (at these layers' sizes, a third of the time im2col
//! and one matrix product take: benches/README.md, session 11). The backward pass builds the
//! im2col matrix from its input and uses two matrix products. A conv1d is a conv2d of height 1;
//! its weight keeps its own canonical shape o × i × k.
//!
//! Incremental hint ([`Layer::forward_moved`]): a kernel entry (o, i, tap) or bias o moved
//! changes out-channel o only, and linearly: the hint adds δ times the input under tap (i, tap)
//! (a bias, δ) to the base's channel, one product and one rounding per value where a full pass
//! sums C_in·taps products again, and keeps the base's other channels bit for bit. Like dense's
//! hint, the moved channel is a full pass's only up to rounding: within γ(n+1)·(S_base +
//! S_moved) + u·(|δ·x| + |z|) per value (n the fan-in, S the layer over |w|, |b|, |x|; tested in
//! crates/engine/tests/it/graph_dual/hints.rs), and the base's rounding is common to every
//! step of the check, so differences of losses carry less round-off than whole passes.
//!
//! Moved in-channels ([`Layer::forward_units`]): above a moved entry, an input that changed in
//! k of its C channels (k ≤ C/2) changes every out-channel by the correlation of the change with
//! those channels' taps alone — the base output plus that, k/C of the loop (a convolution is
//! linear in its input, as a dense layer is). Up to rounding a full pass, as dense's update is
//! (docs/engine.md).
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
use crate::product::matmul;

/// How a convolution pads its input.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Padding {
    /// This many zeros at both ends of each axis, [height, width] (a conv1d uses the second).
    Explicit([usize; 2]),
    /// Whatever keeps the size at stride 1: d(k − 1) in all, one more at the end when odd.
    Same,
}

/// One sample's input channels to a conv loop: as they are, and laid out with their padding
/// ([`Conv::inputs`]; empty where a padded copy would not pay).
#[derive(Clone, Copy)]
struct Inputs<'a, S> {
    plain: &'a [S],
    padded: &'a [S],
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

    /// The padded input's height and width.
    fn padded(&self) -> [usize; 2] {
        let w = &self.window;
        [0, 1].map(|a| w.before[a] + w.input[a] + w.after[a])
    }

    /// Whether the padded copy of an input is small against the work it serves: a padded
    /// channel within four times its input plus the taps the outputs read. Padding or dilation
    /// far past the kernel with a large stride (a handful of outputs over a vast padded plane)
    /// would otherwise allocate in proportion to the padding, not to the input or the work; such
    /// a layer reads the unpadded input tap by tap ([`Conv::sum_skipping`]), the same sums.
    fn padding_pays(&self) -> bool {
        let w = &self.window;
        let [ph, pw] = self.padded();
        let work = w.in_positions() + w.out_positions() * w.taps();
        ph.checked_mul(pw)
            .is_some_and(|padded| padded <= work.saturating_mul(4))
    }

    /// `x` (whole channels of one sample) and its copy laid out with its padding as zeros in
    /// `buf`; `buf` left empty where the padding does not pay ([`Conv::padding_pays`]). `buf`
    /// must be empty or left by an earlier call of this layer's (the loops reuse it per sample).
    fn inputs<'a, S: Scalar>(&self, x: &'a [S], buf: &'a mut Vec<S>) -> Inputs<'a, S> {
        let w = &self.window;
        let ([ph, pw], [iw, ip]) = (self.padded(), [w.input[1], w.in_positions()]);
        let channels = x.len() / ip;
        if !self.padding_pays() {
            buf.clear();
        } else {
            // `buf` is empty or holds this layer's last padded copy of as many channels: its
            // padding is zeros already, and only the inside is written again (zeroing the
            // whole buffer per sample cost as much as the copy).
            let len = channels * ph * pw;
            if buf.len() != len {
                buf.clear();
                buf.resize(len, S::zero());
            }
            for (xc, bc) in x.chunks_exact(ip).zip(buf.chunks_exact_mut(ph * pw)) {
                for (y, xr) in xc.chunks_exact(iw).enumerate() {
                    let at = (y + w.before[0]) * pw + w.before[1];
                    bc[at..at + iw].copy_from_slice(xr);
                }
            }
        }
        Inputs {
            plain: x,
            padded: buf,
        }
    }

    /// Every out-channel of every sample of the batch `xs` into `out` (m × out-channels ×
    /// positions): per value from 0, for each in-channel and each tap in row-major order, w · x added, then the bias (last, so that
    /// outputs with equal sums stay equal when the bias moves: a max-pool tie above stays a tie,
    /// as it does in exact arithmetic). `w` holds the channels' in-channels × taps weights one
    /// channel after another, `bias` one value per channel. Every pass that computes a conv
    /// output value from its sum goes through here, so they all round alike (a moved entry's
    /// channel is the base's plus the change instead: [`Conv::moved_channel_into`]). On x86-64 machines with AVX2
    /// the loop is compiled for AVX2 as well, in one call for the whole batch (a call per sample
    /// and channel cost as much as the sums at the demo CNN's sizes); that build does the same
    /// IEEE operations on each value (no fused multiply-add is enabled, and Rust never contracts
    /// a product and a sum into one), so its results are bit for bit the same.
    fn correlate<S: Scalar>(&self, w: &[S], bias: Option<&[S]>, xs: &[S], out: &mut [S]) {
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been found to support AVX2, all that the function needs.
            unsafe { self.correlate_avx2(w, bias, xs, out) };
            return;
        }
        self.correlate_loop(w, bias, xs, out);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn correlate_avx2<S: Scalar>(
        &self,
        w: &[S],
        bias: Option<&[S]>,
        xs: &[S],
        out: &mut [S],
    ) {
        self.correlate_loop(w, bias, xs, out);
    }

    #[inline(always)]
    fn correlate_loop<S: Scalar>(&self, w: &[S], bias: Option<&[S]>, xs: &[S], out: &mut [S]) {
        let (op, per) = (
            self.window.out_positions(),
            self.window.channels * self.window.taps(),
        );
        let sample = self.window.channels * self.window.in_positions();
        let width = self.settings.channels * op;
        let mut xp = Vec::new();
        for (row, xi) in out.chunks_exact_mut(width).zip(xs.chunks_exact(sample)) {
            let x = self.inputs(xi, &mut xp);
            let pairs = if std::mem::size_of::<S>() <= 8 {
                w.len() / (2 * per)
            } else {
                0
            };
            // Two out-channels at a time where the scalar is real: one load of the input per
            // tap serves both, and twice as many sums run side by side (each value's sum alone
            // waits on its last addition). The same operations per value as one at a time.
            for j in 0..pairs {
                let (w0, w1) = w[2 * j * per..(2 * j + 2) * per].split_at(per);
                let (o0, o1) = row[2 * j * op..(2 * j + 2) * op].split_at_mut(op);
                self.sum_pair(w0, w1, x, o0, o1);
            }
            for j in 2 * pairs..w.len() / per {
                self.sum_into(
                    &w[j * per..(j + 1) * per],
                    x,
                    &mut row[j * op..(j + 1) * op],
                    true,
                );
            }
            if let Some(b) = bias {
                for (channel, &b) in row.chunks_exact_mut(op).zip(b) {
                    channel.iter_mut().for_each(|v| *v += b);
                }
            }
        }
    }

    /// [`Conv::sum_into`] from 0 for two out-channels' weights `w0`, `w1` into `o0`, `o1`.
    #[inline(always)]
    fn sum_pair<S: Scalar>(&self, w0: &[S], w1: &[S], x: Inputs<S>, o0: &mut [S], o1: &mut [S]) {
        let z = S::zero();
        let finite = w0.iter().chain(w1).all(|&v| (v * z + z).same_bits(z));
        let ow = self.window.output[1];
        if !finite || x.padded.is_empty() || ow < 16 {
            self.sum_into(w0, x, o0, true);
            self.sum_into(w1, x, o1, true);
            return;
        }
        let xp = x.padded;
        for (oy, (r0, r1)) in o0
            .chunks_exact_mut(ow)
            .zip(o1.chunks_exact_mut(ow))
            .enumerate()
        {
            let mut ox = 0;
            while ox + 16 <= ow {
                let (b0, b1) = (&mut r0[ox..ox + 16], &mut r1[ox..ox + 16]);
                self.sum_block_pair::<S, 16>(w0, w1, xp, (oy, ox), b0, b1);
                ox += 16;
            }
            self.sum_row(w0, xp, oy, ox, r0, true);
            self.sum_row(w1, xp, oy, ox, r1, true);
        }
    }

    /// [`Conv::sum_block`] from 0 for two out-channels at once.
    #[inline(always)]
    fn sum_block_pair<S: Scalar, const B: usize>(
        &self,
        w0: &[S],
        w1: &[S],
        xp: &[S],
        (oy, ox0): (usize, usize),
        out0: &mut [S],
        out1: &mut [S],
    ) {
        let win = &self.window;
        let ([ph, pw], taps, kw) = (self.padded(), win.taps(), win.kernel[1]);
        let ([sy, sx], [dy, dx]) = (win.stride, win.dilation);
        let (out0, out1): (&mut [S; B], &mut [S; B]) = (
            out0.try_into().expect("a block of B values"),
            out1.try_into().expect("a block of B values"),
        );
        let (mut a0, mut a1) = ([S::zero(); B], [S::zero(); B]);
        let weights = w0.chunks_exact(taps).zip(w1.chunks_exact(taps));
        for ((wc0, wc1), xc) in weights.zip(xp.chunks_exact(ph * pw)) {
            for (ky, (wr0, wr1)) in wc0.chunks_exact(kw).zip(wc1.chunks_exact(kw)).enumerate() {
                let row = &xc[(oy * sy + ky * dy) * pw..][..pw];
                for (kx, (&v0, &v1)) in wr0.iter().zip(wr1).enumerate() {
                    let x0 = ox0 * sx + kx * dx;
                    if sx == 1 {
                        let xs: &[S; B] = row[x0..x0 + B].try_into().expect("inside the row");
                        for ((a, b), &v) in a0.iter_mut().zip(a1.iter_mut()).zip(xs) {
                            *a += v0 * v;
                            *b += v1 * v;
                        }
                    } else {
                        for (j, (a, b)) in a0.iter_mut().zip(a1.iter_mut()).enumerate() {
                            let v = row[x0 + j * sx];
                            *a += v0 * v;
                            *b += v1 * v;
                        }
                    }
                }
            }
        }
        *out0 = a0;
        *out1 = a1;
    }

    /// Adds to each value of one out-channel `out` (from 0 when `fresh`, else from its values)
    /// the products w · x of the in-channels `xp` holds (padded, one channel after another)
    /// with their taps in `w`: per value, in-channel by in-channel, each tap in row-major order.
    /// Consecutive values go in blocks whose partial sums stay in registers across the taps (a
    /// pass over the row per tap was bound by its loads and stores). A tap in the padding adds
    /// w · 0 = ±0, which leaves every sum as skipping it would (a sum that starts at +0 never
    /// becomes −0, and s + ±0 = s otherwise), so the padding costs no test per tap; with a
    /// weight that is not finite (w · 0 is NaN), or no padded copy (it would not pay), the
    /// taps in the padding are skipped instead.
    #[inline(always)]
    fn sum_into<S: Scalar>(&self, w: &[S], x: Inputs<S>, out: &mut [S], fresh: bool) {
        let ow = self.window.output[1];
        // w · 0 is ±0 (in every part of a complex or dual number) unless w is not finite.
        let z = S::zero();
        let finite = w.iter().all(|&v| (v * z + z).same_bits(z));
        let xp = x.padded;
        for (oy, row) in out.chunks_exact_mut(ow).enumerate() {
            if !finite || xp.is_empty() {
                for (ox, v) in row.iter_mut().enumerate() {
                    self.sum_skipping(w, x.plain, oy, ox, v, fresh);
                }
                continue;
            }
            self.sum_row(w, xp, oy, 0, row, fresh);
        }
    }

    /// [`Conv::sum_into`] for output row `oy` (`row`) from column `ox` on, input padded.
    #[inline(always)]
    fn sum_row<S: Scalar>(
        &self,
        w: &[S],
        xp: &[S],
        oy: usize,
        mut ox: usize,
        row: &mut [S],
        fresh: bool,
    ) {
        let ow = row.len();
        while ox + 16 <= ow {
            self.sum_block::<S, 16>(w, xp, oy, ox, &mut row[ox..ox + 16], fresh);
            ox += 16;
        }
        if ox + 8 <= ow {
            self.sum_block::<S, 8>(w, xp, oy, ox, &mut row[ox..ox + 8], fresh);
            ox += 8;
        }
        if ox + 4 <= ow {
            self.sum_block::<S, 4>(w, xp, oy, ox, &mut row[ox..ox + 4], fresh);
            ox += 4;
        }
        while ox < ow {
            self.sum_block::<S, 1>(w, xp, oy, ox, &mut row[ox..ox + 1], fresh);
            ox += 1;
        }
    }

    /// [`Conv::sum_into`] for B consecutive values of output row `oy` from column `ox0`.
    #[inline(always)]
    fn sum_block<S: Scalar, const B: usize>(
        &self,
        w: &[S],
        xp: &[S],
        oy: usize,
        ox0: usize,
        out: &mut [S],
        fresh: bool,
    ) {
        let win = &self.window;
        let ([ph, pw], taps, kw) = (self.padded(), win.taps(), win.kernel[1]);
        let ([sy, sx], [dy, dx]) = (win.stride, win.dilation);
        let out: &mut [S; B] = out.try_into().expect("a block of B values");
        let mut acc = if fresh { [S::zero(); B] } else { *out };
        for (wc, xc) in w.chunks_exact(taps).zip(xp.chunks_exact(ph * pw)) {
            for (ky, wr) in wc.chunks_exact(kw).enumerate() {
                let row = &xc[(oy * sy + ky * dy) * pw..][..pw];
                for (kx, &wv) in wr.iter().enumerate() {
                    let x0 = ox0 * sx + kx * dx;
                    if sx == 1 {
                        let xs: &[S; B] = row[x0..x0 + B].try_into().expect("inside the row");
                        for (a, &v) in acc.iter_mut().zip(xs) {
                            *a += wv * v;
                        }
                    } else {
                        for (j, a) in acc.iter_mut().enumerate() {
                            *a += wv * row[x0 + j * sx];
                        }
                    }
                }
            }
        }
        *out = acc;
    }

    /// [`Conv::sum_into`] for the one value at output position (oy, ox) of the unpadded input
    /// `x`, the taps in the padding skipped.
    #[cold]
    fn sum_skipping<S: Scalar>(
        &self,
        w: &[S],
        x: &[S],
        oy: usize,
        ox: usize,
        out: &mut S,
        fresh: bool,
    ) {
        let win = &self.window;
        let mut acc = if fresh { S::zero() } else { *out };
        for (wc, xc) in w
            .chunks_exact(win.taps())
            .zip(x.chunks_exact(win.in_positions()))
        {
            win.for_each_tap(oy, ox, |t, q| acc += wc[t] * xc[q]);
        }
        *out = acc;
    }

    /// The batch's output `values` (every out-channel) moved by the change of in-channels
    /// `changed` of its input, from `was` (the base input) to `now` (each changed channel over
    /// the samples, [`Layer::forward_units`]'s order): per sample and changed channel,
    /// [`Conv::sum_into`] of each out-channel's taps of it onto its values; a sample whose channel
    /// did not move keeps the base's bits. `w` is the whole weight. One AVX2 call for the batch,
    /// as [`Conv::correlate`].
    fn add_changes<S: Scalar>(
        &self,
        w: &[S],
        changed: &[usize],
        now: &[S],
        was: &[S],
        values: &mut [S],
    ) {
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been found to support AVX2, all that the function needs.
            unsafe { self.add_changes_avx2(w, changed, now, was, values) };
            return;
        }
        self.add_changes_loop(w, changed, now, was, values);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn add_changes_avx2<S: Scalar>(
        &self,
        w: &[S],
        changed: &[usize],
        now: &[S],
        was: &[S],
        values: &mut [S],
    ) {
        self.add_changes_loop(w, changed, now, was, values);
    }

    #[inline(always)]
    fn add_changes_loop<S: Scalar>(
        &self,
        w: &[S],
        changed: &[usize],
        now: &[S],
        was: &[S],
        values: &mut [S],
    ) {
        let (channels, ip) = (self.window.channels, self.window.in_positions());
        let (taps, op) = (self.window.taps(), self.window.out_positions());
        let per = channels * taps;
        let width = self.settings.channels * op;
        let m = values.len() / width;
        let (mut dx, mut dp) = (vec![S::zero(); ip], Vec::new());
        let sample = channels * ip;
        for (i, (row, bi)) in values
            .chunks_exact_mut(width)
            .zip(was.chunks_exact(sample))
            .enumerate()
        {
            for (k, &c) in changed.iter().enumerate() {
                let at = (k * m + i) * ip;
                let (now, was) = (&now[at..at + ip], &bi[c * ip..(c + 1) * ip]);
                if now.iter().zip(was).all(|(a, b)| a.same_bits(*b)) {
                    continue;
                }
                for (d, (&a, &b)) in dx.iter_mut().zip(now.iter().zip(was)) {
                    *d = a - b;
                }
                let d = self.inputs(&dx, &mut dp);
                for (o, out) in row.chunks_exact_mut(op).enumerate() {
                    let at = o * per + c * taps;
                    self.sum_into(&w[at..at + taps], d, out, false);
                }
            }
        }
    }

    /// The out-channel `moved` changes (its kernel entry (o, i, tap) or bias o moved by δ) and
    /// that channel's values after the move into `out`, each sample's positions one after
    /// another: the base's z plus δ times the input value under the tap (bias: plus δ), as
    /// dense's hint adds δ·x. The channel is linear in the entry, so this is the channel's sum
    /// again with one rounding per value instead of the sum's C_in·taps; a position whose tap
    /// lies in the padding keeps the base's value (its input is 0). `None` where the base's z is
    /// not laid out as the forward pass leaves it.
    fn moved_channel_into<S: Scalar>(
        &self,
        x: ArrayView2<S>,
        base: &Step<S>,
        moved: &Moved<S>,
        out: &mut Vec<S>,
    ) -> Option<usize> {
        let win = &self.window;
        let (op, ip, taps) = (win.out_positions(), win.in_positions(), win.taps());
        let per = win.channels * taps;
        let (o, tap) = match moved.tensor {
            0 => (moved.index / per, Some(moved.index % per)),
            _ if self.settings.bias => (moved.index, None),
            _ => return None,
        };
        let width = self.settings.channels * op;
        let x = x.as_standard_layout();
        let (xs, z) = (x.as_slice()?, base.out.as_slice()?);
        if o >= self.settings.channels || z.len() != x.nrows() * width {
            return None;
        }
        let d = moved.delta;
        let ([ih, iw], ow) = (win.input, win.output[1]);
        let ([sy, sx], [dy, dx], [by, bx]) = (win.stride, win.dilation, win.before);
        out.clear();
        out.reserve(x.nrows() * op);
        for (zn, xn) in z
            .chunks_exact(width)
            .zip(xs.chunks_exact(win.channels * ip))
        {
            let zc = &zn[o * op..(o + 1) * op];
            let Some(tap) = tap else {
                out.extend(zc.iter().map(|&v| v + d));
                continue;
            };
            let (i, ky, kx) = (tap / taps, tap % taps / win.kernel[1], tap % win.kernel[1]);
            let xc = &xn[i * ip..(i + 1) * ip];
            // Output columns lo..hi read this tap inside the input row; the others its padding.
            let first_at = |edge: usize| edge.saturating_sub(kx * dx).div_ceil(sx).min(ow);
            let (lo, hi) = (first_at(bx), first_at(bx + iw));
            for (oy, zr) in zc.chunks_exact(ow).enumerate() {
                let Some(iy) = (oy * sy + ky * dy).checked_sub(by).filter(|&r| r < ih) else {
                    out.extend_from_slice(zr);
                    continue;
                };
                let xr = &xc[iy * iw..(iy + 1) * iw];
                out.extend_from_slice(&zr[..lo]);
                if lo < hi {
                    let under = xr[lo * sx + kx * dx - bx..].iter().step_by(sx);
                    out.extend(zr[lo..hi].iter().zip(under).map(|(&v, &a)| v + d * a));
                }
                out.extend_from_slice(&zr[hi..]);
            }
        }
        Some(o)
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
    fn linear_in_params(&self) -> bool {
        true
    }

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

    /// The window matrix (input channels × taps × output positions), the padded input and z.
    fn held(&self) -> usize {
        let w = &self.window;
        let padded =
            (w.input[0] + w.before[0] + w.after[0]) * (w.input[1] + w.before[1] + w.after[1]);
        let positions = w.output[0] * w.output[1];
        let window = w
            .channels
            .saturating_mul(w.taps())
            .saturating_mul(positions);
        window
            .saturating_add(w.channels.saturating_mul(padded))
            .saturating_add(self.settings.channels.saturating_mul(positions))
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
    fn forward(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        skip: Option<ArrayView2<S>>,
    ) -> Step<S> {
        self.forward_into(params, x, skip, &mut Vec::new())
    }

    fn forward_into(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        _: Option<ArrayView2<S>>,
        buffer: &mut Vec<S>,
    ) -> Step<S> {
        let (m, o, op) = (
            x.nrows(),
            self.settings.channels,
            self.window.out_positions(),
        );
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("standard layout");
        let w = params[0].as_standard_layout();
        let ws = w.as_slice().expect("standard layout");
        let bias = self
            .settings
            .bias
            .then(|| params[1].as_slice().expect("standard layout"));
        let mut out = std::mem::take(buffer);
        out.clear();
        out.resize(m * o * op, S::zero());
        self.correlate(ws, bias, xs, &mut out);
        Step::plain(Array2::from_shape_vec((m, o * op), out).expect("sized above"))
    }

    fn backward(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        _: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let (m, o, op) = (
            x.nrows(),
            self.settings.channels,
            self.window.out_positions(),
        );
        let cols = self.window.columns(x);
        // dout as rows (sample, position) × out-channels, the layout of the forward product.
        let d = Array2::from_shape_fn((m * op, o), |(r, c)| dout[[r / op, c * op + r % op]]);
        let flipped = mistake == Some("kernel-flipped");
        let mut dw = matmul(d.t(), cols.view());
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
        let dx = need_input.then(|| {
            let dcols = matmul(d.view(), self.matrix(&params[0], flipped).view());
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
            self.window.scatter(dcols.view(), m, scatter, offset)
        });
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
        x: ArrayView2<S>,
        base: &Step<S>,
        moved: &Moved<S>,
    ) -> Option<Step<S>> {
        let mut values = Vec::new();
        let o = self.moved_channel_into(x, base, moved, &mut values)?;
        let op = self.window.out_positions();
        let mut out = base.out.clone();
        let rows = out
            .as_slice_mut()?
            .chunks_exact_mut(self.settings.channels * op);
        for (row, v) in rows.zip(values.chunks_exact(op)) {
            row[o * op..(o + 1) * op].copy_from_slice(v);
        }
        Some(Step::plain(out))
    }

    fn moved_values(
        &self,
        _: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Step<S>,
        moved: &Moved<S>,
        out: &mut Vec<S>,
    ) -> bool {
        self.moved_channel_into(x, base, moved, out).is_some()
    }

    fn forward_units(
        &self,
        params: &[ArrayD<S>],
        base_x: ArrayView2<S>,
        base: &Step<S>,
        changed: &[usize],
        now: &[S],
    ) -> Option<Step<S>> {
        // The update costs the changed in-channels' share of the loop, plus a subtraction and a
        // copy of the output: offered while at most half the in-channels changed.
        let (channels, ip) = (self.window.channels, self.window.in_positions());
        if changed.is_empty() || 2 * changed.len() > channels {
            return None;
        }
        let m = base_x.nrows();
        if now.len() != m * ip * changed.len() {
            return None;
        }
        let base_x = base_x.as_standard_layout();
        let bs = base_x.as_slice()?;
        let w = params[0].as_standard_layout();
        let ws = w.as_slice()?;
        let mut out = base.out.clone();
        self.add_changes(ws, changed, now, bs, out.as_slice_mut()?);
        Some(Step::plain(out))
    }
}
