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
//! Tightening (sound, never looser): after plain propagation, the bounds of each layer
//! `L >= 1` are recomputed by back-substitution to the input (the linear relaxations of
//! Singh et al., "An abstract domain for certifying neural networks", POPL 2019, known as
//! DeepPoly): each activation of the layers below is replaced by a lower and an upper line
//! valid on its interval (identity: exact; relu / leaky_relu: exact when the sign is fixed,
//! else the chord above and a line through the origin below; sigmoid / tanh: the constants
//! f(lo) and f(hi), which reproduce plain propagation), the resulting linear function of
//! the input is bounded exactly over the box, and the tighter of the two bounds is kept.
//! Back-substitution costs about `2 x units_L x sum_l units_l x units_(l-1)` multiply-adds
//! for layer L, so it is done only for layers where that is at most
//! [`BACKSUB_MAX_MACS`]; other layers keep the plain interval.
//!
//! All activations the schema allows are covered: identity, relu, leaky_relu (alpha >= 0),
//! sigmoid and tanh are non-decreasing; softmax only occurs in the last layer, whose
//! pre-activation bounds are reported and nothing is propagated past it.

use crate::model::{Activation, LayerKind, Network};
use ndarray::{Array1, Array2, ArrayView1};
use rayon::prelude::*;

/// Pre-activation bounds of every layer over the input box.
#[derive(Debug, Clone, PartialEq)]
pub struct Bounds {
    /// Lower bound of each layer's pre-activations, one array per layer, `[output values]`:
    /// `[units]` for a dense layer, `[channels x height x width]` (channel first) for a map.
    pub lower: Vec<Array1<f64>>,
    /// Upper bound of each layer's pre-activations, shaped as `lower`.
    pub upper: Vec<Array1<f64>>,
}

impl Bounds {
    /// The upper bound of unit `k` of layer `l` over every position: the largest upper
    /// bound of channel `k`'s values on a map, the unit's own bound on a vector.
    pub fn unit_upper(&self, net: &Network, l: usize, k: usize) -> f64 {
        let p = net.output_shape(l).positions();
        self.upper[l]
            .iter()
            .skip(k * p)
            .take(p)
            .fold(f64::NEG_INFINITY, |m, &v| m.max(v))
    }

    /// The lower bound of unit `k` of layer `l` over every position (see
    /// [`Bounds::unit_upper`]).
    pub fn unit_lower(&self, net: &Network, l: usize, k: usize) -> f64 {
        let p = net.output_shape(l).positions();
        self.lower[l]
            .iter()
            .skip(k * p)
            .take(p)
            .fold(f64::INFINITY, |m, &v| m.min(v))
    }
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
pub(crate) fn activate_f64(act: Activation, z: f64) -> f64 {
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

/// Largest back-substitution cost (multiply-adds) spent on one layer; beyond it the layer
/// keeps its plain interval bounds. 5e8 takes well under a second on a laptop core (common
/// practice, no source; keeps `screen` on large models as fast as plain propagation).
pub const BACKSUB_MAX_MACS: f64 = 5e8;

/// Plain interval bound propagation (Gowal et al. 2018): the pre-activation interval of
/// every layer over the input box, each layer from the previous layer's interval.
pub fn plain_interval_bounds(net: &Network) -> Bounds {
    let mut lo: Vec<f64> = net.input().low.iter().map(|&v| f64::from(v)).collect();
    let mut hi: Vec<f64> = net.input().high.iter().map(|&v| f64::from(v)).collect();
    let mut lower = Vec::with_capacity(net.layers().len());
    let mut upper = Vec::with_capacity(net.layers().len());
    for (l, layer) in net.layers().iter().enumerate() {
        let (zl, zu): (Array1<f64>, Array1<f64>) = if layer.kind == LayerKind::Dense {
            let ranges: Vec<(f64, f64)> = (0..layer.units())
                .into_par_iter()
                .map(|k| affine_range(layer.weights.row(k), layer.bias[k], &lo, &hi))
                .collect();
            (
                ranges.iter().map(|r| r.0).collect(),
                ranges.iter().map(|r| r.1).collect(),
            )
        } else {
            let (a, b) = super::conv::interval(net, l, &lo, &hi);
            (Array1::from_vec(a), Array1::from_vec(b))
        };
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

/// Sound pre-activation bounds of every layer over the input box `[low, high]`: plain
/// interval bound propagation (Gowal et al. 2018), tightened by back-substitution where it
/// is cheap (module docs). Exact on the first layer; never looser than
/// [`plain_interval_bounds`] on any layer.
pub fn interval_bounds(net: &Network) -> Bounds {
    interval_bounds_upto(net, net.layers().len())
}

/// [`interval_bounds`] with back-substitution only for layers `< tighten_below` (the
/// others keep plain bounds); `screen` uses it to skip work on the output layer, whose
/// bounds it does not report.
pub(crate) fn interval_bounds_upto(net: &Network, tighten_below: usize) -> Bounds {
    let plain = plain_interval_bounds(net);
    let mut lower = plain.lower;
    let mut upper = plain.upper;
    let input = net.input().size as f64;
    // Back-substitution runs through dense layers only: it stops at the first layer that
    // is not dense, and every target above it keeps its plain bounds.
    let dense_prefix = net
        .layers()
        .iter()
        .position(|l| l.kind != LayerKind::Dense)
        .unwrap_or(net.layers().len());
    for target in 1..net.layers().len().min(tighten_below).min(dense_prefix) {
        let n_t = net.layers()[target].units() as f64;
        let cost: f64 = 2.0
            * n_t
            * (0..target)
                .map(|l| {
                    let below = if l == 0 {
                        input
                    } else {
                        net.layers()[l - 1].units() as f64
                    };
                    net.layers()[l].units() as f64 * below
                })
                .sum::<f64>();
        if cost > BACKSUB_MAX_MACS {
            continue;
        }
        // Re-propagate the plain interval from the tightened layer below, then intersect
        // with back-substitution: both are sound, so their intersection is.
        let below = &net.layers()[target - 1];
        let lo_a: Vec<f64> = lower[target - 1]
            .iter()
            .map(|&z| activate_f64(below.activation, z))
            .collect();
        let hi_a: Vec<f64> = upper[target - 1]
            .iter()
            .map(|&z| activate_f64(below.activation, z))
            .collect();
        let (bl, bu) = back_substitute(net, target, &lower, &upper);
        let layer = &net.layers()[target];
        for k in 0..layer.units() {
            let (dn, up) = affine_range(layer.weights.row(k), layer.bias[k], &lo_a, &hi_a);
            // f64::min / max ignore a NaN operand, so an overflowed estimate never wins.
            upper[target][k] = upper[target][k].min(up).min(bu[k]);
            lower[target][k] = lower[target][k].max(dn).max(bl[k]);
        }
    }
    Bounds { lower, upper }
}

/// Lower and upper relaxation lines `(slope, intercept)` of `a = f(z)` on `z in [l, u]`:
/// `lower.0 z + lower.1 <= f(z) <= upper.0 z + upper.1` for every z in the interval.
fn relaxation(act: Activation, l: f64, u: f64) -> ((f64, f64), (f64, f64)) {
    let alpha = match act {
        Activation::Relu => 0.0,
        Activation::LeakyRelu { alpha } => f64::from(alpha),
        Activation::Identity | Activation::Softmax => return ((1.0, 0.0), (1.0, 0.0)),
        Activation::Sigmoid | Activation::Tanh => {
            return ((0.0, activate_f64(act, l)), (0.0, activate_f64(act, u)));
        }
    };
    if !(l.is_finite() && u.is_finite()) {
        return ((0.0, activate_f64(act, l)), (0.0, activate_f64(act, u)));
    }
    if l >= 0.0 {
        ((1.0, 0.0), (1.0, 0.0))
    } else if u <= 0.0 {
        ((alpha, 0.0), (alpha, 0.0))
    } else {
        // f(z) = max(z, alpha z) is convex (0 <= alpha <= 1): the chord through
        // (l, alpha l) and (u, u) lies above it; any line through the origin with a slope
        // in [alpha, 1] lies below it (DeepPoly picks the one closer to the function).
        let s = (u - alpha * l) / (u - l);
        let lower_slope = if u > -l { 1.0 } else { alpha };
        ((lower_slope, 0.0), (s, alpha * l - s * l))
    }
}

/// Back-substitution bounds of layer `target`'s pre-activations (module docs), given sound
/// intervals `lower`/`upper` of the layers below. Returns `(lower, upper)`, `[units]` each.
fn back_substitute(
    net: &Network,
    target: usize,
    lower: &[Array1<f64>],
    upper: &[Array1<f64>],
) -> (Vec<f64>, Vec<f64>) {
    let t = &net.layers()[target];
    // Upper (cu, du) and lower (cl, dl) linear expressions, coefficients [units_t, width].
    let mut cu: Array2<f64> = t.weights.mapv(f64::from);
    let mut du: Array1<f64> = t.bias.mapv(f64::from);
    let mut cl = cu.clone();
    let mut dl = du.clone();
    // Scale of the rounding error: sum of |terms| seen, per unit.
    let mut mag: Array1<f64> = du.mapv(f64::abs);
    for l in (0..target).rev() {
        let layer = &net.layers()[l];
        let lines: Vec<((f64, f64), (f64, f64))> = (0..layer.units())
            .map(|i| relaxation(layer.activation, lower[l][i], upper[l][i]))
            .collect();
        for j in 0..cu.nrows() {
            for (i, &(lo_line, up_line)) in lines.iter().enumerate() {
                let c = cu[[j, i]];
                let (s, b) = if c >= 0.0 { up_line } else { lo_line };
                du[j] += c * b;
                mag[j] += (c * b).abs();
                cu[[j, i]] = c * s;
                let c = cl[[j, i]];
                let (s, b) = if c >= 0.0 { lo_line } else { up_line };
                dl[j] += c * b;
                mag[j] += (c * b).abs();
                cl[[j, i]] = c * s;
            }
        }
        // Substitute z_l = W_l a_(l-1) + b_l (a_(-1) = x).
        let w: Array2<f64> = layer.weights.mapv(f64::from);
        let b: Array1<f64> = layer.bias.mapv(f64::from);
        du += &cu.dot(&b);
        dl += &cl.dot(&b);
        mag += &cu.mapv(f64::abs).dot(&b.mapv(f64::abs));
        cu = cu.dot(&w);
        cl = cl.dot(&w);
    }
    let lo: Vec<f64> = net.input().low.iter().map(|&v| f64::from(v)).collect();
    let hi: Vec<f64> = net.input().high.iter().map(|&v| f64::from(v)).collect();
    let mut out_l = Vec::with_capacity(cu.nrows());
    let mut out_u = Vec::with_capacity(cu.nrows());
    for j in 0..cu.nrows() {
        let mut up = du[j];
        let mut dn = dl[j];
        let mut m = mag[j];
        for i in 0..lo.len() {
            let (a, c) = (cu[[j, i]] * lo[i], cu[[j, i]] * hi[i]);
            up += a.max(c);
            let (a2, c2) = (cl[[j, i]] * lo[i], cl[[j, i]] * hi[i]);
            dn += a2.min(c2);
            m += a.abs().max(c.abs()) + a2.abs().max(c2.abs());
        }
        // Outward slack for the f64 rounding of a few thousand operations (relative 1e-12
        // of the magnitudes involved, far above the ~1e-16 per operation).
        let slack = 1e-12 * m;
        out_u.push(up + slack);
        out_l.push(dn - slack);
    }
    (out_l, out_u)
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
            units: None,
            size: n,
            layout: Layout::Vector,
            low,
            high,
            names: None,
        };
        let layers = crate::analysis::test_nets::random_layers(&mut rng, sizes, acts, 0.5);
        Network::new("test", "t", input, layers).expect("valid")
    }

    #[test]
    fn first_layer_bounds_equal_the_closed_form() {
        // Closed form of a linear function's range over a box: max is
        // b + sum_i max(w_i lo_i, w_i hi_i), min is b + sum_i min(w_i lo_i, w_i hi_i)
        // (each coordinate is free; textbook linear programming over a box).
        let net = random_net(1, &[Activation::Relu, Activation::Softmax], &[7, 5, 3]);
        let b = interval_bounds(&net);
        let l = &net.layers()[0];
        for k in 0..l.units() {
            let mut up = f64::from(l.bias[k]);
            let mut dn = f64::from(l.bias[k]);
            for i in 0..7 {
                let w = f64::from(l.weights[[k, i]]);
                let lo = f64::from(net.input().low[i]);
                let hi = f64::from(net.input().high[i]);
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
                    net.input().high[i]
                } else {
                    net.input().low[i]
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
                let (lo, hi) = (net.input().low[i], net.input().high[i]);
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
    fn back_substitution_is_exact_for_linear_layers_and_never_looser() {
        // x in [0, 1]^2, identity hidden layer h = (x0 + x1, x0 - x1), out z = h0 + h1.
        // By hand: z = 2 x0, so its true range is [0, 2]. Plain IBP (Gowal et al. 2018):
        // h0 in [0, 2], h1 in [-1, 1], so z in [-1, 3]. Back-substitution with identity
        // relaxations is exact (Singh et al. 2019).
        let input = InputSpec::vector_box(2, 0.0, 1.0);
        let h = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "h".into(),
            activation: Activation::Identity,
            weights: array![[1.0, 1.0], [1.0, -1.0]],
            bias: array![0.0, 0.0],
            labels: None,
        };
        let o = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "o".into(),
            activation: Activation::Identity,
            weights: array![[1.0, 1.0]],
            bias: array![0.0],
            labels: None,
        };
        let net = Network::new("test", "t", input, vec![h, o]).expect("valid");
        let p = plain_interval_bounds(&net);
        assert_abs_diff_eq!(p.lower[1][0], -1.0, epsilon = 1e-12);
        assert_abs_diff_eq!(p.upper[1][0], 3.0, epsilon = 1e-12);
        let b = interval_bounds(&net);
        assert_abs_diff_eq!(b.lower[1][0], 0.0, epsilon = 1e-9);
        assert_abs_diff_eq!(b.upper[1][0], 2.0, epsilon = 1e-9);

        // Random rectifier networks: never looser than plain IBP, first layer identical.
        for seed in 0..20 {
            let net = random_net(
                200 + seed,
                &[
                    Activation::Relu,
                    Activation::LeakyRelu { alpha: 0.1 },
                    Activation::Identity,
                ],
                &[5, 9, 7, 3],
            );
            let p = plain_interval_bounds(&net);
            let b = interval_bounds(&net);
            assert_eq!(p.upper[0], b.upper[0]);
            assert_eq!(p.lower[0], b.lower[0]);
            for l in 1..3 {
                for k in 0..b.upper[l].len() {
                    assert!(b.upper[l][k] <= p.upper[l][k]);
                    assert!(b.lower[l][k] >= p.lower[l][k]);
                    assert!(b.lower[l][k] <= b.upper[l][k]);
                }
            }
        }
    }

    #[test]
    fn hand_computed_two_layer_bounds() {
        // x in [0, 1]^2. h = relu(x0 - x1): z in [-1, 1], a in [0, 1].
        // out = 2 h - 1: z in [-1, 1].
        let input = InputSpec::vector_box(2, 0.0, 1.0);
        let h = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "h".into(),
            activation: Activation::Relu,
            weights: array![[1.0, -1.0]],
            bias: array![0.0],
            labels: None,
        };
        let o = Layer {
            kind: crate::model::LayerKind::Dense,
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
