//! Where the channels of a convolutional layer respond on a probe: for every channel the
//! probe samples with the strongest response anywhere on its map (and where on the map),
//! and one sample's whole feature map. Shown by the app's convolution views; the values are
//! pre-activations `z`, as in `screen` and `prefer`.

use super::Progress;
use super::forward::forward_trace;
use crate::error::{Error, Result};
use crate::model::{Network, Shape};
use ndarray::{ArrayView2, s};

/// One strong response of a channel: a probe sample and the map position where the
/// channel's pre-activation is largest on it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Hit {
    /// Probe row.
    pub row: usize,
    /// Map position `(row, column)` of the largest pre-activation on that sample (the first
    /// one in row-major order on ties).
    pub position: (usize, usize),
    /// That pre-activation.
    pub value: f32,
}

/// The strongest samples of every channel of one layer.
#[derive(Debug, Clone, PartialEq)]
pub struct TopHits {
    /// Layer index.
    pub layer: usize,
    /// Per channel, up to `k` hits, strongest first (ties: lower row first).
    pub channels: Vec<Vec<Hit>>,
}

/// Probe rows per forward pass: bounds the memory of one pass and lets a cancel be seen.
const CHUNK: usize = 256;

/// For every channel (unit) of layer `layer`, the `k` probe rows `inputs: [rows, input
/// size]` whose largest pre-activation over the channel's map positions is highest, with
/// that position. A vector layer has one position, (0, 0). Non-finite values are skipped.
///
/// Errors: [`Error::BadOption`] for a layer index out of range or a layer without units
/// (pooling, flatten), [`Error::Cancelled`] when `progress` asks to stop.
///
/// # Panics
/// When `inputs` does not have one column per input (probe readers check it).
pub fn top_hits(
    net: &Network,
    layer: usize,
    inputs: ArrayView2<f32>,
    k: usize,
    progress: &dyn Progress,
) -> Result<TopHits> {
    let shape = unit_layer_shape(net, layer)?;
    let channels = net.layer(layer).units();
    let (height, width) = match shape {
        Shape::Map { height, width, .. } => (height, width),
        Shape::Vector(_) => (1, 1),
    };
    let positions = height * width;
    let mut best: Vec<Vec<Hit>> = vec![Vec::with_capacity(k + 1); channels];
    let rows = inputs.nrows();
    let mut start = 0;
    while start < rows {
        if progress.cancelled() {
            return Err(Error::Cancelled);
        }
        progress.set(start as f32 / rows.max(1) as f32);
        let end = (start + CHUNK).min(rows);
        let trace = forward_trace(net, inputs.slice(s![start..end, ..]), layer);
        let pre = &trace.pre[layer];
        for (i, z) in pre.rows().into_iter().enumerate() {
            for (c, list) in best.iter_mut().enumerate() {
                let mut top: Option<(usize, f32)> = None;
                for p in 0..positions {
                    let v = z[c * positions + p];
                    if v.is_finite() && top.is_none_or(|(_, t)| v > t) {
                        top = Some((p, v));
                    }
                }
                if let Some((p, v)) = top {
                    insert_hit(
                        list,
                        k,
                        Hit {
                            row: start + i,
                            position: (p / width, p % width),
                            value: v,
                        },
                    );
                }
            }
        }
        start = end;
    }
    progress.set(1.0);
    Ok(TopHits {
        layer,
        channels: best,
    })
}

/// Keeps `list` the `k` strongest hits, strongest first; an equal value keeps the earlier
/// row ahead.
fn insert_hit(list: &mut Vec<Hit>, k: usize, hit: Hit) {
    if k == 0 {
        return;
    }
    let at = list.partition_point(|h| h.value >= hit.value);
    if at < k {
        list.insert(at, hit);
        list.truncate(k);
    }
}

/// The pre-activations of every channel of layer `layer` on one input `x: [input size]`:
/// `[channels x height x width]`, channel first (one value per unit on a vector layer).
///
/// Errors: [`Error::BadOption`] for a layer index out of range or a layer without units, or
/// an input of the wrong length.
pub fn feature_maps(net: &Network, layer: usize, x: &[f32]) -> Result<Vec<f32>> {
    unit_layer_shape(net, layer)?;
    if x.len() != net.input().size {
        return Err(Error::bad_option(
            "sample",
            x.len(),
            format!(
                "has the wrong length: the network takes {} inputs",
                net.input().size
            ),
        ));
    }
    let row = ArrayView2::from_shape((1, x.len()), x)
        .map_err(|e| Error::internal(format!("feature_maps: {e}")))?;
    let trace = forward_trace(net, row, layer);
    Ok(trace.pre[layer].row(0).to_vec())
}

/// The output shape of layer `layer`, which must exist and have units.
fn unit_layer_shape(net: &Network, layer: usize) -> Result<Shape> {
    let l = net.layers().get(layer).ok_or_else(|| {
        Error::bad_option(
            "layer",
            layer,
            format!("must be a layer index below {}", net.layers().len()),
        )
    })?;
    if !l.has_weights() {
        return Err(Error::bad_option(
            "layer",
            &l.name,
            format!(
                "is a {} layer, which has no channels of its own",
                l.kind.name()
            ),
        ));
    }
    Ok(net.output_shape(layer))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::Silent;
    use crate::model::{Activation, InputSpec, Layer, Layout};
    use ndarray::{Array1, Array2, Array4};

    /// A 1-channel 4 x 4 input and one 2 x 2 convolution with two filters: filter 0 sums
    /// its window, filter 1 is minus that. By hand: z0 at (r, c) is the sum of x over rows
    /// r..r+2 and columns c..c+2 (PyTorch's cross-correlation, no padding).
    fn net() -> Network {
        let mut w = Array4::<f32>::ones((2, 1, 2, 2));
        w.slice_mut(s![1, .., .., ..]).fill(-1.0);
        let conv = Layer::conv2d(
            "c",
            Activation::Relu,
            w,
            Array1::zeros(2),
            [1, 1],
            [0, 0],
            [1, 1],
        );
        let input = InputSpec {
            units: None,
            size: 16,
            layout: Layout::Image {
                height: 4,
                width: 4,
                channels: 1,
            },
            low: vec![-1.0; 16],
            high: vec![1.0; 16],
            names: None,
        };
        Network::new("t", "t", input, vec![conv, Layer::flatten("f")]).unwrap()
    }

    #[test]
    fn top_hits_find_the_sample_and_the_window() {
        let net = net();
        // Row 0: a bright dot at (3, 3) -> window (2, 2) sums 1.0. Row 1: bright dots at
        // (0, 1) and (1, 1) -> window (0, 0) (first in row-major order of the tied (0, 0)
        // and (0, 1)) sums 1.6. Row 2: all -0.5 -> every window -2 (filter 1 gives +2).
        let mut x = Array2::<f32>::zeros((3, 16));
        x[(0, 15)] = 1.0;
        x[(1, 1)] = 0.8;
        x[(1, 5)] = 0.8;
        x.row_mut(2).fill(-0.5);
        let hits = top_hits(&net, 0, x.view(), 2, &Silent).unwrap();
        assert_eq!(hits.channels.len(), 2);
        let c0 = &hits.channels[0];
        assert_eq!(c0.len(), 2);
        assert_eq!((c0[0].row, c0[0].position), (1, (0, 0)));
        assert!((c0[0].value - 1.6).abs() < 1e-6);
        assert_eq!((c0[1].row, c0[1].position), (0, (2, 2)));
        assert!((c0[1].value - 1.0).abs() < 1e-6);
        let c1 = &hits.channels[1];
        assert_eq!((c1[0].row, c1[0].position), (2, (0, 0)));
        assert!((c1[0].value - 2.0).abs() < 1e-6);
        // The same numbers as the channel's feature map on that sample.
        let maps = feature_maps(&net, 0, x.row(1).as_slice().unwrap()).unwrap();
        assert_eq!(maps.len(), 2 * 3 * 3);
        assert!((maps[0] - 1.6).abs() < 1e-6 && (maps[1] - 1.6).abs() < 1e-6);
        assert!((maps[9] + 1.6).abs() < 1e-6);
    }

    #[test]
    fn layers_without_channels_and_bad_samples_are_refused() {
        let net = net();
        let x = Array2::<f32>::zeros((1, 16));
        assert!(top_hits(&net, 1, x.view(), 3, &Silent).is_err());
        assert!(top_hits(&net, 5, x.view(), 3, &Silent).is_err());
        assert!(feature_maps(&net, 0, &[0.0; 3]).is_err());
        assert_eq!(
            top_hits(&net, 0, Array2::<f32>::zeros((0, 16)).view(), 3, &Silent)
                .unwrap()
                .channels,
            vec![Vec::<Hit>::new(); 2]
        );
    }
}
