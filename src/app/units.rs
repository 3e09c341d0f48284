//! The middle pane's units of the selected layer, in one of two modes: the unit table
//! (the default, [`super::table`]) or the wall of thumbnails. First-layer tiles show their
//! incoming weights in the input layout, deeper tiles their preferred input (filling in as
//! the worker's batches arrive); each tile carries a small status mark. This panel owns the
//! mode switch, the status filter, "Go to unit" and the keyboard; both modes share the
//! order ([`AppState::order`]). Only visible rows are drawn, so a 2048-unit layer scrolls
//! smoothly.

use super::maps;
use super::state::{AppState, Selection, SortKey, StatusFilter, UnitView};
use super::table::TablePanel;
use super::thumbs::{ThumbKey, ThumbKind, Thumbs};
use crate::analysis::screen::Status;
use egui::{Color32, Pos2, Rect, Sense, Stroke, Vec2, pos2, vec2};

/// Space between tiles, in points.
const GAP: f32 = 6.0;
/// Height of the caption under each tile.
const CAPTION: f32 = 14.0;
/// The key that puts the keyboard in the "Go to unit" field.
pub const GO_TO_KEY: egui::Key = egui::Key::G;

/// The units panel: the table or the tile wall, and what both share.
#[derive(Default)]
pub struct UnitsPanel {
    /// Set when the selection moved by keyboard or "Go to unit", so the view scrolls to it.
    scroll_to_selected: bool,
    /// Columns of the tile wall in the last drawn frame (for Up/Down).
    columns: usize,
    /// The tile rows drawn in the last frame (to scroll to a selection outside them).
    grid_shown: std::ops::Range<usize>,
    /// The text of the "Go to unit" field.
    go_to: String,
    /// The table.
    table: TablePanel,
}

impl UnitsPanel {
    /// Draws the toolbar and the table or the tile wall, and handles the keys.
    pub fn ui(&mut self, ui: &mut egui::Ui, state: &mut AppState, thumbs: &mut Thumbs) {
        let Some(net) = state.net().cloned() else {
            return;
        };
        let layer = state.current_layer();
        if layer >= net.layers().len() {
            return;
        }
        self.toolbar_ui(ui, state, &net, layer);
        // The table's statuses and the tiles' marks rest on the screening: say when it ran
        // on noise (the layer list says so too, with the button to open a file).
        super::layers::uniform_note_ui(ui, state);
        let order = state.order(layer);
        let tiles = state.prefs.unit_view == UnitView::Tiles;
        let row_step = if tiles { self.columns.max(1) } else { 1 };
        self.keyboard(ui, state, layer, &order, row_step);

        if order.is_empty() {
            ui.add_space(20.0);
            ui.vertical_centered(|ui| ui.label(empty_text(state, &net, layer)));
            return;
        }
        let scroll = std::mem::take(&mut self.scroll_to_selected);
        if tiles {
            self.grid_ui(ui, state, thumbs, &net, layer, &order, scroll);
        } else {
            self.table
                .ui(ui, state, thumbs, &net, layer, &order, scroll);
        }
    }

    /// The tiles of `layer` in `order`, row by row; only visible rows are drawn. A click
    /// selects the unit.
    #[allow(
        clippy::too_many_arguments,
        reason = "the panel's locals, passed once per frame"
    )]
    fn grid_ui(
        &mut self,
        ui: &mut egui::Ui,
        state: &mut AppState,
        thumbs: &mut Thumbs,
        net: &crate::model::Network,
        layer: usize,
        order: &[usize],
        scroll: bool,
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
        let scroll_to = if scroll {
            selected_pos.map(|p| p / cols)
        } else {
            None
        };
        let mut clicked = None;
        let mut area = egui::ScrollArea::vertical()
            .id_salt(("unit-grid", layer))
            .auto_shrink([false, false]);
        // A selection outside the rows drawn last frame: scroll there first (the tile
        // itself is drawn only once it is in view).
        if let Some(row) = scroll_to
            && !self.grid_shown.contains(&row)
        {
            let half = (self.grid_shown.len() as f32 / 2.0).floor();
            area = area.vertical_scroll_offset(((row as f32 - half) * cell.y).max(0.0));
        }
        area.show_rows(
            ui,
            cell.y - ui.spacing().item_spacing.y,
            rows,
            |ui, range| {
                // The units on screen, so their preferred inputs are searched first.
                let shown = order
                    .get(range.start * cols..(range.end * cols).min(order.len()))
                    .unwrap_or_default();
                state.run.visible = Some((layer, shown.to_vec()));
                self.grid_shown = range.clone();
                for row in range {
                    ui.horizontal(|ui| {
                        ui.spacing_mut().item_spacing.x = 0.0;
                        for c in 0..cols {
                            let Some(&unit) = order.get(row * cols + c) else {
                                break;
                            };
                            let selected = selected_pos == Some(row * cols + c);
                            let r =
                                tile_ui(ui, state, thumbs, net, layer, unit, selected, cell, tile);
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

    /// The mode switch, the status filter and "Go to unit"; then the mode's own row (the
    /// sort menu and tile size for the tiles, the sort order in words for the table) and
    /// the legend of the marks.
    fn toolbar_ui(
        &mut self,
        ui: &mut egui::Ui,
        state: &mut AppState,
        net: &crate::model::Network,
        layer: usize,
    ) {
        ui.horizontal(|ui| {
            let view = &mut state.prefs.unit_view;
            ui.selectable_value(view, UnitView::Table, "Table")
                .on_hover_text("One row per unit: screening numbers, sortable by column");
            ui.selectable_value(view, UnitView::Tiles, "Tiles")
                .on_hover_text("A wall of thumbnails");
            ui.separator();
            let label = ui.label("Show");
            egui::ComboBox::from_id_salt("unit-filter")
                .selected_text(state.status_filter.label())
                .show_ui(ui, |ui| {
                    let counts = status_counts(state, layer);
                    for f in StatusFilter::ALL {
                        let n = counts.iter().filter(|s| f.keeps(**s)).count();
                        let text = format!("{}: {n}", f.label());
                        ui.selectable_value(&mut state.status_filter, f, text);
                    }
                })
                .response
                .labelled_by(label.id);
            ui.separator();
            self.go_to_ui(ui, state, net, layer);
        });
        // The colour scale of the weight maps (the table's thumbnails and the tiles).
        ui.horizontal(|ui| super::colour::scale_switch_ui(ui, &mut state.prefs.scale));
        if state.prefs.unit_view == UnitView::Tiles {
            // Wrapped: a narrow pane moves the tile-size slider to a second line instead of
            // widening the pane (which would push the last tile column out of view).
            ui.horizontal_wrapped(|ui| {
                let label = ui.label("Sort by");
                egui::ComboBox::from_id_salt("sort-units")
                    .selected_text(state.prefs.sort.label())
                    .show_ui(ui, |ui| {
                        for k in SortKey::ALL {
                            if ui
                                .selectable_label(state.prefs.sort == k, k.label())
                                .clicked()
                                && state.prefs.sort != k
                            {
                                state.sort_by(k);
                            }
                        }
                    })
                    .response
                    .labelled_by(label.id);
                let sort = state.prefs.sort;
                if ui
                    .button(sort.direction_words(state.prefs.sort_descending))
                    .on_hover_text("Turn the order around")
                    .clicked()
                {
                    state.sort_by(sort);
                }
                ui.add(
                    egui::Slider::new(&mut state.prefs.tile_size, 32.0..=160.0)
                        .text("Tile size")
                        .integer(),
                );
            });
            let caption = super::conv::tiles_caption(net, layer);
            ui.weak(caption.unwrap_or(if layer == 0 {
                "Tiles: incoming weights"
            } else {
                "Tiles: preferred inputs"
            }));
        } else {
            let sort = state.prefs.sort;
            ui.weak(format!(
                "Sorted by {}, {}. Click a column's header to sort by it.",
                sort.label(),
                sort.direction_words(state.prefs.sort_descending)
            ));
        }
        ui.horizontal_wrapped(|ui| {
            ui.weak("Marks:");
            marks_legend_ui(ui);
        });
        ui.add_space(2.0);
    }

    /// The "Go to unit" field: a unit number and Enter select that unit (showing every
    /// status again when the filter hid it).
    fn go_to_ui(
        &mut self,
        ui: &mut egui::Ui,
        state: &mut AppState,
        net: &crate::model::Network,
        layer: usize,
    ) {
        let label = ui.label("Go to unit");
        let units = net.layer(layer).units();
        let r = ui
            .add(
                egui::TextEdit::singleline(&mut self.go_to)
                    .id(go_to_id())
                    .hint_text(format!("0–{}", units.saturating_sub(1)))
                    .desired_width(56.0),
            )
            .labelled_by(label.id)
            .on_hover_text(format!(
                "Type a unit number and press Enter ({GO_TO_KEY:?} puts the keyboard here)"
            ));
        if !(r.lost_focus() && ui.input(|i| i.key_pressed(egui::Key::Enter))) {
            return;
        }
        let text = std::mem::take(&mut self.go_to);
        let lname = &net.layer(layer).name;
        match text.trim().parse::<usize>() {
            Ok(unit) if unit < units => {
                if !state
                    .status_filter
                    .keeps(state.screen_of(layer, unit).map(|s| s.status))
                {
                    state.status_filter = StatusFilter::All;
                }
                state.select(Selection { layer, unit }, false);
                self.scroll_to_selected = true;
            }
            _ => state.fail(format!(
                "Go to unit: '{}' is not a unit of layer {lname} (0 to {})",
                text.trim(),
                units.saturating_sub(1)
            )),
        }
    }

    /// Arrow keys, Home and End move the selection through `order` (`row_step` units per
    /// Up/Down); [`GO_TO_KEY`] puts the keyboard in "Go to unit". Only while no widget has
    /// the keyboard, so Tab still moves focus between controls.
    fn keyboard(
        &mut self,
        ui: &egui::Ui,
        state: &mut AppState,
        layer: usize,
        order: &[usize],
        row_step: usize,
    ) {
        if ui.ctx().memory(|m| m.focused().is_some()) {
            return;
        }
        if ui.input_mut(|i| i.consume_key(egui::Modifiers::NONE, GO_TO_KEY)) {
            self.go_to.clear();
            ui.ctx().memory_mut(|m| m.request_focus(go_to_id()));
            return;
        }
        if order.is_empty() {
            return;
        }
        let rows = row_step.max(1) as isize;
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
                step = Some(rows);
            } else if i.key_pressed(Key::ArrowUp) {
                step = Some(-rows);
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

/// The id of the "Go to unit" field (the same every frame, so [`GO_TO_KEY`] can focus it).
fn go_to_id() -> egui::Id {
    egui::Id::unique("receptor-go-to-unit")
}

/// The screening status of every unit of `layer` (`None` where it has none yet, or on the
/// output layer), for the filter menu's counts.
fn status_counts(state: &AppState, layer: usize) -> Vec<Option<Status>> {
    let n = state
        .net()
        .and_then(|n| n.layers().get(layer))
        .map_or(0, |l| l.units());
    (0..n)
        .map(|u| state.screen_of(layer, u).map(|s| s.status))
        .collect()
}

/// Why the filtered list of `layer` is empty.
fn empty_text(state: &AppState, net: &crate::model::Network, layer: usize) -> String {
    let filter = state.status_filter;
    if layer + 1 == net.layers().len() {
        "Screening covers hidden layers only: show all units to see the output layer.".into()
    } else if !state.results.screen.is_ready() {
        "Screening is still running; the units appear when it is done.".into()
    } else {
        format!(
            "No unit of layer {} is in \"{}\".",
            net.layer(layer).name,
            filter.label()
        )
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
    // Vector inputs: a glyph of the feature chart instead of a picture.
    let glyph = super::feature_chart::tile_glyph(ui, state, net, layer, unit, rect.shrink(4.0));
    let texture = match glyph {
        None => tile_texture(ui.ctx(), state, thumbs, net, layer, unit),
        Some(_) => None,
    };
    match texture {
        Some(t) => {
            let r = fit(t.size_vec2(), rect.shrink(2.0));
            ui.painter().image(
                t.id(),
                r,
                Rect::from_min_max(pos2(0.0, 0.0), pos2(1.0, 1.0)),
                Color32::WHITE,
            );
        }
        None if glyph == Some(true) => {}
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
    let caption = match super::state::class_label(net, layer, unit) {
        Some(c) => format!("{unit} {c}"),
        None => unit.to_string(),
    };
    tile_frame_and_caption(ui, rect, &caption, selected, response.hovered());
    response.on_hover_ui(|ui| tile_tooltip_ui(ui, state, net, layer, unit, &label))
}

/// The tile's picture: first-layer units show their incoming weights (a shared-scale tile
/// waits for the layer's largest |w|), deeper units their preferred input once it is there.
pub(super) fn tile_texture(
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

/// The frame around a tile (thick when selected, bright when hovered) and its caption (the
/// unit number, and the class label on a labelled output layer), cut to the tile's width.
fn tile_frame_and_caption(ui: &egui::Ui, rect: Rect, caption: &str, selected: bool, hovered: bool) {
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
    let colour = if selected {
        visuals.strong_text_color()
    } else {
        visuals.text_color()
    };
    let font = egui::TextStyle::Small.resolve(ui.style());
    let job = egui::text::LayoutJob {
        wrap: egui::text::TextWrapping::truncate_at_width(rect.width() + 2.0),
        ..egui::text::LayoutJob::simple_singleline(caption.to_owned(), font, colour)
    };
    let galley = painter.layout_job(job);
    let at = pos2(rect.center().x - galley.size().x / 2.0, rect.bottom() + 2.0);
    painter.galley(at, galley, colour);
}

/// The tile's tooltip: status, activity, sparsity and the pre-activation reached.
pub(super) fn tile_tooltip_ui(
    ui: &mut egui::Ui,
    state: &AppState,
    net: &crate::model::Network,
    layer: usize,
    unit: usize,
    label: &str,
) {
    ui.strong(label);
    if let Some(c) = super::state::class_label(net, layer, unit) {
        ui.label(format!("class: {c}"));
    }
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

/// The legend of the tile marks: one group per mark, wrapping as the parent lays out.
pub fn marks_legend_ui(ui: &mut egui::Ui) {
    let entries = [
        (Status::DeadProven, "dead (proven)"),
        (Status::DeadOnProbe, "dead on reference data"),
        (Status::RarelyActive, "rarely active"),
        (Status::AlwaysActive, "always active"),
        (Status::Saturated, "saturated"),
        (Status::NonFinite, "non-finite"),
    ];
    for (s, text) in entries {
        // The mark and its name are one widget, so a wrapped legend never parts them.
        let galley = ui.painter().layout_no_wrap(
            text.to_string(),
            egui::TextStyle::Small.resolve(ui.style()),
            ui.visuals().text_color(),
        );
        let size = vec2(18.0 + galley.size().x + 8.0, galley.size().y.max(16.0));
        let (r, _) = ui.allocate_exact_size(size, Sense::hover());
        draw_mark(ui.painter(), pos2(r.left() + 9.0, r.center().y), s, 5.0);
        let text_pos = pos2(r.left() + 18.0, r.center().y - galley.size().y / 2.0);
        ui.painter()
            .galley(text_pos, galley, ui.visuals().text_color());
    }
}
