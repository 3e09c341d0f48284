//! The default probe: samples drawn uniformly from the model's input box [low, high] with a
//! seeded ChaCha8 generator, so a run is reproducible from its seed alone.

use super::{ProbeChunk, ProbeSource};
use crate::error::{Error, Result};
use crate::model::Network;
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// `samples` inputs drawn uniformly from the box `[low, high]` of a network's input, one
/// independent draw per input feature.
///
/// Rows are drawn in order from one generator, so the values do not depend on the chunk
/// size the caller asks for.
#[derive(Debug, Clone)]
pub struct UniformProbe {
    /// Lower end of the box, `[inputs]`.
    low: Vec<f32>,
    /// Upper end of the box, `[inputs]`.
    high: Vec<f32>,
    samples: usize,
    seed: u64,
    produced: usize,
    rng: ChaCha8Rng,
}

impl UniformProbe {
    /// A uniform probe of `samples` rows over `net`'s input box, from `seed`.
    pub fn new(net: &Network, samples: usize, seed: u64) -> Self {
        UniformProbe {
            low: net.input().low.clone(),
            high: net.input().high.clone(),
            samples,
            seed,
            produced: 0,
            rng: ChaCha8Rng::seed_from_u64(seed),
        }
    }

    /// The seed the samples are drawn from.
    pub fn seed(&self) -> u64 {
        self.seed
    }
}

impl ProbeSource for UniformProbe {
    fn describe(&self) -> String {
        format!(
            "uniform probe ({} samples from the input box, seed {})",
            self.samples, self.seed
        )
    }

    fn next_chunk(&mut self, max_rows: usize) -> Result<Option<ProbeChunk>> {
        if self.samples == 0 {
            return Err(Error::bad_option("samples", 0, "must be at least 1"));
        }
        let rows = max_rows.max(1).min(self.samples - self.produced);
        if rows == 0 {
            return Ok(None);
        }
        let cols = self.low.len();
        let mut inputs = Array2::<f32>::zeros((rows, cols));
        for mut row in inputs.rows_mut() {
            for (j, v) in row.iter_mut().enumerate() {
                let (lo, hi) = (f64::from(self.low[j]), f64::from(self.high[j]));
                // u in [0, 1); computing in f64 and clamping keeps every draw inside the box
                // even after rounding to f32 (and never panics on a degenerate box lo == hi).
                let u: f64 = self.rng.random();
                let x = (lo + (hi - lo) * u) as f32;
                *v = x.clamp(self.low[j].min(self.high[j]), self.high[j].max(self.low[j]));
            }
        }
        let first_row = self.produced;
        self.produced += rows;
        Ok(Some(ProbeChunk {
            inputs,
            labels: None,
            first_row,
        }))
    }

    fn total_rows(&self) -> Option<usize> {
        Some(self.samples)
    }

    fn has_labels(&self) -> bool {
        false
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{Activation, InputSpec, Layer, Layout};
    use ndarray::{Array1, Array2};

    fn net(low: Vec<f32>, high: Vec<f32>) -> Network {
        let n = low.len();
        Network::new(
            "test",
            "t",
            InputSpec {
                units: None,
                size: n,
                layout: Layout::Vector,
                low,
                high,
                names: None,
            },
            vec![Layer {
                kind: crate::model::LayerKind::Dense,
                name: "out".into(),
                activation: Activation::Identity,
                weights: Array2::zeros((1, n)),
                bias: Array1::zeros(1),
                labels: None,
            }],
        )
        .unwrap()
    }

    #[test]
    fn draws_inside_the_box_and_covers_it() {
        let n = net(vec![-1.0, 2.0, 5.0], vec![1.0, 3.0, 5.0]);
        let mut p = UniformProbe::new(&n, 1000, 7);
        let c = p.next_chunk(4096).unwrap().unwrap();
        assert_eq!(c.inputs.dim(), (1000, 3));
        assert!(p.next_chunk(4096).unwrap().is_none());
        for r in c.inputs.rows() {
            assert!((-1.0..=1.0).contains(&r[0]));
            assert!((2.0..=3.0).contains(&r[1]));
            assert_eq!(r[2], 5.0);
        }
        // Mean of U(a, b) is (a + b) / 2 with standard deviation (b - a) / sqrt(12 n) of the
        // sample mean (textbook uniform distribution); 0.1 is more than 5 of those for n=1000.
        let m0 = c.inputs.column(0).mean().unwrap();
        let m1 = c.inputs.column(1).mean().unwrap();
        approx::assert_abs_diff_eq!(m0, 0.0, epsilon = 0.1);
        approx::assert_abs_diff_eq!(m1, 2.5, epsilon = 0.05);
    }

    #[test]
    fn same_seed_same_rows_regardless_of_chunking() {
        let n = net(vec![0.0; 4], vec![1.0; 4]);
        let whole = UniformProbe::new(&n, 10, 3)
            .next_chunk(100)
            .unwrap()
            .unwrap();
        let mut p = UniformProbe::new(&n, 10, 3);
        let mut parts = Vec::new();
        while let Some(c) = p.next_chunk(3).unwrap() {
            assert_eq!(c.first_row, parts.len());
            parts.extend(
                c.inputs
                    .iter()
                    .copied()
                    .collect::<Vec<_>>()
                    .chunks(4)
                    .map(<[f32]>::to_vec),
            );
        }
        let whole_rows: Vec<Vec<f32>> = whole
            .inputs
            .rows()
            .into_iter()
            .map(|r| r.to_vec())
            .collect();
        assert_eq!(parts, whole_rows);
        let other = UniformProbe::new(&n, 10, 4)
            .next_chunk(100)
            .unwrap()
            .unwrap();
        assert_ne!(other.inputs, whole.inputs);
    }

    #[test]
    fn zero_samples_is_an_error() {
        let n = net(vec![0.0], vec![1.0]);
        assert!(UniformProbe::new(&n, 0, 0).next_chunk(10).is_err());
    }
}
