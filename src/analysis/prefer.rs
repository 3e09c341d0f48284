//! Preferred inputs: the input inside the box `[low, high]` that maximises a unit's
//! pre-activation, by projected gradient ascent from several starts.
//!
//! Objective per start: `z(x) - l2 * ||x||^2 - tv * TV(x)`, where `TV` is the anisotropic
//! total variation of an image layout, `sum` over channels of `|x(i, j+1) - x(i, j)|` and
//! `|x(i+1, j) - x(i, j)|` over neighbouring pixels (Rudin, Osher & Fatemi 1992 define the
//! continuous form; the anisotropic discrete sum is the usual discretisation). Its
//! subgradient is used, with `sign(0) = 0`.
//!
//! Step rule (scale-free): Adam (Kingma & Ba 2015, Algorithm 1; beta1 = 0.9,
//! beta2 = 0.999) whose step for input `i` is `lr_t * (high_i - low_i)`, with `lr_t`
//! following a cosine decay from 0.05 to 0.0005 over the run. The normalised Adam step
//! does not depend on the scale of the gradient, and tying it to the box width makes it
//! independent of the scale of the input, so the same rule works on any model. After each
//! step the input is projected (clamped) back into the box.
//!
//! For a first-layer unit without a penalty the objective is linear, and its maximum over
//! the box is the vertex `x_i = high_i if w_i > 0 else low_i`, with the value
//! `b + sum_i max(w_i low_i, w_i high_i)` ([`closed_form_first_layer`]): [`prefer`] returns
//! that vertex without searching (the ascent, [`prefer_by_ascent`], ends there too).
//!
//! Restarts: start 0 is the box centre, the others are uniform in the box from a
//! `ChaCha8Rng` seeded with `seed`. A start stops early once it is provably stuck: every
//! coordinate sits on the end of the box its gradient and Adam momentum both push
//! towards (or has zero gradient and momentum), so no later step can move it. The best
//! point of each start's trajectory is kept, and the best start (by the penalised
//! objective) is returned per unit.
//!
//! All requested units run as one batch of `units x restarts` rows per step (one matrix
//! product per layer for the batch, see [`super::gradient`]).

use super::Progress;
use super::fields::check_position;
use super::forward::forward_trace;
use super::gradient::{GradWorkspace, input_gradient_into};
use crate::error::{Error, Result};
use crate::model::{LayerKind, Layout, Network, Shape};
use ndarray::{Array2, ArrayView2, ArrayViewMut2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

/// Options of the preferred-input search, valid by construction: at least one restart, and
/// penalties that are finite and not negative ([`PreferOptions::new`] checks them once;
/// the search does not check them again).
#[derive(Debug, Clone, PartialEq)]
pub struct PreferOptions {
    steps: usize,
    restarts: usize,
    seed: u64,
    l2: f32,
    tv: f32,
    position: Option<(usize, usize)>,
}

impl Default for PreferOptions {
    fn default() -> Self {
        PreferOptions {
            steps: 200,
            restarts: 8,
            seed: 0,
            l2: 0.0,
            tv: 0.0,
            position: None,
        }
    }
}

impl PreferOptions {
    /// Checked options: `steps` gradient steps per start, `restarts` starts per unit (the
    /// box centre plus `restarts - 1` random points from `seed`), and the weights of the
    /// `||x||^2` penalty (`l2`) and of the total-variation penalty (`tv`, image layouts
    /// only; whether the model has one is checked by [`prefer`]).
    ///
    /// Errors: [`Error::BadOption`] for zero restarts or a negative or non-finite penalty.
    pub fn new(steps: usize, restarts: usize, seed: u64, l2: f32, tv: f32) -> Result<Self> {
        if restarts == 0 {
            return Err(Error::bad_option(
                "restarts",
                restarts,
                "must be at least 1",
            ));
        }
        for (option, v) in [("l2", l2), ("tv", tv)] {
            if !(v.is_finite() && v >= 0.0) {
                return Err(Error::bad_option(option, v, "must be a finite number >= 0"));
            }
        }
        Ok(PreferOptions {
            steps,
            restarts,
            seed,
            l2,
            tv,
            position: None,
        })
    }

    /// The same options maximising a convolutional channel at map position `(row,
    /// column)` (default: the centre of the map, [`crate::model::Shape::centre`]). Checked
    /// against the layer by [`prefer`]; refused on a layer with a vector output.
    #[must_use]
    pub fn with_position(self, position: Option<(usize, usize)>) -> Self {
        PreferOptions { position, ..self }
    }

    /// The map position asked for, if any (see [`PreferOptions::with_position`]).
    pub fn position(&self) -> Option<(usize, usize)> {
        self.position
    }

    /// Gradient steps per start (default 200).
    pub fn steps(&self) -> usize {
        self.steps
    }

    /// Starts per unit, at least 1 (default 8).
    pub fn restarts(&self) -> usize {
        self.restarts
    }

    /// Seed of the random starts (default 0).
    pub fn seed(&self) -> u64 {
        self.seed
    }

    /// Weight of the `||x||^2` penalty (default 0: none).
    pub fn l2(&self) -> f32 {
        self.l2
    }

    /// Weight of the total-variation penalty, image layouts only (default 0: none).
    pub fn tv(&self) -> f32 {
        self.tv
    }

    /// True when the objective is the plain pre-activation (no penalty), which is linear in
    /// the input for a first-layer unit.
    fn unpenalised(&self) -> bool {
        self.l2 == 0.0 && self.tv == 0.0
    }
}

/// The preferred input of one unit.
#[derive(Debug, Clone, PartialEq)]
pub struct Preferred {
    /// Layer index.
    pub layer: usize,
    /// Unit index within the layer (the channel of a convolutional layer).
    pub unit: usize,
    /// The map position `(row, column)` maximised on a layer with a map output; `None` on
    /// a layer with a vector output.
    pub position: Option<(usize, usize)>,
    /// The preferred input, `[input size]`, inside the box.
    pub input: Vec<f32>,
    /// The raw pre-activation z at `input` (not the penalised objective).
    pub preactivation: f32,
    /// The unit's activation at `input` (on a softmax layer: its probability given the
    /// other units' pre-activations at that input).
    pub activation: f32,
    /// The largest number of steps any start of this unit ran.
    pub steps: usize,
    /// False when any start of this unit met NaN or infinity, or the returned values are
    /// not finite. The returned input is then the best finite point found (or the box
    /// centre when there is none).
    pub finite: bool,
}

/// Adam's decay rates (Kingma & Ba 2015, the paper's defaults).
const BETA1: f32 = 0.9;
const BETA2: f32 = 0.999;
/// Learning rate as a fraction of the box width, at the start and at the end of the
/// cosine decay (common practice, no source; chosen so a start anywhere in the box can
/// reach any vertex in about 20 steps and the end phase refines to ~1e-3 of the width).
const LR_START: f32 = 0.05;
const LR_END: f32 = 0.0005;

/// Search state of one start (one row of the batch).
struct Row {
    /// Current point, `[inputs]`.
    x: Vec<f32>,
    /// Adam first moment, `[inputs]`.
    m: Vec<f32>,
    /// Adam second moment, `[inputs]`.
    v: Vec<f32>,
    /// Best point seen so far, `[inputs]`.
    best_x: Vec<f32>,
    /// Penalised objective at `best_x` (NEG_INFINITY before the first finite value).
    best_obj: f64,
    /// Steps taken.
    steps: usize,
    /// Still moving.
    active: bool,
    /// Met NaN or infinity.
    nonfinite: bool,
}

/// The closed-form maximum of a first-layer unit's pre-activation over the box,
/// `b + sum_i max(w_i low_i, w_i high_i)` in f64, and a point where it is attained
/// (`high_i` where `w_i > 0`, `low_i` where `w_i < 0`, the box centre where `w_i = 0`).
///
/// # Panics
/// When `unit` is not a unit of the first layer.
pub fn closed_form_first_layer(net: &Network, unit: usize) -> (f64, Vec<f32>) {
    let l = &net.layers()[0];
    let w = l.weights.row(unit);
    let mut value = f64::from(l.bias[unit]);
    let mut x = Vec::with_capacity(w.len());
    for ((wi, lo), hi) in w.iter().zip(&net.input().low).zip(&net.input().high) {
        let wf = f64::from(*wi);
        value += (wf * f64::from(*lo)).max(wf * f64::from(*hi));
        x.push(if *wi > 0.0 {
            *hi
        } else if *wi < 0.0 {
            *lo
        } else {
            0.5 * (lo + hi)
        });
    }
    (value, x)
}

/// Checks what depends on the model (the options themselves are valid by construction):
/// the layer and units exist, and a total-variation penalty has an image to smooth.
fn check_request(net: &Network, layer: usize, units: &[usize], opts: &PreferOptions) -> Result<()> {
    let Some(l) = net.layers().get(layer) else {
        return Err(Error::bad_option(
            "layer",
            layer,
            format!(
                "must be a layer index below {}, the number of layers",
                net.layers().len()
            ),
        ));
    };
    if let Some(&u) = units.iter().find(|&&u| u >= l.units()) {
        return Err(Error::bad_option(
            "unit",
            u,
            format!(
                "must name a unit of the layer: layer '{}' has {} units (0 to {}), there is no unit {u}",
                l.name,
                l.units(),
                l.units().saturating_sub(1)
            ),
        ));
    }
    if opts.tv > 0.0 && !matches!(net.input().layout, Layout::Image { .. }) {
        return Err(Error::bad_option(
            "tv",
            opts.tv,
            "needs an image layout, and this model's input is a vector",
        ));
    }
    Ok(())
}

/// Visits every pair of neighbouring pixels (right and down neighbours, per channel) of an
/// image layout as flat indices `(p, q)`.
fn for_each_neighbour_pair(layout: Layout, mut f: impl FnMut(usize, usize)) {
    if let Layout::Image {
        height,
        width,
        channels,
    } = layout
    {
        for i in 0..height {
            for j in 0..width {
                for c in 0..channels {
                    let p = (i * width + j) * channels + c;
                    if j + 1 < width {
                        f(p, p + channels);
                    }
                    if i + 1 < height {
                        f(p, p + width * channels);
                    }
                }
            }
        }
    }
}

/// The penalty `l2 ||x||^2 + tv TV(x)` at `x` (f64), adding the ascent direction of its
/// negative to `g` (`g -= d penalty / dx`).
fn penalty_and_gradient(x: &[f32], g: &mut [f32], l2: f32, tv: f32, layout: Layout) -> f64 {
    let mut pen = 0.0f64;
    if l2 > 0.0 {
        let mut sq = 0.0f64;
        for (gi, &xi) in g.iter_mut().zip(x) {
            sq += f64::from(xi) * f64::from(xi);
            *gi -= 2.0 * l2 * xi;
        }
        pen += f64::from(l2) * sq;
    }
    if tv > 0.0 {
        let mut total = 0.0f64;
        for_each_neighbour_pair(layout, |p, q| {
            let d = x[q] - x[p];
            total += f64::from(d.abs());
            // Subgradient of |x_q - x_p| with sign(0) = 0.
            let s = if d > 0.0 {
                1.0
            } else if d < 0.0 {
                -1.0
            } else {
                0.0
            };
            g[q] -= tv * s;
            g[p] += tv * s;
        });
        pen += f64::from(tv) * total;
    }
    pen
}

/// The cosine-decayed learning rate (fraction of the box width) at step `t` of `steps`.
fn learning_rate(t: usize, steps: usize) -> f32 {
    let frac = if steps <= 1 {
        0.0
    } else {
        t as f32 / (steps - 1) as f32
    };
    LR_END + (LR_START - LR_END) * 0.5 * (1.0 + (std::f32::consts::PI * frac).cos())
}

/// Preferred inputs of `units` of `layer` (see the module docs for the method).
///
/// A first-layer unit searched without a penalty has a linear objective, whose maximum
/// over the box is known: such units get the closed-form optimum
/// ([`closed_form_first_layer`], 0 steps) without any search, so every front gives the
/// same exact answer. Every other request runs [`prefer_by_ascent`].
///
/// Errors: [`Error::BadOption`] for a layer index or unit the model does not have, or a TV
/// penalty on a vector layout; [`Error::Cancelled`] when `progress` asks to stop (checked
/// every step). NaN or infinity in the search is not an error: the unit is returned with
/// `finite == false`.
pub fn prefer(
    net: &Network,
    layer: usize,
    units: &[usize],
    opts: &PreferOptions,
    progress: &dyn Progress,
) -> Result<Vec<Preferred>> {
    check_request(net, layer, units, opts)?;
    let (targets, position) = targets(net, layer, units, opts)?;
    let found = if layer == 0 && opts.unpenalised() {
        let mut inputs = Array2::<f32>::zeros((units.len(), net.input().size));
        for (mut row, &t) in inputs.rows_mut().into_iter().zip(&targets) {
            let x = if net.layer(0).kind == LayerKind::Dense {
                closed_form_first_layer(net, t).1
            } else {
                closed_form_first_layer_value(net, t)
            };
            row.iter_mut().zip(&x).for_each(|(d, s)| *d = *s);
        }
        let outcome = vec![
            Outcome {
                steps: 0,
                finite: true
            };
            units.len()
        ];
        progress.set(1.0);
        evaluate(net, layer, &targets, &inputs, &outcome)
    } else {
        ascend(net, layer, &targets, opts, progress)?
    };
    Ok(relabel(found, units, position))
}

/// Preferred inputs of `units` of `layer` by projected gradient ascent, all optimised
/// together as one batch of `units.len() x opts.restarts()` rows per step, even where
/// [`prefer`] would use the closed form. Errors as for [`prefer`].
pub fn prefer_by_ascent(
    net: &Network,
    layer: usize,
    units: &[usize],
    opts: &PreferOptions,
    progress: &dyn Progress,
) -> Result<Vec<Preferred>> {
    check_request(net, layer, units, opts)?;
    let (targets, position) = targets(net, layer, units, opts)?;
    let found = ascend(net, layer, &targets, opts, progress)?;
    Ok(relabel(found, units, position))
}

/// Output-value indices to maximise, with the map position they sit at (`None` on a vector).
type Targets = (Vec<usize>, Option<(usize, usize)>);

/// The output values the search maximises: unit `u` itself on a layer with a vector output;
/// channel `u` at the chosen position (default the centre) on a map, with that position.
fn targets(net: &Network, layer: usize, units: &[usize], opts: &PreferOptions) -> Result<Targets> {
    let shape = net.output_shape(layer);
    let position = match shape {
        Shape::Map { .. } => Some(check_position(net, layer, opts.position)?),
        Shape::Vector(_) => {
            if opts.position.is_some() {
                check_position(net, layer, opts.position)?;
            }
            None
        }
    };
    let at = position.unwrap_or((0, 0));
    Ok((
        units.iter().map(|&u| shape.index(u, at)).collect(),
        position,
    ))
}

/// Gives each result its unit (channel) and position back.
fn relabel(
    mut found: Vec<Preferred>,
    units: &[usize],
    position: Option<(usize, usize)>,
) -> Vec<Preferred> {
    for (p, &u) in found.iter_mut().zip(units) {
        p.unit = u;
        p.position = position;
    }
    found
}

/// The closed-form maximiser of first-layer output value `target` of a non-dense first
/// layer: a linear function of the input whose gradient (the same at every point) is read
/// at the box centre; `high` where it is positive, `low` where negative, the centre where 0.
fn closed_form_first_layer_value(net: &Network, target: usize) -> Vec<f32> {
    let centre = net.input().centre();
    let Ok(x) = Array2::from_shape_vec((1, centre.len()), centre.clone()) else {
        return centre;
    };
    let (_, g) = super::gradient::input_gradient(net, 0, &[target], x.view());
    g.row(0)
        .iter()
        .zip(&net.input().low)
        .zip(&net.input().high)
        .zip(&centre)
        .map(|(((gi, lo), hi), c)| {
            if *gi > 0.0 {
                *hi
            } else if *gi < 0.0 {
                *lo
            } else {
                *c
            }
        })
        .collect()
}

/// How the search of one unit went.
#[derive(Debug, Clone, Copy)]
struct Outcome {
    /// The most steps any start of the unit ran.
    steps: usize,
    /// No start met NaN or infinity, and some start reached a finite objective.
    finite: bool,
}

/// The ascent of a checked request.
fn ascend(
    net: &Network,
    layer: usize,
    units: &[usize],
    opts: &PreferOptions,
    progress: &dyn Progress,
) -> Result<Vec<Preferred>> {
    if units.is_empty() {
        progress.set(1.0);
        return Ok(Vec::new());
    }
    let mut rows = start_rows(net, units.len(), opts);
    // Row `unit_position * restarts + r` searches for `units[unit_position]`.
    let row_unit: Vec<usize> = (0..rows.len()).map(|r| units[r / opts.restarts]).collect();
    run_ascent(net, layer, &mut rows, &row_unit, opts, progress)?;
    let (inputs, outcome) = best_starts(net, &rows, units.len(), opts.restarts);
    Ok(evaluate(net, layer, units, &inputs, &outcome))
}

/// The starts of every unit, `restarts` per unit in unit order: start 0 is the box centre,
/// the others uniform in the box from a `ChaCha8Rng` seeded with the options' seed.
fn start_rows(net: &Network, units: usize, opts: &PreferOptions) -> Vec<Row> {
    let n = net.input().size;
    let (low, high) = (&net.input().low, &net.input().high);
    let centre = net.input().centre();
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    (0..units * opts.restarts)
        .map(|row| {
            let x: Vec<f32> = if row % opts.restarts == 0 {
                centre.clone()
            } else {
                low.iter()
                    .zip(high)
                    .map(|(&l, &h)| if h > l { rng.random_range(l..=h) } else { l })
                    .collect()
            };
            Row {
                best_x: x.clone(),
                x,
                m: vec![0.0; n],
                v: vec![0.0; n],
                best_obj: f64::NEG_INFINITY,
                steps: 0,
                active: true,
                nonfinite: false,
            }
        })
        .collect()
}

/// Buffers reused across steps: the gathered batch `[active, inputs]`, z `[active]`, the
/// gradient `[active, inputs]` and the backward pass's intermediates.
#[derive(Default)]
struct Batch {
    ws: GradWorkspace,
    x: Vec<f32>,
    z: Vec<f32>,
    g: Vec<f32>,
    /// Rows still moving, by index into the rows.
    rows: Vec<usize>,
    /// The unit each moving row searches for.
    units: Vec<usize>,
}

/// Runs every step (and the final evaluation) of the ascent on `rows`, one batch of the
/// rows still moving per step, until all are stuck or the steps are used up.
fn run_ascent(
    net: &Network,
    layer: usize,
    rows: &mut [Row],
    row_unit: &[usize],
    opts: &PreferOptions,
    progress: &dyn Progress,
) -> Result<()> {
    let n = net.input().size;
    let low = &net.input().low;
    let high = &net.input().high;
    let width: Vec<f32> = low.iter().zip(high).map(|(l, h)| h - l).collect();
    let mut batch = Batch::default();
    let steps = opts.steps;
    for t in 0..=steps {
        if progress.cancelled() {
            return Err(Error::Cancelled);
        }
        batch.rows.clear();
        batch
            .rows
            .extend((0..rows.len()).filter(|&r| rows[r].active));
        if batch.rows.is_empty() {
            break;
        }
        batch.units.clear();
        batch.units.extend(batch.rows.iter().map(|&r| row_unit[r]));
        gradients_of_moving_rows(net, layer, rows, &mut batch, progress)?;
        let params = StepParams {
            low,
            high,
            width: &width,
            lr: learning_rate(t, steps),
            bc1: 1.0 - BETA1.powi(t as i32 + 1),
            bc2: 1.0 - BETA2.powi(t as i32 + 1),
            l2: opts.l2,
            tv: opts.tv,
            layout: net.input().layout,
            last: t == steps,
        };
        step_moving_rows(rows, &mut batch, n, params);
        progress.set((t + 1) as f32 / (steps + 1) as f32);
    }
    Ok(())
}

/// Gathers the moving rows into one batch and computes their z and input gradients (one
/// matrix product per layer for the whole batch).
fn gradients_of_moving_rows(
    net: &Network,
    layer: usize,
    rows: &[Row],
    batch: &mut Batch,
    progress: &dyn Progress,
) -> Result<()> {
    let n = net.input().size;
    let na = batch.rows.len();
    batch.x.resize(na * n, 0.0);
    batch.z.resize(na, 0.0);
    batch.g.resize(na * n, 0.0);
    batch.x[..na * n]
        .par_chunks_mut(n.max(1))
        .zip(batch.rows.par_iter())
        .for_each(|(dst, &r)| dst.copy_from_slice(&rows[r].x));
    let (Ok(xview), Ok(gview)) = (
        ArrayView2::from_shape((na, n), &batch.x[..na * n]),
        ArrayViewMut2::from_shape((na, n), &mut batch.g[..na * n]),
    ) else {
        return Err(Error::internal("the batch buffer has the wrong length"));
    };
    input_gradient_into(
        net,
        layer,
        &batch.units,
        xview,
        &mut batch.z[..na],
        gview,
        &mut batch.ws,
        &|| progress.cancelled(),
    )
}

/// Takes one step (see [`step_row`]) on every moving row, in parallel, with the z and
/// gradient computed for it in `batch`.
fn step_moving_rows(rows: &mut [Row], batch: &mut Batch, n: usize, params: StepParams<'_>) {
    let na = batch.rows.len();
    // Position of each moving row in the batch.
    let mut pos = vec![usize::MAX; rows.len()];
    for (p, &r) in batch.rows.iter().enumerate() {
        pos[r] = p;
    }
    let z = &batch.z[..na];
    let mut grads = batch.g[..na * n].chunks_mut(n.max(1));
    let mut pairs: Vec<(&mut Row, &mut [f32], f32)> = Vec::with_capacity(na);
    for (r, row) in rows.iter_mut().enumerate() {
        if pos[r] != usize::MAX
            && let Some(g) = grads.next()
        {
            pairs.push((row, g, z[pos[r]]));
        }
    }
    pairs
        .par_iter_mut()
        .for_each(|(row, g, zr)| step_row(row, g, *zr, params));
}

/// The best start of each unit (by the penalised objective) as `[units, inputs]`, with how
/// its search went; a unit with no finite start gets the box centre.
fn best_starts(
    net: &Network,
    rows: &[Row],
    units: usize,
    restarts: usize,
) -> (Array2<f32>, Vec<Outcome>) {
    let centre = net.input().centre();
    let mut inputs = Array2::<f32>::zeros((units, net.input().size));
    let mut outcome = Vec::with_capacity(units);
    for (ui, mut dst) in inputs.rows_mut().into_iter().enumerate() {
        let range = ui * restarts..(ui + 1) * restarts;
        let best = range
            .clone()
            .filter(|&r| rows[r].best_obj.is_finite())
            .max_by(|&a, &b| rows[a].best_obj.total_cmp(&rows[b].best_obj));
        let any_nonfinite = range.clone().any(|r| rows[r].nonfinite);
        let steps = range.map(|r| rows[r].steps).max().unwrap_or(0);
        let src = best.map_or(&centre, |b| &rows[b].best_x);
        dst.iter_mut().zip(src).for_each(|(d, s)| *d = *s);
        outcome.push(Outcome {
            steps,
            finite: best.is_some() && !any_nonfinite,
        });
    }
    (inputs, outcome)
}

/// The result per unit: `inputs: [units, inputs]` evaluated once more with a plain forward
/// pass (the raw z and the activation there).
fn evaluate(
    net: &Network,
    layer: usize,
    units: &[usize],
    inputs: &Array2<f32>,
    outcome: &[Outcome],
) -> Vec<Preferred> {
    let trace = forward_trace(net, inputs.view(), layer);
    let pre = &trace.pre[layer];
    let post = &trace.post[layer];
    units
        .iter()
        .zip(outcome)
        .enumerate()
        .map(|(ui, (&u, o))| {
            let preactivation = pre[[ui, u]];
            let activation = post[[ui, u]];
            Preferred {
                layer,
                unit: u,
                position: None,
                input: inputs.row(ui).to_vec(),
                preactivation,
                activation,
                steps: o.steps,
                finite: o.finite && preactivation.is_finite() && activation.is_finite(),
            }
        })
        .collect()
}

/// Per-step constants shared by all rows.
#[derive(Clone, Copy)]
struct StepParams<'a> {
    low: &'a [f32],
    high: &'a [f32],
    width: &'a [f32],
    lr: f32,
    bc1: f32,
    bc2: f32,
    l2: f32,
    tv: f32,
    layout: Layout,
    /// The final evaluation: record the point, do not move.
    last: bool,
}

/// Evaluates one row at its current point (`z`, gradient `g` of z), records the best
/// point, and takes one projected Adam step unless the row is stuck or this is the end.
fn step_row(row: &mut Row, g: &mut [f32], z: f32, p: StepParams<'_>) {
    if !z.is_finite() || g.iter().any(|v| !v.is_finite()) {
        row.nonfinite = true;
        row.active = false;
        return;
    }
    let pen = penalty_and_gradient(&row.x, g, p.l2, p.tv, p.layout);
    let obj = f64::from(z) - pen;
    if !obj.is_finite() || g.iter().any(|v| !v.is_finite()) {
        row.nonfinite = true;
        row.active = false;
        return;
    }
    if obj > row.best_obj {
        row.best_obj = obj;
        row.best_x.copy_from_slice(&row.x);
    }
    if p.last {
        row.active = false;
        return;
    }
    // Stuck: the update below would push every coordinate against its bound (or leave it
    // where it is), so the point, hence the gradient, can never change again.
    let stuck = (0..g.len()).all(|i| {
        let (x, gi, mi) = (row.x[i], g[i], row.m[i]);
        p.width[i] <= 0.0
            || (gi == 0.0 && mi == 0.0)
            || (x >= p.high[i] && gi >= 0.0 && mi >= 0.0)
            || (x <= p.low[i] && gi <= 0.0 && mi <= 0.0)
    });
    if stuck {
        row.active = false;
        return;
    }
    let Row { x, m, v, .. } = row;
    for (i, ((xi, mi), vi)) in x.iter_mut().zip(m.iter_mut()).zip(v.iter_mut()).enumerate() {
        let gi = g[i];
        *mi = BETA1 * *mi + (1.0 - BETA1) * gi;
        *vi = BETA2 * *vi + (1.0 - BETA2) * gi * gi;
        // A zero or overflowed second moment gives no usable step; the coordinate waits.
        let denom = (*vi / p.bc2).sqrt();
        if denom > 0.0 && denom.is_finite() {
            let step = p.lr * p.width[i] * (*mi / p.bc1) / denom;
            *xi = (*xi + step).clamp(p.low[i], p.high[i]);
        }
    }
    row.steps += 1;
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::Silent;
    use crate::analysis::bounds::interval_bounds;
    use crate::model::{Activation, InputSpec, Layer};
    use approx::assert_abs_diff_eq;
    use ndarray::array;
    use std::sync::atomic::{AtomicUsize, Ordering};

    fn random_net(seed: u64, sizes: &[usize], acts: &[Activation], layout: Layout) -> Network {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let n = sizes[0];
        let low: Vec<f32> = (0..n).map(|_| rng.random_range(-2.0f32..0.0)).collect();
        let high: Vec<f32> = low
            .iter()
            .map(|l| l + rng.random_range(0.5f32..3.0))
            .collect();
        let input = InputSpec {
            size: n,
            layout,
            low,
            high,
            names: None,
        };
        let layers = crate::analysis::test_nets::random_layers(&mut rng, sizes, acts, 0.5);
        Network::new("test", "t", input, layers).expect("valid")
    }

    #[test]
    fn first_layer_reaches_the_closed_form() {
        // Closed form of a linear function's maximum over a box (each coordinate at the
        // end its weight points to): b + sum_i max(w_i low_i, w_i high_i).
        let net = random_net(
            1,
            &[30, 12, 4],
            &[Activation::Relu, Activation::Softmax],
            Layout::Vector,
        );
        let units: Vec<usize> = (0..12).collect();
        // The ascent itself (`prefer` would answer from the closed form without searching).
        let res =
            prefer_by_ascent(&net, 0, &units, &PreferOptions::default(), &Silent).expect("prefer");
        assert_eq!(res.len(), 12);
        for r in &res {
            let (want, argmax) = closed_form_first_layer(&net, r.unit);
            assert!(r.finite);
            let rel = (f64::from(r.preactivation) - want).abs() / want.abs().max(1.0);
            assert!(rel < 1e-4, "unit {}: {} vs {want}", r.unit, r.preactivation);
            assert_abs_diff_eq!(r.activation, r.preactivation.max(0.0), epsilon = 1e-6);
            for (a, b) in r.input.iter().zip(&argmax) {
                assert_abs_diff_eq!(*a, *b, epsilon = 1e-6);
            }
            assert!(r.steps <= 200);
        }
        // Reaching the vertex makes every start stuck long before 200 steps.
        assert!(res.iter().all(|r| r.steps < 200));
    }

    #[test]
    fn first_layer_without_penalty_takes_the_closed_form() {
        // Same closed form as above, b + sum_i max(w_i low_i, w_i high_i) at the vertex
        // x_i = high_i if w_i > 0 else low_i, now returned by `prefer` without a search.
        let net = random_net(
            10,
            &[30, 12, 4],
            &[Activation::Relu, Activation::Softmax],
            Layout::Vector,
        );
        let units: Vec<usize> = (0..12).collect();
        let opts = PreferOptions::default();
        let res = prefer(&net, 0, &units, &opts, &Silent).expect("prefer");
        let ascent = prefer_by_ascent(&net, 0, &units, &opts, &Silent).expect("ascent");
        for (r, a) in res.iter().zip(&ascent) {
            let (want, argmax) = closed_form_first_layer(&net, r.unit);
            assert!(r.finite);
            assert_eq!(r.steps, 0, "no search for unit {}", r.unit);
            assert_eq!(r.input, argmax, "the vertex itself for unit {}", r.unit);
            let rel = (f64::from(r.preactivation) - want).abs() / want.abs().max(1.0);
            assert!(rel < 1e-6, "unit {}: {} vs {want}", r.unit, r.preactivation);
            assert_abs_diff_eq!(r.activation, r.preactivation.max(0.0), epsilon = 1e-6);
            // Never below what the ascent reaches.
            assert!(r.preactivation >= a.preactivation - 1e-5 * want.abs().max(1.0) as f32);
        }
        // With a penalty the objective is no longer linear: the search runs.
        let l2 = PreferOptions::new(200, 8, 0, 0.1, 0.0).expect("valid options");
        let res = prefer(&net, 0, &[0], &l2, &Silent).expect("prefer");
        assert!(res[0].steps > 0);
        // Deeper layers are searched.
        let res = prefer(&net, 1, &[0], &opts, &Silent).expect("prefer");
        assert!(res[0].steps > 0);
    }

    #[test]
    fn l2_penalty_reaches_its_closed_form() {
        // With the penalty the objective w.x + b - l2 ||x||^2 is separable and concave;
        // each coordinate's maximiser is clamp(w_i / (2 l2), low_i, high_i) (set the
        // derivative w_i - 2 l2 x_i to zero, then project: textbook calculus).
        let net = random_net(
            2,
            &[20, 5, 2],
            &[Activation::Tanh, Activation::Identity],
            Layout::Vector,
        );
        let l2 = 0.4f32;
        let opts = PreferOptions {
            l2,
            ..PreferOptions::default()
        };
        let res = prefer(&net, 0, &[0, 3], &opts, &Silent).expect("prefer");
        for r in &res {
            let w = net.layers()[0].weights.row(r.unit);
            for i in 0..20 {
                let want = (w[i] / (2.0 * l2)).clamp(net.input().low[i], net.input().high[i]);
                assert_abs_diff_eq!(r.input[i], want, epsilon = 5e-3);
            }
            assert_abs_diff_eq!(r.activation, r.preactivation.tanh(), epsilon = 1e-6);
        }
    }

    #[test]
    fn deep_units_stay_in_the_box_and_below_the_bound() {
        // Soundness check at the search result (Gowal et al. 2018): no input in the box
        // can exceed the interval upper bound, so the found z must not either.
        let acts = [Activation::Relu, Activation::Sigmoid, Activation::Softmax];
        let net = random_net(3, &[10, 16, 8, 3], &acts, Layout::Vector);
        let b = interval_bounds(&net);
        for layer in 1..3 {
            let units: Vec<usize> = (0..net.layers()[layer].units()).collect();
            let res =
                prefer(&net, layer, &units, &PreferOptions::default(), &Silent).expect("prefer");
            for r in &res {
                assert!(r.finite);
                for (i, &x) in r.input.iter().enumerate() {
                    assert!(x >= net.input().low[i] && x <= net.input().high[i]);
                }
                assert!(f64::from(r.preactivation) <= b.upper[layer][r.unit] + 1e-4);
            }
            if layer == 2 {
                // Softmax: the activation is the probability at that input.
                let x = Array2::from_shape_vec((1, 10), res[0].input.clone()).expect("shape");
                let t = forward_trace(&net, x.view(), 2);
                assert_abs_diff_eq!(
                    res[0].activation,
                    t.post[2][[0, res[0].unit]],
                    epsilon = 1e-6
                );
                assert!(res[0].activation > 0.0 && res[0].activation < 1.0);
            }
        }
    }

    #[test]
    fn restarts_never_lose_to_the_centre_start() {
        // The best start is kept: with 8 starts the result is at least as good as with
        // only the centre start (same centre trajectory, max over more starts).
        let acts = [Activation::Tanh, Activation::Tanh, Activation::Identity];
        let net = random_net(4, &[8, 10, 6, 2], &acts, Layout::Vector);
        let one = PreferOptions {
            restarts: 1,
            ..PreferOptions::default()
        };
        let units: Vec<usize> = (0..6).collect();
        let a = prefer(&net, 1, &units, &one, &Silent).expect("prefer");
        let b = prefer(&net, 1, &units, &PreferOptions::default(), &Silent).expect("prefer");
        for (x, y) in a.iter().zip(&b) {
            assert!(y.preactivation >= x.preactivation - 1e-6);
        }
        // Same seed, same answer.
        let c = prefer(&net, 1, &units, &PreferOptions::default(), &Silent).expect("prefer");
        assert_eq!(b, c);
    }

    #[test]
    fn tv_penalty_smooths_and_is_refused_on_vectors() {
        let img = Layout::Image {
            height: 4,
            width: 4,
            channels: 1,
        };
        let net = random_net(
            5,
            &[16, 3, 2],
            &[Activation::Relu, Activation::Identity],
            img,
        );
        let tv_of = |x: &[f32]| {
            let mut t = 0.0f64;
            for_each_neighbour_pair(img, |p, q| t += f64::from((x[q] - x[p]).abs()));
            t
        };
        let plain = prefer(&net, 0, &[0], &PreferOptions::default(), &Silent).expect("prefer");
        let opts = PreferOptions {
            tv: 1.0,
            ..PreferOptions::default()
        };
        let smooth = prefer(&net, 0, &[0], &opts, &Silent).expect("prefer");
        assert!(tv_of(&smooth[0].input) < tv_of(&plain[0].input));
        // 4x4 grid: 3 horizontal pairs x 4 rows + 3 vertical pairs x 4 columns = 24.
        let mut pairs = 0;
        for_each_neighbour_pair(img, |_, _| pairs += 1);
        assert_eq!(pairs, 24);

        let vec_net = random_net(
            6,
            &[4, 2, 2],
            &[Activation::Relu, Activation::Identity],
            Layout::Vector,
        );
        let err = prefer(&vec_net, 0, &[0], &opts, &Silent).expect_err("tv on vector");
        assert!(
            matches!(err, Error::BadOption { option: "tv", .. }),
            "{err:?}"
        );
    }

    #[test]
    fn bad_requests_are_bad_option_errors() {
        let net = random_net(
            7,
            &[4, 2, 2],
            &[Activation::Relu, Activation::Identity],
            Layout::Vector,
        );
        let o = PreferOptions::default();
        assert!(matches!(
            prefer(&net, 5, &[0], &o, &Silent),
            Err(Error::BadOption {
                option: "layer",
                ..
            })
        ));
        let e = prefer(&net, 0, &[2], &o, &Silent).expect_err("unit 2 of 2");
        assert!(
            matches!(e, Error::BadOption { option: "unit", .. }),
            "{e:?}"
        );
        assert!(e.to_string().contains("no unit 2"), "{e}");
        // The options refuse bad values when they are made.
        assert!(matches!(
            PreferOptions::new(200, 0, 0, 0.0, 0.0),
            Err(Error::BadOption {
                option: "restarts",
                ..
            })
        ));
        for (l2, tv) in [
            (-1.0, 0.0),
            (f32::NAN, 0.0),
            (0.0, -0.5),
            (0.0, f32::INFINITY),
        ] {
            assert!(PreferOptions::new(200, 8, 0, l2, tv).is_err(), "{l2} {tv}");
        }
        assert_eq!(
            PreferOptions::new(200, 8, 0, 0.0, 0.0).expect("valid"),
            PreferOptions::default()
        );
        assert!(prefer(&net, 0, &[], &o, &Silent).expect("empty").is_empty());
    }

    struct CancelAfter(AtomicUsize);
    impl Progress for CancelAfter {
        fn set(&self, _fraction: f32) {}
        fn cancelled(&self) -> bool {
            self.0.fetch_sub(1, Ordering::SeqCst) == 0
        }
    }

    #[test]
    fn cancellation_returns_cancelled() {
        let net = random_net(
            8,
            &[6, 5, 2],
            &[Activation::Tanh, Activation::Identity],
            Layout::Vector,
        );
        let p = CancelAfter(AtomicUsize::new(3));
        let r = prefer(&net, 1, &[0, 1], &PreferOptions::default(), &p);
        assert!(matches!(r, Err(Error::Cancelled)));
    }

    #[test]
    fn overflow_is_reported_not_panicked() {
        // Weights near f32::MAX overflow the second layer's pre-activation to infinity.
        let input = InputSpec {
            size: 2,
            layout: Layout::Vector,
            low: vec![0.5; 2],
            high: vec![1.0; 2],
            names: None,
        };
        let big = f32::MAX / 2.0;
        let h = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "h".into(),
            activation: Activation::Relu,
            weights: array![[big, big], [big, big]],
            bias: array![0.0, 0.0],
            labels: None,
        };
        let o = Layer {
            kind: crate::model::LayerKind::Dense,
            name: "o".into(),
            activation: Activation::Identity,
            weights: array![[big, big]],
            bias: array![0.0],
            labels: None,
        };
        let net = Network::new("test", "t", input, vec![h, o]).expect("finite weights are valid");
        let r = prefer(&net, 1, &[0], &PreferOptions::default(), &Silent).expect("no error");
        assert!(!r[0].finite);
    }

    #[test]
    fn steps_zero_evaluates_the_starts() {
        let net = random_net(
            9,
            &[3, 2, 2],
            &[Activation::Relu, Activation::Identity],
            Layout::Vector,
        );
        let o = PreferOptions {
            steps: 0,
            restarts: 1,
            ..PreferOptions::default()
        };
        let r = prefer_by_ascent(&net, 0, &[1], &o, &Silent).expect("prefer");
        assert_eq!(r[0].steps, 0);
        assert_eq!(r[0].input, net.input().centre());
    }
}
