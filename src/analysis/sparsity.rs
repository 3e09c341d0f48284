//! Per-unit sparsity statistics of incoming weights, computed in f64.
//!
//! - Hoyer sparseness, P. O. Hoyer, "Non-negative matrix factorization with sparseness
//!   constraints", JMLR 5 (2004), eq. (1): `(sqrt(n) - L1/L2) / (sqrt(n) - 1)`; 0 for a
//!   constant vector, 1 for a one-hot vector.
//! - Gini index of `|w|`, N. Hurley and S. Rickard, "Comparing measures of sparsity", IEEE
//!   Trans. Inf. Theory 55(10) (2009), with `c_(1) <= ... <= c_(n)` the sorted magnitudes:
//!   `G = 1 - 2 * sum_k (c_(k) / ||c||_1) * ((n - k + 1/2) / n)`; 0 for a constant vector,
//!   `1 - 1/n` for a one-hot vector.
//!
//! By the receptor contract, a unit whose weights are all zero, and a unit with a single
//! incoming weight, get 1 for both measures (both formulas are undefined or degenerate
//! there).

use crate::model::Network;

/// Statistics of one unit's incoming weights.
#[derive(Debug, Clone, PartialEq)]
pub struct UnitStats {
    /// Layer name.
    pub layer: String,
    /// Layer index (from 0).
    pub layer_index: usize,
    /// Unit index within the layer (from 0).
    pub unit: usize,
    /// Number of incoming weights.
    pub fan_in: usize,
    /// Sum of |w|.
    pub l1: f64,
    /// Euclidean norm of w.
    pub l2: f64,
    /// Largest |w|.
    pub max_abs: f64,
    /// Fraction of incoming weights with |w| <= the layer's zero tolerance.
    pub near_zero_frac: f64,
    /// Hoyer (2004) sparseness, in [0, 1].
    pub hoyer: f64,
    /// Gini index of |w| (Hurley & Rickard 2009), in [0, 1].
    pub gini: f64,
    /// The unit's bias.
    pub bias: f32,
}

/// Summary of one layer's weight matrix.
#[derive(Debug, Clone, PartialEq)]
pub struct LayerSummary {
    /// Layer name.
    pub layer: String,
    /// Number of units.
    pub units: usize,
    /// Incoming weights per unit.
    pub fan_in: usize,
    /// The tolerance used for `near_zero_frac` (absolute; by default 0.01 x `max_abs`).
    pub zero_tol: f64,
    /// Mean Hoyer sparseness over the layer's units.
    pub mean_hoyer: f64,
    /// Mean Gini index over the layer's units.
    pub mean_gini: f64,
    /// Fraction of all the layer's weights with |w| <= `zero_tol`.
    pub near_zero_frac: f64,
    /// Largest |w| in the layer.
    pub max_abs: f64,
}

/// Hoyer (2004) sparseness of `w` (see the module docs). Empty, single-element and all-zero
/// vectors give 1.
pub fn hoyer(w: &[f32]) -> f64 {
    let n = w.len();
    if n <= 1 {
        return 1.0;
    }
    let (l1, l2) = norms(w);
    if l2 == 0.0 {
        return 1.0;
    }
    let sn = (n as f64).sqrt();
    // Rounding can push L1/L2 a hair outside [1, sqrt(n)]; the measure lives in [0, 1].
    ((sn - l1 / l2) / (sn - 1.0)).clamp(0.0, 1.0)
}

/// Gini index of `|w|` per Hurley & Rickard (2009) (see the module docs). Empty,
/// single-element and all-zero vectors give 1.
pub fn gini(w: &[f32]) -> f64 {
    let n = w.len();
    if n <= 1 {
        return 1.0;
    }
    let mut c: Vec<f64> = w.iter().map(|v| f64::from(v.abs())).collect();
    c.sort_by(f64::total_cmp);
    let l1: f64 = c.iter().sum();
    if l1 == 0.0 {
        return 1.0;
    }
    let nf = n as f64;
    let s: f64 = c
        .iter()
        .enumerate()
        .map(|(i, ck)| {
            let k = (i + 1) as f64;
            (ck / l1) * ((nf - k + 0.5) / nf)
        })
        .sum();
    (1.0 - 2.0 * s).clamp(0.0, 1.0)
}

/// (L1, L2) norms of `w` in f64.
fn norms(w: &[f32]) -> (f64, f64) {
    let mut l1 = 0.0f64;
    let mut sq = 0.0f64;
    for &v in w {
        let v = f64::from(v);
        l1 += v.abs();
        sq += v * v;
    }
    (l1, sq.sqrt())
}

/// Statistics of every unit of `layer` and the layer's summary.
///
/// `zero_tol` is an absolute tolerance for "near zero"; `None` uses 0.01 x the largest |w|
/// of this layer's whole weight matrix (so an all-zero layer has tolerance 0 and every
/// weight counts as near zero).
///
/// # Panics
/// When `layer` is not a layer index.
pub fn layer_stats(
    net: &Network,
    layer: usize,
    zero_tol: Option<f64>,
) -> (Vec<UnitStats>, LayerSummary) {
    let l = &net.layers()[layer];
    let max_abs_layer = l
        .weights
        .iter()
        .fold(0.0f64, |m, v| m.max(f64::from(v.abs())));
    let tol = zero_tol.unwrap_or(0.01 * max_abs_layer);
    let fan_in = l.fan_in();
    let mut units = Vec::with_capacity(l.units());
    let mut near_total = 0usize;
    let mut row_buf: Vec<f32> = Vec::with_capacity(fan_in);
    for (k, row) in l.weights.rows().into_iter().enumerate() {
        row_buf.clear();
        row_buf.extend(row.iter().copied());
        let (l1, l2) = norms(&row_buf);
        let max_abs = row_buf
            .iter()
            .fold(0.0f64, |m, v| m.max(f64::from(v.abs())));
        let near = row_buf.iter().filter(|v| f64::from(v.abs()) <= tol).count();
        near_total += near;
        units.push(UnitStats {
            layer: l.name.clone(),
            layer_index: layer,
            unit: k,
            fan_in,
            l1,
            l2,
            max_abs,
            near_zero_frac: if fan_in == 0 {
                0.0
            } else {
                near as f64 / fan_in as f64
            },
            hoyer: hoyer(&row_buf),
            gini: gini(&row_buf),
            bias: l.bias[k],
        });
    }
    let n = units.len().max(1) as f64;
    let total = l.weights.len();
    let summary = LayerSummary {
        layer: l.name.clone(),
        units: l.units(),
        fan_in,
        zero_tol: tol,
        mean_hoyer: units.iter().map(|u| u.hoyer).sum::<f64>() / n,
        mean_gini: units.iter().map(|u| u.gini).sum::<f64>() / n,
        near_zero_frac: if total == 0 {
            0.0
        } else {
            near_total as f64 / total as f64
        },
        max_abs: max_abs_layer,
    };
    (units, summary)
}

/// Statistics of every unit of every layer, in layer order, and one summary per layer.
pub fn all_stats(net: &Network, zero_tol: Option<f64>) -> (Vec<UnitStats>, Vec<LayerSummary>) {
    let mut all = Vec::new();
    let mut summaries = Vec::with_capacity(net.layers().len());
    for layer in 0..net.layers().len() {
        let (u, s) = layer_stats(net, layer, zero_tol);
        all.extend(u);
        summaries.push(s);
    }
    (all, summaries)
}

/// Bins of each log10 |w| histogram made by [`magnitude_histogram`].
pub const MAGNITUDE_BINS: usize = 60;

/// Histogram of log10 |w| for one layer (exact zeros counted apart, they have no log).
#[derive(Debug, Clone, PartialEq)]
pub struct MagnitudeHistogram {
    /// Left edge of bin 0, in log10 units.
    pub start: f64,
    /// Bin width in log10 units.
    pub width: f64,
    /// Weights per bin, `[MAGNITUDE_BINS]` (empty when every weight is 0).
    pub counts: Vec<u64>,
    /// Weights that are exactly 0.
    pub zeros: u64,
}

/// Histogram of log10 |w| with [`MAGNITUDE_BINS`] equal-width bins between the smallest
/// and largest non-zero magnitude (the last bin closed); exact zeros are counted apart.
/// With no non-zero weight, `counts` is empty.
pub fn magnitude_histogram<'a>(
    weights: impl Iterator<Item = &'a f32> + Clone,
) -> MagnitudeHistogram {
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    let mut zeros = 0u64;
    for w in weights.clone() {
        let a = f64::from(w.abs());
        if a == 0.0 {
            zeros += 1;
        } else {
            let l = a.log10();
            lo = lo.min(l);
            hi = hi.max(l);
        }
    }
    if !lo.is_finite() {
        return MagnitudeHistogram {
            start: 0.0,
            width: 1.0,
            counts: Vec::new(),
            zeros,
        };
    }
    let span = (hi - lo).max(1e-6);
    let width = span / MAGNITUDE_BINS as f64;
    let mut counts = vec![0u64; MAGNITUDE_BINS];
    for w in weights {
        let a = f64::from(w.abs());
        if a > 0.0 {
            let b = (((a.log10() - lo) / width) as usize).min(MAGNITUDE_BINS - 1);
            counts[b] += 1;
        }
    }
    MagnitudeHistogram {
        start: lo,
        width,
        counts,
        zeros,
    }
}

/// The sparsity of a whole network, grouped by layer: what `receptor stats` reports, plus
/// each layer's |w| histogram.
#[derive(Debug, Clone, PartialEq)]
pub struct NetworkSparsity {
    /// `units[l][u]`: statistics of unit `u` of layer `l`.
    pub units: Vec<Vec<UnitStats>>,
    /// One summary per layer.
    pub layers: Vec<LayerSummary>,
    /// Per layer, the histogram of log10 |w| over its whole weight matrix.
    pub magnitude: Vec<MagnitudeHistogram>,
}

/// Statistics and |w| histograms of every layer; `zero_tol` as in [`layer_stats`].
pub fn network_sparsity(net: &Network, zero_tol: Option<f64>) -> NetworkSparsity {
    let (units, layers) = (0..net.layers().len())
        .map(|l| layer_stats(net, l, zero_tol))
        .unzip();
    let magnitude = net
        .layers()
        .iter()
        .map(|l| magnitude_histogram(l.weights.iter()))
        .collect();
    NetworkSparsity {
        units,
        layers,
        magnitude,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Activation, InputSpec, Layer};
    use approx::assert_abs_diff_eq;
    use ndarray::array;

    #[test]
    fn hoyer_worked_cases() {
        // Hoyer (2004): a vector with a single non-zero element has sparseness 1 and a
        // vector with all elements equal (in magnitude) has sparseness 0.
        assert_abs_diff_eq!(hoyer(&[0.0, 0.0, 3.0, 0.0]), 1.0, epsilon = 1e-12);
        assert_abs_diff_eq!(hoyer(&[2.0, -2.0, 2.0, 2.0]), 0.0, epsilon = 1e-12);
        // Hand computation for [1, 2, 3, 4]: L1 = 10, L2 = sqrt(30), sqrt(n) = 2,
        // (2 - 10/sqrt(30)) / (2 - 1) = 2 - 1.8257418583505538 = 0.1742581416494462.
        assert_abs_diff_eq!(
            hoyer(&[1.0, 2.0, 3.0, 4.0]),
            2.0 - 10.0 / 30f64.sqrt(),
            epsilon = 1e-12
        );
        assert_abs_diff_eq!(
            hoyer(&[1.0, 2.0, 3.0, 4.0]),
            0.174_258_141_649_446_2,
            epsilon = 1e-12
        );
        // Sign does not matter (the definition uses |w| through the norms).
        assert_abs_diff_eq!(
            hoyer(&[-1.0, 2.0, -3.0, 4.0]),
            hoyer(&[1.0, 2.0, 3.0, 4.0]),
            epsilon = 1e-15
        );
    }

    #[test]
    fn gini_worked_cases() {
        // Hurley & Rickard (2009): G = 0 for equal magnitudes; for a one-hot vector only
        // c_(n) is non-zero, so G = 1 - 2 * (n - n + 1/2)/n = 1 - 1/n.
        assert_abs_diff_eq!(gini(&[2.0, -2.0, 2.0, 2.0]), 0.0, epsilon = 1e-12);
        assert_abs_diff_eq!(
            gini(&[0.0, 0.0, 3.0, 0.0]),
            1.0 - 1.0 / 4.0,
            epsilon = 1e-12
        );
        assert_abs_diff_eq!(
            gini(
                &[0.0; 99]
                    .iter()
                    .chain(&[5.0])
                    .copied()
                    .collect::<Vec<f32>>()
            ),
            0.99,
            epsilon = 1e-12
        );
        // Hand computation for [1, 2, 3, 4] (already sorted, ||c||_1 = 10, n = 4):
        // sum = 0.1*3.5/4 + 0.2*2.5/4 + 0.3*1.5/4 + 0.4*0.5/4
        //     = 0.0875 + 0.125 + 0.1125 + 0.05 = 0.375; G = 1 - 2*0.375 = 0.25.
        assert_abs_diff_eq!(gini(&[1.0, 2.0, 3.0, 4.0]), 0.25, epsilon = 1e-12);
        // Order and sign do not matter.
        assert_abs_diff_eq!(gini(&[4.0, -1.0, 3.0, -2.0]), 0.25, epsilon = 1e-12);
    }

    #[test]
    fn contract_edge_cases_give_one() {
        // receptor contract: all-zero weights and fan_in 1 give 1 for both.
        assert_eq!(hoyer(&[0.0, 0.0, 0.0]), 1.0);
        assert_eq!(gini(&[0.0, 0.0, 0.0]), 1.0);
        assert_eq!(hoyer(&[0.7]), 1.0);
        assert_eq!(gini(&[0.7]), 1.0);
    }

    fn net_with(weights: ndarray::Array2<f32>) -> Network {
        let n_in = weights.ncols();
        let units = weights.nrows();
        let input = InputSpec::vector_box(n_in, -1.0, 1.0);
        let layer = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "h".into(),
            activation: Activation::Relu,
            weights,
            bias: ndarray::Array1::from_shape_fn(units, |k| k as f32),
            labels: None,
        };
        let out = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "out".into(),
            activation: Activation::Identity,
            weights: ndarray::Array2::zeros((1, units)),
            bias: array![0.0],
            labels: None,
        };
        Network::new("test", "t", input, vec![layer, out]).expect("valid")
    }

    #[test]
    fn layer_stats_norms_and_near_zero() {
        // Max |w| of the layer is 4, so the default tolerance is 0.04: in row 0 the
        // entries 0.01 and 0.04 count (|w| <= tol), 0.05 does not.
        let net = net_with(array![[0.01, 0.04, 0.05, 4.0], [1.0, -2.0, 3.0, -4.0]]);
        let (units, summary) = layer_stats(&net, 0, None);
        assert_abs_diff_eq!(summary.zero_tol, 0.04, epsilon = 1e-9);
        assert_abs_diff_eq!(units[0].near_zero_frac, 0.5);
        assert_abs_diff_eq!(units[1].near_zero_frac, 0.0);
        assert_abs_diff_eq!(summary.near_zero_frac, 2.0 / 8.0);
        assert_abs_diff_eq!(units[1].l1, 10.0, epsilon = 1e-12);
        assert_abs_diff_eq!(units[1].l2, 30f64.sqrt(), epsilon = 1e-12);
        assert_abs_diff_eq!(units[1].max_abs, 4.0);
        assert_abs_diff_eq!(units[1].gini, 0.25, epsilon = 1e-12);
        assert_eq!(units[1].bias, 1.0);
        assert_eq!(units[1].fan_in, 4);
        assert_abs_diff_eq!(
            summary.mean_hoyer,
            (units[0].hoyer + units[1].hoyer) / 2.0,
            epsilon = 1e-15
        );
        // An absolute tolerance replaces the relative default.
        let (units, summary) = layer_stats(&net, 0, Some(1.0));
        assert_eq!(summary.zero_tol, 1.0);
        assert_abs_diff_eq!(units[0].near_zero_frac, 0.75);
        assert_abs_diff_eq!(units[1].near_zero_frac, 0.25);
        // The all-zero output layer: tolerance 0, every weight near zero, both measures 1.
        let (all, summaries) = all_stats(&net, None);
        assert_eq!(all.len(), 3);
        assert_eq!(summaries.len(), 2);
        assert_eq!(all[2].layer, "out");
        assert_eq!(all[2].near_zero_frac, 1.0);
        assert_eq!(all[2].hoyer, 1.0);
        assert_eq!(all[2].gini, 1.0);
    }

    #[test]
    fn magnitude_histogram_counts_every_weight() {
        let w = [0.0f32, 0.001, -0.01, 0.1, -1.0, 0.0];
        let h = magnitude_histogram(w.iter());
        assert_eq!(h.zeros, 2);
        assert_eq!(h.counts.iter().sum::<u64>(), 4);
        // 0.001 is not exact in f32 (0.0010000000475), so log10 is -3 only to about 2e-8.
        approx::assert_abs_diff_eq!(h.start, -3.0, epsilon = 1e-6);
    }
}
