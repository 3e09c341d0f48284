//! Property tests of the analysis core on random small networks (proptest): interval bounds
//! are sound and exact on the first layer, preferred inputs of first-layer units reach the
//! closed form and never beat the sound bound, and magnitude pruning zeroes exactly the
//! requested fraction.

use ndarray::{Array1, Array2};
use proptest::prelude::*;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use receptor::Network;
use receptor::analysis::{Silent, bounds, forward, prefer, prune};
use receptor::model::{Activation, InputSpec, Layer, Layout};

/// A random network with the given sizes; hidden activations drawn from every element-wise
/// activation of the schema, the last layer softmax or identity.
fn random_net(seed: u64, sizes: &[usize]) -> Network {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let n = sizes[0];
    let low: Vec<f32> = (0..n).map(|_| rng.random_range(-2.0f32..1.0)).collect();
    let high: Vec<f32> = low
        .iter()
        .map(|l| l + rng.random_range(0.0f32..2.0))
        .collect();
    let input = InputSpec {
        units: None,
        size: n,
        layout: Layout::Vector,
        low,
        high,
        names: None,
    };
    let hidden = [
        Activation::Identity,
        Activation::Relu,
        Activation::LeakyRelu { alpha: 0.05 },
        Activation::Sigmoid,
        Activation::Tanh,
    ];
    let last = sizes.len() - 2;
    let layers = (0..=last)
        .map(|i| {
            let activation = if i == last {
                if rng.random_bool(0.5) {
                    Activation::Softmax
                } else {
                    Activation::Identity
                }
            } else {
                hidden[rng.random_range(0..hidden.len())]
            };
            Layer {
                kind: receptor::model::LayerKind::Dense,
                name: format!("l{i}"),
                activation,
                weights: Array2::from_shape_fn((sizes[i + 1], sizes[i]), |_| {
                    rng.random_range(-1.5f32..1.5)
                }),
                bias: Array1::from_shape_fn(sizes[i + 1], |_| rng.random_range(-1.0f32..1.0)),
                labels: None,
            }
        })
        .collect();
    Network::new("test", "random", input, layers).expect("random network is valid")
}

fn sizes_strategy() -> impl Strategy<Value = Vec<usize>> {
    prop::collection::vec(1usize..7, 2..5)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    /// Soundness of interval bound propagation (Gowal et al. 2018): no input of the box
    /// gives a pre-activation outside the bounds (f32 forward pass, so a relative 1e-5
    /// slack); the first layer's bounds equal the closed-form range of an affine function
    /// over a box.
    #[test]
    fn bounds_contain_every_sampled_preactivation(seed in any::<u64>(), sizes in sizes_strategy()) {
        let net = random_net(seed, &sizes);
        let b = bounds::interval_bounds(&net);
        let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5eed);
        let n = net.input().size;
        let x = Array2::from_shape_fn((256, n), |(_, i)| {
            let (lo, hi) = (net.input().low[i], net.input().high[i]);
            match rng.random_range(0..3) {
                0 => lo,
                1 => hi,
                _ => lo + (hi - lo) * rng.random_range(0.0f32..=1.0),
            }
        });
        let t = forward::forward_trace(&net, x.view(), net.layers().len() - 1);
        for (l, pre) in t.pre.iter().enumerate() {
            for row in pre.rows() {
                for (k, &z) in row.iter().enumerate() {
                    let z = f64::from(z);
                    let slack = 1e-5 * (1.0 + b.upper[l][k].abs().max(b.lower[l][k].abs()));
                    prop_assert!(z <= b.upper[l][k] + slack, "layer {l} unit {k}: {z} > {}", b.upper[l][k]);
                    prop_assert!(z >= b.lower[l][k] - slack, "layer {l} unit {k}: {z} < {}", b.lower[l][k]);
                }
            }
        }
        for k in 0..net.layers()[0].units() {
            let (want, _) = prefer::closed_form_first_layer(&net, k);
            prop_assert!((b.upper[0][k] - want).abs() <= 1e-12 * want.abs().max(1.0));
        }
    }

    /// Magnitude pruning zeroes exactly round(fraction x weights) per layer (definition of
    /// pruning the k smallest |w|), keeps the other weights and the biases.
    #[test]
    fn pruning_is_exact(seed in any::<u64>(), sizes in sizes_strategy(), fraction in 0.0f64..=1.0) {
        let net = random_net(seed, &sizes);
        let p = prune::prune_by_magnitude(&net, fraction).unwrap();
        for (a, q) in net.layers().iter().zip(p.layers()) {
            let n = a.weights.len();
            let zeros = q.weights.iter().filter(|w| **w == 0.0).count();
            prop_assert_eq!(zeros, (fraction * n as f64).round() as usize);
            prop_assert_eq!(&a.bias, &q.bias);
            for (w, v) in a.weights.iter().zip(q.weights.iter()) {
                prop_assert!(*v == 0.0 || v == w);
            }
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(12))]

    /// Projected gradient ascent on a first-layer unit reaches the closed form
    /// b + sum max(w low, w high) (linear function over a box), and on deeper layers
    /// never exceeds the sound interval upper bound.
    #[test]
    fn prefer_reaches_closed_form_and_respects_bounds(seed in any::<u64>(), sizes in sizes_strategy()) {
        let net = random_net(seed, &sizes);
        let b = bounds::interval_bounds(&net);
        let opts = prefer::PreferOptions::new(200, 3, 0, 0.0, 0.0).expect("valid options");
        for layer in 0..net.layers().len() {
            let units: Vec<usize> = (0..net.layers()[layer].units()).collect();
            // The search itself (`prefer` answers the first layer from the closed form).
            let res = prefer::prefer_by_ascent(&net, layer, &units, &opts, &Silent).expect("prefer");
            for r in &res {
                prop_assert!(r.finite);
                for (i, &x) in r.input.iter().enumerate() {
                    prop_assert!(x >= net.input().low[i] && x <= net.input().high[i]);
                }
                let z = f64::from(r.preactivation);
                let ub = b.upper[layer][r.unit];
                prop_assert!(z <= ub + 1e-5 * (1.0 + ub.abs()), "layer {layer} unit {}: {z} > {ub}", r.unit);
                if layer == 0 {
                    let (want, _) = prefer::closed_form_first_layer(&net, r.unit);
                    prop_assert!((z - want).abs() <= 1e-4 * want.abs().max(1.0), "unit {}: {z} vs {want}", r.unit);
                }
            }
        }
    }
}
