//! The unit table, the middle pane's default view: one row per unit of the selected layer
//! with its status mark, active %, upper bound, mean and max activation, Hoyer sparsity,
//! near-zero % and a small thumbnail, sortable by clicking a column's header and filtered
//! by status (the filter and the order are shared with the tile wall, see
//! [`super::units`]). Every number comes from a result the app already holds
//! ([`AppState::unit_value`]); only the rows on screen are drawn, so a 2048-unit layer
//! scrolls as smoothly as a small one.

use super::state::{AppState, Selection, SortKey, status_short};
use super::thumbs::Thumbs;
use super::units::{draw_mark, tile_texture, tile_tooltip_ui};
use crate::model::Network;
use crate::report::format::sig;
use egui::{Align2, Color32, Rect, Sense, Stroke, pos2, vec2};

/// Height of a row, in points (the thumbnail is a little smaller).
const ROW: f32 = 24.0;
/// Significant digits of the numbers.
const DIGITS: usize = 3;

/// One column of the table.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Column {
    /// The unit's index (and its class label on a labelled output layer).
    Unit,
    /// The unit's picture: incoming weights on the first layer, preferred input deeper.
    Picture,
    /// The status mark (and its words when there is room).
    Status,
    /// A number from [`AppState::unit_value`]; `percent` shows fractions as percentages.
    Value { key: SortKey, percent: bool },
}

impl Column {
    /// The sort key behind the column, if it sorts.
    fn key(self) -> Option<SortKey> {
        match self {
            Column::Unit => Some(SortKey::Index),
            Column::Picture => None,
            Column::Status => Some(SortKey::Status),
            Column::Value { key, .. } => Some(key),
        }
    }
}

/// The table's columns in order, with their widths in points.
fn columns(unit_width: f32, status_width: f32) -> Vec<(Column, f32)> {
    let value = |key, percent| Column::Value { key, percent };
    vec![
        (Column::Unit, unit_width),
        (Column::Status, status_width),
        (Column::Picture, ROW + 4.0),
        (value(SortKey::Activity, true), 52.0),
        (value(SortKey::UpperBound, false), 68.0),
        (value(SortKey::Mean, false), 68.0),
        (value(SortKey::Max, false), 54.0),
        (value(SortKey::Sparsity, false), 50.0),
        (value(SortKey::NearZero, true), 64.0),
    ]
}

/// The columns for `layer` in a pane `room` points wide. Screening covers hidden layers
/// only, so the output layer leaves out the columns it would show empty (status, active %,
/// mean) and gives the room to its class labels. Hidden layers show the status in words
/// beside the mark when there is room, else the mark alone (the legend above names the
/// marks).
fn layout(net: &Network, layer: usize, room: f32) -> Vec<(Column, f32)> {
    let output = layer + 1 == net.layers().len();
    let labelled = output && net.layer(layer).labels.is_some();
    let mut cols = columns(38.0, 28.0);
    if output {
        cols.retain(|(c, _)| match c {
            Column::Status => false,
            Column::Value { key, .. } => !matches!(key, SortKey::Activity | SortKey::Mean),
            _ => true,
        });
    }
    let others: f32 = cols.iter().skip(1).map(|c| c.1).sum();
    if labelled {
        cols[0].1 = (room - others).clamp(42.0, 170.0);
    } else if !output && room >= others + 42.0 + 80.0 {
        for c in &mut cols {
            if c.0 == Column::Status {
                c.1 = 130.0;
            }
        }
    }
    cols
}

/// The unit table panel.
#[derive(Default)]
pub struct TablePanel {
    /// The rows drawn in the last frame (to scroll to a selection outside them).
    shown: std::ops::Range<usize>,
}

impl TablePanel {
    /// Draws the header and the rows of `layer` in `order`. `scroll_to` asks to bring the
    /// selected row into view (it moved by keyboard or by "Go to unit").
    #[allow(
        clippy::too_many_arguments,
        reason = "the units panel's locals, passed once per frame"
    )]
    pub fn ui(
        &mut self,
        ui: &mut egui::Ui,
        state: &mut AppState,
        thumbs: &mut Thumbs,
        net: &Network,
        layer: usize,
        order: &[usize],
        scroll_to: bool,
    ) {
        let cols = layout(net, layer, ui.available_width() - 18.0);
        let width: f32 = cols.iter().map(|c| c.1).sum();

        egui::ScrollArea::horizontal()
            .id_salt("unit-table-h")
            .auto_shrink([false, false])
            .show(ui, |ui| {
                ui.set_min_width(width);
                self.header_ui(ui, state, &cols, width);
                let selected = state
                    .selection
                    .filter(|s| s.layer == layer)
                    .and_then(|s| order.iter().position(|&u| u == s.unit));
                let mut area = egui::ScrollArea::vertical()
                    .id_salt(("unit-table", layer))
                    .auto_shrink([false, false]);
                // A selection outside the rows drawn last frame: scroll there first (the
                // row itself is drawn only once it is in view).
                if scroll_to
                    && let Some(p) = selected
                    && !self.shown.contains(&p)
                {
                    let half = (self.shown.len() as f32 / 2.0).floor();
                    area = area.vertical_scroll_offset(((p as f32 - half) * ROW).max(0.0));
                }
                let mut clicked = None;
                ui.scope(|ui| {
                    ui.spacing_mut().item_spacing.y = 0.0;
                    area.show_rows(ui, ROW, order.len(), |ui, range| {
                        // The units on screen, so their preferred inputs are searched first.
                        state.run.visible = Some((layer, order[range.clone()].to_vec()));
                        self.shown = range.clone();
                        for i in range {
                            let unit = order[i];
                            let is_sel = selected == Some(i);
                            let r = row_ui(ui, state, thumbs, net, layer, unit, i, is_sel, &cols);
                            if r.clicked() {
                                clicked = Some(unit);
                            }
                            if is_sel && scroll_to {
                                r.scroll_to_me(None);
                            }
                        }
                    });
                });
                if let Some(unit) = clicked {
                    state.select(Selection { layer, unit }, false);
                }
            });
    }

    /// The column headers; a click on a sortable one sorts by it (again: the other way).
    fn header_ui(
        &mut self,
        ui: &mut egui::Ui,
        state: &mut AppState,
        cols: &[(Column, f32)],
        width: f32,
    ) {
        let (rect, _) = ui.allocate_exact_size(vec2(width, ROW), Sense::hover());
        let visuals = ui.visuals().clone();
        ui.painter().line_segment(
            [rect.left_bottom(), rect.right_bottom()],
            visuals.widgets.noninteractive.bg_stroke,
        );
        let mut x = rect.left();
        for &(col, w) in cols {
            let cell = Rect::from_min_size(pos2(x, rect.top()), vec2(w, ROW));
            x += w;
            let Some(key) = col.key() else {
                // The thumbnails need no name (the tile wall's caption says what they show).
                continue;
            };
            let current = state.prefs.sort == key;
            let name = key.label();
            let id = egui::Id::unique(("receptor-sort-column", key.label()));
            let r = ui.interact(cell, id, Sense::click());
            let label = format!("Sort by {}", key.label());
            r.widget_info(|| egui::WidgetInfo::selected(egui::Role::Button, true, current, &label));
            if r.hovered() {
                ui.painter().rect_filled(
                    cell.shrink(1.0),
                    2.0,
                    visuals.widgets.hovered.weak_bg_fill,
                );
            }
            let text_rect = header_text(ui, cell, col, name, current);
            if current {
                sort_arrow(ui, &text_rect, col, state.prefs.sort_descending);
            }
            let hint = format!(
                "Sort by {} ({}); click again to turn the order around",
                key.label(),
                key.direction_words(key.first_descending())
            );
            if r.on_hover_text(hint).clicked() {
                state.sort_by(key);
            }
        }
    }
}

/// The sort direction beside the current column's name: a small triangle pointing up
/// (lowest first) or down (highest first), drawn rather than typed so it needs no glyph.
fn sort_arrow(ui: &egui::Ui, text: &Rect, col: Column, descending: bool) {
    let colour = ui.visuals().strong_text_color();
    // Number columns are right-aligned: the arrow goes left of the name.
    let x = match col {
        Column::Value { .. } => text.left() - 7.0,
        _ => text.right() + 7.0,
    };
    let c = pos2(x, text.center().y);
    let (tip, base) = if descending { (4.0, -3.0) } else { (-4.0, 3.0) };
    let points = vec![
        c + vec2(0.0, tip),
        c + vec2(-4.0, base),
        c + vec2(4.0, base),
    ];
    ui.painter()
        .add(egui::Shape::convex_polygon(points, colour, Stroke::NONE));
}

/// Header text: right-aligned over number columns, left-aligned otherwise. Returns where
/// the text went.
fn header_text(ui: &egui::Ui, cell: Rect, col: Column, text: &str, strong: bool) -> Rect {
    let visuals = ui.visuals();
    let colour = if strong {
        visuals.strong_text_color()
    } else {
        visuals.text_color()
    };
    let font = egui::TextStyle::Small.resolve(ui.style());
    let (anchor, at) = match col {
        Column::Value { .. } => (Align2::RIGHT_CENTER, cell.right_center() - vec2(6.0, 0.0)),
        _ => (Align2::LEFT_CENTER, cell.left_center() + vec2(4.0, 0.0)),
    };
    ui.painter().text(at, anchor, text, font, colour)
}

/// Draws one row and returns its response (clickable, labelled `"{layer} unit {unit}"` as
/// the tiles are, so a screen reader and the tests find a unit the same way in both modes).
#[allow(
    clippy::too_many_arguments,
    reason = "one call site in the row loop; the arguments are that loop's locals"
)]
fn row_ui(
    ui: &mut egui::Ui,
    state: &AppState,
    thumbs: &mut Thumbs,
    net: &Network,
    layer: usize,
    unit: usize,
    index: usize,
    selected: bool,
    cols: &[(Column, f32)],
) -> egui::Response {
    let width: f32 = cols.iter().map(|c| c.1).sum();
    let (rect, response) = ui.allocate_exact_size(vec2(width, ROW), Sense::click());
    let lname = &net.layer(layer).name;
    let label = format!("{lname} unit {unit}");
    response.widget_info(|| egui::WidgetInfo::selected(egui::Role::Button, true, selected, &label));
    if !ui.is_rect_visible(rect) {
        return response;
    }
    let visuals = ui.visuals().clone();
    let painter = ui.painter();
    if selected {
        painter.rect_filled(rect, 0.0, visuals.selection.bg_fill);
    } else if response.hovered() {
        painter.rect_filled(rect, 0.0, visuals.widgets.hovered.weak_bg_fill);
    } else if index % 2 == 1 {
        painter.rect_filled(rect, 0.0, visuals.faint_bg_color);
    }
    let ink = if selected {
        visuals.selection.stroke.color
    } else {
        visuals.text_color()
    };
    let weak = if selected {
        ink
    } else {
        visuals.weak_text_color()
    };
    let number_font = egui::TextStyle::Monospace.resolve(ui.style());
    let body_font = egui::TextStyle::Body.resolve(ui.style());
    let status = state.screen_of(layer, unit).map(|s| s.status);
    let mut x = rect.left();
    for &(col, w) in cols {
        let cell = Rect::from_min_size(pos2(x, rect.top()), vec2(w, ROW));
        x += w;
        match col {
            Column::Unit => {
                let text = match super::state::class_label(net, layer, unit) {
                    Some(c) => format!("{unit}  {c}"),
                    None => unit.to_string(),
                };
                let job = egui::text::LayoutJob {
                    wrap: egui::text::TextWrapping::truncate_at_width(w - 8.0),
                    ..egui::text::LayoutJob::simple_singleline(text, body_font.clone(), ink)
                };
                let galley = painter.layout_job(job);
                let at = pos2(cell.left() + 4.0, cell.center().y - galley.size().y / 2.0);
                painter.galley(at, galley, ink);
            }
            Column::Picture => {
                let r = Rect::from_center_size(cell.center(), vec2(ROW - 4.0, ROW - 4.0));
                painter.rect_filled(r, 1.0, visuals.extreme_bg_color);
                if let Some(t) = tile_texture(ui.ctx(), state, thumbs, net, layer, unit) {
                    let fit = super::units::fit(t.size_vec2(), r);
                    painter.image(
                        t.id(),
                        fit,
                        Rect::from_min_max(pos2(0.0, 0.0), pos2(1.0, 1.0)),
                        Color32::WHITE,
                    );
                }
                painter.rect_stroke(
                    r,
                    1.0,
                    Stroke::new(1.0, visuals.widgets.noninteractive.bg_stroke.color),
                    egui::StrokeKind::Outside,
                );
            }
            Column::Status => {
                let c = pos2(cell.left() + 13.0, cell.center().y);
                match status {
                    Some(s) => {
                        draw_mark(painter, c, s, 5.0);
                        if w > 60.0 {
                            let colour = if s == crate::analysis::screen::Status::Ok {
                                weak
                            } else {
                                ink
                            };
                            painter.text(
                                pos2(cell.left() + 26.0, cell.center().y),
                                Align2::LEFT_CENTER,
                                status_short(s),
                                body_font.clone(),
                                colour,
                            );
                        }
                    }
                    None => {
                        painter.text(c, Align2::CENTER_CENTER, "–", body_font.clone(), weak);
                    }
                }
            }
            Column::Value { key, percent } => {
                let text = match state.unit_value(layer, unit, key) {
                    Some(v) if percent => sig(100.0 * v, DIGITS),
                    Some(v) => sig(v, DIGITS),
                    None => "–".to_owned(),
                };
                // Clipped to the cell, so a long number never runs into its neighbour.
                painter
                    .with_clip_rect(cell.intersect(painter.clip_rect()))
                    .text(
                        cell.right_center() - vec2(6.0, 0.0),
                        Align2::RIGHT_CENTER,
                        text,
                        number_font.clone(),
                        ink,
                    );
            }
        }
    }
    response.on_hover_ui(|ui| tile_tooltip_ui(ui, state, net, layer, unit, &label))
}
