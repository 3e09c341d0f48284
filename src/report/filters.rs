//! Pictures of convolutional layers, drawn with the colours of [`super::picture`]: a
//! filter's signed weights (one panel per input channel, or one colour picture of a
//! three-channel filter), a channel's feature map, the effective receptive field, and the
//! receptive field of one position as a crop of an input or a box drawn on it.
//!
//! Filters are given as PyTorch stores them, `[in_channels, kernel_h, kernel_w]` (one row
//! of a conv2d layer's `weights`); maps as `[height, width]` row-major.

use super::picture::{NON_FINITE, Picture, Rgba, TRANSPARENT, input_picture, signed};
use crate::model::{InputSpec, Layout};
use std::ops::Range;

/// Pixels between the channel panels of a filter.
const PANEL_GAP: usize = 1;
/// Panels per row of a filter picture before it wraps.
const PANELS_PER_ROW: usize = 4;

/// Colour of a receptive-field box: a saturated yellow, outside the colour key and never
/// a grey.
pub const BOX: Rgba = [255, 210, 0, 255];

/// A filter's signed weights `weights: [in_channels x kernel_h x kernel_w]`, one `kernel_w
/// x kernel_h` panel per input channel, left to right in channel order (at most four per
/// row, then the next row), transparent gaps between panels. `scale` is the |w| at the
/// colour key's ends.
pub fn filter_panels(
    weights: &[f32],
    in_channels: usize,
    [kh, kw]: [usize; 2],
    scale: f32,
) -> Picture {
    let per_row = in_channels.clamp(1, PANELS_PER_ROW);
    let rows = in_channels.div_ceil(per_row).max(1);
    let width = per_row * kw + (per_row - 1) * PANEL_GAP;
    let height = rows * kh + (rows - 1) * PANEL_GAP;
    let mut pixels = vec![TRANSPARENT; width * height];
    for c in 0..in_channels {
        let (px, py) = (
            (c % per_row) * (kw + PANEL_GAP),
            (c / per_row) * (kh + PANEL_GAP),
        );
        for i in 0..kh {
            for j in 0..kw {
                let v = weights
                    .get((c * kh + i) * kw + j)
                    .copied()
                    .unwrap_or(f32::NAN);
                pixels[(py + i) * width + px + j] = signed(v, scale);
            }
        }
    }
    Picture::from_pixels(width, height, pixels)
        .unwrap_or_else(|| Picture::filled(0, 0, TRANSPARENT))
}

/// A three-channel filter `weights: [3 x kernel_h x kernel_w]` as one colour picture,
/// normalised per filter: channel value `0.5 + 0.5 w / m` with `m` the filter's largest
/// |w|, so mid grey is zero weight and a pure colour is the input colour that drives the
/// filter most. A filter of zeros is mid grey; a non-finite weight gives [`NON_FINITE`].
pub fn filter_colour(weights: &[f32], [kh, kw]: [usize; 2]) -> Picture {
    let m = weights
        .iter()
        .filter(|v| v.is_finite())
        .fold(0.0f32, |a, v| a.max(v.abs()));
    let level = |v: f32| -> Option<u8> {
        if !v.is_finite() {
            return None;
        }
        let t = if m > 0.0 { 0.5 + 0.5 * v / m } else { 0.5 };
        Some((t.clamp(0.0, 1.0) * 255.0).round() as u8)
    };
    let pixels = (0..kh * kw)
        .map(|p| {
            let at = |c: usize| weights.get(c * kh * kw + p).copied().unwrap_or(f32::NAN);
            match (level(at(0)), level(at(1)), level(at(2))) {
                (Some(r), Some(g), Some(b)) => [r, g, b, 255],
                _ => NON_FINITE,
            }
        })
        .collect();
    Picture::from_pixels(kw, kh, pixels).unwrap_or_else(|| Picture::filled(0, 0, TRANSPARENT))
}

/// A signed map `values: [height x width]` (one channel of a feature map) through the
/// colour key with `scale` at its ends.
pub fn signed_map(values: &[f32], height: usize, width: usize, scale: f32) -> Picture {
    let pixels = (0..height * width)
        .map(|i| signed(values.get(i).copied().unwrap_or(f32::NAN), scale))
        .collect();
    Picture::from_pixels(width, height, pixels)
        .unwrap_or_else(|| Picture::filled(0, 0, TRANSPARENT))
}

/// The effective receptive field `values: [input size]` (mean |gradient|, channel last) as
/// one `height x width` map: the channels of a pixel are summed and the map is drawn on the
/// positive half of the colour key, scaled to its largest value. A vector input is a
/// one-row strip.
pub fn erf_map(spec: &InputSpec, values: &[f32]) -> Picture {
    let (height, width, channels) = match spec.layout {
        Layout::Image {
            height,
            width,
            channels,
        } => (height, width, channels),
        Layout::Vector => (1, spec.size, 1),
    };
    let summed: Vec<f32> = (0..height * width)
        .map(|p| {
            (0..channels)
                .map(|c| values.get(p * channels + c).copied().unwrap_or(f32::NAN))
                .sum()
        })
        .collect();
    let max = summed
        .iter()
        .filter(|v| v.is_finite())
        .fold(0.0f32, |a, &v| a.max(v));
    signed_map(&summed, height, width, if max > 0.0 { max } else { 1.0 })
}

/// The input pixels `rows x cols` of `values` (an input, channel last) drawn as
/// [`input_picture`] draws the whole input, cropped to the box (clipped to the input).
pub fn input_crop(
    spec: &InputSpec,
    values: &[f32],
    rows: Range<usize>,
    cols: Range<usize>,
) -> Picture {
    let whole = input_picture(spec, values);
    whole.cropped(cols.start, rows.start, cols.len(), rows.len())
}

/// The input `values` drawn as [`input_picture`] does, enlarged `zoom` times, with the box
/// `rows x cols` (input pixels, half-open) outlined in [`BOX`] yellow.
pub fn input_with_box(
    spec: &InputSpec,
    values: &[f32],
    rows: Range<usize>,
    cols: Range<usize>,
    zoom: usize,
) -> Picture {
    let zoom = zoom.max(1);
    let mut p = input_picture(spec, values).zoomed(zoom, zoom);
    p.outline(
        (cols.start * zoom, rows.start * zoom),
        (cols.end * zoom, rows.end * zoom),
        BOX,
    );
    p
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::report::picture::GAP;

    fn rgb_spec(height: usize, width: usize) -> InputSpec {
        InputSpec {
            units: None,
            size: height * width * 3,
            layout: Layout::Image {
                height,
                width,
                channels: 3,
            },
            low: vec![0.0; height * width * 3],
            high: vec![1.0; height * width * 3],
            names: None,
        }
    }

    #[test]
    fn filter_panels_put_each_channel_side_by_side() {
        // Two channels of a 2 x 3 kernel, PyTorch order [c, i, j].
        let w: Vec<f32> = (0..12).map(|v| v as f32 - 6.0).collect();
        let p = filter_panels(&w, 2, [2, 3], 6.0);
        assert_eq!(p.size(), [3 + 1 + 3, 2]);
        // Channel 1, row 1, column 2 is w[(1 * 2 + 1) * 3 + 2] = w[11] = 5.
        assert_eq!(p.pixel(4 + 2, 1), Some(signed(5.0, 6.0)));
        assert_eq!(p.pixel(0, 0), Some(signed(-6.0, 6.0)));
        assert_eq!(p.pixel(3, 0), Some(TRANSPARENT), "the gap between panels");
        // Nine channels wrap after four: three rows.
        let p = filter_panels(&[0.0; 9], 9, [1, 1], 1.0);
        assert_eq!(p.size(), [4 + 3, 3 + 2]);
    }

    #[test]
    fn colour_filter_is_normalised_per_filter() {
        // 1 x 2 kernel: pixel 0 is (r, g, b) = (2, -2, 0), pixel 1 (1, 0, NaN).
        let w = [2.0, 1.0, -2.0, 0.0, 0.0, f32::NAN];
        let p = filter_colour(&w, [1, 2]);
        // m = 2: 0.5 + 0.5 * (2, -2, 0) / 2 = (1, 0, 0.5) -> (255, 0, 128).
        assert_eq!(p.pixel(0, 0), Some([255, 0, 128, 255]));
        assert_eq!(p.pixel(1, 0), Some(NON_FINITE));
        assert_eq!(
            filter_colour(&[0.0; 3], [1, 1]).pixel(0, 0),
            Some([128, 128, 128, 255])
        );
    }

    #[test]
    fn crops_and_boxes_follow_the_input_pixels() {
        let spec = rgb_spec(4, 5);
        // Pixel (r, c) has red = r / 4, green = c / 5, blue 1.
        let x: Vec<f32> = (0..20)
            .flat_map(|p| [(p / 5) as f32 / 4.0, (p % 5) as f32 / 5.0, 1.0])
            .collect();
        let whole = input_picture(&spec, &x);
        let crop = input_crop(&spec, &x, 1..3, 2..5);
        assert_eq!(crop.size(), [3, 2]);
        assert_eq!(crop.pixel(0, 0), whole.pixel(2, 1));
        assert_eq!(crop.pixel(2, 1), whole.pixel(4, 2));
        // Clipped at the border.
        assert_eq!(input_crop(&spec, &x, 3..9, 0..2).size(), [2, 1]);
        let boxed = input_with_box(&spec, &x, 1..3, 2..5, 2);
        assert_eq!(boxed.size(), [10, 8]);
        assert_eq!(boxed.pixel(4, 2), Some(BOX), "top left corner of the box");
        assert_eq!(boxed.pixel(9, 5), Some(BOX), "bottom right corner");
        assert_eq!(
            boxed.pixel(6, 4),
            whole.pixel(3, 2),
            "inside keeps the input"
        );
        assert_ne!(BOX, GAP);
    }

    #[test]
    fn erf_sums_channels_and_scales_to_its_maximum() {
        let spec = rgb_spec(1, 2);
        let p = erf_map(&spec, &[1.0, 1.0, 2.0, 0.5, 0.5, 0.0]);
        assert_eq!(p.pixel(0, 0), Some(signed(4.0, 4.0)));
        assert_eq!(p.pixel(1, 0), Some(signed(1.0, 4.0)));
    }
}
