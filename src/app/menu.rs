//! The menu bar (File, View, Help, and the open model's name) and the keys-and-marks help
//! window. Both only queue [`Action`]s or change view preferences.

use super::state::{AppState, MainView, UnitView};
use super::{Action, ExportKind, colour, export, units};
use egui::{Button, Key, KeyboardShortcut, Modifiers};
use std::path::PathBuf;
use std::time::Duration;

/// The key of the Compact model shortcut (with Ctrl, or Cmd on macOS).
pub const COMPACT_KEY: Key = Key::K;

/// Draws the menu bar.
pub fn menu_ui(ui: &mut egui::Ui, state: &mut AppState, actions: &mut Vec<Action>) {
    egui::MenuBar::new().ui(ui, |ui| {
        ui.menu_button("File", |ui| file_menu_ui(ui, state, actions));
        ui.menu_button("View", |ui| {
            ui.selectable_value(&mut state.view, MainView::Units, "Units");
            ui.selectable_value(&mut state.view, MainView::Sparsity, "Sparsity and pruning");
            ui.separator();
            ui.radio_value(
                &mut state.prefs.unit_view,
                UnitView::Table,
                "Units as a table",
            );
            ui.radio_value(
                &mut state.prefs.unit_view,
                UnitView::Tiles,
                "Units as tiles",
            );
            ui.separator();
            for mode in colour::ScaleMode::ALL {
                ui.radio_value(&mut state.prefs.scale, mode, mode.label());
            }
        });
        ui.menu_button("Help", |ui| {
            if ui
                .add(Button::new("Keys and marks").shortcut_text("F1"))
                .clicked()
            {
                actions.push(Action::Help);
            }
        });
        ui.separator();
        if let Some(m) = &state.model {
            ui.label(egui::RichText::new(m.net.name()).strong());
            ui.weak(&m.origin);
        }
    });
}

/// The text of the Ctrl/Cmd shortcut with `key`, as this platform writes it.
fn shortcut(ui: &egui::Ui, key: Key) -> String {
    ui.ctx()
        .format_shortcut(&KeyboardShortcut::new(Modifiers::COMMAND, key))
}

/// The File menu: models, probe data, exports, Compact model and Quit.
fn file_menu_ui(ui: &mut egui::Ui, state: &AppState, actions: &mut Vec<Action>) {
    let open = Button::new("Open model…").shortcut_text(shortcut(ui, Key::O));
    if ui.add(open).clicked() {
        actions.push(Action::OpenModelDialog);
    }
    recent_menu(
        ui,
        "Recent models",
        &state.prefs.recent_models,
        actions,
        Action::OpenModel,
    );
    if ui.button("Open the demo model").clicked() {
        actions.push(Action::OpenDemo);
    }
    if ui.button("Open training run…").clicked() {
        actions.push(Action::OpenRunDialog);
    }
    ui.separator();
    let probe = Button::new("Open reference data…").shortcut_text(shortcut(ui, Key::P));
    if ui.add(probe).clicked() {
        actions.push(Action::OpenProbeDialog);
    }
    recent_menu(
        ui,
        "Recent reference data",
        &state.prefs.recent_probes,
        actions,
        Action::OpenProbe,
    );
    if ui
        .button("Use uniform samples (no reference data)")
        .clicked()
    {
        actions.push(Action::UniformProbe);
    }
    ui.separator();
    ui.menu_button("Export", |ui| {
        for kind in ExportKind::ALL {
            let b = Button::new(kind.label());
            let b = if kind == ExportKind::StatsCsv {
                b.shortcut_text(shortcut(ui, Key::E))
            } else {
                b
            };
            if ui.add_enabled(export::available(kind, state), b).clicked() {
                actions.push(Action::ExportDialog(kind));
            }
        }
    });
    let compact = Button::new("Compact model…").shortcut_text(shortcut(ui, COMPACT_KEY));
    if ui.add_enabled(state.model.is_some(), compact).clicked() {
        actions.push(Action::CompactWindow);
    }
    ui.separator();
    let quit = Button::new("Quit").shortcut_text(shortcut(ui, Key::Q));
    if ui.add(quit).clicked() {
        actions.push(Action::Quit);
    }
}

/// A submenu listing remembered files; clicking one queues `open(path)`.
fn recent_menu(
    ui: &mut egui::Ui,
    title: &str,
    files: &[PathBuf],
    actions: &mut Vec<Action>,
    open: fn(PathBuf) -> Action,
) {
    ui.menu_button(title, |ui| {
        if files.is_empty() {
            ui.weak("none yet");
        }
        for p in files {
            if ui.button(p.display().to_string()).clicked() {
                actions.push(open(p.clone()));
            }
        }
    });
}

/// The keys-and-marks window; `open` is cleared when the user closes it.
pub fn help_ui(ctx: &egui::Context, open: &mut bool, longest_busy_frame: Duration) {
    egui::Window::new("Keys and marks")
        .open(open)
        .collapsible(false)
        .resizable(false)
        .show(ctx, |ui| {
            egui::Grid::new("keys")
                .num_columns(2)
                .striped(true)
                .show(ui, |ui| {
                    for (k, what) in [
                        ("Arrow keys", "move the selection in the table or the tiles"),
                        ("Home / End", "first / last unit of the list"),
                        ("G", "go to a unit: type its number, then Enter"),
                        ("Page Up / Page Down", "layer above / below"),
                        ("Backspace", "back to the unit you walked down from"),
                        (
                            "W / P / S",
                            "detail map: weights / preferred input / sensitivity",
                        ),
                        ("Tab", "move the keyboard to the next control"),
                        ("Esc", "stop the running analysis"),
                        ("Ctrl+O / Ctrl+P", "open a model / reference data"),
                        ("Ctrl+E", "export sparsity statistics (CSV)"),
                        ("Ctrl+K", "compact the model (remove provably dead units)"),
                    ] {
                        ui.strong(k);
                        ui.label(what);
                        ui.end_row();
                    }
                });
            ui.separator();
            ui.strong("Status marks (table and tiles)");
            units::marks_legend_ui(ui);
            ui.separator();
            ui.weak(format!(
                "Longest frame while analysis ran: {:.1} ms",
                longest_busy_frame.as_secs_f64() * 1000.0
            ));
        });
}
