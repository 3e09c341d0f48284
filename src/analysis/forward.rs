//! Batched forward pass: one matrix product per layer for the whole batch (convolutions:
//! one per sample, in the private module `analysis::conv`).
//!
//! Matrix products go through the `gemm` crate (a pure-Rust, rayon-parallel GEMM) on the
//! arrays' raw strides, so a `[10000, 784] · [784, 2048]` product runs at BLAS-like speed
//! without copying. Element-wise passes over large arrays (bias, activations) are split
//! over rayon's thread pool.

use crate::model::{Activation, LayerKind, Network};
use ndarray::{Array1, Array2, ArrayView1, ArrayView2, ArrayViewMut2, Axis};
use rayon::prelude::*;

/// Pre-activations and activations of the layers `0..=upto` for one batch.
#[derive(Debug, Clone)]
pub struct Trace {
    /// Pre-activations `z = W a + b` per layer, each `[samples, output values]`: one
    /// column per unit of a dense layer, `channels x height x width` columns (channel
    /// first) for a map.
    pub pre: Vec<Array2<f32>>,
    /// Activations `a = f(z)` per layer, shaped as `pre`.
    pub post: Vec<Array2<f32>>,
}

/// Elements below which an element-wise pass stays on the calling thread (splitting small
/// arrays over threads costs more than it saves; common practice, no source).
const PAR_MIN_ELEMS: usize = 1 << 15;

/// `dst = a · b` (or `dst += a · b` when `accumulate`), any strides.
///
/// Shapes: `a: [m, k]`, `b: [k, n]`, `dst: [m, n]`.
///
/// # Panics
/// When the shapes do not agree (a programming error, never caused by user data: every
/// network is validated before analysis).
pub(crate) fn gemm_into(
    dst: &mut ArrayViewMut2<f32>,
    a: ArrayView2<f32>,
    b: ArrayView2<f32>,
    accumulate: bool,
) {
    gemm_with(dst, a, b, accumulate, gemm::Parallelism::Rayon(0));
}

/// [`gemm_into`] on the calling thread only, for many small products run in parallel by
/// the caller (one per sample of a convolution).
pub(crate) fn gemm_serial_into(
    dst: &mut ArrayViewMut2<f32>,
    a: ArrayView2<f32>,
    b: ArrayView2<f32>,
    accumulate: bool,
) {
    gemm_with(dst, a, b, accumulate, gemm::Parallelism::None);
}

/// [`gemm_into`] with a chosen parallelism.
#[allow(
    unsafe_code,
    reason = "gemm's raw-pointer API, called after every shape and stride is checked (SAFETY below)"
)]
fn gemm_with(
    dst: &mut ArrayViewMut2<f32>,
    a: ArrayView2<f32>,
    b: ArrayView2<f32>,
    accumulate: bool,
    par: gemm::Parallelism,
) {
    let (m, k) = a.dim();
    let (k2, n) = b.dim();
    assert_eq!(k, k2, "gemm: a is [{m}, {k}] but b is [{k2}, {n}]");
    assert_eq!(
        dst.dim(),
        (m, n),
        "gemm: destination is {:?}, expected [{m}, {n}]",
        dst.dim()
    );
    if m == 0 || n == 0 {
        return;
    }
    if k == 0 {
        if !accumulate {
            dst.fill(0.0);
        }
        return;
    }
    // gemm accepts any non-negative strides; views with negative strides (reversed
    // slices) are copied to standard layout first so the pointer arithmetic below stays
    // inside the arrays.
    let neg = |s: &[isize]| s.iter().any(|&v| v < 0);
    if neg(a.strides()) {
        let a = a.as_standard_layout().into_owned();
        return gemm_with(dst, a.view(), b, accumulate, par);
    }
    if neg(b.strides()) {
        let b = b.as_standard_layout().into_owned();
        return gemm_with(dst, a, b.view(), accumulate, par);
    }
    if neg(dst.strides()) {
        let mut tmp = dst.as_standard_layout().into_owned();
        gemm_with(&mut tmp.view_mut(), a, b, accumulate, par);
        dst.assign(&tmp);
        return;
    }
    let (a_rs, a_cs) = (a.strides()[0], a.strides()[1]);
    let (b_rs, b_cs) = (b.strides()[0], b.strides()[1]);
    let (d_rs, d_cs) = (dst.strides()[0], dst.strides()[1]);
    let dst_ptr = dst.as_mut_ptr();
    // SAFETY: the three views are valid ndarray views whose shapes were checked above to be
    // [m, k], [k, n] and [m, n] with non-negative strides, so every element gemm touches
    // (ptr + i*rs + j*cs for in-range i, j) lies inside its array. `dst` is borrowed
    // mutably, so it cannot alias `a` or `b` (a mutable ndarray view never has
    // overlapping elements). gemm computes dst := alpha*dst + beta*a*b, reading dst only
    // when `read_dst` is true.
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            dst_ptr,
            d_cs,
            d_rs,
            accumulate,
            a.as_ptr(),
            a_cs,
            a_rs,
            b.as_ptr(),
            b_cs,
            b_rs,
            1.0,
            1.0,
            false,
            false,
            false,
            par,
        );
    }
}

/// `x · wᵀ`: `x: [samples, inputs]`, `w: [units, inputs]` (a layer's weight orientation)
/// gives `[samples, units]`. An empty batch gives an empty result.
///
/// # Panics
/// When the inner dimensions differ.
pub fn matmul_t(x: ArrayView2<f32>, w: ArrayView2<f32>) -> Array2<f32> {
    let mut out = Array2::<f32>::zeros((x.nrows(), w.nrows()));
    gemm_into(&mut out.view_mut(), x, w.t(), false);
    out
}

/// `a · b`: `a: [m, k]`, `b: [k, n]` gives `[m, n]`.
///
/// # Panics
/// When the inner dimensions differ.
pub fn matmul(a: ArrayView2<f32>, b: ArrayView2<f32>) -> Array2<f32> {
    let mut out = Array2::<f32>::zeros((a.nrows(), b.ncols()));
    gemm_into(&mut out.view_mut(), a, b, false);
    out
}

/// `x · wᵀ + b` for one dense layer: `x: [samples, inputs]`, `w: [units, inputs]`,
/// `b: [units]` gives the pre-activations `[samples, units]`. The bias is written first and
/// the product accumulated onto it, which saves a pass over the result.
pub(crate) fn linear(x: ArrayView2<f32>, w: ArrayView2<f32>, b: ArrayView1<f32>) -> Array2<f32> {
    let rows = x.nrows();
    let units = w.nrows();
    let mut out = Array2::<f32>::zeros((rows, units));
    if let Some(bias) = b.as_slice()
        && let Some(flat) = out.as_slice_mut()
        && units > 0
    {
        par_rows_mut(flat, units, |row| row.copy_from_slice(bias));
    } else {
        for mut r in out.rows_mut() {
            r.assign(&b);
        }
    }
    gemm_into(&mut out.view_mut(), x, w.t(), true);
    out
}

/// Runs `f` on every `width`-long row of `flat`, in parallel when the array is large.
pub(crate) fn par_rows_mut<F>(flat: &mut [f32], width: usize, f: F)
where
    F: Fn(&mut [f32]) + Sync + Send,
{
    if width == 0 {
        return;
    }
    if flat.len() >= PAR_MIN_ELEMS {
        flat.par_chunks_mut(width).for_each(f);
    } else {
        flat.chunks_mut(width).for_each(f);
    }
}

/// Applies `act` to `z: [samples, units]` in place (softmax over each row), in parallel for
/// large arrays. Same formulas as [`Activation::apply_scalar`] and
/// [`Activation::apply_rows`].
pub(crate) fn activate_in_place(act: Activation, z: &mut Array2<f32>) {
    let units = z.ncols();
    if units == 0 || z.nrows() == 0 {
        return;
    }
    if !z.is_standard_layout() {
        act.apply_rows(z);
        return;
    }
    let Some(flat) = z.as_slice_mut() else {
        act.apply_rows(z);
        return;
    };
    match act {
        Activation::Identity => {}
        Activation::Softmax => par_rows_mut(flat, units, softmax_row),
        a => {
            if flat.len() >= PAR_MIN_ELEMS {
                flat.par_chunks_mut(4096)
                    .for_each(|c| c.iter_mut().for_each(|v| *v = a.apply_scalar(*v)));
            } else {
                flat.iter_mut().for_each(|v| *v = a.apply_scalar(*v));
            }
        }
    }
}

/// Softmax of one row in place, stabilised by the row maximum (the same formula as
/// [`Activation::apply_rows`]; the normalising sum is accumulated in f64).
fn softmax_row(row: &mut [f32]) {
    let m = row.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    let mut s = 0.0f64;
    for v in row.iter_mut() {
        *v = (*v - m).exp();
        s += f64::from(*v);
    }
    let inv = (1.0 / s) as f32;
    row.iter_mut().for_each(|v| *v *= inv);
}

/// The activations of a new array from pre-activations, leaving `pre` untouched.
fn activated(act: Activation, pre: &Array2<f32>) -> Array2<f32> {
    let mut post = pre.clone();
    activate_in_place(act, &mut post);
    post
}

/// The network's output activations for a batch: `x: [samples, inputs]` gives
/// `[samples, outputs]`. An empty batch gives `[0, outputs]`.
///
/// # Panics
/// When `x` does not have `net.input.size` columns (probe readers check widths first).
pub fn forward(net: &Network, x: ArrayView2<f32>) -> Array2<f32> {
    assert_eq!(
        x.ncols(),
        net.input().size,
        "forward: batch has {} columns but the network has {} inputs",
        x.ncols(),
        net.input().size
    );
    let mut a: Option<Array2<f32>> = None;
    for (l, layer) in net.layers().iter().enumerate() {
        let input = a.as_ref().map_or(x, |v| v.view());
        let mut z = layer_pre(net, l, input);
        activate_in_place(layer.activation, &mut z);
        a = Some(z);
    }
    a.unwrap_or_else(|| x.to_owned())
}

/// The pre-activations of layer `l` for a batch of its inputs `x: [samples, input values
/// of l]`: `[samples, output values of l]` (for a dense layer `x · Wᵀ + b`, for the other
/// kinds see the private module `analysis::conv`; maps in channel-first order).
///
/// # Panics
/// When `x` does not have the layer's input width.
pub fn layer_pre(net: &Network, l: usize, x: ArrayView2<f32>) -> Array2<f32> {
    let layer = net.layer(l);
    if layer.kind == LayerKind::Dense {
        linear(x, layer.weights.view(), layer.bias.view())
    } else {
        super::conv::forward(net, l, x)
    }
}

/// Pre-activations and activations of layers `0..=upto` for a batch `x: [samples, inputs]`.
///
/// # Panics
/// When `upto` is not a layer index or `x` has the wrong number of columns.
pub fn forward_trace(net: &Network, x: ArrayView2<f32>, upto: usize) -> Trace {
    assert!(
        upto < net.layers().len(),
        "forward_trace: layer {upto} requested but the network has {} layers",
        net.layers().len()
    );
    assert_eq!(
        x.ncols(),
        net.input().size,
        "forward_trace: batch has {} columns but the network has {} inputs",
        x.ncols(),
        net.input().size
    );
    let mut pre: Vec<Array2<f32>> = Vec::with_capacity(upto + 1);
    let mut post: Vec<Array2<f32>> = Vec::with_capacity(upto + 1);
    for (l, layer) in net.layers()[..=upto].iter().enumerate() {
        let input = post.last().map_or(x, |v| v.view());
        let z = layer_pre(net, l, input);
        let a = activated(layer.activation, &z);
        pre.push(z);
        post.push(a);
    }
    Trace { pre, post }
}

/// The index of the largest finite value of each row of `out: [samples, units]`, or `None`
/// when a row has no finite value (NaN outputs never win).
pub fn argmax_rows(out: ArrayView2<f32>) -> Vec<Option<usize>> {
    out.axis_iter(Axis(0))
        .map(|row| {
            let mut best: Option<(usize, f32)> = None;
            for (k, &v) in row.iter().enumerate() {
                if v.is_finite() && best.is_none_or(|(_, b)| v > b) {
                    best = Some((k, v));
                }
            }
            best.map(|(k, _)| k)
        })
        .collect()
}

/// The pre-activation of one unit per row: `z[b] = w[units[b]] · a[b] + bias[units[b]]`,
/// accumulated in f64. `a: [samples, inputs]`, `w: [units, inputs]`.
pub(crate) fn gathered_preactivation(
    a: ArrayView2<f32>,
    w: ArrayView2<f32>,
    bias: ArrayView1<f32>,
    unit_of: &(dyn Fn(usize) -> usize + Sync),
) -> Array1<f32> {
    let rows = a.nrows();
    let z: Vec<f32> = (0..rows)
        .into_par_iter()
        .map(|b| {
            let u = unit_of(b);
            let wr = w.row(u);
            let ar = a.row(b);
            let mut s = f64::from(bias[u]);
            for (wi, ai) in wr.iter().zip(ar.iter()) {
                s += f64::from(*wi) * f64::from(*ai);
            }
            s as f32
        })
        .collect();
    Array1::from_vec(z)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{InputSpec, Layer};
    use approx::assert_abs_diff_eq;
    use ndarray::{Array1, array};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random_matrix(rng: &mut ChaCha8Rng, r: usize, c: usize) -> Array2<f32> {
        Array2::from_shape_fn((r, c), |_| rng.random_range(-1.0f32..1.0))
    }

    /// Plain triple loop in f64: the textbook definition of the matrix product.
    fn naive(a: &Array2<f32>, b: &Array2<f32>) -> Array2<f64> {
        let mut out = Array2::<f64>::zeros((a.nrows(), b.ncols()));
        for i in 0..a.nrows() {
            for j in 0..b.ncols() {
                let mut s = 0.0;
                for k in 0..a.ncols() {
                    s += f64::from(a[[i, k]]) * f64::from(b[[k, j]]);
                }
                out[[i, j]] = s;
            }
        }
        out
    }

    #[test]
    fn matmul_matches_the_definition_on_odd_shapes() {
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        for &(m, k, n) in &[(1, 1, 1), (3, 5, 7), (17, 33, 9), (64, 130, 65), (0, 4, 3)] {
            let a = random_matrix(&mut rng, m, k);
            let b = random_matrix(&mut rng, k, n);
            let want = naive(&a, &b);
            let got = matmul(a.view(), b.view());
            assert_eq!(got.dim(), (m, n));
            for (g, w) in got.iter().zip(want.iter()) {
                assert_abs_diff_eq!(f64::from(*g), *w, epsilon = 1e-4);
            }
            // x · wᵀ with w stored [n, k], as a layer stores its weights.
            let wt = b.t().to_owned();
            let got_t = matmul_t(a.view(), wt.view());
            for (g, w) in got_t.iter().zip(want.iter()) {
                assert_abs_diff_eq!(f64::from(*g), *w, epsilon = 1e-4);
            }
        }
    }

    #[test]
    fn matmul_accepts_transposed_and_reversed_views() {
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let a = random_matrix(&mut rng, 6, 4);
        let b = random_matrix(&mut rng, 5, 6);
        // aᵀ · bᵀ through strided views.
        let got = matmul(a.t(), b.t());
        let want = naive(&a.t().to_owned(), &b.t().to_owned());
        for (g, w) in got.iter().zip(want.iter()) {
            assert_abs_diff_eq!(f64::from(*g), *w, epsilon = 1e-5);
        }
        let rev = b.slice(ndarray::s![..;-1, ..]);
        let got = matmul(rev, a.view());
        let want = naive(&rev.to_owned(), &a);
        for (g, w) in got.iter().zip(want.iter()) {
            assert_abs_diff_eq!(f64::from(*g), *w, epsilon = 1e-5);
        }
    }

    fn tiny_net(act: Activation) -> Network {
        let input = InputSpec::vector_box(2, -1.0, 1.0);
        let h = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "h".into(),
            activation: act,
            weights: array![[1.0, -2.0], [0.5, 0.25], [-1.0, 0.0]],
            bias: array![0.1, -0.2, 0.3],
            labels: None,
        };
        let out = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "out".into(),
            activation: Activation::Softmax,
            weights: array![[1.0, 0.0, -1.0], [0.0, 2.0, 1.0]],
            bias: array![0.0, 0.5],
            labels: None,
        };
        Network::new("test", "t", input, vec![h, out]).expect("valid test network")
    }

    #[test]
    fn forward_matches_hand_computation() {
        // Worked by hand: x = (0.5, -1).
        // h: z = (0.5 + 2 + 0.1, 0.25 - 0.25 - 0.2, -0.5 + 0.3) = (2.6, -0.2, -0.2);
        // relu: a = (2.6, 0, 0).
        // out: z = (2.6, 0.5); softmax = (e^2.6, e^0.5) / (e^2.6 + e^0.5).
        let net = tiny_net(Activation::Relu);
        let x = array![[0.5f32, -1.0]];
        let t = forward_trace(&net, x.view(), 1);
        let want_h = [2.6f32, -0.2, -0.2];
        for (g, w) in t.pre[0].iter().zip(want_h) {
            assert_abs_diff_eq!(*g, w, epsilon = 1e-6);
        }
        assert_abs_diff_eq!(t.post[0][[0, 0]], 2.6, epsilon = 1e-6);
        assert_abs_diff_eq!(t.post[0][[0, 1]], 0.0);
        let e0 = 2.6f64.exp();
        let e1 = 0.5f64.exp();
        let out = forward(&net, x.view());
        assert_abs_diff_eq!(f64::from(out[[0, 0]]), e0 / (e0 + e1), epsilon = 1e-6);
        assert_abs_diff_eq!(f64::from(out[[0, 1]]), e1 / (e0 + e1), epsilon = 1e-6);
        assert_eq!(out, t.post[1]);
    }

    #[test]
    fn forward_handles_an_empty_batch() {
        let net = tiny_net(Activation::Tanh);
        let x = Array2::<f32>::zeros((0, 2));
        let out = forward(&net, x.view());
        assert_eq!(out.dim(), (0, 2));
        let t = forward_trace(&net, x.view(), 1);
        assert_eq!(t.pre[0].dim(), (0, 3));
        assert_eq!(t.post[1].dim(), (0, 2));
    }

    #[test]
    fn large_batch_agrees_with_row_by_row() {
        // Big enough to take the parallel paths; each row checked against a
        // one-row forward pass (the batched and per-sample results must agree).
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let input = InputSpec::vector_box(40, 0.0, 1.0);
        let l1 = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "h".into(),
            activation: Activation::LeakyRelu { alpha: 0.1 },
            weights: random_matrix(&mut rng, 300, 40),
            bias: Array1::from_shape_fn(300, |_| rng.random_range(-0.5f32..0.5)),
            labels: None,
        };
        let l2 = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "o".into(),
            activation: Activation::Softmax,
            weights: random_matrix(&mut rng, 7, 300),
            bias: Array1::zeros(7),
            labels: None,
        };
        let net = Network::new("test", "t", input, vec![l1, l2]).expect("valid");
        let x = Array2::from_shape_fn((300, 40), |_| rng.random_range(0.0f32..1.0));
        let out = forward(&net, x.view());
        for i in (0..300).step_by(37) {
            let one = forward(&net, x.slice(ndarray::s![i..i + 1, ..]));
            for (a, b) in one.row(0).iter().zip(out.row(i).iter()) {
                assert_abs_diff_eq!(*a, *b, epsilon = 1e-5);
            }
            assert_abs_diff_eq!(out.row(i).sum(), 1.0, epsilon = 1e-5);
        }
    }

    #[test]
    fn argmax_skips_nan() {
        let out = array![[0.1f32, f32::NAN, 0.3], [f32::NAN, f32::NAN, f32::NAN]];
        assert_eq!(argmax_rows(out.view()), vec![Some(2), None]);
    }
}
