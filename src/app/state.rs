//! The one struct that owns the app's data: the open network, the probe, every analysis
//! result (keyed by the model and probe they belong to), the selection and the user's
//! persisted preferences. Panels read it and change the selection; only the worker's
//! replies fill in results.

pub use crate::analysis::activity::{ActivityResult, UnitActivity};
use crate::analysis::attribute::Attribution;
use crate::analysis::bounds::Bounds;
use crate::analysis::compact::{CheckedCompaction, CompactRequest, DEFAULT_FOLD_TOLERANCE};
pub use crate::analysis::gradient::Sensitivity;
use crate::analysis::prefer::{PreferOptions, Preferred, Reference};
use crate::analysis::prune::SweepPoint;
use crate::analysis::screen::{ScreenReport, Status, UnitScreen};
pub use crate::analysis::sparsity::MagnitudeHistogram;
use crate::analysis::sparsity::{NetworkSparsity, UnitStats};
pub use crate::analysis::structured::{Criterion, UnitCurves};
use crate::model::Network;
use crate::probe::ProbeData;
use serde::{Deserialize, Serialize};
use std::collections::HashMap;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

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

/// The order of units in the unit table and the tile wall: a column of the table.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
pub enum SortKey {
    /// Unit index, from 0.
    #[default]
    Index,
    /// Screening status, problems first (see [`status_rank`]).
    Status,
    /// Fraction of probe samples where the unit is active.
    Activity,
    /// Sound upper bound of the pre-activation over the input box.
    UpperBound,
    /// Mean activation over the probe.
    Mean,
    /// Largest activation over the probe.
    Max,
    /// Hoyer sparsity of the incoming weights.
    Sparsity,
    /// Fraction of near-zero incoming weights.
    NearZero,
    /// Pre-activation reached by the preferred input.
    Preactivation,
}

impl SortKey {
    /// Every key, in menu order.
    pub const ALL: [SortKey; 9] = [
        SortKey::Index,
        SortKey::Status,
        SortKey::Activity,
        SortKey::UpperBound,
        SortKey::Mean,
        SortKey::Max,
        SortKey::Sparsity,
        SortKey::NearZero,
        SortKey::Preactivation,
    ];

    /// The column's name (the table's header, the tile wall's sort menu).
    pub fn label(self) -> &'static str {
        match self {
            SortKey::Index => "unit",
            SortKey::Status => "status",
            SortKey::Activity => "active %",
            SortKey::UpperBound => "upper bound",
            SortKey::Mean => "mean",
            SortKey::Max => "max",
            SortKey::Sparsity => "Hoyer",
            SortKey::NearZero => "near-zero %",
            SortKey::Preactivation => "pre-activation reached",
        }
    }

    /// The direction a first click on the column sorts in: towards what screening looks
    /// for first (least active, lowest bound, sparsest, most near-zero weights, the
    /// highest pre-activation reached).
    pub fn first_descending(self) -> bool {
        matches!(
            self,
            SortKey::Sparsity | SortKey::NearZero | SortKey::Preactivation
        )
    }

    /// Words for the direction: "lowest first" / "highest first" (for the index,
    /// "first unit first" / "last unit first").
    pub fn direction_words(self, descending: bool) -> &'static str {
        match (self, descending) {
            (SortKey::Index, false) => "in index order",
            (SortKey::Index, true) => "last unit first",
            (SortKey::Status, false) => "problems first",
            (SortKey::Status, true) => "healthy first",
            (_, false) => "lowest first",
            (_, true) => "highest first",
        }
    }
}

/// How the middle pane shows the units of a layer.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
pub enum UnitView {
    /// The sortable, filterable screening table.
    #[default]
    Table,
    /// The wall of thumbnails.
    Tiles,
}

/// Which units the table and the tile wall list, by screening status.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum StatusFilter {
    /// Every unit.
    #[default]
    All,
    /// Units with a problem status ([`is_problem`]).
    Problems,
    /// Units with exactly this status.
    Only(Status),
}

impl StatusFilter {
    /// Every choice, in menu order.
    pub const ALL: [StatusFilter; 9] = [
        StatusFilter::All,
        StatusFilter::Problems,
        StatusFilter::Only(Status::DeadProven),
        StatusFilter::Only(Status::DeadOnProbe),
        StatusFilter::Only(Status::RarelyActive),
        StatusFilter::Only(Status::AlwaysActive),
        StatusFilter::Only(Status::Saturated),
        StatusFilter::Only(Status::Ok),
        StatusFilter::Only(Status::NonFinite),
    ];

    /// The menu's words.
    pub fn label(self) -> &'static str {
        match self {
            StatusFilter::All => "all units",
            StatusFilter::Problems => "problem units",
            StatusFilter::Only(s) => status_short(s),
        }
    }

    /// True when a unit with screening row `status` (`None`: not screened) is kept.
    pub fn keeps(self, status: Option<Status>) -> bool {
        match self {
            StatusFilter::All => true,
            StatusFilter::Problems => status.is_some_and(is_problem),
            StatusFilter::Only(want) => status == Some(want),
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
    /// The gradient of the unit's pre-activation at the mean reference input.
    Sensitivity,
    /// Integrated gradients of the unit for one probe sample.
    Attribution,
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

/// How the preferred-input search options are saved with the preferences: a plain mirror
/// of [`PreferOptions`], so the core type carries no persistence format. Missing fields
/// take the core's defaults; saved values that the core refuses fall back to the defaults.
mod saved_search {
    use crate::analysis::prefer::PreferOptions;
    use serde::{Deserialize, Deserializer, Serialize, Serializer};

    #[derive(Serialize, Deserialize)]
    #[serde(default)]
    struct Saved {
        steps: usize,
        restarts: usize,
        seed: u64,
        l2: f32,
        tv: f32,
        prior_weight: f32,
        facets: usize,
    }

    impl From<&PreferOptions> for Saved {
        fn from(o: &PreferOptions) -> Self {
            Saved {
                steps: o.steps(),
                restarts: o.restarts(),
                seed: o.seed(),
                l2: o.l2(),
                tv: o.tv(),
                prior_weight: o.prior_weight(),
                facets: o.facets(),
            }
        }
    }

    impl Default for Saved {
        fn default() -> Self {
            Saved::from(&PreferOptions::default())
        }
    }

    pub fn serialize<S: Serializer>(o: &PreferOptions, s: S) -> Result<S::Ok, S::Error> {
        Saved::from(o).serialize(s)
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<PreferOptions, D::Error> {
        let v = Saved::deserialize(d)?;
        Ok(PreferOptions::new(v.steps, v.restarts, v.seed, v.l2, v.tv)
            .and_then(|o| o.with_prior_weight(v.prior_weight))
            .and_then(|o| o.with_facets(v.facets))
            .unwrap_or_default())
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
    /// Per-unit or per-layer colour scale. Saved under a new name since the default became
    /// "shared by layer", so a per-unit scale saved by an older version as its default does
    /// not come back.
    #[serde(rename = "colour_scale")]
    pub scale: ScaleMode,
    /// Preferred-input search options (the same defaults as `receptor prefer`, so the app
    /// and the command line agree).
    #[serde(with = "saved_search")]
    pub search: PreferOptions,
    /// Tile edge in points.
    pub tile_size: f32,
    /// Unit order of the table and the tile wall.
    pub sort: SortKey,
    /// Sort from the highest value down.
    pub sort_descending: bool,
    /// The table or the tile wall.
    pub unit_view: UnitView,
    /// The map shown in the detail panel.
    pub map_view: MapView,
    /// Search preferred inputs with the data prior of the probe file (when one is open);
    /// off: the plain search.
    pub use_prior: bool,
    /// Baseline of the attribution map: the probe's mean (true) or the box centre.
    pub attribution_from_mean: bool,
    /// Row order of the per-feature charts of vector inputs.
    pub feature_order: crate::analysis::features::FeatureOrder,
    /// The reference data last used with each model, keyed by the model's canonical path
    /// ([`Prefs::model_key`]); opened again with the model.
    pub reference_for: std::collections::BTreeMap<String, PathBuf>,
}

impl Default for Prefs {
    fn default() -> Self {
        Prefs {
            recent_models: Vec::new(),
            recent_probes: Vec::new(),
            scale: ScaleMode::default(),
            search: PreferOptions::default(),
            tile_size: 64.0,
            sort: SortKey::default(),
            sort_descending: false,
            unit_view: UnitView::default(),
            map_view: MapView::default(),
            use_prior: true,
            attribution_from_mean: false,
            feature_order: Default::default(),
            reference_for: std::collections::BTreeMap::new(),
        }
    }
}

impl Prefs {
    /// The key of a model in [`Prefs::reference_for`]: its canonical path (the path as given
    /// when it cannot be resolved), so the same file reached by two names is one model.
    pub fn model_key(model: &std::path::Path) -> String {
        std::fs::canonicalize(model)
            .unwrap_or_else(|_| model.to_path_buf())
            .to_string_lossy()
            .into_owned()
    }

    /// The reference data to open with `model`, and why: the file remembered for it when it
    /// still exists, else a file beside the model named after it
    /// ([`crate::probe::beside_model`]); `None`: uniform samples of the box.
    pub fn reference_to_open(&self, model: &std::path::Path) -> Option<(PathBuf, ReferenceOrigin)> {
        if let Some(p) = self.reference_for.get(&Self::model_key(model))
            && p.is_file()
        {
            return Some((p.clone(), ReferenceOrigin::Remembered));
        }
        crate::probe::beside_model(model).map(|p| (p, ReferenceOrigin::BesideModel))
    }

    /// Remembers `reference` as the reference data of `model` (`None`: uniform samples, the
    /// model's entry is forgotten).
    pub fn remember_reference(
        &mut self,
        model: &std::path::Path,
        reference: Option<&std::path::Path>,
    ) {
        let key = Self::model_key(model);
        match reference {
            Some(r) => {
                let r = std::fs::canonicalize(r).unwrap_or_else(|_| r.to_path_buf());
                self.reference_for.insert(key, r);
            }
            None => {
                self.reference_for.remove(&key);
            }
        }
    }

    /// Puts `path` first in `list`, without duplicates, keeping at most [`RECENT_LIMIT`].
    pub fn remember(list: &mut Vec<PathBuf>, path: &std::path::Path) {
        let p = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_path_buf());
        list.retain(|q| q != &p);
        list.insert(0, p);
        list.truncate(RECENT_LIMIT);
    }
}

/// Why the reference data in use was opened without being asked for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ReferenceOrigin {
    /// It was last used with this model.
    Remembered,
    /// It lies beside the model and carries its name.
    BesideModel,
}

impl ReferenceOrigin {
    /// How the model summary says it.
    pub fn describe(self) -> &'static str {
        match self {
            ReferenceOrigin::Remembered => "opened again: last used with this model",
            ReferenceOrigin::BesideModel => "found beside the model",
        }
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
    /// Where the input box came from (the model summary shows it).
    pub box_origin: crate::model::BoxOrigin,
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
    /// Reference data for the preferred-input search (data prior and starts), made from a
    /// probe file (`None` for the uniform probe, or when it could not be made).
    pub reference: Option<Arc<Reference>>,
    /// Why the reference could not be made from the probe file.
    pub reference_error: Option<String>,
    /// Where the file's data lies per feature, `[input size]` (vector inputs read from a
    /// file only: the uniform probe is not data, and image charts have no rows).
    pub spreads: Option<Arc<Vec<Option<crate::analysis::features::FeatureSpread>>>>,
    /// The model's confusion matrix on labelled reference data (`None` without labels).
    pub confusion: Option<Arc<crate::analysis::accuracy::Confusion>>,
}

impl OpenProbe {
    /// True when every row carries a class label (needed for the pruning curve).
    pub fn labelled(&self) -> bool {
        self.data.labels.is_some()
    }
}

/// Sparsity statistics and |w| histograms of the whole model, as `receptor stats`
/// computes them.
pub type StatsResult = NetworkSparsity;

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

impl ScreenResult {
    /// Groups the core's report by layer for `net`.
    pub fn new(net: &Network, report: ScreenReport) -> Self {
        let mut layers: Vec<Vec<UnitScreen>> =
            vec![Vec::new(); net.layers().len().saturating_sub(1)];
        for u in &report.units {
            if let Some(v) = layers.get_mut(u.layer_index) {
                v.push(u.clone());
            }
        }
        ScreenResult {
            layers,
            samples: report.samples,
            probe: report.probe,
            rows: Arc::new(report.units),
        }
    }
}

/// Preferred inputs of one layer, filled in as batches arrive.
#[derive(Debug, Clone)]
pub struct LayerPreferred {
    /// The options these results were computed with.
    pub settings: PreferOptions,
    /// The probe id whose data (prior and starts) the search used; `None` for the plain
    /// search.
    pub data: Option<u64>,
    /// One entry per unit (its facet 0); `None` until its batch arrives.
    pub maps: Vec<Option<Preferred>>,
    /// Every facet of the units searched with more than one facet.
    pub facets: HashMap<usize, Vec<Preferred>>,
    /// Batches queued or running for this layer.
    pub pending: usize,
    /// Units not yet handed to the worker; the app sends them a batch at a time, the
    /// units on screen first.
    pub queue: std::collections::VecDeque<usize>,
    /// Size of the next batch (small at first, so the first tiles appear soon).
    pub next_batch: usize,
}

/// One result in the cache: not asked for yet, being computed, there, or failed (with the
/// message shown to the user). A failed result is not asked for again until "Run again".
#[derive(Debug, Clone, Default)]
pub enum Slot<T> {
    /// Not asked for.
    #[default]
    Empty,
    /// Queued or running on the worker.
    Pending,
    /// Computed.
    Ready(T),
    /// The computation failed with this message.
    Failed(String),
}

impl<T> Slot<T> {
    /// The result when it is there.
    pub fn as_ref(&self) -> Option<&T> {
        match self {
            Slot::Ready(v) => Some(v),
            _ => None,
        }
    }

    /// True when the result is there.
    pub fn is_ready(&self) -> bool {
        matches!(self, Slot::Ready(_))
    }

    /// True when the result has not been asked for.
    pub fn is_empty(&self) -> bool {
        matches!(self, Slot::Empty)
    }

    /// Marks the result as asked for.
    pub fn request(&mut self) {
        *self = Slot::Pending;
    }

    /// Stores a finished computation: the value, or the failure's message prefixed with
    /// `what failed` (the message is also returned, for the status bar).
    pub fn settle(&mut self, result: crate::error::Result<T>, what: &str) -> Option<String> {
        match result {
            Ok(v) => {
                *self = Slot::Ready(v);
                None
            }
            Err(e) => {
                let text = format!("{what} failed: {e}");
                *self = Slot::Failed(text.clone());
                Some(text)
            }
        }
    }
}

impl<T: Clone> Slot<T> {
    /// A copy of the result when it is there.
    pub fn ready(&self) -> Option<T> {
        self.as_ref().cloned()
    }
}

/// Everything computed for one model and probe, keyed by their [`Tag`]: replies carry the
/// tag they were computed for, and the cache takes only those that match its own.
/// Model results (statistics, bounds, preferred inputs) need the same `model`; probe
/// results (screening, activity, sensitivity, the pruning curve) the same model and probe.
#[derive(Debug, Default)]
pub struct Results {
    /// The model and probe these results belong to.
    tag: Tag,
    /// Sparsity statistics (model only).
    pub stats: Slot<Arc<StatsResult>>,
    /// Interval bounds of every layer's pre-activations (model only).
    pub bounds: Slot<Arc<Bounds>>,
    /// Screening on the probe.
    pub screen: Slot<Arc<ScreenResult>>,
    /// Activations over the probe.
    pub activity: Slot<Arc<ActivityResult>>,
    /// Preferred inputs per layer (model only).
    pub preferred: HashMap<usize, LayerPreferred>,
    /// Sensitivity maps per layer at the mean reference input (model and probe).
    pub sensitivity: HashMap<usize, Slot<Arc<Sensitivity>>>,
    /// The pruning curve (model and a labelled probe).
    pub sweep: Slot<Arc<Vec<SweepPoint>>>,
    /// The convolution views' results (model and probe).
    pub conv: super::conv_jobs::ConvResults,
    /// Integrated gradients per (layer, unit, probe row, baseline) (model and probe).
    pub attribution: HashMap<AttributionKey, Slot<Arc<Attribution>>>,
    /// Unit-removal curves, whole model and per layer, per ranking criterion (model and a
    /// labelled probe).
    pub unit_curves: HashMap<Criterion, Slot<Arc<UnitCurves>>>,
    /// The compaction and its output check, per choice of the Compact window (model and
    /// probe: the check runs on the probe).
    pub compact: HashMap<CompactChoice, Slot<Arc<CheckedCompaction>>>,
}

/// Which attribution: unit `unit` of `layer` for probe row `row`, from the probe's mean
/// (`from_mean`) or the box centre.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct AttributionKey {
    /// Layer index.
    pub layer: usize,
    /// Unit index.
    pub unit: usize,
    /// Probe row.
    pub row: usize,
    /// Baseline: the probe's mean (true) or the box centre (false).
    pub from_mean: bool,
}

impl Results {
    /// An empty cache for `tag`.
    pub fn new(tag: Tag) -> Self {
        Results {
            tag,
            ..Results::default()
        }
    }

    /// The model and probe the cached results belong to.
    pub fn tag(&self) -> Tag {
        self.tag
    }

    /// True when a result computed for `t` belongs to the cached model.
    pub fn is_model(&self, t: Tag) -> bool {
        t.model == self.tag.model
    }

    /// True when a result computed for `t` belongs to the cached model and probe.
    pub fn is_current(&self, t: Tag) -> bool {
        t == self.tag
    }

    /// Switches to probe `probe` of the same model: the probe results are dropped, the
    /// model results kept.
    pub fn change_probe(&mut self, probe: u64) {
        self.tag.probe = probe;
        self.screen = Slot::Empty;
        self.activity = Slot::Empty;
        self.sensitivity.clear();
        self.sweep = Slot::Empty;
        self.conv = super::conv_jobs::ConvResults::default();
        self.attribution.clear();
        // Searches that used the old probe's data are no longer current.
        self.preferred.retain(|_, lp| lp.data.is_none());
        self.unit_curves.clear();
        self.compact.clear();
    }

    /// The unit-removal curves of `criterion` (empty when never asked for).
    pub fn unit_curves_of(&self, criterion: Criterion) -> Option<&Slot<Arc<UnitCurves>>> {
        self.unit_curves.get(&criterion)
    }

    /// The compaction for `choice` (empty when never asked for).
    pub fn compact_of(&self, choice: CompactChoice) -> Option<&Slot<Arc<CheckedCompaction>>> {
        self.compact.get(&choice)
    }

    /// The sensitivity slot of `layer` (empty when never asked for).
    pub fn sensitivity_of(&self, layer: usize) -> Option<&Slot<Arc<Sensitivity>>> {
        self.sensitivity.get(&layer)
    }

    /// After a cancel: every pending result becomes not-asked-for (its job was dropped),
    /// and no preferred-input batch is counted as pending.
    pub fn cancel_pending(&mut self) {
        for lp in self.preferred.values_mut() {
            lp.pending = 0;
            lp.queue.clear();
        }
        self.each_slot(|s| s.forget_pending());
        self.conv.forget_unfinished();
    }

    /// Before "Run again": every result that is not there (pending or failed) becomes
    /// not-asked-for, so it is asked for again.
    pub fn forget_unfinished(&mut self) {
        self.each_slot(|s| s.forget_unfinished());
        self.conv.forget_unfinished();
    }

    /// Runs `f` on the state of every slot.
    fn each_slot(&mut self, f: impl Fn(&mut dyn SlotState)) {
        f(&mut self.stats);
        f(&mut self.bounds);
        f(&mut self.screen);
        f(&mut self.activity);
        f(&mut self.sweep);
        for s in self.sensitivity.values_mut() {
            f(s);
        }
        for s in self.attribution.values_mut() {
            f(s);
        }
        for s in self.unit_curves.values_mut() {
            f(s);
        }
        for s in self.compact.values_mut() {
            f(s);
        }
    }
}

/// The part of a [`Slot`] that does not depend on its value type.
trait SlotState {
    /// Pending becomes empty.
    fn forget_pending(&mut self);
    /// Pending or failed becomes empty.
    fn forget_unfinished(&mut self);
}

impl<T> SlotState for Slot<T> {
    fn forget_pending(&mut self) {
        if matches!(self, Slot::Pending) {
            *self = Slot::Empty;
        }
    }

    fn forget_unfinished(&mut self) {
        if !self.is_ready() {
            *self = Slot::Empty;
        }
    }
}

/// What the Compact window asks for beyond the exact removals.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default)]
pub struct CompactChoice {
    /// Also remove relu units never active on the probe in use (lossy; only with a probe
    /// file, as `receptor compact --also dead-on-probe` needs `--probe`).
    pub dead_on_probe: bool,
    /// Fold units constant over the input box into the next layer's bias (within
    /// [`DEFAULT_FOLD_TOLERANCE`], the default of `receptor compact --fold-constant`).
    pub fold_constant: bool,
}

impl CompactChoice {
    /// The core's request for this choice.
    pub fn request(self) -> CompactRequest {
        CompactRequest {
            dead_on_probe: self.dead_on_probe,
            fold_tolerance: self.fold_constant.then_some(DEFAULT_FOLD_TOLERANCE),
        }
    }
}

/// The Compact window: open or not, the user's choice, and what was saved.
#[derive(Debug, Clone, Default)]
pub struct CompactView {
    /// The window is shown.
    pub open: bool,
    /// What to remove beyond the exact reasons.
    pub choice: CompactChoice,
    /// The compacted model is being written.
    pub saving: bool,
    /// The file the compacted model was last written to (offered for opening).
    pub saved: Option<PathBuf>,
}

/// The running job as the status bar shows it.
#[derive(Debug, Clone, Default)]
pub struct Task {
    /// What runs now, empty when idle.
    pub title: String,
    /// Fraction done.
    pub fraction: f32,
}

/// What the app is doing: the running job, the file being opened, and the request
/// counters that tell a fresh reply from a stale one.
#[derive(Debug, Default)]
pub struct RunState {
    /// The running job.
    pub task: Task,
    /// The input box given for the model being opened (empty: the model's own).
    pub input_box: crate::model::InputBox,
    /// The box editor's text (low, high) while it is open.
    pub box_edit: Option<(String, String)>,
    /// What is being opened, for the status bar.
    pub opening: Option<String>,
    /// Number of the latest open-model request; replies to older ones are ignored.
    pub open_request: u64,
    /// The model file of the latest open request (to offer "open again" after an error).
    pub last_open_path: Option<PathBuf>,
    /// The last probe id handed out (probe ids are handed out at request time).
    pub last_probe: u64,
    /// Open the demo's probe file once the demo model is in.
    pub demo_probe_pending: bool,
    /// Why the reference data being opened (or in use) was chosen without being asked for.
    pub reference_origin: Option<ReferenceOrigin>,
    /// Work was cancelled and is not complete.
    pub stopped: bool,
    /// Longest frame (time spent in `ui`) while work was running.
    pub longest_busy_frame: Duration,
    /// The layer whose tiles are on screen and those units (set by the grid every frame),
    /// so their preferred inputs are searched first.
    pub visible: Option<(usize, Vec<usize>)>,
}

impl RunState {
    /// A fresh probe id.
    pub fn new_probe_id(&mut self) -> u64 {
        self.last_probe += 1;
        self.last_probe
    }
}

/// An error from opening a model or probe file, as the app shows it.
#[derive(Debug, Clone)]
pub struct OpenError {
    /// The error's message.
    pub text: String,
    /// The model names a side file outside its folder: the user may agree and open again.
    pub outside: bool,
}

impl OpenError {
    /// The app's view of `e`.
    pub fn new(e: &crate::Error) -> Self {
        OpenError {
            text: e.to_string(),
            outside: matches!(e, crate::Error::OutsidePath { .. }),
        }
    }
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
    /// Results for the current model and probe, keyed by their identity.
    pub results: Results,
    /// What runs now and what is being opened.
    pub run: RunState,
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
    pub open_error: Option<OpenError>,
    /// Allow side-file paths outside the model's folder.
    pub allow_outside_paths: bool,
    /// Which units the table and the tile wall list (not remembered between runs, so a
    /// fresh start never hides units).
    pub status_filter: StatusFilter,
    /// The unit order of the grid, recomputed when its inputs change.
    pub order_cache: Option<(OrderKey, Arc<Vec<usize>>)>,
    /// Pruning fraction chosen for "Save pruned model".
    pub prune_fraction: f64,
    /// The probe row whose feature maps the convolution detail shows.
    pub conv_sample: usize,
    /// The probe row chosen for the attribution map, and the unit it was chosen for (see
    /// [`Self::attribution_row`]).
    pub attribution_choice: Option<(Selection, usize)>,
    /// How the pruning view ranks units for the unit-removal curves.
    pub unit_criterion: Criterion,
    /// The Compact window.
    pub compact: CompactView,
    /// The open training run (a series of checkpoints) and its timeline.
    pub training: TrainingRun,
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
    /// Highest first.
    pub descending: bool,
    /// Status filter.
    pub filter: StatusFilter,
    /// Which results were present (screen, stats, bounds, activity, preferred count), so
    /// the order updates as results arrive.
    pub have: (bool, bool, bool, bool, usize),
}

impl AppState {
    /// A fresh state with the given preferences and nothing open.
    pub fn new(prefs: Prefs, allow_outside_paths: bool) -> Self {
        AppState {
            model: None,
            probe: None,
            results: Results::default(),
            run: RunState::default(),
            selection: None,
            history: Vec::new(),
            prefs,
            view: MainView::default(),
            notice: None,
            open_error: None,
            allow_outside_paths,
            status_filter: StatusFilter::All,
            order_cache: None,
            prune_fraction: 0.5,
            conv_sample: 0,
            attribution_choice: None,
            unit_criterion: Criterion::L1,
            compact: CompactView::default(),
            training: TrainingRun::default(),
        }
    }

    /// The probe row the attribution map of `sel` uses: the one chosen in the detail panel
    /// for that unit, else the sample that drives the unit hardest (once the probe is
    /// traced). The panel and the PNG export both read it here.
    pub fn attribution_row(&self, sel: Selection) -> Option<usize> {
        if let Some((s, row)) = self.attribution_choice
            && s == sel
        {
            return Some(row);
        }
        self.results
            .activity
            .as_ref()
            .and_then(|a| a.layers.get(sel.layer))
            .and_then(|l| l.get(sel.unit))
            .and_then(|u| u.top.first())
            .map(|t| t.0)
    }

    /// Identity of the current model and probe (the key of [`Self::results`]).
    pub fn tag(&self) -> Tag {
        self.results.tag()
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
    pub fn preferred_of(&self, layer: usize, unit: usize) -> Option<&Preferred> {
        self.results
            .preferred
            .get(&layer)
            .and_then(|p| p.maps.get(unit))
            .and_then(|m| m.as_ref())
    }

    /// The value of column `key` for a unit, from the results already computed (the
    /// table shows it, the table and the tile wall sort by it); `None` while it is not
    /// there or where it does not apply, and for NaN. Hidden layers take their numbers
    /// from screening; the output layer, which screening does not cover, takes its upper
    /// bound from the interval bounds and its largest activation from the probe's
    /// activity.
    pub fn unit_value(&self, layer: usize, unit: usize, key: SortKey) -> Option<f64> {
        let screen = self.screen_of(layer, unit);
        let stats = self.stats_of(layer, unit);
        let v = match key {
            SortKey::Index => Some(unit as f64),
            SortKey::Status => screen.map(|s| f64::from(status_rank(s.status))),
            SortKey::Activity => screen.map(|s| s.active_frac),
            SortKey::UpperBound => screen.map(|s| s.upper_bound).or_else(|| {
                let net = self.net()?;
                let bounds = self.results.bounds.as_ref()?;
                (layer + 1 == net.layers().len()).then(|| bounds.unit_upper(net, layer, unit))
            }),
            SortKey::Mean => screen.map(|s| s.mean),
            SortKey::Max => screen.map(|s| s.max).or_else(|| {
                let net = self.net()?;
                let a = self
                    .results
                    .activity
                    .as_ref()?
                    .layers
                    .get(layer)?
                    .get(unit)?;
                (layer + 1 == net.layers().len() && a.hi.is_finite()).then_some(f64::from(a.hi))
            }),
            SortKey::Sparsity => stats.map(|s| s.hoyer),
            SortKey::NearZero => stats.map(|s| s.near_zero_frac),
            SortKey::Preactivation => self
                .preferred_of(layer, unit)
                .filter(|p| p.finite)
                .map(|p| f64::from(p.preactivation)),
        };
        v.filter(|x| !x.is_nan())
    }

    /// Sorts the units by column `key`: a new column starts in its first direction, the
    /// current one turns around.
    pub fn sort_by(&mut self, key: SortKey) {
        if self.prefs.sort == key {
            self.prefs.sort_descending = !self.prefs.sort_descending;
        } else {
            self.prefs.sort = key;
            self.prefs.sort_descending = key.first_descending();
        }
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
        let n = net.layers().get(layer).map_or(0, |l| l.units());
        let pref_count = self
            .results
            .preferred
            .get(&layer)
            .map_or(0, |p| p.maps.iter().filter(|m| m.is_some()).count());
        let key = OrderKey {
            tag: self.tag(),
            layer,
            sort: self.prefs.sort,
            descending: self.prefs.sort_descending,
            filter: self.status_filter,
            have: (
                self.results.screen.is_ready(),
                self.results.stats.is_ready(),
                self.results.bounds.is_ready(),
                self.results.activity.is_ready(),
                pref_count,
            ),
        };
        if let Some((k, order)) = &self.order_cache
            && *k == key
        {
            return order.clone();
        }
        let mut units: Vec<usize> = (0..n).collect();
        if self.status_filter != StatusFilter::All {
            units.retain(|&u| {
                self.status_filter
                    .keeps(self.screen_of(layer, u).map(|s| s.status))
            });
        }
        // Sorting is stable, so ties keep index order; missing values (and NaN) sort last
        // in either direction.
        let sort = self.prefs.sort;
        let mut keyed: Vec<(Option<f64>, usize)> = units
            .iter()
            .map(|&u| (self.unit_value(layer, u, sort), u))
            .collect();
        let descending = self.prefs.sort_descending;
        keyed.sort_by(|(a, _), (b, _)| match (a, b) {
            (Some(a), Some(b)) if descending => b.total_cmp(a),
            (Some(a), Some(b)) => a.total_cmp(b),
            (Some(_), None) => std::cmp::Ordering::Less,
            (None, Some(_)) => std::cmp::Ordering::Greater,
            (None, None) => std::cmp::Ordering::Equal,
        });
        let units: Vec<usize> = keyed.into_iter().map(|(_, u)| u).collect();
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

/// Where a status sorts in the table's status column: the problems a screen looks for
/// first, healthy units last.
pub fn status_rank(status: Status) -> u8 {
    match status {
        Status::NonFinite => 0,
        Status::DeadProven => 1,
        Status::DeadOnProbe => 2,
        Status::RarelyActive => 3,
        Status::Saturated => 4,
        Status::AlwaysActive => 5,
        Status::Ok => 6,
    }
}

/// A short name for a status (the table's filter menu and status column).
pub fn status_short(status: Status) -> &'static str {
    match status {
        Status::DeadProven => "dead (proven)",
        Status::DeadOnProbe => "dead on the data",
        Status::RarelyActive => "rarely active",
        Status::AlwaysActive => "always active",
        Status::Saturated => "saturated",
        Status::Ok => "healthy",
        Status::NonFinite => "non-finite",
    }
}

/// The class label of an output unit, when the model names its classes (`None` for
/// hidden layers and unlabelled outputs).
pub fn class_label(net: &Network, layer: usize, unit: usize) -> Option<&str> {
    if layer + 1 != net.layers().len() {
        return None;
    }
    net.layer(layer)
        .labels
        .as_ref()?
        .get(unit)
        .map(String::as_str)
}

/// Plain words for a status, as shown in the app.
pub fn status_words(status: Status) -> &'static str {
    match status {
        Status::DeadProven => "dead (proven over the whole input box)",
        Status::DeadOnProbe => "dead on the reference data",
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
    fn reference_data_is_remembered_per_model_and_found_beside_it() {
        let dir = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
        let write = |name: &str| {
            let p = dir.path().join(name);
            std::fs::write(&p, "x\n").unwrap_or_else(|e| panic!("{e}"));
            p
        };
        let model = write("net.json");
        let other = write("other.json");
        let mut prefs = Prefs::default();
        assert_eq!(prefs.reference_to_open(&model), None);
        // A file named after the model, beside it.
        let beside = write("net-reference.npy");
        assert_eq!(
            prefs.reference_to_open(&model),
            Some((beside.clone(), ReferenceOrigin::BesideModel))
        );
        // A file used with the model is opened again, before the one beside it, and only
        // for that model (the key is the canonical path: a second name of the same file
        // finds it too).
        let data = write("my-data.csv");
        prefs.remember_reference(&model, Some(&data));
        let canonical = std::fs::canonicalize(&data).unwrap_or_else(|e| panic!("{e}"));
        let again = dir.path().join(".").join("net.json");
        assert_eq!(
            prefs.reference_to_open(&again),
            Some((canonical, ReferenceOrigin::Remembered))
        );
        assert_eq!(prefs.reference_to_open(&other), None);
        // The memory survives a round trip through the saved preferences.
        let text = serde_json::to_string(&prefs).unwrap_or_else(|e| panic!("{e}"));
        let back: Prefs = serde_json::from_str(&text).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(back.reference_for, prefs.reference_for);
        // A remembered file that is gone falls back to the one beside the model; choosing
        // uniform samples forgets the model's entry.
        std::fs::remove_file(&data).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(
            prefs.reference_to_open(&model),
            Some((beside.clone(), ReferenceOrigin::BesideModel))
        );
        prefs.remember_reference(&model, None);
        assert!(prefs.reference_for.is_empty());
    }

    #[test]
    fn preferences_from_an_older_file_fall_back_to_defaults() {
        // A saved file from an earlier version: one known field, one that no longer exists.
        let p: Prefs = serde_json::from_str(r#"{"tile_size": 96.0, "retired_option": 3}"#).unwrap();
        assert_eq!(p.tile_size, 96.0);
        assert_eq!(p.sort, SortKey::Index);
        assert_eq!(p.search, PreferOptions::default());
        assert!(p.recent_models.is_empty());
    }

    #[test]
    fn search_options_saved_by_an_older_version_still_load() {
        // Older versions saved four fields and no seed; the seed takes the core's default.
        let p: Prefs = serde_json::from_str(
            r#"{"search": {"steps": 50, "restarts": 3, "l2": 0.5, "tv": 0.0}}"#,
        )
        .unwrap();
        let want = PreferOptions::new(50, 3, PreferOptions::default().seed(), 0.5, 0.0).unwrap();
        assert_eq!(p.search, want);
        // And what is saved now loads back the same.
        let text = serde_json::to_string(&p).unwrap();
        let back: Prefs = serde_json::from_str(&text).unwrap();
        assert_eq!(back.search, want);
    }

    /// A 2-3-2 relu network with screening rows for its hidden layer: unit 0 non-finite
    /// (NaN mean), unit 1 healthy, unit 2 dead on the probe.
    fn screened_state() -> AppState {
        use crate::analysis::screen::ScreenReport;
        use crate::model::{Activation, BoxOrigin, BoxSource, InputSpec, Layer, LayerKind};
        let layer = |name: &str, units: usize, inputs: usize| Layer {
            kind: LayerKind::Dense,
            name: name.into(),
            activation: Activation::Relu,
            weights: ndarray::Array2::zeros((units, inputs)),
            bias: ndarray::Array1::zeros(units),
            labels: None,
        };
        let input = InputSpec {
            units: None,
            size: 2,
            layout: crate::model::Layout::Vector,
            low: vec![0.0; 2],
            high: vec![1.0; 2],
            names: None,
        };
        let layers = vec![layer("h", 3, 2), layer("out", 2, 3)];
        let net = Network::new("test", "t", input, layers).unwrap();
        let row = |unit: usize, mean: f64, status: Status| UnitScreen {
            layer: "h".into(),
            layer_index: 0,
            unit,
            activation: "relu",
            active_frac: 0.5,
            mean,
            max: 1.0,
            upper_bound: 1.0,
            status,
        };
        let report = ScreenReport {
            units: vec![
                row(0, f64::NAN, Status::NonFinite),
                row(1, 0.5, Status::Ok),
                row(2, 0.2, Status::DeadOnProbe),
            ],
            samples: 10,
            probe: "test".into(),
        };
        let mut state = AppState::new(Prefs::default(), false);
        state.results.screen = Slot::Ready(Arc::new(ScreenResult::new(&net, report)));
        state.model = Some(OpenModel {
            net: Arc::new(net),
            origin: "test".into(),
            path: None,
            box_origin: BoxOrigin {
                low: BoxSource::ModelFile,
                high: BoxSource::ModelFile,
            },
        });
        state
    }

    #[test]
    fn missing_values_sort_last_in_both_directions() {
        let mut state = screened_state();
        state.sort_by(SortKey::Mean);
        assert!(
            !state.prefs.sort_descending,
            "mean sorts lowest first at first"
        );
        assert_eq!(*state.order(0), vec![2, 1, 0], "NaN mean last");
        state.sort_by(SortKey::Mean);
        assert_eq!(*state.order(0), vec![1, 2, 0], "NaN mean still last");
        // The output layer is not screened: no mean, so index order both ways.
        assert_eq!(*state.order(1), vec![0, 1]);
        // Status: problems first (non-finite, then dead on the probe), healthy last.
        state.sort_by(SortKey::Status);
        assert_eq!(*state.order(0), vec![0, 2, 1]);
    }

    #[test]
    fn the_status_filter_keeps_what_it_names() {
        let mut state = screened_state();
        state.status_filter = StatusFilter::Only(Status::DeadOnProbe);
        assert_eq!(*state.order(0), vec![2]);
        state.status_filter = StatusFilter::Problems;
        assert_eq!(*state.order(0), vec![0, 2]);
        state.status_filter = StatusFilter::Only(Status::Ok);
        assert_eq!(*state.order(0), vec![1]);
        // Unscreened units (the output layer) pass only "all units".
        assert!(state.order(1).is_empty());
        state.status_filter = StatusFilter::All;
        assert_eq!(*state.order(1), vec![0, 1]);
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

/// An open training run: its checkpoints, the one the unit view shows, and the timeline
/// computed over all of them on the probe in use. Replies carry the run's `id`; a reply
/// for an earlier run (or an earlier probe) is dropped.
#[derive(Debug, Default)]
pub struct TrainingRun {
    /// Request number of the run (0: none opened yet).
    pub id: u64,
    /// What is being listed, while the series is read.
    pub opening: Option<String>,
    /// The checkpoints, in training order, once listed.
    pub series: Option<Arc<crate::model::series::Series>>,
    /// The checkpoint the slider points at.
    pub current: usize,
    /// The checkpoint whose network is the open model (`None` while another model is open).
    pub shown: Option<usize>,
    /// The checkpoint being read for the unit view.
    pub loading: Option<usize>,
    /// The timeline over every checkpoint.
    pub timeline: Slot<Arc<crate::analysis::timeline::Timeline>>,
    /// The probe the timeline is (being) computed on.
    pub analysed_on: Option<Arc<ProbeData>>,
    /// Fraction of the timeline done, in thousandths (written by the worker).
    pub progress: Arc<std::sync::atomic::AtomicU32>,
    /// Set to stop the timeline's analysis.
    pub cancel: Arc<std::sync::atomic::AtomicBool>,
    /// The analysis was stopped before it finished ("Analyse again" restarts it).
    pub stopped: bool,
}

impl TrainingRun {
    /// True when a run is open (listed or being listed).
    pub fn is_open(&self) -> bool {
        self.series.is_some() || self.opening.is_some()
    }

    /// The key (step, or position) of checkpoint `i`, when listed.
    pub fn key(&self, i: usize) -> Option<u64> {
        self.series
            .as_ref()
            .filter(|s| i < s.len())
            .map(|s| s.key(i))
    }
}
