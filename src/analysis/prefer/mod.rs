//! Preferred inputs: the input inside the box `[low, high]` that maximises a unit's
//! pre-activation, by projected gradient ascent from several starts.
//!
//! Objective per start: `z(x) - l2 * ||x||^2 - tv * TV(x) - prior(x) - repel(x)`:
//! - `TV` is the anisotropic total variation of an image layout, `sum` over channels of
//!   `|x(i, j+1) - x(i, j)|` and `|x(i+1, j) - x(i, j)|` over neighbouring pixels (Rudin,
//!   Osher & Fatemi 1992 define the continuous form; the anisotropic discrete sum is the
//!   usual discretisation). Its subgradient is used, with `sign(0) = 0`.
//! - With [`Reference`] data, the data prior
//!   `W s_u (x - mean)^T Sigma^-1 (x - mean) / p` keeps the input near the data: `mean`
//!   and the Ledoit-Wolf covariance `Sigma` of the data ([`prior`]), `p` inputs, `W` the
//!   option [`PreferOptions::prior_weight`] and `s_u` the standard deviation of the unit's
//!   z over the data, so that one weight means the same for every unit and model (a
//!   typical data sample pays about `W s_u`). The reported `preactivation` is the raw z.
//! - With several facets, facet `k` of a unit also pays
//!   `s_u sum_{j<k} exp(-r_j^2 / (2 rho^2))`, `r_j` the RMS distance (in box widths) to the
//!   unit's facet `j`, `rho = 0.1`: a repulsion that makes the facets differ (a diversity
//!   term as discussed by C. Olah, A. Mordvintsev & L. Schubert, "Feature visualization",
//!   Distill 2017). Facets are searched one after another.
//!
//! Step rule (scale-free): Adam (Kingma & Ba 2015, Algorithm 1; beta1 = 0.9,
//! beta2 = 0.999) whose step for input `i` is `lr_t * (high_i - low_i)`, with `lr_t`
//! following a cosine decay from 0.05 to 0.0005 over the run. After each step the input is
//! projected (clamped) back into the box. A start whose gradient of z is exactly zero (the
//! box centre of a rectifier network with zero biases) is moved off the flat spot by a small
//! seeded random step.
//!
//! Starts (`starts.rs`): with reference data, each unit's (facet's) top-activating samples,
//! then the box centre, then uniform random points from a `ChaCha8Rng` seeded with `seed`.
//! After a quarter of the steps each unit keeps only its best quarter of the starts
//! (successive halving). A start stops early once it is provably stuck. The best point of
//! every trajectory (including the start itself) is kept, and the best start (by the
//! penalised objective) is returned, so the result is never worse than any start, in
//! particular never worse than the best reference sample.
//!
//! Exploration (small networks): the Adam starts run fast to a vertex of their region, and
//! on saturated networks (tanh or sigmoid units driven far from 0, where the objective is
//! nearly flat between the hyperplanes of the layers below) they settle in the same few
//! regions from most starts. So each unit also gets exploration starts: uniform random
//! points moved by plain projected gradient ascent with a normalised step
//! (`search::Rule::Plain`) for 1000 steps, whose large early steps follow the steepest
//! path across many regions (the best point of the path is kept). Their number is a work
//! budget over the work of one start (see `exploration_starts`): hundreds on a small
//! network, where a start costs a few thousand multiply-adds a step, none on a large layer
//! (the 784-2048-2048 bench layer costs a million times more), so speed there is
//! unchanged. The best of all starts, main and exploration, is returned.
//!
//! For a first-layer unit without any penalty the objective is linear, and its maximum
//! over the box is the vertex `x_i = high_i if w_i > 0 else low_i`, with the value
//! `b + sum_i max(w_i low_i, w_i high_i)` ([`closed_form_first_layer`]): [`prefer`] returns
//! that vertex without searching.
//!
//! All requested units run as one batch of `units x restarts` rows per step (one matrix
//! product per layer for the batch, see [`super::gradient`]). The target is "unit `u` of
//! layer `l`", an index into the layer's outputs.

pub mod prior;
mod search;
mod starts;

use super::Progress;
use super::fields::check_position;
use super::forward::forward_trace;
use crate::error::{Error, Result};
use crate::model::{LayerKind, Layout, Network, Shape};
use ndarray::{Array2, ArrayView2};
pub use prior::{Prior, Reference};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use search::{GroupPenalty, Row, Rule, Setup, run_ascent};

/// The default weight of the data prior: chosen on scikit-learn's digits by
/// `scripts/measure_prior_weight.py` (see DEVELOPERS.md for the numbers).
pub const DEFAULT_PRIOR_WEIGHT: f32 = 2.0;
/// The most facets per unit.
pub const MAX_FACETS: usize = 64;

/// Options of the preferred-input search, valid by construction: at least one restart,
/// between 1 and [`MAX_FACETS`] facets, and penalties that are finite and not negative
/// ([`PreferOptions::new`] and the `with_*` methods check them once; the search does not
/// check them again).
#[derive(Debug, Clone, PartialEq)]
pub struct PreferOptions {
    steps: usize,
    restarts: usize,
    seed: u64,
    l2: f32,
    tv: f32,
    prior_weight: f32,
    facets: usize,
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
            prior_weight: DEFAULT_PRIOR_WEIGHT,
            facets: 1,
            position: None,
        }
    }
}

impl PreferOptions {
    /// Checked options: `steps` gradient steps per start, `restarts` starts per unit (the
    /// box centre plus `restarts - 1` random points from `seed`, data starts first when
    /// there is reference data), and the weights of the `||x||^2` penalty (`l2`) and of the
    /// total-variation penalty (`tv`, image layouts only; whether the model has one is
    /// checked by [`prefer`]). The prior weight and the facets keep their defaults.
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
            ..PreferOptions::default()
        })
    }

    /// The same options with the data prior's weight `w` (used only with reference data).
    ///
    /// Errors: [`Error::BadOption`] (`prior-weight`) for a negative or non-finite weight.
    pub fn with_prior_weight(mut self, w: f32) -> Result<Self> {
        if !(w.is_finite() && w >= 0.0) {
            return Err(Error::bad_option(
                "prior-weight",
                w,
                "must be a finite number >= 0",
            ));
        }
        self.prior_weight = w;
        Ok(self)
    }

    /// The same options with `k` facets per unit.
    ///
    /// Errors: [`Error::BadOption`] (`facets`) unless `1 <= k <= MAX_FACETS`.
    pub fn with_facets(mut self, k: usize) -> Result<Self> {
        if k == 0 || k > MAX_FACETS {
            return Err(Error::bad_option(
                "facets",
                k,
                format!("must be between 1 and {MAX_FACETS}"),
            ));
        }
        self.facets = k;
        Ok(self)
    }

    /// Gradient steps per start (default 200).
    pub fn steps(&self) -> usize {
        self.steps
    }

    /// Starts per unit of the main search, at least 1 (default 8); the exploration starts
    /// of small networks come on top (see the module docs).
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

    /// Weight `W` of the data prior, used only when the search has reference data
    /// (default [`DEFAULT_PRIOR_WEIGHT`]).
    pub fn prior_weight(&self) -> f32 {
        self.prior_weight
    }

    /// Preferred inputs per unit (default 1).
    pub fn facets(&self) -> usize {
        self.facets
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
}

/// The preferred input of one unit (one facet of it).
#[derive(Debug, Clone, PartialEq)]
pub struct Preferred {
    /// Layer index.
    pub layer: usize,
    /// Unit index within the layer (the channel of a convolutional layer).
    pub unit: usize,
    /// The map position `(row, column)` maximised on a layer with a map output; `None` on
    /// a layer with a vector output.
    pub position: Option<(usize, usize)>,
    /// Which of the unit's facets, from 0 (always 0 with one facet).
    pub facet: usize,
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
    /// The mean pairwise distance between the unit's facets ([`facet_distance`]); 0 with one
    /// facet.
    pub spread: f32,
}

/// The distance between two inputs in box widths: the root mean square over inputs of
/// `(a_i - b_i) / (high_i - low_i)` (inputs of zero width skipped), from 0 (the same) to 1
/// (opposite corners of the box).
pub fn facet_distance(a: &[f32], b: &[f32], low: &[f32], high: &[f32]) -> f32 {
    let n = a.len().max(1) as f64;
    let s: f64 = a
        .iter()
        .zip(b)
        .zip(low.iter().zip(high))
        .filter(|(_, (l, h))| h > l)
        .map(|((x, y), (l, h))| (f64::from(x - y) / f64::from(h - l)).powi(2))
        .sum();
    (s / n).sqrt() as f32
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

/// Preferred inputs of `units` of `layer` without reference data (see [`prefer_with`]).
///
/// Errors: as [`prefer_with`].
pub fn prefer(
    net: &Network,
    layer: usize,
    units: &[usize],
    opts: &PreferOptions,
    progress: &dyn Progress,
) -> Result<Vec<Preferred>> {
    prefer_with(net, layer, units, opts, None, progress)
}

/// Preferred inputs of `units` of `layer` (see the module docs for the method), one per
/// unit and facet, in unit order and facet order within a unit. With `reference`, the
/// search starts from the units' top-activating samples too, and the data prior applies
/// with the options' prior weight (weight 0: starts only).
///
/// A first-layer unit searched without any penalty and with one facet has a linear
/// objective, whose maximum over the box is known: such units get the closed-form optimum
/// ([`closed_form_first_layer`], 0 steps) without any search.
///
/// Errors: [`Error::BadOption`] for a layer index or unit the model does not have, or a TV
/// penalty on a vector layout; [`Error::Cancelled`] when `progress` asks to stop (checked
/// every step). NaN or infinity in the search is not an error: the unit is returned with
/// `finite == false`.
pub fn prefer_with(
    net: &Network,
    layer: usize,
    units: &[usize],
    opts: &PreferOptions,
    reference: Option<&Reference>,
    progress: &dyn Progress,
) -> Result<Vec<Preferred>> {
    check_request(net, layer, units, opts)?;
    let (targets, position) = targets(net, layer, units, opts)?;
    let linear = layer == 0
        && opts.l2 == 0.0
        && opts.tv == 0.0
        && opts.facets == 1
        && reference.is_none_or(|_| opts.prior_weight == 0.0);
    let found = if linear {
        let mut inputs = Array2::<f32>::zeros((targets.len(), net.input().size));
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
            targets.len()
        ];
        progress.set(1.0);
        evaluate(net, layer, &targets, 1, &inputs, &outcome)
    } else {
        ascend(net, layer, &targets, opts, reference, progress)?
    };
    Ok(relabel(found, units, &targets, position))
}

/// Preferred inputs of `units` of `layer` by projected gradient ascent without reference
/// data, even where [`prefer`] would use the closed form. Errors as for [`prefer`].
pub fn prefer_by_ascent(
    net: &Network,
    layer: usize,
    units: &[usize],
    opts: &PreferOptions,
    progress: &dyn Progress,
) -> Result<Vec<Preferred>> {
    check_request(net, layer, units, opts)?;
    let (targets, position) = targets(net, layer, units, opts)?;
    let found = ascend(net, layer, &targets, opts, None, progress)?;
    Ok(relabel(found, units, &targets, position))
}

/// Output-value indices to maximise, with the map position they sit at (`None` on a vector).
type Targets = (Vec<usize>, Option<(usize, usize)>);

/// The output values the search maximises: unit `u` itself on a layer with a vector output;
/// channel `u` at the chosen position (default the centre) on a map, with that position.
/// The search itself only ever sees "output value t of layer l".
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

/// Gives each result its unit (channel) and position back: `found` holds the results of
/// `targets` (one or more facets each, in order), `targets[i]` standing for `units[i]`.
fn relabel(
    mut found: Vec<Preferred>,
    units: &[usize],
    targets: &[usize],
    position: Option<(usize, usize)>,
) -> Vec<Preferred> {
    let unit_of: std::collections::HashMap<usize, usize> =
        targets.iter().copied().zip(units.iter().copied()).collect();
    for p in &mut found {
        p.unit = unit_of.get(&p.unit).copied().unwrap_or(p.unit);
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

/// How the search of one unit (facet) went.
#[derive(Debug, Clone, Copy)]
struct Outcome {
    /// The most steps any start ran.
    steps: usize,
    /// No start met NaN or infinity, and some start reached a finite objective.
    finite: bool,
}

/// Uniform box samples used to measure a unit's spread of z when there is no reference
/// data (facets need a scale for their repulsion).
const SPREAD_SAMPLES: usize = 256;

/// The spread `s_u` of each unit's z: over the reference's samples, or over
/// [`SPREAD_SAMPLES`] uniform points of the box drawn from `seed`.
fn unit_spreads(
    net: &Network,
    layer: usize,
    units: &[usize],
    reference: Option<&Reference>,
    seed: u64,
) -> Vec<f32> {
    if let Some(r) = reference {
        return prior::column_spread(r.layer_z(net, layer).view(), units);
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5eed_5eed);
    let (low, high) = (&net.input().low, &net.input().high);
    let x = Array2::from_shape_fn((SPREAD_SAMPLES, net.input().size), |(_, i)| {
        if high[i] > low[i] {
            rng.random_range(low[i]..=high[i])
        } else {
            low[i]
        }
    });
    let t = forward_trace(net, x.view(), layer);
    prior::column_spread(t.pre[layer].view(), units)
}

/// The data starts of every unit: per unit, its top-activating candidates split into
/// `facets` clusters (best cluster first), as row indices into the candidates.
fn data_clusters(
    net: &Network,
    layer: usize,
    units: &[usize],
    opts: &PreferOptions,
    reference: Option<&Reference>,
) -> Vec<Vec<Vec<usize>>> {
    let Some(r) = reference else {
        return vec![Vec::new(); units.len()];
    };
    let z = r.layer_z(net, layer);
    let width: Vec<f32> = net
        .input()
        .low
        .iter()
        .zip(&net.input().high)
        .map(|(l, h)| h - l)
        .collect();
    let take = (4 * opts.facets).max(opts.restarts);
    units
        .iter()
        .map(|&u| {
            let top = starts::top_rows(z.column(u), take);
            starts::cluster(
                r.candidates(),
                &top,
                opts.facets,
                &width,
                opts.seed ^ u as u64,
            )
        })
        .collect()
}

/// The ascent of a checked request: facet by facet, all units together.
fn ascend(
    net: &Network,
    layer: usize,
    units: &[usize],
    opts: &PreferOptions,
    reference: Option<&Reference>,
    progress: &dyn Progress,
) -> Result<Vec<Preferred>> {
    if units.is_empty() {
        progress.set(1.0);
        return Ok(Vec::new());
    }
    let k = opts.facets;
    let p = net.input().size.max(1) as f32;
    let use_prior = reference.is_some() && opts.prior_weight > 0.0;
    let spreads = if use_prior || k > 1 {
        unit_spreads(net, layer, units, reference, opts.seed)
    } else {
        vec![0.0; units.len()]
    };
    let clusters = data_clusters(net, layer, units, opts, reference);
    let candidates = reference.map(Reference::candidates);
    let explore = exploration_starts(net, layer);
    let mut found: Vec<Vec<Vec<f32>>> = vec![Vec::new(); units.len()];
    let mut outcomes: Vec<Vec<Outcome>> = vec![Vec::new(); units.len()];
    for facet in 0..k {
        let mut rows = Vec::with_capacity(units.len() * opts.restarts);
        let mut groups = Vec::with_capacity(units.len());
        for (ui, &u) in units.iter().enumerate() {
            let data: Vec<Vec<f32>> = match (candidates, clusters[ui].get(facet)) {
                (Some(c), Some(members)) => members.iter().map(|&r| c.row(r).to_vec()).collect(),
                _ => Vec::new(),
            };
            // Each unit (facet) draws from its own stream, so its result does not depend on
            // which other units share the call (the app's batches, `prefer --all`).
            let key = (u * MAX_FACETS + facet) as u64;
            let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
            rng.set_stream(key * 2); // even streams: starts; odd streams: nudges
            let pts = starts::group_starts(
                &data,
                opts.restarts,
                &net.input().low,
                &net.input().high,
                &mut rng,
            );
            for (r, x) in pts.into_iter().enumerate() {
                let stream = (key * opts.restarts as u64 + r as u64) * 2 + 1;
                rows.push(Row::new(x, u, ui, opts.seed, stream));
            }
            groups.push(GroupPenalty {
                prior: if use_prior {
                    opts.prior_weight * spreads[ui] / p
                } else {
                    0.0
                },
                repel_weight: if facet > 0 { spreads[ui] } else { 0.0 },
                repel: found[ui].clone(),
            });
        }
        let setup = Setup {
            net,
            layer,
            steps: opts.steps,
            l2: opts.l2,
            tv: opts.tv,
            prior: if use_prior {
                reference.map(Reference::prior)
            } else {
                None
            },
            groups: &groups,
            restarts: opts.restarts,
            rule: Rule::Adam,
        };
        let range = (facet as f32 / k as f32, (facet + 1) as f32 / k as f32);
        // The main search's share of the facet's progress, by nominal work.
        let main_work = (opts.restarts * opts.steps) as f32;
        let explore_work = (explore * EXPLORE_STEPS) as f32;
        let split = range.0 + (range.1 - range.0) * main_work / (main_work + explore_work);
        run_ascent(&setup, &mut rows, progress, (range.0, split))?;
        let mut explored = explore_units(
            &setup,
            units,
            facet,
            explore,
            opts.seed,
            progress,
            (split, range.1),
        )?;
        for (ui, group) in rows.chunks(opts.restarts).enumerate() {
            let extra = explored
                .get(ui * explore..(ui + 1) * explore)
                .unwrap_or(&[]);
            let all = || group.iter().chain(extra);
            let best = all()
                .filter(|r| r.best_obj.is_finite())
                .max_by(|a, b| a.best_obj.total_cmp(&b.best_obj));
            let x = best.map_or_else(|| net.input().centre(), |r| r.best_x.clone());
            found[ui].push(x);
            outcomes[ui].push(Outcome {
                steps: all().map(|r| r.steps).max().unwrap_or(0),
                finite: best.is_some() && !all().any(|r| r.nonfinite),
            });
        }
        explored.clear();
    }
    let mut inputs = Array2::<f32>::zeros((units.len() * k, net.input().size));
    for (mut dst, src) in inputs.rows_mut().into_iter().zip(found.iter().flatten()) {
        dst.iter_mut().zip(src).for_each(|(d, s)| *d = *s);
    }
    let outcome: Vec<Outcome> = outcomes.into_iter().flatten().collect();
    Ok(evaluate(net, layer, units, k, &inputs, &outcome))
}

/// Steps of every exploration start (long: the early large steps of the plain rule cross
/// many regions; on the saturated reference networks 200 steps found the best region
/// about 100 times less often than 500 to 1000, see DEVELOPERS.md).
const EXPLORE_STEPS: usize = 1000;
/// Work (multiply-adds of the forward and backward passes) the exploration may spend per
/// unit and facet: the number of exploration starts is this budget over the work of one
/// start, so small networks get many and large layers none (the bench's 784-2048-2048
/// layer h2 costs about 6.4e9 per start, far over the budget). On the worst digits tanh unit
/// about one exploration start in 240 finds the best region, so 512 starts miss it with a
/// chance of about 12%, 231 starts with about 38% (DEVELOPERS.md).
const EXPLORE_BUDGET: f64 = 2.5e9;
/// Most exploration starts per unit and facet.
const EXPLORE_MAX_STARTS: usize = 512;
/// Fewer exploration starts than this are not worth their cost: none are run.
const EXPLORE_MIN_STARTS: usize = 16;
/// Largest `starts x inputs` held at once by one chunk of the exploration (each start
/// holds its point and its best point): units are explored in chunks under this bound.
const EXPLORE_CHUNK_VALUES: usize = 1 << 23;

/// Multiply-adds of one start's step (forward to the target and back to the input) when
/// maximising an output of `layer`.
fn step_work(net: &Network, layer: usize) -> f64 {
    let mut macs = net.input().size as f64;
    for l in 0..layer {
        let positions = net.output_shape(l).positions() as f64;
        macs += net.layer(l).weights.len() as f64 * positions + net.output_shape(l).len() as f64;
    }
    let target = net.layer(layer);
    2.0 * macs + target.weights.ncols() as f64
}

/// Exploration starts per unit and facet for `layer`: [`EXPLORE_BUDGET`] over the work of
/// one start, at most [`EXPLORE_MAX_STARTS`]; none below [`EXPLORE_MIN_STARTS`] and none on
/// the first layer (whose objective is a linear function plus concave penalties there,
/// unless facets repel, so the main search already finds its maximum).
fn exploration_starts(net: &Network, layer: usize) -> usize {
    if layer == 0 {
        return 0;
    }
    let per_start = step_work(net, layer) * EXPLORE_STEPS as f64;
    let n = (EXPLORE_BUDGET / per_start)
        .floor()
        .min(EXPLORE_MAX_STARTS as f64) as usize;
    if n >= EXPLORE_MIN_STARTS { n } else { 0 }
}

/// The exploration of facet `facet` (see the module docs): `explore` starts per unit at
/// uniform random points, moved by the plain rule for [`EXPLORE_STEPS`] steps with the
/// same objective and penalties as the main search (`setup`). Each unit's points come from
/// its own stream of a generator seeded from `seed`, so a unit's result does not depend on
/// the other units of the call. Rows `ui * explore .. (ui + 1) * explore` belong to
/// `units[ui]`; empty when `explore` is 0.
fn explore_units(
    setup: &Setup<'_>,
    units: &[usize],
    facet: usize,
    explore: usize,
    seed: u64,
    progress: &dyn Progress,
    range: (f32, f32),
) -> Result<Vec<Row>> {
    if explore == 0 || units.is_empty() {
        return Ok(Vec::new());
    }
    let net = setup.net;
    let (low, high) = (&net.input().low, &net.input().high);
    let chunk = (EXPLORE_CHUNK_VALUES / (explore * net.input().size.max(1))).max(1);
    let chunks = units.len().div_ceil(chunk);
    let mut out = Vec::with_capacity(units.len() * explore);
    for (c, part) in units.chunks(chunk).enumerate() {
        let first = c * chunk;
        let mut rows = Vec::with_capacity(part.len() * explore);
        for (i, &u) in part.iter().enumerate() {
            let mut rng = ChaCha8Rng::seed_from_u64(seed ^ EXPLORE_SALT);
            let key = (u * MAX_FACETS + facet) as u64;
            rng.set_stream(key * 2); // even streams: starts; odd streams: nudges
            for r in 0..explore {
                let x = starts::uniform_point(low, high, &mut rng);
                let stream = (key * explore as u64 + r as u64) * 2 + 1;
                rows.push(Row::with_rule(
                    x,
                    u,
                    i,
                    seed ^ EXPLORE_SALT,
                    stream,
                    Rule::Plain,
                ));
            }
        }
        let s = Setup {
            steps: EXPLORE_STEPS,
            restarts: explore,
            rule: Rule::Plain,
            groups: &setup.groups[first..first + part.len()],
            ..*setup
        };
        let f = |j: usize| range.0 + (range.1 - range.0) * j as f32 / chunks as f32;
        run_ascent(&s, &mut rows, progress, (f(c), f(c + 1)))?;
        out.extend(rows);
    }
    Ok(out)
}

/// Mixed into the seed of the exploration starts, so they differ from the main search's.
const EXPLORE_SALT: u64 = 0x00e7_b10e_5eed;

/// The result per unit and facet: `inputs: [units x facets, inputs]` (unit-major)
/// evaluated once more with a plain forward pass (the raw z and the activation there),
/// with each unit's facet spread.
fn evaluate(
    net: &Network,
    layer: usize,
    units: &[usize],
    facets: usize,
    inputs: &Array2<f32>,
    outcome: &[Outcome],
) -> Vec<Preferred> {
    let trace = forward_trace(net, inputs.view(), layer);
    let pre = &trace.pre[layer];
    let post = &trace.post[layer];
    let mut out = Vec::with_capacity(units.len() * facets);
    for (ui, &u) in units.iter().enumerate() {
        let rows = ui * facets..(ui + 1) * facets;
        let spread = mean_pairwise_distance(net, inputs.view(), rows.clone());
        for (f, row) in rows.enumerate() {
            let preactivation = pre[[row, u]];
            let activation = post[[row, u]];
            let o = outcome[row];
            out.push(Preferred {
                layer,
                unit: u,
                position: None,
                facet: f,
                input: inputs.row(row).to_vec(),
                preactivation,
                activation,
                steps: o.steps,
                finite: o.finite && preactivation.is_finite() && activation.is_finite(),
                spread,
            });
        }
    }
    out
}

/// The mean [`facet_distance`] over the pairs of `rows` of `inputs` (0 for one row).
fn mean_pairwise_distance(
    net: &Network,
    inputs: ArrayView2<f32>,
    rows: std::ops::Range<usize>,
) -> f32 {
    let (low, high) = (&net.input().low, &net.input().high);
    let mut sum = 0.0f64;
    let mut pairs = 0usize;
    for a in rows.clone() {
        for b in a + 1..rows.end {
            let (ra, rb) = (inputs.row(a), inputs.row(b));
            let (Some(sa), Some(sb)) = (ra.as_slice(), rb.as_slice()) else {
                continue;
            };
            sum += f64::from(facet_distance(sa, sb, low, high));
            pairs += 1;
        }
    }
    if pairs == 0 {
        0.0
    } else {
        (sum / pairs as f64) as f32
    }
}

#[cfg(test)]
mod tests;
