//! What the app asks the worker for and what it does with each reply. Requests mark their
//! slot in the results cache as pending; replies are stored only when they carry the
//! cache's model (and, for probe results, probe) identity, so a late reply for a model
//! that is no longer open is dropped.

use super::state::{
    ActivityResult, AttributionKey, CompactChoice, Criterion, LayerPreferred, MainView, MapView,
    OpenError, OpenModel, OpenProbe, Prefs, Results, ScreenResult, Selection, Slot, Tag, Task,
    UnitCurves,
};
use super::worker::{self, Job, ProbeChoice, Reply};
use super::{DEMO_PROBE, Pick, ReceptorApp};
use crate::analysis::compact::CheckedCompaction;
use crate::analysis::prefer::{PreferOptions, Preferred, Reference};
use crate::error::Result;
use crate::model::{BoxOrigin, Network};
use crate::probe::ProbeData;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// Preferred-input batches of one layer queued or running at once (one runs while the
/// next waits, so the worker never idles and a scroll reorders all later batches).
const PREFER_IN_FLIGHT: usize = 2;

impl ReceptorApp {
    /// Hands a reply to its handler.
    pub(super) fn handle_reply(&mut self, reply: Reply) {
        match reply {
            Reply::Started { tag, title } => self.on_started(tag, title),
            Reply::Progress { tag, fraction } => self.on_progress(tag, fraction),
            Reply::Finished { .. } => self.on_finished(),
            Reply::ModelOpened { request, result } => self.on_model_opened(request, result),
            Reply::Model { tag, stats, bounds } => {
                if self.state.results.is_model(tag) {
                    self.state.results.stats = Slot::Ready(stats);
                    self.state.results.bounds = Slot::Ready(bounds);
                }
            }
            Reply::ProbeLoaded { tag, result } => self.on_probe_loaded(tag, result),
            Reply::Probe {
                tag,
                screen,
                activity,
            } => self.on_probe_results(tag, screen, activity),
            Reply::Prefer {
                tag,
                layer,
                settings,
                result,
            } => self.on_preferred(tag, layer, &settings, result),
            Reply::Sensitivity { tag, layer, result } => {
                if self.state.results.is_current(tag) {
                    let slot = self.state.results.sensitivity.entry(layer).or_default();
                    let failed = slot.settle(result, "sensitivity");
                    self.notify_failure(failed);
                }
            }
            Reply::Attribute { tag, key, result } => {
                if self.state.results.is_current(tag) {
                    let slot = self.state.results.attribution.entry(key).or_default();
                    let failed = slot.settle(result, "attribution");
                    self.notify_failure(failed);
                }
            }
            Reply::Sweep { tag, result } => {
                if self.state.results.is_current(tag) {
                    let failed = self.state.results.sweep.settle(result, "pruning sweep");
                    self.notify_failure(failed);
                }
            }
            Reply::Conv { tag, reply } => self.on_conv_reply(tag, reply),
            Reply::UnitCurves {
                tag,
                criterion,
                result,
            } => self.on_unit_curves(tag, criterion, result),
            Reply::Compact {
                tag,
                choice,
                result,
            } => self.on_compact(tag, choice, result),
            Reply::CompactSaved { result } => self.on_compact_saved(result),
            Reply::Exported { result } => match result {
                Ok(p) => self.state.confirm(format!("Saved {}", p.display())),
                Err(e) => self.state.fail(e.to_string()),
            },
            Reply::Picked { purpose, path } => self.on_picked(purpose, path),
            Reply::Timeline(reply) => self.on_timeline_reply(reply),
        }
    }

    /// Shows a failure message in the status bar, when there is one.
    fn notify_failure(&mut self, failure: Option<String>) {
        if let Some(text) = failure {
            self.state.fail(text);
        }
    }

    fn on_started(&mut self, tag: Tag, title: String) {
        if self.state.results.is_model(tag) {
            self.state.run.task = Task {
                title,
                fraction: 0.0,
            };
        }
    }

    fn on_progress(&mut self, tag: Tag, fraction: f32) {
        if self.state.results.is_model(tag) {
            self.state.run.task.fraction = fraction;
        }
    }

    fn on_finished(&mut self) {
        if self.worker.pending() == 0 {
            self.state.run.task = Task::default();
        }
    }

    fn on_model_opened(
        &mut self,
        request: u64,
        result: Result<(Network, String, Option<PathBuf>, BoxOrigin)>,
    ) {
        if request != self.state.run.open_request {
            return; // superseded by a later open
        }
        self.state.run.opening = None;
        match result {
            Ok((net, origin, path, box_origin)) => {
                self.install_model(net, origin, path, box_origin);
            }
            Err(e) => {
                let err = OpenError::new(&e);
                let text = err.text.clone();
                self.state.open_error = Some(err);
                let keep = if self.state.model.is_some() {
                    " (the open model stays open)"
                } else {
                    ""
                };
                self.state.fail(format!("{text}{keep}"));
            }
        }
    }

    fn on_probe_loaded(&mut self, tag: Tag, result: Result<OpenProbe>) {
        let current = self.state.tag();
        if tag.model != current.model || tag.probe < current.probe {
            return;
        }
        match result {
            Ok(probe) => self.install_probe(tag, probe),
            Err(e) => {
                let err = OpenError::new(&e);
                let text = err.text.clone();
                self.state.open_error = Some(err);
                self.state
                    .fail(format!("{text} (the reference data in use stays)"));
                if self.state.probe.is_none() {
                    // The model needs some probe: fall back to the uniform one.
                    self.request_probe(ProbeChoice::Uniform);
                }
            }
        }
    }

    /// Makes `probe` the probe in use: drops the results on the old probe and starts
    /// screening and tracing on the new one.
    fn install_probe(&mut self, tag: Tag, probe: OpenProbe) {
        if let Some(p) = &probe.path
            && p != Path::new(DEMO_PROBE)
        {
            Prefs::remember(&mut self.state.prefs.recent_probes, p);
        }
        if let Some(model) = self.state.model.as_ref().and_then(|m| m.path.clone()) {
            let reference = probe
                .path
                .as_deref()
                .filter(|p| *p != Path::new(DEMO_PROBE));
            self.state.prefs.remember_reference(&model, reference);
        }
        let rows = probe.data.inputs.nrows();
        let origin = probe.data.origin.clone();
        let changed = self.state.probe.is_some();
        self.state.results.change_probe(tag.probe);
        self.state.order_cache = None;
        self.thumbs.clear_probe();
        let data = probe.data.clone();
        if let Some(e) = &probe.reference_error {
            self.state
                .fail(format!("no data prior for the preferred inputs: {e}"));
        }
        self.state.probe = Some(probe);
        if changed {
            self.state
                .confirm(format!("Using reference data {origin} ({rows} samples)"));
        }
        // A reply that was on its way when the user pressed Cancel keeps its data but starts
        // nothing: "Run again" screens on it (see `run_again`).
        if !self.state.run.stopped {
            self.submit_probe_job(data);
        }
    }

    fn on_probe_results(
        &mut self,
        tag: Tag,
        screen: Result<Arc<ScreenResult>>,
        activity: Result<Arc<ActivityResult>>,
    ) {
        if !self.state.results.is_current(tag) {
            return;
        }
        let r = &mut self.state.results;
        let screen_failed = r.screen.settle(screen, "screening");
        let trace_failed = r.activity.settle(activity, "tracing activations");
        self.notify_failure(screen_failed);
        self.notify_failure(trace_failed);
    }

    fn on_preferred(
        &mut self,
        tag: Tag,
        layer: usize,
        settings: &PreferOptions,
        result: Result<Vec<Preferred>>,
    ) {
        if !self.state.results.is_model(tag) {
            return;
        }
        let current_probe = self.state.results.tag().probe;
        let Some(lp) = self.state.results.preferred.get_mut(&layer) else {
            return;
        };
        if lp.settings != *settings {
            return;
        }
        if tag.probe != current_probe && lp.data.is_some() {
            return; // searched with an older probe's data
        }
        lp.pending = lp.pending.saturating_sub(1);
        match result {
            Ok(found) => {
                for p in found {
                    if settings.facets() > 1 {
                        lp.facets.entry(p.unit).or_default().push(p.clone());
                    }
                    if p.facet == 0
                        && let Some(slot) = lp.maps.get_mut(p.unit)
                    {
                        *slot = Some(p);
                    }
                }
            }
            Err(e) => {
                lp.queue.clear();
                self.state
                    .fail(format!("preferred-input search failed: {e}"));
            }
        }
        self.feed_prefer(layer);
    }

    fn on_picked(&mut self, purpose: Pick, path: Option<PathBuf>) {
        self.dialog_open = false;
        if let Some(p) = path {
            match purpose {
                Pick::Model => self.open_model(&p),
                Pick::Probe => self.open_probe(&p),
                Pick::Export(kind) => self.export_to(kind, p),
                Pick::CompactedModel => self.save_compacted_to(p),
                Pick::Run => self.open_run(vec![p]),
            }
        }
    }

    /// Makes `net` the open model: stops the old model's work (its late replies carry the
    /// old identity and are dropped), starts a fresh results cache, and queues the
    /// statistics and the probe.
    pub(super) fn install_model(
        &mut self,
        net: Network,
        origin: String,
        path: Option<PathBuf>,
        box_origin: BoxOrigin,
    ) {
        self.install_model_keeping(net, origin, path, box_origin, None);
    }

    /// [`Self::install_model`], keeping `keep`'s probe and selected unit instead of
    /// opening the default probe (a checkpoint of the open training run); such a file is
    /// not added to the recent models.
    pub(super) fn install_model_keeping(
        &mut self,
        net: Network,
        origin: String,
        path: Option<PathBuf>,
        box_origin: BoxOrigin,
        keep: Option<(OpenProbe, Option<Selection>)>,
    ) {
        if keep.is_none() {
            // Another model: the training run's slider no longer points at the open model.
            self.state.training.shown = None;
        }
        self.worker.cancel_all();
        self.state.run.stopped = false;
        let tag = Tag {
            model: self.state.tag().model + 1,
            probe: self.state.run.new_probe_id(),
        };
        self.state.results = Results::new(tag);
        self.state.probe = None;
        self.state.order_cache = None;
        self.thumbs.clear();
        self.state.attribution_choice = None;
        let net = Arc::new(net);
        if let Some(p) = &path
            && keep.is_none()
        {
            Prefs::remember(&mut self.state.prefs.recent_models, p);
        }
        let first = net.layers().iter().position(|l| l.units() > 0).unwrap_or(0);
        let kept = keep
            .as_ref()
            .and_then(|(_, s)| *s)
            .filter(|s| s.layer < net.layers().len() && s.unit < net.layer(s.layer).units());
        self.state.selection = Some(kept.unwrap_or(Selection {
            layer: first,
            unit: 0,
        }));
        self.state.history.clear();
        let opened = format!(
            "Opened {origin}: {} layers, {} parameters",
            net.layers().len(),
            net.parameter_count()
        );
        if box_origin.uses_default() {
            self.state
                .fail(format!("{opened}; {}", box_origin.default_notice()));
        } else {
            self.state.confirm(opened);
        }
        self.state.run.box_edit = None;
        self.state.model = Some(OpenModel {
            net: net.clone(),
            origin,
            path,
            box_origin,
        });
        self.state.open_error = None;
        self.submit_model_job(net.clone());
        if let Some((probe, _)) = keep {
            let tag = self.state.tag();
            self.install_probe(tag, probe);
            return;
        }
        let auto = self
            .state
            .model
            .as_ref()
            .and_then(|m| m.path.as_deref())
            .and_then(|p| self.state.prefs.reference_to_open(p));
        self.state.run.reference_origin = None;
        let choice = if std::mem::take(&mut self.state.run.demo_probe_pending) {
            ProbeChoice::File(PathBuf::from(DEMO_PROBE))
        } else if let Some((p, origin)) = auto {
            self.state.run.reference_origin = Some(origin);
            ProbeChoice::File(p)
        } else {
            ProbeChoice::Uniform
        };
        self.worker.submit(Job::LoadProbe(choice), net, tag);
    }

    /// Queues reading a probe for the open model under a fresh probe id.
    pub(super) fn request_probe(&mut self, choice: ProbeChoice) {
        // Asked for by the user (or at start): not chosen automatically.
        self.state.run.reference_origin = None;
        let Some(net) = self.state.net().cloned() else {
            self.state
                .fail("open a model before opening reference data");
            return;
        };
        let tag = Tag {
            model: self.state.tag().model,
            probe: self.state.run.new_probe_id(),
        };
        self.worker.submit(Job::LoadProbe(choice), net, tag);
    }

    /// Queues statistics and bounds of the open model.
    fn submit_model_job(&mut self, net: Arc<Network>) {
        self.state.results.stats.request();
        self.state.results.bounds.request();
        self.worker.submit(Job::Model, net, self.state.tag());
    }

    /// Queues screening and tracing of `data`, the probe in use.
    fn submit_probe_job(&mut self, data: Arc<ProbeData>) {
        let Some(net) = self.state.net().cloned() else {
            return;
        };
        self.state.results.screen.request();
        self.state.results.activity.request();
        self.worker.submit(Job::Probe(data), net, self.state.tag());
    }

    /// Queues the work the visible panels need and that is not yet asked for.
    pub(super) fn request_needed(&mut self) {
        if self.state.run.stopped {
            return;
        }
        let Some(net) = self.state.net().cloned() else {
            return;
        };
        let tag = self.state.tag();
        let layer = self.state.current_layer();
        self.request_conv(&net, tag);
        if layer < net.layers().len() && self.state.probe.is_some() {
            let data = self.search_data().map(|_| tag.probe);
            let stale = self
                .state
                .results
                .preferred
                .get(&layer)
                .is_some_and(|lp| lp.data != data);
            if stale {
                self.state.results.preferred.remove(&layer);
                self.thumbs.clear_layer(layer);
            }
            if !self.state.results.preferred.contains_key(&layer) {
                self.queue_prefer(&net, layer, None);
            }
            self.feed_prefer(layer);
        }
        let attribution = self.attribution_key();
        let results = &mut self.state.results;
        if self.state.prefs.map_view == MapView::Sensitivity
            && let Some(p) = &self.state.probe
            && results.sensitivity_of(layer).is_none_or(|s| s.is_empty())
        {
            results.sensitivity.entry(layer).or_default().request();
            let mean = p.mean.clone();
            self.worker
                .submit(Job::Sensitivity { layer, mean }, net.clone(), tag);
        }
        if self.state.prefs.map_view == MapView::Attribution
            && let Some(key) = attribution
            && let Some(p) = &self.state.probe
            && results.attribution.get(&key).is_none_or(Slot::is_empty)
            && key.row < p.data.inputs.nrows()
        {
            results.attribution.entry(key).or_default().request();
            let sample = Arc::new(p.data.inputs.row(key.row).to_vec());
            let baseline = Arc::new(if key.from_mean {
                p.mean.to_vec()
            } else {
                net.input().centre()
            });
            let job = Job::Attribute {
                key,
                sample,
                baseline,
            };
            self.worker.submit(job, net.clone(), tag);
        }
        if self.state.view == MainView::Sparsity
            && let Some(p) = &self.state.probe
            && p.labelled()
            && results.sweep.is_empty()
        {
            results.sweep.request();
            self.worker
                .submit(Job::Sweep(p.data.clone()), net.clone(), tag);
        }
        self.request_pruning_work(&net);
    }

    /// The reference data the preferred-input search uses now: the probe file's, when the
    /// data prior is on and the probe came from a file.
    pub(super) fn search_data(&self) -> Option<Arc<Reference>> {
        if !self.state.prefs.use_prior {
            return None;
        }
        self.state.probe.as_ref().and_then(|p| p.reference.clone())
    }

    /// The attribution the detail panel shows: the selected unit for the probe row chosen
    /// there (the unit's hardest-driving sample until one is chosen).
    pub(super) fn attribution_key(&self) -> Option<AttributionKey> {
        let sel = self.state.selection?;
        let row = self.state.attribution_row(sel)?;
        Some(AttributionKey {
            layer: sel.layer,
            unit: sel.unit,
            row,
            from_mean: self.state.prefs.attribution_from_mean,
        })
    }

    /// Marks `layer`'s preferred inputs as wanted (all units, or only `missing` ones); the
    /// batches are handed to the worker by [`Self::feed_prefer`].
    pub(super) fn queue_prefer(
        &mut self,
        net: &Arc<Network>,
        layer: usize,
        missing: Option<Vec<usize>>,
    ) {
        let n = net.layers()[layer].units();
        let settings = self.state.prefs.search.clone();
        let data = self.search_data().map(|_| self.state.tag().probe);
        let units = missing.unwrap_or_else(|| (0..n).collect());
        let entry = self
            .state
            .results
            .preferred
            .entry(layer)
            .or_insert_with(|| LayerPreferred {
                settings: settings.clone(),
                data,
                maps: vec![None; n],
                facets: std::collections::HashMap::new(),
                pending: 0,
                queue: std::collections::VecDeque::new(),
                next_batch: worker::PREFER_BATCH / 8,
            });
        entry.queue.extend(units);
        self.feed_prefer(layer);
    }

    /// Hands `layer`'s next preferred-input batches to the worker, keeping at most
    /// [`PREFER_IN_FLIGHT`] queued or running, so that the units on screen when a batch is
    /// made go first (each batch is still one batched call of the core's search). Batches
    /// start small so the first tiles appear soon, then double up to the full size.
    pub(super) fn feed_prefer(&mut self, layer: usize) {
        let Some(net) = self.state.net().cloned() else {
            return;
        };
        if self.state.run.stopped {
            return;
        }
        let tag = self.state.tag();
        let reference = self.search_data();
        let visible: Vec<usize> = match &self.state.run.visible {
            Some((l, units)) if *l == layer => units.clone(),
            _ => Vec::new(),
        };
        let Some(lp) = self.state.results.preferred.get_mut(&layer) else {
            return;
        };
        let reference = if lp.data.is_some() { reference } else { None };
        while lp.pending < PREFER_IN_FLIGHT && !lp.queue.is_empty() {
            let size = lp.next_batch;
            let mut units = Vec::with_capacity(size);
            for u in &visible {
                if units.len() == size {
                    break;
                }
                if let Some(at) = lp.queue.iter().position(|q| q == u) {
                    lp.queue.remove(at);
                    units.push(*u);
                }
            }
            while units.len() < size {
                let Some(u) = lp.queue.pop_front() else {
                    break;
                };
                units.push(u);
            }
            lp.pending += 1;
            lp.next_batch = (size * 2).min(worker::PREFER_BATCH);
            let job = Job::Prefer {
                layer,
                units,
                settings: lp.settings.clone(),
                reference: reference.clone(),
            };
            self.worker.submit(job, net.clone(), tag);
        }
    }

    /// Stops the running work; "Run again" finishes it later.
    pub(super) fn cancel(&mut self) {
        self.worker.cancel_all();
        self.state.results.cancel_pending();
        self.state.run.stopped = true;
        self.state
            .confirm("Stopped. Use \"Run again\" to finish the analysis.");
    }

    /// After a cancel: queue again what is missing (what the panels need on screen is
    /// asked for again by [`Self::request_needed`]).
    pub(super) fn run_again(&mut self) {
        self.state.run.stopped = false;
        let Some(net) = self.state.net().cloned() else {
            return;
        };
        self.state.results.forget_unfinished();
        if self.state.results.stats.is_empty() {
            self.submit_model_job(net.clone());
        }
        match &self.state.probe {
            None => self.request_probe(ProbeChoice::Uniform),
            Some(p) => {
                let r = &self.state.results;
                if r.screen.is_empty() || r.activity.is_empty() {
                    let data = p.data.clone();
                    self.submit_probe_job(data);
                }
            }
        }
        for (layer, missing) in missing_preferred(&self.state.results) {
            self.queue_prefer(&net, layer, Some(missing));
        }
    }
}

/// The units of each layer whose preferred input is missing, for layers with any missing.
fn missing_preferred(results: &Results) -> Vec<(usize, Vec<usize>)> {
    results
        .preferred
        .iter()
        .map(|(l, lp)| {
            let missing = lp
                .maps
                .iter()
                .enumerate()
                .filter(|(_, m)| m.is_none())
                .map(|(u, _)| u)
                .collect();
            (*l, missing)
        })
        .filter(|(_, m): &(usize, Vec<usize>)| !m.is_empty())
        .collect()
}

/// The unit-removal curves and the Compact window's compaction: their requests and replies.
impl ReceptorApp {
    /// Queues the unit-removal curves of the chosen criterion when the pruning view shows
    /// them (labelled probe), and the compaction of the Compact window's choice while the
    /// window is open.
    fn request_pruning_work(&mut self, net: &Arc<Network>) {
        let tag = self.state.tag();
        let Some(p) = &self.state.probe else {
            return;
        };
        let criterion = self.state.unit_criterion;
        let results = &mut self.state.results;
        if self.state.view == MainView::Sparsity
            && p.labelled()
            && results
                .unit_curves_of(criterion)
                .is_none_or(|s| s.is_empty())
        {
            results.unit_curves.entry(criterion).or_default().request();
            let data = p.data.clone();
            self.worker
                .submit(Job::UnitCurves { data, criterion }, net.clone(), tag);
        }
        let choice = self.state.compact.choice;
        if self.state.compact.open && results.compact_of(choice).is_none_or(|s| s.is_empty()) {
            results.compact.entry(choice).or_default().request();
            let job = Job::Compact {
                data: p.data.clone(),
                choice,
                check_box: p.path.is_some(),
            };
            self.worker.submit(job, net.clone(), tag);
        }
    }

    fn on_unit_curves(&mut self, tag: Tag, criterion: Criterion, result: Result<Arc<UnitCurves>>) {
        if self.state.results.is_current(tag) {
            let slot = self.state.results.unit_curves.entry(criterion).or_default();
            let failed = slot.settle(result, "unit-removal sweep");
            self.notify_failure(failed);
        }
    }

    fn on_compact(
        &mut self,
        tag: Tag,
        choice: CompactChoice,
        result: Result<Arc<CheckedCompaction>>,
    ) {
        if self.state.results.is_current(tag) {
            let slot = self.state.results.compact.entry(choice).or_default();
            let failed = slot.settle(result, "compaction");
            self.notify_failure(failed);
        }
    }

    fn on_compact_saved(&mut self, result: Result<PathBuf>) {
        self.state.compact.saving = false;
        match result {
            Ok(p) => {
                self.state.confirm(format!("Saved {}", p.display()));
                self.state.compact.saved = Some(p);
            }
            Err(e) => self.state.fail(e.to_string()),
        }
    }
}
