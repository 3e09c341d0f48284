//! The grid of unit thumbnails for the selected layer: first-layer units show their incoming
//! weights in the input layout, deeper units their preferred input (filling in as the
//! worker's batches arrive). Each tile carries a small status mark. Only visible rows are
//! drawn, so a 2048-unit layer scrolls smoothly.

use super::Action;
use super::maps;
use super::state::{AppState, Selection, SortKey};
use super::thumbs::{ThumbKey, ThumbKind, Thumbs};
use crate::analysis::screen::Status;
use egui::{Color32, Pos2, Rect, Sense, Stroke, Vec2, pos2, vec2};

/// Space between tiles, in points.
const GAP: f32 = 6.0;
/// Height of the caption under each tile.
const CAPTION: f32 = 14.0;

/// The unit grid panel.
#[derive(Default)]
pub struct UnitsPanel {
    /// Set when the selection moved by keyboard, so the grid scrolls to it.
    scroll_to_selected: bool,
    /// Columns in the last drawn frame (for Up/Down).
    columns: usize,
}

impl UnitsPanel {
    /// Draws the toolbar and the grid, and handles the arrow keys.
    pub fn ui(
        &mut self,
        ui: &mut egui::Ui,
        state: &mut AppState,
        thumbs: &mut Thumbs,
        actions: &mut Vec<Action>,
    ) {
        let Some(net) = state.net().cloned() else {
            return;
        };
        let layer = state.current_layer();
        if layer >= net.layers().len() {
            return;
        }
        self.toolbar_ui(ui, state, layer);
        // The problem units are the screening's verdicts: say when they rest on noise.
        if state.prefs.problems_only {
            super::layers::uniform_warning_ui(ui, state, actions);
        }
        let order = state.order(layer);
        self.keyboard(ui, state, layer, &order);

        if order.is_empty() {
            ui.add_space(20.0);
            ui.vertical_centered(|ui| {
                if state.prefs.problems_only && !state.results.screen.is_ready() {
                    ui.label("Screening is still running; problem units appear when it is done.");
                } else {
                    ui.label("No unit of this layer has a problem status.");
                }
            });
            return;
        }

        self.grid_ui(ui, state, thumbs, &net, layer, &order);
    }

    /// The tiles of `layer` in `order`, row by row; only visible rows are drawn. A click
    /// selects the unit.
    fn grid_ui(
        &mut self,
        ui: &mut egui::Ui,
        state: &mut AppState,
        thumbs: &mut Thumbs,
        net: &crate::model::Network,
        layer: usize,
        order: &[usize],
    ) {
        let tile = state.prefs.tile_size;
        let cell = vec2(tile + GAP, tile + CAPTION + GAP);
        // Leave room for the scroll bar so the last column is never cut.
        let width = (ui.available_width() - 18.0).max(cell.x);
        let cols = ((width / cell.x).floor() as usize).max(1);
        self.columns = cols;
        let rows = order.len().div_ceil(cols);
        let selected_pos = state
            .selection
            .filter(|s| s.layer == layer)
            .and_then(|s| order.iter().position(|&u| u == s.unit));
        let scroll_to = if self.scroll_to_selected {
            self.scroll_to_selected = false;
            selected_pos.map(|p| p / cols)
        } else {
            None
        };
        let mut clicked = None;
        egui::ScrollArea::vertical()
            .id_salt(("unit-grid", layer))
            .auto_shrink([false, false])
            .show_rows(
                ui,
                cell.y - ui.spacing().item_spacing.y,
                rows,
                |ui, range| {
                    // The units on screen, so their preferred inputs are searched first.
                    let shown = order
                        .get(range.start * cols..(range.end * cols).min(order.len()))
                        .unwrap_or_default();
                    state.run.visible = Some((layer, shown.to_vec()));
                    for row in range {
                        ui.horizontal(|ui| {
                            ui.spacing_mut().item_spacing.x = 0.0;
                            for c in 0..cols {
                                let Some(&unit) = order.get(row * cols + c) else {
                                    break;
                                };
                                let selected = selected_pos == Some(row * cols + c);
                                let r = tile_ui(
                                    ui, state, thumbs, net, layer, unit, selected, cell, tile,
                                );
                                if r.clicked() {
                                    clicked = Some(unit);
                                }
                                if selected && scroll_to == Some(row) {
                                    r.scroll_to_me(Some(egui::Align::Center));
                                }
                            }
                        });
                    }
                },
            );
        if let Some(unit) = clicked {
            state.select(Selection { layer, unit }, false);
        }
    }

    fn toolbar_ui(&mut self, ui: &mut egui::Ui, state: &mut AppState, layer: usize) {
        ui.horizontal(|ui| {
            let label = ui.label("Sort by");
            egui::ComboBox::from_id_salt("sort-units")
                .selected_text(state.prefs.sort.label())
                .show_ui(ui, |ui| {
                    for k in SortKey::ALL {
                        ui.selectable_value(&mut state.prefs.sort, k, k.label());
                    }
                })
                .response
                .labelled_by(label.id);
            ui.checkbox(&mut state.prefs.problems_only, "Problem units only");
        });
        ui.horizontal(|ui| super::colour::scale_switch_ui(ui, &mut state.prefs.scale));
        ui.horizontal(|ui| {
            ui.add(
                egui::Slider::new(&mut state.prefs.tile_size, 32.0..=160.0)
                    .text("Tile size")
                    .integer(),
            );
            let caption = state
                .net()
                .and_then(|n| super::conv::tiles_caption(n, layer));
            ui.weak(caption.unwrap_or(if layer == 0 {
                "Tiles: incoming weights"
            } else {
                "Tiles: preferred inputs"
            }));
        });
        ui.horizontal_wrapped(|ui| {
            ui.weak("Marks:");
            marks_legend_ui(ui, false);
        });
        ui.add_space(2.0);
    }

    fn keyboard(&mut self, ui: &egui::Ui, state: &mut AppState, layer: usize, order: &[usize]) {
        if order.is_empty() || ui.ctx().memory(|m| m.focused().is_some()) {
            return;
        }
        let cols = self.columns.max(1) as isize;
        let pos = state
            .selection
            .filter(|s| s.layer == layer)
            .and_then(|s| order.iter().position(|&u| u == s.unit));
        let mut step: Option<isize> = None;
        let mut jump: Option<usize> = None;
        ui.input(|i| {
            use egui::Key;
            if i.key_pressed(Key::ArrowRight) {
                step = Some(1);
            } else if i.key_pressed(Key::ArrowLeft) {
                step = Some(-1);
            } else if i.key_pressed(Key::ArrowDown) {
                step = Some(cols);
            } else if i.key_pressed(Key::ArrowUp) {
                step = Some(-cols);
            } else if i.key_pressed(Key::Home) {
                jump = Some(0);
            } else if i.key_pressed(Key::End) {
                jump = Some(order.len() - 1);
            }
        });
        let target = match (jump, step, pos) {
            (Some(j), _, _) => Some(j),
            (None, Some(s), Some(p)) => {
                Some((p as isize + s).clamp(0, order.len() as isize - 1) as usize)
            }
            (None, Some(_), None) => Some(0),
            _ => None,
        };
        if let Some(t) = target {
            state.select(
                Selection {
                    layer,
                    unit: order[t],
                },
                false,
            );
            self.scroll_to_selected = true;
        }
    }
}

/// Draws one tile: thumbnail, caption, status mark and selection frame.
#[allow(
    clippy::too_many_arguments,
    reason = "one call site in the grid loop; the arguments are that loop's locals"
)]
fn tile_ui(
    ui: &mut egui::Ui,
    state: &AppState,
    thumbs: &mut Thumbs,
    net: &crate::model::Network,
    layer: usize,
    unit: usize,
    selected: bool,
    cell: Vec2,
    tile: f32,
) -> egui::Response {
    let (outer, response) = ui.allocate_exact_size(cell, Sense::click());
    let lname = &net.layers()[layer].name;
    let status = state.screen_of(layer, unit).map(|s| s.status);
    let label = format!("{lname} unit {unit}");
    response.widget_info(|| egui::WidgetInfo::selected(egui::Role::Button, true, selected, &label));
    if !ui.is_rect_visible(outer) {
        return response;
    }
    let rect = Rect::from_min_size(outer.min + vec2(GAP / 2.0, GAP / 2.0), Vec2::splat(tile));
    let visuals = ui.visuals().clone();
    ui.painter()
        .rect_filled(rect, 2.0, visuals.extreme_bg_color);
    match tile_texture(ui.ctx(), state, thumbs, net, layer, unit) {
        Some(t) => {
            let r = fit(t.size_vec2(), rect.shrink(2.0));
            ui.painter().image(
                t.id(),
                r,
                Rect::from_min_max(pos2(0.0, 0.0), pos2(1.0, 1.0)),
                Color32::WHITE,
            );
        }
        None => {
            let text = if layer > 0
                && state
                    .results
                    .preferred
                    .get(&layer)
                    .is_some_and(|p| p.pending == 0)
            {
                "stopped"
            } else {
                "…"
            };
            ui.painter().text(
                rect.center(),
                egui::Align2::CENTER_CENTER,
                text,
                egui::TextStyle::Small.resolve(ui.style()),
                visuals.weak_text_color(),
            );
        }
    }
    if let Some(s) = status {
        draw_mark(
            ui.painter(),
            pos2(rect.right() - 8.0, rect.top() + 8.0),
            s,
            5.5,
        );
    }
    tile_frame_and_caption(ui, rect, unit, selected, response.hovered());
    response.on_hover_ui(|ui| tile_tooltip_ui(ui, state, net, layer, unit, &label))
}

/// The tile's picture: first-layer units show their incoming weights (a shared-scale tile
/// waits for the layer's largest |w|), deeper units their preferred input once it is there.
fn tile_texture(
    ctx: &egui::Context,
    state: &AppState,
    thumbs: &mut Thumbs,
    net: &crate::model::Network,
    layer: usize,
    unit: usize,
) -> Option<egui::TextureHandle> {
    if let Some(t) = super::conv::tile_texture(ctx, state, thumbs, net, layer, unit) {
        return t;
    }
    let key = |kind| ThumbKey { layer, unit, kind };
    if layer > 0 {
        let input = state.preferred_of(layer, unit)?.input.clone();
        return thumbs.get(ctx, key(ThumbKind::Preferred), true, || {
            Some(maps::input_picture(net.input(), &input))
        });
    }
    let scale = state.prefs.scale;
    let shared = scale == super::colour::ScaleMode::SharedLayer;
    // The layer's largest |w| comes with the statistics; a shared-scale tile waits for it
    // rather than scanning the whole weight matrix inside a frame.
    let layer_max = state
        .results
        .stats
        .as_ref()
        .and_then(|s| s.layers.get(layer))
        .map(|s| s.max_abs as f32);
    if shared && layer_max.is_none() {
        return None;
    }
    thumbs.get(ctx, key(ThumbKind::Weights(shared)), true, || {
        let w = net.layers()[0].weights.row(unit).to_vec();
        let m = scale.pick(maps::max_abs(&w), layer_max.unwrap_or(0.0));
        Some(maps::signed_input_map(net.input(), &w, m))
    })
}

/// The frame around a tile (thick when selected, bright when hovered) and its unit number.
fn tile_frame_and_caption(ui: &egui::Ui, rect: Rect, unit: usize, selected: bool, hovered: bool) {
    let visuals = ui.visuals();
    let frame = if selected {
        Stroke::new(2.5, visuals.selection.stroke.color)
    } else if hovered {
        visuals.widgets.hovered.fg_stroke
    } else {
        Stroke::new(1.0, visuals.widgets.noninteractive.bg_stroke.color)
    };
    let painter = ui.painter();
    painter.rect_stroke(rect, 2.0, frame, egui::StrokeKind::Outside);
    painter.text(
        pos2(rect.center().x, rect.bottom() + 2.0),
        egui::Align2::CENTER_TOP,
        unit.to_string(),
        egui::TextStyle::Small.resolve(ui.style()),
        if selected {
            visuals.strong_text_color()
        } else {
            visuals.text_color()
        },
    );
}

/// The tile's tooltip: status, activity, sparsity and the pre-activation reached.
fn tile_tooltip_ui(
    ui: &mut egui::Ui,
    state: &AppState,
    net: &crate::model::Network,
    layer: usize,
    unit: usize,
    label: &str,
) {
    ui.strong(label);
    match state.screen_of(layer, unit) {
        Some(s) => {
            ui.label(format!("status: {}", super::state::status_words(s.status)));
            ui.label(format!(
                "active on {:.1}% of the probe",
                100.0 * s.active_frac
            ));
        }
        None if layer + 1 == net.layers().len() => {
            ui.label("output unit (not screened)");
        }
        None => {
            ui.label("screening…");
        }
    }
    if let Some(st) = state.stats_of(layer, unit) {
        ui.label(format!("Hoyer sparsity {:.3}", st.hoyer));
    }
    if let Some(p) = state.preferred_of(layer, unit) {
        ui.label(format!("pre-activation reached {:.4}", p.preactivation));
    }
}

/// The largest rectangle of `size`'s aspect ratio inside `outer`, centred; very flat maps
/// (vector strips) get at least a quarter of the tile's height so they stay visible.
pub fn fit(size: Vec2, outer: Rect) -> Rect {
    if size.x <= 0.0 || size.y <= 0.0 {
        return outer;
    }
    let s = (outer.width() / size.x).min(outer.height() / size.y);
    let mut d = size * s;
    d.y = d.y.max(outer.height() * 0.25).min(outer.height());
    Rect::from_center_size(outer.center(), d)
}

/// Draws the status mark of our own design: a shape per status, so the mark never relies
/// on colour alone. Nothing is drawn for `ok`.
pub fn draw_mark(painter: &egui::Painter, c: Pos2, status: Status, r: f32) {
    let ink = Color32::from_rgb(250, 250, 250);
    let back = Color32::from_rgba_unmultiplied(20, 20, 20, 220);
    let stroke = Stroke::new(1.6, ink);
    let backdrop = |painter: &egui::Painter| painter.circle_filled(c, r + 2.5, back);
    match status {
        Status::Ok => {}
        Status::DeadProven => {
            // A filled square with a cross: proven dead, over the whole input box.
            backdrop(painter);
            let q = Rect::from_center_size(c, Vec2::splat(2.0 * r));
            painter.rect_filled(q, 0.0, ink);
            let k = r * 0.7;
            let s = Stroke::new(1.8, back);
            painter.line_segment([c + vec2(-k, -k), c + vec2(k, k)], s);
            painter.line_segment([c + vec2(-k, k), c + vec2(k, -k)], s);
        }
        Status::DeadOnProbe => {
            // A hollow square: dead on the probe samples only.
            backdrop(painter);
            let q = Rect::from_center_size(c, Vec2::splat(2.0 * r - 1.0));
            painter.rect_stroke(q, 0.0, stroke, egui::StrokeKind::Middle);
        }
        Status::RarelyActive => {
            // A small ring: active now and then.
            backdrop(painter);
            painter.circle_stroke(c, r * 0.8, stroke);
        }
        Status::AlwaysActive => {
            // A filled dot: never switches off.
            backdrop(painter);
            painter.circle_filled(c, r * 0.6, ink);
        }
        Status::Saturated => {
            // A flat bar: the slope is (nearly) zero.
            backdrop(painter);
            painter.line_segment([c + vec2(-r, 0.0), c + vec2(r, 0.0)], Stroke::new(2.5, ink));
        }
        Status::NonFinite => {
            // An exclamation mark in a triangle.
            backdrop(painter);
            let pts = vec![
                c + vec2(0.0, -r),
                c + vec2(r, r * 0.8),
                c + vec2(-r, r * 0.8),
            ];
            painter.add(egui::Shape::convex_polygon(
                pts,
                Color32::TRANSPARENT,
                stroke,
            ));
            painter.line_segment([c + vec2(0.0, -r * 0.35), c + vec2(0.0, r * 0.25)], stroke);
        }
    }
}

/// The legend of the tile marks (one line, or one per row when `rows`).
pub fn marks_legend_ui(ui: &mut egui::Ui, rows: bool) {
    let entries = [
        (Status::DeadProven, "dead (proven)"),
        (Status::DeadOnProbe, "dead on probe"),
        (Status::RarelyActive, "rarely active"),
        (Status::AlwaysActive, "always active"),
        (Status::Saturated, "saturated"),
        (Status::NonFinite, "non-finite"),
    ];
    for (s, text) in entries {
        let draw = |ui: &mut egui::Ui| {
            let (r, _) = ui.allocate_exact_size(vec2(18.0, 16.0), Sense::hover());
            draw_mark(ui.painter(), r.center(), s, 5.0);
            ui.label(egui::RichText::new(text).small());
            ui.add_space(6.0);
        };
        if rows {
            ui.horizontal(draw);
        } else {
            draw(ui);
        }
    }
}
