//! The background worker: one named thread runs every analysis in order and sends progress
//! and results back over a channel, each tagged with the model and probe it was computed
//! for. Opening files runs on short-lived threads of its own so a slow file never waits
//! behind an analysis. The frame loop only drains the channel; it never computes.
//!
//! The worker is a plain scheduler: each job is a call into the core (`analysis/`,
//! `probe/`) with the same functions and defaults the command line uses, and its result is
//! sent back as it is.

use super::state::{
    ActivityResult, AttributionKey, CompactChoice, Criterion, OpenProbe, ScreenResult, Sensitivity,
    StatsResult, Tag, UnitCurves,
};
use crate::analysis::activity::{ActivityOptions, trace_activity};
use crate::analysis::attribute::{Attribution, DEFAULT_IG_STEPS, integrated_gradients};
use crate::analysis::compact::CheckedCompaction;
use crate::analysis::prefer::{PreferOptions, Preferred, Reference};
use crate::analysis::prune::{DEFAULT_SWEEP_FRACTIONS, SweepPoint};
use crate::analysis::screen::ScreenOptions;
use crate::analysis::{
    Progress, bounds, compact, gradient, prefer, prune, screen, sparsity, structured,
};
use crate::error::{Error, Result};
use crate::model::{BoxOrigin, BoxSource, LoadOptions, Network};
use crate::probe::memory::{MemoryProbe, read_probe};
use crate::probe::{DEFAULT_UNIFORM_SAMPLES, DEFAULT_UNIFORM_SEED, ProbeData, ProbeSource};
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, AtomicU32, AtomicUsize, Ordering};
use std::sync::mpsc::{Receiver, Sender, channel};
use std::sync::{Arc, Mutex};

/// Units per preferred-input batch: each batch is one call of the core's batched search, and
/// tiles fill in as batches finish.
pub const PREFER_BATCH: usize = 128;
/// Probe rows per forward pass when tracing activations and screening: small enough that
/// a cancel is seen within a fraction of a second on a 784-2048-2048-10 network.
pub(super) const TRACE_CHUNK: usize = 512;
/// [`TRACE_CHUNK`] as the screening options take it.
const TRACE_CHUNK_NONZERO: std::num::NonZeroUsize = match std::num::NonZeroUsize::new(TRACE_CHUNK) {
    Some(n) => n,
    None => panic!("TRACE_CHUNK is not zero"),
};

/// Where a model comes from.
#[derive(Debug, Clone)]
pub enum ModelSource {
    /// A model file.
    File(PathBuf),
    /// JSON text (the bundled demo), named `origin` in messages.
    Text {
        /// The JSON.
        text: Arc<str>,
        /// Its name in messages.
        origin: String,
    },
}

/// Which probe to use.
#[derive(Debug, Clone)]
pub enum ProbeChoice {
    /// `probe::uniform(net, DEFAULT_UNIFORM_SAMPLES, DEFAULT_UNIFORM_SEED)`.
    Uniform,
    /// A CSV or .npy file.
    File(PathBuf),
}

/// Work for the analysis thread.
#[derive(Debug, Clone)]
pub enum Job {
    /// Sparsity statistics, |w| histograms and interval bounds (needs only the model).
    Model,
    /// Read the probe into memory and compute its mean.
    LoadProbe(ProbeChoice),
    /// Screening and activation tracing on the probe.
    Probe(Arc<ProbeData>),
    /// Preferred inputs of `units` of `layer`, as one batch.
    Prefer {
        /// Layer index.
        layer: usize,
        /// Units of the batch.
        units: Vec<usize>,
        /// Search options.
        settings: PreferOptions,
        /// Reference data (prior and starts), `None` for the plain search.
        reference: Option<Arc<Reference>>,
    },
    /// Integrated gradients of one unit for one probe sample.
    Attribute {
        /// Which unit, sample and baseline.
        key: AttributionKey,
        /// The sample, `[input size]`.
        sample: Arc<Vec<f32>>,
        /// The baseline, `[input size]`.
        baseline: Arc<Vec<f32>>,
    },
    /// Sensitivity of every unit of `layer` at the mean reference input.
    Sensitivity {
        /// Layer index.
        layer: usize,
        /// Mean probe input, `[input size]`.
        mean: Arc<Vec<f32>>,
    },
    /// The pruning curve on a labelled probe.
    Sweep(Arc<ProbeData>),
    /// Work of the convolution views.
    Conv(super::conv_jobs::ConvJob),
    /// The unit-removal curves (whole model and per layer) on a labelled probe.
    UnitCurves {
        /// The labelled probe.
        data: Arc<ProbeData>,
        /// How units are ranked.
        criterion: Criterion,
    },
    /// Compaction of the model, checked on the probe (and on uniform box samples when
    /// `check_box`, i.e. when the probe is a file, as `receptor compact --probe` does).
    Compact {
        /// The probe in use (the reference data).
        data: Arc<ProbeData>,
        /// What to remove beyond the exact reasons.
        choice: CompactChoice,
        /// Also compare the outputs on uniform box samples.
        check_box: bool,
    },
    /// The timeline of the open training run (every checkpoint, on one probe).
    Timeline(super::timeline_jobs::TimelineJob),
}

impl Job {
    fn title(&self, net: &Network) -> String {
        let lname = |l: usize| {
            net.layers()
                .get(l)
                .map_or("?", |x| x.name.as_str())
                .to_string()
        };
        match self {
            Job::Model => "Computing sparsity statistics and bounds".into(),
            Job::LoadProbe(ProbeChoice::Uniform) => {
                "Drawing uniform samples of the input box".into()
            }
            Job::LoadProbe(ProbeChoice::File(p)) => {
                format!("Reading reference data {}", p.display())
            }
            Job::Probe(_) => "Screening units on the reference data".into(),
            Job::Prefer { layer, units, .. } => format!(
                "Searching preferred inputs of layer {} (units {}..{})",
                lname(*layer),
                units.first().copied().unwrap_or(0),
                units.last().map_or(0, |u| u + 1)
            ),
            Job::Sensitivity { layer, .. } => {
                format!("Computing sensitivity of layer {}", lname(*layer))
            }
            Job::Attribute { key, .. } => format!(
                "Attributing unit {} of layer {} for reference row {}",
                key.unit,
                lname(key.layer),
                key.row
            ),
            Job::Sweep(_) => "Pruning sweep".into(),
            Job::Conv(job) => job.title(net),
            Job::UnitCurves { criterion, .. } => {
                format!(
                    "Unit-removal sweeps (units ranked by {})",
                    criterion.as_str()
                )
            }
            Job::Compact { .. } => "Compacting the model and checking its outputs".into(),
            Job::Timeline(job) => job.title(),
        }
    }
}

/// A job with the model it runs on, its tag, and the cancel flag of its batch.
struct Ticket {
    job: Job,
    net: Arc<Network>,
    tag: Tag,
    cancel: Arc<AtomicBool>,
}

/// What the worker (and the file threads) send back.
#[derive(Debug)]
pub enum Reply {
    /// A job started.
    Started {
        /// Its tag.
        tag: Tag,
        /// What it does, for the status bar.
        title: String,
    },
    /// Fraction done of the running job.
    Progress {
        /// Its tag.
        tag: Tag,
        /// 0 to 1.
        fraction: f32,
    },
    /// A job ended (with or without a result reply before this one).
    Finished {
        /// Its tag.
        tag: Tag,
    },
    /// A model file was read (or failed to read).
    ModelOpened {
        /// The request number given by [`Worker::open_model`].
        request: u64,
        /// The model, its name for messages and its path.
        result: Result<(Network, String, Option<PathBuf>, BoxOrigin)>,
    },
    /// Statistics, histograms and bounds.
    Model {
        /// Model tag.
        tag: Tag,
        /// Statistics.
        stats: Arc<StatsResult>,
        /// Bounds.
        bounds: Arc<crate::analysis::bounds::Bounds>,
    },
    /// A probe was read (or failed).
    ProbeLoaded {
        /// The tag it was requested under (its `probe` part is the new probe's id).
        tag: Tag,
        /// The probe in memory.
        result: Result<OpenProbe>,
    },
    /// Screening and activity.
    Probe {
        /// Model and probe tag.
        tag: Tag,
        /// Screening result (or its error).
        screen: Result<Arc<ScreenResult>>,
        /// Activity result (or its error).
        activity: Result<Arc<ActivityResult>>,
    },
    /// A batch of preferred inputs.
    Prefer {
        /// Model tag.
        tag: Tag,
        /// Layer index.
        layer: usize,
        /// Options used.
        settings: PreferOptions,
        /// The preferred input of each unit of the batch, or the error.
        result: Result<Vec<Preferred>>,
    },
    /// Sensitivity maps of a layer.
    Sensitivity {
        /// Tag.
        tag: Tag,
        /// Layer index.
        layer: usize,
        /// Maps, or the error.
        result: Result<Arc<Sensitivity>>,
    },
    /// Integrated gradients.
    Attribute {
        /// Tag.
        tag: Tag,
        /// Which unit, sample and baseline.
        key: AttributionKey,
        /// The attribution, or the error.
        result: Result<Arc<Attribution>>,
    },
    /// The pruning curve.
    Sweep {
        /// Tag.
        tag: Tag,
        /// Points or error.
        result: Result<Arc<Vec<SweepPoint>>>,
    },
    /// A result of the convolution views.
    Conv {
        /// Model and probe tag.
        tag: Tag,
        /// The result.
        reply: super::conv_jobs::ConvReply,
    },
    /// The unit-removal curves of one criterion.
    UnitCurves {
        /// Tag.
        tag: Tag,
        /// The criterion they were computed with.
        criterion: Criterion,
        /// Curves or error.
        result: Result<Arc<UnitCurves>>,
    },
    /// A checked compaction.
    Compact {
        /// Tag.
        tag: Tag,
        /// The choice it was computed for.
        choice: CompactChoice,
        /// The compaction with its output check, or the error.
        result: Result<Arc<CheckedCompaction>>,
    },
    /// The compacted model was written (or failed to be).
    CompactSaved {
        /// The file, or the error.
        result: Result<PathBuf>,
    },
    /// A file export finished.
    Exported {
        /// The file, or the error.
        result: Result<PathBuf>,
    },
    /// A file dialog closed.
    Picked {
        /// What the file is for.
        purpose: super::Pick,
        /// The chosen file, `None` when the dialog was cancelled.
        path: Option<PathBuf>,
    },
    /// A reply of the training-run view (listing, a checkpoint, the timeline).
    Timeline(super::timeline_jobs::TimelineReply),
}

/// Handle to the worker thread, owned by the app.
pub struct Worker {
    jobs: Option<Sender<Ticket>>,
    reply_tx: Sender<Reply>,
    replies: Receiver<Reply>,
    cancel: Arc<AtomicBool>,
    pending: Arc<AtomicUsize>,
    ctx: egui::Context,
    spawn_error: Option<String>,
}

impl Worker {
    /// Starts the analysis thread. `ctx` is asked to repaint whenever a reply is sent.
    pub fn start(ctx: egui::Context) -> Self {
        let (job_tx, job_rx) = channel::<Ticket>();
        let (reply_tx, replies) = channel::<Reply>();
        let pending = Arc::new(AtomicUsize::new(0));
        let tx = reply_tx.clone();
        let c = ctx.clone();
        let p = pending.clone();
        let spawned = std::thread::Builder::new()
            .name("receptor-analysis".into())
            .spawn(move || run_jobs(job_rx, tx, c, p));
        let (jobs, spawn_error) = match spawned {
            Ok(_) => (Some(job_tx), None),
            Err(e) => (None, Some(format!("cannot start the analysis thread: {e}"))),
        };
        Worker {
            jobs,
            reply_tx,
            replies,
            cancel: Arc::new(AtomicBool::new(false)),
            pending,
            ctx,
            spawn_error,
        }
    }

    /// Why the worker could not start, if it could not.
    pub fn spawn_error(&self) -> Option<&str> {
        self.spawn_error.as_deref()
    }

    /// Queues `job` on `net` under `tag`.
    pub fn submit(&self, job: Job, net: Arc<Network>, tag: Tag) {
        self.submit_with_cancel(job, net, tag, self.cancel.clone());
    }

    /// Queues `job` with a cancel flag of its own: [`Self::cancel_all`] does not stop it
    /// (the training run's timeline outlives the checkpoint shown while it runs).
    pub fn submit_with_cancel(
        &self,
        job: Job,
        net: Arc<Network>,
        tag: Tag,
        cancel: Arc<AtomicBool>,
    ) {
        if let Some(tx) = &self.jobs {
            self.pending.fetch_add(1, Ordering::SeqCst);
            let ticket = Ticket {
                job,
                net,
                tag,
                cancel,
            };
            if tx.send(ticket).is_err() {
                self.pending.fetch_sub(1, Ordering::SeqCst);
            }
        }
    }

    /// Stops the running job and drops every queued one (they report `Finished` quickly).
    /// Later jobs are not affected.
    pub fn cancel_all(&mut self) {
        self.cancel.store(true, Ordering::SeqCst);
        self.cancel = Arc::new(AtomicBool::new(false));
    }

    /// Jobs queued or running.
    pub fn pending(&self) -> usize {
        self.pending.load(Ordering::SeqCst)
    }

    /// Every reply that has arrived since the last call.
    pub fn drain(&self) -> Vec<Reply> {
        self.replies.try_iter().collect()
    }

    /// A sender for replies from helper threads (exports, dialogs).
    pub fn reply_sender(&self) -> Sender<Reply> {
        self.reply_tx.clone()
    }

    /// Reads and validates a model on a thread of its own; the reply carries `request`.
    pub fn open_model(&self, request: u64, source: ModelSource, opts: LoadOptions) {
        let tx = self.reply_tx.clone();
        let ctx = self.ctx.clone();
        let fallback_tx = self.reply_tx.clone();
        let spawned = std::thread::Builder::new()
            .name("receptor-open".into())
            .spawn(move || {
                let result = match source {
                    ModelSource::File(path) => crate::model::load_with_origin(&path, &opts)
                        .map(|(n, b)| (n, path.display().to_string(), Some(path.clone()), b)),
                    ModelSource::Text { text, origin } => {
                        let base = std::path::Path::new(".");
                        crate::model::from_json_str(&text, &origin, base, &opts).map(|n| {
                            let b = BoxOrigin {
                                low: BoxSource::ModelFile,
                                high: BoxSource::ModelFile,
                            };
                            (n, origin.clone(), None, b)
                        })
                    }
                };
                let _ = tx.send(Reply::ModelOpened { request, result });
                ctx.request_repaint();
            });
        if let Err(e) = spawned {
            let _ = fallback_tx.send(Reply::ModelOpened {
                request,
                result: Err(Error::internal(format!(
                    "cannot start a thread to open the file: {e}"
                ))),
            });
        }
    }

    /// Runs `f` on a named helper thread and sends its reply (used for exports and dialogs,
    /// which must not block the frame loop).
    pub fn spawn_helper(&self, name: &str, f: impl FnOnce() -> Reply + Send + 'static) {
        let tx = self.reply_tx.clone();
        let ctx = self.ctx.clone();
        let spawned = std::thread::Builder::new()
            .name(name.into())
            .spawn(move || {
                let _ = tx.send(f());
                ctx.request_repaint();
            });
        if let Err(e) = spawned {
            let _ = self.reply_tx.send(Reply::Exported {
                result: Err(Error::internal(format!(
                    "cannot start a helper thread: {e}"
                ))),
            });
        }
    }
}

/// Reports progress of one job over the reply channel and reads its cancel flag.
struct JobProgress<'a> {
    tx: Mutex<Sender<Reply>>,
    ctx: &'a egui::Context,
    tag: Tag,
    cancel: &'a AtomicBool,
    /// Last fraction sent, in 1/1000 steps, so the channel is not flooded.
    last: AtomicU32,
    /// Maps the job's own 0..1 into a sub-range of the status bar's 0..1.
    range: (f32, f32),
}

impl JobProgress<'_> {
    fn sub(&self, lo: f32, hi: f32) -> JobProgress<'_> {
        JobProgress {
            tx: Mutex::new(
                self.tx
                    .lock()
                    .map_or_else(|e| e.into_inner().clone(), |t| t.clone()),
            ),
            ctx: self.ctx,
            tag: self.tag,
            cancel: self.cancel,
            last: AtomicU32::new(self.last.load(Ordering::Relaxed)),
            range: (
                self.range.0 + lo * (self.range.1 - self.range.0),
                self.range.0 + hi * (self.range.1 - self.range.0),
            ),
        }
    }
}

impl Progress for JobProgress<'_> {
    fn set(&self, fraction: f32) {
        let f = self.range.0 + fraction.clamp(0.0, 1.0) * (self.range.1 - self.range.0);
        let milli = (f * 1000.0) as u32;
        if self.last.swap(milli, Ordering::Relaxed) / 10 != milli / 10 {
            if let Ok(tx) = self.tx.lock() {
                let _ = tx.send(Reply::Progress {
                    tag: self.tag,
                    fraction: f,
                });
            }
            self.ctx.request_repaint();
        }
    }

    fn cancelled(&self) -> bool {
        self.cancel.load(Ordering::Relaxed)
    }
}

fn run_jobs(
    jobs: Receiver<Ticket>,
    tx: Sender<Reply>,
    ctx: egui::Context,
    pending: Arc<AtomicUsize>,
) {
    for t in jobs {
        if !t.cancel.load(Ordering::SeqCst) {
            let _ = tx.send(Reply::Started {
                tag: t.tag,
                title: t.job.title(&t.net),
            });
            ctx.request_repaint();
            let progress = JobProgress {
                tx: Mutex::new(tx.clone()),
                ctx: &ctx,
                tag: t.tag,
                cancel: &t.cancel,
                last: AtomicU32::new(0),
                range: (0.0, 1.0),
            };
            if let Some(reply) = run_job(&t, &progress) {
                let _ = tx.send(reply);
            }
        }
        pending.fetch_sub(1, Ordering::SeqCst);
        let _ = tx.send(Reply::Finished { tag: t.tag });
        ctx.request_repaint();
    }
}

/// Runs one job; `None` when it was cancelled before producing anything worth sending.
fn run_job(t: &Ticket, progress: &JobProgress<'_>) -> Option<Reply> {
    let net = &*t.net;
    let tag = t.tag;
    let reply = match &t.job {
        Job::Model => {
            let stats = sparsity::network_sparsity(net, None);
            progress.set(0.5);
            Reply::Model {
                tag,
                stats: Arc::new(stats),
                bounds: Arc::new(bounds::interval_bounds(net)),
            }
        }
        Job::LoadProbe(choice) => Reply::ProbeLoaded {
            tag,
            result: load_probe(net, choice),
        },
        Job::Probe(data) => {
            let (screen, activity) = screen_and_trace(net, data, progress)?;
            Reply::Probe {
                tag,
                screen,
                activity,
            }
        }
        Job::Prefer {
            layer,
            units,
            settings,
            reference,
        } => Reply::Prefer {
            tag,
            layer: *layer,
            settings: settings.clone(),
            result: not_cancelled(prefer::prefer_with(
                net,
                *layer,
                units,
                settings,
                reference.as_deref(),
                progress,
            ))?,
        },
        Job::Attribute {
            key,
            sample,
            baseline,
        } => Reply::Attribute {
            tag,
            key: *key,
            result: integrated_gradients(
                net,
                key.layer,
                key.unit,
                sample,
                baseline,
                DEFAULT_IG_STEPS,
            )
            .map(Arc::new),
        },
        Job::Sensitivity { layer, mean } => Reply::Sensitivity {
            tag,
            layer: *layer,
            result: gradient::sensitivity(net, *layer, mean).map(Arc::new),
        },
        Job::Sweep(data) => {
            let mut src = MemoryProbe::new(data.clone());
            let result = prune::prune_sweep(net, &mut src, &DEFAULT_SWEEP_FRACTIONS, progress);
            Reply::Sweep {
                tag,
                result: not_cancelled(result)?.map(Arc::new),
            }
        }
        Job::Conv(job) => {
            let reply = job.run(net, progress);
            if super::conv_jobs::ConvJob::was_cancelled(&reply) {
                return None;
            }
            Reply::Conv { tag, reply }
        }
        Job::UnitCurves { data, criterion } => {
            let result = structured::unit_curves(
                net,
                *criterion,
                &DEFAULT_SWEEP_FRACTIONS,
                &mut || Ok(Box::new(MemoryProbe::new(data.clone())) as Box<dyn ProbeSource>),
                progress,
            );
            Reply::UnitCurves {
                tag,
                criterion: *criterion,
                result: not_cancelled(result)?.map(Arc::new),
            }
        }
        Job::Compact {
            data,
            choice,
            check_box,
        } => {
            let mut uniform = check_box
                .then(|| crate::probe::uniform(net, DEFAULT_UNIFORM_SAMPLES, DEFAULT_UNIFORM_SEED));
            let result = compact::compact_checked(
                net,
                &choice.request(),
                &mut || Ok(Box::new(MemoryProbe::new(data.clone())) as Box<dyn ProbeSource>),
                uniform.as_deref_mut().map(|u| u as &mut dyn ProbeSource),
                "the compacted model",
                progress,
            );
            Reply::Compact {
                tag,
                choice: *choice,
                result: not_cancelled(result)?.map(Arc::new),
            }
        }
        Job::Timeline(job) => job.run(progress)?,
    };
    Some(reply)
}

/// `None` for a cancelled computation (nothing to send), else the result as it is.
fn not_cancelled<T>(result: Result<T>) -> Option<Result<T>> {
    (!matches!(result, Err(Error::Cancelled))).then_some(result)
}

/// The two results of a probe job.
type ProbeResults = (Result<Arc<ScreenResult>>, Result<Arc<ActivityResult>>);

/// Screening and activity on an in-memory probe, as one job (screening takes the first 40%
/// of the progress bar); `None` when cancelled.
fn screen_and_trace(
    net: &Network,
    data: &Arc<ProbeData>,
    progress: &JobProgress<'_>,
) -> Option<ProbeResults> {
    let mut src = MemoryProbe::new(data.clone());
    let opts = ScreenOptions::default().with_chunk_rows(TRACE_CHUNK_NONZERO);
    let report = screen::screen(net, &mut src, &opts, &progress.sub(0.0, 0.4));
    let screen = not_cancelled(report)?.map(|r| Arc::new(ScreenResult::new(net, r)));
    let opts = ActivityOptions {
        chunk_rows: TRACE_CHUNK,
        ..ActivityOptions::default()
    };
    let activity = trace_activity(net, data.inputs.view(), &opts, &progress.sub(0.4, 1.0));
    Some((screen, not_cancelled(activity)?.map(Arc::new)))
}

/// Reads the chosen probe into memory with its mean input.
fn load_probe(net: &Network, choice: &ProbeChoice) -> Result<OpenProbe> {
    let path = match choice {
        ProbeChoice::Uniform => None,
        ProbeChoice::File(p) => Some(p.clone()),
    };
    let data = read_probe(net, path.as_deref())?;
    let mean = data.mean_input()?;
    // Real data (a file) defines the preferred-input search's data prior and starts; the
    // uniform probe is not data.
    let (reference, reference_error) = match path {
        Some(_) => match Reference::new(net, &data) {
            Ok(r) => (Some(Arc::new(r)), None),
            Err(e) => (None, Some(e.to_string())),
        },
        None => (None, None),
    };
    let spreads =
        (path.is_some() && net.input().layout == crate::model::Layout::Vector).then(|| {
            Arc::new(crate::analysis::features::feature_spreads(
                data.inputs.view(),
            ))
        });
    let confusion = data.labels.as_ref().map(|labels| {
        Arc::new(crate::analysis::accuracy::confusion(
            net,
            data.inputs.view(),
            labels,
            TRACE_CHUNK,
        ))
    });
    Ok(OpenProbe {
        spreads,
        data: Arc::new(data),
        mean: Arc::new(mean),
        path,
        reference,
        reference_error,
        confusion,
    })
}
