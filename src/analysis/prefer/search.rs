//! The projected gradient ascent itself: rows of starts, one batch per step, the penalties
//! and the step rule (see the parent module's docs for the method and its sources).

use super::prior::Prior;
use crate::analysis::Progress;
use crate::analysis::forward::gemm_into;
use crate::analysis::gradient::{GradWorkspace, input_gradient_into};
use crate::error::{Error, Result};
use crate::model::{Layout, Network};
use ndarray::{ArrayView2, ArrayViewMut2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

/// Adam's decay rates (Kingma & Ba 2015, the paper's defaults).
const BETA1: f32 = 0.9;
const BETA2: f32 = 0.999;
/// Learning rate as a fraction of the box width, at the start and at the end of the
/// cosine decay (common practice, no source; chosen so a start anywhere in the box can
/// reach any vertex in about 20 steps and the end phase refines to ~1e-3 of the width).
const LR_START: f32 = 0.05;
const LR_END: f32 = 0.0005;
/// Step of the plain rule ([`Rule::Plain`]) as a fraction of the box width for the input
/// whose step-weighted gradient is largest, falling linearly from the first to the second
/// over the run: large early steps cross many of the regions of a saturated network
/// (the best point of the whole path is kept), small late ones refine. A design choice,
/// measured on the reference networks of `tests/prefer_reference.rs` (DEVELOPERS.md).
const PLAIN_START: f32 = 0.1;
const PLAIN_END: f32 = 0.001;

/// How a start moves.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Rule {
    /// Adam on the rescaled gradient, cosine-decayed rate ([`LR_START`] to [`LR_END`]):
    /// every input moves at about the same rate, so a start runs to a vertex of its
    /// region fast. The main search.
    Adam,
    /// Plain projected gradient ascent with a normalised step: input `i` moves by
    /// `eta_t (high_i - low_i) q_i / max_j |q_j|` with `q = (dz/dx) * (high - low)`,
    /// `eta_t` falling linearly ([`PLAIN_START`] to [`PLAIN_END`]). Inputs move in
    /// proportion to their gradient, so a start follows the steepest path, which on
    /// saturated (tanh, sigmoid) networks reaches regions the Adam starts miss. The
    /// exploration starts.
    Plain,
}
/// A start whose gradient is exactly zero is moved by a uniform random step of up to this
/// fraction of the box width per input, doubling on each further flat point, at most
/// [`MAX_NUDGES`] times (small enough to stay near the start, large enough to leave the
/// flat spot of a rectifier network at zero bias).
const NUDGE: f32 = 0.01;
/// Flat points a start may be moved off before it is left where it is.
const MAX_NUDGES: u32 = 8;
/// A main-search start that has not raised its best objective by more than
/// [`SETTLED_GAIN`] (relative) in this many steps, in the second half of its run (where the
/// cosine rate has fallen below half its start), has settled and stops: its remaining
/// steps would only polish the last digits. A design choice. It saves work where starts
/// reach a vertex or a flat top early; on the bench's 784-2048-2048 ReLU layer the starts
/// of `prefer --all` keep gaining more than that to their last step, and none stops.
const SETTLED_STEPS: usize = 16;
/// Relative gain of the best objective over [`SETTLED_STEPS`] steps that counts as progress.
const SETTLED_GAIN: f64 = 1e-4;
/// Width of the facets' repulsion: RMS distance, in box widths, at which it falls to
/// `exp(-1/2)` of its peak (a tenth of the box: facets closer than that count as the same
/// picture; a design choice, no source).
pub(super) const REPEL_RADIUS: f64 = 0.1;

/// Search state of one start (one row of the batch).
pub(super) struct Row {
    /// Current point, `[inputs]`.
    pub x: Vec<f32>,
    /// Adam first moment, `[inputs]` (empty for a [`Rule::Plain`] start).
    m: Vec<f32>,
    /// Adam second moment, `[inputs]` (empty for a [`Rule::Plain`] start).
    v: Vec<f32>,
    /// Best point seen so far, `[inputs]`.
    pub best_x: Vec<f32>,
    /// Penalised objective at `best_x` (NEG_INFINITY before the first finite value).
    pub best_obj: f64,
    /// Steps taken.
    pub steps: usize,
    /// Still moving.
    active: bool,
    /// Met NaN or infinity.
    pub nonfinite: bool,
    /// The group (unit and facet) this start belongs to.
    pub group: usize,
    /// The target unit.
    pub unit: usize,
    /// Flat points this start has been moved off.
    nudges: u32,
    /// The step at which the best objective last rose by more than [`SETTLED_GAIN`] over
    /// `mark`.
    gained_at: usize,
    /// The best objective at step `gained_at`.
    mark: f64,
    /// Generator of this start's nudges.
    rng: ChaCha8Rng,
}

impl Row {
    /// A start at `x` for `unit`, in `group`; its nudges come from stream `stream` of a
    /// `ChaCha8Rng` seeded with `seed`.
    pub fn new(x: Vec<f32>, unit: usize, group: usize, seed: u64, stream: u64) -> Row {
        Row::with_rule(x, unit, group, seed, stream, Rule::Adam)
    }

    /// As [`Row::new`], for a start that moves by `rule` (a [`Rule::Plain`] start keeps no
    /// Adam moments).
    pub fn with_rule(
        x: Vec<f32>,
        unit: usize,
        group: usize,
        seed: u64,
        stream: u64,
        rule: Rule,
    ) -> Row {
        let n = if rule == Rule::Adam { x.len() } else { 0 };
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        rng.set_stream(stream);
        Row {
            best_x: x.clone(),
            x,
            m: vec![0.0; n],
            v: vec![0.0; n],
            best_obj: f64::NEG_INFINITY,
            steps: 0,
            active: true,
            nonfinite: false,
            group,
            unit,
            nudges: 0,
            gained_at: 0,
            mark: f64::NEG_INFINITY,
            rng,
        }
    }
}

/// The penalties of one group (a unit's facet).
#[derive(Debug, Clone, Default)]
pub(super) struct GroupPenalty {
    /// Weight of the data prior's penalty (0: none).
    pub prior: f32,
    /// Weight of the repulsion from `repel` (0: none).
    pub repel_weight: f32,
    /// The unit's facets found so far, each `[inputs]`.
    pub repel: Vec<Vec<f32>>,
}

/// What every row shares.
pub(super) struct Setup<'a> {
    pub net: &'a Network,
    pub layer: usize,
    pub steps: usize,
    pub l2: f32,
    pub tv: f32,
    pub prior: Option<&'a Prior>,
    pub groups: &'a [GroupPenalty],
    /// Starts per group; rows of group `g` are `g * restarts .. (g + 1) * restarts`.
    pub restarts: usize,
    /// How every start moves.
    pub rule: Rule,
}

/// Buffers reused across steps.
#[derive(Default)]
struct Batch {
    ws: GradWorkspace,
    /// Gathered points `[active, inputs]`.
    x: Vec<f32>,
    /// z `[active]`.
    z: Vec<f32>,
    /// dz/dx `[active, inputs]`.
    g: Vec<f32>,
    /// `x - mean` of the prior, `[active, inputs]`.
    d: Vec<f32>,
    /// `(x - mean) Sigma^-1`, `[active, inputs]`.
    pd: Vec<f32>,
    rows: Vec<usize>,
    units: Vec<usize>,
}

/// Visits every pair of neighbouring pixels (right and down neighbours, per channel) of an
/// image layout as flat indices `(p, q)`.
pub(super) fn for_each_neighbour_pair(layout: Layout, mut f: impl FnMut(usize, usize)) {
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
pub(super) fn penalty_and_gradient(
    x: &[f32],
    g: &mut [f32],
    l2: f32,
    tv: f32,
    layout: Layout,
) -> f64 {
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

/// The repulsion `w sum_f exp(-r_f^2 / (2 rho^2))` from the points `repel`, with `r_f` the
/// RMS distance in box widths from `x` to `f`, adding the ascent direction of its negative
/// to `g`.
fn repulsion_and_gradient(
    x: &[f32],
    g: &mut [f32],
    weight: f32,
    repel: &[Vec<f32>],
    width: &[f32],
) -> f64 {
    let n = x.len().max(1) as f64;
    let rho2 = REPEL_RADIUS * REPEL_RADIUS;
    let mut pen = 0.0f64;
    for f in repel {
        let r2 = x
            .iter()
            .zip(f)
            .zip(width)
            .filter(|(_, w)| **w > 0.0)
            .map(|((a, b), w)| (f64::from(a - b) / f64::from(*w)).powi(2))
            .sum::<f64>()
            / n;
        let e = (-r2 / (2.0 * rho2)).exp();
        pen += f64::from(weight) * e;
        // d/dx_i of exp(-r^2 / (2 rho^2)) = -exp(..) (x_i - f_i) / (rho^2 n w_i^2).
        let c = f64::from(weight) * e / (rho2 * n);
        for ((gi, (a, b)), w) in g.iter_mut().zip(x.iter().zip(f)).zip(width) {
            if *w > 0.0 {
                *gi += (c * f64::from(a - b) / f64::from(*w).powi(2)) as f32;
            }
        }
    }
    pen
}

/// The learning rate (fraction of the box width) at step `t` of `steps`: cosine-decayed
/// for [`Rule::Adam`], linear for [`Rule::Plain`].
fn learning_rate(rule: Rule, t: usize, steps: usize) -> f32 {
    let frac = if steps <= 1 {
        0.0
    } else {
        (t as f32 / (steps - 1) as f32).min(1.0)
    };
    match rule {
        Rule::Adam => {
            LR_END + (LR_START - LR_END) * 0.5 * (1.0 + (std::f32::consts::PI * frac).cos())
        }
        Rule::Plain => PLAIN_START + (PLAIN_END - PLAIN_START) * frac,
    }
}

/// The rounds `(step, keep)` at which each group keeps only its `keep` best starts
/// (successive halving, K. Jamieson & A. Talwalkar, "Non-stochastic best arm
/// identification and hyperparameter optimization", AISTATS 2016: spend the remaining
/// steps on the starts that lead). Adam starts reach their region within a few dozen steps,
/// so they are cut early: to half at a sixteenth of the run, to a quarter at an eighth, and
/// to the one leader at a quarter (8 starts of 200 steps: 8 x 12 + 4 x 13 + 2 x 25 +
/// 1 x 150 = 348 start-steps instead of 700 for one cut at a quarter; on the bench's
/// 2048-unit layer the last cut took the app's whole-layer search from 39.3 s to 28.6 s at
/// a mean z 0.10% lower, see DEVELOPERS.md). The plain rule's
/// exploration keeps a quarter at a quarter of its run (its large early steps are still
/// wandering before that). None is cut with at most 2 starts or fewer than 16 steps.
fn halving(rule: Rule, steps: usize, restarts: usize) -> Vec<(usize, usize)> {
    if restarts <= 2 || steps < 16 {
        return Vec::new();
    }
    let quarter = restarts.div_ceil(4).max(2);
    match rule {
        Rule::Adam => vec![
            (steps / 16, restarts.div_ceil(2).max(2)),
            (steps / 8, quarter),
            (steps / 4, 1),
        ],
        Rule::Plain => vec![(steps / 4, quarter)],
    }
}

/// Runs every step (and the final evaluation) of the ascent on `rows`, one batch of the
/// rows still moving per step, until all are stuck or the steps are used up. `progress`
/// runs from `range.0` to `range.1`.
pub(super) fn run_ascent(
    s: &Setup<'_>,
    rows: &mut [Row],
    progress: &dyn Progress,
    range: (f32, f32),
) -> Result<()> {
    let net = s.net;
    let n = net.input().size;
    let low = &net.input().low;
    let high = &net.input().high;
    let width: Vec<f32> = low.iter().zip(high).map(|(l, h)| h - l).collect();
    let mut batch = Batch::default();
    let steps = s.steps;
    let rounds = halving(s.rule, steps, s.restarts);
    for t in 0..=steps {
        if progress.cancelled() {
            return Err(Error::Cancelled);
        }
        if let Some(&(_, keep)) = rounds.iter().find(|(at, _)| *at == t) {
            keep_best_starts(rows, s.restarts, keep);
        }
        batch.rows.clear();
        batch
            .rows
            .extend((0..rows.len()).filter(|&r| rows[r].active));
        if batch.rows.is_empty() {
            break;
        }
        batch.units.clear();
        batch.units.extend(batch.rows.iter().map(|&r| rows[r].unit));
        gradients_of_moving_rows(s, rows, &mut batch, progress)?;
        let params = StepParams {
            low,
            high,
            width: &width,
            lr: learning_rate(s.rule, t, steps),
            rule: s.rule,
            t,
            // Only the main search's starts settle: an exploration start may cross into a
            // better region late in its run.
            settle_from: if s.rule == Rule::Adam {
                steps / 2
            } else {
                usize::MAX
            },
            bc1: 1.0 - BETA1.powi(t as i32 + 1),
            bc2: 1.0 - BETA2.powi(t as i32 + 1),
            l2: s.l2,
            tv: s.tv,
            layout: net.input().layout,
            prior_mean: s.prior.map(|p| p.mean.as_slice()),
            last: t == steps,
        };
        step_moving_rows(rows, &mut batch, n, s.groups, params);
        let f = (t + 1) as f32 / (steps + 1) as f32;
        progress.set(range.0 + f * (range.1 - range.0));
    }
    Ok(())
}

/// Stops all but the `keep` best starts (by the best objective so far) of every group.
fn keep_best_starts(rows: &mut [Row], restarts: usize, keep: usize) {
    for group in rows.chunks_mut(restarts) {
        let mut order: Vec<usize> = (0..group.len()).collect();
        order.sort_by(|&a, &b| group[b].best_obj.total_cmp(&group[a].best_obj));
        for &r in &order[keep.min(order.len())..] {
            group[r].active = false;
        }
    }
}

/// Gathers the moving rows into one batch and computes their z and input gradients (one
/// matrix product per layer for the whole batch), and with a prior `(x - mean) Sigma^-1`.
fn gradients_of_moving_rows(
    s: &Setup<'_>,
    rows: &[Row],
    batch: &mut Batch,
    progress: &dyn Progress,
) -> Result<()> {
    let net = s.net;
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
        s.layer,
        &batch.units,
        xview,
        &mut batch.z[..na],
        gview,
        &mut batch.ws,
        &|| progress.cancelled(),
    )?;
    if let Some(prior) = s.prior {
        batch.d.resize(na * n, 0.0);
        batch.pd.resize(na * n, 0.0);
        batch.d[..na * n]
            .par_chunks_mut(n.max(1))
            .zip(batch.x[..na * n].par_chunks(n.max(1)))
            .for_each(|(d, x)| {
                for ((dv, xv), mv) in d.iter_mut().zip(x).zip(&prior.mean) {
                    *dv = xv - mv;
                }
            });
        let (Ok(dview), Ok(mut pdview)) = (
            ArrayView2::from_shape((na, n), &batch.d[..na * n]),
            ArrayViewMut2::from_shape((na, n), &mut batch.pd[..na * n]),
        ) else {
            return Err(Error::internal("the prior buffer has the wrong length"));
        };
        // Sigma^-1 is symmetric, so (x - mean) Sigma^-1 is one product for the batch.
        gemm_into(&mut pdview, dview, prior.precision.view(), false);
    }
    Ok(())
}

/// One moving row with its gradient, z and prior product for this step.
type RowWork<'a> = (&'a mut Row, &'a mut [f32], f32, Option<&'a [f32]>);

/// Takes one step (see [`step_row`]) on every moving row, in parallel.
fn step_moving_rows(
    rows: &mut [Row],
    batch: &mut Batch,
    n: usize,
    groups: &[GroupPenalty],
    params: StepParams<'_>,
) {
    let na = batch.rows.len();
    let mut pos = vec![usize::MAX; rows.len()];
    for (p, &r) in batch.rows.iter().enumerate() {
        pos[r] = p;
    }
    let z = &batch.z[..na];
    let with_prior = params.prior_mean.is_some();
    let pd = &batch.pd;
    let mut grads = batch.g[..na * n].chunks_mut(n.max(1));
    let mut work: Vec<RowWork<'_>> = Vec::with_capacity(na);
    for (r, row) in rows.iter_mut().enumerate() {
        let p = pos[r];
        if p != usize::MAX
            && let Some(g) = grads.next()
        {
            let pdr = with_prior.then(|| &pd[p * n..(p + 1) * n]);
            work.push((row, g, z[p], pdr));
        }
    }
    work.par_iter_mut().for_each(|(row, g, zr, pdr)| {
        let group = &groups[row.group];
        step_row(row, g, *zr, *pdr, group, params);
    });
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
    prior_mean: Option<&'a [f32]>,
    /// The final evaluation: record the point, do not move.
    last: bool,
    rule: Rule,
    /// This step's index.
    t: usize,
    /// From this step on, a start that stopped gaining stops ([`SETTLED_STEPS`]).
    settle_from: usize,
}

/// Evaluates one row at its current point (`z`, gradient `g` of z, `pd` the prior's
/// `(x - mean) Sigma^-1` there), records the best point, and takes one projected Adam step
/// unless the row is stuck or this is the end. A point where the gradient of z is exactly
/// zero is moved off by a seeded random step instead.
fn step_row(
    row: &mut Row,
    g: &mut [f32],
    z: f32,
    pd: Option<&[f32]>,
    group: &GroupPenalty,
    p: StepParams<'_>,
) {
    if !z.is_finite() || g.iter().any(|v| !v.is_finite()) {
        row.nonfinite = true;
        row.active = false;
        return;
    }
    let flat = g.iter().all(|v| *v == 0.0);
    let mut pen = penalty_and_gradient(&row.x, g, p.l2, p.tv, p.layout);
    if let (Some(pd), Some(mean)) = (pd, p.prior_mean)
        && group.prior > 0.0
    {
        // W (x - m)^T P (x - m); its gradient is 2 W P (x - m) (P symmetric).
        let mut q = 0.0f64;
        for (((gi, pdi), xi), mi) in g.iter_mut().zip(pd).zip(&row.x).zip(mean) {
            q += f64::from(xi - mi) * f64::from(*pdi);
            *gi -= 2.0 * group.prior * pdi;
        }
        pen += f64::from(group.prior) * q;
    }
    if group.repel_weight > 0.0 {
        pen += repulsion_and_gradient(&row.x, g, group.repel_weight, &group.repel, p.width);
    }
    let obj = f64::from(z) - pen;
    if !obj.is_finite() || g.iter().any(|v| !v.is_finite()) {
        row.nonfinite = true;
        row.active = false;
        return;
    }
    if obj > row.best_obj {
        // Progress is counted from the last mark, so a steady creep of many small gains
        // counts as much as one large gain.
        if !row.mark.is_finite() || obj - row.mark > SETTLED_GAIN * row.mark.abs() {
            row.gained_at = p.t;
            row.mark = obj;
        }
        row.best_obj = obj;
        row.best_x.copy_from_slice(&row.x);
    }
    let settled = p.t >= p.settle_from && p.t - row.gained_at >= SETTLED_STEPS;
    if p.last || settled {
        row.active = false;
        return;
    }
    if flat && row.nudges < MAX_NUDGES {
        let size = NUDGE * (1u32 << row.nudges) as f32;
        for (i, xi) in row.x.iter_mut().enumerate() {
            let step = row.rng.random_range(-1.0f32..=1.0) * size * p.width[i];
            *xi = (*xi + step).clamp(p.low[i], p.high[i]);
        }
        row.nudges += 1;
        row.steps += 1;
        return;
    }
    // Stuck: the update below would push every coordinate against its bound (or leave it
    // where it is), so the point, hence the gradient, can never change again.
    let stuck = (0..g.len()).all(|i| {
        let (x, gi, mi) = (row.x[i], g[i], row.m.get(i).copied().unwrap_or(0.0));
        p.width[i] <= 0.0
            || (gi == 0.0 && mi == 0.0)
            || (x >= p.high[i] && gi >= 0.0 && mi >= 0.0)
            || (x <= p.low[i] && gi <= 0.0 && mi <= 0.0)
    });
    if stuck {
        row.active = false;
        return;
    }
    // Adam sees the gradient scaled to a largest step-weighted entry of 1, so gradients
    // far below f32's range (a saturated unit) neither underflow its second moment nor
    // weigh less than earlier steps; the direction of each step is unchanged.
    let scale = g
        .iter()
        .zip(p.width)
        .fold(0.0f32, |s, (gi, w)| s.max((gi * w).abs()));
    let inv = if scale > 0.0 && scale.is_finite() {
        1.0 / scale
    } else {
        1.0
    };
    if p.rule == Rule::Plain {
        for (i, xi) in row.x.iter_mut().enumerate() {
            let step = p.lr * p.width[i] * (g[i] * p.width[i] * inv);
            *xi = (*xi + step).clamp(p.low[i], p.high[i]);
        }
        row.steps += 1;
        return;
    }
    let Row { x, m, v, .. } = row;
    for (i, ((xi, mi), vi)) in x.iter_mut().zip(m.iter_mut()).zip(v.iter_mut()).enumerate() {
        let gi = g[i] * inv;
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

    #[test]
    fn repulsion_gradient_matches_finite_differences() {
        // Central differences (common practice): (f(x+h) - f(x-h)) / 2h, error O(h^2).
        let x = [0.3f32, -0.2, 0.9];
        let width = [1.0f32, 2.0, 0.5];
        let repel = vec![vec![0.35f32, -0.1, 0.85], vec![0.2, -0.3, 1.0]];
        let mut g = vec![0.0f32; 3];
        let pen = repulsion_and_gradient(&x, &mut g, 1.5, &repel, &width);
        assert!(pen > 0.0);
        let h = 1e-3f32;
        for i in 0..3 {
            let mut xp = x;
            let mut xm = x;
            xp[i] += h;
            xm[i] -= h;
            let mut dummy = vec![0.0f32; 3];
            let fp = repulsion_and_gradient(&xp, &mut dummy, 1.5, &repel, &width);
            let fm = repulsion_and_gradient(&xm, &mut dummy, 1.5, &repel, &width);
            let fd = (fp - fm) / (2.0 * f64::from(h));
            // g holds the ascent direction of -penalty.
            approx::assert_abs_diff_eq!(f64::from(g[i]), -fd, epsilon = 2e-2 * fd.abs().max(1.0));
        }
    }

    #[test]
    fn halving_keeps_a_quarter_then_the_leader() {
        assert_eq!(halving(Rule::Adam, 200, 8), vec![(12, 4), (25, 2), (50, 1)]);
        assert_eq!(
            halving(Rule::Adam, 200, 16),
            vec![(12, 8), (25, 4), (50, 1)]
        );
        assert_eq!(halving(Rule::Adam, 200, 3), vec![(12, 2), (25, 2), (50, 1)]);
        assert_eq!(halving(Rule::Plain, 1000, 256), vec![(250, 64)]);
        assert_eq!(halving(Rule::Adam, 200, 2), Vec::new());
        assert_eq!(halving(Rule::Adam, 8, 8), Vec::new());
    }
}
