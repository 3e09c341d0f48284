//! The background worker: one named thread runs every analysis in order and sends progress
//! and results back over a channel, each tagged with the model and probe it was computed
//! for. Opening files runs on short-lived threads of its own so a slow file never waits
//! behind an analysis. The frame loop only drains the channel; it never computes.

use super::state::{
    ActivityResult, MagnitudeHistogram, OpenProbe, PreferredMap, ScreenResult, StatsResult, Tag,
    UnitActivity,
};
use crate::analysis::Progress;
use crate::analysis::prune::SweepPoint;
use crate::error::{Error, Result};
use crate::model::{LoadOptions, Network};
use crate::probe::{self, ProbeChunk, ProbeData, ProbeSource};
use ndarray::{Array2, s};
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, AtomicU32, AtomicUsize, Ordering};
use std::sync::mpsc::{Receiver, Sender, channel};
use std::sync::{Arc, Mutex};

/// Units per preferred-input batch: each batch is one call of the core's batched search, and
/// tiles fill in as batches finish.
pub const PREFER_BATCH: usize = 128;
/// Probe rows per forward pass when tracing activations and screening: small enough that
/// a cancel is seen within a fraction of a second on a 784-2048-2048-10 network.
const TRACE_CHUNK: usize = 512;
/// Bins of each unit's activation histogram.
pub const HIST_BINS: usize = 32;
/// Samples kept per unit as "drives it hardest".
pub const TOP_SAMPLES: usize = 8;
/// Bins of the |w| histograms (log axis).
const MAGNITUDE_BINS: usize = 60;
/// Pruned fractions of the sweep, as `receptor prune-sweep` uses them.
pub const SWEEP_FRACTIONS: [f64; 10] = [0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9];

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
        /// Search settings.
        settings: super::state::SearchSettings,
    },
    /// Sensitivity of every unit of `layer` at the mean probe input.
    Sensitivity {
        /// Layer index.
        layer: usize,
        /// Mean probe input, `[input size]`.
        mean: Arc<Vec<f32>>,
    },
    /// The pruning curve on a labelled probe.
    Sweep(Arc<ProbeData>),
}

impl Job {
    fn title(&self, net: &Network) -> String {
        let lname = |l: usize| {
            net.layers
                .get(l)
                .map_or("?", |x| x.name.as_str())
                .to_string()
        };
        match self {
            Job::Model => "Computing sparsity statistics and bounds".into(),
            Job::LoadProbe(ProbeChoice::Uniform) => "Drawing the uniform probe".into(),
            Job::LoadProbe(ProbeChoice::File(p)) => format!("Reading probe {}", p.display()),
            Job::Probe(_) => "Screening units on the probe".into(),
            Job::Prefer { layer, units, .. } => format!(
                "Searching preferred inputs of layer {} (units {}..{})",
                lname(*layer),
                units.first().copied().unwrap_or(0),
                units.last().map_or(0, |u| u + 1)
            ),
            Job::Sensitivity { layer, .. } => {
                format!("Computing sensitivity of layer {}", lname(*layer))
            }
            Job::Sweep(_) => "Pruning sweep".into(),
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
        result: Result<(Network, String, Option<PathBuf>)>,
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
        /// Settings used.
        settings: super::state::SearchSettings,
        /// (unit, map) pairs, or the error.
        result: Result<Vec<(usize, PreferredMap)>>,
    },
    /// Sensitivity maps of a layer, `[units, inputs]`.
    Sensitivity {
        /// Tag.
        tag: Tag,
        /// Layer index.
        layer: usize,
        /// Maps and their largest |value|, or the error.
        result: Result<(Arc<Array2<f32>>, f32)>,
    },
    /// The pruning curve.
    Sweep {
        /// Tag.
        tag: Tag,
        /// Points or error.
        result: Result<Arc<Vec<SweepPoint>>>,
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
        if let Some(tx) = &self.jobs {
            self.pending.fetch_add(1, Ordering::SeqCst);
            let ticket = Ticket {
                job,
                net,
                tag,
                cancel: self.cancel.clone(),
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
                    ModelSource::File(path) => crate::model::load(&path, &opts)
                        .map(|n| (n, path.display().to_string(), Some(path.clone()))),
                    ModelSource::Text { text, origin } => {
                        let base = std::path::Path::new(".");
                        crate::model::from_json_str(&text, &origin, base, &opts)
                            .map(|n| (n, origin.clone(), None))
                    }
                };
                let _ = tx.send(Reply::ModelOpened { request, result });
                ctx.request_repaint();
            });
        if let Err(e) = spawned {
            let _ = fallback_tx.send(Reply::ModelOpened {
                request,
                result: Err(Error::usage(format!(
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
                result: Err(Error::usage(format!("cannot start a helper thread: {e}"))),
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
    match &t.job {
        Job::Model => {
            let (units, layers) = crate::analysis::sparsity::all_stats(net, None);
            let mut per_layer: Vec<Vec<_>> = vec![Vec::new(); net.layers.len()];
            for u in units {
                if let Some(v) = per_layer.get_mut(u.layer_index) {
                    v.push(u);
                }
            }
            progress.set(0.3);
            let magnitude = net
                .layers
                .iter()
                .map(|l| magnitude_histogram(l.weights.iter()))
                .collect();
            progress.set(0.5);
            let bounds = crate::analysis::bounds::interval_bounds(net);
            Some(Reply::Model {
                tag,
                stats: Arc::new(StatsResult {
                    units: per_layer,
                    layers,
                    magnitude,
                }),
                bounds: Arc::new(bounds),
            })
        }
        Job::LoadProbe(choice) => {
            let result = load_probe(net, choice);
            Some(Reply::ProbeLoaded { tag, result })
        }
        Job::Probe(data) => {
            let mut src = MemoryProbe::new(data.clone());
            let opts = crate::analysis::screen::ScreenOptions::default().with_chunk_rows(
                std::num::NonZeroUsize::new(TRACE_CHUNK).unwrap_or(std::num::NonZeroUsize::MIN),
            );
            let screen =
                crate::analysis::screen::screen(net, &mut src, &opts, &progress.sub(0.0, 0.4)).map(
                    |r| {
                        let mut layers: Vec<Vec<_>> =
                            vec![Vec::new(); net.layers.len().saturating_sub(1)];
                        for u in &r.units {
                            if let Some(v) = layers.get_mut(u.layer_index) {
                                v.push(u.clone());
                            }
                        }
                        Arc::new(ScreenResult {
                            layers,
                            samples: r.samples,
                            probe: r.probe.clone(),
                            rows: Arc::new(r.units),
                        })
                    },
                );
            if matches!(screen, Err(Error::Cancelled)) {
                return None;
            }
            let activity = trace_activity(net, data, &progress.sub(0.4, 1.0)).map(Arc::new);
            if matches!(activity, Err(Error::Cancelled)) {
                return None;
            }
            Some(Reply::Probe {
                tag,
                screen,
                activity,
            })
        }
        Job::Prefer {
            layer,
            units,
            settings,
        } => {
            let result = prefer_batch(net, *layer, units, settings, progress);
            if matches!(result, Err(Error::Cancelled)) {
                return None;
            }
            Some(Reply::Prefer {
                tag,
                layer: *layer,
                settings: *settings,
                result,
            })
        }
        Job::Sensitivity { layer, mean } => {
            let result = sensitivity(net, *layer, mean);
            Some(Reply::Sensitivity {
                tag,
                layer: *layer,
                result,
            })
        }
        Job::Sweep(data) => {
            let mut src = MemoryProbe::new(data.clone());
            let result =
                crate::analysis::prune::prune_sweep(net, &mut src, &SWEEP_FRACTIONS, progress)
                    .map(Arc::new);
            if matches!(result, Err(Error::Cancelled)) {
                return None;
            }
            Some(Reply::Sweep { tag, result })
        }
    }
}

/// Reads the chosen probe into memory and computes its mean input (f64 sums).
pub fn load_probe(net: &Network, choice: &ProbeChoice) -> Result<OpenProbe> {
    let (mut src, path) = match choice {
        ProbeChoice::Uniform => (
            probe::uniform(
                net,
                probe::DEFAULT_UNIFORM_SAMPLES,
                probe::DEFAULT_UNIFORM_SEED,
            ),
            None,
        ),
        ProbeChoice::File(p) => (probe::open(p, net)?, Some(p.clone())),
    };
    let data = probe::read_all(src.as_mut())?;
    let rows = data.inputs.nrows();
    if rows == 0 {
        return Err(Error::probe(&data.origin, "the probe has no samples"));
    }
    let mut sums = vec![0.0f64; data.inputs.ncols()];
    for row in data.inputs.rows() {
        for (s, v) in sums.iter_mut().zip(row.iter()) {
            *s += f64::from(*v);
        }
    }
    let mean = sums.iter().map(|s| (s / rows as f64) as f32).collect();
    Ok(OpenProbe {
        data: Arc::new(data),
        mean: Arc::new(mean),
        path,
    })
}

/// Histogram of log10 |w| with [`MAGNITUDE_BINS`] bins between the smallest and largest
/// non-zero magnitude; exact zeros are counted apart.
pub fn magnitude_histogram<'a>(
    weights: impl Iterator<Item = &'a f32> + Clone,
) -> MagnitudeHistogram {
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    let mut zeros = 0u64;
    for w in weights.clone() {
        let a = f64::from(w.abs());
        if a == 0.0 {
            zeros += 1;
        } else {
            let l = a.log10();
            lo = lo.min(l);
            hi = hi.max(l);
        }
    }
    if !lo.is_finite() {
        return MagnitudeHistogram {
            start: 0.0,
            width: 1.0,
            counts: Vec::new(),
            zeros,
        };
    }
    let span = (hi - lo).max(1e-6);
    let width = span / MAGNITUDE_BINS as f64;
    let mut counts = vec![0u64; MAGNITUDE_BINS];
    for w in weights {
        let a = f64::from(w.abs());
        if a > 0.0 {
            let b = (((a.log10() - lo) / width) as usize).min(MAGNITUDE_BINS - 1);
            counts[b] += 1;
        }
    }
    MagnitudeHistogram {
        start: lo,
        width,
        counts,
        zeros,
    }
}

/// Preferred inputs of one batch of units. The first layer uses the closed form (exact and
/// instant: b + sum of max(w*low, w*high)); deeper layers use the core's batched search.
fn prefer_batch(
    net: &Network,
    layer: usize,
    units: &[usize],
    settings: &super::state::SearchSettings,
    progress: &dyn Progress,
) -> Result<Vec<(usize, PreferredMap)>> {
    if layer == 0 && settings.l2 == 0.0 && settings.tv == 0.0 {
        let l = &net.layers[0];
        return Ok(units
            .iter()
            .map(|&u| {
                let (value, input) = crate::analysis::prefer::closed_form_first_layer(net, u);
                let z = value as f32;
                let activation = if matches!(l.activation, crate::model::Activation::Softmax) {
                    f32::NAN
                } else {
                    l.activation.apply_scalar(z)
                };
                (
                    u,
                    PreferredMap {
                        input,
                        preactivation: z,
                        activation,
                        finite: value.is_finite(),
                    },
                )
            })
            .collect());
    }
    let found = crate::analysis::prefer::prefer(net, layer, units, &settings.options()?, progress)?;
    Ok(found
        .into_iter()
        .map(|p| {
            (
                p.unit,
                PreferredMap {
                    input: p.input,
                    preactivation: p.preactivation,
                    activation: p.activation,
                    finite: p.finite,
                },
            )
        })
        .collect())
}

/// Gradients of every unit of `layer` at the mean probe input: `[units, inputs]`.
fn sensitivity(net: &Network, layer: usize, mean: &[f32]) -> Result<(Arc<Array2<f32>>, f32)> {
    let units = net
        .layers
        .get(layer)
        .ok_or_else(|| Error::usage(format!("there is no layer {layer}")))?
        .units();
    let d = mean.len();
    let mut x = Array2::<f32>::zeros((units, d));
    for mut row in x.rows_mut() {
        for (v, m) in row.iter_mut().zip(mean) {
            *v = *m;
        }
    }
    let ids: Vec<usize> = (0..units).collect();
    let (_, g) = crate::analysis::gradient::input_gradient(net, layer, &ids, x.view());
    let m = g
        .iter()
        .filter(|v| v.is_finite())
        .fold(0.0f32, |m, v| m.max(v.abs()));
    Ok((Arc::new(g), m))
}

/// Activation histograms and top samples of every unit, in two chunked passes over the
/// probe (range first, then counts), so memory stays bounded by one chunk's trace.
fn trace_activity(
    net: &Network,
    data: &ProbeData,
    progress: &dyn Progress,
) -> Result<ActivityResult> {
    let rows = data.inputs.nrows();
    let last = net.layers.len() - 1;
    let mut layers: Vec<Vec<UnitActivity>> = net
        .layers
        .iter()
        .map(|l| {
            vec![
                UnitActivity {
                    lo: f32::INFINITY,
                    hi: f32::NEG_INFINITY,
                    hist: vec![0; HIST_BINS],
                    top: Vec::new(),
                };
                l.units()
            ]
        })
        .collect();
    let chunks = rows.div_ceil(TRACE_CHUNK).max(1);
    for pass in 0..2 {
        for c in 0..chunks {
            if progress.cancelled() {
                return Err(Error::Cancelled);
            }
            progress.set((pass * chunks + c) as f32 / (2 * chunks) as f32);
            let start = c * TRACE_CHUNK;
            let end = (start + TRACE_CHUNK).min(rows);
            let x = data.inputs.slice(s![start..end, ..]);
            let trace = crate::analysis::forward::forward_trace(net, x, last);
            for (l, acts) in layers.iter_mut().enumerate() {
                let (Some(pre), Some(post)) = (trace.pre.get(l), trace.post.get(l)) else {
                    continue;
                };
                for (u, a) in acts.iter_mut().enumerate() {
                    let zc = pre.column(u);
                    let ac = post.column(u);
                    if pass == 0 {
                        for (r, (&z, &v)) in zc.iter().zip(ac.iter()).enumerate() {
                            if v.is_finite() {
                                a.lo = a.lo.min(v);
                                a.hi = a.hi.max(v);
                            }
                            push_top(&mut a.top, (start + r, z, v));
                        }
                    } else {
                        let span = a.hi - a.lo;
                        for &v in ac.iter() {
                            if !v.is_finite() {
                                continue;
                            }
                            let b = if span > 0.0 {
                                (((v - a.lo) / span) * HIST_BINS as f32) as usize
                            } else {
                                0
                            };
                            a.hist[b.min(HIST_BINS - 1)] += 1;
                        }
                    }
                }
            }
        }
    }
    progress.set(1.0);
    Ok(ActivityResult { layers })
}

/// Keeps the [`TOP_SAMPLES`] entries with the highest pre-activation, highest first.
fn push_top(top: &mut Vec<(usize, f32, f32)>, item: (usize, f32, f32)) {
    if !item.1.is_finite() {
        return;
    }
    if top.len() == TOP_SAMPLES && top.last().is_some_and(|t| t.1 >= item.1) {
        return;
    }
    let at = top.partition_point(|t| t.1 >= item.1);
    top.insert(at, item);
    top.truncate(TOP_SAMPLES);
}

/// A probe held in memory, served in chunks to the core's streaming functions.
pub struct MemoryProbe {
    data: Arc<ProbeData>,
    at: usize,
}

impl MemoryProbe {
    /// Serves `data` from its first row.
    pub fn new(data: Arc<ProbeData>) -> Self {
        MemoryProbe { data, at: 0 }
    }
}

impl ProbeSource for MemoryProbe {
    fn describe(&self) -> String {
        self.data.origin.clone()
    }

    fn next_chunk(&mut self, max_rows: usize) -> Result<Option<ProbeChunk>> {
        let rows = self.data.inputs.nrows();
        if rows == 0 {
            return Err(Error::probe(&self.data.origin, "the probe has no samples"));
        }
        if self.at >= rows {
            return Ok(None);
        }
        let end = (self.at + max_rows.max(1)).min(rows);
        let chunk = ProbeChunk {
            inputs: self.data.inputs.slice(s![self.at..end, ..]).to_owned(),
            labels: self.data.labels.as_ref().map(|l| l[self.at..end].to_vec()),
            first_row: self.at,
        };
        self.at = end;
        Ok(Some(chunk))
    }

    fn total_rows(&self) -> Option<usize> {
        Some(self.data.inputs.nrows())
    }

    fn has_labels(&self) -> bool {
        self.data.labels.is_some()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn top_keeps_highest_first() {
        let mut top = Vec::new();
        for (r, z) in [3.0f32, 1.0, 9.0, 4.0, 7.0, 2.0, 8.0, 6.0, 5.0, 0.5]
            .iter()
            .enumerate()
        {
            push_top(&mut top, (r, *z, *z));
        }
        let zs: Vec<f32> = top.iter().map(|t| t.1).collect();
        assert_eq!(zs, vec![9.0, 8.0, 7.0, 6.0, 5.0, 4.0, 3.0, 2.0]);
    }

    #[test]
    fn magnitude_histogram_counts_every_weight() {
        let w = [0.0f32, 0.001, -0.01, 0.1, -1.0, 0.0];
        let h = magnitude_histogram(w.iter());
        assert_eq!(h.zeros, 2);
        assert_eq!(h.counts.iter().sum::<u64>(), 4);
        // 0.001 is not exact in f32 (0.0010000000475), so log10 is -3 only to about 2e-8.
        approx::assert_abs_diff_eq!(h.start, -3.0, epsilon = 1e-6);
    }
}
