//! The one struct that owns the app's data: the open network, the probe, every analysis
//! result (keyed by the model and probe they belong to), the selection and the user's
//! persisted preferences. Panels read it and change the selection; only the worker's
//! replies fill in results.

use crate::analysis::bounds::Bounds;
use crate::analysis::prune::SweepPoint;
use crate::analysis::screen::{Status, UnitScreen};
use crate::analysis::sparsity::{LayerSummary, UnitStats};
use crate::model::Network;
use crate::probe::ProbeData;
use serde::{Deserialize, Serialize};
use std::collections::HashMap;
use std::path::PathBuf;
use std::sync::Arc;

/// How many recent files the File menu remembers.
pub const RECENT_LIMIT: usize = 8;

/// The identity of the data a result was computed from. A result whose tag does not match
/// the current one belongs to a model (or probe) that is no longer open and is dropped.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default)]
pub struct Tag {
    /// Increases by one every time a model is opened.
    pub model: u64,
    /// Increases by one every time probe data is opened (or the model changes).
    pub probe: u64,
}

pub use super::colour::ScaleMode;

/// The order of tiles in the unit grid.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
pub enum SortKey {
    /// Unit index, from 0.
    #[default]
    Index,
    /// Hoyer sparsity of the incoming weights, sparsest first.
    Sparsity,
    /// Fraction of probe samples where the unit is active, least active first.
    Activity,
    /// Pre-activation reached by the preferred input, highest first.
    Preactivation,
}

impl SortKey {
    /// Every key, in menu order.
    pub const ALL: [SortKey; 4] = [
        SortKey::Index,
        SortKey::Sparsity,
        SortKey::Activity,
        SortKey::Preactivation,
    ];

    /// The label shown in the sort menu.
    pub fn label(self) -> &'static str {
        match self {
            SortKey::Index => "index",
            SortKey::Sparsity => "sparsity (sparsest first)",
            SortKey::Activity => "activity (least active first)",
            SortKey::Preactivation => "pre-activation reached (highest first)",
        }
    }
}

/// Which map the detail panel shows for the selected unit.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
pub enum MapView {
    /// The unit's incoming weights (input layout for the first layer, a grid over the units
    /// of the layer below otherwise).
    #[default]
    Weights,
    /// The input inside the box that drives the unit's pre-activation highest.
    Preferred,
    /// The gradient of the unit's pre-activation at the mean probe input.
    Sensitivity,
}

/// The main area's two views.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
pub enum MainView {
    /// The grid of unit thumbnails.
    #[default]
    Units,
    /// Weight-magnitude histograms and the pruning curve.
    Sparsity,
}

/// Settings of the preferred-input search (projected gradient ascent), shown in the detail
/// panel and remembered between runs.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct SearchSettings {
    /// Gradient steps per restart.
    pub steps: usize,
    /// Starting points (one at the box centre, the rest random).
    pub restarts: usize,
    /// L2 penalty on the input.
    pub l2: f32,
    /// Total-variation penalty (image layouts only).
    pub tv: f32,
}

impl Default for SearchSettings {
    fn default() -> Self {
        // The same defaults as `receptor prefer`, so the app and the command line agree.
        let d = crate::analysis::prefer::PreferOptions::default();
        SearchSettings {
            steps: d.steps(),
            restarts: d.restarts(),
            l2: d.l2(),
            tv: d.tv(),
        }
    }
}

impl SearchSettings {
    /// The core's options for these settings (fixed seed 0, as on the command line), or
    /// the core's refusal of a bad value.
    pub fn options(&self) -> crate::Result<crate::analysis::prefer::PreferOptions> {
        crate::analysis::prefer::PreferOptions::new(self.steps, self.restarts, 0, self.l2, self.tv)
    }
}

/// Preferences remembered between runs (eframe persistence). Unknown or missing fields fall
/// back to their defaults, so an older saved file never stops the app from starting.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(default)]
pub struct Prefs {
    /// Model files opened recently, newest first.
    pub recent_models: Vec<PathBuf>,
    /// Probe files opened recently, newest first.
    pub recent_probes: Vec<PathBuf>,
    /// Per-unit or per-layer colour scale.
    pub scale: ScaleMode,
    /// Preferred-input search settings.
    pub search: SearchSettings,
    /// Tile edge in points.
    pub tile_size: f32,
    /// Grid order.
    pub sort: SortKey,
    /// Show only units with a problem status.
    pub problems_only: bool,
    /// The map shown in the detail panel.
    pub map_view: MapView,
}

impl Default for Prefs {
    fn default() -> Self {
        Prefs {
            recent_models: Vec::new(),
            recent_probes: Vec::new(),
            scale: ScaleMode::default(),
            search: SearchSettings::default(),
            tile_size: 64.0,
            sort: SortKey::default(),
            problems_only: false,
            map_view: MapView::default(),
        }
    }
}

impl Prefs {
    /// Puts `path` first in `list`, without duplicates, keeping at most [`RECENT_LIMIT`].
    pub fn remember(list: &mut Vec<PathBuf>, path: &std::path::Path) {
        let p = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_path_buf());
        list.retain(|q| q != &p);
        list.insert(0, p);
        list.truncate(RECENT_LIMIT);
    }
}

/// The selected unit.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Selection {
    /// Layer index, from 0 (the first layer after the input).
    pub layer: usize,
    /// Unit index within the layer.
    pub unit: usize,
}

/// The open model and where it came from.
#[derive(Debug, Clone)]
pub struct OpenModel {
    /// The validated network, shared with the worker.
    pub net: Arc<Network>,
    /// How to name it in messages (the path as given, or "demo model").
    pub origin: String,
    /// The file, when it came from one (recent files, relative probe paths).
    pub path: Option<PathBuf>,
}

/// The probe data in use, held in memory for histograms and top samples.
#[derive(Debug, Clone)]
pub struct OpenProbe {
    /// The samples, `inputs: [rows, input size]`, with labels when the file had them.
    pub data: Arc<ProbeData>,
    /// Mean input over the probe, `[input size]` (where sensitivity is evaluated).
    pub mean: Arc<Vec<f32>>,
    /// The file, or `None` for the uniform probe.
    pub path: Option<PathBuf>,
}

impl OpenProbe {
    /// True when every row carries a class label (needed for the pruning curve).
    pub fn labelled(&self) -> bool {
        self.data.labels.is_some()
    }
}

/// Sparsity statistics of the whole model, as `receptor stats` computes them.
#[derive(Debug, Clone)]
pub struct StatsResult {
    /// Per layer, per unit.
    pub units: Vec<Vec<UnitStats>>,
    /// Per layer.
    pub layers: Vec<LayerSummary>,
    /// Per layer, histogram of log10 |w| over the whole weight matrix.
    pub magnitude: Vec<MagnitudeHistogram>,
}

/// Histogram of log10 |w| for one layer (exact zeros counted apart, they have no log).
#[derive(Debug, Clone)]
pub struct MagnitudeHistogram {
    /// Left edge of bin 0, in log10 units.
    pub start: f64,
    /// Bin width in log10 units.
    pub width: f64,
    /// Weights per bin.
    pub counts: Vec<u64>,
    /// Weights that are exactly 0.
    pub zeros: u64,
}

/// Screening results, per hidden layer, per unit.
#[derive(Debug, Clone)]
pub struct ScreenResult {
    /// `layers[l][u]`; the output layer has no entry (screening covers hidden layers).
    pub layers: Vec<Vec<UnitScreen>>,
    /// Samples screened.
    pub samples: usize,
    /// Where the samples came from.
    pub probe: String,
    /// The whole report, for export in `receptor screen` order.
    pub rows: Arc<Vec<UnitScreen>>,
}

/// A unit's activations over the probe: histogram and the samples that drive it hardest.
#[derive(Debug, Clone, Default)]
pub struct UnitActivity {
    /// Smallest activation seen.
    pub lo: f32,
    /// Largest activation seen.
    pub hi: f32,
    /// Counts per equal-width bin over `[lo, hi]`.
    pub hist: Vec<u32>,
    /// Up to 8 (probe row, pre-activation, activation), highest pre-activation first.
    pub top: Vec<(usize, f32, f32)>,
}

/// Activity of every unit of every layer over the probe: `layers[l][u]`.
#[derive(Debug, Clone)]
pub struct ActivityResult {
    /// Per layer, per unit.
    pub layers: Vec<Vec<UnitActivity>>,
}

/// The preferred input of one unit, as shown in tiles and the detail panel.
#[derive(Debug, Clone)]
pub struct PreferredMap {
    /// The input, `[input size]`, inside the box.
    pub input: Vec<f32>,
    /// Raw pre-activation reached there.
    pub preactivation: f32,
    /// The unit's output there.
    pub activation: f32,
    /// False when the search produced NaN or infinity.
    pub finite: bool,
}

/// Preferred inputs of one layer, filled in as batches arrive.
#[derive(Debug, Clone)]
pub struct LayerPreferred {
    /// The settings these results were computed with.
    pub settings: SearchSettings,
    /// One entry per unit; `None` until its batch arrives.
    pub maps: Vec<Option<PreferredMap>>,
    /// Batches still queued or running for this layer.
    pub pending: usize,
}

/// Everything computed for the open model and probe. Replaced wholesale when either changes.
#[derive(Debug, Default)]
pub struct Results {
    /// Sparsity statistics (model only).
    pub stats: Option<Arc<StatsResult>>,
    /// Interval bounds of every layer's pre-activations (model only).
    pub bounds: Option<Arc<Bounds>>,
    /// Screening on the probe.
    pub screen: Option<Arc<ScreenResult>>,
    /// Activations over the probe.
    pub activity: Option<Arc<ActivityResult>>,
    /// Preferred inputs per layer (model only).
    pub preferred: HashMap<usize, LayerPreferred>,
    /// Sensitivity maps per layer, `[units, inputs]`, with their largest |value| (model and
    /// probe).
    pub sensitivity: HashMap<usize, (Arc<ndarray::Array2<f32>>, f32)>,
    /// The pruning curve (model and a labelled probe).
    pub sweep: Option<Arc<Vec<SweepPoint>>>,
    /// A sweep has been asked for (so it is not queued twice).
    pub sweep_requested: bool,
    /// Sensitivity has been asked for, per layer.
    pub sensitivity_requested: std::collections::HashSet<usize>,
}

/// A one-line message for the status bar.
#[derive(Debug, Clone)]
pub struct Notice {
    /// The text.
    pub text: String,
    /// Shown in the theme's error colour when true.
    pub error: bool,
}

/// The app's data: model, probe, results, selection, preferences and messages.
#[derive(Debug)]
pub struct AppState {
    /// The open model, if any loaded yet.
    pub model: Option<OpenModel>,
    /// The probe in use (the uniform probe until the user opens a file).
    pub probe: Option<OpenProbe>,
    /// Identity of the current model and probe.
    pub tag: Tag,
    /// Results for `tag`.
    pub results: Results,
    /// The selected unit.
    pub selection: Option<Selection>,
    /// Units visited before walking down, for the Back button.
    pub history: Vec<Selection>,
    /// Remembered preferences.
    pub prefs: Prefs,
    /// The main view.
    pub view: MainView,
    /// The last confirmation or error.
    pub notice: Option<Notice>,
    /// An error from opening a file, shown prominently until dismissed.
    pub open_error: Option<String>,
    /// Allow side-file paths outside the model's folder.
    pub allow_outside_paths: bool,
    /// The unit order of the grid, recomputed when its inputs change.
    pub order_cache: Option<(OrderKey, Arc<Vec<usize>>)>,
    /// Pruning fraction chosen for "Save pruned model".
    pub prune_fraction: f64,
}

/// Everything the grid order depends on.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OrderKey {
    /// Model and probe.
    pub tag: Tag,
    /// Layer shown.
    pub layer: usize,
    /// Sort key.
    pub sort: SortKey,
    /// Problem units only.
    pub problems_only: bool,
    /// Which results were present (screen, stats, preferred count), so the order updates
    /// as results arrive.
    pub have: (bool, bool, usize),
}

impl AppState {
    /// A fresh state with the given preferences and nothing open.
    pub fn new(prefs: Prefs, allow_outside_paths: bool) -> Self {
        AppState {
            model: None,
            probe: None,
            tag: Tag::default(),
            results: Results::default(),
            selection: None,
            history: Vec::new(),
            prefs,
            view: MainView::default(),
            notice: None,
            open_error: None,
            allow_outside_paths,
            order_cache: None,
            prune_fraction: 0.5,
        }
    }

    /// The open network.
    pub fn net(&self) -> Option<&Arc<Network>> {
        self.model.as_ref().map(|m| &m.net)
    }

    /// Shows a confirmation in the status bar.
    pub fn confirm(&mut self, text: impl Into<String>) {
        self.notice = Some(Notice {
            text: text.into(),
            error: false,
        });
    }

    /// Shows an error in the status bar.
    pub fn fail(&mut self, text: impl Into<String>) {
        self.notice = Some(Notice {
            text: text.into(),
            error: true,
        });
    }

    /// The layer whose units the grid shows.
    pub fn current_layer(&self) -> usize {
        self.selection.map_or(0, |s| s.layer)
    }

    /// Screening row of a unit (hidden layers only, once screening is done).
    pub fn screen_of(&self, layer: usize, unit: usize) -> Option<&UnitScreen> {
        self.results
            .screen
            .as_ref()
            .and_then(|s| s.layers.get(layer))
            .and_then(|l| l.get(unit))
    }

    /// Statistics of a unit, once computed.
    pub fn stats_of(&self, layer: usize, unit: usize) -> Option<&UnitStats> {
        self.results
            .stats
            .as_ref()
            .and_then(|s| s.units.get(layer))
            .and_then(|l| l.get(unit))
    }

    /// Preferred input of a unit, once its batch arrived.
    pub fn preferred_of(&self, layer: usize, unit: usize) -> Option<&PreferredMap> {
        self.results
            .preferred
            .get(&layer)
            .and_then(|p| p.maps.get(unit))
            .and_then(|m| m.as_ref())
    }

    /// Selects `sel`; when `walk` is set the previous selection is kept for Back.
    pub fn select(&mut self, sel: Selection, walk: bool) {
        if walk && let Some(prev) = self.selection {
            if prev != sel {
                self.history.push(prev);
            }
        } else if !walk {
            self.history.clear();
        }
        self.selection = Some(sel);
    }

    /// The units of `layer` in grid order (sorted and filtered), cached.
    pub fn order(&mut self, layer: usize) -> Arc<Vec<usize>> {
        let Some(net) = self.net() else {
            return Arc::new(Vec::new());
        };
        let n = net.layers.get(layer).map_or(0, |l| l.units());
        let pref_count = self
            .results
            .preferred
            .get(&layer)
            .map_or(0, |p| p.maps.iter().filter(|m| m.is_some()).count());
        let key = OrderKey {
            tag: self.tag,
            layer,
            sort: self.prefs.sort,
            problems_only: self.prefs.problems_only,
            have: (
                self.results.screen.is_some(),
                self.results.stats.is_some(),
                pref_count,
            ),
        };
        if let Some((k, order)) = &self.order_cache
            && *k == key
        {
            return order.clone();
        }
        let mut units: Vec<usize> = (0..n).collect();
        if self.prefs.problems_only {
            units.retain(|&u| {
                self.screen_of(layer, u)
                    .is_some_and(|s| is_problem(s.status))
            });
        }
        // Sorting is stable, so ties keep index order; missing values sort last.
        match self.prefs.sort {
            SortKey::Index => {}
            SortKey::Sparsity => {
                let key = |u: usize| {
                    self.stats_of(layer, u)
                        .map_or(f64::NEG_INFINITY, |s| s.hoyer)
                };
                units.sort_by(|a, b| key(*b).total_cmp(&key(*a)));
            }
            SortKey::Activity => {
                let key = |u: usize| {
                    self.screen_of(layer, u)
                        .map_or(f64::INFINITY, |s| s.active_frac)
                };
                units.sort_by(|a, b| key(*a).total_cmp(&key(*b)));
            }
            SortKey::Preactivation => {
                let key = |u: usize| {
                    self.preferred_of(layer, u)
                        .filter(|p| p.finite)
                        .map_or(f32::NEG_INFINITY, |p| p.preactivation)
                };
                units.sort_by(|a, b| key(*b).total_cmp(&key(*a)));
            }
        }
        let order = Arc::new(units);
        self.order_cache = Some((key, order.clone()));
        order
    }
}

/// True for statuses the "problem units only" filter keeps.
pub fn is_problem(status: Status) -> bool {
    matches!(
        status,
        Status::DeadProven
            | Status::DeadOnProbe
            | Status::RarelyActive
            | Status::Saturated
            | Status::NonFinite
    )
}

/// Plain words for a status, as shown in the app.
pub fn status_words(status: Status) -> &'static str {
    match status {
        Status::DeadProven => "dead (proven over the whole input box)",
        Status::DeadOnProbe => "dead on the probe",
        Status::RarelyActive => "rarely active",
        Status::AlwaysActive => "always active",
        Status::Saturated => "saturated",
        Status::Ok => "ok",
        Status::NonFinite => "non-finite values",
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn preferences_from_an_older_file_fall_back_to_defaults() {
        // A saved file from an earlier version: one known field, one that no longer exists.
        let p: Prefs = serde_json::from_str(r#"{"tile_size": 96.0, "retired_option": 3}"#).unwrap();
        assert_eq!(p.tile_size, 96.0);
        assert_eq!(p.sort, SortKey::Index);
        assert_eq!(p.search, SearchSettings::default());
        assert!(p.recent_models.is_empty());
    }

    #[test]
    fn recent_files_are_newest_first_without_duplicates() {
        let mut list = Vec::new();
        for name in ["a.json", "b.json", "a.json"] {
            Prefs::remember(&mut list, std::path::Path::new(name));
        }
        let names: Vec<String> = list
            .iter()
            .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
            .collect();
        assert_eq!(names, ["a.json", "b.json"]);
        for i in 0..20 {
            Prefs::remember(&mut list, std::path::Path::new(&format!("m{i}.json")));
        }
        assert_eq!(list.len(), RECENT_LIMIT);
    }
}
