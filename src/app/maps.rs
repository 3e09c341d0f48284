//! Pictures for the app's textures: the report layer's renderer ([`crate::report::picture`])
//! draws every map, input picture and cell grid; this module only turns its RGBA buffers into
//! `egui::ColorImage`, so tiles, the detail view and the PNG exports show the same pixels.

use crate::model::InputSpec;
use crate::report::picture::{self, Picture};
use egui::{Color32, ColorImage};

pub use crate::report::colour::symmetric_max as max_abs;
pub use crate::report::picture::{cell_columns, input_index_at};

/// The report layer's picture as an egui image (8-bit sRGB, straight alpha).
pub fn to_color_image(p: &Picture) -> ColorImage {
    ColorImage::from_rgba_unmultiplied(p.size(), p.rgba_bytes())
}

/// The grey of fraction `t` of the input box, as input pictures draw it
/// ([`picture::grey`]), for the app's input key.
pub fn grey(t: f32) -> Color32 {
    let [r, g, b, a] = picture::grey(t);
    Color32::from_rgba_unmultiplied(r, g, b, a)
}

/// [`picture::signed_input_map`] as an egui image.
pub fn signed_input_map(spec: &InputSpec, values: &[f32], scale: f32) -> ColorImage {
    to_color_image(&picture::signed_input_map(spec, values, scale))
}

/// [`picture::input_picture`] as an egui image.
pub fn input_picture(spec: &InputSpec, values: &[f32]) -> ColorImage {
    to_color_image(&picture::input_picture(spec, values))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Layout;

    #[test]
    fn egui_images_carry_the_report_pixels() {
        // A 1 x 3 RGB input: its signed map has three one-pixel panels with transparent gaps,
        // so both opaque and transparent pixels cross the conversion.
        let spec = InputSpec {
            units: None,
            size: 3,
            layout: Layout::Image {
                height: 1,
                width: 1,
                channels: 3,
            },
            low: vec![0.0; 3],
            high: vec![1.0; 3],
            names: None,
        };
        let p = picture::signed_input_map(&spec, &[-1.0, f32::NAN, 0.5], 1.0);
        let img = to_color_image(&p);
        assert_eq!(img.size, p.size());
        for (c, want) in img.pixels.iter().zip(p.pixels()) {
            assert_eq!(c.to_srgba_unmultiplied(), *want);
        }
        assert_eq!(grey(1.0), Color32::WHITE);
        assert_eq!(grey(0.0), Color32::BLACK);
    }
}
