//! Structured pruning: whole hidden units removed, ranked by a published criterion, and the
//! accuracy left on a labelled probe.
//!
//! Criteria (a smaller score is removed first):
//! - `l1`: the L1 norm of the unit's incoming weights, `s_j = sum_i |W[j, i]|` (H. Li et al.,
//!   "Pruning filters for efficient ConvNets", ICLR 2017, section 3.1, where a filter's
//!   kernel weights play the part of a dense unit's incoming weights), summed in f64;
//! - `activation`: the mean of |a_j| over the reference data, with the activations of the
//!   unpruned network (summed in f64 over f32 activations).
//!
//! Ranking rule (the reference script `scripts/make_structured_fixtures.py` uses the same):
//! units sorted by ascending score, ties broken by the lower unit index first.
//!
//! A fraction `f` removes `k = floor(f x n + 1e-9)` of a layer's `n` units (the 1e-9 keeps
//! decimal fractions such as 0.29 x 100 from flooring to 28). A fraction that would remove
//! every unit of a layer is refused; for `f < 1` that cannot happen, so only `f = 1` is.
//! The output layer is never pruned. Removal is physical ([`super::compact::apply`]: the
//! unit's row and bias and the next layer's column go), so the accuracy is that of the
//! smaller model that `--write-pruned` writes.
//!
//! With `per_layer`, one layer is pruned at a time and the others are kept whole: the
//! sensitivity analysis of S. Han et al., "Learning both weights and connections for
//! efficient neural networks" (NeurIPS 2015, section 3 and figure 5).

use super::compact::{Plan, Reason, apply};
use super::forward::forward_trace;
use super::prune::count_correct;
use super::{Progress, SubProgress};
use crate::error::{Error, Result};
use crate::model::Network;
use crate::probe::{DEFAULT_CHUNK_ROWS, ProbeSource};

/// How hidden units are ranked for removal.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Criterion {
    /// L1 norm of the incoming weights (Li et al. 2017).
    L1,
    /// Mean |activation| on the reference data.
    Activation,
}

impl Criterion {
    /// The name used on the command line and in tables.
    pub fn as_str(&self) -> &'static str {
        match self {
            Criterion::L1 => "l1",
            Criterion::Activation => "activation",
        }
    }
}

impl Criterion {
    /// Both criteria, in the order the fronts offer them.
    pub const ALL: [Criterion; 2] = [Criterion::L1, Criterion::Activation];

    /// True when ranking needs the reference data.
    pub fn needs_probe(&self) -> bool {
        *self == Criterion::Activation
    }
}

/// Slack added before flooring `fraction x units` (module docs).
const FLOOR_SLACK: f64 = 1e-9;

/// Units that `fraction` removes from a layer of `units`: `floor(fraction x units + 1e-9)`,
/// at most `units`. `fraction` must already lie in [0, 1].
pub fn units_removed(fraction: f64, units: usize) -> usize {
    ((fraction * units as f64 + FLOOR_SLACK).floor() as usize).min(units)
}

/// The L1 norm of each hidden unit's incoming weights, one `[units]` vector per hidden
/// layer (all layers but the last), in f64.
pub fn l1_scores(net: &Network) -> Vec<Vec<f64>> {
    let hidden = net.layers().len() - 1;
    net.layers()[..hidden]
        .iter()
        .map(|l| {
            l.weights
                .rows()
                .into_iter()
                .map(|r| r.iter().map(|&w| f64::from(w).abs()).sum())
                .collect()
        })
        .collect()
}

/// The mean |activation| of each hidden unit over every sample of `probe` (streamed), one
/// `[units]` vector per hidden layer.
///
/// Errors: those of the probe; a probe error for a chunk of the wrong width or a probe with
/// no samples; [`Error::Cancelled`] when `progress` asks to stop.
pub fn mean_abs_activation(
    net: &Network,
    probe: &mut dyn ProbeSource,
    progress: &dyn Progress,
) -> Result<Vec<Vec<f64>>> {
    let describe = probe.describe();
    let hidden = net.layers().len() - 1;
    let mut sums: Vec<Vec<f64>> = net.layers()[..hidden]
        .iter()
        .map(|l| vec![0.0; l.units()])
        .collect();
    let mut samples = 0usize;
    while let Some(chunk) = probe.next_chunk(DEFAULT_CHUNK_ROWS)? {
        if progress.cancelled() {
            return Err(Error::Cancelled);
        }
        chunk.check_width(net, &describe)?;
        if hidden > 0 && chunk.inputs.nrows() > 0 {
            let t = forward_trace(net, chunk.inputs.view(), hidden - 1);
            for (s, a) in sums.iter_mut().zip(&t.post) {
                for row in a.rows() {
                    for (acc, &v) in s.iter_mut().zip(row.iter()) {
                        *acc += f64::from(v).abs();
                    }
                }
            }
        }
        samples += chunk.inputs.nrows();
    }
    if samples == 0 {
        return Err(Error::probe(&describe, "the probe has no samples"));
    }
    Ok(sums
        .into_iter()
        .map(|s| s.into_iter().map(|v| v / samples as f64).collect())
        .collect())
}

/// Per hidden layer, the score of each unit under `criterion`: [`l1_scores`], or
/// [`mean_abs_activation`] over `probe`.
///
/// Errors: a usage error for `activation` without a probe; those of
/// [`mean_abs_activation`].
pub fn unit_scores(
    net: &Network,
    criterion: Criterion,
    probe: Option<&mut dyn ProbeSource>,
    progress: &dyn Progress,
) -> Result<Vec<Vec<f64>>> {
    match (criterion, probe) {
        (Criterion::L1, _) => Ok(l1_scores(net)),
        (Criterion::Activation, Some(p)) => mean_abs_activation(net, p, progress),
        (Criterion::Activation, None) => Err(Error::usage(
            "ranking units by mean |activation| needs probe data",
        )),
    }
}

/// The order in which a layer's units are removed: ascending score, ties (and NaN, which
/// sorts last) broken by the lower index first.
pub fn removal_order(scores: &[f64]) -> Vec<usize> {
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]).then(a.cmp(&b)));
    order
}

/// The plan removing the `units_removed(fraction, n)` lowest-scored units of every hidden
/// layer, or of hidden layer `only` alone. `scores` has one vector per hidden layer.
///
/// Errors: a usage error when `fraction` is outside [0, 1], would remove every unit of a
/// layer, or `only` is not a hidden layer.
pub fn plan_units(
    net: &Network,
    scores: &[Vec<f64>],
    fraction: f64,
    only: Option<usize>,
) -> Result<Plan> {
    check_fraction(net, fraction, only)?;
    let hidden = net.layers().len() - 1;
    let mut plan = Plan::empty(net);
    for (l, s) in scores.iter().enumerate().take(hidden) {
        if only.is_some_and(|o| o != l) {
            continue;
        }
        let k = units_removed(fraction, s.len());
        let mut gone: Vec<usize> = removal_order(s)[..k].to_vec();
        gone.sort_unstable();
        plan.units[l] = gone.into_iter().map(|u| (u, Reason::Pruned)).collect();
    }
    Ok(plan)
}

/// Checks that `fraction` is a number in [0, 1] that leaves every pruned layer a unit.
pub fn check_fraction(net: &Network, fraction: f64, only: Option<usize>) -> Result<()> {
    if !(fraction.is_finite() && (0.0..=1.0).contains(&fraction)) {
        return Err(Error::usage(format!(
            "a unit-pruning fraction must be a number from 0 to 1, got {fraction}"
        )));
    }
    super::compact::require_dense(net, "unit pruning")?;
    let hidden = net.layers().len() - 1;
    if hidden == 0 {
        return Err(Error::usage(
            "the model has no hidden layer, so it has no units to prune (the output layer is never pruned)",
        ));
    }
    if let Some(o) = only
        && o >= hidden
    {
        return Err(Error::usage(format!(
            "layer {o} is not a hidden layer (the model has {hidden})"
        )));
    }
    for (l, layer) in net.layers()[..hidden].iter().enumerate() {
        if only.is_some_and(|o| o != l) {
            continue;
        }
        if units_removed(fraction, layer.units()) >= layer.units() {
            return Err(Error::usage(format!(
                "removing a fraction {fraction} of the units would remove all {} units of layer '{}'; a layer must keep at least one unit",
                layer.units(),
                layer.name
            )));
        }
    }
    Ok(())
}

/// The smaller network without the units [`plan_units`] picks (validated; `origin` names it
/// in messages).
pub fn prune_units(
    net: &Network,
    scores: &[Vec<f64>],
    fraction: f64,
    only: Option<usize>,
    origin: &str,
) -> Result<Network> {
    apply(net, &plan_units(net, scores, fraction, only)?, origin)
}

/// One point of a unit-pruning curve.
#[derive(Debug, Clone, PartialEq)]
pub struct UnitSweepPoint {
    /// The pruned hidden layer, or `None` when every hidden layer was pruned at once.
    pub layer: Option<usize>,
    /// Requested fraction of each pruned layer's units.
    pub fraction: f64,
    /// Units removed (over the pruned layers).
    pub removed: usize,
    /// Units of the pruned layers before pruning.
    pub units: usize,
    /// Weights and biases of the pruned model.
    pub parameters: usize,
    /// Correct predictions on the probe.
    pub correct: usize,
    /// Probe samples.
    pub samples: usize,
    /// `correct / samples`.
    pub accuracy: f64,
}

/// Accuracy on a labelled probe after removing each fraction of the lowest-scored units,
/// from every hidden layer at once or (`per_layer`) from one hidden layer at a time (one
/// curve per layer, layers in order). The probe is streamed once.
///
/// Errors: a usage error for a bad fraction (see [`check_fraction`]); a probe error when
/// the probe has no labels, a label is not an output unit, or the probe has no samples;
/// [`Error::Cancelled`] when `progress` asks to stop.
pub fn unit_sweep(
    net: &Network,
    scores: &[Vec<f64>],
    fractions: &[f64],
    per_layer: bool,
    probe: &mut dyn ProbeSource,
    progress: &dyn Progress,
) -> Result<Vec<UnitSweepPoint>> {
    let describe = probe.describe();
    if !probe.has_labels() {
        return Err(Error::probe(
            &describe,
            "has no labels: a pruning sweep needs a probe whose header names a 'label' column",
        ));
    }
    let hidden = net.layers().len() - 1;
    let targets: Vec<Option<usize>> = if per_layer {
        (0..hidden).map(Some).collect()
    } else {
        vec![None]
    };
    let mut variants: Vec<(Option<usize>, f64, usize, usize)> = Vec::new();
    let mut nets: Vec<Network> = Vec::new();
    for &only in &targets {
        for &f in fractions {
            check_fraction(net, f, only)?;
            let plan = plan_units(net, scores, f, only)?;
            let removed = plan.units.iter().map(Vec::len).sum();
            let units = net.layers()[..hidden]
                .iter()
                .enumerate()
                .filter(|(l, _)| only.is_none_or(|o| o == *l))
                .map(|(_, layer)| layer.units())
                .sum();
            nets.push(apply(net, &plan, &describe)?);
            variants.push((only, f, removed, units));
        }
    }
    let (correct, samples) = count_correct(&nets, probe, progress)?;
    progress.set(1.0);
    Ok(variants
        .into_iter()
        .zip(&nets)
        .zip(correct)
        .map(
            |(((layer, fraction, removed, units), p), c)| UnitSweepPoint {
                layer,
                fraction,
                removed,
                units,
                parameters: p.parameter_count(),
                correct: c,
                samples,
                accuracy: c as f64 / samples as f64,
            },
        )
        .collect())
}

/// The unit-removal curves of one criterion: every hidden layer pruned at once, and each
/// hidden layer alone (the sensitivity curves).
#[derive(Debug, Clone, PartialEq)]
pub struct UnitCurves {
    /// How units were ranked.
    pub criterion: Criterion,
    /// Every hidden layer pruned at once, one point per fraction.
    pub all_layers: Vec<UnitSweepPoint>,
    /// One hidden layer at a time: for each hidden layer in order, one point per fraction.
    pub per_layer: Vec<UnitSweepPoint>,
}

/// Ranks units by `criterion` and runs [`unit_sweep`] at `fractions` with every hidden
/// layer at once and with one layer at a time. `open` opens the labelled reference data
/// afresh each time it is called (two or three times).
///
/// Errors: those of [`unit_scores`] and [`unit_sweep`].
pub fn unit_curves(
    net: &Network,
    criterion: Criterion,
    fractions: &[f64],
    open: &mut dyn FnMut() -> Result<Box<dyn ProbeSource>>,
    progress: &dyn Progress,
) -> Result<UnitCurves> {
    let scores = if criterion.needs_probe() {
        let mut p = open()?;
        unit_scores(
            net,
            criterion,
            Some(&mut *p),
            &SubProgress::new(progress, 0.0, 0.2),
        )?
    } else {
        unit_scores(net, criterion, None, progress)?
    };
    let mut p = open()?;
    let all_layers = unit_sweep(
        net,
        &scores,
        fractions,
        false,
        &mut *p,
        &SubProgress::new(progress, 0.2, 0.4),
    )?;
    let mut p = open()?;
    let per_layer = unit_sweep(
        net,
        &scores,
        fractions,
        true,
        &mut *p,
        &SubProgress::new(progress, 0.4, 1.0),
    )?;
    Ok(UnitCurves {
        criterion,
        all_layers,
        per_layer,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::Silent;
    use crate::analysis::forward::{argmax_rows, forward};
    use crate::analysis::screen::tests::MemProbe;
    use crate::model::{Activation, InputSpec, Layer};
    use approx::assert_abs_diff_eq;
    use ndarray::{Array2, array};

    /// Box [0, 1]^2; hidden relu layer of 4 units, output identity with 2 units.
    /// Incoming weights (rows) and L1 norms, worked by hand:
    ///   u0: [ 1.0, -2.0]  -> 3.0
    ///   u1: [ 0.5,  0.0]  -> 0.5
    ///   u2: [-0.25, 0.25] -> 0.5   (ties with u1; u1 has the lower index, goes first)
    ///   u3: [ 0.0,  4.0]  -> 4.0
    /// Output weights: out0 = h0 + h1 + h2 + h3, out1 = 0.5 (bias), identity.
    fn tiny() -> Network {
        let input = InputSpec::vector_box(2, 0.0, 1.0);
        let h = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "h".into(),
            activation: Activation::Relu,
            weights: array![[1.0, -2.0], [0.5, 0.0], [-0.25, 0.25], [0.0, 4.0]],
            bias: array![0.0, 0.0, 0.0, 0.0],
            labels: None,
        };
        let o = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "o".into(),
            activation: Activation::Identity,
            weights: array![[1.0, 1.0, 1.0, 1.0], [0.0, 0.0, 0.0, 0.0]],
            bias: array![0.0, 0.5],
            labels: None,
        };
        Network::new("test", "t", input, vec![h, o]).expect("valid")
    }

    #[test]
    fn l1_ranking_worked_by_hand() {
        let net = tiny();
        let s = l1_scores(&net);
        assert_eq!(s, vec![vec![3.0, 0.5, 0.5, 4.0]]);
        assert_eq!(removal_order(&s[0]), vec![1, 2, 0, 3]);
        // floor(0.5 * 4) = 2: u1 and u2 go; the output's columns 1 and 2 with them.
        let p = prune_units(&net, &s, 0.5, None, "t").unwrap();
        assert_eq!(p.layers()[0].weights, array![[1.0, -2.0], [0.0, 4.0]]);
        assert_eq!(p.layers()[1].weights, array![[1.0, 1.0], [0.0, 0.0]]);
        assert_eq!(p.layers()[1].bias, array![0.0, 0.5]);
        // floor(0.25 * 4) = 1: only u1 (the tie goes to the lower index).
        let p = prune_units(&net, &s, 0.25, None, "t").unwrap();
        assert_eq!(p.layers()[0].units(), 3);
        assert_eq!(p.layers()[0].weights.row(0).to_vec(), vec![1.0, -2.0]);
        assert_eq!(p.layers()[0].weights.row(1).to_vec(), vec![-0.25, 0.25]);
    }

    #[test]
    fn mean_abs_activation_worked_by_hand() {
        // Probe rows (x0, x1): (1, 0), (0, 1), (1, 1).
        // u0 = relu(x0 - 2 x1): 1, 0, 0 -> mean 1/3.
        // u1 = relu(0.5 x0):  0.5, 0, 0.5 -> 1/3.
        // u2 = relu(-0.25 x0 + 0.25 x1): 0, 0.25, 0 -> 1/12.
        // u3 = relu(4 x1): 0, 4, 4 -> 8/3.
        // Order: u2 (1/12), then u0 and u1 (both 1/3: u0 first by index), then u3.
        let net = tiny();
        let x = array![[1.0f32, 0.0], [0.0, 1.0], [1.0, 1.0]];
        let m = mean_abs_activation(&net, &mut MemProbe::new(x, None), &Silent).unwrap();
        assert_abs_diff_eq!(m[0][0], 1.0 / 3.0, epsilon = 1e-12);
        assert_abs_diff_eq!(m[0][1], 1.0 / 3.0, epsilon = 1e-12);
        assert_abs_diff_eq!(m[0][2], 1.0 / 12.0, epsilon = 1e-12);
        assert_abs_diff_eq!(m[0][3], 8.0 / 3.0, epsilon = 1e-12);
        assert_eq!(removal_order(&m[0]), vec![2, 0, 1, 3]);
    }

    #[test]
    fn fractions_floor_and_whole_layers_are_refused() {
        assert_eq!(units_removed(0.29, 100), 29);
        assert_eq!(units_removed(0.9, 5), 4);
        assert_eq!(units_removed(0.1, 4), 0);
        assert_eq!(units_removed(1.0, 7), 7);
        let net = tiny();
        let s = l1_scores(&net);
        let e = plan_units(&net, &s, 1.0, None).unwrap_err();
        assert!(e.to_string().contains("all 4 units of layer 'h'"), "{e}");
        assert!(plan_units(&net, &s, -0.1, None).is_err());
        assert!(plan_units(&net, &s, f64::NAN, None).is_err());
        assert!(plan_units(&net, &s, 0.9, None).is_ok());
    }

    #[test]
    fn sweep_accuracy_equals_direct_evaluation_of_the_pruned_model() {
        // Labels: the unpruned model's own predictions on a grid, so accuracy is 1 at 0;
        // each other point must equal the accuracy of the pruned model evaluated directly.
        let net = tiny();
        let x = Array2::from_shape_fn((36, 2), |(r, c)| {
            if c == 0 {
                (r / 6) as f32 / 5.0
            } else {
                (r % 6) as f32 / 5.0
            }
        });
        let labels: Vec<usize> = argmax_rows(forward(&net, x.view()).view())
            .into_iter()
            .map(|p| p.unwrap_or(0))
            .collect();
        let s = l1_scores(&net);
        let fr = [0.0, 0.25, 0.5, 0.75];
        let pts = unit_sweep(
            &net,
            &s,
            &fr,
            false,
            &mut MemProbe::new(x.clone(), Some(labels.clone())),
            &Silent,
        )
        .unwrap();
        assert_eq!(pts[0].accuracy, 1.0);
        for (p, &f) in pts.iter().zip(&fr) {
            let pruned = prune_units(&net, &s, f, None, "t").unwrap();
            let pred = argmax_rows(forward(&pruned, x.view()).view());
            let c = pred
                .iter()
                .zip(&labels)
                .filter(|(a, l)| **a == Some(**l))
                .count();
            assert_eq!(p.correct, c, "fraction {f}");
            assert_eq!(p.removed, units_removed(f, 4));
            assert_eq!(p.units, 4);
            assert_eq!(p.parameters, pruned.parameter_count());
        }
        // Per layer on a one-hidden-layer net: the same curve, labelled with the layer.
        let per = unit_sweep(
            &net,
            &s,
            &fr,
            true,
            &mut MemProbe::new(x, Some(labels)),
            &Silent,
        )
        .unwrap();
        assert!(per.iter().all(|p| p.layer == Some(0)));
        let a: Vec<usize> = pts.iter().map(|p| p.correct).collect();
        let b: Vec<usize> = per.iter().map(|p| p.correct).collect();
        assert_eq!(a, b);
        // Unlabelled probe: refused.
        let e = unit_sweep(
            &net,
            &s,
            &fr,
            false,
            &mut MemProbe::new(Array2::zeros((1, 2)), None),
            &Silent,
        );
        assert!(e.is_err());
    }

    #[test]
    fn unit_curves_are_the_two_sweeps_of_the_criterions_scores() {
        let net = tiny();
        let x = array![[1.0f32, 0.0], [0.0, 1.0], [1.0, 1.0], [0.5, 0.5]];
        let labels = vec![0, 1, 0, 1];
        let fr = [0.0, 0.25, 0.5, 0.75];
        for criterion in Criterion::ALL {
            let mut opened = 0;
            let curves = unit_curves(
                &net,
                criterion,
                &fr,
                &mut || {
                    opened += 1;
                    Ok(Box::new(MemProbe::new(x.clone(), Some(labels.clone()))))
                },
                &Silent,
            )
            .unwrap();
            assert_eq!(opened, if criterion.needs_probe() { 3 } else { 2 });
            let scores = match criterion {
                Criterion::L1 => l1_scores(&net),
                Criterion::Activation => {
                    mean_abs_activation(&net, &mut MemProbe::new(x.clone(), None), &Silent).unwrap()
                }
            };
            for (per_layer, got) in [(false, &curves.all_layers), (true, &curves.per_layer)] {
                let want = unit_sweep(
                    &net,
                    &scores,
                    &fr,
                    per_layer,
                    &mut MemProbe::new(x.clone(), Some(labels.clone())),
                    &Silent,
                )
                .unwrap();
                assert_eq!(got, &want, "{criterion:?}, per layer {per_layer}");
            }
        }
        // Ranking by activation without data is refused.
        assert!(unit_scores(&net, Criterion::Activation, None, &Silent).is_err());
    }
}
