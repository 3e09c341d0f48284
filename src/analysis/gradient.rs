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

use super::forward::{activate_in_place, gathered_preactivation, gemm_into, linear};
use crate::model::{Activation, Network};
use ndarray::{Array1, Array2, ArrayView2, ArrayViewMut2, s};
use rayon::prelude::*;

/// Rows processed together in one pass. Bounds the memory of the intermediate
/// `[rows, units]` arrays (4096 x 2048 f32 is 32 MiB) while keeping every matrix product
/// large enough to run at full speed.
pub(crate) const GRAD_BLOCK_ROWS: usize = 4096;

/// The pre-activation `z` of unit `units[b]` of `layer` for each row `b` of
/// `x: [samples, inputs]` (or of `units[0]` for every row when `units.len() == 1`), and
/// `dz/dx: [samples, inputs]`.
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
    assert!(
        layer < net.layers.len(),
        "input_gradient: layer {layer} of {}",
        net.layers.len()
    );
    assert_eq!(
        x.ncols(),
        net.input.size,
        "input_gradient: batch has {} columns but the network has {} inputs",
        x.ncols(),
        net.input.size
    );
    let rows = x.nrows();
    assert!(
        units.len() == 1 || units.len() == rows,
        "input_gradient: {} units for {rows} rows",
        units.len()
    );
    let n_units = net.layers[layer].units();
    assert!(
        units.iter().all(|&u| u < n_units),
        "input_gradient: unit out of range for layer '{}' with {n_units} units",
        net.layers[layer].name
    );
    let mut z = Array1::<f32>::zeros(rows);
    let mut grad = Array2::<f32>::zeros((rows, net.input.size));
    let mut start = 0;
    while start < rows {
        let end = (start + GRAD_BLOCK_ROWS).min(rows);
        let block_units: &[usize] = if units.len() == 1 {
            units
        } else {
            &units[start..end]
        };
        let zb = gradient_block(
            net,
            layer,
            block_units,
            x.slice(s![start..end, ..]),
            &mut grad.slice_mut(s![start..end, ..]),
        );
        z.slice_mut(s![start..end]).assign(&zb);
        start = end;
    }
    (z, grad)
}

/// One block of [`input_gradient`]: writes `dz/dx` into `grad: [rows, inputs]` and returns
/// `z: [rows]`.
fn gradient_block(
    net: &Network,
    layer: usize,
    units: &[usize],
    x: ArrayView2<f32>,
    grad: &mut ArrayViewMut2<f32>,
) -> Array1<f32> {
    let rows = x.nrows();
    let unit_of = |b: usize| if units.len() == 1 { units[0] } else { units[b] };
    let target = &net.layers[layer];
    if layer == 0 {
        // dz/dx of a first-layer unit is its weight row.
        let z = gathered_preactivation(x, target.weights.view(), target.bias.view(), &unit_of);
        for (b, mut g) in grad.rows_mut().into_iter().enumerate() {
            g.assign(&target.weights.row(unit_of(b)));
        }
        return z;
    }
    // Forward through the layers below the target, keeping each pre-activation for the
    // backward pass and only the last activation.
    let mut pre: Vec<Array2<f32>> = Vec::with_capacity(layer);
    let mut a: Option<Array2<f32>> = None;
    for l in &net.layers[..layer] {
        let input = a.as_ref().map_or(x, |v| v.view());
        let zl = linear(input, l.weights.view(), l.bias.view());
        let mut al = zl.clone();
        activate_in_place(l.activation, &mut al);
        pre.push(zl);
        a = Some(al);
    }
    let a = a.unwrap_or_else(|| x.to_owned());
    let z = gathered_preactivation(
        a.view(),
        target.weights.view(),
        target.bias.view(),
        &unit_of,
    );
    drop(a);

    // delta_{L-1}[b, j] = W_L[u_b, j] * f'(z_{L-1}[b, j]), written over z_{L-1}.
    let mut delta = pre.pop().unwrap_or_else(|| Array2::zeros((rows, 0)));
    let below = &net.layers[layer - 1];
    let width = delta.ncols();
    scale_rows_by_derivative(
        &mut delta,
        below.activation,
        target.weights.view(),
        &unit_of,
    );
    debug_assert_eq!(width, below.units());

    // Back through layers layer-1 .. 1.
    for l in (1..layer).rev() {
        let w = net.layers[l].weights.view(); // [units_l, units_{l-1}]
        let mut zprev = pre.pop().unwrap_or_else(|| Array2::zeros((rows, 0)));
        // zprev := (delta · W_l) ⊙ f'(zprev), computed into a fresh product then scaled.
        let mut prod = Array2::<f32>::zeros((rows, w.ncols()));
        gemm_into(&mut prod.view_mut(), delta.view(), w, false);
        multiply_by_derivative(&mut prod, &zprev, net.layers[l - 1].activation);
        std::mem::swap(&mut zprev, &mut prod);
        delta = zprev;
    }
    gemm_into(grad, delta.view(), net.layers[0].weights.view(), false);
    z
}

/// `z[b, :] := w[unit_of(b), :] ⊙ f'(z[b, :])` for every row, in parallel.
/// `z: [rows, inputs]`, `w: [units, inputs]`.
fn scale_rows_by_derivative(
    z: &mut Array2<f32>,
    act: Activation,
    w: ArrayView2<f32>,
    unit_of: &(dyn Fn(usize) -> usize + Sync),
) {
    let width = z.ncols();
    if width == 0 || z.nrows() == 0 {
        return;
    }
    let apply = |b: usize, row: &mut [f32]| {
        for (v, wj) in row.iter_mut().zip(w.row(unit_of(b)).iter()) {
            *v = wj * act.derivative_scalar(*v);
        }
    };
    match z.as_slice_mut() {
        Some(flat) => flat
            .par_chunks_mut(width)
            .enumerate()
            .for_each(|(b, row)| apply(b, row)),
        None => {
            for (b, mut row) in z.rows_mut().into_iter().enumerate() {
                for (v, wj) in row.iter_mut().zip(w.row(unit_of(b)).iter()) {
                    *v = wj * act.derivative_scalar(*v);
                }
            }
        }
    }
}

/// `prod := prod ⊙ f'(z)` element-wise (`prod`, `z`: `[rows, units]`), in parallel.
fn multiply_by_derivative(prod: &mut Array2<f32>, z: &Array2<f32>, act: Activation) {
    let width = prod.ncols();
    if width == 0 || prod.nrows() == 0 {
        return;
    }
    if matches!(act, Activation::Identity) {
        return;
    }
    match (prod.as_slice_mut(), z.as_slice()) {
        (Some(p), Some(zs)) => {
            p.par_chunks_mut(width)
                .zip(zs.par_chunks(width))
                .for_each(|(pr, zr)| {
                    for (pv, zv) in pr.iter_mut().zip(zr) {
                        *pv *= act.derivative_scalar(*zv);
                    }
                });
        }
        _ => prod.zip_mut_with(z, |pv, zv| *pv *= act.derivative_scalar(*zv)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::forward::forward_trace;
    use crate::model::{InputSpec, Layer, Layout};
    use approx::assert_abs_diff_eq;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random_net(rng: &mut ChaCha8Rng, sizes: &[usize], acts: &[Activation]) -> Network {
        let input = InputSpec {
            size: sizes[0],
            layout: Layout::Vector,
            low: vec![-1.0; sizes[0]],
            high: vec![1.0; sizes[0]],
            names: None,
        };
        let layers = acts
            .iter()
            .enumerate()
            .map(|(i, &act)| Layer {
                name: format!("l{i}"),
                activation: act,
                weights: Array2::from_shape_fn((sizes[i + 1], sizes[i]), |_| {
                    rng.random_range(-1.0f32..1.0)
                }),
                bias: Array1::from_shape_fn(sizes[i + 1], |_| rng.random_range(-0.3f32..0.3)),
                labels: None,
            })
            .collect();
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
            let n_units = net.layers[layer].units();
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
}
