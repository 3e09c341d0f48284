//! Charts of vector inputs and of incoming connections, drawn from the rows the core makes
//! (`analysis::features`): one row per feature with its name, its value in its own unit,
//! its box and where the reference data lies; the same chart shrunk to a glyph for the
//! tile grid; and a deeper unit's incoming connections as a sorted, signed bar chart named
//! by the units below (a click walks down to that unit).

use super::colour::{self, ColourKey};
use super::state::{AppState, Selection};
use crate::analysis::features::{
    FeatureOrder, FeatureRow, FeatureSpread, incoming_by_weight, lower_unit_name, number_text,
    signed_text,
};
use crate::model::{InputSpec, Network};
use egui::{Align2, Color32, Rect, Sense, Stroke, pos2, vec2};

/// Height of one chart row, in points.
const ROW: f32 = 20.0;
/// Width of the name column.
const NAME_W: f32 = 150.0;
/// Width of each box-end column (input charts).
const END_W: f32 = 36.0;
/// Width of the value column of signed charts ("-6.508e-4 per ppm").
const VALUE_W: f32 = 120.0;
/// Width of the value column of input charts ("87.76 %").
const INPUT_VALUE_W: f32 = 84.0;
/// Rows of the incoming-connection chart shown before it scrolls.
const INCOMING_VISIBLE: f32 = 16.0;

/// What a chart's values are.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Quantity {
    /// An input in each feature's own unit (a preferred input, a sample): a point in the
    /// feature's box over the band of the reference data.
    Input,
    /// A signed rate of z per feature unit (a weight, dz/dx), `what` naming it; a bar from
    /// zero coloured by the colour key at the scale `max_abs`.
    Rate {
        /// "weight", "dz/dx".
        what: &'static str,
        /// |value| at the ends of the colour key.
        max_abs: f32,
    },
    /// A signed share of z in z's own units (attribution), drawn as [`Quantity::Rate`].
    Share {
        /// "attribution".
        what: &'static str,
        /// |value| at the ends of the colour key.
        max_abs: f32,
    },
}

impl Quantity {
    /// The colour-key scale of a signed quantity (`None` for inputs).
    pub fn max_abs(self) -> Option<f32> {
        match self {
            Quantity::Input => None,
            Quantity::Rate { max_abs, .. } | Quantity::Share { max_abs, .. } => Some(max_abs),
        }
    }
}

/// The row's full text (its accessible label and hover text): "air_temp_c: weight +0.2606
/// per degC; box -5 to 20 degC; reference data 5-95% 1.1 to 5.2, median 3.3 degC".
pub fn row_text(row: &FeatureRow, q: Quantity) -> String {
    let value = match q {
        Quantity::Input => format!("value {}", row.value_text()),
        Quantity::Rate { what, .. } => format!("{what} {}", row.rate_text()),
        Quantity::Share { what, .. } => format!("{what} {}", signed_text(f64::from(row.value))),
    };
    let mut text = format!("{}: {value}; {}", row.name, row.box_text());
    if let Quantity::Rate { what: "weight", .. } = q {
        // Features differ in units: what the weight does over the feature's own box
        // (|w| (high - low), exact for the weighted sum).
        let span = f64::from(row.high) - f64::from(row.low);
        text.push_str(&format!(
            " (moves z by up to {} across it)",
            number_text(f64::from(row.value.abs()) * span)
        ));
    }
    let spread = row.spread_text();
    if !spread.is_empty() {
        text.push_str("; ");
        text.push_str(&spread);
    }
    text
}

/// The short value text of the value column.
fn value_text(row: &FeatureRow, q: Quantity) -> String {
    match q {
        Quantity::Input => row.value_text(),
        Quantity::Rate { .. } => row.rate_text(),
        Quantity::Share { .. } => signed_text(f64::from(row.value)),
    }
}

/// The choice of row order; `strongest` names what "strongest" means for this chart.
pub fn order_ui(ui: &mut egui::Ui, order: &mut FeatureOrder, strongest: &str) {
    ui.horizontal(|ui| {
        ui.label("Rows:");
        ui.selectable_value(order, FeatureOrder::Input, "input order");
        ui.selectable_value(order, FeatureOrder::Strongest, strongest);
    });
}

/// The chart: one row per feature of `rows`, with a line on how to read it.
pub fn chart_ui(ui: &mut egui::Ui, rows: &[FeatureRow], q: Quantity) {
    let width = ui.available_width().clamp(380.0, 640.0);
    for row in rows {
        let (rect, resp) = ui.allocate_exact_size(vec2(width, ROW), Sense::hover());
        let text = row_text(row, q);
        resp.widget_info(|| egui::WidgetInfo::labeled(egui::Role::ListItem, true, &text));
        if ui.is_rect_visible(rect) {
            paint_row(ui, rect, row, q, resp.hovered());
        }
        resp.on_hover_text(text);
    }
    let note = match q {
        Quantity::Input if rows.iter().any(|r| r.spread.is_some()) => {
            "Each row spans the feature's box, low to high. Band: the middle 90% of the \
             reference data (5th to 95th percentile); tick: its median; dot: the value."
        }
        Quantity::Input => {
            "Each row spans the feature's box, low to high; dot: the value. Open a reference \
             data file to see where real inputs lie."
        }
        Quantity::Rate { what: "weight", .. } => {
            "Bars from zero, in z per unit of each feature. Features differ in units: hover a \
             row for how far its weight can move z across the feature's box."
        }
        Quantity::Rate { .. } => {
            "Bars from zero, in z per unit of each feature (features differ in units)."
        }
        Quantity::Share { .. } => "Bars from zero: each feature's share of the change in z.",
    };
    ui.weak(note);
}

/// One chart row in `rect`.
fn paint_row(ui: &egui::Ui, rect: Rect, row: &FeatureRow, q: Quantity, hovered: bool) {
    let visuals = ui.visuals();
    let painter = ui.painter();
    if hovered {
        painter.rect_filled(rect, 2.0, visuals.widgets.hovered.weak_bg_fill);
    }
    let font = egui::TextStyle::Body.resolve(ui.style());
    let small = egui::TextStyle::Small.resolve(ui.style());
    let text = visuals.text_color();
    let weak = visuals.weak_text_color();
    let cy = rect.center().y;
    let name_rect = Rect::from_min_size(rect.min, vec2(NAME_W, ROW));
    painter.with_clip_rect(name_rect).text(
        pos2(rect.left() + 2.0, cy),
        Align2::LEFT_CENTER,
        &row.name,
        font.clone(),
        text,
    );
    painter.text(
        pos2(rect.right() - 2.0, cy),
        Align2::RIGHT_CENTER,
        value_text(row, q),
        font,
        text,
    );
    let value_w = if q == Quantity::Input {
        INPUT_VALUE_W
    } else {
        VALUE_W
    };
    let mut track = Rect::from_x_y_ranges(
        rect.left() + NAME_W..=rect.right() - value_w,
        cy - 6.0..=cy + 6.0,
    );
    if q == Quantity::Input {
        painter.text(
            pos2(track.left() + END_W - 4.0, cy),
            Align2::RIGHT_CENTER,
            number_text(f64::from(row.low)),
            small.clone(),
            weak,
        );
        painter.text(
            pos2(track.right() - END_W + 4.0, cy),
            Align2::LEFT_CENTER,
            number_text(f64::from(row.high)),
            small,
            weak,
        );
        track = Rect::from_x_y_ranges(
            track.left() + END_W..=track.right() - END_W,
            track.y_range(),
        );
    }
    paint_track(painter, visuals, track, row.value, row, q, 3.0);
}

/// The value drawn in `track`: for inputs the box, the reference band, its median and the
/// value as a dot; for signed values a bar from the middle. `mark` is the dot's radius.
fn paint_track(
    painter: &egui::Painter,
    visuals: &egui::Visuals,
    track: Rect,
    value: f32,
    row: &FeatureRow,
    q: Quantity,
    mark: f32,
) {
    let x_at = |t: f32| track.left() + t * track.width();
    match q.max_abs() {
        None => {
            painter.rect_filled(track, 1.0, visuals.extreme_bg_color);
            painter.rect_stroke(
                track,
                1.0,
                visuals.widgets.noninteractive.bg_stroke,
                egui::StrokeKind::Inside,
            );
            if let Some(s) = row.spread {
                let band = Rect::from_x_y_ranges(
                    x_at(row.position(s.p5))
                        ..=x_at(row.position(s.p95)).max(x_at(row.position(s.p5)) + 1.0),
                    track.y_range(),
                );
                painter.rect_filled(band, 0.0, band_colour(visuals));
                let m = x_at(row.position(s.median));
                painter.line_segment(
                    [pos2(m, track.top()), pos2(m, track.bottom())],
                    Stroke::new(1.0, visuals.text_color()),
                );
            }
            let x = x_at(row.position(f64::from(value)));
            painter.circle(
                pos2(x, track.center().y),
                mark,
                visuals.strong_text_color(),
                Stroke::new(1.0, visuals.extreme_bg_color),
            );
        }
        Some(max_abs) => paint_signed_bar(painter, visuals, track, value, max_abs),
    }
}

/// A signed bar from the middle of `track`, its length `|v| / max_abs` of the half width,
/// coloured by the colour key.
fn paint_signed_bar(
    painter: &egui::Painter,
    visuals: &egui::Visuals,
    track: Rect,
    v: f32,
    max_abs: f32,
) {
    let mid = track.center().x;
    let t = crate::report::colour::normalise(v, max_abs);
    let end = mid + t * track.width() / 2.0;
    let bar = Rect::from_x_y_ranges(mid.min(end)..=mid.max(end), track.y_range());
    painter.rect_filled(
        bar,
        0.0,
        colour::color32(ColourKey::standard().rgb_scaled(v, max_abs)),
    );
    painter.line_segment(
        [
            pos2(mid, track.top() - 2.0),
            pos2(mid, track.bottom() + 2.0),
        ],
        Stroke::new(1.0, visuals.weak_text_color()),
    );
}

/// The band colour of the reference data.
fn band_colour(visuals: &egui::Visuals) -> Color32 {
    visuals.selection.bg_fill.gamma_multiply(0.55)
}

/// A small glyph of the chart in `rect` (a tile): one thin row per feature in input order,
/// no text. `values: [spec.size]`; `spreads` the reference data's, when any.
pub fn glyph(
    painter: &egui::Painter,
    visuals: &egui::Visuals,
    rect: Rect,
    spec: &InputSpec,
    values: &[f32],
    spreads: Option<&[Option<FeatureSpread>]>,
    q: Quantity,
) {
    let n = spec.size.min(values.len());
    if n == 0 {
        return;
    }
    let h = rect.height() / n as f32;
    let gap = if h >= 4.0 { 1.0 } else { 0.0 };
    for (i, &value) in values.iter().enumerate().take(n) {
        let top = rect.top() + i as f32 * h;
        let track = Rect::from_x_y_ranges(rect.x_range(), top + gap / 2.0..=top + h - gap / 2.0);
        // The glyph needs no names: a row with only the numbers.
        let row = FeatureRow {
            index: i,
            name: String::new(),
            unit: None,
            value,
            low: spec.low[i],
            high: spec.high[i],
            spread: spreads.and_then(|s| s.get(i).copied().flatten()),
        };
        let mark = (h / 2.0).clamp(1.0, 3.0);
        paint_track(painter, visuals, track, value, &row, q, mark);
    }
}

/// The incoming connections of a deeper unit as bars, most positive first, each named by
/// the unit below; a click on a row selects that unit. `max_abs` is the colour scale.
pub fn incoming_ui(
    ui: &mut egui::Ui,
    state: &mut AppState,
    net: &Network,
    sel: Selection,
    max_abs: f32,
) {
    let rows = incoming_by_weight(net, sel.layer, sel.unit);
    let Some(lower) = sel.layer.checked_sub(1).and_then(|l| net.layers().get(l)) else {
        return;
    };
    let width = ui.available_width().clamp(380.0, 640.0);
    let walkable = lower.units() > 0;
    let mut clicked = None;
    egui::ScrollArea::vertical()
        .id_salt(("incoming", sel.layer, sel.unit))
        .max_height(ROW * INCOMING_VISIBLE)
        .auto_shrink([false, true])
        .show_rows(ui, ROW, rows.len(), |ui, range| {
            for &(i, w) in &rows[range] {
                let (sense, role) = if walkable {
                    (Sense::click(), egui::Role::Button)
                } else {
                    (Sense::hover(), egui::Role::ListItem)
                };
                let (rect, resp) = ui.allocate_exact_size(vec2(width, ROW), sense);
                let name = lower_unit_name(net, sel.layer, i);
                let text = format!("{name}: weight {}", signed_text(f64::from(w)));
                resp.widget_info(|| egui::WidgetInfo::labeled(role, true, &text));
                if ui.is_rect_visible(rect) {
                    let visuals = ui.visuals();
                    if resp.hovered() {
                        ui.painter()
                            .rect_filled(rect, 2.0, visuals.widgets.hovered.weak_bg_fill);
                    }
                    let font = egui::TextStyle::Body.resolve(ui.style());
                    let cy = rect.center().y;
                    ui.painter()
                        .with_clip_rect(Rect::from_min_size(rect.min, vec2(NAME_W, ROW)))
                        .text(
                            pos2(rect.left() + 2.0, cy),
                            Align2::LEFT_CENTER,
                            &name,
                            font.clone(),
                            visuals.hyperlink_color,
                        );
                    ui.painter().text(
                        pos2(rect.right() - 2.0, cy),
                        Align2::RIGHT_CENTER,
                        signed_text(f64::from(w)),
                        font,
                        visuals.text_color(),
                    );
                    let track = Rect::from_x_y_ranges(
                        rect.left() + NAME_W..=rect.right() - VALUE_W,
                        cy - 6.0..=cy + 6.0,
                    );
                    paint_signed_bar(ui.painter(), visuals, track, w, max_abs);
                }
                // A flattened map's entries are not units of their own: nothing to go to.
                if walkable && resp.on_hover_text("Go to this unit").clicked() {
                    clicked = Some(i);
                }
            }
        });
    let click = if walkable {
        " Click a row to go to that unit."
    } else {
        ""
    };
    ui.weak(format!(
        "{} incoming connections from layer {}, most positive first.{click}",
        rows.len(),
        lower.name
    ));
    if let Some(unit) = clicked {
        state.select(
            Selection {
                layer: sel.layer - 1,
                unit,
            },
            true,
        );
    }
}

/// The tile of a unit of a model with vector inputs: a glyph of its chart in `rect` (the
/// first layer's weights, a deeper unit's preferred input). `None` for other inputs and
/// for more features than `rect` has points of height (the tile is a picture), `Some(false)` while the values are not there yet (a shared-scale
/// weight glyph waits for the layer's largest |w|, a preferred input for its search).
pub fn tile_glyph(
    ui: &egui::Ui,
    state: &AppState,
    net: &Network,
    layer: usize,
    unit: usize,
    rect: Rect,
) -> Option<bool> {
    // Past one feature per point of height the rows would merge: the picture is clearer.
    if !matches!(net.input().layout, crate::model::Layout::Vector)
        || net.input().size as f32 > rect.height()
    {
        return None;
    }
    let spreads = state.probe.as_ref().and_then(|p| p.spreads.as_deref());
    let spreads = spreads.map(Vec::as_slice);
    let draw = |values: &[f32], q: Quantity| {
        glyph(
            ui.painter(),
            ui.visuals(),
            rect,
            net.input(),
            values,
            spreads,
            q,
        );
    };
    if layer > 0 {
        let Some(p) = state.preferred_of(layer, unit).filter(|p| p.finite) else {
            return Some(false);
        };
        draw(&p.input, Quantity::Input);
        return Some(true);
    }
    let w = net.layers()[0].weights.row(unit);
    let w = w.as_slice()?;
    let scale = state.prefs.scale;
    let layer_max = state
        .results
        .stats
        .as_ref()
        .and_then(|s| s.layers.first())
        .map(|s| s.max_abs as f32);
    let max_abs = match (scale, layer_max) {
        (colour::ScaleMode::SharedLayer, None) => return Some(false),
        (_, m) => scale.pick(super::maps::max_abs(w), m.unwrap_or(0.0)),
    };
    draw(
        w,
        Quantity::Rate {
            what: "weight",
            max_abs,
        },
    );
    Some(true)
}
