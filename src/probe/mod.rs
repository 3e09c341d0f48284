//! Probe data: the samples a network is run on for screening, top samples and pruning
//! curves. Readers stream the data in chunks, so a probe file larger than memory works.
//!
//! The format is chosen by the file extension (`.csv` or `.npy`, any letter case).

use crate::error::Result;
use crate::model::Network;
use ndarray::Array2;
use std::num::NonZeroUsize;
use std::path::Path;

/// Rows per chunk used by the analysis commands unless told otherwise.
pub const DEFAULT_CHUNK_ROWS: usize = 4096;
/// Samples in the default probe (uniform over the input box) when no probe file is given.
pub const DEFAULT_UNIFORM_SAMPLES: usize = 4096;
/// Seed of the default uniform probe.
pub const DEFAULT_UNIFORM_SEED: u64 = 0;
/// [`DEFAULT_CHUNK_ROWS`] as a count that is known not to be zero.
pub const DEFAULT_CHUNK_ROWS_NONZERO: NonZeroUsize = non_zero(DEFAULT_CHUNK_ROWS);
/// [`DEFAULT_UNIFORM_SAMPLES`] as a count that is known not to be zero.
pub const DEFAULT_UNIFORM_SAMPLES_NONZERO: NonZeroUsize = non_zero(DEFAULT_UNIFORM_SAMPLES);

/// `n` as a [`NonZeroUsize`], for the constants above (a zero fails to compile).
const fn non_zero(n: usize) -> NonZeroUsize {
    match NonZeroUsize::new(n) {
        Some(v) => v,
        None => panic!("a default count must not be zero"),
    }
}

/// A chunk of consecutive probe rows.
#[derive(Debug, Clone)]
pub struct ProbeChunk {
    /// The inputs, `[rows, input size]`.
    pub inputs: Array2<f32>,
    /// The class of each row as an index into the output units, when the probe is labelled.
    pub labels: Option<Vec<usize>>,
    /// Index (from 0) of this chunk's first row within the whole probe.
    pub first_row: usize,
}

impl ProbeChunk {
    /// Checks that the chunk has one column per input of `net`; `origin` names the probe.
    /// The file readers guarantee it; this guards other sources before a forward pass.
    pub fn check_width(&self, net: &Network, origin: &str) -> Result<()> {
        if self.inputs.ncols() == net.input().size {
            return Ok(());
        }
        Err(crate::Error::probe(
            origin,
            format!(
                "rows from {} have {} columns but the model has {} inputs",
                self.first_row,
                self.inputs.ncols(),
                net.input().size
            ),
        ))
    }
}

/// A stream of probe samples, read chunk by chunk.
pub trait ProbeSource: Send {
    /// Where the samples come from, for messages ("probe.csv", "uniform probe ...").
    fn describe(&self) -> String;
    /// The next chunk of at most `max_rows` rows, or `Ok(None)` at the end. A probe with
    /// no samples at all is an error on the first call, never an empty success.
    fn next_chunk(&mut self, max_rows: usize) -> Result<Option<ProbeChunk>>;
    /// Total number of rows when it is known in advance (for progress bars).
    fn total_rows(&self) -> Option<usize>;
    /// True when every row carries a label.
    fn has_labels(&self) -> bool;
}

/// A whole probe held in memory.
#[derive(Debug, Clone)]
pub struct ProbeData {
    /// The inputs, `[rows, input size]`.
    pub inputs: Array2<f32>,
    /// Labels per row, when the probe is labelled.
    pub labels: Option<Vec<usize>>,
    /// Where the samples came from.
    pub origin: String,
}

pub mod csv;
pub mod memory;
pub mod npy;
pub mod uniform;

/// Opens a probe file for `net`, choosing the reader by extension. The header (and, for
/// `.npy`, the declared shape) is checked against the model before any data is read.
pub fn open(path: &Path, net: &Network) -> Result<Box<dyn ProbeSource>> {
    let ext = path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase);
    match ext.as_deref() {
        Some("csv") => Ok(Box::new(csv::CsvProbe::open(path, net)?)),
        Some("npy") => Ok(Box::new(npy::NpyProbe::open(path, net)?)),
        _ => Err(crate::Error::probe(
            path,
            "unknown probe format: the file name must end in .csv or .npy",
        )),
    }
}

/// The default probe: `samples` inputs drawn uniformly from the model's input box with a
/// fixed `seed`.
pub fn uniform(net: &Network, samples: usize, seed: u64) -> Box<dyn ProbeSource> {
    Box::new(uniform::UniformProbe::new(net, samples, seed))
}

/// Reads a whole probe into memory.
pub fn read_all(source: &mut dyn ProbeSource) -> Result<ProbeData> {
    let origin = source.describe();
    let mut parts: Vec<ProbeChunk> = Vec::new();
    while let Some(chunk) = source.next_chunk(DEFAULT_CHUNK_ROWS)? {
        parts.push(chunk);
    }
    let cols = parts.first().map_or(0, |c| c.inputs.ncols());
    let rows: usize = parts.iter().map(|c| c.inputs.nrows()).sum();
    let mut inputs = Array2::<f32>::zeros((rows, cols));
    let labelled = parts.iter().all(|c| c.labels.is_some()) && !parts.is_empty();
    let mut labels = Vec::with_capacity(if labelled { rows } else { 0 });
    let mut at = 0;
    for c in parts {
        let n = c.inputs.nrows();
        inputs
            .slice_mut(ndarray::s![at..at + n, ..])
            .assign(&c.inputs);
        at += n;
        if labelled && let Some(l) = c.labels {
            labels.extend(l);
        }
    }
    Ok(ProbeData {
        inputs,
        labels: labelled.then_some(labels),
        origin,
    })
}

/// Suffixes of a reference-data file named after its model, in the order they are tried:
/// `digits.json` finds `digits-probe.csv`, then `digits-probe.npy`, `digits-reference.csv`,
/// `digits-reference.npy`.
pub const BESIDE_MODEL_SUFFIXES: [&str; 4] = [
    "-probe.csv",
    "-probe.npy",
    "-reference.csv",
    "-reference.npy",
];

/// The reference-data file that lies beside `model` and carries its stem (see
/// [`BESIDE_MODEL_SUFFIXES`]), if one exists as a regular file. Only looks at names; nothing
/// is read.
pub fn beside_model(model: &Path) -> Option<std::path::PathBuf> {
    let stem = model.file_stem()?.to_str()?;
    let dir = model.parent().unwrap_or_else(|| Path::new(""));
    BESIDE_MODEL_SUFFIXES
        .iter()
        .map(|suffix| dir.join(format!("{stem}{suffix}")))
        .find(|p| p.is_file())
}

#[cfg(test)]
mod beside_tests {
    use super::*;

    #[test]
    fn finds_the_file_named_after_the_model_in_order() {
        let dir = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
        let model = dir.path().join("digits.json");
        let touch = |name: &str| {
            std::fs::write(dir.path().join(name), "x\n").unwrap_or_else(|e| panic!("{e}"));
        };
        touch("digits.json");
        assert_eq!(beside_model(&model), None, "nothing beside it yet");
        // Files that do not carry the stem, or another extension, are not taken.
        touch("digit-probe.csv");
        touch("digits-probe.txt");
        touch("other-reference.npy");
        std::fs::create_dir(dir.path().join("digits-probe.npy")).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(beside_model(&model), None, "a folder is not a file");
        touch("digits-reference.npy");
        assert_eq!(
            beside_model(&model),
            Some(dir.path().join("digits-reference.npy"))
        );
        touch("digits-reference.csv");
        assert_eq!(
            beside_model(&model),
            Some(dir.path().join("digits-reference.csv"))
        );
        touch("digits-probe.csv");
        assert_eq!(
            beside_model(&model),
            Some(dir.path().join("digits-probe.csv"))
        );
        // The stem is the name without its last extension, for .onnx models too.
        let onnx = dir.path().join("digits.onnx");
        assert_eq!(
            beside_model(&onnx),
            Some(dir.path().join("digits-probe.csv"))
        );
        // A bare name without a folder looks in the current folder, and finds nothing here.
        assert_eq!(beside_model(Path::new("no-such-model-xyz.json")), None);
    }
}
