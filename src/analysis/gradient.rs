//! Reverse-mode gradients of a unit's pre-activation with respect to the network input.
//!
//! For a batch where row `b` asks about unit `u_b` of layer `L`, the forward pass runs
//! through the layers below `L` (one matrix product per layer), the target layer only
//! evaluates the one gathered row `W_L[u_b]` per sample, and the backward pass is one matrix
//! product per lower layer:
//!
//! ```text
//! delta_{L-1}[b, :] = W_L[u_b, :] ⊙ f'_{L-1}(z_{L-1}[b, :])
//! delta_{l-1}       = (delta_l · W_l) ⊙ f'_{l-1}(z_{l-1})      for l = L-1 .. 1
//! dz/dx             = delta_0 · W_0
//! ```
//!
//! The target layer's own activation is never differentiated (the gradient is of its
//! pre-activation), so softmax, which only exists in the last layer, never needs a
//! backward rule. At the kink of a rectifier the derivative from the left is used (see
//! [`crate::model::Activation::derivative_scalar`]).

use super::forward::{
    activate_in_place, gathered_preactivation, gemm_into, layer_pre, par_rows_mut,
};
use crate::error::{Error, Result};
use crate::model::{Activation, LayerKind, Network};
use ndarray::{Array1, Array2, ArrayView2, ArrayViewMut2, s};
use rayon::prelude::*;

/// Rows processed together in one pass. Bounds the memory of the intermediate
/// `[rows, units]` arrays (1024 x 2048 f32 is 8 MiB) and the time between cancellation
/// checks, while keeping every matrix product large enough to run at full speed.
pub(crate) const GRAD_BLOCK_ROWS: usize = 1024;

/// Reusable buffers for [`input_gradient_into`], so that repeated calls (one per step of
/// a gradient ascent) do not allocate and fault in fresh pages every time.
#[derive(Debug, Default)]
pub(crate) struct GradWorkspace {
    /// Pre-activations of each layer below the target, `[rows, units_l]` flattened.
    z: Vec<Vec<f32>>,
    /// Activations of each layer below the target but the last, flattened.
    a: Vec<Vec<f32>>,
    /// Two ping-pong buffers for the backward deltas.
    d: [Vec<f32>; 2],
}

/// Grows `v` to at least `n` elements (contents are overwritten by the caller).
fn ensure(v: &mut Vec<f32>, n: usize) -> &mut [f32] {
    if v.len() < n {
        v.resize(n, 0.0);
    }
    &mut v[..n]
}

/// The pre-activation `z` of unit `units[b]` of `layer` for each row `b` of
/// `x: [samples, inputs]` (or of `units[0]` for every row when `units.len() == 1`), and
/// `dz/dx: [samples, inputs]`. On a layer with a map output a "unit" here is one output
/// value, `channel x height x width + row x width + column` (see
/// [`crate::model::Network::output_shape`]).
///
/// An empty batch gives empty results.
///
/// # Panics
/// When `layer` is not a layer index, a unit is out of range, `units` has neither one
/// entry nor one per row, or `x` has the wrong number of columns. Callers validate user
/// requests first (see [`super::prefer::prefer`]).
pub fn input_gradient(
    net: &Network,
    layer: usize,
    units: &[usize],
    x: ArrayView2<f32>,
) -> (Array1<f32>, Array2<f32>) {
    let rows = x.nrows();
    let mut z = Array1::<f32>::zeros(rows);
    let mut grad = Array2::<f32>::zeros((rows, net.input().size));
    let mut ws = GradWorkspace::default();
    let zs = z
        .as_slice_mut()
        .expect("a fresh one-dimensional array is contiguous");
    // Never cancelled, so the result is always Ok.
    let _ = input_gradient_into(net, layer, units, x, zs, grad.view_mut(), &mut ws, &|| {
        false
    });
    (z, grad)
}

/// [`input_gradient`] writing into caller-owned outputs `z: [samples]` and
/// `grad: [samples, inputs]`, with reusable buffers. `cancelled` is polled between blocks
/// of [`GRAD_BLOCK_ROWS`] rows; when it returns true the call stops with
/// [`Error::Cancelled`] (outputs partly written).
#[allow(
    clippy::too_many_arguments,
    reason = "the hot kernel of the search: outputs and workspace are caller-owned so a step allocates nothing"
)]
pub(crate) fn input_gradient_into(
    net: &Network,
    layer: usize,
    units: &[usize],
    x: ArrayView2<f32>,
    z: &mut [f32],
    mut grad: ArrayViewMut2<f32>,
    ws: &mut GradWorkspace,
    cancelled: &dyn Fn() -> bool,
) -> Result<()> {
    assert!(
        layer < net.layers().len(),
        "input_gradient: layer {layer} of {}",
        net.layers().len()
    );
    assert_eq!(
        x.ncols(),
        net.input().size,
        "input_gradient: batch has {} columns but the network has {} inputs",
        x.ncols(),
        net.input().size
    );
    let rows = x.nrows();
    assert!(
        units.len() == 1 || units.len() == rows,
        "input_gradient: {} units for {rows} rows",
        units.len()
    );
    assert_eq!(z.len(), rows, "input_gradient: z buffer length");
    assert_eq!(
        grad.dim(),
        (rows, net.input().size),
        "input_gradient: grad shape"
    );
    let n_units = net.output_shape(layer).len();
    assert!(
        units.iter().all(|&u| u < n_units),
        "input_gradient: unit out of range for layer '{}' with {n_units} output values",
        net.layers()[layer].name
    );
    let dense = net.is_dense_only();
    let block = if dense {
        GRAD_BLOCK_ROWS
    } else {
        GENERIC_BLOCK_ROWS
    };
    let mut start = 0;
    while start < rows {
        if cancelled() {
            return Err(Error::Cancelled);
        }
        let end = (start + block).min(rows);
        let block_units: &[usize] = if units.len() == 1 {
            units
        } else {
            &units[start..end]
        };
        if dense {
            gradient_block(
                net,
                layer,
                block_units,
                x.slice(s![start..end, ..]),
                &mut z[start..end],
                grad.slice_mut(s![start..end, ..]),
                ws,
            );
        } else {
            generic_gradient_block(
                net,
                layer,
                block_units,
                x.slice(s![start..end, ..]),
                &mut z[start..end],
                grad.slice_mut(s![start..end, ..]),
            );
        }
        start = end;
    }
    Ok(())
}

/// Rows per block on networks with convolutional layers, whose per-layer arrays are
/// `channels x height x width` wide (a 32 x 30 x 30 map is 115 KiB per row).
const GENERIC_BLOCK_ROWS: usize = 128;

/// The gradient of layer `l`'s input given its input values `x: [rows, input values]` and
/// the gradient with respect to its pre-activations `delta: [rows, output values]`:
/// `delta · W` for a dense layer, the adjoint of the map operation otherwise
/// ([`super::conv`]).
pub(crate) fn layer_backward(
    net: &Network,
    l: usize,
    x: ArrayView2<f32>,
    delta: ArrayView2<f32>,
) -> Array2<f32> {
    let layer = net.layer(l);
    if layer.kind == LayerKind::Dense {
        super::forward::matmul(delta, layer.weights.view())
    } else {
        super::conv::backward(net, l, x, delta)
    }
}

/// One block of [`input_gradient_into`] on a network with non-dense layers: a forward
/// trace up to the target (every layer's input and pre-activation kept), a one-hot error
/// signal on the target value `units[b]` of each row, then [`layer_backward`] and the
/// activation derivatives down to the input.
fn generic_gradient_block(
    net: &Network,
    layer: usize,
    units: &[usize],
    x: ArrayView2<f32>,
    z_out: &mut [f32],
    mut grad: ArrayViewMut2<f32>,
) {
    let rows = x.nrows();
    let unit_of = |b: usize| if units.len() == 1 { units[0] } else { units[b] };
    let mut inputs: Vec<Array2<f32>> = Vec::with_capacity(layer + 1);
    let mut pres: Vec<Array2<f32>> = Vec::with_capacity(layer + 1);
    let mut cur = x.to_owned();
    for l in 0..=layer {
        let z = layer_pre(net, l, cur.view());
        if l < layer {
            let mut a = z.clone();
            activate_in_place(net.layer(l).activation, &mut a);
            inputs.push(std::mem::replace(&mut cur, a));
        } else {
            inputs.push(std::mem::take(&mut cur));
        }
        pres.push(z);
    }
    let target = &pres[layer];
    let mut delta = Array2::<f32>::zeros(target.dim());
    for b in 0..rows {
        let u = unit_of(b);
        z_out[b] = target[[b, u]];
        delta[[b, u]] = 1.0;
    }
    for l in (0..=layer).rev() {
        let mut dx = layer_backward(net, l, inputs[l].view(), delta.view());
        if l > 0 {
            let act = net.layer(l - 1).activation;
            if act != Activation::Identity {
                dx.zip_mut_with(&pres[l - 1], |d, &z| *d *= act.derivative_scalar(z));
            }
        }
        delta = dx;
    }
    grad.assign(&delta);
}

/// Writes `bias` into every row of `out: [rows, units]` (flattened), in parallel.
fn fill_bias(out: &mut [f32], bias: &[f32]) {
    par_rows_mut(out, bias.len(), |row| row.copy_from_slice(bias));
}

/// One block of [`input_gradient_into`]: forward through the layers below the target,
/// the target's z and error signal, then back to the input.
fn gradient_block(
    net: &Network,
    layer: usize,
    units: &[usize],
    x: ArrayView2<f32>,
    z_out: &mut [f32],
    mut grad: ArrayViewMut2<f32>,
    ws: &mut GradWorkspace,
) {
    let unit_of = |b: usize| if units.len() == 1 { units[0] } else { units[b] };
    let target = &net.layers()[layer];
    if layer == 0 {
        // dz/dx of a first-layer unit is its weight row.
        let z = gathered_preactivation(x, target.weights.view(), target.bias.view(), &unit_of);
        z_out.iter_mut().zip(z.iter()).for_each(|(d, s)| *d = *s);
        for (b, mut g) in grad.rows_mut().into_iter().enumerate() {
            g.assign(&target.weights.row(unit_of(b)));
        }
        return;
    }
    forward_below(net, layer, x, ws);
    target_and_delta(net, layer, x.nrows(), &unit_of, z_out, ws);
    backward_to_input(net, layer, x.nrows(), &mut grad, ws);
}

/// Forward through the layers below `layer` (at least 1) for the `x.nrows()` rows of `x`,
/// keeping each pre-activation `ws.z[l]: [rows, units_l]` for the backward pass;
/// activations `ws.a[l]` are materialised only where the next product needs them.
fn forward_below(net: &Network, layer: usize, x: ArrayView2<f32>, ws: &mut GradWorkspace) {
    let rows = x.nrows();
    if ws.z.len() < layer {
        ws.z.resize_with(layer, Vec::new);
    }
    if ws.a.len() < layer {
        ws.a.resize_with(layer, Vec::new);
    }
    for l in 0..layer {
        let lay = &net.layers()[l];
        let width = lay.units();
        let zl = ensure(&mut ws.z[l], rows * width);
        match lay.bias.as_slice() {
            Some(bias) => fill_bias(zl, bias),
            None => fill_bias(zl, &lay.bias.to_vec()),
        }
        let mut zview = ArrayViewMut2::from_shape((rows, width), zl)
            .expect("buffer length equals rows x width");
        if l == 0 {
            gemm_into(&mut zview, x, lay.weights.t(), true);
        } else {
            let prev = &ws.a[l - 1];
            let pw = net.layers()[l - 1].units();
            let input = ArrayView2::from_shape((rows, pw), &prev[..rows * pw])
                .expect("buffer length equals rows x width");
            gemm_into(&mut zview, input, lay.weights.t(), true);
        }
        if l + 1 < layer {
            let act = lay.activation;
            let zsrc: &[f32] = &ws.z[l][..rows * width];
            let al = ensure(&mut ws.a[l], rows * width);
            al.par_chunks_mut(4096)
                .zip(zsrc.par_chunks(4096))
                .for_each(|(d, s)| {
                    for (dv, sv) in d.iter_mut().zip(s) {
                        *dv = act.apply_scalar(*sv);
                    }
                });
        }
    }
}

/// The target units' z, `z_out[b] = b_L[u_b] + sum_j W_L[u_b, j] f(z_{L-1}[b, j])` (f64
/// accumulation), and the error signal of the layer below,
/// `ws.d[0][b, j] = W_L[u_b, j] f'(z_{L-1}[b, j])`, from [`forward_below`]'s `ws.z`.
fn target_and_delta(
    net: &Network,
    layer: usize,
    rows: usize,
    unit_of: &(impl Fn(usize) -> usize + Sync),
    z_out: &mut [f32],
    ws: &mut GradWorkspace,
) {
    let target = &net.layers()[layer];
    let below = &net.layers()[layer - 1];
    let act = below.activation;
    let width = below.units();
    let zb: &[f32] = &ws.z[layer - 1][..rows * width];
    let w_t = target.weights.view();
    let b_t = target.bias.view();
    let delta = ensure(&mut ws.d[0], rows * width);
    if width > 0 {
        delta
            .par_chunks_mut(width)
            .zip(zb.par_chunks(width))
            .zip(z_out.par_iter_mut())
            .enumerate()
            .for_each(|(b, ((drow, zrow), zo))| {
                let u = unit_of(b);
                let w = w_t.row(u);
                let mut s = f64::from(b_t[u]);
                for ((dv, zv), wv) in drow.iter_mut().zip(zrow).zip(w.iter()) {
                    s += f64::from(*wv) * f64::from(act.apply_scalar(*zv));
                    *dv = *wv * act.derivative_scalar(*zv);
                }
                *zo = s as f32;
            });
    } else {
        z_out
            .iter_mut()
            .enumerate()
            .for_each(|(b, zo)| *zo = b_t[unit_of(b)]);
    }
}

/// Back from the error signal `ws.d[0]` of layer `layer - 1` through layers
/// `layer - 1 .. 1`, `delta_{l-1} = (delta_l · W_l) ⊙ f'(z_{l-1})`, then into the input:
/// `grad = delta_0 · W_0`, `[rows, inputs]`.
fn backward_to_input(
    net: &Network,
    layer: usize,
    rows: usize,
    grad: &mut ArrayViewMut2<f32>,
    ws: &mut GradWorkspace,
) {
    let [d0, d1] = &mut ws.d;
    let mut cur: &mut Vec<f32> = d0;
    let mut next: &mut Vec<f32> = d1;
    let mut cur_w = net.layers()[layer - 1].units();
    for l in (1..layer).rev() {
        let w = net.layers()[l].weights.view(); // [units_l, units_{l-1}]
        let nw = w.ncols();
        let dcur = ArrayView2::from_shape((rows, cur_w), &cur[..rows * cur_w])
            .expect("buffer length equals rows x width");
        let dn = ensure(next, rows * nw);
        let mut dview = ArrayViewMut2::from_shape((rows, nw), &mut dn[..])
            .expect("buffer length equals rows x width");
        gemm_into(&mut dview, dcur, w, false);
        let act = net.layers()[l - 1].activation;
        if !matches!(act, Activation::Identity) {
            let zp: &[f32] = &ws.z[l - 1][..rows * nw];
            dn.par_chunks_mut(4096)
                .zip(zp.par_chunks(4096))
                .for_each(|(d, zc)| {
                    for (dv, zv) in d.iter_mut().zip(zc) {
                        *dv *= act.derivative_scalar(*zv);
                    }
                });
        }
        std::mem::swap(&mut cur, &mut next);
        cur_w = nw;
    }
    let dcur = ArrayView2::from_shape((rows, cur_w), &cur[..rows * cur_w])
        .expect("buffer length equals rows x width");
    gemm_into(grad, dcur, net.layers()[0].weights.view(), false);
}

/// The sensitivity maps of one layer: the gradient of each unit's pre-activation with
/// respect to the input, all taken at the same input point.
#[derive(Debug, Clone, PartialEq)]
pub struct Sensitivity {
    /// `dz_u/dx` of unit `u` in row `u`: `[units, inputs]`.
    pub maps: Array2<f32>,
    /// The largest finite `|dz_u/dx_i|` over the whole layer (0 when there is none), for a
    /// colour scale shared by the layer's maps.
    pub max_abs: f32,
}

/// Gradients of every unit of `layer` at the input `at: [input size]` (the app evaluates
/// them at the mean probe input). On a convolutional layer a unit is a channel, taken at
/// the centre of its map ([`crate::model::Shape::centre`]).
///
/// # Errors
/// [`Error::BadOption`] when `layer` is not a layer index or `at` does not have one value
/// per input.
pub fn sensitivity(net: &Network, layer: usize, at: &[f32]) -> Result<Sensitivity> {
    let units = net
        .layers()
        .get(layer)
        .ok_or_else(|| {
            Error::bad_option(
                "layer",
                layer,
                format!("must be a layer index below {}", net.layers().len()),
            )
        })?
        .units();
    if at.len() != net.input().size {
        return Err(Error::bad_option(
            "at",
            format!("{} values", at.len()),
            format!("must have one value per input ({})", net.input().size),
        ));
    }
    let x = Array2::from_shape_fn((units, at.len()), |(_, i)| at[i]);
    // On a map: each channel at the centre of its map.
    let shape = net.output_shape(layer);
    let ids: Vec<usize> = (0..units).map(|c| shape.index(c, shape.centre())).collect();
    let (_, maps) = input_gradient(net, layer, &ids, x.view());
    let max_abs = maps
        .iter()
        .filter(|v| v.is_finite())
        .fold(0.0f32, |m, v| m.max(v.abs()));
    Ok(Sensitivity { maps, max_abs })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::forward::forward_trace;
    use crate::model::{InputSpec, Layout};
    use approx::assert_abs_diff_eq;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random_net(rng: &mut ChaCha8Rng, sizes: &[usize], acts: &[Activation]) -> Network {
        let input = InputSpec {
            units: None,
            size: sizes[0],
            layout: Layout::Vector,
            low: vec![-1.0; sizes[0]],
            high: vec![1.0; sizes[0]],
            names: None,
        };
        let layers = crate::analysis::test_nets::random_layers(rng, sizes, acts, 0.3);
        Network::new("test", "t", input, layers).expect("valid random network")
    }

    /// z of one unit at one input, in f64 via the f32 forward pass (used by finite
    /// differences).
    fn z_at(net: &Network, layer: usize, unit: usize, x: &[f64]) -> f64 {
        let xf = Array2::from_shape_fn((1, x.len()), |(_, j)| x[j] as f32);
        let t = forward_trace(net, xf.view(), layer);
        f64::from(t.pre[layer][[0, unit]])
    }

    /// Central finite differences (common practice, no source): (f(x+h) - f(x-h)) / 2h has
    /// error O(h^2); with f32 forward passes h = 1e-2 balances truncation against rounding.
    fn check_against_finite_differences(act: Activation, seed: u64) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let acts = [act, act, Activation::Softmax];
        let net = random_net(&mut rng, &[5, 6, 4, 3], &acts);
        let samples = 4;
        let x = Array2::from_shape_fn((samples, 5), |_| rng.random_range(-1.0f32..1.0));
        for layer in 0..3 {
            let n_units = net.layers()[layer].units();
            let units: Vec<usize> = (0..samples).map(|b| b % n_units).collect();
            let (z, g) = input_gradient(&net, layer, &units, x.view());
            for b in 0..samples {
                let x0: Vec<f64> = x.row(b).iter().map(|&v| f64::from(v)).collect();
                assert_abs_diff_eq!(
                    f64::from(z[b]),
                    z_at(&net, layer, units[b], &x0),
                    epsilon = 1e-5
                );
                let h = 1e-2;
                for i in 0..5 {
                    let mut xp = x0.clone();
                    let mut xm = x0.clone();
                    xp[i] += h;
                    xm[i] -= h;
                    let fd = (z_at(&net, layer, units[b], &xp) - z_at(&net, layer, units[b], &xm))
                        / (2.0 * h);
                    assert_abs_diff_eq!(f64::from(g[[b, i]]), fd, epsilon = 2e-3);
                }
            }
        }
    }

    #[test]
    fn gradient_matches_finite_differences_identity() {
        check_against_finite_differences(Activation::Identity, 10);
    }

    #[test]
    fn gradient_matches_finite_differences_relu() {
        // Random inputs land on a ReLU kink with probability zero; with h = 1e-2 a kink
        // closer than h to x would spoil the estimate, which these seeds avoid (checked).
        check_against_finite_differences(Activation::Relu, 11);
    }

    #[test]
    fn gradient_matches_finite_differences_leaky_relu() {
        check_against_finite_differences(Activation::LeakyRelu { alpha: 0.1 }, 12);
    }

    #[test]
    fn gradient_matches_finite_differences_sigmoid() {
        check_against_finite_differences(Activation::Sigmoid, 13);
    }

    #[test]
    fn gradient_matches_finite_differences_tanh() {
        check_against_finite_differences(Activation::Tanh, 14);
    }

    #[test]
    fn single_unit_broadcasts_and_blocks_agree() {
        // More rows than one block: the blocked result must equal the per-row result.
        let mut rng = ChaCha8Rng::seed_from_u64(20);
        let net = random_net(
            &mut rng,
            &[3, 4, 2],
            &[Activation::Tanh, Activation::Identity],
        );
        let rows = GRAD_BLOCK_ROWS + 5;
        let x = Array2::from_shape_fn((rows, 3), |_| rng.random_range(-1.0f32..1.0));
        let (z, g) = input_gradient(&net, 1, &[1], x.view());
        for b in [0, 17, GRAD_BLOCK_ROWS - 1, GRAD_BLOCK_ROWS, rows - 1] {
            let (z1, g1) = input_gradient(&net, 1, &[1], x.slice(s![b..b + 1, ..]));
            assert_abs_diff_eq!(z[b], z1[0], epsilon = 1e-6);
            for i in 0..3 {
                assert_abs_diff_eq!(g[[b, i]], g1[[0, i]], epsilon = 1e-6);
            }
        }
    }

    #[test]
    fn empty_batch_gives_empty_gradient() {
        let mut rng = ChaCha8Rng::seed_from_u64(21);
        let net = random_net(
            &mut rng,
            &[3, 4, 2],
            &[Activation::Relu, Activation::Softmax],
        );
        let x = Array2::<f32>::zeros((0, 3));
        let (z, g) = input_gradient(&net, 1, &[0], x.view());
        assert_eq!(z.len(), 0);
        assert_eq!(g.dim(), (0, 3));
    }

    #[test]
    fn first_layer_sensitivity_is_the_weight_matrix() {
        // z_u = w_u . x + b_u, so dz_u/dx = w_u at every point (closed form).
        let mut rng = ChaCha8Rng::seed_from_u64(30);
        let net = random_net(
            &mut rng,
            &[6, 4, 3],
            &[Activation::Tanh, Activation::Identity],
        );
        let at = [0.1f32, -0.2, 0.3, 0.0, 0.5, -0.9];
        let s = sensitivity(&net, 0, &at).unwrap();
        assert_eq!(s.maps, net.layers()[0].weights);
        let want = net.layers()[0]
            .weights
            .iter()
            .fold(0.0f32, |m, w| m.max(w.abs()));
        assert_eq!(s.max_abs, want);
        // A deeper layer: each row is the gradient of that unit at `at`.
        let s = sensitivity(&net, 1, &at).unwrap();
        let x = ndarray::Array2::from_shape_fn((1, 6), |(_, i)| at[i]);
        for u in 0..3 {
            let (_, g) = input_gradient(&net, 1, &[u], x.view());
            assert_eq!(s.maps.row(u), g.row(0));
        }
        assert!(sensitivity(&net, 2, &at).is_err());
        assert!(sensitivity(&net, 0, &at[..5]).is_err());
    }
}
