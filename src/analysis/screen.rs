//! Screening hidden units for dead, rarely active, always active and saturated units,
//! on probe data streamed in chunks and with sound interval upper bounds.
//!
//! Statuses follow the receptor contract, first that applies:
//! - any unit whose pre-activation or activation was NaN or infinite on some probe sample:
//!   `non_finite` (receptor robustness rule: overflow is reported per unit, not a crash);
//! - rectifiers (`relu`, `leaky_relu`): `dead_proven` (interval upper bound <= 0),
//!   `dead_on_probe` (never active), `rarely_active` (active_frac < rare),
//!   `always_active` (z > 0 on every sample), else `ok`;
//! - `sigmoid` / `tanh`: `saturated` (active_frac < rare, including 0), else `ok`;
//! - `identity`: `ok`.
//!
//! `upper_bound` comes from [`super::bounds::interval_bounds`] (plain interval bound
//! propagation, tightened by back-substitution where cheap; sound either way).
//!
//! "Active" means z > 0 for rectifiers and identity units; for sigmoid and tanh it means
//! not saturated, i.e. |z| below [`SIGMOID_SATURATION_Z`] / [`TANH_SATURATION_Z`] (the
//! slope is at least 5% of its peak).
//!
//! Convolutional layers: a unit is a channel. It is active on a sample when it is active at
//! one position of its map or more, so `active_frac` counts samples and `dead_on_probe`
//! means never active anywhere; `mean` and `max` run over every sample and position;
//! `always_active` means z > 0 at every position of every sample; `upper_bound` is the
//! largest bound over the positions ([`super::bounds::Bounds::unit_upper`]). Pooling and
//! flatten layers have no units and are not listed.

use super::Progress;
use super::bounds::interval_bounds_upto;
use super::forward::{activate_in_place, argmax_rows, layer_pre};
use super::prune::checked_labels;
use crate::error::{Error, Result};
use crate::model::{Activation, Network, SIGMOID_SATURATION_Z, TANH_SATURATION_Z};
use crate::probe::{DEFAULT_CHUNK_ROWS_NONZERO, ProbeSource};
use ndarray::ArrayView2;
use rayon::prelude::*;
use std::num::NonZeroUsize;

/// A unit's screening verdict.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Status {
    /// A rectifier whose interval upper bound over the whole input box is <= 0.
    DeadProven,
    /// A rectifier never active on the probe.
    DeadOnProbe,
    /// A rectifier active on fewer than the `rare` fraction of the probe.
    RarelyActive,
    /// A rectifier active on every probe sample (it acts as a linear unit there).
    AlwaysActive,
    /// A sigmoid or tanh unit unsaturated on fewer than the `rare` fraction of the probe.
    Saturated,
    /// None of the above.
    Ok,
    /// The unit's pre-activation or activation was NaN or infinite on some probe sample.
    NonFinite,
}

impl Status {
    /// The contract's name of the status.
    pub fn as_str(&self) -> &'static str {
        match self {
            Status::DeadProven => "dead_proven",
            Status::DeadOnProbe => "dead_on_probe",
            Status::RarelyActive => "rarely_active",
            Status::AlwaysActive => "always_active",
            Status::Saturated => "saturated",
            Status::Ok => "ok",
            Status::NonFinite => "non_finite",
        }
    }

    /// True for `dead_proven` and `dead_on_probe` (what `check` counts as dead).
    pub fn is_dead(&self) -> bool {
        matches!(self, Status::DeadProven | Status::DeadOnProbe)
    }
}

/// The screening result of one hidden unit.
#[derive(Debug, Clone, PartialEq)]
pub struct UnitScreen {
    /// Layer name.
    pub layer: String,
    /// Layer index (from 0).
    pub layer_index: usize,
    /// Unit index within the layer (from 0).
    pub unit: usize,
    /// The activation's schema name.
    pub activation: &'static str,
    /// Fraction of probe samples where the unit is active (see the module docs).
    pub active_frac: f64,
    /// Mean activation over the probe (NaN when non-finite values occurred).
    pub mean: f64,
    /// Largest activation over the probe (NaN when non-finite values occurred).
    pub max: f64,
    /// Sound upper bound of the pre-activation over the input box (interval bounds).
    pub upper_bound: f64,
    /// The verdict.
    pub status: Status,
}

/// The default active fraction below which a rectifier is `rarely_active` and a
/// sigmoid/tanh unit is `saturated` (the command line's `--rare`, the app's screening).
pub const DEFAULT_RARE_FRACTION: f64 = 0.01;

/// Options of [`screen`], valid by construction: `rare` in [0, 1] and at least one row per
/// chunk ([`ScreenOptions::new`] checks them once; [`screen`] does not check them again).
#[derive(Debug, Clone, PartialEq)]
pub struct ScreenOptions {
    rare: f64,
    chunk_rows: NonZeroUsize,
}

impl Default for ScreenOptions {
    fn default() -> Self {
        ScreenOptions {
            rare: DEFAULT_RARE_FRACTION,
            chunk_rows: DEFAULT_CHUNK_ROWS_NONZERO,
        }
    }
}

impl ScreenOptions {
    /// Checked options: the `rare` active fraction and the probe rows per forward pass.
    ///
    /// Errors: [`Error::BadOption`] when `rare` is not a number from 0 to 1.
    pub fn new(rare: f64, chunk_rows: NonZeroUsize) -> Result<Self> {
        if !(rare.is_finite() && (0.0..=1.0).contains(&rare)) {
            return Err(Error::bad_option(
                "rare",
                rare,
                "must be a number from 0 to 1",
            ));
        }
        Ok(ScreenOptions { rare, chunk_rows })
    }

    /// The same options with `chunk_rows` probe rows per forward pass.
    #[must_use]
    pub fn with_chunk_rows(self, chunk_rows: NonZeroUsize) -> Self {
        ScreenOptions { chunk_rows, ..self }
    }

    /// Active fraction below which a rectifier is `rarely_active` and a sigmoid/tanh unit
    /// is `saturated` (default [`DEFAULT_RARE_FRACTION`]).
    pub fn rare(&self) -> f64 {
        self.rare
    }

    /// Probe rows per forward pass (default [`crate::probe::DEFAULT_CHUNK_ROWS`]).
    pub fn chunk_rows(&self) -> usize {
        self.chunk_rows.get()
    }
}

/// The screening of every hidden unit.
#[derive(Debug, Clone, PartialEq)]
pub struct ScreenReport {
    /// One entry per unit of every hidden layer (all but the last), in layer order.
    pub units: Vec<UnitScreen>,
    /// Probe samples seen.
    pub samples: usize,
    /// The probe's description.
    pub probe: String,
}

/// Running totals of one unit over the probe.
#[derive(Debug, Clone, Copy)]
struct Acc {
    /// Samples on which the unit was active (at one position or more).
    active: u64,
    /// Values (samples x positions) with z > 0.
    positive: u64,
    /// Values seen (samples x positions).
    count: u64,
    sum: f64,
    max: f32,
    nonfinite: bool,
}

impl Acc {
    const EMPTY: Acc = Acc {
        active: 0,
        positive: 0,
        count: 0,
        sum: 0.0,
        max: f32::NEG_INFINITY,
        nonfinite: false,
    };

    fn merge(&mut self, o: &Acc) {
        self.active += o.active;
        self.positive += o.positive;
        self.count += o.count;
        self.sum += o.sum;
        self.max = self.max.max(o.max);
        self.nonfinite |= o.nonfinite;
    }
}

/// Whether a unit with pre-activation `z` counts as active (module docs).
#[inline]
fn is_active(act: Activation, z: f32) -> bool {
    match act {
        Activation::Sigmoid => f64::from(z.abs()) < SIGMOID_SATURATION_Z,
        Activation::Tanh => f64::from(z.abs()) < TANH_SATURATION_Z,
        _ => z > 0.0,
    }
}

/// Rows per parallel task when accumulating a chunk.
const ACC_ROWS: usize = 256;

/// Adds one chunk's pre-activations `pre: [rows, units]` to the per-unit accumulators; the
/// activation is applied on the fly (hidden layers are element-wise), so the chunk's
/// activations need not be stored.
fn accumulate(act: Activation, pre: ArrayView2<f32>, accs: &mut [Acc]) {
    let units = accs.len();
    let rows = pre.nrows();
    let part = |r0: usize, r1: usize| {
        let mut local = vec![Acc::EMPTY; units];
        for r in r0..r1 {
            let zr = pre.row(r);
            for (acc, &z) in local.iter_mut().zip(zr.iter()) {
                let a = act.apply_scalar(z);
                if !(z.is_finite() && a.is_finite()) {
                    acc.nonfinite = true;
                    continue;
                }
                acc.active += u64::from(is_active(act, z));
                acc.positive += u64::from(z > 0.0);
                acc.count += 1;
                acc.sum += f64::from(a);
                acc.max = acc.max.max(a);
            }
        }
        local
    };
    let starts: Vec<usize> = (0..rows).step_by(ACC_ROWS).collect();
    let parts: Vec<Vec<Acc>> = starts
        .par_iter()
        .map(|&r0| part(r0, (r0 + ACC_ROWS).min(rows)))
        .collect();
    for p in parts {
        for (a, b) in accs.iter_mut().zip(&p) {
            a.merge(b);
        }
    }
}

/// [`accumulate`] for a layer of maps: `pre: [rows, channels x positions]` (channel first),
/// one accumulator per channel. A channel is active on a sample when it is active at one
/// position or more; the sum, the maximum and the count of positive values run over every
/// sample and position.
fn accumulate_maps(act: Activation, pre: ArrayView2<f32>, positions: usize, accs: &mut [Acc]) {
    let channels = accs.len();
    let rows = pre.nrows();
    let part = |r0: usize, r1: usize| {
        let mut local = vec![Acc::EMPTY; channels];
        for r in r0..r1 {
            let zr = pre.row(r);
            for (c, acc) in local.iter_mut().enumerate() {
                let mut any = false;
                for p in 0..positions {
                    let z = zr[c * positions + p];
                    let a = act.apply_scalar(z);
                    if !(z.is_finite() && a.is_finite()) {
                        acc.nonfinite = true;
                        continue;
                    }
                    any |= is_active(act, z);
                    acc.positive += u64::from(z > 0.0);
                    acc.count += 1;
                    acc.sum += f64::from(a);
                    acc.max = acc.max.max(a);
                }
                acc.active += u64::from(any);
            }
        }
        local
    };
    let starts: Vec<usize> = (0..rows).step_by(ACC_ROWS).collect();
    let parts: Vec<Vec<Acc>> = starts
        .par_iter()
        .map(|&r0| part(r0, (r0 + ACC_ROWS).min(rows)))
        .collect();
    for p in parts {
        for (a, b) in accs.iter_mut().zip(&p) {
            a.merge(b);
        }
    }
}

/// The status of one unit (module docs give the order).
fn status_of(act: Activation, acc: &Acc, samples: usize, upper: f64, rare: f64) -> Status {
    if acc.nonfinite {
        return Status::NonFinite;
    }
    let frac = acc.active as f64 / samples as f64;
    match act {
        a if a.is_rectifier() => {
            if upper <= 0.0 {
                Status::DeadProven
            } else if acc.active == 0 {
                Status::DeadOnProbe
            } else if frac < rare {
                Status::RarelyActive
            } else if acc.positive == acc.count {
                Status::AlwaysActive
            } else {
                Status::Ok
            }
        }
        Activation::Sigmoid | Activation::Tanh => {
            if frac < rare {
                Status::Saturated
            } else {
                Status::Ok
            }
        }
        _ => Status::Ok,
    }
}

/// Screens every hidden unit (all layers but the last) on the probe, streamed in chunks of
/// `opts.chunk_rows` rows (one forward pass per chunk), together with interval upper
/// bounds over the input box.
///
/// Errors: those of the probe source (an empty probe is its error); a probe error when it
/// yields no rows or a chunk of the wrong width; [`Error::Cancelled`] when `progress` asks
/// to stop (checked per chunk).
pub fn screen(
    net: &Network,
    probe: &mut dyn ProbeSource,
    opts: &ScreenOptions,
    progress: &dyn Progress,
) -> Result<ScreenReport> {
    screen_counting(net, probe, opts, false, progress).map(|(report, _)| report)
}

/// [`screen`], and, when `count_correct` is set and the probe is labelled, the fraction of
/// probe rows whose predicted class (the largest output, as `forward` and `prune-sweep`
/// compute it) is the row's label, from the same pass over the probe (the output layer
/// runs on the last hidden layer's activations of each chunk). `None` for an unlabelled
/// probe or without `count_correct`.
///
/// Errors: those of [`screen`]; with a labelled probe, a probe error when a chunk lacks
/// labels or a label is not an output unit.
pub fn screen_with_accuracy(
    net: &Network,
    probe: &mut dyn ProbeSource,
    opts: &ScreenOptions,
    progress: &dyn Progress,
) -> Result<(ScreenReport, Option<f64>)> {
    let count = probe.has_labels();
    screen_counting(net, probe, opts, count, progress)
}

/// The one screening pass behind [`screen`] and [`screen_with_accuracy`].
fn screen_counting(
    net: &Network,
    probe: &mut dyn ProbeSource,
    opts: &ScreenOptions,
    count_correct: bool,
    progress: &dyn Progress,
) -> Result<(ScreenReport, Option<f64>)> {
    let describe = probe.describe();
    let outputs = net.output_layer().units();
    let mut correct = 0usize;
    let hidden = net.layers().len().saturating_sub(1);
    let bounds = interval_bounds_upto(net, hidden);
    let mut accs: Vec<Vec<Acc>> = net.layers()[..hidden]
        .iter()
        .map(|l| vec![Acc::EMPTY; l.units()])
        .collect();
    let total = probe.total_rows();
    let mut samples = 0usize;
    while let Some(chunk) = probe.next_chunk(opts.chunk_rows())? {
        if progress.cancelled() {
            return Err(Error::Cancelled);
        }
        chunk.check_width(net, &describe)?;
        let rows = chunk.inputs.nrows();
        if rows == 0 {
            continue;
        }
        let labels = if count_correct {
            Some(checked_labels(&chunk, outputs, &describe)?)
        } else {
            None
        };
        // One layer at a time: statistics from the pre-activations, then the activation in
        // place as the next layer's input (no copy of each chunk's activations is kept).
        let mut input: Option<ndarray::Array2<f32>> = None;
        for (l, acc) in accs.iter_mut().enumerate() {
            let layer = &net.layers()[l];
            let x = input.as_ref().map_or(chunk.inputs.view(), |a| a.view());
            let mut z = layer_pre(net, l, x);
            let positions = net.output_shape(l).positions();
            if positions == 1 {
                accumulate(layer.activation, z.view(), acc);
            } else {
                accumulate_maps(layer.activation, z.view(), positions, acc);
            }
            if l + 1 < hidden || labels.is_some() {
                activate_in_place(layer.activation, &mut z);
                input = Some(z);
            }
        }
        if let Some(labels) = labels {
            // The output layer on the last hidden activations: the rest of `forward`.
            let x = input.as_ref().map_or(chunk.inputs.view(), |a| a.view());
            let mut out = layer_pre(net, hidden, x);
            activate_in_place(net.output_layer().activation, &mut out);
            correct += argmax_rows(out.view())
                .iter()
                .zip(labels)
                .filter(|(pred, l)| **pred == Some(**l))
                .count();
        }
        samples += rows;
        if let Some(t) = total.filter(|&t| t > 0) {
            progress.set((samples as f32 / t as f32).min(1.0));
        }
    }
    if samples == 0 {
        return Err(Error::probe(&describe, "the probe has no samples"));
    }
    let mut units = Vec::new();
    for (l, acc) in accs.iter().enumerate() {
        let layer = &net.layers()[l];
        for (k, a) in acc.iter().enumerate() {
            let upper = bounds.unit_upper(net, l, k);
            let (mean, max) = if a.nonfinite {
                (f64::NAN, f64::NAN)
            } else {
                (a.sum / a.count.max(1) as f64, f64::from(a.max))
            };
            units.push(UnitScreen {
                layer: layer.name.clone(),
                layer_index: l,
                unit: k,
                activation: layer.activation.name(),
                active_frac: a.active as f64 / samples as f64,
                mean,
                max,
                upper_bound: upper,
                status: status_of(layer.activation, a, samples, upper, opts.rare),
            });
        }
    }
    progress.set(1.0);
    let accuracy = count_correct.then(|| correct as f64 / samples as f64);
    Ok((
        ScreenReport {
            units,
            samples,
            probe: describe,
        },
        accuracy,
    ))
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::analysis::Silent;
    use crate::model::{InputSpec, Layer};
    use crate::probe::ProbeChunk;
    use approx::assert_abs_diff_eq;
    use ndarray::{Array1, Array2, array, s};
    use std::sync::atomic::{AtomicBool, Ordering};

    /// An in-memory probe handing out fixed rows in chunks.
    pub(crate) struct MemProbe {
        pub(crate) inputs: Array2<f32>,
        pub(crate) labels: Option<Vec<usize>>,
        pub(crate) at: usize,
    }

    impl MemProbe {
        pub(crate) fn new(inputs: Array2<f32>, labels: Option<Vec<usize>>) -> Self {
            MemProbe {
                inputs,
                labels,
                at: 0,
            }
        }
    }

    impl ProbeSource for MemProbe {
        fn describe(&self) -> String {
            "in-memory probe".into()
        }
        fn next_chunk(&mut self, max_rows: usize) -> Result<Option<ProbeChunk>> {
            if self.at >= self.inputs.nrows() {
                return Ok(None);
            }
            let end = (self.at + max_rows).min(self.inputs.nrows());
            let chunk = ProbeChunk {
                inputs: self.inputs.slice(s![self.at..end, ..]).to_owned(),
                labels: self.labels.as_ref().map(|l| l[self.at..end].to_vec()),
                first_row: self.at,
            };
            self.at = end;
            Ok(Some(chunk))
        }
        fn total_rows(&self) -> Option<usize> {
            Some(self.inputs.nrows())
        }
        fn has_labels(&self) -> bool {
            self.labels.is_some()
        }
    }

    /// Input box [0, 1]^2 and one hidden layer with hand-chosen units.
    fn hand_net(act: Activation, w: Array2<f32>, b: Array1<f32>) -> Network {
        let input = InputSpec::vector_box(2, 0.0, 1.0);
        let units = w.nrows();
        let h = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "h".into(),
            activation: act,
            weights: w,
            bias: b,
            labels: None,
        };
        let o = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "out".into(),
            activation: Activation::Softmax,
            weights: Array2::from_elem((2, units), 0.1),
            bias: Array1::zeros(2),
            labels: None,
        };
        Network::new("test", "t", input, vec![h, o]).expect("valid")
    }

    /// An `n x n` grid with coordinates `i / 10`, `i = 0..n`, row-major: x0 = r / n.
    fn grid(n: usize) -> Array2<f32> {
        Array2::from_shape_fn((n * n, 2), |(r, c)| {
            if c == 0 {
                (r / n) as f32 / 10.0
            } else {
                (r % n) as f32 / 10.0
            }
        })
    }

    /// The 11 x 11 grid over the whole box [0, 1]^2.
    fn nz(n: usize) -> NonZeroUsize {
        NonZeroUsize::new(n).expect("a count of at least 1")
    }

    #[test]
    fn options_refuse_a_rare_fraction_outside_0_to_1() {
        for bad in [-0.1, 1.5, f64::NAN, f64::INFINITY] {
            let e = ScreenOptions::new(bad, nz(10)).expect_err("refused");
            assert!(
                matches!(e, Error::BadOption { option: "rare", .. }),
                "{e:?}"
            );
        }
        let ok = ScreenOptions::new(1.0, nz(10)).expect("1 is allowed");
        assert_eq!((ok.rare(), ok.chunk_rows()), (1.0, 10));
        assert_eq!(ScreenOptions::default().rare(), DEFAULT_RARE_FRACTION);
    }

    fn grid_probe() -> Array2<f32> {
        grid(11)
    }

    /// Screens `net` on the 11 x 11 grid probe with no progress reporting.
    fn screen_grid(net: &Network, opts: &ScreenOptions) -> ScreenReport {
        screen(net, &mut MemProbe::new(grid_probe(), None), opts, &Silent).expect("screen")
    }

    #[test]
    fn relu_statuses_on_a_hand_built_net() {
        // Box [0, 1]^2; probe: the 10 x 10 grid over [0, 0.9]^2 (100 rows). Worked by hand:
        // u0: z = -x0 - x1 - 0.5 <= -0.5 on the box: dead_proven (upper bound -0.5).
        // u1: z = x0 - 0.85: upper bound 0.15; positive on the grid only at x0 = 0.9
        //     (10 of 100 rows): active_frac 0.1 < rare = 0.2: rarely_active.
        // u2: z = x0 + x1 + 0.1 > 0 everywhere: always_active; grid mean 0.45 + 0.45 + 0.1
        //     = 1.0, grid max 1.9, upper bound 2.1.
        // u3: z = x0 - 0.5: positive for x0 = 0.6 .. 0.9 (40 rows): ok.
        // u4: z = x0 + x1 - 1.9: upper bound 0.1 > 0 (not provably dead) but z <= -0.1 on
        //     the grid: dead_on_probe.
        let w = array![[-1.0, -1.0], [1.0, 0.0], [1.0, 1.0], [1.0, 0.0], [1.0, 1.0]];
        let b = array![-0.5, -0.85, 0.1, -0.5, -1.9];
        let net = hand_net(Activation::Relu, w, b);
        let mut p = MemProbe::new(grid(10), None);
        let opts = ScreenOptions::new(0.2, nz(7)).expect("valid options");
        let r = screen(&net, &mut p, &opts, &Silent).expect("screen");
        assert_eq!(r.samples, 100);
        assert_eq!(r.units.len(), 5);
        let st: Vec<Status> = r.units.iter().map(|u| u.status).collect();
        assert_eq!(
            st,
            vec![
                Status::DeadProven,
                Status::RarelyActive,
                Status::AlwaysActive,
                Status::Ok,
                Status::DeadOnProbe
            ]
        );
        assert_abs_diff_eq!(r.units[0].upper_bound, -0.5, epsilon = 1e-12);
        assert_abs_diff_eq!(r.units[1].active_frac, 0.1, epsilon = 1e-12);
        assert_abs_diff_eq!(r.units[1].upper_bound, 0.15, epsilon = 1e-6);
        assert_abs_diff_eq!(r.units[3].active_frac, 0.4, epsilon = 1e-12);
        assert_abs_diff_eq!(r.units[2].upper_bound, 2.1, epsilon = 1e-6);
        assert_abs_diff_eq!(r.units[2].mean, 1.0, epsilon = 1e-6);
        assert_abs_diff_eq!(r.units[2].max, 1.9, epsilon = 1e-6);
        assert_abs_diff_eq!(r.units[4].upper_bound, 0.1, epsilon = 1e-6);
        assert_eq!(r.units[0].mean, 0.0);
        assert_eq!(r.units[0].activation, "relu");
        assert_eq!(r.units[4].status.as_str(), "dead_on_probe");
    }

    #[test]
    fn chunk_size_does_not_change_the_result() {
        let w = array![[1.0, -1.0], [0.3, 0.2]];
        let b = array![0.0, -0.2];
        let net = hand_net(Activation::LeakyRelu { alpha: 0.1 }, w, b);
        let opts = |c| ScreenOptions::new(0.01, nz(c)).expect("valid options");
        let a = screen_grid(&net, &opts(1));
        let c = screen_grid(&net, &opts(1000));
        for (x, y) in a.units.iter().zip(&c.units) {
            assert_eq!(x.status, y.status);
            assert_abs_diff_eq!(x.mean, y.mean, epsilon = 1e-9);
            assert_eq!(x.active_frac, y.active_frac);
        }
    }

    #[test]
    fn sigmoid_and_tanh_saturation_uses_the_contract_constants() {
        // Saturated iff |z| >= 4.3565 (sigmoid) / 2.1783 (tanh); receptor contract.
        // u0: z = 10 x0 + 5 >= 5 everywhere: saturated.
        // u1: z = x0: |z| <= 1: active everywhere: ok.
        // u2: z = 10 x0 - 5: |z| < 4.3565 for x0 in (0.06435, 0.93565): grid x0 = 0.1..0.9
        //     (99 of 121 rows) for sigmoid.
        let w = array![[10.0, 0.0], [1.0, 0.0], [10.0, 0.0]];
        let b = array![5.0, 0.0, -5.0];
        let net = hand_net(Activation::Sigmoid, w.clone(), b.clone());
        let r = screen_grid(&net, &ScreenOptions::default());
        assert_eq!(r.units[0].status, Status::Saturated);
        assert_eq!(r.units[0].active_frac, 0.0);
        assert_eq!(r.units[1].status, Status::Ok);
        assert_eq!(r.units[1].active_frac, 1.0);
        assert_abs_diff_eq!(r.units[2].active_frac, 99.0 / 121.0, epsilon = 1e-12);
        // tanh: |10 x0 - 5| < 2.1783 for x0 in (0.28217, 0.71783): x0 = 0.3..0.7, 55 rows.
        let net = hand_net(Activation::Tanh, w, b);
        let r = screen_grid(&net, &ScreenOptions::default());
        assert_eq!(r.units[0].status, Status::Saturated);
        assert_abs_diff_eq!(r.units[2].active_frac, 55.0 / 121.0, epsilon = 1e-12);
        assert_eq!(r.units[2].status, Status::Ok);
    }

    #[test]
    fn identity_units_are_ok_with_positive_fraction() {
        let net = hand_net(Activation::Identity, array![[1.0, 0.0]], array![-0.5]);
        let r = screen_grid(&net, &ScreenOptions::default());
        assert_eq!(r.units[0].status, Status::Ok);
        assert_abs_diff_eq!(r.units[0].active_frac, 55.0 / 121.0, epsilon = 1e-12);
    }

    #[test]
    fn overflow_is_non_finite() {
        // 3e38 * 1 + 3e38 * 1 overflows f32 to infinity at the corner x = (1, 1).
        let net = hand_net(
            Activation::Relu,
            array![[3e38, 3e38], [1.0, 1.0]],
            array![0.0, 0.0],
        );
        let r = screen_grid(&net, &ScreenOptions::default());
        assert_eq!(r.units[0].status, Status::NonFinite);
        assert_eq!(r.units[0].status.as_str(), "non_finite");
        assert_eq!(r.units[1].status, Status::Ok);
    }

    #[test]
    fn uniform_probe_works_and_empty_probe_is_an_error() {
        let net = hand_net(Activation::Relu, array![[-1.0, -1.0]], array![-0.1]);
        let mut u = crate::probe::uniform(&net, 500, 0);
        let r = screen(&net, u.as_mut(), &ScreenOptions::default(), &Silent).expect("screen");
        assert_eq!(r.samples, 500);
        assert_eq!(r.units[0].status, Status::DeadProven);
        let mut empty = MemProbe::new(Array2::zeros((0, 2)), None);
        let e = screen(&net, &mut empty, &ScreenOptions::default(), &Silent);
        assert!(matches!(e, Err(Error::Probe { .. })));
    }

    struct CancelNow(AtomicBool);
    impl Progress for CancelNow {
        fn set(&self, _f: f32) {}
        fn cancelled(&self) -> bool {
            self.0.load(Ordering::SeqCst)
        }
    }

    #[test]
    fn cancellation_returns_cancelled() {
        let net = hand_net(Activation::Relu, array![[1.0, 1.0]], array![0.0]);
        let p = CancelNow(AtomicBool::new(true));
        let e = screen(
            &net,
            &mut MemProbe::new(grid_probe(), None),
            &ScreenOptions::default(),
            &p,
        );
        assert!(matches!(e, Err(Error::Cancelled)));
    }
}
