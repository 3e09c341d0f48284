//! The model at a glance: what is open, the reference data in use, and one entry per layer with its
//! name, size, activation and a one-line health summary. Clicking a layer shows its units.

use super::Action;
use super::state::{AppState, OpenModel, Selection};
use crate::analysis::accuracy::Confusion;
use crate::analysis::screen::Status;
use crate::model::{InputBox, Layout, Network};
use crate::report::format;

/// Counts of the problem statuses in one layer.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
pub struct Health {
    /// Proven dead over the input box.
    pub dead_proven: usize,
    /// Dead on the probe (and not proven dead).
    pub dead_on_probe: usize,
    /// Rarely active.
    pub rare: usize,
    /// Saturated (sigmoid/tanh).
    pub saturated: usize,
    /// Non-finite values.
    pub non_finite: usize,
}

/// Counts statuses of `layer` in the screening result.
pub fn health(state: &AppState, layer: usize) -> Option<Health> {
    let s = state.results.screen.as_ref()?;
    let units = s.layers.get(layer)?;
    let mut h = Health::default();
    for u in units {
        match u.status {
            Status::DeadProven => h.dead_proven += 1,
            Status::DeadOnProbe => h.dead_on_probe += 1,
            Status::RarelyActive => h.rare += 1,
            Status::Saturated => h.saturated += 1,
            Status::NonFinite => h.non_finite += 1,
            Status::AlwaysActive | Status::Ok => {}
        }
    }
    Some(h)
}

/// Draws the layer list.
pub fn ui(ui: &mut egui::Ui, state: &mut AppState, actions: &mut Vec<Action>) {
    let Some(model) = state.model.clone() else {
        ui.heading("No model open");
        if ui.button("Open the demo model").clicked() {
            actions.push(Action::OpenDemo);
        }
        return;
    };
    let net = model.net.clone();
    egui::ScrollArea::vertical()
        .auto_shrink([false, false])
        .show(ui, |ui| {
            ui.add_space(4.0);
            ui.heading(net.name());
            if let Some(d) = net.description() {
                ui.label(egui::RichText::new(d).small()).on_hover_text(d);
            }
            ui.add_space(4.0);
            input_ui(ui, state, &model, actions);
            probe_ui(ui, state, actions);
            ui.separator();
            ui.strong("Layers");
            ui.add_space(2.0);
            layer_list_ui(ui, state, &net);
        });
}

/// The input's size, layout and box, where the box came from, and an editor to give
/// another box (the model file is opened again with it).
fn input_ui(ui: &mut egui::Ui, state: &mut AppState, model: &OpenModel, actions: &mut Vec<Action>) {
    let net = &model.net;
    let layout = match net.input().layout {
        Layout::Image {
            height,
            width,
            channels,
        } => format!(
            "{height} × {width} {}",
            if channels == 3 {
                "colour image"
            } else {
                "image"
            }
        ),
        Layout::Vector => "feature vector".to_string(),
    };
    ui.label(format!("Input: {} values, {layout}", net.input().size));
    ui.horizontal_wrapped(|ui| {
        ui.label(format!(
            "Input box: {} ({})",
            box_range(&net.input().low, &net.input().high),
            model.box_origin.describe()
        ))
        .on_hover_text("The box [low, high] used by the preferred-input search and the bounds.");
        if model.path.is_some()
            && state.run.box_edit.is_none()
            && ui.small_button("Change box…").clicked()
        {
            state.run.box_edit = Some((box_text(&net.input().low), box_text(&net.input().high)));
        }
    });
    if model.box_origin.uses_default() {
        ui.colored_label(
            ui.visuals().warn_fg_color,
            model.box_origin.default_notice(),
        );
    }
    box_editor_ui(ui, state, actions);
}

/// One end of the box as editable text: one number when all inputs share it.
fn box_text(values: &[f32]) -> String {
    match values.first() {
        Some(&v) if values.iter().all(|&x| x == v) => v.to_string(),
        _ => values
            .iter()
            .map(f32::to_string)
            .collect::<Vec<_>>()
            .join(","),
    }
}

/// The open box editor: low and high (one number, or a comma list), Apply and Cancel.
fn box_editor_ui(ui: &mut egui::Ui, state: &mut AppState, actions: &mut Vec<Action>) {
    let Some((low, high)) = state.run.box_edit.as_mut() else {
        return;
    };
    let mut close = false;
    let mut apply = None;
    ui.group(|ui| {
        ui.horizontal(|ui| {
            ui.label("Low");
            ui.add(egui::TextEdit::singleline(low).desired_width(120.0))
                .on_hover_text(
                    "One number for every input, or a comma list (one per input or per channel)",
                );
        });
        ui.horizontal(|ui| {
            ui.label("High");
            ui.add(egui::TextEdit::singleline(high).desired_width(120.0));
        });
        let parsed = crate::model::parse_box_values(low)
            .map_err(|e| format!("low: {e}"))
            .and_then(|l| {
                crate::model::parse_box_values(high)
                    .map(|h| (l, h))
                    .map_err(|e| format!("high: {e}"))
            });
        if let Err(e) = &parsed {
            ui.colored_label(ui.visuals().error_fg_color, e);
        }
        ui.horizontal(|ui| {
            if ui
                .add_enabled(parsed.is_ok(), egui::Button::new("Apply box"))
                .clicked()
                && let Ok((l, h)) = &parsed
            {
                apply = Some(InputBox {
                    low: Some(l.clone()),
                    high: Some(h.clone()),
                });
            }
            if ui.button("Cancel").clicked() {
                close = true;
            }
        });
    });
    if let Some(b) = apply {
        actions.push(Action::ReopenWithBox(b));
        close = true;
    }
    if close {
        state.run.box_edit = None;
    }
}

/// The reference data in use (the samples the model is run on), with buttons to open a file
/// or go back to uniform samples; without a file, the warning of [`uniform_warning_ui`].
fn probe_ui(ui: &mut egui::Ui, state: &AppState, actions: &mut Vec<Action>) {
    match &state.probe {
        Some(p) if p.path.is_some() => {
            let labelled = if p.labelled() { ", labelled" } else { "" };
            ui.label(format!(
                "Reference data: {} ({} samples{labelled})",
                short_origin(&p.data.origin),
                p.data.inputs.nrows()
            ))
            .on_hover_text(&p.data.origin);
            if let Some(o) = state.run.reference_origin {
                ui.label(egui::RichText::new(o.describe()).small().weak());
            }
            if let (Some(c), Some(m)) = (&p.confusion, &state.model) {
                accuracy_ui(ui, &m.net, c);
            }
        }
        Some(p) => {
            ui.label(format!(
                "Reference data: none, {} uniform samples of the input box",
                p.data.inputs.nrows()
            ))
            .on_hover_text(&p.data.origin);
        }
        None => {
            ui.label("Reference data: reading…");
        }
    }
    let warned = uniform_warning_ui(ui, state, actions);
    // Wrapped, so the two buttons never widen the side panel beyond its default.
    ui.horizontal_wrapped(|ui| {
        if !warned && ui.small_button("Open reference data…").clicked() {
            actions.push(Action::OpenProbeDialog);
        }
        if state.probe.as_ref().is_some_and(|p| p.path.is_some())
            && ui.small_button("Use uniform samples").clicked()
        {
            actions.push(Action::UniformProbe);
        }
    });
}

/// Accuracy on labelled reference data, overall and per class, and the confusion matrix
/// (rows: true class, columns: predicted class) in a collapsible section.
fn accuracy_ui(ui: &mut egui::Ui, net: &Network, c: &Confusion) {
    let Some(acc) = c.accuracy() else {
        return;
    };
    ui.label(format!(
        "Accuracy on the reference data: {} of {} samples",
        format::accuracy(acc),
        c.total()
    ))
    .on_hover_text(
        "Predicted class: the output unit with the largest value. Per class and confusion \
         matrix below.",
    );
    let names: Vec<String> = (0..c.classes())
        .map(|k| {
            net.layers()
                .last()
                .and_then(|l| l.labels.as_ref())
                .and_then(|l| l.get(k).cloned())
                .unwrap_or_else(|| k.to_string())
        })
        .collect();
    egui::CollapsingHeader::new("Per class and confusion matrix")
        .id_salt("confusion")
        .show(ui, |ui| {
            egui::Grid::new("confusion-grid")
                .striped(true)
                .spacing([8.0, 2.0])
                .show(ui, |ui| {
                    ui.small("true \\ predicted");
                    for n in &names {
                        ui.small(n);
                    }
                    ui.small("accuracy");
                    ui.end_row();
                    for (t, name) in names.iter().enumerate() {
                        ui.small(name);
                        for (p, predicted) in names.iter().enumerate() {
                            let n = c.count(t, p);
                            let text = egui::RichText::new(n.to_string()).small();
                            let text = if t == p { text.strong() } else { text };
                            ui.label(text).on_hover_text(format!(
                                "{n} samples of class {name} predicted as {predicted}"
                            ));
                        }
                        let per = c.class_accuracy(t).map_or("–".to_owned(), format::accuracy);
                        ui.label(egui::RichText::new(per).small())
                            .on_hover_text(format!("accuracy on class {name}"));
                        ui.end_row();
                    }
                });
            let missing: u64 = (0..c.classes()).map(|t| c.no_prediction(t)).sum();
            if missing > 0 {
                ui.small(format!(
                    "{missing} samples gave no finite output (counted as wrong)."
                ));
            }
            if c.unknown_label() > 0 {
                ui.small(format!(
                    "{} samples carry a label that is not a class of the model (left out).",
                    c.unknown_label()
                ));
            }
        });
}

/// The warning shown wherever screening results appear while no reference data is open:
/// the units were run on uniform samples of the input box, and may fire on noise that real
/// data never produces, with a button to open a file. Draws nothing (and returns false) when
/// a file is in use.
pub fn uniform_warning_ui(ui: &mut egui::Ui, state: &AppState, actions: &mut Vec<Action>) -> bool {
    let uniform = state.probe.as_ref().is_some_and(|p| p.path.is_none());
    if uniform {
        ui.colored_label(ui.visuals().warn_fg_color, UNIFORM_WARNING)
            .on_hover_text(
                "Open a file of real inputs (CSV or .npy, one sample per row) to screen on data \
                 the model meets. A file named like the model with -probe.csv, -probe.npy, \
                 -reference.csv or -reference.npy beside it opens by itself.",
            );
        if ui.small_button("Open reference data…").clicked() {
            actions.push(Action::OpenProbeDialog);
        }
    }
    uniform
}

/// The screening's statuses above the unit table and tiles rest on uniform samples: the
/// short form of [`UNIFORM_WARNING`] (the layer list holds the long one and the button).
pub fn uniform_note_ui(ui: &mut egui::Ui, state: &AppState) {
    if state.probe.as_ref().is_some_and(|p| p.path.is_none()) {
        ui.colored_label(ui.visuals().warn_fg_color, UNIFORM_NOTE)
            .on_hover_text(UNIFORM_WARNING);
    }
}

/// The text of [`uniform_note_ui`].
pub const UNIFORM_NOTE: &str =
    "Statuses from uniform samples of the input box, not reference data: units may fire on noise.";

/// The text of [`uniform_warning_ui`].
pub const UNIFORM_WARNING: &str = "No reference data: screened on uniform samples of the input box. Units may fire on noise that real data never produces.";

/// One selectable entry per layer, each with its health summary.
fn layer_list_ui(ui: &mut egui::Ui, state: &mut AppState, net: &Network) {
    let current = state.current_layer();
    let last = net.layers().len().saturating_sub(1);
    let fields = super::conv::fields_of(net);
    for (i, l) in net.layers().iter().enumerate() {
        let selected = i == current;
        let entry = super::conv::layer_entry(net, &fields, i);
        if let Some(e) = entry.as_ref().filter(|e| !e.selectable) {
            ui.label(&e.title);
            ui.indent(("layer-health", i), |ui| {
                for line in &e.lines {
                    ui.label(egui::RichText::new(line).small());
                }
            });
            ui.add_space(4.0);
            continue;
        }
        let title = entry.as_ref().map_or_else(
            || {
                format!(
                    "{}  ·  {} units  ·  {}",
                    l.name,
                    l.units(),
                    l.activation.name()
                )
            },
            |e| e.title.clone(),
        );
        let resp = ui.add(egui::Button::selectable(
            selected,
            egui::RichText::new(&title).strong(),
        ));
        if resp.clicked() && !selected {
            state.select(Selection { layer: i, unit: 0 }, false);
        }
        let mut summary = entry.map(|e| e.lines).unwrap_or_default();
        summary.extend(summary_line(state, i, i == last));
        ui.indent(("layer-health", i), |ui| {
            for line in summary {
                ui.label(egui::RichText::new(line).small());
            }
        });
        ui.add_space(4.0);
    }
}

/// The health summary of a layer, as short lines.
fn summary_line(state: &AppState, layer: usize, is_output: bool) -> Vec<String> {
    let mut lines = Vec::new();
    if is_output {
        lines.push("output layer (not screened)".to_string());
    } else {
        match health(state, layer) {
            Some(h) => {
                let mut parts = vec![format!(
                    "dead: {} proven, {} on reference data",
                    h.dead_proven, h.dead_on_probe
                )];
                parts.push(format!("rarely active: {}", h.rare));
                if h.saturated > 0 {
                    parts.push(format!("saturated: {}", h.saturated));
                }
                if h.non_finite > 0 {
                    parts.push(format!("non-finite: {}", h.non_finite));
                }
                lines.push(parts.join(" · "));
            }
            None => lines.push("screening…".to_string()),
        }
    }
    match state
        .results
        .stats
        .as_ref()
        .and_then(|s| s.layers.get(layer))
    {
        Some(s) => lines.push(format!(
            "mean Hoyer {:.2} · near-zero weights {:.1}%",
            s.mean_hoyer,
            100.0 * s.near_zero_frac
        )),
        None => lines.push("statistics…".to_string()),
    }
    lines
}

/// "[-1, 1]" when every input shares one range, else "per input, from … to …".
fn box_range(low: &[f32], high: &[f32]) -> String {
    let same = low.windows(2).all(|w| w[0] == w[1]) && high.windows(2).all(|w| w[0] == w[1]);
    match (low.first(), high.first()) {
        (Some(l), Some(h)) if same => format!("[{l}, {h}]"),
        _ => {
            let lo = low.iter().copied().fold(f32::INFINITY, f32::min);
            let hi = high.iter().copied().fold(f32::NEG_INFINITY, f32::max);
            format!("per input, within [{lo}, {hi}]")
        }
    }
}

/// The file name of a probe origin (full path on hover).
fn short_origin(origin: &str) -> String {
    std::path::Path::new(origin)
        .file_name()
        .and_then(|f| f.to_str())
        .filter(|_| origin.contains(std::path::MAIN_SEPARATOR))
        .map_or_else(|| origin.to_string(), str::to_string)
}
