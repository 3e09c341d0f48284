//! The one renderer of receptor's pictures: signed maps (weights, sensitivities) through the
//! colour key, inputs (preferred inputs, probe samples) as they would look inside the input
//! box, cell grids over the units of a lower layer, and grids of tiles. Pure functions from
//! slices to [`Picture`] (8-bit sRGB with straight alpha), encoded as PNG here.
//!
//! `receptor prefer --png`, the app's textures (converted to egui images in `app/maps.rs`)
//! and the app's PNG exports all draw through this module, so the same numbers give the
//! same pixels everywhere.
//!
//! Colours:
//! - a signed value `v` on the scale `[-m, +m]` is `v / m` through the colour key
//!   ([`ColourKey::rgb_scaled`]);
//! - an input value is a grey level over its box: the low end black (0), the high end white
//!   (255), `round(255 (x - low) / (high - low))`, clamped; a degenerate box (low = high)
//!   draws its centre grey (128); three-channel images show the colour itself;
//! - a non-finite value (a search that diverged, an overflowed weight) is [`NON_FINITE`],
//!   the colour key's no-value yellow (`no_value` of `assets/colour-key.json`, shown in the
//!   legend too), which is neither a grey nor a colour of the key;
//! - grid gaps are a muted blue ([`GAP`]), distinct from every grey.

use super::annotate::{self, GridKey};
use super::colour::{ColourKey, ScaleMode, symmetric_max};
use crate::error::{Error, Result};
use crate::model::{InputSpec, Layout};
use ndarray::ArrayView2;
use std::path::Path;

/// One pixel: 8-bit sRGB red, green, blue and straight (unmultiplied) alpha.
pub type Rgba = [u8; 4];

/// Colour of a non-finite value: the key's no-value colour (`no_value` in
/// `assets/colour-key.json`, a vivid yellow), neither a grey nor a colour of the key. A test
/// keeps the two equal, so the screen, the PNGs and the legend agree.
pub const NON_FINITE: Rgba = [250, 232, 20, 255];

/// Fully transparent: the gaps between channel panels and cells past the last unit.
pub const TRANSPARENT: Rgba = [0, 0, 0, 0];

/// Colour of the gaps between grid tiles: a muted blue, distinct from every grey.
pub const GAP: Rgba = [40, 60, 90, 255];

/// A tile whose picture is not there yet (a preferred-input search that has not finished):
/// mid grey, the centre of the input box.
pub const MISSING: Rgba = [128, 128, 128, 255];

/// Pixels between tiles of a grid.
pub const GRID_GAP: usize = 2;

/// Pixels between the channel panels of a signed map of an RGB input.
const CHANNEL_GAP: usize = 1;

/// Largest picture a grid may have, in pixels (256 Mi pixels, 1 GiB of RGBA): a guard against
/// a layer so wide or an input so large that the image could not be held in memory.
pub(crate) const MAX_PIXELS: u64 = 1 << 28;

/// An image: `width x height` pixels, row by row from the top left.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Picture {
    width: usize,
    height: usize,
    pixels: Vec<Rgba>,
}

impl Picture {
    /// A `width x height` picture of one colour.
    pub fn filled(width: usize, height: usize, colour: Rgba) -> Picture {
        Picture {
            width,
            height,
            pixels: vec![colour; width * height],
        }
    }

    /// Width in pixels.
    pub fn width(&self) -> usize {
        self.width
    }

    /// Height in pixels.
    pub fn height(&self) -> usize {
        self.height
    }

    /// `[width, height]`, the order egui uses.
    pub fn size(&self) -> [usize; 2] {
        [self.width, self.height]
    }

    /// The pixels, `[height * width]`, row by row.
    pub fn pixels(&self) -> &[Rgba] {
        &self.pixels
    }

    /// The pixels as bytes, `[height * width * 4]` (R, G, B, A).
    pub fn rgba_bytes(&self) -> &[u8] {
        self.pixels.as_flattened()
    }

    /// The pixel at column `x`, row `y`; `None` outside the picture.
    pub fn pixel(&self, x: usize, y: usize) -> Option<Rgba> {
        (x < self.width && y < self.height).then(|| self.pixels[y * self.width + x])
    }

    /// True when every pixel is fully opaque.
    pub fn is_opaque(&self) -> bool {
        self.pixels.iter().all(|p| p[3] == 255)
    }

    /// A `width x height` picture from its pixels, row by row from the top left; `None`
    /// when `pixels` does not hold `width x height` of them.
    pub fn from_pixels(width: usize, height: usize, pixels: Vec<Rgba>) -> Option<Picture> {
        (width.checked_mul(height) == Some(pixels.len())).then_some(Picture {
            width,
            height,
            pixels,
        })
    }

    /// The part of the picture from column `x0`, row `y0`, `width x height` pixels, clipped
    /// to the picture (empty when nothing is left).
    pub fn cropped(&self, x0: usize, y0: usize, width: usize, height: usize) -> Picture {
        let x1 = x0.saturating_add(width).min(self.width);
        let y1 = y0.saturating_add(height).min(self.height);
        let (x0, y0) = (x0.min(x1), y0.min(y1));
        let pixels = (y0..y1)
            .flat_map(|y| {
                self.pixels[y * self.width + x0..y * self.width + x1]
                    .iter()
                    .copied()
            })
            .collect();
        Picture {
            width: x1 - x0,
            height: y1 - y0,
            pixels,
        }
    }

    /// Draws the outline of the half-open pixel box `[x0, x1) x [y0, y1)` in `colour`, one
    /// pixel thick, inside the box; parts outside the picture are left out.
    pub fn outline(&mut self, (x0, y0): (usize, usize), (x1, y1): (usize, usize), colour: Rgba) {
        let (x1, y1) = (x1.min(self.width), y1.min(self.height));
        if x0 >= x1 || y0 >= y1 {
            return;
        }
        for x in x0..x1 {
            self.pixels[y0 * self.width + x] = colour;
            self.pixels[(y1 - 1) * self.width + x] = colour;
        }
        for y in y0..y1 {
            self.pixels[y * self.width + x0] = colour;
            self.pixels[y * self.width + x1 - 1] = colour;
        }
    }

    /// Enlarged `sx` times across and `sy` times down (each at least 1) by repeating pixels,
    /// so that small maps stay crisp.
    pub fn zoomed(&self, sx: usize, sy: usize) -> Picture {
        let (sx, sy) = (sx.max(1), sy.max(1));
        let mut out = Picture::filled(self.width * sx, self.height * sy, TRANSPARENT);
        out.paste_zoomed(self, 0, 0, sx, sy);
        out
    }

    /// Fills the `width x height` box with its top left at (`x0`, `y0`) with `colour`; parts
    /// outside the picture are left out.
    pub fn fill_rect(&mut self, x0: usize, y0: usize, width: usize, height: usize, colour: Rgba) {
        let x1 = x0.saturating_add(width).min(self.width);
        let y1 = y0.saturating_add(height).min(self.height);
        for y in y0.min(y1)..y1 {
            self.pixels[y * self.width + x0.min(x1)..y * self.width + x1].fill(colour);
        }
    }

    /// Draws `tile` enlarged `sx x sy` with its top left at (`x0`, `y0`); the caller makes
    /// sure it fits.
    pub(crate) fn paste_zoomed(
        &mut self,
        tile: &Picture,
        x0: usize,
        y0: usize,
        sx: usize,
        sy: usize,
    ) {
        for y in 0..tile.height * sy {
            let src = &tile.pixels[(y / sy) * tile.width..][..tile.width];
            let dst = &mut self.pixels[(y0 + y) * self.width + x0..][..tile.width * sx];
            for (d, s) in dst.chunks_exact_mut(sx).zip(src) {
                d.fill(*s);
            }
        }
    }

    /// The picture encoded as PNG (ISO/IEC 15948): 8-bit RGB when every pixel is opaque,
    /// 8-bit RGBA otherwise.
    pub fn png_bytes(&self) -> Result<Vec<u8>> {
        let (w, h) = (self.width as u32, self.height as u32);
        let fail =
            |e: image::ImageError| Error::internal(format!("cannot encode the PNG image: {e}"));
        let too_big = || {
            Error::usage(format!(
                "the image is {} x {} pixels, too large to encode",
                self.width, self.height
            ))
        };
        if u32::try_from(self.width).is_err() || u32::try_from(self.height).is_err() {
            return Err(too_big());
        }
        let mut out = std::io::Cursor::new(Vec::new());
        if self.is_opaque() {
            let rgb: Vec<u8> = self
                .pixels
                .iter()
                .flat_map(|p| [p[0], p[1], p[2]])
                .collect();
            image::RgbImage::from_raw(w, h, rgb)
                .ok_or_else(too_big)?
                .write_to(&mut out, image::ImageFormat::Png)
                .map_err(fail)?;
        } else {
            image::RgbaImage::from_raw(w, h, self.rgba_bytes().to_vec())
                .ok_or_else(too_big)?
                .write_to(&mut out, image::ImageFormat::Png)
                .map_err(fail)?;
        }
        Ok(out.into_inner())
    }

    /// Encodes the picture as PNG and writes it to `path` atomically.
    pub fn write_png(&self, path: &Path) -> Result<()> {
        let bytes = self.png_bytes()?;
        crate::atomic::write_bytes_atomic(path, &bytes)
    }
}

/// The grey level of `x` in the box `[low, high]`: 0 at `low`, 255 at `high`, clamped; the
/// centre (128) for a degenerate box; `None` for a non-finite `x`.
pub fn level(x: f32, low: f32, high: f32) -> Option<u8> {
    if !x.is_finite() {
        return None;
    }
    let span = high - low;
    let t = if span > 0.0 { (x - low) / span } else { 0.5 };
    // In [0, 255] after the clamp, so the cast cannot wrap.
    Some((t.clamp(0.0, 1.0) * 255.0).round() as u8)
}

/// The grey of fraction `t` of the input box (0 = low end, black; 1 = high end, white), as
/// input pictures draw it; [`NON_FINITE`] for a non-finite `t`.
pub fn grey(t: f32) -> Rgba {
    level(t, 0.0, 1.0).map_or(NON_FINITE, |g| [g, g, g, 255])
}

/// The colour of a signed value `v` on the scale `[-scale, +scale]` through the standard
/// colour key; [`NON_FINITE`] for NaN and infinities.
pub fn signed(v: f32, scale: f32) -> Rgba {
    if v.is_finite() {
        let [r, g, b] = ColourKey::standard().rgb_scaled(v, scale);
        [r, g, b, 255]
    } else {
        NON_FINITE
    }
}

/// Width and height (in pixels) of a map in input layout: an image input is `width x height`,
/// or for a signed map of an RGB input one `width x height` panel per channel side by side
/// (`signed_channels`); a vector input is a one-row strip.
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

/// Maps pixel (x, y) of a map drawn by [`signed_input_map`] (`signed_channels`) or
/// [`input_picture`] back to the input index, if the pixel is not a gap.
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

/// A signed map of `values` (`[input size]`, channel-last for images) in the input layout:
/// image inputs as `height x width` (one panel per channel for RGB, transparent gaps between
/// panels), vector inputs as a one-row strip. `scale` is the |value| at the key's ends.
pub fn signed_input_map(spec: &InputSpec, values: &[f32], scale: f32) -> Picture {
    let (w, h) = input_dims(spec, true);
    let mut out = Picture::filled(w, h, TRANSPARENT);
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
                            out.pixels[y * w + ox] = signed(*v, scale);
                        }
                    }
                }
            }
        }
        Layout::Vector => {
            for (p, v) in out.pixels.iter_mut().zip(values) {
                *p = signed(*v, scale);
            }
        }
    }
    out
}

/// An input (`[input size]`, channel-last for images) drawn as it would look: grey over its
/// box for one channel, the colour itself for three (each channel over its own box), a grey
/// strip for vectors. A pixel with a non-finite (or missing) channel is [`NON_FINITE`].
pub fn input_picture(spec: &InputSpec, values: &[f32]) -> Picture {
    let at = |i: usize| {
        let v = values.get(i).copied().unwrap_or(f32::NAN);
        level(v, spec.low[i], spec.high[i])
    };
    let grey_at = |i: usize| at(i).map_or(NON_FINITE, |g| [g, g, g, 255]);
    match spec.layout {
        Layout::Image {
            height,
            width,
            channels,
        } => {
            let pixels = (0..width * height)
                .map(|p| {
                    if channels == 3 {
                        match (at(p * 3), at(p * 3 + 1), at(p * 3 + 2)) {
                            (Some(r), Some(g), Some(b)) => [r, g, b, 255],
                            _ => NON_FINITE,
                        }
                    } else {
                        grey_at(p * channels)
                    }
                })
                .collect();
            Picture {
                width,
                height,
                pixels,
            }
        }
        Layout::Vector => Picture {
            width: spec.size,
            height: 1,
            pixels: (0..spec.size).map(grey_at).collect(),
        },
    }
}

/// Columns of a near-square grid of `n` items: `ceil(sqrt(n))`, at least 1.
pub fn cell_columns(n: usize) -> usize {
    ((n as f64).sqrt().ceil() as usize).max(1)
}

/// A signed grid of cells, one per unit of the layer below, row by row: `weights: [fan_in]`,
/// [`cell_columns`] wide. Cells past the last unit are transparent.
pub fn cell_grid(weights: &[f32], scale: f32) -> Picture {
    let n = weights.len();
    let cols = cell_columns(n);
    let rows = n.div_ceil(cols).max(1);
    let mut out = Picture::filled(cols, rows, TRANSPARENT);
    for (p, v) in out.pixels.iter_mut().zip(weights) {
        *p = signed(*v, scale);
    }
    out
}

/// How a grid places its tiles.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Arrangement {
    /// A near-square grid ([`cell_columns`] columns) filled row by row, every tile enlarged
    /// by the same factor, `64 / longest side`, from 1 to 16.
    Square,
    /// One strip per tile, stacked top to bottom: cells `1024 / width` pixels wide and
    /// `4096 / tiles` pixels high, each from 1 to 16.
    Strips,
}

impl Arrangement {
    /// Square grids for image inputs, stacked strips for vector inputs.
    pub fn for_input(spec: &InputSpec) -> Arrangement {
        match spec.layout {
            Layout::Image { .. } => Arrangement::Square,
            Layout::Vector => Arrangement::Strips,
        }
    }
}

/// Where the tiles of a grid go: enlargement, columns and the picture's size.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct GridGeometry {
    /// Enlargement across and down.
    pub(crate) sx: usize,
    pub(crate) sy: usize,
    /// Tiles per row.
    pub(crate) cols: usize,
    /// Distance from one tile's top left to the next one's, across and down.
    pub(crate) step_x: usize,
    pub(crate) step_y: usize,
    /// Size of the whole picture.
    pub(crate) width: usize,
    pub(crate) height: usize,
}

/// The geometry of a grid of `n` tiles of `tw x th` pixels, refused when the picture would
/// exceed [`MAX_PIXELS`] (checked before anything is allocated).
pub(crate) fn grid_geometry(
    tw: usize,
    th: usize,
    n: usize,
    arrangement: Arrangement,
) -> Result<GridGeometry> {
    let (tw, th, n) = (tw.max(1), th.max(1), n.max(1));
    let (sx, sy, cols) = match arrangement {
        Arrangement::Square => {
            let s = (64 / tw.max(th)).clamp(1, 16);
            (s, s, cell_columns(n))
        }
        Arrangement::Strips => ((1024 / tw).clamp(1, 16), (4096 / n).clamp(1, 16), 1),
    };
    let rows = n.div_ceil(cols);
    let (step_x, step_y) = (tw * sx + GRID_GAP, th * sy + GRID_GAP);
    let width = cols as u64 * step_x as u64 + GRID_GAP as u64;
    let height = rows as u64 * step_y as u64 + GRID_GAP as u64;
    if width.saturating_mul(height) > MAX_PIXELS {
        return Err(Error::usage(format!(
            "the image would be {width} x {height} pixels, too large to write"
        )));
    }
    Ok(GridGeometry {
        sx,
        sy,
        cols,
        step_x,
        step_y,
        width: width as usize,
        height: height as usize,
    })
}

/// Draws `tiles` in one picture, in order, with [`GRID_GAP`] pixels of [`GAP`] colour around
/// and between them. Tiles are placed in cells the size of the largest tile.
///
/// # Errors
/// When the picture would exceed 2^28 pixels.
pub fn tile_grid(tiles: &[Picture], arrangement: Arrangement) -> Result<Picture> {
    let tw = tiles.iter().map(Picture::width).max().unwrap_or(1);
    let th = tiles.iter().map(Picture::height).max().unwrap_or(1);
    let g = grid_geometry(tw, th, tiles.len(), arrangement)?;
    let mut out = Picture::filled(g.width, g.height, GAP);
    for (k, tile) in tiles.iter().enumerate() {
        let x0 = GRID_GAP + (k % g.cols) * g.step_x;
        let y0 = GRID_GAP + (k / g.cols) * g.step_y;
        out.paste_zoomed(tile, x0, y0, g.sx, g.sy);
    }
    Ok(out)
}

/// The tiles of a grid of preferred inputs: [`input_picture`]s, a [`MISSING`] tile for a
/// search that has not finished (`None`).
fn preferred_tiles(spec: &InputSpec, inputs: &[Option<&[f32]>]) -> Vec<Picture> {
    let (w, h) = input_dims(spec, false);
    inputs
        .iter()
        .map(|x| match x {
            Some(x) => input_picture(spec, x),
            None => Picture::filled(w, h, MISSING),
        })
        .collect()
}

/// The key of input pictures: the grey ramp from the box's low end to its high end, or from
/// 0 to 1 (fractions of each input's box) when the inputs' boxes differ.
pub fn grey_key(spec: &InputSpec) -> GridKey {
    let same = |v: &[f32]| v.first().filter(|&&f| v.iter().all(|&x| x == f)).copied();
    match (same(&spec.low), same(&spec.high)) {
        (Some(low), Some(high)) => GridKey::Grey(low, high),
        _ => GridKey::Grey(0.0, 1.0),
    }
}

/// The grid of preferred inputs of units `0, 1, ...` in order; see [`preferred_grid_for`].
///
/// # Errors
/// When the picture would exceed 2^28 pixels.
pub fn preferred_grid(spec: &InputSpec, inputs: &[Option<&[f32]>]) -> Result<Picture> {
    let units: Vec<usize> = (0..inputs.len()).collect();
    preferred_grid_for(spec, inputs, &units)
}

/// The grid of preferred inputs of `units` ([`input_picture`] tiles in the given order,
/// [`Arrangement::for_input`]), each tile under its unit index, with the grey key of the
/// input box below ([`annotate::labelled_grid`]); `None` is a search that has not finished,
/// drawn as a [`MISSING`] tile. `receptor prefer --png` and the app's grid export both draw
/// this.
///
/// # Errors
/// When the picture would exceed 2^28 pixels.
pub fn preferred_grid_for(
    spec: &InputSpec,
    inputs: &[Option<&[f32]>],
    units: &[usize],
) -> Result<Picture> {
    let tiles = preferred_tiles(spec, inputs);
    let (p, _) =
        annotate::labelled_grid(&tiles, units, Arrangement::for_input(spec), grey_key(spec))?;
    Ok(p)
}

/// The grid of first-layer weight maps (`weights: [units, input size]`), units in `order`,
/// each a [`signed_input_map`] scaled by its own or the layer's largest |weight| (`scale`),
/// each under its unit index, with the colour key and its scale below (on a per-unit scale
/// the key's ends read -1 and +1 of each tile's own largest |weight|).
///
/// # Errors
/// When the picture would exceed 2^28 pixels.
pub fn weight_grid(
    spec: &InputSpec,
    weights: ArrayView2<'_, f32>,
    order: &[usize],
    scale: ScaleMode,
) -> Result<Picture> {
    let layer_max = weights
        .rows()
        .into_iter()
        .map(|r| symmetric_max(&r.to_vec()))
        .fold(0.0f32, f32::max);
    let units: Vec<usize> = order
        .iter()
        .copied()
        .filter(|&u| u < weights.nrows())
        .collect();
    let tiles: Vec<Picture> = units
        .iter()
        .map(|&u| {
            let w = weights.row(u).to_vec();
            signed_input_map(spec, &w, scale.pick(symmetric_max(&w), layer_max))
        })
        .collect();
    let key = match scale {
        ScaleMode::SharedLayer => GridKey::Signed(Some(layer_max)),
        ScaleMode::PerUnit => GridKey::Signed(None),
    };
    let (p, _) = annotate::labelled_grid(&tiles, &units, Arrangement::for_input(spec), key)?;
    Ok(p)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn image_spec(h: usize, w: usize, c: usize, low: f32, high: f32) -> InputSpec {
        InputSpec {
            units: None,
            size: h * w * c,
            layout: Layout::Image {
                height: h,
                width: w,
                channels: c,
            },
            low: vec![low; h * w * c],
            high: vec![high; h * w * c],
            names: None,
        }
    }

    fn vector_spec(n: usize) -> InputSpec {
        InputSpec::vector_box(n, 0.0, 1.0)
    }

    #[test]
    fn rgb_panels_map_back_to_channel_last_indices() {
        let spec = image_spec(2, 3, 3, 0.0, 1.0);
        assert_eq!(input_dims(&spec, true), (3 * 3 + 2, 2));
        // Pixel (x=1, y=1) of the green panel is input (1*3+1)*3+1.
        assert_eq!(input_index_at(&spec, true, 4 + 1, 1), Some((3 + 1) * 3 + 1));
        // The gap column between panels is no input.
        assert_eq!(input_index_at(&spec, true, 3, 0), None);
        // Each input lands on the pixel that maps back to it.
        let values: Vec<f32> = (0..18).map(|i| i as f32 - 9.0).collect();
        let map = signed_input_map(&spec, &values, 9.0);
        for y in 0..2 {
            for x in 0..11 {
                let p = map.pixel(x, y).unwrap_or(NON_FINITE);
                match input_index_at(&spec, true, x, y) {
                    Some(i) => assert_eq!(p, signed(values[i], 9.0), "pixel ({x}, {y})"),
                    None => assert_eq!(p, TRANSPARENT, "gap pixel ({x}, {y})"),
                }
            }
        }
    }

    #[test]
    fn cell_grid_is_close_to_square() {
        assert_eq!(cell_columns(2048), 46);
        assert_eq!(cell_columns(0), 1);
        let img = cell_grid(&[1.0; 10], 1.0);
        assert_eq!(img.size(), [4, 3]);
        assert_eq!(img.pixels()[11], TRANSPARENT);
        assert_eq!(img.pixels()[0], signed(1.0, 1.0));
    }

    #[test]
    fn signed_values_follow_the_key() {
        let key = ColourKey::standard();
        let [r, g, b] = key.rgb(0.5);
        assert_eq!(signed(0.21, 0.42), [r, g, b, 255]);
        let [r, g, b] = key.rgb(-1.0);
        assert_eq!(signed(-5.0, 0.42), [r, g, b, 255]);
        assert_eq!(signed(f32::NAN, 1.0), NON_FINITE);
        let [r, g, b] = key.no_value_rgb();
        assert_eq!(
            NON_FINITE,
            [r, g, b, 255],
            "picture and key file disagree on NaN"
        );
        assert_eq!(signed(f32::INFINITY, 1.0), NON_FINITE);
    }

    #[test]
    fn grey_maps_the_box_ends_to_black_and_white() {
        // round(255 (x - low) / (high - low)): -1 -> 0, 1 -> 255, 0 -> 127.5 -> 128.
        let spec = image_spec(1, 4, 1, -1.0, 1.0);
        let img = input_picture(&spec, &[-1.0, 1.0, 0.0, f32::NAN]);
        assert_eq!(img.pixels()[0], [0, 0, 0, 255]);
        assert_eq!(img.pixels()[1], [255, 255, 255, 255]);
        assert_eq!(img.pixels()[2], [128, 128, 128, 255]);
        assert_eq!(img.pixels()[3], NON_FINITE);
        assert_eq!(level(5.0, -1.0, 1.0), Some(255));
        assert_eq!(level(3.0, 2.0, 2.0), Some(128));
        // Three channels show the colour itself.
        let rgb = image_spec(1, 1, 3, 0.0, 1.0);
        assert_eq!(
            input_picture(&rgb, &[1.0, 0.0, 0.5]).pixels()[0],
            [255, 0, 128, 255]
        );
        assert_eq!(grey(1.0), [255, 255, 255, 255]);
    }

    #[test]
    fn square_grid_geometry() {
        // A 2x2 one-channel input, 3 tiles: 2 columns, 2 rows; 64 / 2 = 32 capped at 16, so
        // 32 px tiles and 2 px gaps: 2 + 2 (32 + 2) = 70 px square.
        let spec = image_spec(2, 2, 1, 0.0, 1.0);
        let a: &[f32] = &[1.0, 0.0, 0.0, 0.0];
        let tiles = preferred_tiles(&spec, &[Some(a), None, Some(a)]);
        let g = tile_grid(&tiles, Arrangement::Square).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(g.size(), [70, 70]);
        assert_eq!(g.pixel(0, 0), Some(GAP));
        assert_eq!(g.pixel(2 + 15, 2 + 15), Some([255, 255, 255, 255]));
        assert_eq!(g.pixel(2 + 16, 2 + 15), Some([0, 0, 0, 255]));
        assert_eq!(g.pixel(2 + 34 + 5, 2 + 5), Some(MISSING));
        // The fourth cell is empty: gap colour.
        assert_eq!(g.pixel(2 + 34 + 5, 2 + 34 + 5), Some(GAP));
    }

    #[test]
    fn strips_geometry() {
        // 4 inputs, 5 strips: cells 1024 / 4 = 256 capped at 16 wide, 4096 / 5 capped at 16
        // high: 2 + 4 * 16 + 2 = 68 wide, 2 + 5 (16 + 2) = 92 high.
        let spec = vector_spec(4);
        let x: &[f32] = &[1.0, 0.0, 0.0, 1.0];
        let tiles = preferred_tiles(&spec, &[Some(x); 5]);
        let g = tile_grid(&tiles, Arrangement::Strips).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(g.size(), [68, 92]);
        assert_eq!(g.pixel(2 + 3 * 16, 2 + 4 * 18), Some([255, 255, 255, 255]));
        assert_eq!(g.pixel(2 + 16, 2 + 4 * 18 + 15), Some([0, 0, 0, 255]));
        assert_eq!(g.pixel(10, 2 + 16), Some(GAP));
    }

    #[test]
    fn oversized_grids_are_refused_before_allocating() {
        // 2^20 inputs in one strip, 2^10 strips of 4 + 2 rows: 2^20 x 6146 pixels > 2^28.
        let err = grid_geometry(1 << 20, 1, 1 << 10, Arrangement::Strips).err();
        assert!(
            err.is_some_and(|e| e.to_string().contains("too large")),
            "expected a size error"
        );
        // One 8192 x 8192 tile (no enlargement, 2 px gaps) is about 2^26 pixels: fine.
        assert!(grid_geometry(8192, 8192, 1, Arrangement::Square).is_ok());
    }

    #[test]
    fn png_round_trips_through_the_image_decoder() {
        let spec = image_spec(2, 3, 3, 0.0, 1.0);
        let values: Vec<f32> = (0..18).map(|i| (i as f32 - 9.0) / 9.0).collect();
        for picture in [
            signed_input_map(&spec, &values, 1.0).zoomed(3, 2),
            input_picture(&spec, &values),
        ] {
            let bytes = picture.png_bytes().unwrap_or_else(|e| panic!("{e}"));
            // PNG signature (ISO/IEC 15948, section 5.2).
            assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n");
            let back = image::load_from_memory(&bytes)
                .unwrap_or_else(|e| panic!("{e}"))
                .to_rgba8();
            assert_eq!(
                back.dimensions(),
                (picture.width() as u32, picture.height() as u32)
            );
            assert_eq!(back.as_raw().as_slice(), picture.rgba_bytes());
        }
    }
}
