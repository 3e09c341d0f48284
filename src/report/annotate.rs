//! What makes an exported grid readable on its own: the unit index over every tile and, below
//! the grid, the colour key with its scale (and the no-value swatch), all drawn into the
//! pixels by this module with a tiny built-in font, so that `receptor prefer --png` and the
//! app's exports stay byte-identical without a font file or a font crate.
//!
//! The font is our own 3 x 5 pixel design for the characters numbers need (`0-9 + - . e`),
//! drawn [`TEXT_SCALE`] times enlarged; any other character leaves a gap.

use super::colour::{ColourKey, format_tick};
use super::picture::{Arrangement, GAP, GRID_GAP, Picture, Rgba, grid_geometry};
use crate::error::{Error, Result};

/// Glyph width and height, in font pixels.
const GLYPH_W: usize = 3;
const GLYPH_H: usize = 5;
/// Enlargement of the font: one font pixel is `TEXT_SCALE x TEXT_SCALE` image pixels.
pub const TEXT_SCALE: usize = 2;
/// Horizontal distance from one character to the next, in image pixels.
pub const ADVANCE: usize = (GLYPH_W + 1) * TEXT_SCALE;
/// Height of a line of text, in image pixels.
pub const TEXT_H: usize = GLYPH_H * TEXT_SCALE;
/// Colour of the text: a light grey that reads on the grid's dark gap colour.
pub const TEXT: Rgba = [235, 235, 235, 255];

/// Height of the band above each tile of a square grid that holds its unit index.
pub const LABEL_BAND: usize = TEXT_H + 2;
/// Height of the key strip below the grid: a gap, the bar, tick marks, the tick labels, a gap.
pub const KEY_BAR: usize = 12;
const KEY_TICK: usize = 3;
const KEY_MARGIN: usize = 4;
/// Height of the whole key strip.
pub const KEY_STRIP: usize = KEY_MARGIN + KEY_BAR + KEY_TICK + 1 + TEXT_H + KEY_MARGIN;
/// Longest colour bar, in pixels.
const KEY_MAX_LEN: usize = 256;
/// Shortest colour bar, in pixels (narrow grids are widened to hold it).
const KEY_MIN_LEN: usize = 120;

/// The rows of each glyph, top first, 3 bits each (the most significant bit on the left).
fn glyph(c: char) -> Option<[u8; GLYPH_H]> {
    Some(match c {
        '0' => [0b111, 0b101, 0b101, 0b101, 0b111],
        '1' => [0b010, 0b110, 0b010, 0b010, 0b111],
        '2' => [0b111, 0b001, 0b111, 0b100, 0b111],
        '3' => [0b111, 0b001, 0b011, 0b001, 0b111],
        '4' => [0b101, 0b101, 0b111, 0b001, 0b001],
        '5' => [0b111, 0b100, 0b111, 0b001, 0b111],
        '6' => [0b111, 0b100, 0b111, 0b101, 0b111],
        '7' => [0b111, 0b001, 0b010, 0b010, 0b010],
        '8' => [0b111, 0b101, 0b111, 0b101, 0b111],
        '9' => [0b111, 0b101, 0b111, 0b001, 0b111],
        '-' => [0b000, 0b000, 0b111, 0b000, 0b000],
        '+' => [0b000, 0b010, 0b111, 0b010, 0b000],
        '.' => [0b000, 0b000, 0b000, 0b000, 0b010],
        'e' => [0b000, 0b111, 0b111, 0b100, 0b011],
        _ => return None,
    })
}

/// Width of `text` in image pixels (no trailing space).
pub fn text_width(text: &str) -> usize {
    (text.chars().count() * ADVANCE).saturating_sub(TEXT_SCALE)
}

/// Draws `text` with its top left at (`x`, `y`) in `colour`; pixels outside the picture are
/// left out.
pub fn draw_text(p: &mut Picture, x: usize, y: usize, text: &str, colour: Rgba) {
    for (i, c) in text.chars().enumerate() {
        let Some(rows) = glyph(c) else { continue };
        let gx = x + i * ADVANCE;
        for (r, bits) in rows.iter().enumerate() {
            for col in 0..GLYPH_W {
                if bits & (0b100 >> col) != 0 {
                    p.fill_rect(
                        gx + col * TEXT_SCALE,
                        y + r * TEXT_SCALE,
                        TEXT_SCALE,
                        TEXT_SCALE,
                        colour,
                    );
                }
            }
        }
    }
}

/// The key drawn below an exported grid.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum GridKey {
    /// The signed colour key on `[-max_abs, +max_abs]`, with the no-value swatch; `None`:
    /// every tile has its own scale, and the ends read -1 and +1 (of each tile's largest
    /// |value|).
    Signed(Option<f32>),
    /// The grey ramp of input pictures, from the box's `low` (black) to `high` (white).
    Grey(f32, f32),
}

impl GridKey {
    /// The three tick labels: left end, centre, right end.
    pub fn ticks(self) -> [String; 3] {
        match self {
            GridKey::Signed(Some(m)) if m.is_finite() && m > 0.0 => {
                [format_tick(-m), "0".to_owned(), format_tick(m)]
            }
            GridKey::Signed(Some(_)) => [String::new(), "0".to_owned(), String::new()],
            GridKey::Signed(None) => ["-1".to_owned(), "0".to_owned(), "+1".to_owned()],
            GridKey::Grey(low, high) => [
                super::format::sig32(low, 3),
                super::format::sig32(0.5 * (low + high), 3),
                super::format::sig32(high, 3),
            ],
        }
    }

    /// The colour of the bar at fraction `f` in `[0, 1]` of its length.
    pub fn colour_at(self, f: f32) -> Rgba {
        match self {
            GridKey::Signed(_) => {
                let [r, g, b] = ColourKey::standard().rgb(2.0 * f - 1.0);
                [r, g, b, 255]
            }
            GridKey::Grey(..) => super::picture::grey(f),
        }
    }
}

/// Where the key's bar lies in an annotated picture: its left edge, top and length.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct KeyPlace {
    /// Left edge of the bar.
    pub x: usize,
    /// Top of the bar.
    pub y: usize,
    /// Length of the bar in pixels.
    pub len: usize,
}

impl KeyPlace {
    /// The x of the bar pixel showing fraction `f` in `[0, 1]`, and the fraction a column
    /// shows: column `i` of the bar shows `(i + 0.5) / len`.
    pub fn fraction_of_column(&self, i: usize) -> f32 {
        (i as f32 + 0.5) / self.len as f32
    }
}

/// `tiles` in a grid (`picture::grid_geometry`) with the unit index `units[k]` above (square grids) or
/// to the left of (strips) tile `k`, where it fits, and `key` below. Returns the picture and
/// where the key's bar is.
///
/// # Errors
/// When the picture would exceed 2^28 pixels.
pub fn labelled_grid(
    tiles: &[Picture],
    units: &[usize],
    arrangement: Arrangement,
    key: GridKey,
) -> Result<(Picture, KeyPlace)> {
    let tw = tiles.iter().map(Picture::width).max().unwrap_or(1);
    let th = tiles.iter().map(Picture::height).max().unwrap_or(1);
    let g = grid_geometry(tw, th, tiles.len(), arrangement)?;
    let widest = units
        .iter()
        .map(|u| text_width(&u.to_string()))
        .max()
        .unwrap_or(0);
    let (band, margin) = match arrangement {
        // Indices above tiles that are wide enough to hold them.
        Arrangement::Square if widest <= g.step_x - GRID_GAP => (LABEL_BAND, 0),
        Arrangement::Square => (0, 0),
        // Indices left of strips that are tall enough.
        Arrangement::Strips if g.step_y - GRID_GAP >= TEXT_H => (0, widest + 4),
        Arrangement::Strips => (0, 0),
    };
    let rows = tiles.len().max(1).div_ceil(g.cols);
    let key_len = (g.width + margin)
        .saturating_sub(2 * GRID_GAP + KEY_BAR + 8)
        .clamp(KEY_MIN_LEN, KEY_MAX_LEN);
    let ticks = key.ticks();
    let width = (g.width + margin).max(key_width(key_len, key)) as u64;
    let height = (g.height + rows * band + KEY_STRIP) as u64;
    if width.saturating_mul(height) > super::picture::MAX_PIXELS {
        return Err(Error::usage(format!(
            "the image would be {width} x {height} pixels, too large to write"
        )));
    }
    let mut out = Picture::filled(width as usize, height as usize, GAP);
    for (k, tile) in tiles.iter().enumerate() {
        let (col, row) = (k % g.cols, k / g.cols);
        let x0 = margin + GRID_GAP + col * g.step_x;
        let y0 = GRID_GAP + row * (g.step_y + band) + band;
        out.paste_zoomed(tile, x0, y0, g.sx, g.sy);
        let Some(u) = units.get(k) else { continue };
        if band > 0 {
            draw_text(&mut out, x0, y0 - band, &u.to_string(), TEXT);
        } else if margin > 0 {
            let text = u.to_string();
            let y = y0 + (tile.height() * g.sy).saturating_sub(TEXT_H) / 2;
            draw_text(&mut out, margin - 2 - text_width(&text), y, &text, TEXT);
        }
    }
    let place = KeyPlace {
        x: GRID_GAP,
        y: g.height + rows * band + KEY_MARGIN,
        len: key_len,
    };
    draw_key(&mut out, place, key, &ticks);
    Ok((out, place))
}

/// `picture` with `key` below it, on the grid's gap colour (a single exported map).
pub fn with_key(picture: &Picture, key: GridKey) -> (Picture, KeyPlace) {
    let ticks = key.ticks();
    let key_len = picture
        .width()
        .saturating_sub(2 * GRID_GAP + KEY_BAR + 8)
        .clamp(KEY_MIN_LEN, KEY_MAX_LEN);
    let width = picture.width().max(key_width(key_len, key));
    let mut out = Picture::filled(width, picture.height() + KEY_STRIP, GAP);
    out.paste_zoomed(picture, 0, 0, 1, 1);
    let place = KeyPlace {
        x: GRID_GAP,
        y: picture.height() + KEY_MARGIN,
        len: key_len,
    };
    draw_key(&mut out, place, key, &ticks);
    (out, place)
}

/// Width the key needs: the bar of `len` pixels between two grid gaps, and for the signed key
/// the no-value swatch after an 8 px gap. (The labels stay within the bar: the first is
/// left-aligned to its start, the last right-aligned to its end.)
fn key_width(len: usize, key: GridKey) -> usize {
    let swatch = match key {
        GridKey::Signed(_) => 8 + KEY_BAR,
        GridKey::Grey(..) => 0,
    };
    GRID_GAP + len + swatch + GRID_GAP
}

/// Draws the bar, its outline-free ticks and labels, and for the signed key the no-value
/// swatch to the right of the bar.
fn draw_key(out: &mut Picture, place: KeyPlace, key: GridKey, ticks: &[String; 3]) {
    for i in 0..place.len {
        let c = key.colour_at(place.fraction_of_column(i));
        out.fill_rect(place.x + i, place.y, 1, KEY_BAR, c);
    }
    let tick_y = place.y + KEY_BAR;
    let text_y = tick_y + KEY_TICK + 1;
    let xs = [place.x, place.x + place.len / 2, place.x + place.len - 1];
    for (k, (&x, text)) in xs.iter().zip(ticks).enumerate() {
        out.fill_rect(x, tick_y, 1, KEY_TICK, TEXT);
        let w = text_width(text);
        let left = match k {
            0 => x,
            1 => x.saturating_sub(w / 2),
            _ => (x + 1).saturating_sub(w),
        };
        draw_text(out, left, text_y, text, TEXT);
    }
    if let GridKey::Signed(_) = key {
        let [r, g, b] = ColourKey::standard().no_value_rgb();
        out.fill_rect(
            place.x + place.len + 8,
            place.y,
            KEY_BAR,
            KEY_BAR,
            [r, g, b, 255],
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn glyphs_are_distinct_and_text_is_measured() {
        let chars = "0123456789+-.e";
        for (i, a) in chars.chars().enumerate() {
            for b in chars.chars().skip(i + 1) {
                assert_ne!(glyph(a), glyph(b), "{a} and {b} look the same");
            }
        }
        assert_eq!(glyph('x'), None);
        // 3 characters: 3 advances of 8 less the last 2-pixel space.
        assert_eq!(text_width("123"), 3 * ADVANCE - TEXT_SCALE);
        assert_eq!(text_width(""), 0);
        // "1" drawn at (0, 0): its top row is 010, so the centre column's block is lit and
        // the left one is not.
        let mut p = Picture::filled(8, 12, GAP);
        draw_text(&mut p, 0, 0, "1", TEXT);
        assert_eq!(p.pixel(2, 0), Some(TEXT));
        assert_eq!(p.pixel(3, 1), Some(TEXT));
        assert_eq!(p.pixel(0, 0), Some(GAP));
        // Bottom row of "1" is 111.
        assert_eq!(p.pixel(0, 9), Some(TEXT));
        // Drawing past the edge is clipped, not a panic.
        draw_text(&mut p, 6, 10, "88", TEXT);
    }

    #[test]
    fn key_ticks() {
        assert_eq!(
            GridKey::Signed(Some(0.42)).ticks(),
            ["-0.42", "0", "+0.42"].map(String::from)
        );
        assert_eq!(
            GridKey::Signed(None).ticks(),
            ["-1", "0", "+1"].map(String::from)
        );
        assert_eq!(
            GridKey::Grey(-1.0, 1.0).ticks(),
            ["-1", "0", "1"].map(String::from)
        );
        assert_eq!(GridKey::Signed(Some(0.0)).ticks()[0], "");
    }

    #[test]
    fn grid_carries_indices_and_the_key() {
        // Three 2 x 2 tiles of one colour; a square grid enlarges 16x: 32 px tiles.
        let tile = Picture::filled(2, 2, [1, 2, 3, 255]);
        let tiles = vec![tile.clone(), tile.clone(), tile];
        let key = GridKey::Signed(Some(0.5));
        let (p, place) = labelled_grid(&tiles, &[7, 8, 9], Arrangement::Square, key)
            .unwrap_or_else(|e| panic!("{e}"));
        // Tile 0 sits below its label band.
        assert_eq!(
            p.pixel(GRID_GAP, GRID_GAP + LABEL_BAND),
            Some([1, 2, 3, 255])
        );
        // The label "7" (top row 111) is in the band above tile 0.
        assert_eq!(p.pixel(GRID_GAP, GRID_GAP), Some(TEXT));
        // The key's bar: each column shows the key at its fraction.
        for i in [0, place.len / 3, place.len - 1] {
            let f = place.fraction_of_column(i);
            let [r, g, b] = ColourKey::standard().rgb(2.0 * f - 1.0);
            assert_eq!(p.pixel(place.x + i, place.y + 1), Some([r, g, b, 255]));
        }
        // The no-value swatch beside it.
        let [r, g, b] = ColourKey::standard().no_value_rgb();
        assert_eq!(
            p.pixel(place.x + place.len + 9, place.y + 1),
            Some([r, g, b, 255])
        );
        // Taller than the plain grid by the bands and the key.
        let plain = super::super::picture::tile_grid(&tiles, Arrangement::Square)
            .unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(p.height(), plain.height() + 2 * LABEL_BAND + KEY_STRIP);
        assert!(p.width() >= plain.width());
    }

    #[test]
    fn a_single_map_gets_the_key_below_it() {
        // A 200 x 50 map: the bar is 200 - 2*2 - 12 - 8 = 176 px long (between 120 and 256).
        let map = Picture::filled(200, 50, [9, 9, 9, 255]);
        let (p, place) = with_key(&map, GridKey::Grey(0.0, 10.0));
        assert_eq!(p.size(), [200, 50 + KEY_STRIP]);
        assert_eq!(key_width(176, GridKey::Grey(0.0, 1.0)), 180);
        assert_eq!(key_width(176, GridKey::Signed(None)), 200);
        assert_eq!(place.len, 176);
        assert_eq!(p.pixel(199, 49), Some([9, 9, 9, 255]));
        // The grey ramp: column i shows round(255 (i + 0.5) / len).
        for i in [0, 88, 175] {
            let g = (255.0 * (i as f32 + 0.5) / 176.0).round() as u8;
            assert_eq!(p.pixel(place.x + i, place.y), Some([g, g, g, 255]));
        }
        // No no-value swatch on the grey key: the gap colour after the bar.
        assert_eq!(p.pixel(place.x + place.len + 9, place.y), Some(GAP));
        assert_eq!(GridKey::Grey(0.0, 10.0).ticks()[2], "10");
        // A tiny map is widened to hold the shortest bar.
        let (small, place) = with_key(&Picture::filled(4, 4, GAP), GridKey::Signed(Some(1.0)));
        assert_eq!(place.len, 120);
        assert!(small.width() > 120);
    }
}
