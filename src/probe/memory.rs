//! Probes held in memory: reading a whole probe (a file, or the default uniform probe),
//! its mean input, and a [`ProbeSource`] that serves an in-memory probe in chunks to the
//! analysis functions that stream their probe.

use super::{ProbeChunk, ProbeData, ProbeSource};
use crate::error::{Error, Result};
use crate::model::Network;
use ndarray::s;
use std::path::Path;
use std::sync::Arc;

/// Reads the probe file at `path` for `net` into memory, or, when `path` is `None`, the
/// default uniform probe ([`super::DEFAULT_UNIFORM_SAMPLES`] samples, seed
/// [`super::DEFAULT_UNIFORM_SEED`]).
///
/// # Errors
/// The reader's errors, naming the file.
pub fn read_probe(net: &Network, path: Option<&Path>) -> Result<ProbeData> {
    let mut src = match path {
        None => super::uniform(
            net,
            super::DEFAULT_UNIFORM_SAMPLES,
            super::DEFAULT_UNIFORM_SEED,
        ),
        Some(p) => super::open(p, net)?,
    };
    super::read_all(src.as_mut())
}

impl ProbeData {
    /// The mean of every input over the probe's rows, `[input size]`, summed in f64.
    ///
    /// # Errors
    /// A probe error naming the probe when it has no rows.
    pub fn mean_input(&self) -> Result<Vec<f32>> {
        let rows = self.inputs.nrows();
        if rows == 0 {
            return Err(Error::probe(&self.origin, "the probe has no samples"));
        }
        let mut sums = vec![0.0f64; self.inputs.ncols()];
        for row in self.inputs.rows() {
            for (s, v) in sums.iter_mut().zip(row.iter()) {
                *s += f64::from(*v);
            }
        }
        Ok(sums.iter().map(|s| (s / rows as f64) as f32).collect())
    }
}

/// A probe held in memory, served in chunks to the core's streaming functions.
#[derive(Debug, Clone)]
pub struct MemoryProbe {
    data: Arc<ProbeData>,
    at: usize,
}

impl MemoryProbe {
    /// Serves `data` from its first row.
    pub fn new(data: Arc<ProbeData>) -> Self {
        MemoryProbe { data, at: 0 }
    }
}

impl ProbeSource for MemoryProbe {
    fn describe(&self) -> String {
        self.data.origin.clone()
    }

    fn next_chunk(&mut self, max_rows: usize) -> Result<Option<ProbeChunk>> {
        let rows = self.data.inputs.nrows();
        if rows == 0 {
            return Err(Error::probe(&self.data.origin, "the probe has no samples"));
        }
        if self.at >= rows {
            return Ok(None);
        }
        let end = (self.at + max_rows.max(1)).min(rows);
        let chunk = ProbeChunk {
            inputs: self.data.inputs.slice(s![self.at..end, ..]).to_owned(),
            labels: self.data.labels.as_ref().map(|l| l[self.at..end].to_vec()),
            first_row: self.at,
        };
        self.at = end;
        Ok(Some(chunk))
    }

    fn total_rows(&self) -> Option<usize> {
        Some(self.data.inputs.nrows())
    }

    fn has_labels(&self) -> bool {
        self.data.labels.is_some()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    fn data() -> ProbeData {
        ProbeData {
            inputs: array![
                [1.0f32, 0.0],
                [2.0, -1.0],
                [4.0, 0.5],
                [5.0, 0.5],
                [3.0, 1.0]
            ],
            labels: Some(vec![0, 1, 2, 3, 4]),
            origin: "test probe".into(),
        }
    }

    #[test]
    fn chunks_cover_every_row_once_in_order() {
        let mut src = MemoryProbe::new(Arc::new(data()));
        assert_eq!(src.total_rows(), Some(5));
        assert!(src.has_labels());
        let mut firsts = Vec::new();
        let mut labels = Vec::new();
        while let Some(c) = src.next_chunk(2).unwrap() {
            firsts.push(c.first_row);
            assert_eq!(c.inputs.nrows(), c.labels.as_ref().unwrap().len());
            labels.extend(c.labels.unwrap());
        }
        assert_eq!(firsts, [0, 2, 4]);
        assert_eq!(labels, [0, 1, 2, 3, 4]);
        // Reading it back whole gives the same data.
        let mut src = MemoryProbe::new(Arc::new(data()));
        let back = super::super::read_all(&mut src).unwrap();
        assert_eq!(back.inputs, data().inputs);
        assert_eq!(back.labels, data().labels);
    }

    #[test]
    fn mean_input_is_the_column_mean() {
        // Column means by hand: (1+2+4+5+3)/5 = 3, (0-1+0.5+0.5+1)/5 = 0.2.
        let m = data().mean_input().unwrap();
        approx::assert_abs_diff_eq!(m[0], 3.0, epsilon = 1e-7);
        approx::assert_abs_diff_eq!(m[1], 0.2, epsilon = 1e-7);
    }

    #[test]
    fn an_empty_probe_is_an_error_naming_it() {
        let empty = ProbeData {
            inputs: ndarray::Array2::zeros((0, 2)),
            labels: None,
            origin: "empty.csv".into(),
        };
        let e = empty.mean_input().unwrap_err().to_string();
        assert!(e.contains("empty.csv"), "{e}");
        let mut src = MemoryProbe::new(Arc::new(empty));
        assert!(src.next_chunk(4).is_err());
    }
}
