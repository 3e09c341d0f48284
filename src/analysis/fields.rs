//! Receptive fields in image space: the theoretical field of every layer by the standard
//! recurrences, the field of one position as a box of input pixels, and the effective
//! receptive field over a probe.
//!
//! Theoretical field (A. Araujo, W. Norris, J. Sim, "Computing receptive fields of
//! convolutional neural networks", Distill 2019, the single-path recurrences), per axis,
//! from the input (`r = 1`, `j = 1`, `u = 0`) up, for a layer with kernel `k`, stride `s`,
//! padding `p` and dilation `d` (effective kernel `k' = d (k - 1) + 1`; poolings have
//! `d = 1`):
//!
//! ```text
//! r_l = r_(l-1) + (k' - 1) j_(l-1)     receptive field size, in input pixels
//! j_l = j_(l-1) s                      jump: input pixels between neighbouring units
//! u_l = u_(l-1) - p j_(l-1)            first input pixel of unit 0's field
//! ```
//!
//! so `u_l = -P` with the article's effective padding `P = sum_l p_l prod_(i<l) s_i`. The
//! field of unit `o` covers input pixels `u + o j .. u + o j + r - 1` (it may reach into the
//! padding); its centre is `u + o j + (r - 1) / 2`.
//!
//! Effective receptive field (W. Luo, Y. Li, R. Urtasun, R. Zemel, "Understanding the
//! effective receptive field in deep convolutional neural networks", NeurIPS 2016): the mean
//! over the probe of `|d z / d x|`, where `z` is a channel's pre-activation at the centre of
//! its map.

use super::Progress;
use super::gradient::input_gradient_into;
use crate::error::{Error, Result};
use crate::model::{InputSpec, LayerKind, Layout, Network, Shape};
use ndarray::{Array2, ArrayView2, s};

/// The theoretical receptive field of one layer's units on the input, per axis `[h, w]`.
#[derive(Debug, Clone, PartialEq)]
pub struct Field {
    /// Layer name.
    pub layer: String,
    /// The layer type's schema name.
    pub kind: &'static str,
    /// Output channels of a map, units of a vector.
    pub out_channels: usize,
    /// Rows of the output map (1 for a vector).
    pub out_height: usize,
    /// Columns of the output map (1 for a vector).
    pub out_width: usize,
    /// Receptive field size in input pixels `[h, w]`. A vector layer (dense, flatten) sees
    /// the whole input: its field is the input's height and width.
    pub rf: [usize; 2],
    /// Input pixels between neighbouring units `[h, w]`; `None` for a vector layer.
    pub jump: Option<[usize; 2]>,
    /// First input pixel (row, column) of unit (0, 0)'s field, negative when it starts in
    /// the padding; `None` for a vector layer.
    pub first: Option<[i64; 2]>,
    /// The input-pixel centre of unit (0, 0)'s field `[row, column]` (for a vector layer,
    /// the centre of the input).
    pub start: [f64; 2],
}

impl Field {
    /// The input pixels `(rows, columns)` of the field of the unit at `position`, as
    /// half-open ranges clipped to an input of `height x width` pixels. A vector layer's
    /// field is the whole input.
    pub fn region(
        &self,
        position: (usize, usize),
        (height, width): (usize, usize),
    ) -> (std::ops::Range<usize>, std::ops::Range<usize>) {
        let (Some(j), Some(u)) = (self.jump, self.first) else {
            return (0..height, 0..width);
        };
        let axis = |o: usize, a: usize, size: usize| {
            let lo = u[a] + (o * j[a]) as i64;
            let hi = lo + self.rf[a] as i64;
            let clip = |v: i64| v.clamp(0, size as i64) as usize;
            clip(lo)..clip(hi)
        };
        (axis(position.0, 0, height), axis(position.1, 1, width))
    }
}

/// The part `rows x cols` of an image input `x: [input size]` (row-major, channel last) as
/// an input of its own: the input spec of the crop (its box cropped the same way) and the
/// cropped values. A vector layout is returned whole.
pub fn crop(
    spec: &InputSpec,
    x: &[f32],
    rows: std::ops::Range<usize>,
    cols: std::ops::Range<usize>,
) -> (InputSpec, Vec<f32>) {
    let Layout::Image {
        width, channels, ..
    } = spec.layout
    else {
        return (spec.clone(), x.to_vec());
    };
    let pick = |v: &[f32]| -> Vec<f32> {
        let mut out = Vec::with_capacity(rows.len() * cols.len() * channels);
        for y in rows.clone() {
            let start = (y * width + cols.start) * channels;
            out.extend_from_slice(&v[start..start + cols.len() * channels]);
        }
        out
    };
    let size = rows.len() * cols.len() * channels;
    let cropped = InputSpec {
        units: None,
        size,
        layout: Layout::Image {
            height: rows.len(),
            width: cols.len(),
            channels,
        },
        low: pick(&spec.low),
        high: pick(&spec.high),
        names: None,
    };
    (cropped, pick(x))
}

/// The input's height and width: of the image layout, or `(1, size)` for a vector.
fn input_hw(net: &Network) -> (usize, usize) {
    match net.input().layout {
        Layout::Image { height, width, .. } => (height, width),
        Layout::Vector => (1, net.input().size),
    }
}

/// The theoretical receptive field of every layer (module docs), from the first layer to
/// the last. Layers from the first dense or flatten layer on see the whole input.
pub fn receptive_fields(net: &Network) -> Vec<Field> {
    let (h, w) = input_hw(net);
    let mut r = [1usize; 2];
    let mut j = [1usize; 2];
    let mut u = [0i64; 2];
    let mut spatial = matches!(net.input_shape(), Shape::Map { .. });
    let mut out = Vec::with_capacity(net.layers().len());
    for (l, layer) in net.layers().iter().enumerate() {
        let geometry = match layer.kind {
            LayerKind::Conv2d(c) => Some((c.kernel, c.stride, c.padding, c.dilation)),
            LayerKind::MaxPool2d(p) | LayerKind::AvgPool2d(p) => {
                Some((p.kernel, p.stride, p.padding, [1, 1]))
            }
            LayerKind::Dense | LayerKind::Flatten => None,
        };
        match geometry {
            Some((k, st, p, d)) if spatial => {
                for a in 0..2 {
                    let keff = d[a] * (k[a] - 1) + 1;
                    r[a] += (keff - 1) * j[a];
                    u[a] -= (p[a] * j[a]) as i64;
                    j[a] *= st[a];
                }
            }
            _ => spatial = false,
        }
        let shape = net.output_shape(l);
        let (oc, oh, ow) = match shape {
            Shape::Map {
                channels,
                height,
                width,
            } => (channels, height, width),
            Shape::Vector(n) => (n, 1, 1),
        };
        let field = if spatial {
            Field {
                layer: layer.name.clone(),
                kind: layer.kind.name(),
                out_channels: oc,
                out_height: oh,
                out_width: ow,
                rf: r,
                jump: Some(j),
                first: Some(u),
                start: [
                    u[0] as f64 + (r[0] - 1) as f64 / 2.0,
                    u[1] as f64 + (r[1] - 1) as f64 / 2.0,
                ],
            }
        } else {
            Field {
                layer: layer.name.clone(),
                kind: layer.kind.name(),
                out_channels: oc,
                out_height: oh,
                out_width: ow,
                rf: [h, w],
                jump: None,
                first: None,
                start: [(h as f64 - 1.0) / 2.0, (w as f64 - 1.0) / 2.0],
            }
        };
        out.push(field);
    }
    out
}

/// Checks that `position` lies on layer `layer`'s output map and gives it, or the centre
/// of the map ([`Shape::centre`]) when `position` is `None`. A vector layer has the single
/// position (0, 0).
///
/// Errors: [`Error::BadOption`] for a position outside the map, or any position on a
/// vector layer.
pub fn check_position(
    net: &Network,
    layer: usize,
    position: Option<(usize, usize)>,
) -> Result<(usize, usize)> {
    let shape = net.output_shape(layer);
    match (shape, position) {
        (_, None) => Ok(shape.centre()),
        (Shape::Map { height, width, .. }, Some((r, c))) => {
            if r < height && c < width {
                Ok((r, c))
            } else {
                Err(Error::bad_option(
                    "position",
                    format!("{r},{c}"),
                    format!(
                        "must lie on layer '{}''s {height} x {width} map (rows 0 to {}, columns 0 to {})",
                        net.layer(layer).name,
                        height - 1,
                        width - 1
                    ),
                ))
            }
        }
        (Shape::Vector(_), Some((r, c))) => Err(Error::bad_option(
            "position",
            format!("{r},{c}"),
            format!(
                "only applies to a layer with a map output; layer '{}' gives a vector",
                net.layer(layer).name
            ),
        )),
    }
}

/// The effective receptive field of channel `channel` of layer `layer` (module docs):
/// `mean_b |d z_b / d x|` over the probe rows `inputs: [rows, input size]`, where `z_b`
/// is the channel's pre-activation at the centre of its map (the unit itself on a vector
/// layer). Gives `[input size]` in the input's layout (row-major, channel last).
///
/// Errors: [`Error::BadOption`] for a layer without units or a channel it does not have,
/// a probe error for an empty probe, [`Error::Cancelled`] when `progress` asks to stop.
///
/// # Panics
/// When `inputs` does not have one column per input (probe readers check it).
pub fn effective_receptive_field(
    net: &Network,
    layer: usize,
    channel: usize,
    inputs: ArrayView2<f32>,
    progress: &dyn Progress,
) -> Result<Vec<f32>> {
    let l = net.layers().get(layer).ok_or_else(|| {
        Error::bad_option(
            "layer",
            layer,
            format!("must be a layer index below {}", net.layers().len()),
        )
    })?;
    if channel >= l.units() {
        return Err(Error::bad_option(
            "unit",
            channel,
            format!("layer '{}' has {} units", l.name, l.units()),
        ));
    }
    let rows = inputs.nrows();
    if rows == 0 {
        return Err(Error::probe("the probe", "the probe has no samples"));
    }
    let shape = net.output_shape(layer);
    let target = [shape.index(channel, shape.centre())];
    let n = net.input().size;
    let mut sum = vec![0.0f64; n];
    let block = 256;
    let mut ws = super::gradient::GradWorkspace::default();
    let mut start = 0;
    while start < rows {
        if progress.cancelled() {
            return Err(Error::Cancelled);
        }
        progress.set(start as f32 / rows as f32);
        let end = (start + block).min(rows);
        let x = inputs.slice(s![start..end, ..]);
        let mut z = vec![0.0f32; end - start];
        let mut g = Array2::<f32>::zeros((end - start, n));
        input_gradient_into(
            net,
            layer,
            &target,
            x,
            &mut z,
            g.view_mut(),
            &mut ws,
            &|| progress.cancelled(),
        )?;
        for row in g.rows() {
            for (acc, v) in sum.iter_mut().zip(row.iter()) {
                *acc += f64::from(v.abs());
            }
        }
        start = end;
    }
    progress.set(1.0);
    Ok(sum.iter().map(|v| (v / rows as f64) as f32).collect())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::gradient::input_gradient;
    use crate::model::{Activation, Layer};
    use ndarray::{Array1, Array4};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// A network of `layers` on a `size x size` grey image; conv layers get random positive
    /// weights (so no tap cancels another) and identity activations.
    fn stack(size: usize, specs: &[(&str, usize, usize, usize, usize)]) -> Network {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let mut layers = Vec::new();
        let mut ch = 1;
        for (i, &(kind, k, st, p, d)) in specs.iter().enumerate() {
            let name = format!("l{i}");
            layers.push(match kind {
                "conv" => {
                    let w = Array4::from_shape_fn((2, ch, k, k), |_| rng.random_range(0.1f32..1.0));
                    ch = 2;
                    Layer::conv2d(
                        name,
                        Activation::Identity,
                        w,
                        Array1::zeros(2),
                        [st, st],
                        [p, p],
                        [d, d],
                    )
                }
                "max" => Layer::max_pool2d(name, [k, k], [st, st], [p, p]),
                _ => Layer::avg_pool2d(name, [k, k], [st, st], [p, p]),
            });
        }
        let input = InputSpec {
            units: None,
            size: size * size,
            layout: Layout::Image {
                height: size,
                width: size,
                channels: 1,
            },
            low: vec![0.0; size * size],
            high: vec![1.0; size * size],
            names: None,
        };
        Network::new("test", "t", input, layers).expect("valid stack")
    }

    /// The worked example of Araujo et al. (Distill 2019): the table of receptive fields
    /// published with the article (the authors' library's table of end-points) gives TF-Slim
    /// AlexNet v2 (conv1 11x11/4 valid, pool1 3x3/2, conv2 5x5 same, pool2 3x3/2, conv3-5
    /// 3x3 same, pool5 3x3/2) as conv1 11/4/0, pool1 19/8/0, conv2 51/8/16, conv3 99/16/32,
    /// conv4 131/16/48, conv5 163/16/64, pool5 195/32/64 (field, effective stride, effective
    /// padding), and VGG-16 to pool5 as 212/32/90. Our first pixel is minus the effective
    /// padding.
    #[test]
    fn article_examples_alexnet_and_vgg() {
        let alex = stack(
            224,
            &[
                ("conv", 11, 4, 0, 1),
                ("max", 3, 2, 0, 1),
                ("conv", 5, 1, 2, 1),
                ("max", 3, 2, 0, 1),
                ("conv", 3, 1, 1, 1),
                ("conv", 3, 1, 1, 1),
                ("conv", 3, 1, 1, 1),
                ("max", 3, 2, 0, 1),
            ],
        );
        let f = receptive_fields(&alex);
        let want = [
            (0, 11, 4, 0),
            (1, 19, 8, 0),
            (2, 51, 8, 16),
            (4, 99, 16, 32),
            (5, 131, 16, 48),
            (6, 163, 16, 64),
            (7, 195, 32, 64),
        ];
        for (l, rf, jump, pad) in want {
            assert_eq!(f[l].rf, [rf, rf], "layer {l}");
            assert_eq!(f[l].jump, Some([jump, jump]), "layer {l}");
            assert_eq!(f[l].first, Some([-pad, -pad]), "layer {l}");
            let c = -(pad as f64) + (rf as f64 - 1.0) / 2.0;
            assert_eq!(f[l].start, [c, c]);
        }
        let mut vgg = Vec::new();
        for convs in [2, 2, 3, 3, 3] {
            vgg.extend(std::iter::repeat_n(("conv", 3, 1, 1, 1), convs));
            vgg.push(("max", 2, 2, 0, 1));
        }
        let f = receptive_fields(&stack(224, &vgg));
        let last = f.last().expect("layers");
        assert_eq!(last.rf, [212, 212]);
        assert_eq!(last.jump, Some([32, 32]));
        assert_eq!(last.first, Some([-90, -90]));
        assert_eq!((last.out_height, last.out_width), (7, 7));
    }

    /// Brute force: the input pixels with a nonzero gradient of one unit (the union over
    /// random inputs, so that max pooling's one routed cell per window covers the window)
    /// are exactly the recurrence's field clipped to the image at the centre of every
    /// layer's map, and lie inside it at the corners (where a deeper layer's padded cell
    /// can cover image pixels that then get no gradient through it), with strides, padding
    /// and dilation.
    #[test]
    fn field_is_the_set_of_pixels_with_nonzero_gradient() {
        let net = stack(
            41,
            &[
                ("conv", 3, 1, 1, 1),
                ("max", 2, 2, 0, 1),
                ("conv", 3, 2, 1, 2),
                ("avg", 3, 1, 1, 1),
                ("conv", 2, 1, 0, 1),
            ],
        );
        let fields = receptive_fields(&net);
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let x = Array2::from_shape_fn((64, 41 * 41), |_| rng.random_range(0.0f32..1.0));
        for (l, f) in fields.iter().enumerate() {
            let shape = net.output_shape(l);
            for pos in [(0, 0), (f.out_height - 1, f.out_width - 1), shape.centre()] {
                let (_, g) = input_gradient(&net, l, &[shape.index(1, pos)], x.view());
                let (rows, cols) = f.region(pos, (41, 41));
                for y in 0..41 {
                    for xx in 0..41 {
                        let hit = g.column(y * 41 + xx).iter().any(|v| *v != 0.0);
                        let inside = rows.contains(&y) && cols.contains(&xx);
                        if pos == shape.centre() {
                            assert_eq!(hit, inside, "layer {l} centre {pos:?} pixel ({y}, {xx})");
                        } else {
                            assert!(!hit || inside, "layer {l} {pos:?} pixel ({y}, {xx})");
                        }
                    }
                }
            }
        }
    }

    /// The effective field of a first-layer channel is |w| of its filter placed on the
    /// receptive field (the gradient of a linear unit is its weights, at every sample).
    #[test]
    fn effective_field_of_a_first_layer_filter_is_its_weights() {
        let net = stack(7, &[("conv", 3, 1, 0, 1)]);
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let x = Array2::from_shape_fn((5, 49), |_| rng.random_range(0.0f32..1.0));
        let erf = effective_receptive_field(&net, 0, 1, x.view(), &crate::analysis::Silent)
            .expect("valid request");
        let w = net.layer(0).weights.row(1);
        // Output 5 x 5, centre (2, 2): the field is input rows and columns 2..5.
        for y in 0..7 {
            for xx in 0..7 {
                let want = if (2..5).contains(&y) && (2..5).contains(&xx) {
                    w[(y - 2) * 3 + (xx - 2)].abs()
                } else {
                    0.0
                };
                approx::assert_abs_diff_eq!(erf[y * 7 + xx], want, epsilon = 1e-6);
            }
        }
        assert!(effective_receptive_field(&net, 0, 2, x.view(), &crate::analysis::Silent).is_err());
    }
}
