//! The desktop app: open a model, browse its units, click one to see what it responds to.
//!
//! [`ReceptorApp`] owns the [`state::AppState`] and a [`worker::Worker`]; every frame it
//! drains the worker's replies, asks for what the visible panels need, and draws the panels
//! (one file each). Nothing heavy runs inside a frame: analysis runs on the worker thread,
//! files are opened and exports written on helper threads.

pub mod colour;
pub mod compact;
pub mod conv;
pub mod conv_jobs;
pub mod detail;
pub mod export;
pub mod feature_chart;
mod jobs;
pub mod layers;
pub mod maps;
pub mod menu;
pub mod sparsity;
pub mod state;
pub mod statusbar;
pub mod table;
pub mod thumbs;
pub mod timeline;
pub mod timeline_jobs;
pub mod units;
pub mod worker;

pub use export::ExportKind;

use crate::model::{InputBox, LoadOptions};
use state::{AppState, MainView, MapView, Prefs, Selection};
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Arc;
use std::time::{Duration, Instant};
use worker::{ModelSource, ProbeChoice, Reply, Worker};

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

/// Opens the window and runs until it is closed. `start` says what to open first (the
/// bundled demo when it names no model). Returns 0 on a normal close, 2 when no window
/// could be opened.
pub fn run(start: Start) -> ExitCode {
    let options = eframe::NativeOptions {
        viewport: egui::ViewportBuilder::default()
            .with_title("receptor")
            .with_inner_size([1280.0, 800.0])
            .with_min_inner_size([720.0, 480.0])
            .with_drag_and_drop(true),
        persist_window: true,
        ..Default::default()
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
    /// A model file, a training run's folder, or `None` for the bundled demo.
    pub model: Option<PathBuf>,
    /// Probe data to open once the model is in (`None`: the uniform probe, or the demo's
    /// own probe for the demo).
    pub probe: Option<PathBuf>,
    /// Allow side-file paths outside the model's folder.
    pub allow_outside_paths: bool,
    /// The input box given for `model` (command-line `--low`/`--high`).
    pub input_box: InputBox,
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
    /// Where to save the compacted model.
    CompactedModel,
    /// A training run's folder to open.
    Run,
}

/// Requests the panels make; the app carries them out after drawing.
#[derive(Debug, Clone, PartialEq)]
pub enum Action {
    /// Show the open-model dialog.
    OpenModelDialog,
    /// Open this model file.
    OpenModel(PathBuf),
    /// Open the current model file again with this input box (the model summary's box
    /// editor).
    ReopenWithBox(InputBox),
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
    /// Show the Compact model window.
    CompactWindow,
    /// Show the save dialog for the compacted model.
    SaveCompactedDialog,
    /// Show the keyboard and marks help.
    Help,
    /// Leave the app.
    Quit,
    /// Show the open-training-run (folder) dialog.
    OpenRunDialog,
    /// Open a training run: one folder, or several model files.
    OpenRun(Vec<PathBuf>),
    /// Show this checkpoint of the open run in the unit view.
    ScrubTo(usize),
    /// Stop the timeline's analysis.
    StopRunAnalysis,
    /// Compute the timeline again after a stop.
    AnalyseRunAgain,
    /// Close the training run.
    CloseRun,
}

/// The app: state, worker, texture cache and panels.
pub struct ReceptorApp {
    state: AppState,
    worker: Worker,
    thumbs: thumbs::Thumbs,
    units: units::UnitsPanel,
    detail: detail::DetailPanel,
    sparsity: sparsity::SparsityPanel,
    /// A file dialog is open (only one at a time).
    dialog_open: bool,
    /// The keys-and-marks window is open.
    show_help: bool,
    /// What the panels asked for this frame.
    actions: Vec<Action>,
    /// Probe data given at start, opened once the start model is in.
    start_probe: Option<PathBuf>,
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
            dialog_open: false,
            show_help: false,
            actions: Vec::new(),
            start_probe: start.probe,
        };
        if let Some(e) = app.worker.spawn_error() {
            let e = e.to_string();
            app.state.fail(e);
        }
        match start.model {
            Some(p) if p.is_dir() => app.open_run(vec![p]),
            Some(p) => app.open_model_with_box(&p, start.input_box),
            None => app.open_demo(),
        }
        app
    }

    /// Opens a model file in the background. When it fails, the error is shown and the
    /// model that was open stays open.
    pub fn open_model(&mut self, path: &Path) {
        self.open_model_with_box(path, InputBox::default());
    }

    /// Opens a model file with an input box given by the user (ends left `None` come from
    /// the model, or the default for an ONNX file without one).
    pub fn open_model_with_box(&mut self, path: &Path, input_box: InputBox) {
        self.state.run.input_box = input_box;
        let opts = self.load_options();
        let run = &mut self.state.run;
        run.open_request += 1;
        run.opening = Some(path.display().to_string());
        run.last_open_path = Some(path.to_path_buf());
        run.demo_probe_pending = false;
        self.worker.open_model(
            run.open_request,
            ModelSource::File(path.to_path_buf()),
            opts,
        );
    }

    /// Opens the bundled demo model (and its labelled probe when available).
    pub fn open_demo(&mut self) {
        let opts = self.load_options();
        let run = &mut self.state.run;
        run.open_request += 1;
        run.opening = Some(DEMO_ORIGIN.to_string());
        run.demo_probe_pending = Path::new(DEMO_PROBE).is_file();
        let source = ModelSource::Text {
            text: Arc::from(DEMO_JSON),
            origin: DEMO_ORIGIN.to_string(),
        };
        self.worker.open_model(run.open_request, source, opts);
    }

    /// Opens probe data for the open model in the background. When it fails, the error is
    /// shown and the probe in use stays.
    /// Choosing reference data asks for the analysis again (after a Cancel too).
    pub fn open_probe(&mut self, path: &Path) {
        self.state.run.stopped = false;
        self.request_probe(ProbeChoice::File(path.to_path_buf()));
    }

    /// Switches to the default uniform probe (and, like [`Self::open_probe`], asks for the
    /// analysis again after a Cancel).
    pub fn use_uniform_probe(&mut self) {
        self.state.run.stopped = false;
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
        // Preferred-input batches of the shown layer are handed to the worker a few at a
        // time: units still queued for it count as work, even in the frame between one
        // batch's reply and the next batch's submission.
        let queued = !self.state.run.stopped
            && self
                .state
                .results
                .preferred
                .get(&self.state.current_layer())
                .is_some_and(|lp| !lp.queue.is_empty());
        self.state.run.opening.is_some() || self.worker.pending() > 0 || queued
    }

    /// What the worker is doing now ("" when idle), as the status bar shows it.
    pub fn current_task(&self) -> &str {
        &self.state.run.task.title
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
        self.state.run.longest_busy_frame
    }

    fn load_options(&self) -> LoadOptions {
        LoadOptions {
            allow_outside_paths: self.state.allow_outside_paths,
            input_box: self.state.run.input_box.clone(),
        }
    }

    fn perform(&mut self, action: Action, ctx: &egui::Context) {
        match action {
            Action::OpenModelDialog => self.pick(Pick::Model),
            Action::OpenModel(p) => self.open_model(&p),
            Action::ReopenWithBox(b) => {
                match self.state.model.as_ref().and_then(|m| m.path.clone()) {
                    Some(p) => self.open_model_with_box(&p, b),
                    None => self.state.fail("the bundled demo model carries its own box; open a model file to change its box"),
                }
            }
            Action::OpenProbeDialog => self.pick(Pick::Probe),
            Action::OpenProbe(p) => self.open_probe(&p),
            Action::UniformProbe => self.use_uniform_probe(),
            Action::OpenDemo => self.open_demo(),
            Action::ExportDialog(kind) => self.pick(Pick::Export(kind)),
            Action::Recompute(layer) => {
                if let Some(net) = self.state.net().cloned() {
                    self.state.results.preferred.remove(&layer);
                    self.thumbs.clear_layer(layer);
                    self.state.run.stopped = false;
                    self.queue_prefer(&net, layer, None);
                }
            }
            Action::Cancel => {
                self.cancel();
                self.cancel_timeline();
            }
            Action::RunAgain => self.run_again(),
            Action::CompactWindow => self.state.compact.open = true,
            Action::SaveCompactedDialog => self.pick(Pick::CompactedModel),
            Action::Help => self.show_help = true,
            Action::Quit => ctx.send_viewport_cmd(egui::ViewportCommand::Close),
            Action::OpenRunDialog => self.pick(Pick::Run),
            Action::OpenRun(paths) => self.open_run(paths),
            Action::ScrubTo(i) => self.show_checkpoint(i),
            Action::StopRunAnalysis => self.cancel_timeline(),
            Action::AnalyseRunAgain => self.analyse_run_again(),
            Action::CloseRun => self.close_run(),
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
            Pick::Run => self
                .state
                .prefs
                .recent_models
                .first()
                .and_then(|p| p.parent().and_then(Path::parent).map(Path::to_path_buf)),
            Pick::CompactedModel => self
                .state
                .model
                .as_ref()
                .and_then(|m| m.path.as_ref())
                .and_then(|p| p.parent().map(Path::to_path_buf)),
        };
        let file_name = match purpose {
            Pick::Export(kind) => Some(export::default_file_name(kind, &self.state)),
            Pick::CompactedModel => Some(compact::default_file_name(&self.state)),
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
                    .add_filter("model (receptor JSON, ONNX)", &["json", "onnx"])
                    .pick_file(),
                Pick::Probe => d
                    .set_title("Open reference data")
                    .add_filter("reference data (CSV, NumPy)", &["csv", "npy"])
                    .pick_file(),
                Pick::Export(kind) => {
                    let (name, exts) = kind.filter();
                    d.set_title(kind.label())
                        .set_file_name(file_name.unwrap_or_default())
                        .add_filter(name, exts)
                        .save_file()
                }
                Pick::Run => d
                    .set_title("Open a training run (the folder of its checkpoints)")
                    .pick_folder(),
                Pick::CompactedModel => d
                    .set_title("Save the compacted model")
                    .set_file_name(file_name.unwrap_or_default())
                    .add_filter("receptor model (JSON)", &["json"])
                    .save_file(),
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
        let compact = KeyboardShortcut::new(Modifiers::COMMAND, menu::COMPACT_KEY);
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
            if i.consume_shortcut(&compact) {
                self.actions.push(Action::CompactWindow);
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
        let n_layers = self.state.net().map_or(0, |n| n.layers().len());
        let net = self.state.net().cloned();
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
            let sel = self.state.selection;
            if let Some(s) = sel {
                // Pooling and flatten layers have no units to show: skip them.
                let has_units = |l: &usize| net.as_ref().is_some_and(|n| n.layer(*l).units() > 0);
                if i.consume_key(Modifiers::NONE, Key::PageDown)
                    && let Some(layer) = (s.layer + 1..n_layers).find(has_units)
                {
                    self.state.select(Selection { layer, unit: 0 }, false);
                }
                if i.consume_key(Modifiers::NONE, Key::PageUp)
                    && let Some(layer) = (0..s.layer).rev().find(has_units)
                {
                    self.state.select(Selection { layer, unit: 0 }, false);
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
        let is_probe = |p: &PathBuf| {
            let ext = p
                .extension()
                .and_then(|e| e.to_str())
                .map(str::to_ascii_lowercase);
            matches!(ext.as_deref(), Some("csv") | Some("npy"))
        };
        let (probes, models): (Vec<PathBuf>, Vec<PathBuf>) =
            dropped.into_iter().partition(is_probe);
        // Several model files, or a folder: the checkpoints of a training run.
        if models.len() > 1 || models.iter().any(|p| p.is_dir()) {
            self.actions.push(Action::OpenRun(models));
        } else if let Some(p) = models.into_iter().next() {
            self.actions.push(Action::OpenModel(p));
        }
        for p in probes {
            self.actions.push(Action::OpenProbe(p));
        }
    }
}

impl ReceptorApp {
    /// The main area: the open error (if any), then the Units or Sparsity view.
    fn central_ui(&mut self, ui: &mut egui::Ui) {
        if let Some(err) = self.state.open_error.clone() {
            self.open_error_ui(ui, &err);
            ui.add_space(4.0);
        }
        if self.state.model.is_none() {
            ui.centered_and_justified(|ui| {
                if self.state.run.opening.is_some() || self.state.training.is_open() {
                    ui.spinner();
                } else {
                    ui.label(
                        "Open a model with File → Open model… (Ctrl+O), or drop a model file here.",
                    );
                }
            });
            return;
        }
        ui.horizontal(|ui| {
            ui.selectable_value(&mut self.state.view, MainView::Units, "Units");
            ui.selectable_value(
                &mut self.state.view,
                MainView::Sparsity,
                "Sparsity and pruning",
            );
        });
        ui.separator();
        match self.state.view {
            MainView::Units => {
                self.units.ui(ui, &mut self.state, &mut self.thumbs);
            }
            MainView::Sparsity => self.sparsity.ui(ui, &mut self.state, &mut self.actions),
        }
    }

    /// The error from opening a file, in the theme's error colour, with Dismiss and (for
    /// side files outside the model's folder) a way to agree and open again.
    fn open_error_ui(&mut self, ui: &mut egui::Ui, err: &state::OpenError) {
        let colour = ui.visuals().error_fg_color;
        let frame = egui::Frame::group(ui.style()).stroke(egui::Stroke::new(1.0, colour));
        frame.show(ui, |ui| {
            ui.horizontal(|ui| {
                ui.colored_label(
                    colour,
                    egui::RichText::new("Could not open the file").strong(),
                );
                if ui.small_button("Dismiss").clicked() {
                    self.state.open_error = None;
                }
            });
            ui.colored_label(colour, &err.text);
            // The importer refuses side files outside the model's folder unless the
            // user agrees; here the user can agree for this session.
            if err.outside
                && !self.state.allow_outside_paths
                && let Some(path) = self.state.run.last_open_path.clone()
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
    }
}

/// Darkens the window and says what can be dropped while files are dragged over it.
fn drop_overlay(ctx: &egui::Context) {
    let painter = ctx.layer_painter(egui::LayerId::new(
        egui::Order::Foreground,
        egui::Id::unique("receptor-drop"),
    ));
    let rect = ctx.content_rect();
    painter.rect_filled(rect, 0.0, egui::Color32::from_black_alpha(160));
    painter.text(
        rect.center(),
        egui::Align2::CENTER_CENTER,
        "Drop a model (.json, .onnx), a training run (a folder or several models) or reference data (.csv, .npy)",
        egui::TextStyle::Heading.resolve(&ctx.global_style()),
        egui::Color32::WHITE,
    );
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
        if self.state.model.is_some()
            && let Some(p) = self.start_probe.take()
        {
            self.open_probe(&p);
        }
        if self.state.model.is_none() && self.state.open_error.is_some() {
            // The start model did not open: its probe belongs to no model.
            self.start_probe = None;
        }
        self.request_needed();
        self.request_timeline();
    }

    fn ui(&mut self, ui: &mut egui::Ui, _frame: &mut eframe::Frame) {
        let started = Instant::now();
        let ctx = ui.ctx().clone();
        self.thumbs.begin_frame();
        egui::Panel::top("menu").show(ui, |ui| {
            menu::menu_ui(ui, &mut self.state, &mut self.actions)
        });
        egui::Panel::bottom("status").show(ui, |ui| {
            let line = statusbar::StatusLine {
                run: &self.state.run,
                pending: self.worker.pending(),
                model_open: self.state.model.is_some(),
                notice: self.state.notice.as_ref(),
            };
            statusbar::ui(ui, &line, &mut self.actions);
        });
        if self.state.training.is_open() {
            // Sized to its content (plots of a fixed height), so the view is never cut.
            egui::Panel::bottom("training-run").show(ui, |ui| {
                timeline::ui(ui, &mut self.state, &mut self.actions);
            });
        }
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
        egui::CentralPanel::default().show(ui, |ui| self.central_ui(ui));
        if self.state.compact.open {
            compact::window_ui(&ctx, &mut self.state, &mut self.actions);
        }
        if self.show_help {
            menu::help_ui(&ctx, &mut self.show_help, self.state.run.longest_busy_frame);
        }
        if ctx.input(|i| !i.raw.hovered_files.is_empty()) {
            drop_overlay(&ctx);
        }
        if self.thumbs.deferred() {
            ctx.request_repaint();
        }
        // Frames while analysis runs on the open model (the first frames, which build the
        // font atlas while the model is read, are not what a user browsing sees).
        if self.worker.pending() > 0 && self.state.model.is_some() {
            let run = &mut self.state.run;
            run.longest_busy_frame = run.longest_busy_frame.max(started.elapsed());
        }
    }

    fn save(&mut self, storage: &mut dyn eframe::Storage) {
        eframe::set_value(storage, eframe::APP_KEY, &self.state.prefs);
    }
}
