//! The training-run view's work and replies: listing the checkpoints of a run and reading
//! one for the unit view (short-lived file threads, like opening a model), and the timeline
//! over every checkpoint (a worker job that calls `analysis::timeline::timeline` with the
//! same defaults as `receptor timeline`). Replies carry the run's id and are dropped when
//! another run (or another probe) has taken its place.

use super::ReceptorApp;
use super::state::{OpenError, OpenProbe, Slot, TrainingRun};
use super::worker::{Job, Reply};
use crate::analysis::Progress;
use crate::analysis::accuracy::{Confusion, confusion};
use crate::analysis::timeline::{Timeline, TimelineOptions, timeline};
use crate::error::{Error, Result};
use crate::model::series::Series;
use crate::model::{BoxOrigin, LoadOptions, Network};
use crate::probe::memory::MemoryProbe;
use crate::probe::{ProbeData, ProbeSource};
use std::path::PathBuf;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU32, Ordering};

/// The timeline of a run on one probe, for the analysis thread.
#[derive(Debug, Clone)]
pub struct TimelineJob {
    /// The run's id.
    run: u64,
    /// The checkpoints.
    series: Arc<Series>,
    /// The probe every checkpoint is screened on.
    probe: Arc<ProbeData>,
    /// How each checkpoint is read.
    load: LoadOptions,
    /// Where the fraction done is written (thousandths), for the view's own bar.
    progress: Arc<AtomicU32>,
}

impl TimelineJob {
    /// What the status bar says while it runs.
    pub fn title(&self) -> String {
        format!(
            "Analysing the {} checkpoints of the training run",
            self.series.len()
        )
    }

    /// Runs the timeline; `None` when it was cancelled.
    pub fn run(&self, progress: &dyn Progress) -> Option<Reply> {
        let shown = RunProgress {
            inner: progress,
            fraction: &self.progress,
        };
        let mut open_probe = |_: &Network| {
            Ok(Box::new(MemoryProbe::new(self.probe.clone())) as Box<dyn ProbeSource>)
        };
        let mut first_again = || self.series.load(0, &self.load);
        let result = timeline(
            &mut self.series.networks(&self.load),
            self.series.len(),
            &mut open_probe,
            &mut first_again,
            &TimelineOptions::default(),
            &shown,
        );
        if matches!(result, Err(Error::Cancelled)) {
            return None;
        }
        Some(Reply::Timeline(TimelineReply::Analysed {
            run: self.run,
            probe: self.probe.clone(),
            result: result.map(Arc::new),
        }))
    }
}

/// Passes progress on to the status bar and keeps the fraction for the view's own bar.
struct RunProgress<'a> {
    inner: &'a dyn Progress,
    fraction: &'a AtomicU32,
}

impl Progress for RunProgress<'_> {
    fn set(&self, fraction: f32) {
        let milli = (fraction.clamp(0.0, 1.0) * 1000.0) as u32;
        self.fraction.store(milli, Ordering::Relaxed);
        self.inner.set(fraction);
    }

    fn cancelled(&self) -> bool {
        self.inner.cancelled()
    }
}

/// What the run's threads send back.
#[derive(Debug)]
pub enum TimelineReply {
    /// The checkpoints were listed (or could not be).
    Listed {
        /// The run's id.
        run: u64,
        /// The series, or the error.
        result: Result<Arc<Series>>,
    },
    /// One checkpoint was read for the unit view.
    Checkpoint {
        /// The run's id.
        run: u64,
        /// Its position in the series.
        index: usize,
        /// The network, where its input box came from, and its confusion matrix on the
        /// labelled probe in use when it was asked for; or the error.
        result: Result<Box<LoadedCheckpoint>>,
    },
    /// The timeline over every checkpoint.
    Analysed {
        /// The run's id.
        run: u64,
        /// The probe it was computed on.
        probe: Arc<ProbeData>,
        /// The timeline, or the error.
        result: Result<Arc<Timeline>>,
    },
}

/// A checkpoint read for the unit view.
#[derive(Debug)]
pub struct LoadedCheckpoint {
    net: Network,
    box_origin: BoxOrigin,
    /// The probe it was evaluated on and the confusion matrix there (labelled probes that
    /// fit the network only).
    confusion: Option<(Arc<ProbeData>, Arc<Confusion>)>,
}

/// Reads checkpoint `path` and, when `probe` is labelled and fits it, its confusion matrix
/// there (the kept probe's accuracy must be the shown checkpoint's, not the first one's).
fn load_checkpoint(
    path: &std::path::Path,
    opts: &LoadOptions,
    probe: Option<Arc<ProbeData>>,
) -> Result<Box<LoadedCheckpoint>> {
    let (net, box_origin) = crate::model::load_with_origin(path, opts)?;
    let classes = net.output_layer().units();
    let confusion = probe.and_then(|data| {
        let labels = data.labels.as_ref()?;
        let fits = data.inputs.ncols() == net.input().size && labels.iter().all(|&l| l < classes);
        fits.then(|| {
            let c = confusion(&net, data.inputs.view(), labels, super::worker::TRACE_CHUNK);
            (data.clone(), Arc::new(c))
        })
    });
    Ok(Box::new(LoadedCheckpoint {
        net,
        box_origin,
        confusion,
    }))
}

/// How a list of dropped or given paths is named in messages.
fn describe(paths: &[PathBuf]) -> String {
    match paths {
        [one] => one.display().to_string(),
        many => format!("{} model files", many.len()),
    }
}

impl ReceptorApp {
    /// Opens a training run: one folder (every model file in it) or several model files.
    /// The checkpoints are listed on a file thread; then the first one opens in the unit
    /// view and the timeline is computed on the probe in use.
    pub fn open_run(&mut self, paths: Vec<PathBuf>) {
        self.cancel_timeline();
        let id = self.state.training.id + 1;
        self.state.training = TrainingRun {
            id,
            opening: Some(describe(&paths)),
            ..TrainingRun::default()
        };
        self.worker.spawn_helper("receptor-open-run", move || {
            Reply::Timeline(TimelineReply::Listed {
                run: id,
                result: Series::open(&paths).map(Arc::new),
            })
        });
    }

    /// Shows checkpoint `index` of the run in the unit view (read on a file thread).
    pub fn show_checkpoint(&mut self, index: usize) {
        let t = &mut self.state.training;
        let Some(series) = t.series.clone() else {
            return;
        };
        let Some(path) = series.checkpoints().get(index).map(|c| c.path.clone()) else {
            return;
        };
        t.current = index;
        if t.shown == Some(index) || t.loading == Some(index) {
            return;
        }
        t.loading = Some(index);
        let run = t.id;
        let opts = self.load_options();
        let probe = self.state.probe.as_ref().map(|p| p.data.clone());
        self.worker
            .spawn_helper("receptor-open-checkpoint", move || {
                Reply::Timeline(TimelineReply::Checkpoint {
                    run,
                    index,
                    result: load_checkpoint(&path, &opts, probe),
                })
            });
    }

    /// Closes the run (the model it shows stays open).
    pub fn close_run(&mut self) {
        self.cancel_timeline();
        let id = self.state.training.id + 1;
        self.state.training = TrainingRun {
            id,
            ..TrainingRun::default()
        };
    }

    /// Stops the timeline's analysis ("Analyse again" in the view restarts it).
    pub(super) fn cancel_timeline(&mut self) {
        let t = &mut self.state.training;
        t.cancel.store(true, Ordering::SeqCst);
        t.cancel = Arc::new(AtomicBool::new(false));
        if matches!(t.timeline, Slot::Pending) {
            t.timeline = Slot::Empty;
            t.analysed_on = None;
            t.stopped = true;
        }
    }

    /// Computes the timeline again after a stop.
    pub(super) fn analyse_run_again(&mut self) {
        let t = &mut self.state.training;
        t.stopped = false;
        t.analysed_on = None;
        t.timeline = Slot::Empty;
    }

    /// Queues the timeline when a checkpoint of the run is open with a probe the timeline
    /// was not computed on (the first time, and after the user opens other probe data).
    pub(super) fn request_timeline(&mut self) {
        let t = &self.state.training;
        let Some(series) = t.series.clone() else {
            return;
        };
        if t.stopped || t.shown.is_none() {
            return;
        }
        let (Some(probe), Some(net)) = (
            self.state.probe.as_ref().map(|p| p.data.clone()),
            self.state.net().cloned(),
        ) else {
            return;
        };
        if t.analysed_on
            .as_ref()
            .is_some_and(|a| Arc::ptr_eq(a, &probe))
        {
            return;
        }
        self.cancel_timeline();
        let load = self.load_options();
        let t = &mut self.state.training;
        t.stopped = false;
        t.analysed_on = Some(probe.clone());
        t.timeline = Slot::Pending;
        t.progress.store(0, Ordering::Relaxed);
        let job = TimelineJob {
            run: t.id,
            series,
            probe,
            load,
            progress: t.progress.clone(),
        };
        let cancel = t.cancel.clone();
        let tag = self.state.tag();
        self.worker
            .submit_with_cancel(Job::Timeline(job), net, tag, cancel);
    }

    /// Handles a reply of the run's threads.
    pub(super) fn on_timeline_reply(&mut self, reply: TimelineReply) {
        match reply {
            TimelineReply::Listed { run, result } => {
                if run != self.state.training.id {
                    return;
                }
                self.state.training.opening = None;
                match result {
                    Ok(series) => {
                        self.state.training.series = Some(series);
                        self.show_checkpoint(0);
                    }
                    Err(e) => {
                        let err = OpenError::new(&e);
                        self.state
                            .fail(format!("cannot open the training run: {}", err.text));
                        self.state.open_error = Some(err);
                        self.close_run();
                    }
                }
            }
            TimelineReply::Checkpoint { run, index, result } => {
                let t = &mut self.state.training;
                if run != t.id {
                    return;
                }
                if t.loading == Some(index) {
                    t.loading = None;
                }
                if index != t.current {
                    // The slider moved on while this one was read.
                    let current = t.current;
                    self.show_checkpoint(current);
                    return;
                }
                match result {
                    Ok(loaded) => self.install_checkpoint(index, *loaded),
                    Err(e) => {
                        let err = OpenError::new(&e);
                        self.state.fail(err.text.clone());
                        self.state.open_error = Some(err);
                    }
                }
            }
            TimelineReply::Analysed { run, probe, result } => {
                let t = &mut self.state.training;
                let same_probe = t
                    .analysed_on
                    .as_ref()
                    .is_some_and(|a| Arc::ptr_eq(a, &probe));
                if run != t.id || !same_probe {
                    return;
                }
                if let Some(text) = t.timeline.settle(result, "the training-run timeline") {
                    self.state.fail(text);
                }
            }
        }
    }

    /// Makes checkpoint `index` the open model. Within a run the probe in use and the
    /// selected unit stay (every checkpoint has the first one's architecture); the first
    /// checkpoint keeps the probe only when it fits (input size, outputs and their labels).
    fn install_checkpoint(&mut self, index: usize, loaded: LoadedCheckpoint) {
        let LoadedCheckpoint {
            net,
            box_origin,
            confusion,
        } = loaded;
        let Some(series) = self.state.training.series.clone() else {
            return;
        };
        let path = series.checkpoints().get(index).map(|c| c.path.clone());
        let fits = |p: &OpenProbe, old: &Network| {
            p.data.inputs.ncols() == net.input().size
                && old.output_layer().units() == net.output_layer().units()
                && old.output_layer().labels == net.output_layer().labels
        };
        let keep = match (&self.state.probe, self.state.net()) {
            // A uniform probe belongs to its model's box: kept only within the run.
            (Some(p), Some(old))
                if fits(p, old.as_ref())
                    && (p.path.is_some() || self.state.training.shown.is_some()) =>
            {
                let mut kept = p.clone();
                // The accuracy shown beside the probe is this checkpoint's.
                kept.confusion = confusion
                    .filter(|(data, _)| Arc::ptr_eq(data, &p.data))
                    .map(|(_, c)| c);
                Some((kept, self.state.selection))
            }
            _ => None,
        };
        let origin = match (series.order().key_name(), path.as_ref()) {
            (key, Some(p)) => format!(
                "{} (checkpoint {} of {}, {key} {})",
                p.display(),
                index + 1,
                series.len(),
                series.key(index)
            ),
            (_, None) => format!("checkpoint {}", index + 1),
        };
        self.install_model_keeping(net, origin, path, box_origin, keep);
        self.state.training.shown = Some(index);
    }
}
