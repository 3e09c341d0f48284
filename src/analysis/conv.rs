//! Convolution, pooling and flatten on batches of maps: forward, backward (the gradient
//! with respect to the layer's input) and interval bounds.
//!
//! A map `[channels, height, width]` is one row of a batch array. Between layers it is
//! stored channel first (PyTorch's order, so a flatten between layers moves nothing); the
//! network's input keeps its own layout, row-major with the channel last, and the first
//! layer reads it in place ([`MapGeom::channel_last`]).
//!
//! Convolution is im2col followed by one matrix product per sample (K. Chellapilla, S. Puri,
//! P. Simard, "High performance convolutional neural networks for document processing",
//! 2006): the `[in_channels x kernel_h x kernel_w, positions]` matrix of every input patch
//! is multiplied by the `[out_channels, in_channels x kernel_h x kernel_w]` weights, which
//! gives the `[out_channels, positions]` output directly in channel-first order. Samples run
//! in parallel over rayon's pool, each product on its own thread.
//!
//! Definitions followed (PyTorch's documentation of `nn.Conv2d`, `nn.MaxPool2d`,
//! `nn.AvgPool2d`): cross-correlation with zero padding; output size
//! `floor((in + 2 p - d (k - 1) - 1) / s) + 1`; max pooling ignores padded cells; average
//! pooling counts them as zeros and divides by `kernel_h x kernel_w`.

use super::forward::gemm_serial_into;
use crate::model::{Conv2d, Layer, LayerKind, Network, Pool2d, Shape};
use ndarray::{Array2, ArrayView2, ArrayViewMut2};
use rayon::prelude::*;

/// Where the values of a `[channels, height, width]` map lie in a flat row.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct MapGeom {
    /// Channels.
    pub c: usize,
    /// Rows.
    pub h: usize,
    /// Columns.
    pub w: usize,
    /// True for the network input's layout (row-major, channel last); false for the
    /// channel-first maps between layers.
    pub channel_last: bool,
}

impl MapGeom {
    /// The input map of layer `l`, or `None` when it reads a vector.
    pub(crate) fn input_of(net: &Network, l: usize) -> Option<MapGeom> {
        match net.input_shape_of(l) {
            Shape::Map {
                channels,
                height,
                width,
            } => Some(MapGeom {
                c: channels,
                h: height,
                w: width,
                channel_last: l == 0,
            }),
            Shape::Vector(_) => None,
        }
    }

    /// Flat index of value `(c, y, x)`.
    #[inline]
    pub(crate) fn index(&self, c: usize, y: usize, x: usize) -> usize {
        if self.channel_last {
            (y * self.w + x) * self.c + c
        } else {
            (c * self.h + y) * self.w + x
        }
    }

    /// Number of values.
    pub(crate) fn len(&self) -> usize {
        self.c * self.h * self.w
    }
}

/// The output `(height, width)` of layer `l` (1 x 1 for a vector).
fn out_hw(net: &Network, l: usize) -> (usize, usize) {
    match net.output_shape(l) {
        Shape::Map { height, width, .. } => (height, width),
        Shape::Vector(_) => (1, 1),
    }
}

/// The input coordinate of output `o` and kernel tap `k` on one axis, or `None` in the
/// padding.
#[inline]
fn tap(o: usize, k: usize, stride: usize, pad: usize, dil: usize, size: usize) -> Option<usize> {
    let v = (o * stride + k * dil).checked_sub(pad)?;
    (v < size).then_some(v)
}

/// The patches of one sample: `cols[(c kh + i) kw + j, oy ow + ox]` is the input value under
/// tap `(i, j)` of channel `c` for output `(oy, ox)` (0 in the padding). `cols:
/// [in_channels x kh x kw, oh x ow]`.
fn im2col(x: &[f32], g: MapGeom, cv: &Conv2d, (oh, ow): (usize, usize), cols: &mut [f32]) {
    let [kh, kw] = cv.kernel;
    let [s0, s1] = cv.stride;
    let [p0, p1] = cv.padding;
    let [d0, d1] = cv.dilation;
    let pp = oh * ow;
    for c in 0..g.c {
        for i in 0..kh {
            for j in 0..kw {
                let row = &mut cols[((c * kh + i) * kw + j) * pp..][..pp];
                for oy in 0..oh {
                    let dst = &mut row[oy * ow..(oy + 1) * ow];
                    let Some(y) = tap(oy, i, s0, p0, d0, g.h) else {
                        dst.fill(0.0);
                        continue;
                    };
                    if !g.channel_last && s1 == 1 {
                        // Contiguous run: outputs ox with p1 <= ox + j d1 < w + p1.
                        let off = j * d1;
                        let lo = p1.saturating_sub(off).min(ow);
                        let hi = (g.w + p1).saturating_sub(off).min(ow).max(lo);
                        dst[..lo].fill(0.0);
                        dst[hi..].fill(0.0);
                        if hi > lo {
                            let start = g.index(c, y, lo + off - p1);
                            dst[lo..hi].copy_from_slice(&x[start..start + (hi - lo)]);
                        }
                    } else {
                        for (ox, d) in dst.iter_mut().enumerate() {
                            *d = match tap(ox, j, s1, p1, d1, g.w) {
                                Some(xx) => x[g.index(c, y, xx)],
                                None => 0.0,
                            };
                        }
                    }
                }
            }
        }
    }
}

/// The adjoint of [`im2col`]: adds every entry of `cols` back onto the input value it was
/// read from, `dx: [input map]` (not cleared first).
fn col2im_add(cols: &[f32], g: MapGeom, cv: &Conv2d, (oh, ow): (usize, usize), dx: &mut [f32]) {
    let [kh, kw] = cv.kernel;
    let [s0, s1] = cv.stride;
    let [p0, p1] = cv.padding;
    let [d0, d1] = cv.dilation;
    let pp = oh * ow;
    for c in 0..g.c {
        for i in 0..kh {
            for j in 0..kw {
                let row = &cols[((c * kh + i) * kw + j) * pp..][..pp];
                for oy in 0..oh {
                    let Some(y) = tap(oy, i, s0, p0, d0, g.h) else {
                        continue;
                    };
                    for ox in 0..ow {
                        if let Some(xx) = tap(ox, j, s1, p1, d1, g.w) {
                            dx[g.index(c, y, xx)] += row[oy * ow + ox];
                        }
                    }
                }
            }
        }
    }
}

/// Rows of `x` as one contiguous slice (copied only when `x` is not in standard layout).
fn rows_of(x: ArrayView2<'_, f32>) -> std::borrow::Cow<'_, [f32]> {
    match x.to_slice() {
        Some(s) => std::borrow::Cow::Borrowed(s),
        None => std::borrow::Cow::Owned(x.iter().copied().collect()),
    }
}

/// The pre-activations of non-dense layer `l` for a batch `x: [rows, input values]`:
/// `[rows, output values]` (channel-first maps).
///
/// # Panics
/// When layer `l` is dense or `x` has the wrong width (a programming error: networks are
/// validated, probe widths checked).
pub(crate) fn forward(net: &Network, l: usize, x: ArrayView2<f32>) -> Array2<f32> {
    let layer = net.layer(l);
    let in_len = net.input_shape_of(l).len();
    assert_eq!(x.ncols(), in_len, "layer {l}: batch width");
    let out_len = net.output_shape(l).len();
    let rows = x.nrows();
    let mut out = Array2::<f32>::zeros((rows, out_len));
    if rows == 0 || out_len == 0 {
        return out;
    }
    let xs = rows_of(x);
    let dst = out
        .as_slice_mut()
        .expect("a fresh array is in standard layout");
    let geom = MapGeom::input_of(net, l);
    let hw = out_hw(net, l);
    match (layer.kind, geom) {
        (LayerKind::Conv2d(cv), Some(g)) => conv_forward(layer, &cv, g, hw, &xs, dst),
        (LayerKind::MaxPool2d(p), Some(g)) => {
            dst.par_chunks_mut(out_len)
                .zip(xs.par_chunks(in_len))
                .for_each(|(o, xr)| pool_row(true, &p, g, hw, xr, o));
        }
        (LayerKind::AvgPool2d(p), Some(g)) => {
            dst.par_chunks_mut(out_len)
                .zip(xs.par_chunks(in_len))
                .for_each(|(o, xr)| pool_row(false, &p, g, hw, xr, o));
        }
        (LayerKind::Flatten, Some(g)) => {
            dst.par_chunks_mut(out_len)
                .zip(xs.par_chunks(in_len))
                .for_each(|(o, xr)| flatten_row(g, xr, o));
        }
        (kind, _) => panic!("conv::forward called on a {} layer", kind.name()),
    }
    out
}

/// im2col + one product per sample, samples in parallel; `xs: [rows x in]`, `dst: [rows x
/// out]` (bias written first, the product accumulated onto it).
fn conv_forward(
    layer: &Layer,
    cv: &Conv2d,
    g: MapGeom,
    (oh, ow): (usize, usize),
    xs: &[f32],
    dst: &mut [f32],
) {
    let pp = oh * ow;
    let k = layer.fan_in();
    let o = layer.units();
    let w = layer.weights.view();
    let bias = &layer.bias;
    dst.par_chunks_mut(o * pp)
        .zip(xs.par_chunks(g.len()))
        .for_each_init(
            || vec![0.0f32; k * pp],
            |cols, (orow, xr)| {
                im2col(xr, g, cv, (oh, ow), cols);
                for (ch, run) in orow.chunks_mut(pp).enumerate() {
                    run.fill(bias[ch]);
                }
                let (Ok(b), Ok(mut d)) = (
                    ArrayView2::from_shape((k, pp), &cols[..]),
                    ArrayViewMut2::from_shape((o, pp), orow),
                ) else {
                    return;
                };
                gemm_serial_into(&mut d, w, b, true);
            },
        );
}

/// One sample of a max (`is_max`) or average pooling: `x: [input map]`, `out: [c, oh, ow]`.
/// A NaN in a max window wins (as in PyTorch), so it is never hidden.
fn pool_row(
    is_max: bool,
    p: &Pool2d,
    g: MapGeom,
    (oh, ow): (usize, usize),
    x: &[f32],
    out: &mut [f32],
) {
    let [kh, kw] = p.kernel;
    let inv = 1.0 / (kh * kw) as f32;
    for c in 0..g.c {
        for oy in 0..oh {
            for ox in 0..ow {
                let mut acc = if is_max { f32::NEG_INFINITY } else { 0.0 };
                for i in 0..kh {
                    let Some(y) = tap(oy, i, p.stride[0], p.padding[0], 1, g.h) else {
                        continue;
                    };
                    for j in 0..kw {
                        let Some(xx) = tap(ox, j, p.stride[1], p.padding[1], 1, g.w) else {
                            continue;
                        };
                        let v = x[g.index(c, y, xx)];
                        if is_max {
                            if v > acc || v.is_nan() {
                                acc = v;
                            }
                        } else {
                            acc += v;
                        }
                    }
                }
                out[(c * oh + oy) * ow + ox] = if is_max { acc } else { acc * inv };
            }
        }
    }
}

/// The index (into `x`) of the largest value of max-pooling window `(c, oy, ox)`, the first
/// one in row-major window order on ties (the cell the gradient flows to).
fn argmax_in_window(p: &Pool2d, g: MapGeom, c: usize, oy: usize, ox: usize, x: &[f32]) -> usize {
    let mut best: Option<(usize, f32)> = None;
    for i in 0..p.kernel[0] {
        let Some(y) = tap(oy, i, p.stride[0], p.padding[0], 1, g.h) else {
            continue;
        };
        for j in 0..p.kernel[1] {
            let Some(xx) = tap(ox, j, p.stride[1], p.padding[1], 1, g.w) else {
                continue;
            };
            let at = g.index(c, y, xx);
            let v = x[at];
            if best.is_none_or(|(_, b)| v > b || (v.is_nan() && !b.is_nan())) {
                best = Some((at, v));
            }
        }
    }
    best.map_or(0, |b| b.0)
}

/// One sample of flatten: the map in channel-first order.
fn flatten_row(g: MapGeom, x: &[f32], out: &mut [f32]) {
    if !g.channel_last || g.c == 1 {
        out.copy_from_slice(x);
        return;
    }
    for c in 0..g.c {
        for y in 0..g.h {
            for xx in 0..g.w {
                out[(c * g.h + y) * g.w + xx] = x[g.index(c, y, xx)];
            }
        }
    }
}

/// The gradient with respect to the input of non-dense layer `l`, for a batch: given the
/// layer's input `x: [rows, input values]` (needed by max pooling) and the gradient with
/// respect to its pre-activations `delta: [rows, output values]`, gives `[rows, input
/// values]` (in the input's layout for the first layer).
///
/// # Panics
/// When layer `l` is dense or the widths are wrong.
pub(crate) fn backward(
    net: &Network,
    l: usize,
    x: ArrayView2<f32>,
    delta: ArrayView2<f32>,
) -> Array2<f32> {
    let layer = net.layer(l);
    let in_len = net.input_shape_of(l).len();
    let out_len = net.output_shape(l).len();
    let rows = delta.nrows();
    assert_eq!(delta.ncols(), out_len, "layer {l}: delta width");
    let mut dx = Array2::<f32>::zeros((rows, in_len));
    if rows == 0 || in_len == 0 {
        return dx;
    }
    let ds = rows_of(delta);
    let dst = dx
        .as_slice_mut()
        .expect("a fresh array is in standard layout");
    let Some(g) = MapGeom::input_of(net, l) else {
        panic!("conv::backward called on a layer that reads a vector");
    };
    let (oh, ow) = out_hw(net, l);
    match layer.kind {
        LayerKind::Conv2d(cv) => {
            let pp = oh * ow;
            let k = layer.fan_in();
            let o = layer.units();
            let wt = layer.weights.t();
            dst.par_chunks_mut(in_len)
                .zip(ds.par_chunks(out_len))
                .for_each_init(
                    || vec![0.0f32; k * pp],
                    |cols, (dxr, dr)| {
                        let (Ok(dv), Ok(mut cv_)) = (
                            ArrayView2::from_shape((o, pp), dr),
                            ArrayViewMut2::from_shape((k, pp), &mut cols[..]),
                        ) else {
                            return;
                        };
                        gemm_serial_into(&mut cv_, wt, dv, false);
                        col2im_add(cols, g, &cv, (oh, ow), dxr);
                    },
                );
        }
        LayerKind::MaxPool2d(p) => {
            assert_eq!(x.ncols(), in_len, "layer {l}: input width");
            let xs = rows_of(x);
            dst.par_chunks_mut(in_len)
                .zip(ds.par_chunks(out_len))
                .zip(xs.par_chunks(in_len))
                .for_each(|((dxr, dr), xr)| {
                    for c in 0..g.c {
                        for oy in 0..oh {
                            for ox in 0..ow {
                                let at = argmax_in_window(&p, g, c, oy, ox, xr);
                                dxr[at] += dr[(c * oh + oy) * ow + ox];
                            }
                        }
                    }
                });
        }
        LayerKind::AvgPool2d(p) => {
            let inv = 1.0 / (p.kernel[0] * p.kernel[1]) as f32;
            dst.par_chunks_mut(in_len)
                .zip(ds.par_chunks(out_len))
                .for_each(|(dxr, dr)| {
                    for c in 0..g.c {
                        for oy in 0..oh {
                            for ox in 0..ow {
                                let d = dr[(c * oh + oy) * ow + ox] * inv;
                                for i in 0..p.kernel[0] {
                                    let Some(y) = tap(oy, i, p.stride[0], p.padding[0], 1, g.h)
                                    else {
                                        continue;
                                    };
                                    for j in 0..p.kernel[1] {
                                        if let Some(xx) =
                                            tap(ox, j, p.stride[1], p.padding[1], 1, g.w)
                                        {
                                            dxr[g.index(c, y, xx)] += d;
                                        }
                                    }
                                }
                            }
                        }
                    }
                });
        }
        LayerKind::Flatten => {
            dst.par_chunks_mut(in_len)
                .zip(ds.par_chunks(out_len))
                .for_each(|(dxr, dr)| {
                    for c in 0..g.c {
                        for y in 0..g.h {
                            for xx in 0..g.w {
                                dxr[g.index(c, y, xx)] = dr[(c * g.h + y) * g.w + xx];
                            }
                        }
                    }
                });
        }
        LayerKind::Dense => panic!("conv::backward called on a dense layer"),
    }
    dx
}

/// Interval bounds of non-dense layer `l`'s pre-activations (f64) given an interval
/// `[lo, hi]` of each of its input values: `(lower, upper)`, `[output values]` each.
///
/// Convolution: `b + sum max(w lo, w hi)` / `min` over the taps inside the input (padded
/// cells are exactly 0), the tightest interval of an affine map of a box (Gowal et al.
/// 2018, eq. 6); it is exact on the first layer. Max pooling: `[max lo, max hi]` over the
/// window; average pooling: `[mean lo, mean hi]` (both monotone); flatten: the same
/// intervals in channel-first order.
pub(crate) fn interval(net: &Network, l: usize, lo: &[f64], hi: &[f64]) -> (Vec<f64>, Vec<f64>) {
    let layer = net.layer(l);
    let Some(g) = MapGeom::input_of(net, l) else {
        panic!("conv::interval called on a layer that reads a vector");
    };
    let (oh, ow) = out_hw(net, l);
    let out_len = net.output_shape(l).len();
    let mut zl = vec![0.0f64; out_len];
    let mut zu = vec![0.0f64; out_len];
    match layer.kind {
        LayerKind::Conv2d(cv) => {
            let [kh, kw] = cv.kernel;
            let pp = oh * ow;
            zl.par_chunks_mut(pp)
                .zip(zu.par_chunks_mut(pp))
                .enumerate()
                .for_each(|(o, (dl, du))| {
                    let w = layer.weights.row(o);
                    let b = f64::from(layer.bias[o]);
                    for oy in 0..oh {
                        for ox in 0..ow {
                            let (mut dn, mut up) = (b, b);
                            for c in 0..g.c {
                                for i in 0..kh {
                                    let Some(y) = tap(
                                        oy,
                                        i,
                                        cv.stride[0],
                                        cv.padding[0],
                                        cv.dilation[0],
                                        g.h,
                                    ) else {
                                        continue;
                                    };
                                    for j in 0..kw {
                                        let Some(xx) = tap(
                                            ox,
                                            j,
                                            cv.stride[1],
                                            cv.padding[1],
                                            cv.dilation[1],
                                            g.w,
                                        ) else {
                                            continue;
                                        };
                                        let wi = f64::from(w[(c * kh + i) * kw + j]);
                                        let at = g.index(c, y, xx);
                                        let (a, e) = (wi * lo[at], wi * hi[at]);
                                        up += a.max(e);
                                        dn += a.min(e);
                                    }
                                }
                            }
                            dl[oy * ow + ox] = dn;
                            du[oy * ow + ox] = up;
                        }
                    }
                });
        }
        LayerKind::MaxPool2d(p) | LayerKind::AvgPool2d(p) => {
            let is_max = matches!(layer.kind, LayerKind::MaxPool2d(_));
            let n = (p.kernel[0] * p.kernel[1]) as f64;
            for c in 0..g.c {
                for oy in 0..oh {
                    for ox in 0..ow {
                        let (mut a, mut e) = if is_max {
                            (f64::NEG_INFINITY, f64::NEG_INFINITY)
                        } else {
                            (0.0, 0.0)
                        };
                        for i in 0..p.kernel[0] {
                            let Some(y) = tap(oy, i, p.stride[0], p.padding[0], 1, g.h) else {
                                continue;
                            };
                            for j in 0..p.kernel[1] {
                                let Some(xx) = tap(ox, j, p.stride[1], p.padding[1], 1, g.w) else {
                                    continue;
                                };
                                let at = g.index(c, y, xx);
                                if is_max {
                                    a = a.max(lo[at]);
                                    e = e.max(hi[at]);
                                } else {
                                    a += lo[at];
                                    e += hi[at];
                                }
                            }
                        }
                        let k = (c * oh + oy) * ow + ox;
                        if is_max {
                            zl[k] = a;
                            zu[k] = e;
                        } else {
                            zl[k] = a / n;
                            zu[k] = e / n;
                        }
                    }
                }
            }
        }
        LayerKind::Flatten => {
            for c in 0..g.c {
                for y in 0..g.h {
                    for xx in 0..g.w {
                        let k = (c * g.h + y) * g.w + xx;
                        zl[k] = lo[g.index(c, y, xx)];
                        zu[k] = hi[g.index(c, y, xx)];
                    }
                }
            }
        }
        LayerKind::Dense => panic!("conv::interval called on a dense layer"),
    }
    (zl, zu)
}
