//! Random networks for the analysis modules' unit tests.

use crate::model::{Activation, Layer};
use ndarray::{Array1, Array2};
use rand::Rng;
use rand_chacha::ChaCha8Rng;

/// Dense layers `l0, l1, ...` of widths `sizes` (input first) with activations `acts`,
/// weights uniform in [-1, 1) and biases uniform in [-bias, bias), drawn from `rng` layer
/// by layer (weights, then biases).
pub(crate) fn random_layers(
    rng: &mut ChaCha8Rng,
    sizes: &[usize],
    acts: &[Activation],
    bias: f32,
) -> Vec<Layer> {
    acts.iter()
        .enumerate()
        .map(|(i, &act)| Layer {
            kind: crate::model::LayerKind::Dense,
            name: format!("l{i}"),
            activation: act,
            weights: Array2::from_shape_fn((sizes[i + 1], sizes[i]), |_| {
                rng.random_range(-1.0f32..1.0)
            }),
            bias: Array1::from_shape_fn(sizes[i + 1], |_| rng.random_range(-bias..bias)),
            labels: None,
        })
        .collect()
}
