//! Turning numbers into pictures: signed maps (weights, sensitivity) through the diverging
//! colour key, inputs (preferred inputs, probe samples) through a grey ramp over the input
//! box, and the grid of cells over the units of a lower layer. Pure functions from slices
//! to `egui::ColorImage`, so tiles, the detail view and PNG export draw the same pixels.

use crate::model::{InputSpec, Layout};
use egui::{Color32, ColorImage};

/// Pixels between channel panels of a signed RGB-layout map.
const CHANNEL_GAP: usize = 1;

/// Colour of a signed value `t` in [-1, 1] (0 = neutral) through the app's colour key.
pub fn signed(t: f32) -> Color32 {
    super::colour::ColourKey::standard().colour(t)
}

/// Grey level of an input value at fraction `t` in [0, 1] of its box (low = dark).
pub fn grey(t: f32) -> Color32 {
    let t = if t.is_finite() {
        t.clamp(0.0, 1.0)
    } else {
        0.0
    };
    // A little above black and below white, so the map's edge stays visible on either theme.
    let v = (20.0 + 215.0 * t).round() as u8;
    Color32::from_gray(v)
}

/// Colour for a non-finite value: a marker that is neither end of the key.
pub const NON_FINITE: Color32 = Color32::from_rgb(255, 0, 255);

/// The largest finite |v| of `values` (0 when there is none).
pub fn max_abs(values: &[f32]) -> f32 {
    values
        .iter()
        .filter(|v| v.is_finite())
        .fold(0.0f32, |m, v| m.max(v.abs()))
}

/// Width and height (in pixels) of a map in input layout, and the panel arrangement.
pub fn input_dims(spec: &InputSpec, signed_channels: bool) -> (usize, usize) {
    match spec.layout {
        Layout::Image {
            height,
            width,
            channels,
        } => {
            if channels > 1 && signed_channels {
                (width * channels + CHANNEL_GAP * (channels - 1), height)
            } else {
                (width, height)
            }
        }
        Layout::Vector => (spec.size, 1),
    }
}

/// Maps pixel (x, y) of a map drawn by [`signed_input_map`] back to the input index, if the
/// pixel is not a gap.
pub fn input_index_at(
    spec: &InputSpec,
    signed_channels: bool,
    x: usize,
    y: usize,
) -> Option<usize> {
    match spec.layout {
        Layout::Image {
            height,
            width,
            channels,
        } => {
            if y >= height {
                return None;
            }
            if channels > 1 && signed_channels {
                let panel = x / (width + CHANNEL_GAP);
                let px = x % (width + CHANNEL_GAP);
                (panel < channels && px < width).then(|| (y * width + px) * channels + panel)
            } else if x < width {
                // Grey maps show channel 0 (or the only channel); RGB maps show the pixel.
                Some((y * width + x) * channels)
            } else {
                None
            }
        }
        Layout::Vector => (y == 0 && x < spec.size).then_some(x),
    }
}

/// A signed map of `values` (`[input size]`) in the input layout: image inputs as
/// `height x width` (one panel per channel for RGB), vector inputs as a one-row strip.
/// `scale` is the |value| that maps to the ends of the key.
pub fn signed_input_map(spec: &InputSpec, values: &[f32], scale: f32) -> ColorImage {
    let (w, h) = input_dims(spec, true);
    let mut px = vec![Color32::TRANSPARENT; w * h];
    let inv = if scale > 0.0 { 1.0 / scale } else { 0.0 };
    let colour = |v: f32| {
        if v.is_finite() {
            signed((v * inv).clamp(-1.0, 1.0))
        } else {
            NON_FINITE
        }
    };
    match spec.layout {
        Layout::Image {
            height,
            width,
            channels,
        } => {
            for y in 0..height {
                for x in 0..width {
                    for c in 0..channels {
                        let i = (y * width + x) * channels + c;
                        let ox = c * (width + CHANNEL_GAP) + x;
                        if let Some(v) = values.get(i) {
                            px[y * w + ox] = colour(*v);
                        }
                    }
                }
            }
        }
        Layout::Vector => {
            for (i, v) in values.iter().enumerate().take(w) {
                px[i] = colour(*v);
            }
        }
    }
    ColorImage::new([w, h], px)
}

/// An input (inside the box) drawn as it would look: grey over [low, high] for one channel,
/// the colour itself for RGB, a grey strip for vectors.
pub fn input_picture(spec: &InputSpec, values: &[f32]) -> ColorImage {
    let frac = |i: usize| {
        let (lo, hi) = (spec.low[i], spec.high[i]);
        let v = values.get(i).copied().unwrap_or(lo);
        if hi > lo { (v - lo) / (hi - lo) } else { 0.5 }
    };
    match spec.layout {
        Layout::Image {
            height,
            width,
            channels,
        } => {
            let mut px = Vec::with_capacity(width * height);
            for p in 0..width * height {
                if channels == 3 {
                    let c = |k: usize| (frac(p * 3 + k).clamp(0.0, 1.0) * 255.0).round() as u8;
                    px.push(Color32::from_rgb(c(0), c(1), c(2)));
                } else {
                    px.push(grey(frac(p * channels)));
                }
            }
            ColorImage::new([width, height], px)
        }
        Layout::Vector => {
            let px = (0..spec.size).map(|i| grey(frac(i))).collect();
            ColorImage::new([spec.size, 1], px)
        }
    }
}

/// Columns of the cell grid over `n` lower units (close to square).
pub fn cell_columns(n: usize) -> usize {
    ((n as f64).sqrt().ceil() as usize).max(1)
}

/// A signed grid of cells, one per unit of the layer below, row by row: `weights: [fan_in]`.
/// Cells past the last unit are transparent.
pub fn cell_grid(weights: &[f32], scale: f32) -> ColorImage {
    let n = weights.len();
    let cols = cell_columns(n);
    let rows = n.div_ceil(cols).max(1);
    let inv = if scale > 0.0 { 1.0 / scale } else { 0.0 };
    let mut px = vec![Color32::TRANSPARENT; cols * rows];
    for (i, v) in weights.iter().enumerate() {
        px[i] = if v.is_finite() {
            signed((v * inv).clamp(-1.0, 1.0))
        } else {
            NON_FINITE
        };
    }
    ColorImage::new([cols, rows], px)
}

/// Converts a `ColorImage` to an `image` crate buffer (unmultiplied RGBA) for PNG export,
/// enlarged `zoom` times with nearest-neighbour sampling so pixels stay crisp.
pub fn to_rgba(img: &ColorImage, zoom: usize) -> image::RgbaImage {
    let zoom = zoom.max(1);
    let [w, h] = img.size;
    let mut out = image::RgbaImage::new((w * zoom) as u32, (h * zoom) as u32);
    for (x, y, p) in out.enumerate_pixels_mut() {
        let c = img.pixels[(y as usize / zoom) * w + (x as usize / zoom)];
        let [r, g, b, a] = c.to_srgba_unmultiplied();
        *p = image::Rgba([r, g, b, a]);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn image_spec(h: usize, w: usize, c: usize) -> InputSpec {
        InputSpec {
            size: h * w * c,
            layout: Layout::Image {
                height: h,
                width: w,
                channels: c,
            },
            low: vec![0.0; h * w * c],
            high: vec![1.0; h * w * c],
            names: None,
        }
    }

    #[test]
    fn rgb_panels_map_back_to_channel_last_indices() {
        let spec = image_spec(2, 3, 3);
        assert_eq!(input_dims(&spec, true), (3 * 3 + 2, 2));
        // Pixel (x=1, y=1) of the green panel is input (1*3+1)*3+1.
        assert_eq!(input_index_at(&spec, true, 4 + 1, 1), Some((3 + 1) * 3 + 1));
        // The gap column between panels is no input.
        assert_eq!(input_index_at(&spec, true, 3, 0), None);
    }

    #[test]
    fn cell_grid_is_close_to_square() {
        assert_eq!(cell_columns(2048), 46);
        let img = cell_grid(&[1.0; 10], 1.0);
        assert_eq!(img.size, [4, 3]);
        assert_eq!(img.pixels[11], Color32::TRANSPARENT);
    }

    #[test]
    fn grey_maps_box_ends_to_dark_and_light() {
        let spec = image_spec(1, 2, 1);
        let img = input_picture(&spec, &[0.0, 1.0]);
        assert!(img.pixels[0].r() < img.pixels[1].r());
    }
}
