//! Sparsity and pruning: the histogram of |w| of a layer on a log axis with the near-zero
//! tolerance marked, and, with a labelled probe, the accuracy after zeroing the smallest
//! weights (the core's prune sweep). A pruned model can be saved from here.

use super::state::{AppState, Selection, StatsResult};
use super::{Action, ExportKind};
use crate::model::Network;

/// The sparsity panel.
#[derive(Default)]
pub struct SparsityPanel {}

impl SparsityPanel {
    /// Draws the panel for the selected layer.
    pub fn ui(&mut self, ui: &mut egui::Ui, state: &mut AppState, actions: &mut Vec<Action>) {
        let Some(net) = state.net().cloned() else {
            return;
        };
        let layer = state.current_layer();
        egui::ScrollArea::vertical()
            .auto_shrink([false, false])
            .show(ui, |ui| {
                ui.horizontal(|ui| {
                    ui.label("Layer:");
                    for (i, l) in net.layers().iter().enumerate() {
                        if ui.selectable_label(i == layer, &l.name).clicked() {
                            state.select(Selection { layer: i, unit: 0 }, false);
                        }
                    }
                });
                ui.add_space(4.0);
                ui.heading(format!(
                    "Weight magnitudes of layer {}",
                    net.layers()[layer].name
                ));
                match state.results.stats.as_ref() {
                    None => {
                        ui.weak("Computing statistics…");
                    }
                    Some(stats) => magnitude_ui(ui, stats, &net, layer),
                }
                ui.add_space(10.0);
                ui.heading("Accuracy after magnitude pruning");
                prune_curve_ui(ui, state, actions);
                ui.add_space(10.0);
                ui.horizontal(|ui| {
                    ui.add(
                        egui::Slider::new(&mut state.prune_fraction, 0.0..=0.99)
                            .text("fraction of each layer's weights to zero")
                            .fixed_decimals(2),
                    );
                    if ui.button("Save pruned model…").clicked() {
                        actions.push(Action::ExportDialog(ExportKind::PrunedModel));
                    }
                });
            });
    }
}

/// The |w| histogram of `layer` on a log axis, with the near-zero tolerance marked.
fn magnitude_ui(ui: &mut egui::Ui, stats: &StatsResult, net: &Network, layer: usize) {
    let h = &stats.magnitude[layer];
    let s = &stats.layers[layer];
    let total = net.layers()[layer].weights.len();
    ui.label(format!(
        "{total} weights · {:.1}% near zero (|w| ≤ {:.3e}, 1% of the largest |w| {:.3e}) · {} exactly zero",
        100.0 * s.near_zero_frac,
        s.zero_tol,
        s.max_abs,
        h.zeros
    ));
    let bars: Vec<egui_plot::Bar> = h
        .counts
        .iter()
        .enumerate()
        .map(|(i, &c)| {
            egui_plot::Bar::new(h.start + (i as f64 + 0.5) * h.width, c as f64)
                .width(h.width * 0.95)
        })
        .collect();
    let tol = s.zero_tol;
    let bar_colour = ui.visuals().selection.bg_fill;
    let tol_colour = ui.visuals().warn_fg_color;
    egui_plot::Plot::new(("magnitude-histogram", layer))
        .height(240.0)
        .allow_drag(false)
        .allow_zoom(false)
        .allow_scroll(false)
        .x_axis_label("|w| (log scale)")
        .y_axis_label("weights")
        .x_axis_formatter(|m, _| format!("{:.0e}", 10f64.powf(m.value)))
        .legend(egui_plot::Legend::default())
        .show(ui, |p| {
            p.bar_chart(egui_plot::BarChart::new("weights per bin", bars).color(bar_colour));
            if tol > 0.0 {
                p.vline(
                    egui_plot::VLine::new("near-zero tolerance", tol.log10())
                        .color(tol_colour)
                        .width(2.0),
                );
            }
        });
}

/// The accuracy-after-pruning curve and its table, or what it still needs.
fn prune_curve_ui(ui: &mut egui::Ui, state: &AppState, actions: &mut Vec<Action>) {
    let labelled = state.probe.as_ref().is_some_and(|p| p.labelled());
    if !labelled {
        ui.label("The pruning curve needs probe data with a label column.");
        if ui.button("Open probe data…").clicked() {
            actions.push(Action::OpenProbeDialog);
        }
        return;
    }
    let Some(points) = state.results.sweep.as_ref() else {
        ui.weak("Running the pruning sweep…");
        return;
    };
    let pts: Vec<[f64; 2]> = points
        .iter()
        .map(|p| [100.0 * p.fraction, 100.0 * p.accuracy])
        .collect();
    egui_plot::Plot::new("prune-curve")
        .height(220.0)
        .allow_drag(false)
        .allow_zoom(false)
        .allow_scroll(false)
        .include_y(0.0)
        .include_y(100.0)
        .x_axis_label("weights zeroed in every layer (%)")
        .y_axis_label("accuracy on the probe (%)")
        .show(ui, |p| {
            p.line(egui_plot::Line::new("accuracy", pts.clone()).width(2.0));
            p.points(egui_plot::Points::new("measured", pts).radius(3.5));
        });
    egui::Grid::new("sweep-table").striped(true).show(ui, |ui| {
        ui.strong("zeroed");
        for p in points.iter() {
            ui.monospace(format!("{:.0}%", 100.0 * p.fraction));
        }
        ui.end_row();
        ui.strong("accuracy");
        for p in points.iter() {
            ui.monospace(format!("{:.1}%", 100.0 * p.accuracy));
        }
        ui.end_row();
    });
}
