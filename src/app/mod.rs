//! The desktop app: open a model, browse its units, click one to see what it responds to.
//!
//! [`ReceptorApp`] owns the [`state::AppState`] and a [`worker::Worker`]; every frame it
//! drains the worker's replies, asks for what the visible panels need, and draws the panels
//! (one file each). Nothing heavy runs inside a frame: analysis runs on the worker thread,
//! files are opened and exports written on helper threads.

pub mod colour;
pub mod detail;
pub mod export;
pub mod layers;
pub mod maps;
pub mod sparsity;
pub mod state;
pub mod statusbar;
pub mod thumbs;
pub mod units;
pub mod worker;

pub use export::ExportKind;

use crate::model::LoadOptions;
use state::{AppState, MainView, MapView, OpenModel, Prefs, Selection, Tag};
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Arc;
use std::time::{Duration, Instant};
use worker::{Job, ModelSource, ProbeChoice, Reply, Worker};

/// The bundled demo model, compiled in so `receptor` with no argument always has a model.
const DEMO_JSON: &str = include_str!("../../demo-models/solder-joints.json");
/// How the demo model is named in messages.
pub const DEMO_ORIGIN: &str = "demo-models/solder-joints.json (bundled demo)";
/// The demo's labelled probe, used when the source tree is at hand (the pruning curve needs
/// labels); otherwise the uniform probe is used.
const DEMO_PROBE: &str = concat!(
    env!("CARGO_MANIFEST_DIR"),
    "/demo-models/solder-joints-probe.csv"
);

/// Opens the window and runs until it is closed. `model` is opened at start (the bundled
/// demo when `None`). Returns 0 on a normal close, 2 when no window could be opened.
pub fn run(model: Option<PathBuf>, allow_outside_paths: bool) -> ExitCode {
    let options = eframe::NativeOptions {
        viewport: egui::ViewportBuilder::default()
            .with_title("receptor")
            .with_inner_size([1280.0, 800.0])
            .with_min_inner_size([720.0, 480.0])
            .with_drag_and_drop(true),
        persist_window: true,
        ..Default::default()
    };
    let start = Start {
        model,
        allow_outside_paths,
    };
    let result = eframe::run_native(
        "receptor",
        options,
        Box::new(move |cc| Ok(Box::new(ReceptorApp::new(cc, start)))),
    );
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("receptor: cannot open the window: {e}");
            ExitCode::from(2)
        }
    }
}

/// What the app opens when it starts.
#[derive(Debug, Clone, Default)]
pub struct Start {
    /// A model file, or `None` for the bundled demo.
    pub model: Option<PathBuf>,
    /// Allow side-file paths outside the model's folder.
    pub allow_outside_paths: bool,
}

/// What a file dialog was opened for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Pick {
    /// A model to open.
    Model,
    /// Probe data to open.
    Probe,
    /// Where to save an export.
    Export(ExportKind),
}

/// Requests the panels make; the app carries them out after drawing.
#[derive(Debug, Clone, PartialEq)]
pub enum Action {
    /// Show the open-model dialog.
    OpenModelDialog,
    /// Open this model file.
    OpenModel(PathBuf),
    /// Show the open-probe dialog.
    OpenProbeDialog,
    /// Open this probe file.
    OpenProbe(PathBuf),
    /// Switch to the uniform probe.
    UniformProbe,
    /// Reopen the bundled demo.
    OpenDemo,
    /// Show a save dialog for an export.
    ExportDialog(ExportKind),
    /// Search preferred inputs of a layer again with the current settings.
    Recompute(usize),
    /// Stop the running work.
    Cancel,
    /// Queue again whatever a cancel left unfinished.
    RunAgain,
    /// Show the keyboard and marks help.
    Help,
    /// Leave the app.
    Quit,
}

/// The running job as the status bar shows it.
#[derive(Debug, Clone, Default)]
pub struct Task {
    /// What runs now, empty when idle.
    pub title: String,
    /// Fraction done.
    pub fraction: f32,
}

/// The app: state, worker, texture cache and panels.
pub struct ReceptorApp {
    state: AppState,
    worker: Worker,
    thumbs: thumbs::Thumbs,
    units: units::UnitsPanel,
    detail: detail::DetailPanel,
    sparsity: sparsity::SparsityPanel,
    task: Task,
    /// Number of the latest open-model request; replies to older ones are ignored.
    open_request: u64,
    /// What is being opened, for the status bar.
    opening: Option<String>,
    /// The model file of the latest open request (to offer "open again" after an error).
    last_open_path: Option<PathBuf>,
    /// The shown open error is a side file outside the model's folder (offer to allow it).
    open_error_outside: bool,
    /// Next probe id (probe ids are handed out at request time).
    next_probe: u64,
    /// Open the demo's probe file once the demo model is in.
    demo_probe_pending: bool,
    dialog_open: bool,
    show_help: bool,
    /// Work was cancelled and is not complete.
    stopped: bool,
    /// Longest frame (time spent in `ui`) while work was running.
    longest_busy_frame: Duration,
    actions: Vec<Action>,
}

impl ReceptorApp {
    /// Builds the app: restores preferences, starts the worker and opens the start model.
    pub fn new(cc: &eframe::CreationContext<'_>, start: Start) -> Self {
        let prefs: Prefs = cc
            .storage
            .and_then(|s| eframe::get_value(s, eframe::APP_KEY))
            .unwrap_or_default();
        let worker = Worker::start(cc.egui_ctx.clone());
        let mut app = ReceptorApp {
            state: AppState::new(prefs, start.allow_outside_paths),
            worker,
            thumbs: thumbs::Thumbs::default(),
            units: units::UnitsPanel::default(),
            detail: detail::DetailPanel::default(),
            sparsity: sparsity::SparsityPanel::default(),
            task: Task::default(),
            open_request: 0,
            opening: None,
            last_open_path: None,
            open_error_outside: false,
            next_probe: 0,
            demo_probe_pending: false,
            dialog_open: false,
            show_help: false,
            stopped: false,
            longest_busy_frame: Duration::ZERO,
            actions: Vec::new(),
        };
        if let Some(e) = app.worker.spawn_error() {
            let e = e.to_string();
            app.state.fail(e);
        }
        match start.model {
            Some(p) => app.open_model(&p),
            None => app.open_demo(),
        }
        app
    }

    /// Opens a model file in the background. When it fails, the error is shown and the
    /// model that was open stays open.
    pub fn open_model(&mut self, path: &Path) {
        self.open_request += 1;
        self.opening = Some(path.display().to_string());
        self.last_open_path = Some(path.to_path_buf());
        self.demo_probe_pending = false;
        self.worker.open_model(
            self.open_request,
            ModelSource::File(path.to_path_buf()),
            self.load_options(),
        );
    }

    /// Opens the bundled demo model (and its labelled probe when available).
    pub fn open_demo(&mut self) {
        self.open_request += 1;
        self.opening = Some(DEMO_ORIGIN.to_string());
        self.demo_probe_pending = Path::new(DEMO_PROBE).is_file();
        self.worker.open_model(
            self.open_request,
            ModelSource::Text {
                text: Arc::from(DEMO_JSON),
                origin: DEMO_ORIGIN.to_string(),
            },
            self.load_options(),
        );
    }

    /// Opens probe data for the open model in the background. When it fails, the error is
    /// shown and the probe in use stays.
    pub fn open_probe(&mut self, path: &Path) {
        self.request_probe(ProbeChoice::File(path.to_path_buf()));
    }

    /// Switches to the default uniform probe.
    pub fn use_uniform_probe(&mut self) {
        self.request_probe(ProbeChoice::Uniform);
    }

    /// Writes an export to `path` on a helper thread; the status bar confirms the path (or
    /// shows the error). This is what the save dialog calls, and what tests call directly.
    pub fn export_to(&mut self, kind: ExportKind, path: PathBuf) {
        let map = detail::current_map(&self.state);
        match export::prepare(kind, &self.state, map) {
            Ok(data) => {
                self.worker
                    .spawn_helper("receptor-export", move || Reply::Exported {
                        result: export::write(&data, &path).map(|()| path),
                    });
            }
            Err(e) => self.state.fail(e.to_string()),
        }
    }

    /// True while a file is being opened or analysis work is queued or running.
    pub fn is_busy(&self) -> bool {
        self.opening.is_some() || self.worker.pending() > 0
    }

    /// What the worker is doing now ("" when idle), as the status bar shows it.
    pub fn current_task(&self) -> &str {
        &self.task.title
    }

    /// The app's state (for tests and tools).
    pub fn state(&self) -> &AppState {
        &self.state
    }

    /// The app's state, mutable (for tests: select a unit, change a preference).
    pub fn state_mut(&mut self) -> &mut AppState {
        &mut self.state
    }

    /// Longest time spent drawing one frame while background work was running.
    pub fn longest_busy_frame(&self) -> Duration {
        self.longest_busy_frame
    }

    fn load_options(&self) -> LoadOptions {
        LoadOptions {
            allow_outside_paths: self.state.allow_outside_paths,
        }
    }

    fn request_probe(&mut self, choice: ProbeChoice) {
        let Some(net) = self.state.net().cloned() else {
            self.state.fail("open a model before opening probe data");
            return;
        };
        self.next_probe += 1;
        let tag = Tag {
            model: self.state.tag.model,
            probe: self.next_probe,
        };
        self.worker.submit(Job::LoadProbe(choice), net, tag);
    }

    fn install_model(&mut self, net: crate::model::Network, origin: String, path: Option<PathBuf>) {
        // Old work is for the old model: stop it, and its late replies carry the old tag.
        self.worker.cancel_all();
        self.stopped = false;
        self.state.tag.model += 1;
        self.next_probe += 1;
        self.state.tag.probe = self.next_probe;
        self.state.results = state::Results::default();
        self.state.probe = None;
        self.state.order_cache = None;
        self.thumbs.clear();
        self.detail.reset();
        let net = Arc::new(net);
        if let Some(p) = &path {
            Prefs::remember(&mut self.state.prefs.recent_models, p);
        }
        let first = net.layers.iter().position(|l| l.units() > 0).unwrap_or(0);
        self.state.selection = Some(Selection {
            layer: first,
            unit: 0,
        });
        self.state.history.clear();
        self.state.confirm(format!(
            "Opened {origin}: {} layers, {} parameters",
            net.layers.len(),
            net.parameter_count()
        ));
        self.state.model = Some(OpenModel {
            net: net.clone(),
            origin,
            path,
        });
        self.state.open_error = None;
        let tag = self.state.tag;
        self.worker.submit(Job::Model, net.clone(), tag);
        let choice = if self.demo_probe_pending {
            ProbeChoice::File(PathBuf::from(DEMO_PROBE))
        } else {
            ProbeChoice::Uniform
        };
        self.demo_probe_pending = false;
        self.worker.submit(Job::LoadProbe(choice), net, tag);
    }

    fn handle_reply(&mut self, reply: Reply) {
        let tag = self.state.tag;
        match reply {
            Reply::Started { tag: t, title } => {
                if t.model == tag.model {
                    self.task = Task {
                        title,
                        fraction: 0.0,
                    };
                }
            }
            Reply::Progress { tag: t, fraction } => {
                if t.model == tag.model {
                    self.task.fraction = fraction;
                }
            }
            Reply::Finished { .. } => {
                if self.worker.pending() == 0 {
                    self.task = Task::default();
                }
            }
            Reply::ModelOpened { request, result } => {
                if request != self.open_request {
                    return; // superseded by a later open
                }
                self.opening = None;
                match result {
                    Ok((net, origin, path)) => self.install_model(net, origin, path),
                    Err(e) => {
                        self.open_error_outside = matches!(e, crate::Error::OutsidePath { .. });
                        let text = e.to_string();
                        self.state.open_error = Some(text.clone());
                        let keep = if self.state.model.is_some() {
                            " (the open model stays open)"
                        } else {
                            ""
                        };
                        self.state.fail(format!("{text}{keep}"));
                    }
                }
            }
            Reply::Model {
                tag: t,
                stats,
                bounds,
            } => {
                if t.model == tag.model {
                    self.state.results.stats = Some(stats);
                    self.state.results.bounds = Some(bounds);
                }
            }
            Reply::ProbeLoaded { tag: t, result } => {
                if t.model != tag.model || t.probe < tag.probe {
                    return;
                }
                match result {
                    Ok(probe) => {
                        if let Some(p) = &probe.path
                            && p != Path::new(DEMO_PROBE)
                        {
                            Prefs::remember(&mut self.state.prefs.recent_probes, p);
                        }
                        let rows = probe.data.inputs.nrows();
                        let origin = probe.data.origin.clone();
                        let changed = self.state.probe.is_some();
                        self.state.tag.probe = t.probe;
                        let r = &mut self.state.results;
                        r.screen = None;
                        r.activity = None;
                        r.sensitivity.clear();
                        r.sensitivity_requested.clear();
                        r.sweep = None;
                        r.sweep_requested = false;
                        self.state.order_cache = None;
                        self.thumbs.clear_probe();
                        let data = probe.data.clone();
                        self.state.probe = Some(probe);
                        if changed {
                            self.state
                                .confirm(format!("Using probe {origin} ({rows} samples)"));
                        }
                        if let Some(net) = self.state.net().cloned() {
                            self.worker.submit(Job::Probe(data), net, self.state.tag);
                        }
                    }
                    Err(e) => {
                        self.open_error_outside = false;
                        let text = e.to_string();
                        self.state.open_error = Some(text.clone());
                        self.state.fail(format!("{text} (the probe in use stays)"));
                        if self.state.probe.is_none()
                            && let Some(net) = self.state.net().cloned()
                        {
                            // The model needs some probe: fall back to the uniform one.
                            self.next_probe += 1;
                            let t = Tag {
                                model: tag.model,
                                probe: self.next_probe,
                            };
                            self.worker
                                .submit(Job::LoadProbe(ProbeChoice::Uniform), net, t);
                        }
                    }
                }
            }
            Reply::Probe {
                tag: t,
                screen,
                activity,
            } => {
                if t != tag {
                    return;
                }
                match screen {
                    Ok(s) => self.state.results.screen = Some(s),
                    Err(e) => self.state.fail(format!("screening failed: {e}")),
                }
                match activity {
                    Ok(a) => self.state.results.activity = Some(a),
                    Err(e) => self.state.fail(format!("tracing activations failed: {e}")),
                }
            }
            Reply::Prefer {
                tag: t,
                layer,
                settings,
                result,
            } => {
                if t.model != tag.model {
                    return;
                }
                let Some(lp) = self.state.results.preferred.get_mut(&layer) else {
                    return;
                };
                if lp.settings != settings {
                    return;
                }
                lp.pending = lp.pending.saturating_sub(1);
                match result {
                    Ok(found) => {
                        for (u, m) in found {
                            if let Some(slot) = lp.maps.get_mut(u) {
                                *slot = Some(m);
                            }
                        }
                    }
                    Err(e) => self
                        .state
                        .fail(format!("preferred-input search failed: {e}")),
                }
            }
            Reply::Sensitivity {
                tag: t,
                layer,
                result,
            } => {
                if t != tag {
                    return;
                }
                match result {
                    Ok(g) => {
                        self.state.results.sensitivity.insert(layer, g);
                    }
                    Err(e) => self.state.fail(format!("sensitivity failed: {e}")),
                }
            }
            Reply::Sweep { tag: t, result } => {
                if t != tag {
                    return;
                }
                match result {
                    Ok(points) => self.state.results.sweep = Some(points),
                    Err(e) => self.state.fail(format!("pruning sweep failed: {e}")),
                }
            }
            Reply::Exported { result } => match result {
                Ok(p) => self.state.confirm(format!("Saved {}", p.display())),
                Err(e) => self.state.fail(e.to_string()),
            },
            Reply::Picked { purpose, path } => {
                self.dialog_open = false;
                if let Some(p) = path {
                    match purpose {
                        Pick::Model => self.open_model(&p),
                        Pick::Probe => self.open_probe(&p),
                        Pick::Export(kind) => self.export_to(kind, p),
                    }
                }
            }
        }
    }

    /// Queues the work the visible panels need and that is not yet asked for.
    fn request_needed(&mut self) {
        if self.stopped {
            return;
        }
        let Some(net) = self.state.net().cloned() else {
            return;
        };
        let tag = self.state.tag;
        let layer = self.state.current_layer();
        if layer < net.layers.len() && !self.state.results.preferred.contains_key(&layer) {
            self.queue_prefer(&net, layer, None);
        }
        if self.state.prefs.map_view == MapView::Sensitivity
            && let Some(p) = &self.state.probe
            && !self.state.results.sensitivity_requested.contains(&layer)
        {
            let mean = p.mean.clone();
            self.state.results.sensitivity_requested.insert(layer);
            self.worker
                .submit(Job::Sensitivity { layer, mean }, net.clone(), tag);
        }
        if self.state.view == MainView::Sparsity
            && let Some(p) = &self.state.probe
            && p.labelled()
            && !self.state.results.sweep_requested
        {
            let data = p.data.clone();
            self.state.results.sweep_requested = true;
            self.worker.submit(Job::Sweep(data), net, tag);
        }
    }

    /// Queues preferred-input batches for `layer` (all units, or only `missing` ones).
    fn queue_prefer(
        &mut self,
        net: &Arc<crate::model::Network>,
        layer: usize,
        missing: Option<Vec<usize>>,
    ) {
        let n = net.layers[layer].units();
        let settings = self.state.prefs.search;
        let units = missing.unwrap_or_else(|| (0..n).collect());
        let entry = self
            .state
            .results
            .preferred
            .entry(layer)
            .or_insert_with(|| state::LayerPreferred {
                settings,
                maps: vec![None; n],
                pending: 0,
            });
        // Small batches first so the first tiles appear soon on a large layer, then full
        // batches (each batch is still one batched call of the core's search).
        let mut at = 0;
        let mut size = worker::PREFER_BATCH / 8;
        while at < units.len() {
            let end = (at + size).min(units.len());
            entry.pending += 1;
            self.worker.submit(
                Job::Prefer {
                    layer,
                    units: units[at..end].to_vec(),
                    settings,
                },
                net.clone(),
                self.state.tag,
            );
            at = end;
            size = (size * 2).min(worker::PREFER_BATCH);
        }
    }

    fn perform(&mut self, action: Action, ctx: &egui::Context) {
        match action {
            Action::OpenModelDialog => self.pick(Pick::Model),
            Action::OpenModel(p) => self.open_model(&p),
            Action::OpenProbeDialog => self.pick(Pick::Probe),
            Action::OpenProbe(p) => self.open_probe(&p),
            Action::UniformProbe => self.use_uniform_probe(),
            Action::OpenDemo => self.open_demo(),
            Action::ExportDialog(kind) => self.pick(Pick::Export(kind)),
            Action::Recompute(layer) => {
                if let Some(net) = self.state.net().cloned() {
                    self.state.results.preferred.remove(&layer);
                    self.thumbs.clear_layer(layer);
                    self.stopped = false;
                    self.queue_prefer(&net, layer, None);
                }
            }
            Action::Cancel => {
                self.worker.cancel_all();
                for lp in self.state.results.preferred.values_mut() {
                    lp.pending = 0;
                }
                self.stopped = true;
                self.state
                    .confirm("Stopped. Use \"Run again\" to finish the analysis.");
            }
            Action::RunAgain => self.run_again(),
            Action::Help => self.show_help = true,
            Action::Quit => ctx.send_viewport_cmd(egui::ViewportCommand::Close),
        }
    }

    /// After a cancel: queue again what is missing.
    fn run_again(&mut self) {
        self.stopped = false;
        let Some(net) = self.state.net().cloned() else {
            return;
        };
        let tag = self.state.tag;
        if self.state.results.stats.is_none() {
            self.worker.submit(Job::Model, net.clone(), tag);
        }
        match &self.state.probe {
            None => self.request_probe(ProbeChoice::Uniform),
            Some(p) => {
                if self.state.results.screen.is_none() || self.state.results.activity.is_none() {
                    self.worker
                        .submit(Job::Probe(p.data.clone()), net.clone(), tag);
                }
            }
        }
        let layers: Vec<(usize, Vec<usize>)> = self
            .state
            .results
            .preferred
            .iter()
            .map(|(l, lp)| {
                (
                    *l,
                    lp.maps
                        .iter()
                        .enumerate()
                        .filter(|(_, m)| m.is_none())
                        .map(|(u, _)| u)
                        .collect(),
                )
            })
            .filter(|(_, m): &(usize, Vec<usize>)| !m.is_empty())
            .collect();
        for (l, missing) in layers {
            self.queue_prefer(&net, l, Some(missing));
        }
        self.state
            .results
            .sensitivity_requested
            .retain(|l| self.state.results.sensitivity.contains_key(l));
        if self.state.results.sweep.is_none() {
            self.state.results.sweep_requested = false;
        }
    }

    /// Opens a native file dialog on a helper thread (the frame loop keeps running).
    fn pick(&mut self, purpose: Pick) {
        if self.dialog_open {
            return;
        }
        self.dialog_open = true;
        let start_dir = match purpose {
            Pick::Model => self
                .state
                .prefs
                .recent_models
                .first()
                .and_then(|p| p.parent().map(Path::to_path_buf)),
            Pick::Probe => self
                .state
                .prefs
                .recent_probes
                .first()
                .and_then(|p| p.parent().map(Path::to_path_buf))
                .or_else(|| {
                    self.state
                        .model
                        .as_ref()
                        .and_then(|m| m.path.as_ref())
                        .and_then(|p| p.parent().map(Path::to_path_buf))
                }),
            Pick::Export(_) => None,
        };
        let file_name = match purpose {
            Pick::Export(kind) => Some(export::default_file_name(kind, &self.state)),
            _ => None,
        };
        self.worker.spawn_helper("receptor-dialog", move || {
            let mut d = rfd::FileDialog::new();
            if let Some(dir) = start_dir {
                d = d.set_directory(dir);
            }
            let path = match purpose {
                Pick::Model => d
                    .set_title("Open a model")
                    .add_filter("receptor model (JSON)", &["json"])
                    .pick_file(),
                Pick::Probe => d
                    .set_title("Open probe data")
                    .add_filter("probe data (CSV, NumPy)", &["csv", "npy"])
                    .pick_file(),
                Pick::Export(kind) => {
                    let (name, exts) = kind.filter();
                    d.set_title(kind.label())
                        .set_file_name(file_name.unwrap_or_default())
                        .add_filter(name, exts)
                        .save_file()
                }
            };
            Reply::Picked { purpose, path }
        });
    }

    fn shortcuts(&mut self, ctx: &egui::Context) {
        use egui::{Key, KeyboardShortcut, Modifiers};
        let open = KeyboardShortcut::new(Modifiers::COMMAND, Key::O);
        let probe = KeyboardShortcut::new(Modifiers::COMMAND, Key::P);
        let stats = KeyboardShortcut::new(Modifiers::COMMAND, Key::E);
        let quit = KeyboardShortcut::new(Modifiers::COMMAND, Key::Q);
        ctx.input_mut(|i| {
            if i.consume_shortcut(&open) {
                self.actions.push(Action::OpenModelDialog);
            }
            if i.consume_shortcut(&probe) {
                self.actions.push(Action::OpenProbeDialog);
            }
            if i.consume_shortcut(&stats) {
                self.actions
                    .push(Action::ExportDialog(ExportKind::StatsCsv));
            }
            if i.consume_shortcut(&quit) {
                self.actions.push(Action::Quit);
            }
            if i.consume_key(Modifiers::NONE, Key::F1) {
                self.actions.push(Action::Help);
            }
        });
        // Single-key shortcuts only when no text field or slider has the keyboard.
        if ctx.memory(|m| m.focused().is_some()) {
            return;
        }
        let n_layers = self.state.net().map_or(0, |n| n.layers.len());
        ctx.input_mut(|i| {
            if i.consume_key(Modifiers::NONE, Key::Escape) && self.worker.pending() > 0 {
                self.actions.push(Action::Cancel);
            }
            for (key, view) in [
                (Key::W, MapView::Weights),
                (Key::P, MapView::Preferred),
                (Key::S, MapView::Sensitivity),
            ] {
                if i.consume_key(Modifiers::NONE, key) {
                    self.state.prefs.map_view = view;
                }
            }
            if i.consume_key(Modifiers::NONE, Key::Tab) {
                self.state.view = match self.state.view {
                    MainView::Units => MainView::Sparsity,
                    MainView::Sparsity => MainView::Units,
                };
            }
            let sel = self.state.selection;
            if let Some(s) = sel {
                if i.consume_key(Modifiers::NONE, Key::PageDown) && s.layer + 1 < n_layers {
                    self.state.select(
                        Selection {
                            layer: s.layer + 1,
                            unit: 0,
                        },
                        false,
                    );
                }
                if i.consume_key(Modifiers::NONE, Key::PageUp) && s.layer > 0 {
                    self.state.select(
                        Selection {
                            layer: s.layer - 1,
                            unit: 0,
                        },
                        false,
                    );
                }
                if i.consume_key(Modifiers::NONE, Key::Backspace)
                    && let Some(prev) = self.state.history.pop()
                {
                    self.state.selection = Some(prev);
                }
            }
        });
    }

    fn dropped_files(&mut self, ctx: &egui::Context) {
        let dropped: Vec<PathBuf> = ctx.input(|i| {
            i.raw
                .dropped_files
                .iter()
                .map(|f| f.path().to_path_buf())
                .collect()
        });
        for p in dropped {
            let ext = p
                .extension()
                .and_then(|e| e.to_str())
                .map(str::to_ascii_lowercase);
            match ext.as_deref() {
                Some("csv") | Some("npy") => self.actions.push(Action::OpenProbe(p)),
                _ => self.actions.push(Action::OpenModel(p)),
            }
        }
    }

    fn menu_ui(&mut self, ui: &mut egui::Ui) {
        let ctx = ui.ctx().clone();
        let sc = |k: egui::Key| {
            ctx.format_shortcut(&egui::KeyboardShortcut::new(egui::Modifiers::COMMAND, k))
        };
        egui::MenuBar::new().ui(ui, |ui| {
            ui.menu_button("File", |ui| {
                if ui
                    .add(egui::Button::new("Open model…").shortcut_text(sc(egui::Key::O)))
                    .clicked()
                {
                    self.actions.push(Action::OpenModelDialog);
                }
                recent_menu(
                    ui,
                    "Recent models",
                    &self.state.prefs.recent_models,
                    &mut self.actions,
                    Action::OpenModel,
                );
                if ui.button("Open the demo model").clicked() {
                    self.actions.push(Action::OpenDemo);
                }
                ui.separator();
                if ui
                    .add(egui::Button::new("Open probe data…").shortcut_text(sc(egui::Key::P)))
                    .clicked()
                {
                    self.actions.push(Action::OpenProbeDialog);
                }
                recent_menu(
                    ui,
                    "Recent probe data",
                    &self.state.prefs.recent_probes,
                    &mut self.actions,
                    Action::OpenProbe,
                );
                if ui.button("Use the uniform probe").clicked() {
                    self.actions.push(Action::UniformProbe);
                }
                ui.separator();
                ui.menu_button("Export", |ui| {
                    for kind in ExportKind::ALL {
                        let b = egui::Button::new(kind.label());
                        let b = if kind == ExportKind::StatsCsv {
                            b.shortcut_text(sc(egui::Key::E))
                        } else {
                            b
                        };
                        if ui
                            .add_enabled(export::available(kind, &self.state), b)
                            .clicked()
                        {
                            self.actions.push(Action::ExportDialog(kind));
                        }
                    }
                });
                ui.separator();
                if ui
                    .add(egui::Button::new("Quit").shortcut_text(sc(egui::Key::Q)))
                    .clicked()
                {
                    self.actions.push(Action::Quit);
                }
            });
            ui.menu_button("View", |ui| {
                ui.selectable_value(&mut self.state.view, MainView::Units, "Units");
                ui.selectable_value(
                    &mut self.state.view,
                    MainView::Sparsity,
                    "Sparsity and pruning",
                );
                ui.separator();
                for mode in colour::ScaleMode::ALL {
                    ui.radio_value(&mut self.state.prefs.scale, mode, mode.label());
                }
            });
            ui.menu_button("Help", |ui| {
                if ui
                    .add(egui::Button::new("Keys and marks").shortcut_text("F1"))
                    .clicked()
                {
                    self.actions.push(Action::Help);
                }
            });
            ui.separator();
            if let Some(m) = &self.state.model {
                ui.label(egui::RichText::new(&m.net.name).strong());
                ui.weak(&m.origin);
            }
        });
    }

    fn help_ui(&mut self, ctx: &egui::Context) {
        let mut open = self.show_help;
        egui::Window::new("Keys and marks")
            .open(&mut open)
            .collapsible(false)
            .resizable(false)
            .show(ctx, |ui| {
                egui::Grid::new("keys")
                    .num_columns(2)
                    .striped(true)
                    .show(ui, |ui| {
                        for (k, what) in [
                            ("Arrow keys", "move the selection in the grid"),
                            ("Home / End", "first / last unit of the grid"),
                            ("Page Up / Page Down", "layer above / below"),
                            ("Backspace", "back to the unit you walked down from"),
                            (
                                "W / P / S",
                                "detail map: weights / preferred input / sensitivity",
                            ),
                            ("Tab", "switch between Units and Sparsity"),
                            ("Esc", "stop the running analysis"),
                            ("Ctrl+O / Ctrl+P", "open a model / probe data"),
                            ("Ctrl+E", "export sparsity statistics (CSV)"),
                        ] {
                            ui.strong(k);
                            ui.label(what);
                            ui.end_row();
                        }
                    });
                ui.separator();
                ui.strong("Marks on unit tiles");
                units::marks_legend_ui(ui, true);
                ui.separator();
                ui.weak(format!(
                    "Longest frame while analysis ran: {:.1} ms",
                    self.longest_busy_frame.as_secs_f64() * 1000.0
                ));
            });
        self.show_help = open;
    }
}

impl eframe::App for ReceptorApp {
    fn logic(&mut self, ctx: &egui::Context, _frame: &mut eframe::Frame) {
        for reply in self.worker.drain() {
            self.handle_reply(reply);
        }
        self.shortcuts(ctx);
        self.dropped_files(ctx);
        for a in std::mem::take(&mut self.actions) {
            self.perform(a, ctx);
        }
        self.request_needed();
    }

    fn ui(&mut self, ui: &mut egui::Ui, _frame: &mut eframe::Frame) {
        let started = Instant::now();
        let ctx = ui.ctx().clone();
        self.thumbs.begin_frame();
        egui::Panel::top("menu").show(ui, |ui| self.menu_ui(ui));
        egui::Panel::bottom("status").show(ui, |ui| {
            statusbar::ui(
                ui,
                &self.state,
                &self.task,
                self.worker.pending(),
                self.opening.as_deref(),
                self.stopped,
                &mut self.actions,
            );
        });
        egui::Panel::left("layers")
            .resizable(true)
            .default_size(270.0)
            .size_range(220.0..=380.0)
            .show(ui, |ui| layers::ui(ui, &mut self.state, &mut self.actions));
        if self.state.model.is_some() && self.state.view == MainView::Units {
            egui::Panel::right("detail")
                .resizable(true)
                .default_size(400.0)
                .size_range(320.0..=560.0)
                .show(ui, |ui| {
                    self.detail
                        .ui(ui, &mut self.state, &mut self.thumbs, &mut self.actions);
                });
        }
        egui::CentralPanel::default().show(ui, |ui| {
            if let Some(err) = self.state.open_error.clone() {
                let colour = ui.visuals().error_fg_color;
                egui::Frame::group(ui.style()).stroke(egui::Stroke::new(1.0, colour)).show(ui, |ui| {
                    ui.horizontal(|ui| {
                        ui.colored_label(colour, egui::RichText::new("Could not open the file").strong());
                        if ui.small_button("Dismiss").clicked() {
                            self.state.open_error = None;
                        }
                    });
                    ui.colored_label(colour, &err);
                    // The importer refuses side files outside the model's folder unless the
                    // user agrees; here the user can agree for this session.
                    if self.open_error_outside
                        && !self.state.allow_outside_paths
                        && let Some(path) = self.last_open_path.clone()
                        && ui
                            .button("Allow side files outside the model's folder and open again")
                            .clicked()
                    {
                        self.state.allow_outside_paths = true;
                        self.state.open_error = None;
                        self.open_model(&path);
                    }
                    if self.state.model.is_some() {
                        ui.weak("The model that was open stays open.");
                    }
                });
                ui.add_space(4.0);
            }
            if self.state.model.is_none() {
                ui.centered_and_justified(|ui| {
                    if self.opening.is_some() {
                        ui.spinner();
                    } else {
                        ui.label("Open a model with File → Open model… (Ctrl+O), or drop a model file here.");
                    }
                });
                return;
            }
            ui.horizontal(|ui| {
                ui.selectable_value(&mut self.state.view, MainView::Units, "Units");
                ui.selectable_value(&mut self.state.view, MainView::Sparsity, "Sparsity and pruning");
            });
            ui.separator();
            match self.state.view {
                MainView::Units => self.units.ui(ui, &mut self.state, &mut self.thumbs, &mut self.actions),
                MainView::Sparsity => self.sparsity.ui(ui, &mut self.state, &mut self.actions),
            }
        });
        if self.show_help {
            self.help_ui(&ctx);
        }
        if ctx.input(|i| !i.raw.hovered_files.is_empty()) {
            let painter = ctx.layer_painter(egui::LayerId::new(
                egui::Order::Foreground,
                egui::Id::unique("receptor-drop"),
            ));
            let rect = ctx.content_rect();
            painter.rect_filled(rect, 0.0, egui::Color32::from_black_alpha(160));
            painter.text(
                rect.center(),
                egui::Align2::CENTER_CENTER,
                "Drop a model (.json) or probe data (.csv, .npy)",
                egui::TextStyle::Heading.resolve(&ctx.global_style()),
                egui::Color32::WHITE,
            );
        }
        if self.thumbs.deferred() {
            ctx.request_repaint();
        }
        // Frames while analysis runs on the open model (the first frames, which build the
        // font atlas while the model is read, are not what a user browsing sees).
        if self.worker.pending() > 0 && self.state.model.is_some() {
            self.longest_busy_frame = self.longest_busy_frame.max(started.elapsed());
        }
    }

    fn save(&mut self, storage: &mut dyn eframe::Storage) {
        eframe::set_value(storage, eframe::APP_KEY, &self.state.prefs);
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
