//! Sparsity and pruning: the histogram of |w| of a layer on a log axis with the near-zero
//! tolerance marked, and, with a labelled probe, the accuracy after pruning: zeroing the
//! smallest weights (the core's prune sweep) and removing whole units ranked by a criterion
//! (the core's unit sweeps), for the whole model and for one layer at a time. A pruned model
//! can be saved from here, and the Compact model window opened.

use super::state::{AppState, Criterion, Selection, Slot, StatsResult, UnitCurves};
use super::{Action, ExportKind};
use crate::model::Network;
use crate::report::colour::{SERIES, series_rgb};
use crate::report::format;
use std::sync::Arc;

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
                ui.heading("Accuracy after pruning");
                pruning_ui(ui, state, &net, actions);
                ui.add_space(10.0);
                ui.heading("Make the model smaller");
                ui.horizontal(|ui| {
                    if ui.button("Compact model…").clicked() {
                        actions.push(Action::CompactWindow);
                    }
                    ui.label(
                        "removes the units that cannot change any output in the input box \
                         (exact), after a check on the reference data",
                    );
                });
                ui.horizontal(|ui| {
                    prune_slider_ui(ui, state);
                    if ui.button("Save pruned model…").clicked() {
                        actions.push(Action::ExportDialog(ExportKind::PrunedModel));
                    }
                    let sweep = state.results.sweep.as_ref().cloned();
                    match sweep
                        .as_deref()
                        .and_then(|s| accuracy_at(s, state.prune_fraction))
                    {
                        Some(a) => {
                            ui.label(a.describe(state.prune_fraction)).on_hover_text(
                                "Accuracy on the reference data with the smallest weights \
                                     zeroed: measured by the pruning sweep at its fractions, \
                                     linear in between",
                            );
                        }
                        None => {
                            ui.weak("accuracy: needs labelled reference data and the sweep");
                        }
                    }
                });
            });
    }
}

/// The fraction of weights to zero, in percent like the plots' axes and the table.
fn prune_slider_ui(ui: &mut egui::Ui, state: &mut AppState) {
    let mut percent = 100.0 * state.prune_fraction;
    let changed = ui
        .add(
            egui::Slider::new(&mut percent, 0.0..=99.0)
                .text("of each layer's weights zeroed")
                .suffix("%")
                .step_by(1.0)
                .fixed_decimals(0),
        )
        .changed();
    if changed {
        state.prune_fraction = (percent / 100.0).clamp(0.0, 0.99);
    }
}

/// Accuracy of the magnitude-pruned model at one fraction, from the sweep.
#[derive(Debug, Clone, Copy, PartialEq)]
struct AccuracyAt {
    /// Accuracy, 0 to 1.
    accuracy: f64,
    /// The sweep's fractions on either side when interpolated; `None` when measured there.
    between: Option<(f64, f64)>,
}

impl AccuracyAt {
    /// "accuracy at 50%: 93.1%" or "… ≈ 93.1% (between the sweep's 40% and 60%)".
    fn describe(self, fraction: f64) -> String {
        let at = format::percent(fraction, 3);
        let acc = format::accuracy(self.accuracy);
        match self.between {
            None => format!("accuracy at {at}: {acc}"),
            Some((a, b)) => format!(
                "accuracy at {at} ≈ {acc} (between the sweep's {} and {})",
                format::percent(a, 3),
                format::percent(b, 3)
            ),
        }
    }
}

/// The accuracy at `fraction` read off the sweep `points` (in increasing fraction): the
/// measured value at one of its fractions, else linear between the two around it; `None`
/// outside the sweep's range or for an empty sweep.
fn accuracy_at(points: &[crate::analysis::prune::SweepPoint], fraction: f64) -> Option<AccuracyAt> {
    const SAME: f64 = 1e-9;
    if let Some(p) = points.iter().find(|p| (p.fraction - fraction).abs() < SAME) {
        return Some(AccuracyAt {
            accuracy: p.accuracy,
            between: None,
        });
    }
    points.windows(2).find_map(|w| {
        let (a, b) = (&w[0], &w[1]);
        (a.fraction < fraction && fraction < b.fraction).then(|| {
            let t = (fraction - a.fraction) / (b.fraction - a.fraction);
            AccuracyAt {
                accuracy: a.accuracy + t * (b.accuracy - a.accuracy),
                between: Some((a.fraction, b.fraction)),
            }
        })
    })
}

/// The |w| histogram of `layer` on a log axis, with the near-zero tolerance marked.
fn magnitude_ui(ui: &mut egui::Ui, stats: &StatsResult, net: &Network, layer: usize) {
    let h = &stats.magnitude[layer];
    let s = &stats.layers[layer];
    let total = net.layers()[layer].weights.len();
    ui.label(format!(
        "{total} weights · {} near zero (|w| ≤ {}, 1% of the largest |w| {}) · {} exactly zero",
        format::percent(s.near_zero_frac, 3),
        format::sig(s.zero_tol, 3),
        format::sig(s.max_abs, 3),
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
        .x_axis_formatter(|m, _| format::sig(10f64.powf(m.value), 1))
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
    // The legend below the plot, so it never hides a bar.
    ui.horizontal_wrapped(|ui| {
        swatch_ui(ui, bar_colour, false);
        ui.label("weights per bin");
        if tol > 0.0 {
            ui.add_space(8.0);
            swatch_ui(ui, tol_colour, true);
            ui.label(format!("near-zero tolerance ({})", format::sig(tol, 3)));
        }
    });
}

/// A legend mark: a filled box, or a short line for a line series.
fn swatch_ui(ui: &mut egui::Ui, colour: egui::Color32, line: bool) {
    let (rect, _) = ui.allocate_exact_size(egui::vec2(22.0, 12.0), egui::Sense::hover());
    if line {
        ui.painter().line_segment(
            [rect.left_center(), rect.right_center()],
            egui::Stroke::new(3.0, colour),
        );
    } else {
        ui.painter().rect_filled(rect.shrink(1.0), 0.0, colour);
    }
}

/// One curve of a pruning plot.
struct Series {
    /// The name in the legend and the hover label.
    name: String,
    /// Index into the series palette ([`series_rgb`]); past the palette's length the line
    /// is dashed so repeated colours stay apart.
    colour: usize,
    /// `[removed %, accuracy %]` per point.
    points: Vec<[f64; 2]>,
}

impl Series {
    fn colour32(&self) -> egui::Color32 {
        super::colour::color32(series_rgb(self.colour))
    }

    fn dashed(&self) -> bool {
        self.colour >= SERIES.len()
    }
}

/// The pruning curves, or why they are missing: the whole-model plot (magnitude and
/// unit-removal curves) beside the per-layer sensitivity plot, and a table of the numbers.
fn pruning_ui(ui: &mut egui::Ui, state: &mut AppState, net: &Network, actions: &mut Vec<Action>) {
    let probe = state.probe.as_ref();
    let labelled = probe.is_some_and(|p| p.labelled());
    if !labelled {
        let what = match probe {
            Some(p) if p.path.is_none() => {
                "No reference data is open: uniform samples of the input box have no labels."
                    .to_string()
            }
            Some(p) => format!(
                "The reference data ({}) has no label column.",
                p.data.origin
            ),
            None => "No reference data is loaded yet.".to_string(),
        };
        ui.label(format!(
            "The pruning curves are missing: they measure accuracy, which needs reference \
             data with a label column. {what}"
        ));
        if ui.button("Open reference data…").clicked() {
            actions.push(Action::OpenProbeDialog);
        }
        return;
    }
    ui.horizontal(|ui| {
        ui.label("Rank units by:");
        ui.radio_value(
            &mut state.unit_criterion,
            Criterion::L1,
            "L1 norm of incoming weights (Li et al. 2017)",
        );
        ui.radio_value(
            &mut state.unit_criterion,
            Criterion::Activation,
            "mean |activation| on the reference data",
        );
    });
    let criterion = state.unit_criterion;
    let magnitude = state.results.sweep.clone();
    let units = state
        .results
        .unit_curves_of(criterion)
        .cloned()
        .unwrap_or_default();
    let hidden = net.layers().len().saturating_sub(1);
    let mut whole = Vec::new();
    if let Some(points) = magnitude.as_ref() {
        whole.push(Series {
            name: "weights zeroed, smallest |w| first".into(),
            colour: 0,
            points: points
                .iter()
                .map(|p| [100.0 * p.fraction, 100.0 * p.accuracy])
                .collect(),
        });
    }
    let mut per_layer = Vec::new();
    if let Some(c) = units.as_ref() {
        whole.push(Series {
            name: format!(
                "units removed, smallest {} first",
                criterion_words(criterion)
            ),
            colour: 1,
            points: c
                .all_layers
                .iter()
                .map(|p| [100.0 * p.fraction, 100.0 * p.accuracy])
                .collect(),
        });
        for l in 0..hidden {
            per_layer.push(Series {
                name: format!(
                    "{} ({} units)",
                    net.layers()[l].name,
                    net.layers()[l].units()
                ),
                colour: 2 + l,
                points: c
                    .per_layer
                    .iter()
                    .filter(|p| p.layer == Some(l))
                    .map(|p| [100.0 * p.fraction, 100.0 * p.accuracy])
                    .collect(),
            });
        }
    }
    ui.columns(2, |cols| {
        let ui = &mut cols[0];
        ui.strong("Whole model: every layer pruned by the same fraction");
        let mark = magnitude
            .as_ref()
            .and_then(|m| accuracy_at(m, state.prune_fraction))
            .map(|a| [100.0 * state.prune_fraction, 100.0 * a.accuracy]);
        curves_plot_ui(ui, "prune-whole", "removed from every layer (%)", &whole, mark);
        if let Some([x, y]) = mark {
            ui.weak(format!(
                "Diamond and dotted line: the fraction chosen below, {} zeroed, accuracy {}",
                format::percent(x / 100.0, 3),
                format::accuracy(y / 100.0)
            ));
        }
        slot_note_ui(ui, &magnitude, "magnitude pruning sweep");
        slot_note_ui(ui, &units, "unit-removal sweep");
        let ui = &mut cols[1];
        ui.strong("Per layer: one layer's units removed, the others whole");
        curves_plot_ui(
            ui,
            "prune-per-layer",
            "units removed from that layer (%)",
            &per_layer,
            None,
        );
        slot_note_ui(ui, &units, "per-layer sweep");
        if units.is_ready() {
            ui.weak(format!(
                "Sensitivity analysis as in Han et al. 2015; each layer's units ranked by {}, smallest removed first.",
                criterion_words(criterion)
            ));
        }
    });
    if let (Some(m), Some(c)) = (magnitude.as_ref(), units.as_ref()) {
        table_ui(ui, net, m, c);
    }
}

/// How a criterion ranks, in words.
fn criterion_words(c: Criterion) -> &'static str {
    match c {
        Criterion::L1 => "L1 norm",
        Criterion::Activation => "mean |activation|",
    }
}

/// What a curve's result slot is doing, when it is not there yet.
fn slot_note_ui<T>(ui: &mut egui::Ui, slot: &Slot<T>, what: &str) {
    match slot {
        Slot::Ready(_) => {}
        Slot::Failed(msg) => {
            ui.colored_label(ui.visuals().error_fg_color, msg);
        }
        Slot::Pending | Slot::Empty => {
            ui.horizontal(|ui| {
                ui.spinner();
                ui.weak(format!("Running the {what}…"));
            });
        }
    }
}

/// A plot of accuracy (%) against the fraction removed (%), one coloured line per series,
/// with the legend below the plot so it never hides a curve.
fn curves_plot_ui(
    ui: &mut egui::Ui,
    id: &str,
    x_label: &str,
    series: &[Series],
    mark: Option<[f64; 2]>,
) {
    let colour = ui.visuals().text_color();
    egui_plot::Plot::new(id)
        .height(230.0)
        .allow_drag(false)
        .allow_zoom(false)
        .allow_scroll(false)
        .allow_boxed_zoom(false)
        .include_x(0.0)
        .include_x(90.0)
        .include_y(0.0)
        .include_y(100.0)
        .x_axis_label(x_label)
        .y_axis_label("accuracy on the reference data (%)")
        // Grid lines every 10, 20 and 100 points on x and 5, 25 and 100 on y, so the fractions
        // and accuracies are labelled (the default decimal spacer labels only 0 and 100).
        .x_grid_spacer(egui_plot::uniform_grid_spacer(|_| [10.0, 20.0, 100.0]))
        .y_grid_spacer(egui_plot::uniform_grid_spacer(|_| [5.0, 25.0, 100.0]))
        .show(ui, |p| {
            // The first series is drawn widest, so a later one lying exactly on it (curves
            // that agree, as on the over-driven demo) leaves it visible as a border.
            for (i, s) in series.iter().enumerate() {
                let (width, radius) = if i == 0 { (4.0, 4.5) } else { (2.0, 3.0) };
                let style = if s.dashed() {
                    egui_plot::LineStyle::dashed_loose()
                } else {
                    egui_plot::LineStyle::Solid
                };
                p.line(
                    egui_plot::Line::new(s.name.clone(), s.points.clone())
                        .color(s.colour32())
                        .style(style)
                        .width(width),
                );
                p.points(
                    egui_plot::Points::new(s.name.clone(), s.points.clone())
                        .color(s.colour32())
                        .radius(radius),
                );
            }
            // The fraction chosen for "Save pruned model", on the first curve (magnitude).
            if let (Some([x, y]), Some(first)) = (mark, series.first()) {
                p.vline(
                    egui_plot::VLine::new("chosen fraction", x)
                        .color(colour)
                        .style(egui_plot::LineStyle::dotted_dense())
                        .width(1.0),
                );
                p.points(
                    egui_plot::Points::new("chosen fraction", vec![[x, y]])
                        .shape(egui_plot::MarkerShape::Diamond)
                        .color(first.colour32())
                        .filled(false)
                        .radius(8.0),
                );
            }
        });
    ui.horizontal_wrapped(|ui| {
        for s in series {
            let (rect, _) = ui.allocate_exact_size(egui::vec2(22.0, 12.0), egui::Sense::hover());
            let y = rect.center().y;
            let stroke = egui::Stroke::new(3.0, s.colour32());
            if s.dashed() {
                ui.painter().line_segment(
                    [rect.left_center(), egui::pos2(rect.left() + 8.0, y)],
                    stroke,
                );
                ui.painter().line_segment(
                    [egui::pos2(rect.right() - 8.0, y), rect.right_center()],
                    stroke,
                );
            } else {
                ui.painter()
                    .line_segment([rect.left_center(), rect.right_center()], stroke);
            }
            ui.label(&s.name);
            ui.add_space(8.0);
        }
    });
}

/// A row label of the table with the line of its curve's colour (palette index `colour`),
/// so one series has one colour in the plots and in the table.
fn row_label_ui(ui: &mut egui::Ui, colour: usize, text: &str) {
    ui.horizontal(|ui| {
        swatch_ui(ui, super::colour::color32(series_rgb(colour)), true);
        ui.strong(text);
    });
}

/// The numbers behind the curves: one row per curve, one column per fraction.
fn table_ui(
    ui: &mut egui::Ui,
    net: &Network,
    magnitude: &Arc<Vec<crate::analysis::prune::SweepPoint>>,
    units: &Arc<UnitCurves>,
) {
    ui.add_space(6.0);
    egui::Grid::new("sweep-table").striped(true).show(ui, |ui| {
        ui.strong("removed");
        for p in magnitude.iter() {
            ui.monospace(format::percent(p.fraction, 3));
        }
        ui.end_row();
        row_label_ui(ui, 0, "weights, by |w|");
        for p in magnitude.iter() {
            ui.monospace(format::accuracy(p.accuracy));
        }
        ui.end_row();
        row_label_ui(ui, 1, "units, every layer");
        for p in &units.all_layers {
            ui.monospace(format::accuracy(p.accuracy));
        }
        ui.end_row();
        let hidden = net.layers().len().saturating_sub(1);
        for l in 0..hidden {
            row_label_ui(
                ui,
                2 + l,
                &format!("units of {} only", net.layers()[l].name),
            );
            for p in units.per_layer.iter().filter(|p| p.layer == Some(l)) {
                ui.monospace(format::accuracy(p.accuracy));
            }
            ui.end_row();
        }
    });
    ui.weak("Accuracy on the reference data after removing each fraction.");
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::prune::SweepPoint;

    fn point(fraction: f64, accuracy: f64) -> SweepPoint {
        SweepPoint {
            fraction,
            accuracy,
            zeroed: 0,
            total: 1,
        }
    }

    #[test]
    fn accuracy_between_sweep_points_is_linear() {
        let sweep = [point(0.0, 1.0), point(0.5, 0.9), point(0.9, 0.5)];
        // Measured at a sweep fraction.
        assert_eq!(
            accuracy_at(&sweep, 0.5),
            Some(AccuracyAt {
                accuracy: 0.9,
                between: None
            })
        );
        // Linear in between (closed form): 0.7 lies half way from 0.5 to 0.9, so
        // 0.9 + 0.5 (0.5 - 0.9) = 0.7.
        let a = accuracy_at(&sweep, 0.7).unwrap_or_else(|| panic!("inside the sweep"));
        approx::assert_abs_diff_eq!(a.accuracy, 0.7, epsilon = 1e-12);
        assert_eq!(a.between, Some((0.5, 0.9)));
        assert_eq!(
            a.describe(0.7),
            "accuracy at 70% ≈ 70.0% (between the sweep's 50% and 90%)"
        );
        assert_eq!(accuracy_at(&sweep, 0.95), None);
        assert_eq!(accuracy_at(&[], 0.5), None);
    }
}
