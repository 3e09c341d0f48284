//! Per-unit activity over a probe: a histogram of each unit's activation and the probe rows
//! that drive its pre-activation highest.
//!
//! The probe is run in chunks of rows (one forward pass each), twice: the first pass finds
//! each unit's activation range and its top rows, the second counts activations into
//! equal-width bins over that range. Memory stays bounded by one chunk's trace, whatever
//! the number of probe rows.

use super::Progress;
use super::forward::forward_trace;
use crate::error::{Error, Result};
use crate::model::Network;
use crate::probe::DEFAULT_CHUNK_ROWS;
use ndarray::{ArrayView2, s};

/// Bins of each unit's activation histogram unless told otherwise.
pub const DEFAULT_HIST_BINS: usize = 32;
/// Probe rows kept per unit as "drives it hardest" unless told otherwise.
pub const DEFAULT_TOP_SAMPLES: usize = 8;

/// Options of [`trace_activity`].
#[derive(Debug, Clone, PartialEq)]
pub struct ActivityOptions {
    /// Bins of each histogram (default [`DEFAULT_HIST_BINS`]; 0 counts as 1).
    pub bins: usize,
    /// Top rows kept per unit (default [`DEFAULT_TOP_SAMPLES`]).
    pub top: usize,
    /// Probe rows per forward pass (default [`DEFAULT_CHUNK_ROWS`]; 0 counts as 1). Smaller
    /// chunks let a cancel be seen sooner.
    pub chunk_rows: usize,
}

impl Default for ActivityOptions {
    fn default() -> Self {
        ActivityOptions {
            bins: DEFAULT_HIST_BINS,
            top: DEFAULT_TOP_SAMPLES,
            chunk_rows: DEFAULT_CHUNK_ROWS,
        }
    }
}

/// A unit's activations over the probe: histogram and the rows that drive it hardest.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct UnitActivity {
    /// Smallest finite activation seen (`+inf` when there was none).
    pub lo: f32,
    /// Largest finite activation seen (`-inf` when there was none).
    pub hi: f32,
    /// Counts of finite activations per equal-width bin over `[lo, hi]`, `[bins]` (all in
    /// bin 0 when `lo == hi`).
    pub hist: Vec<u32>,
    /// Up to `top` entries (probe row, pre-activation, activation), highest finite
    /// pre-activation first; ties keep the earlier row first.
    pub top: Vec<(usize, f32, f32)>,
}

/// Activity of every unit of every layer over the probe: `layers[l][u]`.
#[derive(Debug, Clone, PartialEq)]
pub struct ActivityResult {
    /// Per layer, per unit.
    pub layers: Vec<Vec<UnitActivity>>,
}

/// Histograms and top rows of every unit of every layer of `net` over the probe rows
/// `inputs: [rows, input size]`.
///
/// # Errors
/// [`Error::Cancelled`] when `progress` asks to stop (checked once per chunk).
///
/// # Panics
/// When `inputs` does not have one column per input of `net` (the probe readers check it).
pub fn trace_activity(
    net: &Network,
    inputs: ArrayView2<f32>,
    opts: &ActivityOptions,
    progress: &dyn Progress,
) -> Result<ActivityResult> {
    let bins = opts.bins.max(1);
    let chunk = opts.chunk_rows.max(1);
    let rows = inputs.nrows();
    let last = net.layers().len().saturating_sub(1);
    let mut layers: Vec<Vec<UnitActivity>> = net
        .layers()
        .iter()
        .map(|l| {
            vec![
                UnitActivity {
                    lo: f32::INFINITY,
                    hi: f32::NEG_INFINITY,
                    hist: vec![0; bins],
                    top: Vec::new(),
                };
                l.units()
            ]
        })
        .collect();
    let chunks = rows.div_ceil(chunk).max(1);
    for pass in 0..2 {
        for c in 0..chunks {
            if progress.cancelled() {
                return Err(Error::Cancelled);
            }
            progress.set((pass * chunks + c) as f32 / (2 * chunks) as f32);
            let start = c * chunk;
            let end = (start + chunk).min(rows);
            let trace = forward_trace(net, inputs.slice(s![start..end, ..]), last);
            for (l, acts) in layers.iter_mut().enumerate() {
                let (Some(pre), Some(post)) = (trace.pre.get(l), trace.post.get(l)) else {
                    continue;
                };
                for (u, a) in acts.iter_mut().enumerate() {
                    if pass == 0 {
                        let rows = pre.column(u).into_iter().zip(post.column(u));
                        for (r, (&z, &v)) in rows.enumerate() {
                            if v.is_finite() {
                                a.lo = a.lo.min(v);
                                a.hi = a.hi.max(v);
                            }
                            push_top(&mut a.top, (start + r, z, v), opts.top);
                        }
                    } else {
                        count_into_bins(a, post.column(u).iter().copied());
                    }
                }
            }
        }
    }
    progress.set(1.0);
    Ok(ActivityResult { layers })
}

/// Adds the finite `values` to `a.hist`, equal-width bins over `[a.lo, a.hi]`.
fn count_into_bins(a: &mut UnitActivity, values: impl Iterator<Item = f32>) {
    let bins = a.hist.len();
    let span = a.hi - a.lo;
    for v in values.filter(|v| v.is_finite()) {
        let b = if span > 0.0 {
            (((v - a.lo) / span) * bins as f32) as usize
        } else {
            0
        };
        a.hist[b.min(bins - 1)] += 1;
    }
}

/// Keeps the `limit` entries with the highest finite pre-activation (`item.1`), highest
/// first; an entry equal to one already kept goes after it.
fn push_top(top: &mut Vec<(usize, f32, f32)>, item: (usize, f32, f32), limit: usize) {
    if !item.1.is_finite() {
        return;
    }
    if top.len() == limit && top.last().is_none_or(|t| t.1 >= item.1) {
        return;
    }
    let at = top.partition_point(|t| t.1 >= item.1);
    top.insert(at, item);
    top.truncate(limit);
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::Silent;
    use crate::analysis::test_nets::random_layers;
    use crate::model::{Activation, InputSpec};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn top_keeps_highest_first() {
        let mut top = Vec::new();
        for (r, z) in [3.0f32, 1.0, 9.0, 4.0, 7.0, 2.0, 8.0, 6.0, 5.0, 0.5]
            .iter()
            .enumerate()
        {
            push_top(&mut top, (r, *z, *z), DEFAULT_TOP_SAMPLES);
        }
        let zs: Vec<f32> = top.iter().map(|t| t.1).collect();
        assert_eq!(zs, vec![9.0, 8.0, 7.0, 6.0, 5.0, 4.0, 3.0, 2.0]);
    }

    /// Checks the chunked two-pass trace against a direct computation over the whole
    /// probe's activations: range, top rows by a full sort, and bin counts by the
    /// equal-width binning rule (numpy.histogram's rule with the last bin closed). The
    /// activations come from the same 8-row forward passes, since a matrix product over a
    /// different number of rows may round differently in the last bit.
    #[test]
    fn chunked_trace_matches_a_direct_computation() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let sizes = [5, 7, 4];
        let layers = random_layers(
            &mut rng,
            &sizes,
            &[Activation::Relu, Activation::Sigmoid],
            0.5,
        );
        let input = InputSpec::vector_box(5, -1.0, 1.0);
        let net = Network::new("t", "test", input, layers).unwrap();
        let x = ndarray::Array2::from_shape_fn((37, 5), |_| rng.random_range(-1.0f32..1.0));
        let opts = ActivityOptions {
            bins: 6,
            top: 5,
            chunk_rows: 8,
        };
        let got = trace_activity(&net, x.view(), &opts, &Silent).unwrap();
        let chunks: Vec<_> = (0..37)
            .step_by(8)
            .map(|r| forward_trace(&net, x.slice(s![r..(r + 8).min(37), ..]), 1))
            .collect();
        for (l, acts) in got.layers.iter().enumerate() {
            assert_eq!(acts.len(), sizes[l + 1]);
            for (u, a) in acts.iter().enumerate() {
                let z: Vec<f32> = chunks
                    .iter()
                    .flat_map(|t| t.pre[l].column(u).to_vec())
                    .collect();
                let v: Vec<f32> = chunks
                    .iter()
                    .flat_map(|t| t.post[l].column(u).to_vec())
                    .collect();
                let lo = v.iter().copied().fold(f32::INFINITY, f32::min);
                let hi = v.iter().copied().fold(f32::NEG_INFINITY, f32::max);
                assert_eq!((a.lo, a.hi), (lo, hi));
                let mut order: Vec<usize> = (0..z.len()).collect();
                order.sort_by(|&i, &j| z[j].total_cmp(&z[i]));
                let want: Vec<usize> = order[..5].to_vec();
                let rows: Vec<usize> = a.top.iter().map(|t| t.0).collect();
                assert_eq!(rows, want, "layer {l} unit {u}");
                let mut hist = vec![0u32; 6];
                for &vi in &v {
                    let b = if hi > lo {
                        (((vi - lo) / (hi - lo)) * 6.0) as usize
                    } else {
                        0
                    };
                    hist[b.min(5)] += 1;
                }
                assert_eq!(a.hist, hist);
                assert_eq!(a.hist.iter().sum::<u32>(), 37);
            }
        }
    }

    #[test]
    fn cancel_is_seen() {
        struct Stop;
        impl Progress for Stop {
            fn set(&self, _: f32) {}
            fn cancelled(&self) -> bool {
                true
            }
        }
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let layers = random_layers(&mut rng, &[2, 3], &[Activation::Relu], 0.1);
        let input = InputSpec::vector_box(2, 0.0, 1.0);
        let net = Network::new("t", "test", input, layers).unwrap();
        let x = ndarray::Array2::<f32>::zeros((4, 2));
        let r = trace_activity(&net, x.view(), &ActivityOptions::default(), &Stop);
        assert!(matches!(r, Err(Error::Cancelled)));
    }
}
