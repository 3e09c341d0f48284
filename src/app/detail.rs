//! The selected unit in detail: a large map (incoming weights, preferred input, or
//! sensitivity at the mean reference input) with its colour key and hover values, the unit's
//! numbers, a histogram of its activations over the probe, its strongest incoming
//! connections, and the probe samples that drive it hardest. On vector inputs the map is a
//! per-feature chart (`feature_chart.rs`); for deeper units the weights are a sorted bar
//! chart over the units of the layer below, and clicking a row walks down. Under a
//! preferred input: what kind of optimum it is, and the search's penalties beside it.

use super::Action;
use super::colour::{self, ColourKey, LegendOrientation};
use super::feature_chart::{self, Quantity};
use super::maps;
use super::state::{AppState, MapView, Selection};
use super::thumbs::{ThumbKey, ThumbKind, Thumbs};
use crate::analysis::features::{self, FeatureOrder};
use crate::analysis::optimum::OptimumSummary;
use crate::analysis::prefer::{MAX_FACETS, PreferOptions};
use crate::model::{Layout, Network};
use crate::report::annotate::GridKey;
use crate::report::format;
use crate::report::picture::{self, Picture};
use egui::{Color32, Rect, Sense, pos2, vec2};

/// Strongest incoming connections listed.
const STRONGEST: usize = 8;
/// Width kept for the colour key beside a map.
const KEY_WIDTH: f32 = 84.0;

/// The detail panel (its view state lives in [`AppState`], so the exports see it too).
#[derive(Default)]
pub struct DetailPanel {}

impl DetailPanel {
    /// Draws the panel for the selected unit.
    pub fn ui(
        &mut self,
        ui: &mut egui::Ui,
        state: &mut AppState,
        thumbs: &mut Thumbs,
        actions: &mut Vec<Action>,
    ) {
        let (Some(net), Some(sel)) = (state.net().cloned(), state.selection) else {
            ui.label("Select a unit in the grid.");
            return;
        };
        let Some(layer) = net.layers().get(sel.layer) else {
            return;
        };
        if sel.unit >= layer.units() {
            return;
        }
        if matches!(layer.kind, crate::model::LayerKind::Conv2d(_)) {
            egui::ScrollArea::vertical()
                .id_salt("detail-scroll")
                .auto_shrink([false, false])
                .show(ui, |ui| {
                    ui.add_space(4.0);
                    super::conv::detail_ui(ui, state, thumbs, &net, sel);
                    ui.add_space(6.0);
                    numbers_ui(ui, state, &net, sel);
                });
            return;
        }
        egui::ScrollArea::vertical()
            .id_salt("detail-scroll")
            .auto_shrink([false, false])
            .show(ui, |ui| {
                ui.add_space(4.0);
                header_ui(ui, state, &net, sel);
                ui.add_space(4.0);
                if state.prefs.map_view == MapView::Attribution {
                    self.attribution_controls_ui(ui, state, sel);
                }
                let row = state.attribution_row(sel);
                map_ui(ui, state, thumbs, &net, sel, row);
                let preferred = state.prefs.map_view == MapView::Preferred;
                if preferred {
                    facets_ui(ui, state, thumbs, &net, sel);
                    optimum_ui(ui, state, &net, sel);
                    ui.add_space(4.0);
                    ui.group(|ui| search_settings_ui(ui, state, sel, actions));
                }
                ui.add_space(6.0);
                numbers_ui(ui, state, &net, sel);
                ui.add_space(6.0);
                histogram_ui(ui, state, sel);
                ui.add_space(6.0);
                strongest_ui(ui, state, &net, sel);
                ui.add_space(6.0);
                top_samples_ui(ui, state, thumbs, &net, sel);
                if !preferred {
                    ui.add_space(6.0);
                    search_ui(ui, state, sel, actions);
                }
            });
    }

    /// The sample and baseline of the attribution map.
    fn attribution_controls_ui(&mut self, ui: &mut egui::Ui, state: &mut AppState, sel: Selection) {
        let rows = state.probe.as_ref().map_or(0, |p| p.data.inputs.nrows());
        if rows == 0 {
            return;
        }
        let mut row = state.attribution_row(sel).unwrap_or(0);
        ui.horizontal(|ui| {
            let label = ui.label("Reference row");
            if ui
                .add(egui::DragValue::new(&mut row).range(0..=rows - 1))
                .labelled_by(label.id)
                .changed()
            {
                state.attribution_choice = Some((sel, row));
            }
            ui.label("from");
            let m = &mut state.prefs.attribution_from_mean;
            ui.selectable_value(m, false, "box centre");
            ui.selectable_value(m, true, "reference mean");
        });
    }
}

/// Back button, the unit's name and status, and the choice of map.
fn header_ui(ui: &mut egui::Ui, state: &mut AppState, net: &Network, sel: Selection) {
    let layer = &net.layers()[sel.layer];
    ui.horizontal(|ui| {
        if !state.history.is_empty()
            && ui
                .button("Back")
                .on_hover_text("Back to the unit you came from (Backspace)")
                .clicked()
            && let Some(prev) = state.history.pop()
        {
            state.selection = Some(prev);
        }
        let title = match &layer.labels {
            Some(_) => format!(
                "Unit {} of layer {} ({})",
                sel.unit,
                layer.name,
                layer.unit_name(sel.unit, "")
            ),
            None => format!("Unit {} of layer {}", sel.unit, layer.name),
        };
        ui.heading(title);
    });
    let status = match state.screen_of(sel.layer, sel.unit) {
        Some(s) => format!(
            "{} unit · {}",
            layer.activation.name(),
            super::state::status_words(s.status)
        ),
        None if sel.layer + 1 == net.layers().len() => {
            format!("{} output unit", layer.activation.name())
        }
        None => format!("{} unit · screening…", layer.activation.name()),
    };
    ui.label(status);
    ui.add_space(4.0);
    ui.horizontal(|ui| {
        ui.label("Show:");
        let v = &mut state.prefs.map_view;
        ui.selectable_value(v, MapView::Weights, "Incoming weights")
            .on_hover_text("W");
        ui.selectable_value(v, MapView::Preferred, "Preferred input")
            .on_hover_text("P");
        ui.selectable_value(v, MapView::Sensitivity, "Sensitivity")
            .on_hover_text("S: sensitivity, the gradient ∂z/∂x of the pre-activation z at the mean reference input");
        ui.selectable_value(v, MapView::Attribution, "Attribution")
            .on_hover_text(
                "Integrated gradients: how each input moves the pre-activation z from the baseline to a reference sample",
            );
    });
}

/// What the current map shows, its values and how to scale them.
enum MapData {
    /// Signed values in input layout, `[input size]`, and the |value| at the key's ends.
    SignedInput(Vec<f32>, f32, &'static str),
    /// Signed weights over the lower layer's units, `[fan_in]`.
    Cells(Vec<f32>, f32),
    /// An input inside the box, `[input size]`.
    Input(Vec<f32>),
}

fn map_data(
    state: &AppState,
    net: &Network,
    sel: Selection,
    row: Option<usize>,
) -> Result<MapData, String> {
    let l = &net.layers()[sel.layer];
    let scale_mode = state.prefs.scale;
    match state.prefs.map_view {
        MapView::Weights => {
            let w = l.weights.row(sel.unit).to_vec();
            let layer_max = state
                .results
                .stats
                .as_ref()
                .and_then(|s| s.layers.get(sel.layer))
                .map_or_else(|| maps::max_abs(&w), |s| s.max_abs as f32);
            let m = scale_mode.pick(maps::max_abs(&w), layer_max);
            if sel.layer == 0 {
                Ok(MapData::SignedInput(w, m, "weight"))
            } else {
                Ok(MapData::Cells(w, m))
            }
        }
        MapView::Preferred => match state.preferred_of(sel.layer, sel.unit) {
            Some(p) if p.finite => Ok(MapData::Input(p.input.clone())),
            Some(_) => {
                Err("The search for this unit produced non-finite values (NaN or infinity).".into())
            }
            None => {
                let stopped = state
                    .results
                    .preferred
                    .get(&sel.layer)
                    .is_some_and(|p| p.pending == 0);
                Err(if stopped {
                    "The search was stopped before reaching this unit.".into()
                } else {
                    "Searching for the preferred input…".into()
                })
            }
        },
        MapView::Sensitivity => {
            let slot = state.results.sensitivity_of(sel.layer);
            match slot.and_then(|s| s.as_ref()) {
                Some(s) => {
                    let row = s.maps.row(sel.unit).to_vec();
                    let m = scale_mode.pick(maps::max_abs(&row), s.max_abs);
                    Ok(MapData::SignedInput(row, m, "sensitivity"))
                }
                None => Err("Computing the sensitivity at the mean reference input…".into()),
            }
        }
        MapView::Attribution => {
            let Some(row) = row else {
                return Err("Running the reference data…".into());
            };
            let key = super::state::AttributionKey {
                layer: sel.layer,
                unit: sel.unit,
                row,
                from_mean: state.prefs.attribution_from_mean,
            };
            match state.results.attribution.get(&key).and_then(|s| s.as_ref()) {
                Some(a) => {
                    let m = maps::max_abs(&a.values);
                    Ok(MapData::SignedInput(a.values.clone(), m, "attribution"))
                }
                None => Err(format!("Integrating gradients for reference row {row}…")),
            }
        }
    }
}

/// The picture of the current map of the selected unit (also used by the PNG export), with
/// a name for the file and the key the export draws below it.
pub fn current_map(state: &AppState) -> Option<(String, Picture, GridKey)> {
    let net = state.net()?;
    let sel = state.selection?;
    let data = map_data(state, net, sel, state.attribution_row(sel)).ok()?;
    let what = match state.prefs.map_view {
        MapView::Weights => "weights",
        MapView::Preferred => "preferred",
        MapView::Sensitivity => "sensitivity",
        MapView::Attribution => "attribution",
    };
    let name = format!("{}-unit{}-{what}", net.layers()[sel.layer].name, sel.unit);
    let key = match &data {
        MapData::SignedInput(_, m, _) | MapData::Cells(_, m) => GridKey::Signed(Some(*m)),
        MapData::Input(_) => picture::grey_key(net.input()),
    };
    Some((name, image_of(&data, net), key))
}

fn image_of(data: &MapData, net: &Network) -> Picture {
    match data {
        MapData::SignedInput(v, m, _) => picture::signed_input_map(net.input(), v, *m),
        MapData::Cells(v, m) => picture::cell_grid(v, *m),
        MapData::Input(v) => picture::input_picture(net.input(), v),
    }
}

/// The large map of the selected unit with its colour key and a caption.
fn map_ui(
    ui: &mut egui::Ui,
    state: &mut AppState,
    thumbs: &mut Thumbs,
    net: &Network,
    sel: Selection,
    row: Option<usize>,
) {
    let data = match map_data(state, net, sel, row) {
        Ok(d) => d,
        Err(msg) => {
            map_placeholder_ui(ui, msg);
            return;
        }
    };
    if let MapData::Cells(_, m) = data {
        // Deeper units: a bar chart of the incoming connections, not a grid that would
        // suggest a spatial layout the units below do not have.
        feature_chart::incoming_ui(ui, state, net, sel, m);
        let caption = key_caption(&data, state, net, sel);
        colour::legend_ui(ui, ColourKey::standard(), m, &caption);
        return;
    }
    if matches!(net.input().layout, Layout::Vector) {
        vector_chart_ui(ui, state, net, sel, &data);
        return;
    }
    let key = ThumbKey {
        layer: sel.layer,
        unit: sel.unit,
        kind: thumb_kind(state, &data, row),
    };
    let Some(tex) = thumbs.get(ui.ctx(), key, false, || {
        Some(maps::to_color_image(&image_of(&data, net)))
    }) else {
        return;
    };
    let size = tex.size_vec2();
    let avail = (ui.available_width() - KEY_WIDTH - 12.0).clamp(140.0, 420.0);
    let vector =
        matches!(net.input().layout, Layout::Vector) && !matches!(data, MapData::Cells(..));
    let draw = if vector {
        vec2(avail, 36.0)
    } else {
        let s = (avail / size.x).min(avail / size.y);
        size * s
    };
    ui.horizontal_top(|ui| {
        map_picture_ui(ui, &tex, draw, &data, net, sel);
        let caption = key_caption(&data, state, net, sel);
        map_key_ui(ui, &data, net, &caption, draw.y.max(140.0) - 40.0);
    });
    map_caption_ui(ui, &data, net);
}

/// The per-feature chart of a vector input's map, with its row order and (for signed
/// values) the colour key.
fn vector_chart_ui(
    ui: &mut egui::Ui,
    state: &mut AppState,
    net: &Network,
    sel: Selection,
    data: &MapData,
) {
    let (values, q) = match data {
        MapData::SignedInput(v, m, "attribution") => (
            v,
            Quantity::Share {
                what: "attribution",
                max_abs: *m,
            },
        ),
        MapData::SignedInput(v, m, what) => (v, Quantity::Rate { what, max_abs: *m }),
        MapData::Input(v) => (v, Quantity::Input),
        MapData::Cells(..) => return,
    };
    let spreads = state.probe.as_ref().and_then(|p| p.spreads.clone());
    let spreads = spreads.as_deref().map(Vec::as_slice);
    let (strength, strongest) = match q {
        Quantity::Input if sel.layer == 0 => (
            net.layers()[0].weights.row(sel.unit).to_vec(),
            "largest |w| first",
        ),
        Quantity::Input => (
            features::distance_from_data(net.input(), values, spreads),
            "furthest from the data first",
        ),
        Quantity::Rate { what: "weight", .. } => (values.clone(), "largest |w| first"),
        Quantity::Rate { .. } => (values.clone(), "largest |dz/dx| first"),
        Quantity::Share { .. } => (values.clone(), "largest |attribution| first"),
    };
    feature_chart::order_ui(ui, &mut state.prefs.feature_order, strongest);
    let rows = features::feature_rows(
        net.input(),
        values,
        spreads,
        state.prefs.feature_order,
        &strength,
    );
    feature_chart::chart_ui(ui, &rows, q);
    if let Some(max_abs) = q.max_abs() {
        let caption = key_caption(data, state, net, sel);
        colour::legend_ui(ui, ColourKey::standard(), max_abs, &caption);
    }
}

/// What kind of optimum the preferred input is: inputs at a bound of the box, and z beside
/// the sound upper bound.
fn optimum_ui(ui: &mut egui::Ui, state: &AppState, net: &Network, sel: Selection) {
    let Some(p) = state.preferred_of(sel.layer, sel.unit).filter(|p| p.finite) else {
        return;
    };
    let bound = state
        .results
        .bounds
        .as_ref()
        .and_then(|b| b.upper.get(sel.layer))
        .and_then(|u| u.get(sel.unit).copied());
    let penalised =
        state.results.preferred.get(&sel.layer).is_some_and(|lp| {
            lp.data.is_some() || lp.settings.l2() > 0.0 || lp.settings.tv() > 0.0
        });
    let s = OptimumSummary::new(net.input(), &p.input, p.preactivation, bound, penalised);
    ui.label(s.bound_words());
    ui.label(s.gap_words());
}

/// A grey box with the reason the map is not there (yet).
fn map_placeholder_ui(ui: &mut egui::Ui, msg: String) {
    let (r, _) =
        ui.allocate_exact_size(vec2(ui.available_width().min(320.0), 160.0), Sense::hover());
    ui.painter()
        .rect_filled(r, 2.0, ui.visuals().extreme_bg_color);
    ui.painter().text(
        r.center(),
        egui::Align2::CENTER_CENTER,
        msg,
        egui::TextStyle::Body.resolve(ui.style()),
        ui.visuals().weak_text_color(),
    );
}

/// Which cached texture the map is (each kind and scale is cached apart).
fn thumb_kind(state: &AppState, data: &MapData, row: Option<usize>) -> ThumbKind {
    let shared = state.prefs.scale == colour::ScaleMode::SharedLayer;
    match (data, state.prefs.map_view) {
        (MapData::Cells(..), _) => ThumbKind::Cells(shared),
        (_, MapView::Weights) => ThumbKind::Weights(shared),
        (_, MapView::Preferred) => ThumbKind::Preferred,
        (_, MapView::Sensitivity) => ThumbKind::Sensitivity(shared),
        (_, MapView::Attribution) => {
            ThumbKind::Attribution(row.unwrap_or(usize::MAX), state.prefs.attribution_from_mean)
        }
    }
}

/// Every facet of the selected unit side by side, with its z and the facets' spread (when
/// the search ran with more than one facet).
fn facets_ui(
    ui: &mut egui::Ui,
    state: &AppState,
    thumbs: &mut Thumbs,
    net: &Network,
    sel: Selection,
) {
    let Some(facets) = state
        .results
        .preferred
        .get(&sel.layer)
        .and_then(|lp| lp.facets.get(&sel.unit))
        .filter(|f| f.len() > 1)
    else {
        return;
    };
    ui.label(format!(
        "{} facets, mean pairwise distance {} box widths",
        facets.len(),
        format::sig32(facets[0].spread, 3)
    ));
    ui.horizontal_wrapped(|ui| {
        for p in facets {
            let key = ThumbKey {
                layer: sel.layer,
                unit: sel.unit,
                kind: ThumbKind::Facet(p.facet),
            };
            let tex = thumbs.get(ui.ctx(), key, false, || {
                Some(maps::input_picture(net.input(), &p.input))
            });
            ui.vertical(|ui| {
                if let Some(t) = tex {
                    let (r, resp) = ui.allocate_exact_size(vec2(72.0, 72.0), Sense::hover());
                    ui.painter().image(
                        t.id(),
                        r,
                        Rect::from_min_max(pos2(0.0, 0.0), pos2(1.0, 1.0)),
                        Color32::WHITE,
                    );
                    resp.on_hover_text(format!(
                        "facet {}: pre-activation {}, activation {}",
                        p.facet,
                        format::sig32(p.preactivation, 4),
                        format::sig32(p.activation, 4)
                    ));
                }
                ui.small(format!(
                    "facet {} · pre-activation {}",
                    p.facet,
                    format::sig32(p.preactivation, 3)
                ))
                .on_hover_text("pre-activation z = w·x + b at this facet's input");
            });
        }
    });
}

/// The map picture drawn at `draw` size, with the value under the pointer.
fn map_picture_ui(
    ui: &mut egui::Ui,
    tex: &egui::TextureHandle,
    draw: egui::Vec2,
    data: &MapData,
    net: &Network,
    sel: Selection,
) {
    let size = tex.size_vec2();
    let (rect, resp) = ui.allocate_exact_size(draw, Sense::hover());
    ui.painter().image(
        tex.id(),
        rect,
        Rect::from_min_max(pos2(0.0, 0.0), pos2(1.0, 1.0)),
        Color32::WHITE,
    );
    ui.painter().rect_stroke(
        rect,
        0.0,
        ui.visuals().widgets.noninteractive.bg_stroke,
        egui::StrokeKind::Outside,
    );
    let label = format!("map of {} unit {}", net.layers()[sel.layer].name, sel.unit);
    resp.widget_info(|| egui::WidgetInfo::labeled(egui::Role::Image, true, &label));
    // Hover: which pixel (or lower unit) and its value.
    let Some(p) = resp.hover_pos() else {
        return;
    };
    let fx = ((p.x - rect.left()) / rect.width() * size.x).floor();
    let fy = ((p.y - rect.top()) / rect.height() * size.y).floor();
    if fx < 0.0 || fy < 0.0 {
        return;
    }
    let (x, y) = (fx as usize, fy as usize);
    if let Some(t) = hover_text(data, net, sel, x, y) {
        egui::Tooltip::always_open(
            ui.ctx().clone(),
            ui.layer_id(),
            resp.id.with("hover"),
            egui::PopupAnchor::Pointer,
        )
        .show(|ui| ui.label(t));
    }
}

/// The caption of the key beside a signed map: the quantity on the first line, its scale on
/// the second ("weight" / "scale shared by layer h1"); attribution maps always use their own.
fn key_caption(data: &MapData, state: &AppState, net: &Network, sel: Selection) -> String {
    let what = match data {
        MapData::SignedInput(_, _, what) => *what,
        MapData::Cells(..) => "weight",
        MapData::Input(_) => return String::new(),
    };
    let layer = &net.layers()[sel.layer].name;
    let scale = if state.prefs.map_view == MapView::Attribution {
        "scale of this map alone".to_owned()
    } else {
        state.prefs.scale.caption(layer, sel.unit)
    };
    format!("{what}\n{scale}")
}

/// The key beside the map, `length` points long: the signed colour key with `caption`, or
/// the grey ramp of input pictures.
fn map_key_ui(ui: &mut egui::Ui, data: &MapData, net: &Network, caption: &str, length: f32) {
    let m = match data {
        MapData::SignedInput(_, m, _) | MapData::Cells(_, m) => *m,
        MapData::Input(_) => return grey_key_ui(ui, net, length),
    };
    colour::legend_ui_with(
        ui,
        ColourKey::standard(),
        m,
        caption,
        LegendOrientation::Vertical,
        length,
    );
}

/// One line under the map saying how to read it.
fn map_caption_ui(ui: &mut egui::Ui, data: &MapData, net: &Network) {
    match data {
        // Drawn as the incoming-connection chart, which says how to read it.
        MapData::Cells(..) => {}
        MapData::Input(_) => {
            ui.weak("Dark = low end of the input box, light = high end.");
        }
        MapData::SignedInput(..) => {
            if let Layout::Image { channels: 3, .. } = net.input().layout {
                ui.weak("Panels: red, green, blue channel.");
            }
        }
    }
}

fn hover_text(data: &MapData, net: &Network, sel: Selection, x: usize, y: usize) -> Option<String> {
    match data {
        MapData::Cells(w, _) => {
            let cols = maps::cell_columns(w.len());
            let i = y * cols + x;
            let lower = &net.layers()[sel.layer - 1];
            (x < cols && i < w.len())
                .then(|| format!("{} unit {i}: weight {:+.4}", lower.name, w[i]))
        }
        MapData::SignedInput(v, _, what) => {
            let i = maps::input_index_at(net.input(), true, x, y)?;
            Some(format!(
                "{} ({}): {what} {:+.4}",
                net.input().feature_name(i),
                pixel_words(net, i),
                v.get(i)?
            ))
        }
        MapData::Input(v) => {
            let i = maps::input_index_at(net.input(), false, x, y)?;
            Some(format!(
                "{} ({}): input {}",
                net.input().feature_name(i),
                pixel_words(net, i),
                format::sig32(*v.get(i)?, 4)
            ))
        }
    }
}

/// "row 3, column 5" for image inputs, "feature 7" for vectors.
fn pixel_words(net: &Network, i: usize) -> String {
    match net.input().layout {
        Layout::Image {
            width, channels, ..
        } => {
            let p = i / channels;
            let c = i % channels;
            if channels == 3 {
                format!(
                    "row {}, column {}, {}",
                    p / width,
                    p % width,
                    ["red", "green", "blue"][c]
                )
            } else {
                format!("row {}, column {}", p / width, p % width)
            }
        }
        Layout::Vector => format!("feature {i}"),
    }
}

/// The key of input pictures: the grey ramp from the box's low end to its high end.
fn grey_key_ui(ui: &mut egui::Ui, net: &Network, length: f32) {
    let lo = net
        .input()
        .low
        .iter()
        .copied()
        .fold(f32::INFINITY, f32::min);
    let hi = net
        .input()
        .high
        .iter()
        .copied()
        .fold(f32::NEG_INFINITY, f32::max);
    let length = length.max(60.0);
    let (rect, resp) = ui.allocate_exact_size(vec2(KEY_WIDTH, length + 32.0), Sense::hover());
    let bar = Rect::from_min_size(rect.min + vec2(0.0, 16.0), vec2(14.0, length));
    let steps = 48;
    for k in 0..steps {
        let t = 1.0 - k as f32 / (steps - 1) as f32;
        let y0 = bar.top() + bar.height() * k as f32 / steps as f32;
        let y1 = bar.top() + bar.height() * (k + 1) as f32 / steps as f32;
        ui.painter().rect_filled(
            Rect::from_x_y_ranges(bar.x_range(), y0..=y1),
            0.0,
            maps::grey(t),
        );
    }
    let font = egui::TextStyle::Small.resolve(ui.style());
    let c = ui.visuals().text_color();
    ui.painter()
        .text(rect.min, egui::Align2::LEFT_TOP, "input", font.clone(), c);
    ui.painter().text(
        pos2(bar.right() + 4.0, bar.top()),
        egui::Align2::LEFT_CENTER,
        format!("{hi} (high)"),
        font.clone(),
        c,
    );
    ui.painter().text(
        pos2(bar.right() + 4.0, bar.bottom()),
        egui::Align2::LEFT_CENTER,
        format!("{lo} (low)"),
        font,
        c,
    );
    resp.widget_info(|| {
        egui::WidgetInfo::labeled(egui::Role::Image, true, format!("input key, {lo} to {hi}"))
    });
}

fn numbers_ui(ui: &mut egui::Ui, state: &AppState, net: &Network, sel: Selection) {
    let st = state.stats_of(sel.layer, sel.unit);
    let sc = state.screen_of(sel.layer, sel.unit);
    let pr = state.preferred_of(sel.layer, sel.unit);
    let bound = state
        .results
        .bounds
        .as_ref()
        .and_then(|b| b.upper.get(sel.layer))
        .and_then(|u| u.get(sel.unit).copied());
    let f = |v: Option<f64>, digits: usize| {
        v.map_or_else(|| "…".to_string(), |v| format::sig(v, digits))
    };
    egui::CollapsingHeader::new("Numbers")
        .default_open(true)
        .show(ui, |ui| {
            egui::Grid::new("unit-numbers")
                .num_columns(2)
                .striped(true)
                .show(ui, |ui| {
                    let mut row = |name: &str, value: String, hint: &str| {
                        ui.label(name).on_hover_text(hint);
                        ui.monospace(value);
                        ui.end_row();
                    };
                    row(
                        "pre-activation reached",
                        f(pr.map(|p| f64::from(p.preactivation)), 4),
                        "z = w·x + b, the pre-activation, at the preferred input",
                    );
                    row(
                        "upper bound of the pre-activation",
                        f(bound, 4),
                        "z ≤ this everywhere in the input box: a sound bound over the whole input box (interval bound propagation)",
                    );
                    row(
                        "active on reference data",
                        sc.map_or_else(|| "…".into(), |s| format::percent(s.active_frac, 3)),
                        "fraction of reference samples where the unit is active",
                    );
                    row(
                        "mean activation",
                        f(sc.map(|s| s.mean), 4),
                        "over the reference data",
                    );
                    row(
                        "max activation",
                        f(sc.map(|s| s.max), 4),
                        "over the reference data",
                    );
                    row("L1 of weights", f(st.map(|s| s.l1), 4), "sum of |w|");
                    row(
                        "L2 of weights",
                        f(st.map(|s| s.l2), 4),
                        "sqrt of the sum of w²",
                    );
                    row("largest |w|", f(st.map(|s| s.max_abs), 4), "");
                    row(
                        "Hoyer sparsity",
                        f(st.map(|s| s.hoyer), 4),
                        "Hoyer (2004): 0 = all equal, 1 = one non-zero",
                    );
                    row(
                        "Gini index",
                        f(st.map(|s| s.gini), 4),
                        "Hurley & Rickard (2009)",
                    );
                    row(
                        "near-zero weights",
                        st.map_or_else(
                            || "…".into(),
                            |s| format::percent(s.near_zero_frac, 3),
                        ),
                        "|w| at most 1% of the layer's largest |w|",
                    );
                    row(
                        "bias",
                        format::sig32(net.layers()[sel.layer].bias[sel.unit], 4),
                        "",
                    );
                });
        });
}

fn histogram_ui(ui: &mut egui::Ui, state: &AppState, sel: Selection) {
    egui::CollapsingHeader::new("Activations over the reference data")
        .default_open(true)
        .show(ui, |ui| {
            let Some(a) = state
                .results
                .activity
                .as_ref()
                .and_then(|a| a.layers.get(sel.layer))
                .and_then(|l| l.get(sel.unit))
            else {
                ui.weak("Running the reference data…");
                return;
            };
            if !a.lo.is_finite() {
                ui.weak("No finite activation on the reference data.");
                return;
            }
            let span = (a.hi - a.lo).max(1e-9);
            let width = f64::from(span) / a.hist.len() as f64;
            let bars: Vec<egui_plot::Bar> = a
                .hist
                .iter()
                .enumerate()
                .map(|(i, &c)| {
                    egui_plot::Bar::new(f64::from(a.lo) + (i as f64 + 0.5) * width, f64::from(c))
                        .width(width * 0.95)
                })
                .collect();
            let chart =
                egui_plot::BarChart::new("samples", bars).color(ui.visuals().selection.bg_fill);
            egui_plot::Plot::new(("activation-histogram", sel.layer, sel.unit))
                .height(130.0)
                .allow_drag(false)
                .allow_zoom(false)
                .allow_scroll(false)
                .x_axis_label("activation")
                .y_axis_label("samples")
                .show(ui, |p| p.bar_chart(chart));
        });
}

fn strongest_ui(ui: &mut egui::Ui, state: &mut AppState, net: &Network, sel: Selection) {
    egui::CollapsingHeader::new("Strongest incoming connections")
        .default_open(true)
        .show(ui, |ui| {
            let w = net.layers()[sel.layer].weights.row(sel.unit);
            let mut idx: Vec<usize> = (0..w.len()).collect();
            let k = STRONGEST.min(idx.len());
            if k == 0 {
                return;
            }
            idx.select_nth_unstable_by(k - 1, |a, b| w[*b].abs().total_cmp(&w[*a].abs()));
            idx.truncate(k);
            idx.sort_by(|a, b| w[*b].abs().total_cmp(&w[*a].abs()));
            let vector = matches!(net.input().layout, Layout::Vector);
            egui::Grid::new("strongest")
                .num_columns(2)
                .striped(true)
                .show(ui, |ui| {
                    for i in idx {
                        if sel.layer == 0 && vector {
                            // A weight is z per unit of its feature.
                            ui.label(net.input().feature_name(i));
                            let w = features::signed_text(f64::from(w[i]));
                            ui.monospace(match net.input().feature_unit(i) {
                                Some(u) => format!("{w} per {u}"),
                                None => w,
                            });
                            ui.end_row();
                            continue;
                        } else if sel.layer == 0 {
                            ui.label(format!(
                                "{} ({})",
                                net.input().feature_name(i),
                                pixel_words(net, i)
                            ));
                        } else {
                            let lower = &net.layers()[sel.layer - 1];
                            let text = features::lower_unit_name(net, sel.layer, i);
                            // A flattened map's entries are not units to go to.
                            if lower.units() == 0 {
                                ui.label(text);
                            } else if ui.link(&text).on_hover_text("Go to this unit").clicked() {
                                state.select(
                                    Selection {
                                        layer: sel.layer - 1,
                                        unit: i,
                                    },
                                    true,
                                );
                            }
                        }
                        ui.monospace(format!("{:+.4}", w[i]));
                        ui.end_row();
                    }
                });
        });
}

fn top_samples_ui(
    ui: &mut egui::Ui,
    state: &AppState,
    thumbs: &mut Thumbs,
    net: &Network,
    sel: Selection,
) {
    egui::CollapsingHeader::new("Reference samples that drive it hardest")
        .default_open(true)
        .show(ui, |ui| {
            let (Some(a), Some(probe)) = (
                state
                    .results
                    .activity
                    .as_ref()
                    .and_then(|a| a.layers.get(sel.layer))
                    .and_then(|l| l.get(sel.unit)),
                state.probe.as_ref(),
            ) else {
                ui.weak("Running the reference data…");
                return;
            };
            let image = matches!(net.input().layout, Layout::Image { .. });
            let labels = probe.data.labels.as_ref();
            let names = net.output_names();
            egui::Grid::new(("top-samples", sel.layer, sel.unit))
                .num_columns(4)
                .spacing(vec2(8.0, 8.0))
                .show(ui, |ui| {
                    for (k, &(row, z, act)) in a.top.iter().enumerate() {
                        ui.vertical(|ui| {
                            ui.set_width(76.0);
                            if image {
                                sample_thumb(ui, thumbs, net, probe, row, z, act);
                            } else {
                                sample_glyph(ui, net, probe, row, z, act);
                            }
                            let small = |ui: &mut egui::Ui, text: String| {
                                ui.add(
                                    egui::Label::new(egui::RichText::new(text).small()).truncate(),
                                );
                            };
                            small(ui, format!("row {row}"));
                            if let Some(c) =
                                labels.and_then(|l| l.get(row)).and_then(|c| names.get(*c))
                            {
                                small(ui, c.clone());
                            }
                            small(ui, format!("pre-activation {}", format::sig32(z, 3)));
                        });
                        if k % 4 == 3 {
                            ui.end_row();
                        }
                    }
                });
        });
}

/// One sample of a vector input drawn as a glyph of the feature chart, with every feature's
/// value and unit on hover.
fn sample_glyph(
    ui: &mut egui::Ui,
    net: &Network,
    probe: &super::state::OpenProbe,
    row: usize,
    z: f32,
    act: f32,
) {
    let x = probe.data.inputs.row(row);
    let Some(x) = x.as_slice() else {
        return;
    };
    let spreads = probe.spreads.as_deref().map(Vec::as_slice);
    let (r, resp) = ui.allocate_exact_size(vec2(64.0, 48.0), Sense::hover());
    feature_chart::glyph(
        ui.painter(),
        ui.visuals(),
        r,
        net.input(),
        x,
        spreads,
        Quantity::Input,
    );
    let rows = features::feature_rows(net.input(), x, spreads, FeatureOrder::Input, &[]);
    let mut text = format!("reference row {row}: z = {z:.4}, activation = {act:.4}");
    for r in &rows {
        text.push_str(&format!("\n{} = {}", r.name, r.value_text()));
    }
    resp.widget_info(|| {
        egui::WidgetInfo::labeled(
            egui::Role::Image,
            true,
            format!("reference row {row} by feature"),
        )
    });
    resp.on_hover_text(text);
}

/// One probe sample drawn as a picture of the input, with its numbers on hover.
fn sample_thumb(
    ui: &mut egui::Ui,
    thumbs: &mut Thumbs,
    net: &Network,
    probe: &super::state::OpenProbe,
    row: usize,
    z: f32,
    act: f32,
) {
    let key = ThumbKey {
        layer: 0,
        unit: 0,
        kind: ThumbKind::Sample(row),
    };
    let tex = thumbs.get(ui.ctx(), key, false, || {
        let x = probe.data.inputs.row(row).to_vec();
        Some(maps::input_picture(net.input(), &x))
    });
    if let Some(t) = tex {
        let (r, resp) = ui.allocate_exact_size(vec2(64.0, 64.0), Sense::hover());
        ui.painter().image(
            t.id(),
            r,
            Rect::from_min_max(pos2(0.0, 0.0), pos2(1.0, 1.0)),
            Color32::WHITE,
        );
        resp.on_hover_text(format!(
            "reference row {row}: pre-activation z = {}, activation = {}",
            format::sig32(z, 4),
            format::sig32(act, 4)
        ));
    }
}

/// The search settings in a collapsed section (views other than the preferred input).
fn search_ui(ui: &mut egui::Ui, state: &mut AppState, sel: Selection, actions: &mut Vec<Action>) {
    egui::CollapsingHeader::new("Preferred-input search")
        .default_open(false)
        .show(ui, |ui| search_settings_ui(ui, state, sel, actions));
}

/// The search's penalties (data prior, L2, total variation) and effort, and the button
/// that searches the layer again with them.
fn search_settings_ui(
    ui: &mut egui::Ui,
    state: &mut AppState,
    sel: Selection,
    actions: &mut Vec<Action>,
) {
    let image = state
        .net()
        .is_some_and(|n| !matches!(n.input().layout, Layout::Vector));
    let data = state.probe.as_ref().and_then(|p| p.reference.as_ref());
    let prior_text = match data {
        Some(r) => format!("Stay near the data ({})", r.origin()),
        None => "Stay near the data (open reference data)".to_string(),
    };
    ui.add_enabled(
        data.is_some(),
        egui::Checkbox::new(&mut state.prefs.use_prior, prior_text),
    )
    .on_hover_text(
        "Data prior: start from the unit's top-activating samples and penalise inputs \
         far from the probe data (its mean and Ledoit-Wolf covariance). Off: the plain \
         search over the whole input box.",
    );
    let s = &mut state.prefs.search;
    let (mut steps, mut restarts, mut l2, mut tv) = (s.steps(), s.restarts(), s.l2(), s.tv());
    let (mut weight, mut facets) = (s.prior_weight(), s.facets());
    egui::Grid::new("search-settings")
        .num_columns(2)
        .show(ui, |ui| {
            // Each control is named by its label (screen readers, UI tests).
            let row = |ui: &mut egui::Ui, name: &str, value: egui::DragValue<'_>| {
                let label = ui.label(name);
                ui.add(value).labelled_by(label.id);
                ui.end_row();
            };
            row(
                ui,
                "Steps",
                egui::DragValue::new(&mut steps).range(1..=10_000),
            );
            row(
                ui,
                "Restarts",
                egui::DragValue::new(&mut restarts).range(1..=64),
            );
            // A penalty weight: from 0 (off) to 100, dragged in steps of `speed`.
            let weight_drag = |v, speed| egui::DragValue::new(v).range(0.0..=100.0).speed(speed);
            row(ui, "L2 penalty", weight_drag(&mut l2, 0.001));
            // Total variation smooths neighbouring pixels: vector inputs have none.
            if image {
                row(ui, "Total variation", weight_drag(&mut tv, 0.001));
            }
            row(ui, "Prior weight", weight_drag(&mut weight, 0.01));
            row(
                ui,
                "Facets",
                egui::DragValue::new(&mut facets).range(1..=MAX_FACETS),
            );
        });
    // The controls stay inside the valid ranges; the core's constructor checks anyway.
    if let Ok(o) = PreferOptions::new(steps, restarts, s.seed(), l2, tv)
        .and_then(|o| o.with_prior_weight(weight))
        .and_then(|o| o.with_facets(facets))
    {
        *s = o;
    }
    let used = state.results.preferred.get(&sel.layer).map(|p| &p.settings);
    let differs = used.is_some_and(|u| *u != state.prefs.search);
    let text = if differs {
        "Search this layer again with these settings"
    } else {
        "Search this layer again"
    };
    if ui.button(text).clicked() {
        actions.push(Action::Recompute(sel.layer));
    }
    if sel.layer == 0 {
        ui.weak("First layer without penalties: exact closed form (b + Σ max(w·low, w·high)).");
    }
}
