//! What the benchmarks share: the 784-2048-2048-10 ReLU benchmark network, its probe size
//! and seed, and a NumPy `.npy` writer.

use ndarray::{Array1, Array2};
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use receptor::model::{Activation, InputSpec, Layer, Layout, Network};
use std::path::Path;

/// Layer widths from input to output.
pub const SIZES: [usize; 4] = [784, 2048, 2048, 10];
/// Probe rows for `screen`.
pub const PROBE_ROWS: usize = 10_000;
/// Seed of the weights and the probe.
pub const SEED: u64 = 20_240_601;

pub type BenchResult<T> = Result<T, Box<dyn std::error::Error>>;

/// He-scaled (He et al. 2015) uniform weights: U(-sqrt(6 / fan_in), sqrt(6 / fan_in)) has
/// variance 2 / fan_in; small uniform biases. Input box [0, 1] (a 28 x 28 grey image).
pub fn build_network(rng: &mut ChaCha8Rng) -> BenchResult<Network> {
    let mut layers = Vec::new();
    for (i, pair) in SIZES.windows(2).enumerate() {
        let (fan_in, units) = (pair[0], pair[1]);
        let limit = (6.0 / fan_in as f64).sqrt() as f32;
        let weights =
            Array2::from_shape_simple_fn((units, fan_in), || rng.random_range(-limit..limit));
        let bias = Array1::from_shape_simple_fn(units, || rng.random_range(-0.05f32..0.05));
        let last = i == SIZES.len() - 2;
        layers.push(Layer {
            kind: receptor::model::LayerKind::Dense,
            name: if last {
                "out".into()
            } else {
                format!("h{}", i + 1)
            },
            activation: if last {
                Activation::Softmax
            } else {
                Activation::Relu
            },
            weights,
            bias,
            labels: None,
        });
    }
    let input = InputSpec {
        units: None,
        size: SIZES[0],
        layout: Layout::Image {
            height: 28,
            width: 28,
            channels: 1,
        },
        low: vec![0.0; SIZES[0]],
        high: vec![1.0; SIZES[0]],
        names: None,
    };
    Ok(Network::new(
        "benchmark network",
        "bench-784-2048-2048-10",
        input,
        layers,
    )?)
}

/// Writes `data: [rows, cols]` as a NumPy `.npy` file (format 1.0, little-endian float32,
/// C order), per the NumPy format specification (numpy.lib.format).
pub fn write_npy(path: &Path, data: &Array2<f32>) -> BenchResult<()> {
    let (rows, cols) = data.dim();
    let mut header =
        format!("{{'descr': '<f4', 'fortran_order': False, 'shape': ({rows}, {cols}), }}");
    // Magic (6) + version (2) + header length (2) + header, padded to a multiple of 64 and
    // ending in a newline.
    let total = 10 + header.len() + 1;
    header.push_str(&" ".repeat((64 - total % 64) % 64));
    header.push('\n');
    let mut bytes = Vec::with_capacity(10 + header.len() + rows * cols * 4);
    bytes.extend_from_slice(b"\x93NUMPY\x01\x00");
    bytes.extend_from_slice(&u16::try_from(header.len())?.to_le_bytes());
    bytes.extend_from_slice(header.as_bytes());
    for v in data.iter() {
        bytes.extend_from_slice(&v.to_le_bytes());
    }
    receptor::atomic::write_bytes_atomic(path, &bytes)?;
    Ok(())
}
