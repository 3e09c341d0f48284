//! Attribution of one sample's drive of a unit to the inputs: integrated gradients
//! (M. Sundararajan, A. Taly & Q. Yan, "Axiomatic attribution for deep networks", ICML 2017,
//! equation 1), `IG_i(x) = (x_i - x'_i) * integral_0^1 dz/dx_i(x' + a (x - x')) da`, from a
//! baseline `x'` to the sample `x`, for the pre-activation `z` of one unit.
//!
//! The integral is approximated by the trapezoid rule on `steps` equal intervals (the paper's
//! section 3 uses a Riemann sum; the trapezoid rule has the smaller error, O(1/steps^2) for
//! a smooth path). All `steps + 1` gradients are one batch ([`super::gradient`]).
//! Completeness (the paper's Proposition 1): the attributions sum to `z(x) - z(x')`, up to
//! the integration error, which [`Attribution::gap`] reports.

use super::forward::forward_trace;
use super::gradient::input_gradient;
use crate::error::{Error, Result};
use crate::model::Network;
use ndarray::Array2;

/// Default number of integration intervals (the paper reports 20 to 300 steps suffice).
pub const DEFAULT_IG_STEPS: usize = 64;
/// Most integration intervals accepted (the batch holds `steps + 1` inputs).
pub const MAX_IG_STEPS: usize = 100_000;

/// The integrated gradients of one unit for one sample.
#[derive(Debug, Clone, PartialEq)]
pub struct Attribution {
    /// Layer index.
    pub layer: usize,
    /// Unit index.
    pub unit: usize,
    /// Per input, `[input size]`.
    pub values: Vec<f32>,
    /// z at the sample.
    pub z_sample: f32,
    /// z at the baseline.
    pub z_baseline: f32,
    /// The sum of the attributions (f64).
    pub sum: f64,
    /// Integration intervals used.
    pub steps: usize,
}

impl Attribution {
    /// `sum - (z_sample - z_baseline)`: the integration error the completeness axiom
    /// measures (0 for an exact integral).
    pub fn gap(&self) -> f64 {
        self.sum - (f64::from(self.z_sample) - f64::from(self.z_baseline))
    }
}

/// Integrated gradients of unit `unit` of `layer` from `baseline` to `sample` (both
/// `[input size]`) with `steps` trapezoid intervals.
///
/// # Errors
/// [`Error::BadOption`] for a layer or unit the model does not have, a sample or baseline
/// of the wrong length or with a non-finite value, or `steps` outside `1..=MAX_IG_STEPS`.
pub fn integrated_gradients(
    net: &Network,
    layer: usize,
    unit: usize,
    sample: &[f32],
    baseline: &[f32],
    steps: usize,
) -> Result<Attribution> {
    let Some(l) = net.layers().get(layer) else {
        return Err(Error::bad_option(
            "layer",
            layer,
            format!("must be a layer index below {}", net.layers().len()),
        ));
    };
    if unit >= l.units() {
        return Err(Error::bad_option(
            "unit",
            unit,
            format!(
                "must be below {}, the units of layer '{}'",
                l.units(),
                l.name
            ),
        ));
    }
    let n = net.input().size;
    for (what, v) in [("sample", sample), ("baseline", baseline)] {
        if v.len() != n {
            return Err(Error::bad_option(
                what,
                format!("{} values", v.len()),
                format!("must have one value per input ({n})"),
            ));
        }
        if v.iter().any(|x| !x.is_finite()) {
            return Err(Error::bad_option(
                what,
                "a NaN or infinity",
                "must be finite",
            ));
        }
    }
    if steps == 0 || steps > MAX_IG_STEPS {
        return Err(Error::bad_option(
            "steps",
            steps,
            format!("must be between 1 and {MAX_IG_STEPS}"),
        ));
    }
    let path = Array2::from_shape_fn((steps + 1, n), |(k, i)| {
        let a = k as f32 / steps as f32;
        baseline[i] + a * (sample[i] - baseline[i])
    });
    let (_, grads) = input_gradient(net, layer, &[unit], path.view());
    let mut values = Vec::with_capacity(n);
    for i in 0..n {
        let col = grads.column(i);
        let inner: f64 = (1..steps).map(|k| f64::from(col[k])).sum();
        let avg = (0.5 * (f64::from(col[0]) + f64::from(col[steps])) + inner) / steps as f64;
        values.push((f64::from(sample[i] - baseline[i]) * avg) as f32);
    }
    let ends = Array2::from_shape_fn(
        (2, n),
        |(r, i)| if r == 0 { sample[i] } else { baseline[i] },
    );
    let t = forward_trace(net, ends.view(), layer);
    let sum = values.iter().map(|v| f64::from(*v)).sum();
    Ok(Attribution {
        layer,
        unit,
        values,
        z_sample: t.pre[layer][[0, unit]],
        z_baseline: t.pre[layer][[1, unit]],
        sum,
        steps,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Activation, InputSpec};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn net(seed: u64, acts: &[Activation]) -> Network {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let input = InputSpec::vector_box(6, -1.0, 1.0);
        let layers = crate::analysis::test_nets::random_layers(&mut rng, &[6, 5, 4, 3], acts, 0.5);
        Network::new("test", "t", input, layers).expect("valid")
    }

    #[test]
    fn linear_unit_gets_its_closed_form() {
        // z = w . x + b has the constant gradient w, so the integral is exact at any step
        // count: IG_i = w_i (x_i - x'_i) (the paper's definition with a constant integrand).
        let n = net(
            1,
            &[Activation::Tanh, Activation::Relu, Activation::Identity],
        );
        let x = [0.5f32, -0.25, 1.0, 0.0, -1.0, 0.75];
        let base = [0.1f32, 0.2, -0.3, 0.4, 0.0, -0.5];
        for steps in [1, 7] {
            let a = integrated_gradients(&n, 0, 2, &x, &base, steps).expect("ig");
            for i in 0..6 {
                let want = f64::from(n.layers()[0].weights[[2, i]]) * f64::from(x[i] - base[i]);
                approx::assert_abs_diff_eq!(f64::from(a.values[i]), want, epsilon = 1e-6);
            }
            approx::assert_abs_diff_eq!(a.gap(), 0.0, epsilon = 1e-5);
        }
    }

    #[test]
    fn completeness_holds_within_the_integration_error() {
        // Proposition 1 of the paper: sum_i IG_i = z(x) - z(x'). The trapezoid rule's error
        // falls as 1/steps^2 on a smooth (tanh, sigmoid) network.
        let n = net(
            2,
            &[Activation::Tanh, Activation::Sigmoid, Activation::Identity],
        );
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        for _ in 0..5 {
            let x: Vec<f32> = (0..6).map(|_| rng.random_range(-1.0f32..1.0)).collect();
            let base = vec![0.0f32; 6];
            let coarse = integrated_gradients(&n, 2, 1, &x, &base, 8).expect("ig");
            let fine = integrated_gradients(&n, 2, 1, &x, &base, 256).expect("ig");
            let scale = f64::from((coarse.z_sample - coarse.z_baseline).abs()).max(1e-3);
            assert!(
                fine.gap().abs() <= 1e-3 * scale.max(1.0),
                "gap {}",
                fine.gap()
            );
            assert!(fine.gap().abs() <= coarse.gap().abs() + 1e-6);
        }
        // ReLU networks are piecewise linear: the gap stays small with enough steps.
        let r = net(
            4,
            &[Activation::Relu, Activation::Relu, Activation::Identity],
        );
        let x = [0.9f32, -0.8, 0.7, -0.6, 0.5, -0.4];
        let a = integrated_gradients(&r, 2, 0, &x, &[0.0; 6], 2048).expect("ig");
        let scale = f64::from((a.z_sample - a.z_baseline).abs()).max(1.0);
        assert!(a.gap().abs() <= 1e-2 * scale, "gap {}", a.gap());
    }

    #[test]
    fn bad_requests_are_refused() {
        let n = net(
            5,
            &[Activation::Tanh, Activation::Relu, Activation::Identity],
        );
        let x = [0.0f32; 6];
        assert!(integrated_gradients(&n, 3, 0, &x, &x, 8).is_err());
        assert!(integrated_gradients(&n, 0, 5, &x, &x, 8).is_err());
        assert!(integrated_gradients(&n, 0, 0, &x[..5], &x, 8).is_err());
        assert!(integrated_gradients(&n, 0, 0, &x, &x, 0).is_err());
        let mut bad = x;
        bad[1] = f32::NAN;
        assert!(integrated_gradients(&n, 0, 0, &bad, &x, 8).is_err());
    }
}
