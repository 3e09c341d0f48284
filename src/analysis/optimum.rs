//! What kind of optimum a preferred input is: how many of its inputs sit at a bound of the
//! input box (all of them: a corner), and how the pre-activation it reaches compares with
//! the sound upper bound over the box (equal: the largest z anywhere in the box; below: the
//! search found a local optimum and the bound may be loose, the true maximum lies between).

use crate::model::InputSpec;

/// An input sits at a bound when it lies within this fraction of its box width of `low` or
/// `high` (the search clamps onto the bounds exactly; the slack covers f32 rounding).
pub const AT_BOUND_TOLERANCE: f32 = 1e-3;

/// z reaches the bound when `|bound - z| <= BOUND_MATCH x max(1, |bound|)` (z is computed in
/// f32, the bound in f64; 1e-4 is about a thousand f32 ulps at 1).
pub const BOUND_MATCH: f64 = 1e-4;

/// How the reached pre-activation compares with the sound upper bound.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum BoundGap {
    /// No bound (not computed, or not finite).
    Unknown,
    /// z equals the bound within [`BOUND_MATCH`]: the global maximum over the box.
    Reached,
    /// z lies `gap` below the bound.
    Below {
        /// `bound - z`, positive.
        gap: f64,
    },
    /// z lies `excess` above the bound, which a sound bound rules out (a bound of another
    /// box, or a numerical fault).
    Above {
        /// `z - bound`, positive.
        excess: f64,
    },
}

/// The kind of optimum of one preferred input.
#[derive(Debug, Clone, PartialEq)]
pub struct OptimumSummary {
    /// Inputs sitting at a bound of the box ([`AT_BOUND_TOLERANCE`]).
    pub at_bound: usize,
    /// Inputs in all.
    pub inputs: usize,
    /// The pre-activation reached.
    pub z: f64,
    /// The sound upper bound of z over the box, when known.
    pub bound: Option<f64>,
    /// How z compares with the bound.
    pub gap: BoundGap,
    /// True when the search had penalties (L2, total variation, data prior), so it did
    /// not maximise z alone.
    pub penalised: bool,
}

impl OptimumSummary {
    /// The summary of `input: [spec.size]` reaching `z`, with the unit's sound upper bound
    /// `bound` when known. Inputs beyond the box's size are not read.
    pub fn new(
        spec: &InputSpec,
        input: &[f32],
        z: f32,
        bound: Option<f64>,
        penalised: bool,
    ) -> Self {
        let inputs = spec.size.min(input.len());
        let at_bound = (0..inputs)
            .filter(|&i| at_a_bound(input[i], spec.low[i], spec.high[i]))
            .count();
        let z = f64::from(z);
        let gap = match bound.filter(|b| b.is_finite()) {
            None => BoundGap::Unknown,
            Some(b) if (b - z).abs() <= BOUND_MATCH * b.abs().max(1.0) => BoundGap::Reached,
            Some(b) if z < b => BoundGap::Below { gap: b - z },
            Some(b) => BoundGap::Above { excess: z - b },
        };
        OptimumSummary {
            at_bound,
            inputs,
            z,
            bound,
            gap,
            penalised,
        }
    }

    /// Fraction of inputs at a bound (0 for no inputs).
    pub fn fraction_at_bound(&self) -> f64 {
        if self.inputs == 0 {
            0.0
        } else {
            self.at_bound as f64 / self.inputs as f64
        }
    }

    /// True when most inputs (more than half) sit at a bound: a corner of the box.
    pub fn is_corner(&self) -> bool {
        2 * self.at_bound > self.inputs
    }

    /// The sentence on the inputs at a bound.
    pub fn bound_words(&self) -> String {
        let (k, n) = (self.at_bound, self.inputs);
        let pct = 100.0 * self.fraction_at_bound();
        if n > 0 && k == n {
            format!("All {n} inputs sit at a bound of the box: a corner of the box.")
        } else if self.is_corner() {
            format!("{k} of {n} inputs ({pct:.0}%) sit at a bound of the box: a corner of the box.")
        } else if k == 0 {
            "No input sits at a bound of the box: an optimum inside the box.".to_owned()
        } else {
            format!(
                "{k} of {n} inputs ({pct:.0}%) sit at a bound of the box; the rest lie inside it."
            )
        }
    }

    /// The sentence comparing z with the sound upper bound.
    pub fn gap_words(&self) -> String {
        let z = super::features::number_text(self.z);
        let b = self.bound.map(super::features::number_text);
        match (self.gap, b) {
            (BoundGap::Reached, Some(b)) => format!(
                "z = {z} reaches the sound upper bound {b}: no input in the box drives the unit \
                 harder."
            ),
            (BoundGap::Below { gap }, Some(b)) => {
                let why = if self.penalised {
                    " (the penalties also pull it away from the largest z)"
                } else {
                    ""
                };
                format!(
                    "z = {z} against the sound upper bound {b} (gap {}): the search found a \
                     local optimum{why} and the bound may be loose; the largest z in the box \
                     lies between the two.",
                    super::features::number_text(gap)
                )
            }
            (BoundGap::Above { excess }, Some(b)) => format!(
                "z = {z} is above the upper bound {b} by {}, which a sound bound rules out.",
                super::features::number_text(excess)
            ),
            _ => format!("z = {z}; the sound upper bound is not computed yet."),
        }
    }
}

/// True when `x` lies within [`AT_BOUND_TOLERANCE`] box widths of `low` or `high` (always
/// for a box of zero width).
fn at_a_bound(x: f32, low: f32, high: f32) -> bool {
    let tol = AT_BOUND_TOLERANCE * (high - low).max(0.0);
    (x - low).abs() <= tol || (high - x).abs() <= tol
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::bounds::{interval_bounds, plain_interval_bounds};
    use crate::analysis::forward::forward;
    use crate::analysis::prefer::closed_form_first_layer;
    use crate::model::{Activation, Layer, LayerKind, Layout, Network};
    use ndarray::{Array1, array};

    fn dense(name: &str, w: ndarray::Array2<f32>, act: Activation) -> Layer {
        Layer {
            kind: LayerKind::Dense,
            name: name.into(),
            activation: act,
            bias: Array1::zeros(w.nrows()),
            weights: w,
            labels: None,
        }
    }

    fn vector(low: Vec<f32>, high: Vec<f32>) -> crate::model::InputSpec {
        crate::model::InputSpec {
            size: low.len(),
            layout: Layout::Vector,
            low,
            high,
            names: None,
            units: None,
        }
    }

    #[test]
    fn first_layer_optimum_is_a_corner_reaching_the_bound() {
        // Closed form: z = b + sum_i max(w_i low_i, w_i high_i) at x_i = high_i for w_i > 0
        // and low_i otherwise, so every input sits at a bound, and interval arithmetic on one
        // affine layer is exact (Gowal et al. 2018), so the bound equals z.
        let w = array![[0.5, -2.0, 0.25, -0.1]];
        let spec = vector(vec![-5.0, 0.0, 300.0, -1.0], vec![20.0, 100.0, 3000.0, 1.0]);
        let net = Network::new(
            "t",
            "t",
            spec.clone(),
            vec![dense("a", w, Activation::Tanh)],
        )
        .unwrap();
        let (z, x) = closed_form_first_layer(&net, 0);
        assert_eq!(x, vec![20.0, 0.0, 3000.0, -1.0]);
        // By hand: 0.5 x 20 + 0 + 0.25 x 3000 + 0.1 = 760.1.
        approx::assert_abs_diff_eq!(z, 760.1, epsilon = 1e-4);
        let bound = interval_bounds(&net).upper[0][0];
        let s = OptimumSummary::new(&spec, &x, z as f32, Some(bound), false);
        assert_eq!((s.at_bound, s.inputs), (4, 4));
        assert!(s.is_corner());
        assert_eq!(s.gap, BoundGap::Reached);
        assert!(
            s.bound_words().contains("a corner of the box"),
            "{}",
            s.bound_words()
        );
        assert!(s.gap_words().contains("reaches the sound upper bound"));
    }

    #[test]
    fn loose_bound_is_called_a_local_optimum() {
        // z = relu(x) + relu(-x) on x in [-1, 1]: the largest z is 1 (at either end), while
        // plain interval arithmetic gives relu(x), relu(-x) in [0, 1] each, so bound 2.
        let net = Network::new(
            "t",
            "t",
            vector(vec![-1.0], vec![1.0]),
            vec![
                dense("h", array![[1.0], [-1.0]], Activation::Relu),
                dense("o", array![[1.0, 1.0]], Activation::Identity),
            ],
        )
        .unwrap();
        let bound = plain_interval_bounds(&net).upper[1][0];
        approx::assert_abs_diff_eq!(bound, 2.0, epsilon = 1e-12);
        // An interior input: x = 0.25 gives z = 0.25 (forward pass of the identity output
        // layer, not assumed).
        let x = [0.25f32];
        let z = forward(&net, ndarray::ArrayView2::from_shape((1, 1), &x).unwrap())[[0, 0]];
        approx::assert_abs_diff_eq!(z, 0.25, epsilon = 1e-6);
        let s = OptimumSummary::new(net.input(), &x, z, Some(bound), false);
        assert_eq!(s.at_bound, 0);
        assert!(!s.is_corner());
        assert!(matches!(s.gap, BoundGap::Below { gap } if (gap - 1.75).abs() < 1e-6));
        let words = s.gap_words();
        assert!(
            words.contains("local optimum") && words.contains("may be loose"),
            "{words}"
        );
        // The end x = 1 is a corner with z = 1, still below the loose bound.
        let s = OptimumSummary::new(net.input(), &[1.0], 1.0, Some(bound), false);
        assert!(s.is_corner() && matches!(s.gap, BoundGap::Below { .. }));
        // A constructed z equal to the bound (within BOUND_MATCH) is reached; no bound: unknown.
        let s = OptimumSummary::new(net.input(), &[1.0], 2.0 - 1e-5, Some(bound), false);
        assert_eq!(s.gap, BoundGap::Reached);
        let s = OptimumSummary::new(net.input(), &[1.0], 1.0, None, false);
        assert_eq!(s.gap, BoundGap::Unknown);
        assert!(s.gap_words().contains("not computed"));
    }

    #[test]
    fn tolerance_and_fractions_at_the_edges() {
        let spec = vector(vec![0.0; 4], vec![10.0; 4]);
        // 0.009 is within 1e-3 x 10 = 0.01 of low; 9.98 is 0.02 from high: not at a bound.
        let s = OptimumSummary::new(&spec, &[0.009, 10.0, 9.98, 5.0], 0.0, None, false);
        assert_eq!(s.at_bound, 2);
        assert!(!s.is_corner(), "half is not most");
        approx::assert_abs_diff_eq!(s.fraction_at_bound(), 0.5);
        assert!(s.bound_words().contains("2 of 4 inputs (50%)"));
        let s = OptimumSummary::new(&spec, &[0.0, 10.0, 10.0, 5.0], 0.0, None, false);
        assert!(s.is_corner());
        // A zero-width box always counts as a bound; no inputs: fraction 0.
        let s = OptimumSummary::new(&vector(vec![1.0], vec![1.0]), &[1.0], 0.0, None, false);
        assert_eq!(s.at_bound, 1);
        let s = OptimumSummary::new(&vector(vec![], vec![]), &[], 0.0, None, false);
        assert_eq!(s.fraction_at_bound(), 0.0);
        assert!(s.bound_words().contains("No input"));
    }
}
