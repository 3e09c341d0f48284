//! The status bar: what runs now (with a progress bar and a Cancel button), what is being
//! opened, and the last confirmation or error (errors in the theme's error colour).

use super::Action;
use super::state::{Notice, RunState};

/// What the status bar shows.
#[derive(Debug, Clone, Copy)]
pub struct StatusLine<'a> {
    /// The running job, what is being opened, and whether work was stopped.
    pub run: &'a RunState,
    /// Jobs queued or running.
    pub pending: usize,
    /// A model is open.
    pub model_open: bool,
    /// The last confirmation or error.
    pub notice: Option<&'a Notice>,
}

/// Draws the status bar.
pub fn ui(ui: &mut egui::Ui, line: &StatusLine<'_>, actions: &mut Vec<Action>) {
    let (task, pending, opening) = (&line.run.task, line.pending, line.run.opening.as_deref());
    ui.horizontal(|ui| {
        if let Some(o) = opening {
            ui.spinner();
            ui.label(format!("Opening {o}…"));
            ui.separator();
        }
        if pending > 0 {
            // The button comes first so it stays put while the task text changes.
            if ui
                .button("Cancel")
                .on_hover_text("Stop the running analysis (Esc)")
                .clicked()
            {
                actions.push(Action::Cancel);
            }
            ui.spinner();
            let title = if task.title.is_empty() {
                "Working"
            } else {
                task.title.as_str()
            };
            ui.add(
                egui::ProgressBar::new(task.fraction)
                    .desired_width(140.0)
                    .show_percentage(),
            );
            ui.label(title);
            if pending > 1 {
                ui.weak(format!("({} more queued)", pending - 1));
            }
            ui.separator();
        } else if line.run.stopped {
            ui.label("Analysis stopped before it finished.");
            if ui.button("Run again").clicked() {
                actions.push(Action::RunAgain);
            }
            ui.separator();
        } else if opening.is_none() && line.model_open {
            ui.weak("Ready");
            ui.separator();
        }
        if let Some(n) = line.notice {
            let colour = if n.error {
                ui.visuals().error_fg_color
            } else {
                ui.visuals().text_color()
            };
            ui.add(egui::Label::new(egui::RichText::new(&n.text).color(colour)).truncate())
                .on_hover_text(&n.text);
        }
    });
}
