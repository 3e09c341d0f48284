//! Magnitude pruning: zero each layer's smallest weights and measure the accuracy left.
//!
//! Per layer, the `k = round(fraction x weights)` weights of smallest |w| are set to zero
//! (ties broken by position, so the count is exact); biases are kept. Weights that are
//! already zero are the smallest, so after pruning exactly `max(k, zeros before)` weights
//! of the layer are zero.

use super::Progress;
use super::forward::{argmax_rows, forward};
use crate::error::{Error, Result};
use crate::model::Network;
use crate::probe::{DEFAULT_CHUNK_ROWS, ProbeChunk, ProbeSource};

/// The fractions of a sweep when none are given: 0, 0.1, ..., 0.9 (the command line's
/// `prune-sweep` default and the app's sweep).
pub const DEFAULT_SWEEP_FRACTIONS: [f64; 10] = [0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9];

/// Checks pruning fractions: at least one, each a number from 0 to 1.
///
/// Errors: [`Error::BadOption`] (option `fractions`) naming the first bad value.
pub fn check_fractions(fractions: &[f64]) -> Result<()> {
    if fractions.is_empty() {
        return Err(Error::bad_option(
            "fractions",
            "none",
            "needs at least one value",
        ));
    }
    match fractions
        .iter()
        .find(|f| !(f.is_finite() && (0.0..=1.0).contains(*f)))
    {
        Some(f) => Err(Error::bad_option(
            "fractions",
            f,
            "must be a number from 0 to 1",
        )),
        None => Ok(()),
    }
}

/// One point of a pruning sweep.
#[derive(Debug, Clone, PartialEq)]
pub struct SweepPoint {
    /// Requested fraction of each layer's weights to zero.
    pub fraction: f64,
    /// Fraction of probe samples whose predicted class (argmax of the outputs) equals the
    /// label.
    pub accuracy: f64,
    /// Weights equal to zero in the pruned network (all layers).
    pub zeroed: usize,
    /// Weights in the network (all layers; biases not counted).
    pub total: usize,
}

/// How many of `n` weights a fraction zeroes: `round(fraction x n)`, clamped to `0..=n`.
fn count_for(fraction: f64, n: usize) -> usize {
    let f = if fraction.is_nan() {
        0.0
    } else {
        fraction.clamp(0.0, 1.0)
    };
    ((f * n as f64).round() as usize).min(n)
}

/// A copy of `net` where, in every layer, the `round(fraction x weights)` weights of
/// smallest |w| are zero (ties by position). Biases are unchanged. `fraction` is clamped
/// to [0, 1] (NaN counts as 0). The copy is validated like every network (zeroing keeps
/// every shape, so this fails only if the model itself would).
pub fn prune_by_magnitude(net: &Network, fraction: f64) -> Result<Network> {
    let mut out = net.to_parts();
    for layer in &mut out.layers {
        let n = layer.weights.len();
        let k = count_for(fraction, n);
        if k == 0 {
            continue;
        }
        let mut order: Vec<(f32, usize)> = layer
            .weights
            .iter()
            .enumerate()
            .map(|(i, w)| (w.abs(), i))
            .collect();
        let cmp = |a: &(f32, usize), b: &(f32, usize)| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1));
        if k < n {
            order.select_nth_unstable_by(k - 1, cmp);
        }
        let cols = layer.weights.ncols();
        for &(_, i) in &order[..k] {
            layer.weights[[i / cols, i % cols]] = 0.0;
        }
    }
    // Zeroing weights keeps every shape; validation runs as for every network.
    Network::from_parts(out, net.name())
}

/// Accuracy of the network pruned at each of `fractions` on a labelled probe, streamed
/// once in chunks (every pruned copy runs on each chunk).
///
/// Errors: a probe error when the probe has no labels; [`Error::BadOption`] from
/// [`check_fractions`];
/// a probe error when a chunk lacks labels, a label is not an output unit, or the probe
/// has no samples; [`Error::Cancelled`] when `progress` asks to stop (checked per chunk).
pub fn prune_sweep(
    net: &Network,
    probe: &mut dyn ProbeSource,
    fractions: &[f64],
    progress: &dyn Progress,
) -> Result<Vec<SweepPoint>> {
    let describe = probe.describe();
    check_fractions(fractions)?;
    if !probe.has_labels() {
        return Err(Error::probe(
            &describe,
            "has no labels: a pruning sweep needs a labelled probe (add a 'label' column)",
        ));
    }
    let pruned: Vec<Network> = fractions
        .iter()
        .map(|&f| prune_by_magnitude(net, f))
        .collect::<Result<_>>()?;
    let (correct, samples) = count_correct(&pruned, probe, progress)?;
    let total: usize = net.layers().iter().map(|l| l.weights.len()).sum();
    progress.set(1.0);
    Ok(fractions
        .iter()
        .zip(&pruned)
        .zip(&correct)
        .map(|((&fraction, p), &c)| SweepPoint {
            fraction,
            accuracy: c as f64 / samples as f64,
            zeroed: p
                .layers()
                .iter()
                .map(|l| l.weights.iter().filter(|w| **w == 0.0).count())
                .sum(),
            total,
        })
        .collect())
}

/// The labels of a probe chunk, checked: one per row, each an output unit (of `outputs`).
/// `describe` names the probe.
///
/// Errors: a probe error when the chunk has no labels, not one per row, or a label that is
/// not an output unit.
pub(crate) fn checked_labels<'c>(
    chunk: &'c ProbeChunk,
    outputs: usize,
    describe: &str,
) -> Result<&'c [usize]> {
    let Some(labels) = chunk.labels.as_ref() else {
        return Err(Error::probe(
            describe,
            format!("rows from {} have no labels", chunk.first_row),
        ));
    };
    if labels.len() != chunk.inputs.nrows() {
        return Err(Error::probe(
            describe,
            format!(
                "rows from {}: {} labels for {} rows",
                chunk.first_row,
                labels.len(),
                chunk.inputs.nrows()
            ),
        ));
    }
    if let Some((i, l)) = labels.iter().enumerate().find(|(_, l)| **l >= outputs) {
        return Err(Error::probe(
            describe,
            format!(
                "row {}: label {l} is not an output unit (the model has {outputs} outputs)",
                chunk.first_row + i
            ),
        ));
    }
    Ok(labels)
}

/// Runs every network of `nets` (all with the same inputs and outputs) on each chunk of a
/// labelled probe, streamed once, and counts the rows whose predicted class (argmax of the
/// outputs) equals the label. Returns the counts, one per network, and the number of rows.
///
/// Errors: a probe error when a chunk lacks labels or has the wrong width, a label is not
/// an output unit, or the probe has no samples; [`Error::Cancelled`] when `progress` asks to
/// stop (checked per chunk).
pub(crate) fn count_correct(
    nets: &[Network],
    probe: &mut dyn ProbeSource,
    progress: &dyn Progress,
) -> Result<(Vec<usize>, usize)> {
    let describe = probe.describe();
    let Some(first) = nets.first() else {
        return Ok((Vec::new(), 0));
    };
    let outputs = first.output_layer().units();
    let mut correct = vec![0usize; nets.len()];
    let mut samples = 0usize;
    let total_rows = probe.total_rows();
    while let Some(chunk) = probe.next_chunk(DEFAULT_CHUNK_ROWS)? {
        if progress.cancelled() {
            return Err(Error::Cancelled);
        }
        chunk.check_width(first, &describe)?;
        let labels = checked_labels(&chunk, outputs, &describe)?;
        for (p, c) in nets.iter().zip(correct.iter_mut()) {
            let out = forward(p, chunk.inputs.view());
            *c += argmax_rows(out.view())
                .iter()
                .zip(labels)
                .filter(|(pred, l)| **pred == Some(**l))
                .count();
        }
        samples += chunk.inputs.nrows();
        if let Some(t) = total_rows.filter(|&t| t > 0) {
            progress.set((samples as f32 / t as f32).min(1.0));
        }
    }
    if samples == 0 {
        return Err(Error::probe(&describe, "the probe has no samples"));
    }
    Ok((correct, samples))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::Silent;
    use crate::analysis::screen::tests::MemProbe;
    use crate::model::{Activation, InputSpec, Layer};
    use ndarray::{Array1, Array2, array};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random_net(seed: u64) -> Network {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let input = InputSpec::vector_box(9, -1.0, 1.0);
        let l1 = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "h".into(),
            activation: Activation::Relu,
            weights: Array2::from_shape_fn((7, 9), |_| rng.random_range(-1.0f32..1.0)),
            bias: Array1::from_shape_fn(7, |_| rng.random_range(-0.5f32..0.5)),
            labels: None,
        };
        let l2 = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "o".into(),
            activation: Activation::Softmax,
            weights: Array2::from_shape_fn((3, 7), |_| rng.random_range(-1.0f32..1.0)),
            bias: Array1::zeros(3),
            labels: None,
        };
        Network::new("test", "t", input, vec![l1, l2]).expect("valid")
    }

    #[test]
    fn pruning_zeroes_exactly_the_fraction_of_smallest_weights() {
        // Definition of magnitude pruning (zero the k smallest |w|): exactly
        // round(f * n) zeros per layer, and every kept |w| >= every pruned |w|.
        let net = random_net(1);
        for &f in &[0.0, 0.1, 0.25, 0.5, 0.9, 1.0] {
            let p = prune_by_magnitude(&net, f).unwrap();
            for (orig, pl) in net.layers().iter().zip(p.layers()) {
                let n = orig.weights.len();
                let zeros = pl.weights.iter().filter(|w| **w == 0.0).count();
                assert_eq!(zeros, (f * n as f64).round() as usize, "fraction {f}");
                let max_pruned = orig
                    .weights
                    .iter()
                    .zip(pl.weights.iter())
                    .filter(|(_, q)| **q == 0.0)
                    .map(|(w, _)| w.abs())
                    .fold(0.0f32, f32::max);
                for (w, q) in orig.weights.iter().zip(pl.weights.iter()) {
                    if *q != 0.0 {
                        assert_eq!(w, q);
                        assert!(w.abs() >= max_pruned);
                    }
                }
                assert_eq!(orig.bias, pl.bias);
            }
        }
    }

    #[test]
    fn ties_are_counted_exactly() {
        // All |w| equal: still exactly round(0.5 * 4) = 2 zeros.
        let input = InputSpec::vector_box(2, 0.0, 1.0);
        let l = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "o".into(),
            activation: Activation::Identity,
            weights: array![[1.0, -1.0], [1.0, 1.0]],
            bias: array![0.0, 0.0],
            labels: None,
        };
        let net = Network::new("test", "t", input, vec![l]).expect("valid");
        let p = prune_by_magnitude(&net, 0.5).unwrap();
        assert_eq!(
            p.layers()[0].weights.iter().filter(|w| **w == 0.0).count(),
            2
        );
    }

    #[test]
    fn sweep_accuracy_against_direct_evaluation() {
        // The net's own predictions as labels: accuracy 1 at fraction 0; fraction 1 zeroes
        // every weight so all outputs are equal (softmax of zero biases) and the argmax
        // is unit 0: accuracy = share of label 0.
        let net = random_net(2);
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let x = Array2::from_shape_fn((5000, 9), |_| rng.random_range(-1.0f32..1.0));
        let labels: Vec<usize> = argmax_rows(forward(&net, x.view()).view())
            .into_iter()
            .map(|p| p.unwrap_or(0))
            .collect();
        let share0 = labels.iter().filter(|l| **l == 0).count() as f64 / 5000.0;
        let mut probe = MemProbe::new(x.clone(), Some(labels.clone()));
        let pts = prune_sweep(&net, &mut probe, &[0.0, 0.3, 1.0], &Silent).expect("sweep");
        assert_eq!(pts.len(), 3);
        assert_eq!(pts[0].accuracy, 1.0);
        assert_eq!(pts[2].accuracy, share0);
        assert_eq!(pts[2].zeroed, pts[2].total);
        assert_eq!(pts[0].total, 9 * 7 + 7 * 3);
        // Fraction 0.3: compare with evaluating the pruned network directly.
        let p = prune_by_magnitude(&net, 0.3).unwrap();
        let pred = argmax_rows(forward(&p, x.view()).view());
        let acc = pred
            .iter()
            .zip(&labels)
            .filter(|(a, l)| **a == Some(**l))
            .count() as f64
            / 5000.0;
        assert_eq!(pts[1].accuracy, acc);
        assert_eq!(
            pts[1].zeroed,
            (0.3f64 * 63.0).round() as usize + (0.3f64 * 21.0).round() as usize
        );
    }

    #[test]
    fn unlabelled_probe_and_bad_fractions_are_errors() {
        let net = random_net(4);
        let x = Array2::zeros((3, 9));
        let mut probe = MemProbe::new(x.clone(), None);
        assert!(matches!(
            prune_sweep(&net, &mut probe, &[0.1], &Silent),
            Err(Error::Probe { .. })
        ));
        for bad in [&[1.5][..], &[0.2, -0.1], &[f64::NAN], &[]] {
            let mut probe = MemProbe::new(x.clone(), Some(vec![0, 1, 2]));
            assert!(matches!(
                prune_sweep(&net, &mut probe, bad, &Silent),
                Err(Error::BadOption {
                    option: "fractions",
                    ..
                })
            ));
        }
        let mut probe = MemProbe::new(x, Some(vec![0, 1, 7]));
        assert!(matches!(
            prune_sweep(&net, &mut probe, &[0.1], &Silent),
            Err(Error::Probe { .. })
        ));
    }
}
