//! The colour key in the app: egui colours from the report layer's key
//! ([`crate::report::colour`]) and the legend widget that draws it beside a map.

use egui::{Align2, Color32, Rect, Sense, Shape, Stroke, Ui, pos2, vec2};

pub use crate::report::colour::{ColourKey, ScaleMode};
use crate::report::colour::{format_tick, legend_description, tick_labels};

/// An 8-bit sRGB colour from the report layer as an opaque egui colour.
pub fn color32([r, g, b]: [u8; 3]) -> Color32 {
    Color32::from_rgb(r, g, b)
}

/// The key's colour at `t` in `[-1, 1]` ([`ColourKey::rgb`]) as an egui colour.
pub fn key_colour(key: &ColourKey, t: f32) -> Color32 {
    color32(key.rgb(t))
}

/// The colour-scale switch of the grid toolbar: "Scale shared by layer" (the default) or
/// "Scale per unit", with a tooltip saying what each means.
pub fn scale_switch_ui(ui: &mut Ui, scale: &mut ScaleMode) {
    ui.weak("Colours:");
    for mode in [ScaleMode::SharedLayer, ScaleMode::PerUnit] {
        let tip = match mode {
            ScaleMode::SharedLayer => {
                "Every map of the layer on one scale, the layer's largest |value|: colours compare across units and weak units look faint"
            }
            ScaleMode::PerUnit => {
                "Each map on its own largest |value|: every pattern at full contrast, but a unit with tiny weights looks as vivid as the strongest"
            }
        };
        ui.selectable_value(scale, mode, mode.label())
            .on_hover_text(tip);
    }
}

/// Direction of the bar drawn by [`legend_ui_with`].
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum LegendOrientation {
    /// Negative on the left, positive on the right, tick labels below.
    Horizontal,
    /// Positive at the top, negative at the bottom, tick labels to the right.
    Vertical,
}

/// Draws a horizontal colour bar with the numeric scale `-max, -max/2, 0, +max/2, +max` below
/// it and `label` above, so a map can show its scale beside it. See [`legend_ui_with`].
pub fn legend_ui(ui: &mut Ui, key: &ColourKey, max_abs: f32, label: &str) -> egui::Response {
    let length = ui.available_width().clamp(120.0, 260.0);
    legend_ui_with(
        ui,
        key,
        max_abs,
        label,
        LegendOrientation::Horizontal,
        length,
    )
}

/// Thickness of the colour bar, in points.
const BAR: f32 = 14.0;
/// Length of a tick mark, in points.
const TICK: f32 = 4.0;
/// Flat-coloured segments the bar is drawn with.
const SEGMENTS: usize = 96;
/// Positions of the ticks on the key, most negative first (the order of [`tick_labels`]).
const TICK_T: [f32; 5] = [-1.0, -0.5, 0.0, 0.5, 1.0];

/// Draws the colour key as a bar of `length` points in the given orientation, with tick marks
/// and labels at `-max, -max/2, 0, +max/2, +max` (halves are left unlabelled when they would
/// crowd), `label` as a caption, and the value under the pointer on hover. A zero or non-finite
/// `max_abs` draws the bar with only "0" labelled and a note "all values zero".
pub fn legend_ui_with(
    ui: &mut Ui,
    key: &ColourKey,
    max_abs: f32,
    label: &str,
    orientation: LegendOrientation,
    length: f32,
) -> egui::Response {
    let text = LegendText::new(ui, max_abs, label);
    let length = length.max(60.0);
    let (rect, response) = ui.allocate_exact_size(text.size(orientation, length), Sense::hover());
    let description = legend_description(max_abs, label);
    response
        .widget_info(|| egui::WidgetInfo::labeled(egui::Role::Image, true, description.clone()));
    let bar = Bar::place(
        rect,
        orientation,
        length,
        text.font_size,
        text.caption_row(),
    );
    if ui.is_rect_visible(rect) {
        let painter = ui.painter();
        painter.galley(rect.left_top(), text.caption.clone(), text.colour);
        paint_bar(
            painter,
            key,
            &bar,
            ui.visuals().widgets.noninteractive.fg_stroke.color,
        );
        paint_ticks(ui, &bar, &text, length);
        paint_no_value(ui, key, rect, &text);
    }
    let scale = if text.no_scale { 0.0 } else { max_abs };
    let hovered_value = response
        .hover_pos()
        .and_then(|p| bar.t_at(p))
        .map(|t| t * scale);
    match hovered_value {
        Some(v) => {
            response.on_hover_text_at_pointer(format!("{description}\nhere: {}", format_tick(v)))
        }
        None => response.on_hover_text(description),
    }
}

/// The laid-out text of a legend: the caption and the five tick labels.
struct LegendText {
    /// Tick labels, most negative first (empty where there is no scale).
    ticks: Vec<std::sync::Arc<egui::Galley>>,
    /// True when `max_abs` gives no scale (only "0" is labelled).
    no_scale: bool,
    caption: std::sync::Arc<egui::Galley>,
    /// The text beside the no-value swatch.
    no_value: std::sync::Arc<egui::Galley>,
    colour: Color32,
    font_size: f32,
}

impl LegendText {
    fn new(ui: &Ui, max_abs: f32, label: &str) -> LegendText {
        let font = egui::TextStyle::Small.resolve(ui.style());
        let colour = ui.visuals().text_color();
        let labels = tick_labels(max_abs);
        let has_scale = !labels[0].is_empty();
        let caption = if has_scale {
            label.to_owned()
        } else if label.is_empty() {
            "all values zero".to_owned()
        } else {
            format!("{label} (all values zero)")
        };
        let painter = ui.painter();
        LegendText {
            ticks: labels
                .iter()
                .map(|t| painter.layout_no_wrap(t.clone(), font.clone(), colour))
                .collect(),
            no_scale: !has_scale,
            caption: painter.layout_no_wrap(caption, font.clone(), colour),
            no_value: painter.layout_no_wrap(NO_VALUE_TEXT.to_owned(), font.clone(), colour),
            colour,
            font_size: font.size,
        }
    }

    /// Width of the "no value" row: the swatch, a gap and its text.
    fn no_value_width(&self) -> f32 {
        self.font_size + 4.0 + self.no_value.size().x
    }

    /// Height of the caption (one line or more), with a little room.
    fn caption_row(&self) -> f32 {
        self.caption.size().y.max(self.font_size) + 4.0
    }

    /// Height of one text row, with a little room.
    fn row(&self) -> f32 {
        self.font_size + 4.0
    }

    /// The space the whole legend takes.
    fn size(&self, orientation: LegendOrientation, length: f32) -> egui::Vec2 {
        let caption = self.caption.size().x;
        match orientation {
            LegendOrientation::Horizontal => vec2(
                length.max(caption).max(self.no_value_width()),
                self.caption_row() + BAR + TICK + self.row() + self.row(),
            ),
            LegendOrientation::Vertical => {
                let widest = self.ticks.iter().map(|g| g.size().x).fold(0.0, f32::max);
                vec2(
                    (BAR + TICK + 4.0 + widest)
                        .max(caption)
                        .max(self.no_value_width()),
                    self.caption_row() + self.font_size + length + self.row() + self.row(),
                )
            }
        }
    }
}

/// Where the colour bar sits, and how a position on the key maps onto it.
struct Bar {
    rect: Rect,
    orientation: LegendOrientation,
}

impl Bar {
    /// The bar inside the legend's `rect`: below the caption (`row` high), and for a vertical
    /// bar with half a text row of room above and below, where the end labels are centred.
    fn place(
        rect: Rect,
        orientation: LegendOrientation,
        length: f32,
        font_size: f32,
        row: f32,
    ) -> Bar {
        let rect = match orientation {
            LegendOrientation::Horizontal => {
                Rect::from_min_size(pos2(rect.left(), rect.top() + row), vec2(length, BAR))
            }
            LegendOrientation::Vertical => Rect::from_min_size(
                pos2(rect.left(), rect.top() + row + 0.5 * font_size),
                vec2(BAR, length),
            ),
        };
        Bar { rect, orientation }
    }

    /// Screen coordinate along the bar of key position `t` in `[-1, 1]`.
    fn along(&self, t: f32) -> f32 {
        match self.orientation {
            LegendOrientation::Horizontal => self.rect.left() + (t + 1.0) * 0.5 * self.rect.width(),
            LegendOrientation::Vertical => {
                self.rect.bottom() - (t + 1.0) * 0.5 * self.rect.height()
            }
        }
    }

    /// Key position `t` under the screen point `p`, if `p` is on the bar.
    fn t_at(&self, p: egui::Pos2) -> Option<f32> {
        if !self.rect.contains(p) {
            return None;
        }
        let r = self.rect;
        let t = match self.orientation {
            LegendOrientation::Horizontal => (p.x - r.left()) / r.width() * 2.0 - 1.0,
            LegendOrientation::Vertical => (r.bottom() - p.y) / r.height() * 2.0 - 1.0,
        };
        Some(t.clamp(-1.0, 1.0))
    }

    /// The piece of the bar from key position `t0` to `t1`.
    fn segment(&self, t0: f32, t1: f32) -> Rect {
        match self.orientation {
            LegendOrientation::Horizontal => {
                Rect::from_x_y_ranges(self.along(t0)..=self.along(t1), self.rect.y_range())
            }
            LegendOrientation::Vertical => {
                Rect::from_x_y_ranges(self.rect.x_range(), self.along(t1)..=self.along(t0))
            }
        }
    }
}

/// Paints the key along the bar in flat segments, and its outline.
fn paint_bar(painter: &egui::Painter, key: &ColourKey, bar: &Bar, outline: Color32) {
    let mut mesh = egui::Mesh::default();
    for s in 0..SEGMENTS {
        let t0 = -1.0 + 2.0 * s as f32 / SEGMENTS as f32;
        let t1 = -1.0 + 2.0 * (s + 1) as f32 / SEGMENTS as f32;
        mesh.add_colored_rect(bar.segment(t0, t1), key_colour(key, 0.5 * (t0 + t1)));
    }
    painter.add(Shape::mesh(mesh));
    painter.rect_stroke(
        bar.rect,
        0.0,
        Stroke::new(1.0, outline),
        egui::StrokeKind::Outside,
    );
}

/// The text beside the no-value swatch of a legend.
pub const NO_VALUE_TEXT: &str = "no value (NaN)";

/// Paints the no-value swatch and its text in the legend's last row, so the colour a map uses
/// for NaN is explained beside the key (the same colour as `no_value` in the key file).
fn paint_no_value(ui: &Ui, key: &ColourKey, rect: Rect, text: &LegendText) {
    let painter = ui.painter();
    let side = text.font_size;
    let top = rect.bottom() - text.row() + 2.0;
    let swatch = Rect::from_min_size(pos2(rect.left(), top), vec2(side, side));
    painter.rect_filled(swatch, 0.0, color32(key.no_value_rgb()));
    painter.rect_stroke(
        swatch,
        0.0,
        Stroke::new(1.0, ui.visuals().widgets.noninteractive.fg_stroke.color),
        egui::StrokeKind::Outside,
    );
    painter.galley(
        pos2(swatch.right() + 4.0, top - 1.0),
        text.no_value.clone(),
        text.colour,
    );
}

/// Paints the five tick marks and their labels; along a horizontal bar the halves are
/// labelled only when all five labels fit.
fn paint_ticks(ui: &Ui, bar: &Bar, text: &LegendText, length: f32) {
    let painter = ui.painter();
    let stroke = Stroke::new(1.0, ui.visuals().widgets.noninteractive.fg_stroke.color);
    let total: f32 = text.ticks.iter().map(|g| g.size().x + 6.0).sum();
    let label_halves = bar.orientation == LegendOrientation::Vertical || total <= length;
    for (k, (t, galley)) in TICK_T.iter().zip(&text.ticks).enumerate() {
        let p = bar.along(*t);
        let show_text = !galley.is_empty() && (label_halves || k % 2 == 0);
        let r = bar.rect;
        let at = match bar.orientation {
            LegendOrientation::Horizontal => {
                painter.line_segment([pos2(p, r.bottom()), pos2(p, r.bottom() + TICK)], stroke);
                let anchor = match k {
                    0 => Align2::LEFT_TOP,
                    4 => Align2::RIGHT_TOP,
                    _ => Align2::CENTER_TOP,
                };
                anchor.anchor_size(pos2(p, r.bottom() + TICK + 1.0), galley.size())
            }
            LegendOrientation::Vertical => {
                painter.line_segment([pos2(r.right(), p), pos2(r.right() + TICK, p)], stroke);
                Align2::LEFT_CENTER.anchor_size(pos2(r.right() + TICK + 3.0, p), galley.size())
            }
        };
        if show_text {
            painter.galley(at.min, galley.clone(), text.colour);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn key() -> &'static ColourKey {
        ColourKey::standard()
    }

    #[test]
    fn legend_widget_draws_and_is_labelled() {
        use egui_kittest::Harness;
        use egui_kittest::kittest::Queryable;
        for orientation in [LegendOrientation::Horizontal, LegendOrientation::Vertical] {
            let mut size = egui::Vec2::ZERO;
            let mut harness = Harness::new_ui(|ui| {
                let r = legend_ui_with(ui, key(), 0.42, "weight", orientation, 200.0);
                size = r.rect.size();
            });
            harness.run();
            harness.get_by_label("weight colour key, -0.42 to +0.42");
            drop(harness);
            match orientation {
                LegendOrientation::Horizontal => assert!(size.x >= 200.0 && size.y > 14.0),
                LegendOrientation::Vertical => assert!(size.y >= 200.0 && size.x > 14.0),
            }
        }
        let mut harness = Harness::new_ui(|ui| {
            legend_ui(ui, key(), 0.0, "input");
        });
        harness.run();
        harness.get_by_label("input colour key, all values zero");
    }
}
