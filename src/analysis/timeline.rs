//! The training-run view: how a network's units change over a series of checkpoints.
//!
//! Fed one checkpoint at a time ([`TimelineBuilder::push`]), in training order, each with a
//! fresh stream of the same probe. Per checkpoint it screens the hidden units
//! ([`super::screen::screen_with_accuracy`]: statuses, active fractions, sound upper
//! bounds by [`super::bounds`], and the accuracy on a labelled probe) and takes the weight
//! statistics of [`super::sparsity::layer_stats`] (Hoyer sparseness, near-zero fraction,
//! incoming-weight L2 norms), so every number means what it means in `screen` and `stats`.
//! The builder keeps the previous checkpoint's weights of the screened layers (for the mean
//! update) and nothing else of it, so with the caller's current network at most two
//! checkpoints' weights are held. The drift of each unit needs the first checkpoint again at
//! the end ([`TimelineBuilder::finish`]), when the previous one is the last.
//!
//! Layers covered: the hidden layers with units (all but the last, pooling and flatten
//! left out), the layers `screen` reports.
//!
//! Definitions (the `timeline` tables):
//! - a checkpoint's key is its step, or its position from 0 when the files have none (the
//!   caller decides; see `model::series`);
//! - `first_dead_proven`: the key of the first checkpoint from which the unit's status is
//!   `dead_proven` in every later checkpoint up to the last; `None` when it is not
//!   `dead_proven` in the last. A unit that dies and revives is dead from the checkpoint
//!   where it died for the last time;
//! - `first_dead_on_probe`: the same with "never active on the probe" (a rectifier whose
//!   active fraction is 0 and whose values were finite: status `dead_proven` with no active
//!   sample, or `dead_on_probe`);
//! - `drift`: the cosine distance `1 - <w0, wT> / (|w0| |wT|)` (computed as
//!   `|w0/|w0| - wT/|wT||^2 / 2`, so equal vectors give exactly 0) between the unit's incoming
//!   weights in the first and the last checkpoint, in f64, from 0 (same direction) to 2
//!   (opposite); NaN when either vector is all zero (as `scipy.spatial.distance.cosine`);
//! - `final_l2`: the L2 norm of the unit's incoming weights in the last checkpoint;
//! - per checkpoint and layer: the counts of units whose `screen` status is `dead_proven`,
//!   `dead_on_probe` and `rarely_active` (each unit in one of them at most), the layer's
//!   mean Hoyer sparseness and near-zero fraction as `stats` gives them, and
//!   `mean_abs_update`, the mean of `|w_t - w_(t-1)|` over the layer's weights (biases not
//!   included; `None` for the first checkpoint).
//!
//! A series of one checkpoint gives one row per layer and per unit (drift 0, no update).

use super::Progress;
use super::screen::{ScreenOptions, Status, screen_with_accuracy};
use super::sparsity::layer_stats;
use crate::error::{Error, Result};
use crate::model::Network;
use crate::model::series::Architecture;
use crate::probe::ProbeSource;
use ndarray::{Array2, ArrayView1};

/// Options of a timeline, valid by construction.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct TimelineOptions {
    screen: ScreenOptions,
    zero_tol: Option<f64>,
}

impl TimelineOptions {
    /// Checked options: the screening options (`rare`, chunk rows) and the absolute
    /// near-zero tolerance of the weight statistics (`None`: 0.01 x the layer's largest |w|
    /// in each checkpoint, as `stats`).
    ///
    /// Errors: [`Error::BadOption`] (`zero_tol`) when `zero_tol` is negative or not finite.
    pub fn new(screen: ScreenOptions, zero_tol: Option<f64>) -> Result<Self> {
        if let Some(t) = zero_tol
            && !(t.is_finite() && t >= 0.0)
        {
            return Err(Error::bad_option(
                "zero_tol",
                t,
                "must be a finite number >= 0",
            ));
        }
        Ok(TimelineOptions { screen, zero_tol })
    }

    /// The screening options.
    pub fn screen(&self) -> &ScreenOptions {
        &self.screen
    }

    /// The near-zero tolerance (`None`: relative, as `stats`).
    pub fn zero_tol(&self) -> Option<f64> {
        self.zero_tol
    }
}

/// One row of the per-checkpoint table: one screened layer in one checkpoint.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckpointLayer {
    /// Position of the checkpoint in the series (from 0).
    pub checkpoint: usize,
    /// The checkpoint's key: its step, or its position when the series has no steps.
    pub step: u64,
    /// Layer name.
    pub layer: String,
    /// Layer index in the network (from 0).
    pub layer_index: usize,
    /// Units of the layer.
    pub units: usize,
    /// Units whose status is `dead_proven`.
    pub dead_proven: usize,
    /// Units whose status is `dead_on_probe`.
    pub dead_on_probe: usize,
    /// Units whose status is `rarely_active`.
    pub rarely_active: usize,
    /// Mean Hoyer sparseness of the units' incoming weights (`stats`' layer summary).
    pub mean_hoyer: f64,
    /// Fraction of the layer's weights that are near zero (`stats`' layer summary).
    pub near_zero_frac: f64,
    /// Mean |w_t - w_(t-1)| over the layer's weights; `None` for the first checkpoint.
    pub mean_abs_update: Option<f64>,
    /// Accuracy of the whole network on the labelled probe at this checkpoint (the same on
    /// every layer's row); `None` for an unlabelled probe.
    pub accuracy: Option<f64>,
}

/// One unit in one checkpoint: what the app plots against the step.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct UnitPoint {
    /// Fraction of probe samples on which the unit is active (`screen`'s `active_frac`).
    pub active_frac: f64,
    /// Sound upper bound of the pre-activation over the input box (`screen`'s
    /// `upper_bound`).
    pub upper_bound: f64,
    /// L2 norm of the unit's incoming weights (`stats`' `l2`).
    pub l2: f64,
    /// The unit's screening status.
    pub status: Status,
}

/// The history of every unit of one screened layer.
#[derive(Debug, Clone, PartialEq)]
pub struct LayerHistory {
    /// Layer name.
    pub layer: String,
    /// Layer index in the network (from 0).
    pub layer_index: usize,
    /// Units of the layer.
    pub units: usize,
    /// `[checkpoints x units]`, checkpoint-major: the point of unit `k` in checkpoint `c` is
    /// `points[c * units + k]`.
    pub points: Vec<UnitPoint>,
}

impl LayerHistory {
    /// Number of checkpoints recorded.
    pub fn checkpoints(&self) -> usize {
        self.points.len().checked_div(self.units).unwrap_or(0)
    }

    /// Unit `unit`'s point in checkpoint `checkpoint`, or `None` out of range.
    pub fn point(&self, checkpoint: usize, unit: usize) -> Option<&UnitPoint> {
        if unit >= self.units {
            return None;
        }
        self.points.get(checkpoint * self.units + unit)
    }

    /// Unit `unit`'s points in checkpoint order (empty when `unit` is out of range).
    pub fn unit(&self, unit: usize) -> impl Iterator<Item = &UnitPoint> + '_ {
        let (start, units) = if unit < self.units {
            (unit, self.units)
        } else {
            (self.points.len(), 1)
        };
        self.points.iter().skip(start).step_by(units)
    }
}

/// One row of the per-unit table.
#[derive(Debug, Clone, PartialEq)]
pub struct UnitTimeline {
    /// Layer name.
    pub layer: String,
    /// Layer index in the network (from 0).
    pub layer_index: usize,
    /// Unit index within the layer (from 0).
    pub unit: usize,
    /// Key of the first checkpoint from which the unit stays `dead_proven` to the end.
    pub first_dead_proven: Option<u64>,
    /// Key of the first checkpoint from which the unit stays never active on the probe to
    /// the end.
    pub first_dead_on_probe: Option<u64>,
    /// The unit's status in the last checkpoint.
    pub last_status: Status,
    /// Cosine distance of its incoming weights between the first and the last checkpoint
    /// (0 to 2; NaN when either is all zero).
    pub drift: f64,
    /// L2 norm of its incoming weights in the last checkpoint.
    pub final_l2: f64,
}

/// The whole timeline of a series.
#[derive(Debug, Clone, PartialEq)]
pub struct Timeline {
    /// The key of every checkpoint, in order.
    pub steps: Vec<u64>,
    /// Per checkpoint (outer, in order) and screened layer (inner, in layer order).
    pub checkpoints: Vec<CheckpointLayer>,
    /// Accuracy per checkpoint on a labelled probe (`None` for an unlabelled one).
    pub accuracy: Vec<Option<f64>>,
    /// Per unit of every screened layer, in layer and unit order.
    pub units: Vec<UnitTimeline>,
    /// Per screened layer, every unit's history.
    pub layers: Vec<LayerHistory>,
    /// Probe samples per checkpoint.
    pub samples: usize,
    /// The probe's description.
    pub probe: String,
}

impl Timeline {
    /// The history of layer `layer_index` (a network layer index), if it is screened.
    pub fn layer(&self, layer_index: usize) -> Option<&LayerHistory> {
        self.layers.iter().find(|h| h.layer_index == layer_index)
    }

    /// True when the probe was labelled (the per-checkpoint table has `accuracy`).
    pub fn labelled(&self) -> bool {
        self.accuracy.iter().any(Option::is_some)
    }
}

/// Builds a [`Timeline`] one checkpoint at a time (see the module docs).
#[derive(Debug, Clone)]
pub struct TimelineBuilder {
    opts: TimelineOptions,
    architecture: Option<Architecture>,
    /// The screened layers' indices.
    screened: Vec<usize>,
    /// The previous checkpoint's weights of the screened layers, `[units, fan_in]` each.
    previous: Vec<Array2<f32>>,
    steps: Vec<u64>,
    rows: Vec<CheckpointLayer>,
    accuracy: Vec<Option<f64>>,
    layers: Vec<LayerHistory>,
    samples: usize,
    probe: String,
}

impl TimelineBuilder {
    /// An empty timeline.
    pub fn new(opts: TimelineOptions) -> Self {
        TimelineBuilder {
            opts,
            architecture: None,
            screened: Vec::new(),
            previous: Vec::new(),
            steps: Vec::new(),
            rows: Vec::new(),
            accuracy: Vec::new(),
            layers: Vec::new(),
            samples: 0,
            probe: String::new(),
        }
    }

    /// Checkpoints pushed so far.
    pub fn len(&self) -> usize {
        self.steps.len()
    }

    /// True before the first [`TimelineBuilder::push`].
    pub fn is_empty(&self) -> bool {
        self.steps.is_empty()
    }

    /// Adds the next checkpoint, with key `step` (its training step, or its position), run
    /// on `probe` (a fresh stream of the same probe each time; labelled for accuracy).
    ///
    /// Errors: [`Error::Usage`] when `net`'s architecture differs from the first pushed
    /// network's (naming the layer and the shapes) or `step` is not larger than the
    /// previous key; those of [`screen_with_accuracy`] (probe errors, [`Error::Cancelled`]).
    pub fn push(
        &mut self,
        step: u64,
        net: &Network,
        probe: &mut dyn ProbeSource,
        progress: &dyn Progress,
    ) -> Result<()> {
        let architecture = Architecture::of(net);
        match &self.architecture {
            None => {}
            Some(first) => {
                if let Some(d) = first.difference(&architecture) {
                    return Err(Error::usage(format!(
                        "checkpoint {} ({}): not the architecture of the first checkpoint: {d}",
                        self.len(),
                        net.name()
                    )));
                }
            }
        }
        if let Some(&last) = self.steps.last()
            && step <= last
        {
            return Err(Error::usage(format!(
                "checkpoint {} has key {step}, not after the previous key {last}: checkpoints go in training order",
                self.len()
            )));
        }
        let (report, accuracy) = screen_with_accuracy(net, probe, self.opts.screen(), progress)?;
        if self.architecture.is_none() {
            self.architecture = Some(architecture);
            self.screened = screened_layers(net);
            self.layers = self
                .screened
                .iter()
                .map(|&l| LayerHistory {
                    layer: net.layer(l).name.clone(),
                    layer_index: l,
                    units: net.layer(l).units(),
                    points: Vec::new(),
                })
                .collect();
            self.samples = report.samples;
            self.probe.clone_from(&report.probe);
        }
        let checkpoint = self.len();
        let mut updates = Vec::with_capacity(self.screened.len());
        for (i, &l) in self.screened.iter().enumerate() {
            let w = &net.layer(l).weights;
            updates.push(self.previous.get(i).map(|p| mean_abs_difference(p, w)));
        }
        for ((&l, history), update) in self.screened.iter().zip(&mut self.layers).zip(updates) {
            let (unit_stats, summary) = layer_stats(net, l, self.opts.zero_tol());
            let screened = report.units.iter().filter(|u| u.layer_index == l);
            let mut row = CheckpointLayer {
                checkpoint,
                step,
                layer: history.layer.clone(),
                layer_index: l,
                units: history.units,
                dead_proven: 0,
                dead_on_probe: 0,
                rarely_active: 0,
                mean_hoyer: summary.mean_hoyer,
                near_zero_frac: summary.near_zero_frac,
                mean_abs_update: update,
                accuracy,
            };
            for (u, s) in screened.zip(&unit_stats) {
                match u.status {
                    Status::DeadProven => row.dead_proven += 1,
                    Status::DeadOnProbe => row.dead_on_probe += 1,
                    Status::RarelyActive => row.rarely_active += 1,
                    _ => {}
                }
                history.points.push(UnitPoint {
                    active_frac: u.active_frac,
                    upper_bound: u.upper_bound,
                    l2: s.l2,
                    status: u.status,
                });
            }
            self.rows.push(row);
        }
        // Only now is the previous checkpoint's copy replaced (one copy held at a time).
        self.previous.clear();
        self.previous
            .extend(self.screened.iter().map(|&l| net.layer(l).weights.clone()));
        self.steps.push(step);
        self.accuracy.push(accuracy);
        Ok(())
    }

    /// Ends the timeline. `first` is the first checkpoint again (loaded anew by the caller),
    /// for the drift of every unit against the last checkpoint, whose weights the builder
    /// still holds.
    ///
    /// Errors: [`Error::Usage`] when nothing was pushed or `first` does not have the
    /// series' architecture.
    pub fn finish(self, first: &Network) -> Result<Timeline> {
        let Some(architecture) = &self.architecture else {
            return Err(Error::usage("a timeline needs at least one checkpoint"));
        };
        if let Some(d) = architecture.difference(&Architecture::of(first)) {
            return Err(Error::usage(format!(
                "the first checkpoint given back differs from the one pushed: {d}"
            )));
        }
        let last = self.len() - 1;
        let mut units = Vec::new();
        for ((history, &l), w_last) in self.layers.iter().zip(&self.screened).zip(&self.previous) {
            let w_first = &first.layer(l).weights;
            for k in 0..history.units {
                let points: Vec<&UnitPoint> = history.unit(k).collect();
                let from = |dead: &dyn Fn(&UnitPoint) -> bool| {
                    let stays = points.iter().rev().take_while(|p| dead(p)).count();
                    (stays > 0).then(|| self.steps[points.len() - stays])
                };
                let final_l2 = points.get(last).map_or(f64::NAN, |p| p.l2);
                units.push(UnitTimeline {
                    layer: history.layer.clone(),
                    layer_index: l,
                    unit: k,
                    first_dead_proven: from(&|p| p.status == Status::DeadProven),
                    first_dead_on_probe: from(&never_active),
                    last_status: points.get(last).map_or(Status::Ok, |p| p.status),
                    drift: cosine_distance(w_first.row(k), w_last.row(k)),
                    final_l2,
                });
            }
        }
        Ok(Timeline {
            steps: self.steps,
            checkpoints: self.rows,
            accuracy: self.accuracy,
            units,
            layers: self.layers,
            samples: self.samples,
            probe: self.probe,
        })
    }
}

/// Runs a whole series: pushes every `(key, network)` of `checkpoints` (the
/// `model::series::Series::networks` iterator, or any other) with a probe made by
/// `open_probe` for it, then finishes with `first_again()`. `count` is the number of
/// checkpoints, for progress (each checkpoint is an equal share).
///
/// Errors: the iterator's (loading, architecture), `open_probe`'s, `first_again`'s, those of
/// [`TimelineBuilder::push`] and [`TimelineBuilder::finish`].
pub fn timeline(
    checkpoints: &mut dyn Iterator<Item = Result<(u64, Network)>>,
    count: usize,
    open_probe: &mut dyn FnMut(&Network) -> Result<Box<dyn ProbeSource>>,
    first_again: &mut dyn FnMut() -> Result<Network>,
    opts: &TimelineOptions,
    progress: &dyn Progress,
) -> Result<Timeline> {
    let mut builder = TimelineBuilder::new(opts.clone());
    let share = 1.0 / count.max(1) as f32;
    for (i, item) in checkpoints.enumerate() {
        if progress.cancelled() {
            return Err(Error::Cancelled);
        }
        let (step, net) = item?;
        let mut probe = open_probe(&net)?;
        let lo = i as f32 * share;
        let sub = super::SubProgress::new(progress, lo, (lo + share).min(1.0));
        builder.push(step, &net, probe.as_mut(), &sub)?;
        // `net` is dropped here, before the next checkpoint is loaded.
    }
    let first = first_again()?;
    let t = builder.finish(&first)?;
    progress.set(1.0);
    Ok(t)
}

/// The layers `screen` reports: every layer but the last that has units.
fn screened_layers(net: &Network) -> Vec<usize> {
    let hidden = net.layers().len().saturating_sub(1);
    (0..hidden).filter(|&l| net.layer(l).units() > 0).collect()
}

/// Never active on the probe, with finite values (see the module docs).
fn never_active(p: &UnitPoint) -> bool {
    matches!(p.status, Status::DeadProven | Status::DeadOnProbe) && p.active_frac == 0.0
}

/// Mean of `|a - b|` over two arrays of one shape, summed in f64 (0 for empty arrays).
fn mean_abs_difference(a: &Array2<f32>, b: &Array2<f32>) -> f64 {
    let n = a.len();
    if n == 0 {
        return 0.0;
    }
    let sum: f64 = a
        .iter()
        .zip(b.iter())
        .map(|(x, y)| (f64::from(*x) - f64::from(*y)).abs())
        .sum();
    sum / n as f64
}

/// Cosine distance `1 - <a, b> / (|a| |b|)` of two vectors `[n]`, in f64, computed as
/// `|a/|a| - b/|b||^2 / 2` (the same number, without the cancellation of `1 - cos` near 0:
/// equal vectors give exactly 0), clamped to [0, 2]; NaN when either vector is all zero or
/// they differ in length.
pub fn cosine_distance(a: ArrayView1<f32>, b: ArrayView1<f32>) -> f64 {
    if a.len() != b.len() {
        return f64::NAN;
    }
    let norm = |v: &ArrayView1<f32>| {
        v.iter()
            .map(|x| f64::from(*x) * f64::from(*x))
            .sum::<f64>()
            .sqrt()
    };
    let (na, nb) = (norm(&a), norm(&b));
    if na == 0.0 || nb == 0.0 {
        return f64::NAN;
    }
    let sq: f64 = a
        .iter()
        .zip(b.iter())
        .map(|(x, y)| {
            let d = f64::from(*x) / na - f64::from(*y) / nb;
            d * d
        })
        .sum();
    (sq / 2.0).clamp(0.0, 2.0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::Silent;
    use crate::model::{Activation, InputSpec, Layer, LayerKind};
    use crate::probe::ProbeData;
    use crate::probe::memory::MemoryProbe;
    use approx::assert_abs_diff_eq;
    use ndarray::{Array1, array};
    use std::sync::Arc;

    /// Input box [0, 1]^2, one relu layer `h` with incoming weights `w: [units, 2]` and bias
    /// `b`, and a softmax output layer of 2 units reading `h` with weights `out`.
    fn net(w: Array2<f32>, b: Array1<f32>, out: Array2<f32>, out_b: Array1<f32>) -> Network {
        let input = InputSpec::vector_box(2, 0.0, 1.0);
        let h = Layer {
            kind: LayerKind::Dense,
            name: "h".into(),
            activation: Activation::Relu,
            weights: w,
            bias: b,
            labels: None,
        };
        let o = Layer {
            kind: LayerKind::Dense,
            name: "out".into(),
            activation: Activation::Softmax,
            weights: out,
            bias: out_b,
            labels: None,
        };
        Network::new("t", "t", input, vec![h, o]).expect("valid network")
    }

    /// The 10 x 10 grid over [0, 0.45]^2 (x = i / 20): every sample has x0 + x1 <= 0.9.
    fn low_grid(labels: Option<Vec<usize>>) -> Arc<ProbeData> {
        let inputs = Array2::from_shape_fn((100, 2), |(r, c)| {
            let i = if c == 0 { r / 10 } else { r % 10 };
            i as f32 / 20.0
        });
        Arc::new(ProbeData {
            inputs,
            labels,
            origin: "grid".into(),
        })
    }

    /// Pushes every `(step, net)` on the grid probe and finishes with the first again.
    fn run(nets: &[(u64, Network)], probe: &Arc<ProbeData>) -> Timeline {
        let mut b = TimelineBuilder::new(TimelineOptions::default());
        for (s, n) in nets {
            b.push(*s, n, &mut MemoryProbe::new(probe.clone()), &Silent)
                .expect("push");
        }
        b.finish(&nets[0].1).expect("finish")
    }

    // Biases for w = [1, 1] on the box [0, 1]^2 (upper bound of z = b + 2, sound and exact
    // for one layer, Gowal et al. 2018) and on the grid (largest z = b + 0.9):
    /// Alive on the grid and in the box.
    const ALIVE: f32 = 0.5;
    /// Never active on the grid (z <= -0.6) but upper bound 0.5 > 0: dead_on_probe.
    const OFF_PROBE: f32 = -1.5;
    /// Upper bound -1 <= 0: dead_proven.
    const DEAD: f32 = -3.0;

    /// Four units with weights [1, 1]; the bias of each unit at each of the steps 10..50.
    fn series(biases: [[f32; 4]; 5]) -> Vec<(u64, Network)> {
        biases
            .iter()
            .enumerate()
            .map(|(i, b)| {
                let w = Array2::from_elem((4, 2), 1.0f32);
                let n = net(
                    w,
                    Array1::from(b.to_vec()),
                    Array2::from_elem((2, 4), 0.1),
                    Array1::zeros(2),
                );
                (10 * (i as u64 + 1), n)
            })
            .collect()
    }

    #[test]
    fn units_made_dead_at_known_steps_are_reported_at_exactly_those_steps() {
        // u0 dies at 30 and stays dead; u1 dies at 20, revives at 30, dies again at 40;
        // u2 dies at 20 and revives at 50 (alive in the last); u3 is dead on the probe from
        // 10 and provably dead from 30.
        let (a, p, d) = (ALIVE, OFF_PROBE, DEAD);
        let nets = series([
            [a, a, a, p],
            [a, d, d, p],
            [d, a, d, d],
            [d, d, d, d],
            [d, d, a, d],
        ]);
        let t = run(&nets, &low_grid(None));
        assert_eq!(t.steps, vec![10, 20, 30, 40, 50]);
        let first: Vec<(Option<u64>, Option<u64>)> = t
            .units
            .iter()
            .map(|u| (u.first_dead_proven, u.first_dead_on_probe))
            .collect();
        assert_eq!(
            first,
            vec![
                (Some(30), Some(30)),
                (Some(40), Some(40)),
                (None, None),
                (Some(30), Some(10)),
            ]
        );
        let last: Vec<Status> = t.units.iter().map(|u| u.last_status).collect();
        assert_eq!(
            last,
            vec![
                Status::DeadProven,
                Status::DeadProven,
                Status::AlwaysActive,
                Status::DeadProven
            ]
        );
        // Per checkpoint, the screen statuses counted (each unit in one status).
        let counts: Vec<(u64, usize, usize)> = t
            .checkpoints
            .iter()
            .map(|r| (r.step, r.dead_proven, r.dead_on_probe))
            .collect();
        assert_eq!(
            counts,
            vec![(10, 0, 1), (20, 2, 1), (30, 3, 0), (40, 4, 0), (50, 3, 0)]
        );
        // The history the app plots: unit 0's upper bound is b + 2 at every step.
        let h = t.layer(0).expect("layer h");
        let ub: Vec<f64> = h.unit(0).map(|p| p.upper_bound).collect();
        assert_eq!(ub.len(), 5);
        for (u, b) in ub.iter().zip([a, a, d, d, d]) {
            assert_abs_diff_eq!(*u, f64::from(b) + 2.0, epsilon = 1e-6);
        }
        assert_eq!(h.point(4, 2).map(|p| p.active_frac), Some(1.0));
        assert!(h.point(5, 0).is_none() && h.point(0, 4).is_none());
        // Weights never changed: no drift, no update after the first.
        for u in &t.units {
            assert_abs_diff_eq!(u.drift, 0.0, epsilon = 1e-12);
            assert_abs_diff_eq!(u.final_l2, 2f64.sqrt(), epsilon = 1e-12);
        }
        assert_eq!(t.checkpoints[0].mean_abs_update, None);
        assert_eq!(t.checkpoints[1].mean_abs_update, Some(0.0));
        assert!(!t.labelled());
    }

    #[test]
    fn drift_is_the_cosine_distance_and_update_the_mean_absolute_change() {
        // Closed forms: cos(w, w) = 1 -> 0; cos(w, -w) = -1 -> 2; [1, 0] vs [0, 1] -> 1;
        // [1, 0] vs [1, 1] -> 1 - 1/sqrt(2).
        let first = array![[1.0, 2.0], [1.0, 2.0], [1.0, 0.0], [1.0, 0.0]];
        let mid = array![[1.0, 2.0], [0.0, 0.0], [1.0, 0.0], [1.0, 0.5]];
        let last = array![[1.0, 2.0], [-1.0, -2.0], [0.0, 1.0], [1.0, 1.0]];
        let mk = |w: Array2<f32>| {
            net(
                w,
                Array1::from_elem(4, 0.5),
                Array2::from_elem((2, 4), 0.1),
                Array1::zeros(2),
            )
        };
        let nets = vec![(0, mk(first)), (1, mk(mid)), (2, mk(last))];
        let t = run(&nets, &low_grid(None));
        let drift: Vec<f64> = t.units.iter().map(|u| u.drift).collect();
        assert_abs_diff_eq!(drift[0], 0.0, epsilon = 1e-12);
        assert_abs_diff_eq!(drift[1], 2.0, epsilon = 1e-12);
        assert_abs_diff_eq!(drift[2], 1.0, epsilon = 1e-12);
        assert_abs_diff_eq!(drift[3], 1.0 - 0.5f64.sqrt(), epsilon = 1e-12);
        // final_l2: |w| in the last checkpoint.
        assert_abs_diff_eq!(t.units[1].final_l2, 5f64.sqrt(), epsilon = 1e-12);
        assert_abs_diff_eq!(t.units[3].final_l2, 2f64.sqrt(), epsilon = 1e-12);
        // mean |w_t - w_(t-1)| over the 8 weights of h, by hand:
        // step 1: |0-1| + |0-2| + |0.5-0| = 3.5 -> 3.5 / 8;
        // step 2: |-1| + |-2| + |0-1| + |1-0| + |1-0.5| = 5.5 -> 5.5 / 8.
        let upd: Vec<Option<f64>> = t.checkpoints.iter().map(|r| r.mean_abs_update).collect();
        assert_eq!(upd[0], None);
        assert_abs_diff_eq!(upd[1].expect("update"), 3.5 / 8.0, epsilon = 1e-12);
        assert_abs_diff_eq!(upd[2].expect("update"), 5.5 / 8.0, epsilon = 1e-12);
        // An all-zero vector has no direction (scipy.spatial.distance.cosine gives NaN).
        assert!(cosine_distance(array![0.0f32, 0.0].view(), array![1.0f32, 0.0].view()).is_nan());
    }

    #[test]
    fn weight_statistics_are_those_of_stats() {
        // Hoyer (2004) of [1, 0] is 1, of [1, 1] is 0: mean over {[1, 0], [1, 1]} = 0.5.
        // Near zero at 0.01 x max |w| = 0.01: one weight of 4.
        let n = net(
            array![[1.0, 0.0], [1.0, 1.0]],
            array![0.5, 0.5],
            Array2::from_elem((2, 2), 0.1),
            Array1::zeros(2),
        );
        let t = run(&[(7, n)], &low_grid(None));
        assert_eq!(t.checkpoints.len(), 1);
        let r = &t.checkpoints[0];
        assert_eq!((r.step, r.layer.as_str(), r.units), (7, "h", 2));
        assert_abs_diff_eq!(r.mean_hoyer, 0.5, epsilon = 1e-12);
        assert_abs_diff_eq!(r.near_zero_frac, 0.25, epsilon = 1e-12);
        // One checkpoint: one row per unit, no drift, no update.
        assert_eq!(t.units.len(), 2);
        assert_eq!(t.units[0].drift, 0.0);
        assert_eq!(r.mean_abs_update, None);
    }

    #[test]
    fn accuracy_on_a_labelled_probe_is_counted_in_the_screening_pass() {
        // h0 = relu(x0); out0 = h0, out1 = 0.22 (bias): class 0 wins where x0 > 0.22, i.e.
        // x0 = 0.25 .. 0.45 on the grid (5 of 10 columns). All labels 0 -> accuracy 0.5;
        // label 0 exactly where x0 > 0.22 -> 1.
        let n = net(
            array![[1.0, 0.0]],
            array![0.0],
            array![[1.0], [0.0]],
            array![0.0, 0.22],
        );
        let t = run(&[(0, n.clone())], &low_grid(Some(vec![0; 100])));
        assert_eq!(t.accuracy, vec![Some(0.5)]);
        assert_eq!(t.checkpoints[0].accuracy, Some(0.5));
        assert!(t.labelled());
        let exact: Vec<usize> = (0..100).map(|r| usize::from(r / 10 <= 4)).collect();
        let t = run(&[(0, n)], &low_grid(Some(exact)));
        assert_eq!(t.accuracy, vec![Some(1.0)]);
    }

    #[test]
    fn refusals_name_the_problem() {
        let nets = series([[ALIVE; 4]; 5]);
        let probe = low_grid(None);
        // Nothing pushed.
        let b = TimelineBuilder::new(TimelineOptions::default());
        assert!(matches!(b.finish(&nets[0].1), Err(Error::Usage(_))));
        // Another architecture.
        let mut b = TimelineBuilder::new(TimelineOptions::default());
        b.push(0, &nets[0].1, &mut MemoryProbe::new(probe.clone()), &Silent)
            .expect("push");
        let other = net(
            Array2::from_elem((3, 2), 1.0),
            Array1::zeros(3),
            Array2::from_elem((2, 3), 0.1),
            Array1::zeros(2),
        );
        let e = b
            .push(1, &other, &mut MemoryProbe::new(probe.clone()), &Silent)
            .expect_err("refused");
        let text = e.to_string();
        assert!(text.contains("layer 'h'") && text.contains("[3, 2]") && text.contains("[4, 2]"));
        // A key not after the previous one.
        let e = b
            .push(0, &nets[1].1, &mut MemoryProbe::new(probe.clone()), &Silent)
            .expect_err("refused");
        assert!(e.to_string().contains("training order"), "{e}");
        // A bad tolerance.
        let e = TimelineOptions::new(ScreenOptions::default(), Some(-1.0)).expect_err("bad");
        assert!(matches!(
            e,
            Error::BadOption {
                option: "zero_tol",
                ..
            }
        ));
    }

    #[test]
    fn the_driver_streams_checkpoints_and_can_be_cancelled() {
        use std::sync::atomic::{AtomicBool, Ordering};
        struct Stop(AtomicBool);
        impl Progress for Stop {
            fn set(&self, _f: f32) {}
            fn cancelled(&self) -> bool {
                self.0.load(Ordering::SeqCst)
            }
        }
        let nets = series([[ALIVE; 4], [DEAD; 4], [DEAD; 4], [DEAD; 4], [DEAD; 4]]);
        let probe = low_grid(None);
        let mut open = |_: &Network| -> Result<Box<dyn ProbeSource>> {
            Ok(Box::new(MemoryProbe::new(probe.clone())))
        };
        let first = nets[0].1.clone();
        let mut again = || Ok(first.clone());
        let mut it = nets.clone().into_iter().map(Ok);
        let t = timeline(
            &mut it,
            5,
            &mut open,
            &mut again,
            &TimelineOptions::default(),
            &Stop(AtomicBool::new(false)),
        )
        .expect("timeline");
        assert!(t.units.iter().all(|u| u.first_dead_proven == Some(20)));
        let mut it = nets.into_iter().map(Ok);
        let e = timeline(
            &mut it,
            5,
            &mut open,
            &mut again,
            &TimelineOptions::default(),
            &Stop(AtomicBool::new(true)),
        );
        assert!(matches!(e, Err(Error::Cancelled)));
    }
}
