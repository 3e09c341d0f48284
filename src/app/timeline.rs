//! The training-run view: a panel under the main area while a run is open. A slider (and
//! Left/Right, Home/End while it has the keyboard) scrubs through the checkpoints, and the
//! unit view above follows; plots of dead units per layer, mean sparsity and accuracy
//! against the step; the selected unit's own history (its activity, bound and weight
//! norm); and every screened unit as a cell, sorted and coloured by when it died.

use super::Action;
use super::colour::color32;
use super::state::{AppState, Selection, Slot, TrainingRun};
use crate::analysis::screen::Status;
use crate::analysis::timeline::{Timeline, UnitTimeline};
use crate::report::colour::series_rgb;
use egui::{Color32, Key, Modifiers, RichText};
use egui_plot::{Line, Plot, PlotPoints, Points, VLine};
use std::sync::atomic::Ordering;

/// Height of each plot, in points.
const PLOT_HEIGHT: f32 = 150.0;
/// Side of a unit's cell in the list of units by death, in points.
const CELL: f32 = 11.0;

/// Draws the view of the open run (the caller shows it only while a run is open).
pub fn ui(ui: &mut egui::Ui, state: &mut AppState, actions: &mut Vec<Action>) {
    let t = &state.training;
    header_ui(ui, t, actions);
    let Some(series) = t.series.clone() else {
        return;
    };
    let n = series.len();
    let key_name = series.order().key_name();
    let key = |i: usize| series.key(i);
    let timeline = t.timeline.as_ref().cloned();
    ui.horizontal(|ui| {
        let mut k = t.current.min(n.saturating_sub(1));
        let slider = egui::Slider::new(&mut k, 0..=n.saturating_sub(1))
            .step_by(1.0)
            .show_value(false)
            .text("Checkpoint");
        let r = ui.add(slider).on_hover_text(
            "Drag, or click and use Left/Right (Home/End: first/last), to move through the checkpoints",
        );
        if r.has_focus() {
            ui.input_mut(|i| {
                if i.consume_key(Modifiers::NONE, Key::Home) {
                    k = 0;
                }
                if i.consume_key(Modifiers::NONE, Key::End) {
                    k = n.saturating_sub(1);
                }
            });
        }
        if k != t.current {
            actions.push(Action::ScrubTo(k));
        }
        ui.label(
            RichText::new(format!("{key_name} {} · checkpoint {} of {n}", key(k), k + 1)).strong(),
        );
        if t.loading.is_some() {
            ui.spinner();
        } else if t.shown != Some(t.current) {
            ui.weak("(the unit view shows another model; move the slider to show this checkpoint)");
        }
        if let Some(tl) = &timeline {
            ui.separator();
            ui.label(dead_summary(tl, k));
            if let Some(Some(acc)) = tl.accuracy.get(k) {
                ui.separator();
                ui.label(format!("Accuracy on the reference data: {:.1}%", acc * 100.0));
            }
        }
    });
    let Some(tl) = timeline else {
        return;
    };
    let current_key = key(t.current) as f64;
    ui.horizontal(|ui| {
        ui.spacing_mut().item_spacing.x = 4.0;
        for (i, h) in tl.layers.iter().enumerate() {
            let (rect, _) = ui.allocate_exact_size(egui::vec2(18.0, 10.0), egui::Sense::hover());
            ui.painter().line_segment(
                [rect.left_center(), rect.right_center()],
                egui::Stroke::new(3.0, color32(series_rgb(i))),
            );
            ui.label(RichText::new(&h.layer).small());
        }
        ui.weak(
            RichText::new(
                "· grey line: the checkpoint shown · click a plot to go to the nearest checkpoint",
            )
            .small(),
        );
    });
    ui.columns(5, |cols| {
        dead_plot_ui(&mut cols[0], &tl, current_key, actions);
        sparsity_plot_ui(&mut cols[1], &tl, current_key, actions);
        accuracy_plot_ui(&mut cols[2], &tl, current_key, actions);
        let (left, right) = cols.split_at_mut(4);
        unit_history_ui(
            &mut left[3],
            &mut right[0],
            &tl,
            state.selection,
            current_key,
        );
    });
    deaths_ui(ui, state, &tl, key_name);
}

/// The run's name, the work on it (progress and Stop, or Analyse again) and Close run.
fn header_ui(ui: &mut egui::Ui, t: &TrainingRun, actions: &mut Vec<Action>) {
    ui.horizontal(|ui| {
        ui.heading("Training run");
        if let Some(o) = &t.opening {
            ui.spinner();
            ui.label(format!("Reading {o}…"));
        }
        if let Some(s) = &t.series {
            let folder = s
                .checkpoints()
                .first()
                .and_then(|c| c.path.parent())
                .map(|p| p.display().to_string())
                .unwrap_or_default();
            ui.weak(format!("{} checkpoints in {folder}", s.len()));
        }
        match &t.timeline {
            Slot::Pending => {
                ui.separator();
                let f = t.progress.load(Ordering::Relaxed) as f32 / 1000.0;
                ui.add(
                    egui::ProgressBar::new(f)
                        .desired_width(140.0)
                        .show_percentage(),
                );
                ui.label("Analysing every checkpoint on the reference data…");
                if ui.button("Stop analysing the run").clicked() {
                    actions.push(Action::StopRunAnalysis);
                }
            }
            Slot::Failed(e) => {
                ui.separator();
                let colour = ui.visuals().error_fg_color;
                ui.colored_label(colour, e);
            }
            Slot::Empty if t.stopped => {
                ui.separator();
                ui.label("The analysis was stopped.");
                if ui.button("Analyse again").clicked() {
                    actions.push(Action::AnalyseRunAgain);
                }
            }
            _ => {}
        }
        ui.with_layout(egui::Layout::right_to_left(egui::Align::Center), |ui| {
            if ui.button("Close run").clicked() {
                actions.push(Action::CloseRun);
            }
        });
    });
}

/// "Dead units at this checkpoint: 36 (h1 24, h2 12)": never active on the reference data, proven
/// dead or not, per screened layer.
pub fn dead_summary(tl: &Timeline, checkpoint: usize) -> String {
    let rows: Vec<_> = tl
        .checkpoints
        .iter()
        .filter(|c| c.checkpoint == checkpoint)
        .collect();
    let total: usize = rows.iter().map(|c| c.dead_proven + c.dead_on_probe).sum();
    let per: Vec<String> = rows
        .iter()
        .map(|c| format!("{} {}", c.layer, c.dead_proven + c.dead_on_probe))
        .collect();
    format!(
        "Dead units at this checkpoint: {total} ({})",
        per.join(", ")
    )
}

/// A small plot against the step with the current checkpoint marked; a click scrubs to
/// the nearest checkpoint.
fn step_plot(
    ui: &mut egui::Ui,
    (id, title, y_label): (&str, &str, &str),
    tl: &Timeline,
    current: f64,
    actions: &mut Vec<Action>,
    add: impl FnOnce(&mut egui_plot::PlotUi<'_>),
) {
    ui.label(RichText::new(title).small().strong());
    let r = Plot::new(id)
        .height(PLOT_HEIGHT)
        .allow_drag(false)
        .allow_zoom(false)
        .allow_scroll(false)
        .allow_boxed_zoom(false)
        .y_axis_label(y_label)
        .x_grid_spacer(step_grid(tl))
        .show(ui, |p| {
            add(p);
            p.vline(VLine::new("", current).color(Color32::GRAY).width(1.5));
            if p.response().clicked() {
                p.pointer_coordinate().map(|c| c.x)
            } else {
                None
            }
        });
    if let Some(x) = r.inner {
        let nearest = tl
            .steps
            .iter()
            .enumerate()
            .min_by(|a, b| (*a.1 as f64 - x).abs().total_cmp(&(*b.1 as f64 - x).abs()))
            .map(|(i, _)| i);
        if let Some(i) = nearest {
            actions.push(Action::ScrubTo(i));
        }
    }
}

/// Grid lines on the step axis at a round spacing (1, 2 or 5 times a power of ten) that
/// gives about four labelled lines over the run, whatever its length.
fn step_grid(tl: &Timeline) -> impl Fn(egui_plot::GridInput) -> Vec<egui_plot::GridMark> {
    let last = tl.steps.last().copied().unwrap_or(1).max(1) as f64;
    let rough = last / 4.0;
    let power = 10f64.powf(rough.log10().floor());
    let nice = [1.0, 2.0, 5.0, 10.0]
        .into_iter()
        .map(|m| m * power)
        .find(|s| *s >= rough)
        .unwrap_or(10.0 * power)
        .max(1.0);
    egui_plot::uniform_grid_spacer(move |_| [nice / 5.0, nice, nice * 10.0])
}

/// One line (with points) per screened layer of a per-checkpoint value.
fn per_layer_lines(
    p: &mut egui_plot::PlotUi<'_>,
    tl: &Timeline,
    value: impl Fn(&crate::analysis::timeline::CheckpointLayer) -> f64,
) {
    for (i, h) in tl.layers.iter().enumerate() {
        let pts: Vec<[f64; 2]> = tl
            .checkpoints
            .iter()
            .filter(|c| c.layer_index == h.layer_index)
            .map(|c| [c.step as f64, value(c)])
            .collect();
        let colour = color32(series_rgb(i));
        p.line(Line::new(h.layer.clone(), PlotPoints::from(pts.clone())).color(colour));
        p.points(
            Points::new(h.layer.clone(), PlotPoints::from(pts))
                .color(colour)
                .radius(2.5),
        );
    }
}

fn dead_plot_ui(ui: &mut egui::Ui, tl: &Timeline, current: f64, actions: &mut Vec<Action>) {
    step_plot(
        ui,
        ("run-dead", "Dead units per layer", "units"),
        tl,
        current,
        actions,
        |p| {
            per_layer_lines(p, tl, |c| (c.dead_proven + c.dead_on_probe) as f64);
        },
    );
}

fn sparsity_plot_ui(ui: &mut egui::Ui, tl: &Timeline, current: f64, actions: &mut Vec<Action>) {
    step_plot(
        ui,
        (
            "run-sparsity",
            "Mean Hoyer sparsity of the weights",
            "Hoyer",
        ),
        tl,
        current,
        actions,
        |p| per_layer_lines(p, tl, |c| c.mean_hoyer),
    );
}

fn accuracy_plot_ui(ui: &mut egui::Ui, tl: &Timeline, current: f64, actions: &mut Vec<Action>) {
    if !tl.labelled() {
        ui.label(RichText::new("Accuracy").small().strong());
        ui.weak("Open labelled reference data (a label column) to see the accuracy.");
        return;
    }
    step_plot(
        ui,
        ("run-accuracy", "Accuracy on the reference data", "%"),
        tl,
        current,
        actions,
        |p| {
            let pts: Vec<[f64; 2]> = tl
                .steps
                .iter()
                .zip(&tl.accuracy)
                .filter_map(|(s, a)| a.map(|a| [*s as f64, a * 100.0]))
                .collect();
            let colour = color32(series_rgb(2));
            p.line(Line::new("accuracy", PlotPoints::from(pts.clone())).color(colour));
            p.points(
                Points::new("accuracy", PlotPoints::from(pts))
                    .color(colour)
                    .radius(2.5),
            );
        },
    );
}

/// The selected unit's history: its activity on the probe, and its bound and weight norm.
fn unit_history_ui(
    left: &mut egui::Ui,
    right: &mut egui::Ui,
    tl: &Timeline,
    selection: Option<Selection>,
    current: f64,
) {
    let Some(sel) = selection else {
        left.weak("Select a unit to see its history.");
        return;
    };
    let Some(h) = tl.layer(sel.layer) else {
        left.label(RichText::new("Unit history").small().strong());
        left.weak("Only hidden layers with units have a history; select a unit of one.");
        return;
    };
    let name = format!("{} unit {}", h.layer, sel.unit);
    let points: Vec<_> = h.unit(sel.unit).collect();
    let series = |f: &dyn Fn(&crate::analysis::timeline::UnitPoint) -> f64| -> Vec<[f64; 2]> {
        tl.steps
            .iter()
            .zip(&points)
            .map(|(s, p)| [*s as f64, f(p)])
            .collect()
    };
    history_plot(
        left,
        (
            "run-unit-active",
            &format!("{name}: active on the reference data"),
            "% of samples",
        ),
        &[("active", series(&|p| p.active_frac * 100.0), 0)],
        (tl, current),
    );
    history_plot(
        right,
        (
            "run-unit-bound",
            &format!("{name}: upper bound of z (vermillion), |w| L2 (blue)"),
            "",
        ),
        &[
            ("upper bound of z", series(&|p| p.upper_bound), 3),
            ("|w| (L2)", series(&|p| p.l2), 5),
        ],
        (tl, current),
    );
}

/// A plot of a unit's values against the step: one line per `(name, points, colour)`.
fn history_plot(
    ui: &mut egui::Ui,
    (id, title, y_label): (&str, &str, &str),
    lines: &[(&str, Vec<[f64; 2]>, usize)],
    (tl, current): (&Timeline, f64),
) {
    ui.label(RichText::new(title).small().strong());
    Plot::new(id)
        .height(PLOT_HEIGHT)
        .allow_drag(false)
        .allow_zoom(false)
        .allow_scroll(false)
        .allow_boxed_zoom(false)
        .y_axis_label(y_label)
        .x_grid_spacer(step_grid(tl))
        .show(ui, |p| {
            for (label, pts, c) in lines {
                let colour = color32(series_rgb(*c));
                p.line(Line::new(*label, PlotPoints::from(pts.clone())).color(colour));
                p.points(
                    Points::new(*label, PlotPoints::from(pts.clone()))
                        .color(colour)
                        .radius(2.5),
                );
            }
            p.vline(VLine::new("", current).color(Color32::GRAY));
        });
}

/// When a unit died: the key from which it stays never active on the reference data, or `None`.
fn died_at(u: &UnitTimeline) -> Option<u64> {
    match (u.first_dead_on_probe, u.first_dead_proven) {
        (Some(a), Some(b)) => Some(a.min(b)),
        (a, b) => a.or(b),
    }
}

/// The colour of a unit that died at checkpoint `i` of `n`: early deaths dark red, late
/// ones pale yellow (so the colour reads as "how long it has been dead").
fn death_colour(i: usize, n: usize) -> Color32 {
    let t = if n > 1 {
        i as f32 / (n - 1) as f32
    } else {
        0.0
    };
    let early = [0x9E, 0x1B, 0x1B];
    let late = [0xF5, 0xE0, 0x8A];
    let mix = |a: u8, b: u8| (f32::from(a) + (f32::from(b) - f32::from(a)) * t).round() as u8;
    Color32::from_rgb(
        mix(early[0], late[0]),
        mix(early[1], late[1]),
        mix(early[2], late[2]),
    )
}

/// Every screened unit as a cell, per layer, sorted by when it died (the earliest first,
/// units alive at the end last, in grey); a click selects the unit.
fn deaths_ui(ui: &mut egui::Ui, state: &mut AppState, tl: &Timeline, key_name: &str) {
    ui.horizontal(|ui| {
        ui.label(RichText::new("Units by when they died").small().strong());
        ui.weak("(dark: died early, pale: died late, grey: alive at the end; ringed: proven dead at the end; click to select)");
    });
    let n = tl.steps.len();
    for h in &tl.layers {
        let mut units: Vec<&UnitTimeline> = tl
            .units
            .iter()
            .filter(|u| u.layer_index == h.layer_index)
            .collect();
        units.sort_by_key(|u| (died_at(u).unwrap_or(u64::MAX), u.unit));
        ui.horizontal_wrapped(|ui| {
            ui.spacing_mut().item_spacing = egui::vec2(2.0, 2.0);
            ui.label(RichText::new(format!("{:>4}", h.layer)).monospace());
            for u in units {
                let died = died_at(u);
                let pos = died.and_then(|k| tl.steps.iter().position(|s| *s == k));
                let fill = pos.map_or(Color32::from_gray(90), |i| death_colour(i, n));
                let (rect, r) =
                    ui.allocate_exact_size(egui::vec2(CELL, CELL), egui::Sense::click());
                let selected = state.selection
                    == Some(Selection {
                        layer: u.layer_index,
                        unit: u.unit,
                    });
                ui.painter().rect_filled(rect, 1.0, fill);
                if u.last_status == Status::DeadProven {
                    ui.painter().rect_stroke(
                        rect.shrink(1.5),
                        1.0,
                        egui::Stroke::new(1.5, Color32::BLACK),
                        egui::StrokeKind::Inside,
                    );
                }
                if selected {
                    ui.painter().rect_stroke(
                        rect.expand(1.0),
                        1.0,
                        egui::Stroke::new(1.5, ui.visuals().strong_text_color()),
                        egui::StrokeKind::Outside,
                    );
                }
                let when = match died {
                    Some(k) => format!("dead from {key_name} {k} on"),
                    None => "alive at the end".to_string(),
                };
                let label = format!("{} unit {}: {when}", u.layer, u.unit);
                r.widget_info(|| {
                    egui::WidgetInfo::labeled(egui::Role::Button, true, label.clone())
                });
                if r.on_hover_text(label.as_str()).clicked() {
                    state.select(
                        Selection {
                            layer: u.layer_index,
                            unit: u.unit,
                        },
                        false,
                    );
                }
            }
        });
    }
}
