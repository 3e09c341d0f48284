//! The Compact model window: which units compaction would remove from the open model and
//! why, the check of the smaller model's outputs and accuracy on the probe in use, then
//! "Save compacted model…" and "Open the compacted model". The work is the core's
//! [`crate::analysis::compact::compact_checked`], the same call `receptor compact` makes,
//! run on the worker; the file is written atomically by the model writer.

use super::state::{AppState, CompactChoice, Slot};
use super::{Action, ReceptorApp};
use crate::analysis::compact::{
    CheckData, CheckedCompaction, Comparison, DEFAULT_CHECK_TOLERANCE, DEFAULT_FOLD_TOLERANCE,
    LayerSummary, Reason,
};
use crate::report::table::{f32_text, f64_text};
use egui::RichText;
use std::path::PathBuf;

/// At most this many unit numbers are listed per layer and reason; the rest are counted.
const LISTED_UNITS: usize = 40;

/// A file name to suggest for the compacted model.
pub fn default_file_name(state: &AppState) -> String {
    let base = state
        .net()
        .map_or_else(|| "model".to_string(), |n| n.name().to_string());
    format!("{base}-compacted.json")
}

/// The choice the worker computes: removing units never active on the probe needs a probe
/// file (as `receptor compact --also dead-on-probe` needs `--probe`).
pub fn effective_choice(state: &AppState) -> CompactChoice {
    let file_probe = state.probe.as_ref().is_some_and(|p| p.path.is_some());
    CompactChoice {
        dead_on_probe: state.compact.choice.dead_on_probe && file_probe,
        ..state.compact.choice
    }
}

impl ReceptorApp {
    /// Writes the compacted model for the window's current choice to `path` on a helper
    /// thread (atomically, through the model writer); the window then offers to open it.
    /// This is what the save dialog calls, and what tests call directly. Refused (with a
    /// message in the status bar) while the check runs, when the check failed, or when
    /// `path` is the open model's file or one of its side files.
    pub fn save_compacted_to(&mut self, path: PathBuf) {
        let choice = effective_choice(&self.state);
        let Some(checked) = self.state.results.compact_of(choice).and_then(Slot::ready) else {
            self.state
                .fail("the compaction is still being checked; save it once the check is done");
            return;
        };
        if let Some((_, cmp)) = checked.refusal(DEFAULT_CHECK_TOLERANCE) {
            self.state.fail(format!(
                "not saved: the compacted model's outputs differ from the original's by {} (more than {})",
                f64_text(cmp.max_abs_diff),
                f64_text(DEFAULT_CHECK_TOLERANCE)
            ));
            return;
        }
        if let Some(src) = self.state.model.as_ref().and_then(|m| m.path.as_ref())
            && let Err(e) = crate::model::refuse_overwriting_model(src, &path, "the chosen file")
        {
            self.state.fail(e.to_string());
            return;
        }
        self.state.compact.saving = true;
        self.state.compact.saved = None;
        self.worker.spawn_helper("receptor-compact-save", move || {
            super::worker::Reply::CompactSaved {
                result: crate::model::write_json(&checked.compaction.network, &path).map(|()| path),
            }
        });
    }
}

/// Draws the Compact model window while `state.compact.open`.
pub fn window_ui(ctx: &egui::Context, state: &mut AppState, actions: &mut Vec<Action>) {
    let mut open = state.compact.open;
    egui::Window::new("Compact model")
        .open(&mut open)
        .pivot(egui::Align2::CENTER_CENTER)
        .default_pos(ctx.content_rect().center())
        .collapsible(false)
        .resizable(true)
        .default_width(640.0)
        .show(ctx, |ui| body_ui(ui, state, actions));
    state.compact.open = open && state.compact.open;
}

fn body_ui(ui: &mut egui::Ui, state: &mut AppState, actions: &mut Vec<Action>) {
    if state.model.is_none() {
        ui.label("Open a model first.");
        return;
    }
    ui.label(
        "Removes the units that cannot change any output for any input in the model's input \
         box, checks that the smaller model gives the same outputs on the probe, and then \
         writes it. Nothing is written before you save.",
    );
    ui.add_space(4.0);
    let file_probe = state.probe.as_ref().is_some_and(|p| p.path.is_some());
    ui.checkbox(
        &mut state.compact.choice.fold_constant,
        "Fold units that are constant over the input box into the next layer's bias",
    )
    .on_hover_text(format!(
        "A unit whose activation over the whole box varies by at most {} is replaced by \
         its midpoint, added to the next layer's bias (exact up to that tolerance).",
        f64_text(DEFAULT_FOLD_TOLERANCE)
    ));
    let lossy = ui
        .add_enabled(
            file_probe,
            egui::Checkbox::new(
                &mut state.compact.choice.dead_on_probe,
                "Also remove units never active on the reference data (lossy outside it)",
            ),
        )
        .on_disabled_hover_text(
            "Open reference data first: the units removed are those never active on it.",
        );
    if file_probe {
        lossy.on_hover_text(
            "Relu units that were never active on any probe sample. Outputs stay the same on \
             the probe, but may change elsewhere in the input box.",
        );
    }
    ui.separator();
    let choice = effective_choice(state);
    match state.results.compact_of(choice) {
        Some(Slot::Ready(c)) => {
            let c = c.clone();
            result_ui(ui, state, &c, actions);
        }
        Some(Slot::Failed(msg)) => {
            ui.colored_label(ui.visuals().error_fg_color, msg);
        }
        _ => {
            ui.horizontal(|ui| {
                ui.spinner();
                ui.label("Finding the removable units and checking the outputs…");
            });
        }
    }
}

/// The removals, the output check and the save buttons for a finished compaction.
fn result_ui(
    ui: &mut egui::Ui,
    state: &mut AppState,
    c: &CheckedCompaction,
    actions: &mut Vec<Action>,
) {
    let Some(net) = state.net().cloned() else {
        return;
    };
    let summaries = c.compaction.layer_summaries(&net);
    let units: usize = summaries
        .iter()
        .filter(|s| s.layer.is_some())
        .map(LayerSummary::removed_count)
        .sum();
    let features = summaries
        .iter()
        .find(|s| s.layer.is_none())
        .map_or(0, LayerSummary::removed_count);
    let mut headline = format!("{units} units would be removed");
    if features > 0 {
        headline.push_str(&format!(" and {features} input features"));
    }
    headline.push_str(&format!(
        " ({} -> {} parameters)",
        net.parameter_count(),
        c.compaction.network.parameter_count()
    ));
    ui.label(RichText::new(headline).strong());
    egui::ScrollArea::vertical()
        .max_height(260.0)
        .auto_shrink([false, true])
        .show(ui, |ui| removals_grid_ui(ui, &summaries));
    ui.weak(
        "dead_proven: a relu unit whose sound upper bound over the whole input box is ≤ 0 \
         (its output is always 0) · zero_outgoing: every outgoing weight is 0 · constant: \
         constant over the box, folded into the next layer's bias · dead_on_probe: never \
         active on the probe (lossy elsewhere)",
    );
    if c.compaction.zero_inputs_kept > 0 {
        ui.weak(format!(
            "{} input features have only zero outgoing weights but are kept (image layout).",
            c.compaction.zero_inputs_kept
        ));
    }
    ui.separator();
    check_ui(ui, state, c);
    ui.separator();
    let refusal = c.refusal(DEFAULT_CHECK_TOLERANCE);
    if let Some((which, cmp)) = refusal {
        let data = match which {
            CheckData::Reference => "the reference data",
            CheckData::Box => "the uniform samples of the input box",
        };
        ui.colored_label(
            ui.visuals().error_fg_color,
            format!(
                "Not saved: the outputs differ by {} on {data} (more than {}), at row {}.",
                f64_text(cmp.max_abs_diff),
                f64_text(DEFAULT_CHECK_TOLERANCE),
                cmp.worst_row
            ),
        );
    }
    let nothing = units + features == 0;
    ui.horizontal(|ui| {
        let can_save = refusal.is_none() && !nothing && !state.compact.saving;
        let save = ui
            .add_enabled(can_save, egui::Button::new("Save compacted model…"))
            .on_disabled_hover_text(if nothing {
                "Nothing to remove: the model is already compact."
            } else {
                "The check must pass (and no save be running) before saving."
            });
        if save.clicked() {
            actions.push(Action::SaveCompactedDialog);
        }
        if state.compact.saving {
            ui.spinner();
        }
        if ui.button("Close").clicked() {
            state.compact.open = false;
        }
    });
    if nothing {
        ui.weak("Nothing to remove: every unit can change some output somewhere in the box.");
    }
    if let Some(p) = state.compact.saved.clone() {
        ui.horizontal(|ui| {
            ui.label(format!("Saved {}", p.display()));
            if ui.button("Open the compacted model").clicked() {
                state.compact.open = false;
                state.compact.saved = None;
                actions.push(Action::OpenModel(p));
            }
        });
    }
}

/// One row per layer: sizes before and after, and the units removed with their reasons.
fn removals_grid_ui(ui: &mut egui::Ui, summaries: &[LayerSummary]) {
    let last = summaries.len().saturating_sub(1);
    egui::Grid::new("compact-removals")
        .striped(true)
        .num_columns(4)
        .show(ui, |ui| {
            ui.strong("layer");
            ui.strong("size");
            ui.strong("removed");
            ui.strong("which, and why");
            ui.end_row();
            for (i, s) in summaries.iter().enumerate() {
                match s.activation {
                    Some(a) => ui.label(format!("{} ({})", s.name, a.name())),
                    None => ui.label("input features"),
                };
                ui.monospace(format!("{} -> {}", s.before, s.after));
                ui.monospace(s.removed_count().to_string());
                let why = if i == last && s.layer.is_some() {
                    "output layer: never pruned".to_string()
                } else if s.removed.is_empty() {
                    "none".to_string()
                } else {
                    why_text(s)
                };
                ui.add(egui::Label::new(why).wrap());
                ui.end_row();
            }
        });
}

/// `dead_proven: 0, 4, 7 · constant: 3 (= 0.99)` for one layer, numbers as in the open
/// model, at most [`LISTED_UNITS`] per reason.
fn why_text(s: &LayerSummary) -> String {
    s.counts
        .iter()
        .map(|(name, count)| {
            let mut listed: Vec<String> = s
                .removed
                .iter()
                .filter(|(_, r)| r.as_str() == *name)
                .take(LISTED_UNITS)
                .map(|(u, r)| match r {
                    Reason::Constant { value } => format!("{u} (= {})", f32_text(*value as f32)),
                    _ => u.to_string(),
                })
                .collect();
            if *count > LISTED_UNITS {
                listed.push(format!("… ({} more)", count - LISTED_UNITS));
            }
            format!("{name}: {}", listed.join(", "))
        })
        .collect::<Vec<_>>()
        .join(" · ")
}

/// The output check and the accuracies, as `receptor compact` reports them.
fn check_ui(ui: &mut egui::Ui, state: &AppState, c: &CheckedCompaction) {
    ui.strong("Check of the smaller model's outputs");
    let probe_name = state.probe.as_ref().map_or_else(
        || "the reference data".to_string(),
        |p| p.data.origin.clone(),
    );
    check_line_ui(ui, &probe_name, &c.reference, false);
    if let Some(b) = &c.on_box {
        let name = format!(
            "the input box (uniform, seed {})",
            crate::probe::DEFAULT_UNIFORM_SEED
        );
        check_line_ui(ui, &name, b, c.request.dead_on_probe);
    }
    match c.reference.accuracy() {
        Some((before, after)) => {
            ui.label(format!(
                "Accuracy on {probe_name}: {:.1}% before, {:.1}% after",
                100.0 * before,
                100.0 * after
            ));
        }
        None => {
            ui.weak("Accuracy needs reference data with a label column.");
        }
    }
}

/// One line of the check; `lossy` marks a difference that removing never-active units is
/// expected to cause off the probe.
fn check_line_ui(ui: &mut egui::Ui, data: &str, cmp: &Comparison, lossy: bool) {
    let ok = cmp.within(DEFAULT_CHECK_TOLERANCE);
    let verdict = if ok { "equal within" } else { "more than" };
    let mut text = format!(
        "On {} samples of {data}: largest output difference {} ({verdict} {}); {} predictions changed",
        cmp.samples,
        f64_text(cmp.max_abs_diff),
        f64_text(DEFAULT_CHECK_TOLERANCE),
        cmp.changed_predictions
    );
    if !ok && lossy {
        text.push_str(" (expected: units never active on the reference data were removed)");
    }
    if ok || lossy {
        ui.label(text);
    } else {
        ui.colored_label(ui.visuals().error_fg_color, text);
    }
}
