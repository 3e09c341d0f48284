//! Interval bound propagation over the input box, in f64.
//!
//! S. Gowal et al., "On the effectiveness of interval bound propagation for training
//! verifiably robust models" (2018), eq. (6): for an affine layer `z = W a + b` and an
//! input interval `[lo, hi]`, the tightest interval of each `z_j` is
//! `b_j + sum_i min(w_ji lo_i, w_ji hi_i) .. b_j + sum_i max(w_ji lo_i, w_ji hi_i)`
//! (the same as the paper's centre/radius form `W c + b ± |W| r`). A monotone
//! non-decreasing activation maps `[lo, hi]` to `[f(lo), f(hi)]`, which gives the next
//! layer's input interval.
//!
//! Soundness: the bounds hold for the exact real-valued network. Weights and box ends are
//! f32 values, which f64 represents exactly; the sums are rounded to nearest in f64 (no
//! outward rounding), so a bound can be off by a relative ~1e-16, far below the f32
//! rounding of the forward pass itself. On the first layer the interval is exact: each
//! coordinate can reach its end of the box independently, so the closed form
//! `b + sum max(w lo, w hi)` is attained.
//!
//! All activations the schema allows are covered: identity, relu, leaky_relu (alpha >= 0),
//! sigmoid and tanh are non-decreasing; softmax only occurs in the last layer, whose
//! pre-activation bounds are reported and nothing is propagated past it.

use crate::model::{Activation, Network};
use ndarray::{Array1, ArrayView1};
use rayon::prelude::*;

/// Pre-activation bounds of every layer over the input box.
#[derive(Debug, Clone, PartialEq)]
pub struct Bounds {
    /// Lower bound of each layer's pre-activations, one `[units]` array per layer.
    pub lower: Vec<Array1<f64>>,
    /// Upper bound of each layer's pre-activations, one `[units]` array per layer.
    pub upper: Vec<Array1<f64>>,
}

/// The maximum and minimum of `b + w · a` over `a` in `[lo, hi]` (f64, exact per term).
/// `w`, `lo`, `hi`: `[inputs]`.
pub(crate) fn affine_range(w: ArrayView1<f32>, b: f32, lo: &[f64], hi: &[f64]) -> (f64, f64) {
    let mut up = f64::from(b);
    let mut dn = f64::from(b);
    for ((wi, l), h) in w.iter().zip(lo).zip(hi) {
        let wi = f64::from(*wi);
        let (a, c) = (wi * l, wi * h);
        up += a.max(c);
        dn += a.min(c);
    }
    (dn, up)
}

/// The image of `[lo, hi]` under a non-decreasing activation, computed in f64 with the
/// same formulas as [`Activation::apply_scalar`].
fn activate_f64(act: Activation, z: f64) -> f64 {
    match act {
        Activation::Identity | Activation::Softmax => z,
        Activation::Relu => z.max(0.0),
        Activation::LeakyRelu { alpha } => {
            if z > 0.0 {
                z
            } else {
                f64::from(alpha) * z
            }
        }
        Activation::Sigmoid => 1.0 / (1.0 + (-z).exp()),
        Activation::Tanh => z.tanh(),
    }
}

/// Interval bounds of every layer's pre-activations over the input box `[low, high]`
/// (Gowal et al. 2018). Exact on the first layer; sound (never below the true maximum,
/// never above the true minimum) on every layer.
pub fn interval_bounds(net: &Network) -> Bounds {
    let mut lo: Vec<f64> = net.input.low.iter().map(|&v| f64::from(v)).collect();
    let mut hi: Vec<f64> = net.input.high.iter().map(|&v| f64::from(v)).collect();
    let mut lower = Vec::with_capacity(net.layers.len());
    let mut upper = Vec::with_capacity(net.layers.len());
    for layer in &net.layers {
        let ranges: Vec<(f64, f64)> = (0..layer.units())
            .into_par_iter()
            .map(|k| affine_range(layer.weights.row(k), layer.bias[k], &lo, &hi))
            .collect();
        let zl: Array1<f64> = ranges.iter().map(|r| r.0).collect();
        let zu: Array1<f64> = ranges.iter().map(|r| r.1).collect();
        // Softmax is the last layer; nothing after it needs the next interval.
        lo = zl
            .iter()
            .map(|&z| activate_f64(layer.activation, z))
            .collect();
        hi = zu
            .iter()
            .map(|&z| activate_f64(layer.activation, z))
            .collect();
        lower.push(zl);
        upper.push(zu);
    }
    Bounds { lower, upper }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::forward::forward_trace;
    use crate::model::{InputSpec, Layer, Layout};
    use approx::assert_abs_diff_eq;
    use ndarray::{Array2, array};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random_net(seed: u64, acts: &[Activation], sizes: &[usize]) -> Network {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let n = sizes[0];
        let low: Vec<f32> = (0..n).map(|_| rng.random_range(-1.0f32..0.0)).collect();
        let high: Vec<f32> = low
            .iter()
            .map(|l| l + rng.random_range(0.1f32..2.0))
            .collect();
        let input = InputSpec {
            size: n,
            layout: Layout::Vector,
            low,
            high,
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
                bias: Array1::from_shape_fn(sizes[i + 1], |_| rng.random_range(-0.5f32..0.5)),
                labels: None,
            })
            .collect();
        Network::new("test", "t", input, layers).expect("valid")
    }

    #[test]
    fn first_layer_bounds_equal_the_closed_form() {
        // Closed form of a linear function's range over a box: max is
        // b + sum_i max(w_i lo_i, w_i hi_i), min is b + sum_i min(w_i lo_i, w_i hi_i)
        // (each coordinate is free; textbook linear programming over a box).
        let net = random_net(1, &[Activation::Relu, Activation::Softmax], &[7, 5, 3]);
        let b = interval_bounds(&net);
        let l = &net.layers[0];
        for k in 0..l.units() {
            let mut up = f64::from(l.bias[k]);
            let mut dn = f64::from(l.bias[k]);
            for i in 0..7 {
                let w = f64::from(l.weights[[k, i]]);
                let lo = f64::from(net.input.low[i]);
                let hi = f64::from(net.input.high[i]);
                if w >= 0.0 {
                    up += w * hi;
                    dn += w * lo;
                } else {
                    up += w * lo;
                    dn += w * hi;
                }
            }
            assert_abs_diff_eq!(b.upper[0][k], up, epsilon = 1e-12);
            assert_abs_diff_eq!(b.lower[0][k], dn, epsilon = 1e-12);
        }
        // Attained: the vertex picking hi where w > 0 gives the upper bound (f32 forward,
        // so up to f32 rounding).
        for k in 0..l.units() {
            let x = Array2::from_shape_fn((1, 7), |(_, i)| {
                if l.weights[[k, i]] > 0.0 {
                    net.input.high[i]
                } else {
                    net.input.low[i]
                }
            });
            let t = forward_trace(&net, x.view(), 0);
            assert_abs_diff_eq!(f64::from(t.pre[0][[0, k]]), b.upper[0][k], epsilon = 1e-5);
        }
    }

    #[test]
    fn bounds_are_sound_on_random_inputs_for_every_activation() {
        // Soundness (Gowal et al. 2018): every sampled pre-activation lies inside the
        // bounds. Tolerance 1e-4 covers the f32 rounding of the sampled forward pass.
        let acts = [
            Activation::Identity,
            Activation::Relu,
            Activation::LeakyRelu { alpha: 0.2 },
            Activation::Sigmoid,
            Activation::Tanh,
        ];
        for (s, &act) in acts.iter().enumerate() {
            let net = random_net(
                10 + s as u64,
                &[act, act, Activation::Softmax],
                &[6, 8, 5, 3],
            );
            let b = interval_bounds(&net);
            let mut rng = ChaCha8Rng::seed_from_u64(100 + s as u64);
            let rows = 2000;
            let x = Array2::from_shape_fn((rows, 6), |(_, i)| {
                let (lo, hi) = (net.input.low[i], net.input.high[i]);
                // Include the box corners often: they are where linear maxima sit.
                match rng.random_range(0..4) {
                    0 => lo,
                    1 => hi,
                    _ => rng.random_range(lo..=hi),
                }
            });
            let t = forward_trace(&net, x.view(), 2);
            for l in 0..3 {
                for row in t.pre[l].rows() {
                    for (k, &z) in row.iter().enumerate() {
                        let z = f64::from(z);
                        assert!(
                            z <= b.upper[l][k] + 1e-4,
                            "{act:?} layer {l} unit {k}: {z} > {}",
                            b.upper[l][k]
                        );
                        assert!(
                            z >= b.lower[l][k] - 1e-4,
                            "{act:?} layer {l} unit {k}: {z} < {}",
                            b.lower[l][k]
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn hand_computed_two_layer_bounds() {
        // x in [0, 1]^2. h = relu(x0 - x1): z in [-1, 1], a in [0, 1].
        // out = 2 h - 1: z in [-1, 1].
        let input = InputSpec {
            size: 2,
            layout: Layout::Vector,
            low: vec![0.0; 2],
            high: vec![1.0; 2],
            names: None,
        };
        let h = Layer {
            name: "h".into(),
            activation: Activation::Relu,
            weights: array![[1.0, -1.0]],
            bias: array![0.0],
            labels: None,
        };
        let o = Layer {
            name: "o".into(),
            activation: Activation::Identity,
            weights: array![[2.0]],
            bias: array![-1.0],
            labels: None,
        };
        let net = Network::new("test", "t", input, vec![h, o]).expect("valid");
        let b = interval_bounds(&net);
        assert_eq!(b.lower[0][0], -1.0);
        assert_eq!(b.upper[0][0], 1.0);
        assert_eq!(b.lower[1][0], -1.0);
        assert_eq!(b.upper[1][0], 1.0);
    }
}
