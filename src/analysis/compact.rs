//! Exact compaction: a smaller network with the same outputs on the whole input box.
//!
//! What is removed, and why it does not change any output for any input in the box:
//! - `dead_proven`: a `relu` unit whose sound upper bound of z over the box
//!   ([`super::bounds::interval_bounds`], the same bound `screen` reports) is <= 0 outputs
//!   exactly 0 everywhere in the box, so its row and its outgoing column can go.
//!   `leaky_relu`, `sigmoid` and `tanh` units are never removed as dead: their output there
//!   is not zero.
//! - `zero_outgoing`: a hidden unit or an input feature whose every outgoing weight (in the
//!   units that are kept) is 0 contributes nothing to the layer above.
//! - `constant` (only when asked, [`CompactOptions::fold_tolerance`]): a hidden unit whose
//!   activation over the box lies in an interval `[lo, hi]` no wider than the tolerance is
//!   replaced by the constant `c = (lo + hi) / 2`: the next layer's bias gains
//!   `w_next[:, k] * c` (computed in f64, stored as f32), so each pre-activation above moves
//!   by at most `|w_next[j, k]| * tolerance / 2`.
//! - `dead_on_probe` (only when asked): a `relu` unit never active on the reference data.
//!   Exact on that data, lossy elsewhere in the box.
//! - `pruned`: units chosen by the structured-pruning criteria of [`super::structured`]
//!   (lossy; that module builds the plan).
//!
//! The output layer's units are never removed. A layer always keeps at least one unit and
//! the input at least one feature (the schema has no empty layers); when every unit of a
//! layer qualifies, the lowest-numbered one stays. Input features are only removed from a
//! vector input: dropping pixels would break an image layout, so there they are counted and
//! kept.
//!
//! Planning is repeated on the smaller network until nothing more qualifies, because
//! folding a constant into a bias can tighten the bounds above it.
//!
//! Both fronts (`receptor compact` and the app's "Compact model" window) call
//! [`compact_checked`]: it finds the never-active units when asked, compacts, and compares
//! the outputs of the two models on the reference data (and on uniform box samples), so
//! both show the same removals, the same largest difference and the same accuracies;
//! [`CheckedCompaction::refusal`] is the one rule deciding whether the result may be
//! written, and [`Compaction::layer_summaries`] the one per-layer summary.

use super::bounds::{Bounds, activate_f64, interval_bounds};
use super::forward::{argmax_rows, forward};
use super::screen::{ScreenOptions, Status, UnitScreen, screen};
use super::{Progress, SubProgress};
use crate::error::{Error, Result};
use crate::model::{Activation, InputSpec, Layer, Layout, Network};
use crate::probe::{DEFAULT_CHUNK_ROWS, ProbeSource};
use ndarray::{Array1, Array2, Axis};

/// Refuses a network with any layer that is not dense: removing whole channels of
/// convolutional layers (with the next layer's matching input channels) is not implemented
/// yet. `what` names the operation in the message.
pub(crate) fn require_dense(net: &Network, what: &str) -> Result<()> {
    match net
        .layers()
        .iter()
        .find(|l| l.kind != crate::model::LayerKind::Dense)
    {
        None => Ok(()),
        Some(l) => Err(Error::usage(format!(
            "{what} works on networks of dense layers only for now: layer '{}' is a {} layer (removing whole channels of convolutional layers is not implemented yet; magnitude pruning with prune-sweep works on every layer)",
            l.name,
            l.kind.name()
        ))),
    }
}

/// Largest |difference| of any output allowed by default between a model and its exact
/// compaction on the reference data: removing terms that are exactly zero only changes the
/// order of float32 summation inside the matrix products, which moves an output by a few
/// units in the last place (1e-5 is about 100 float32 ulps of 1; common practice, no
/// source).
pub const DEFAULT_CHECK_TOLERANCE: f64 = 1e-5;

/// Default width of the activation interval under which `--fold-constant` treats a unit as
/// constant (the example: a saturated tanh bounded to within 1e-6 of ±1).
pub const DEFAULT_FOLD_TOLERANCE: f64 = 1e-6;

/// Why a unit or an input feature is removed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Reason {
    /// A relu unit whose sound upper bound over the box is <= 0.
    DeadProven,
    /// Every outgoing weight (to units that stay) is 0.
    ZeroOutgoing,
    /// Constant over the box within the fold tolerance; its value went into the next bias.
    Constant {
        /// The value folded into the next layer's bias.
        value: f64,
    },
    /// A relu unit never active on the reference data (lossy outside that data).
    DeadOnProbe,
    /// Chosen by a structured-pruning criterion (lossy).
    Pruned,
}

impl Reason {
    /// The name used in summaries.
    pub fn as_str(&self) -> &'static str {
        match self {
            Reason::DeadProven => "dead_proven",
            Reason::ZeroOutgoing => "zero_outgoing",
            Reason::Constant { .. } => "constant",
            Reason::DeadOnProbe => "dead_on_probe",
            Reason::Pruned => "pruned",
        }
    }

    /// True for the reasons that hold on the whole input box.
    pub fn is_exact(&self) -> bool {
        matches!(
            self,
            Reason::DeadProven | Reason::ZeroOutgoing | Reason::Constant { .. }
        )
    }
}

/// Which removals beyond the exact `dead_proven` and `zero_outgoing` are allowed.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct CompactOptions {
    /// Fold units whose activation over the box varies by at most this much into the next
    /// layer's bias (`None`: never fold).
    pub fold_tolerance: Option<f64>,
    /// Per hidden layer, per unit: true when the unit was never active on the reference
    /// data; such `relu` units are removed as `dead_on_probe` (`None`: never).
    /// Indices refer to the network given to [`compact`].
    pub never_active: Option<Vec<Vec<bool>>>,
}

/// What to take out of one network (indices into that network).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Plan {
    /// Per layer (the output layer's list stays empty): `(unit, reason)`, ascending units.
    pub units: Vec<Vec<(usize, Reason)>>,
    /// Input features to drop, ascending.
    pub inputs: Vec<usize>,
}

impl Plan {
    /// An empty plan for `net`.
    pub fn empty(net: &Network) -> Self {
        Plan {
            units: vec![Vec::new(); net.layers().len()],
            inputs: Vec::new(),
        }
    }

    /// True when nothing is removed.
    pub fn is_empty(&self) -> bool {
        self.inputs.is_empty() && self.units.iter().all(Vec::is_empty)
    }
}

/// One removed unit or input, numbered as in the original network.
#[derive(Debug, Clone, PartialEq)]
pub struct Removed {
    /// Layer index, or `None` for an input feature.
    pub layer: Option<usize>,
    /// Unit (or input feature) index in the original network.
    pub index: usize,
    /// Why it went.
    pub reason: Reason,
}

/// The result of [`compact`].
#[derive(Debug, Clone)]
pub struct Compaction {
    /// The smaller, validated network.
    pub network: Network,
    /// Everything removed, in the order it was found.
    pub removed: Vec<Removed>,
    /// Original indices of the input features that remain, ascending.
    pub kept_inputs: Vec<usize>,
    /// Input features with no non-zero outgoing weight that were kept because the input is
    /// an image (or because the input must keep one feature).
    pub zero_inputs_kept: usize,
}

impl Compaction {
    /// Removed units of layer `l`, per reason name, in first-seen order.
    pub fn counts(&self, layer: Option<usize>) -> Vec<(&'static str, usize)> {
        let mut out: Vec<(&'static str, usize)> = Vec::new();
        for r in self.removed.iter().filter(|r| r.layer == layer) {
            let name = r.reason.as_str();
            match out.iter_mut().find(|(n, _)| *n == name) {
                Some((_, c)) => *c += 1,
                None => out.push((name, 1)),
            }
        }
        out
    }

    /// What was removed, as one summary for the input and one per layer (in order), with
    /// unit numbers of `original`, the network given to [`compact`].
    pub fn layer_summaries(&self, original: &Network) -> Vec<LayerSummary> {
        let entry = |layer: Option<usize>, name: &str, before: usize, after: usize| {
            let mut removed: Vec<(usize, Reason)> = self
                .removed
                .iter()
                .filter(|r| r.layer == layer)
                .map(|r| (r.index, r.reason))
                .collect();
            removed.sort_by_key(|r| r.0);
            LayerSummary {
                layer,
                name: name.to_string(),
                activation: layer.map(|l| original.layers()[l].activation),
                before,
                after,
                counts: self.counts(layer),
                removed,
            }
        };
        let mut out = vec![entry(
            None,
            "input",
            original.input().size,
            self.network.input().size,
        )];
        for (l, (a, b)) in original
            .layers()
            .iter()
            .zip(self.network.layers())
            .enumerate()
        {
            out.push(entry(Some(l), &a.name, a.units(), b.units()));
        }
        out
    }
}

/// What compaction removed from the input or from one layer.
#[derive(Debug, Clone, PartialEq)]
pub struct LayerSummary {
    /// Layer index, or `None` for the input's features.
    pub layer: Option<usize>,
    /// The layer's name (`input` for the input).
    pub name: String,
    /// The layer's activation (`None` for the input).
    pub activation: Option<Activation>,
    /// Units (or features) before.
    pub before: usize,
    /// Units (or features) after.
    pub after: usize,
    /// Removed units per reason name, in first-seen order.
    pub counts: Vec<(&'static str, usize)>,
    /// Removed units (numbered as in the original network), ascending, with the reason.
    pub removed: Vec<(usize, Reason)>,
}

impl LayerSummary {
    /// Units removed.
    pub fn removed_count(&self) -> usize {
        self.removed.len()
    }
}

/// The activation interval of every unit of layer `l` over the box, from pre-activation
/// bounds (activations are non-decreasing, see [`super::bounds`]).
fn activation_range(net: &Network, bounds: &Bounds, l: usize, k: usize) -> (f64, f64) {
    let act = net.layers()[l].activation;
    (
        activate_f64(act, bounds.lower[l][k]),
        activate_f64(act, bounds.upper[l][k]),
    )
}

/// Plans one round of removals on `net` with its bounds; `never_active` is indexed like
/// `net`. See the module docs for the rules.
pub fn plan(
    net: &Network,
    bounds: &Bounds,
    never_active: Option<&[Vec<bool>]>,
    fold_tolerance: Option<f64>,
) -> Plan {
    let n_layers = net.layers().len();
    let mut plan = Plan::empty(net);
    let hidden = n_layers - 1;
    for l in 0..hidden {
        let layer = &net.layers()[l];
        for k in 0..layer.units() {
            let relu = layer.activation == Activation::Relu;
            let reason = if relu && bounds.upper[l][k] <= 0.0 {
                Some(Reason::DeadProven)
            } else if let Some(tol) = fold_tolerance
                && let (lo, hi) = activation_range(net, bounds, l, k)
                && lo.is_finite()
                && hi.is_finite()
                && hi - lo <= tol
            {
                Some(Reason::Constant {
                    value: 0.5 * (lo + hi),
                })
            } else if relu
                && never_active.is_some_and(|na| na.get(l).and_then(|v| v.get(k)) == Some(&true))
            {
                Some(Reason::DeadOnProbe)
            } else {
                None
            };
            if let Some(r) = reason {
                plan.units[l].push((k, r));
            }
        }
        keep_one(&mut plan.units[l], layer.units());
    }
    // Zero outgoing weights, from the top down, so that a unit whose only non-zero
    // outgoing weights went to removed units is found in the same round.
    for l in (0..=hidden).rev() {
        let above = l + 1;
        if above > hidden {
            continue;
        }
        let removed_above: Vec<usize> = plan.units[above].iter().map(|u| u.0).collect();
        let w = &net.layers()[above].weights;
        let zero_column = |k: usize| {
            (0..w.nrows())
                .filter(|j| removed_above.binary_search(j).is_err())
                .all(|j| w[[j, k]] == 0.0)
        };
        let taken: Vec<usize> = plan.units[l].iter().map(|u| u.0).collect();
        let mut extra: Vec<(usize, Reason)> = (0..net.layers()[l].units())
            .filter(|k| taken.binary_search(k).is_err() && zero_column(*k))
            .map(|k| (k, Reason::ZeroOutgoing))
            .collect();
        plan.units[l].append(&mut extra);
        plan.units[l].sort_by_key(|u| u.0);
        keep_one(&mut plan.units[l], net.layers()[l].units());
    }
    if net.input().layout == Layout::Vector {
        let removed0: Vec<usize> = plan.units[0].iter().map(|u| u.0).collect();
        let w = &net.layers()[0].weights;
        plan.inputs = (0..net.input().size)
            .filter(|&i| {
                (0..w.nrows())
                    .filter(|j| removed0.binary_search(j).is_err())
                    .all(|j| w[[j, i]] == 0.0)
            })
            .collect();
        if plan.inputs.len() == net.input().size {
            plan.inputs.remove(0);
        }
    }
    plan
}

/// Keeps the lowest-numbered unit when every one of `units` would be removed.
fn keep_one(list: &mut Vec<(usize, Reason)>, units: usize) {
    if units > 0 && list.len() == units {
        list.remove(0);
    }
}

/// The indices `0..n` not in the ascending list `gone`.
fn kept(n: usize, gone: &[usize]) -> Vec<usize> {
    (0..n).filter(|i| gone.binary_search(i).is_err()).collect()
}

/// Builds the smaller network `plan` describes, validated by [`Network::new`] (`origin`
/// names it in messages). Removing unit k of layer l drops row k of its weights and bias
/// and column k of layer l + 1; a `constant` unit adds `w_next[:, k] * value` to the next
/// layer's bias; an input feature drops its column of the first layer and its box ends
/// and name. Name, description and unknown top-level keys are kept.
///
/// Errors: a model error when the result does not validate (an empty layer; the planners
/// never produce one).
pub fn apply(net: &Network, plan: &Plan, origin: &str) -> Result<Network> {
    let n_layers = net.layers().len();
    if plan.units.len() != n_layers {
        return Err(Error::usage(format!(
            "a compaction plan for {} layers cannot apply to a network of {n_layers}",
            plan.units.len()
        )));
    }
    let keep_in = kept(net.input().size, &plan.inputs);
    let pick = |v: &[f32]| keep_in.iter().map(|&i| v[i]).collect::<Vec<f32>>();
    let pick_text = |v: &Option<Vec<String>>| {
        v.as_ref()
            .map(|n| keep_in.iter().map(|&i| n[i].clone()).collect())
    };
    let input = InputSpec {
        units: pick_text(&net.input().units),
        size: keep_in.len(),
        layout: net.input().layout,
        low: pick(&net.input().low),
        high: pick(&net.input().high),
        names: pick_text(&net.input().names),
    };
    let mut layers = Vec::with_capacity(n_layers);
    let mut cols = keep_in;
    for (l, layer) in net.layers().iter().enumerate() {
        let gone: Vec<usize> = plan.units[l].iter().map(|u| u.0).collect();
        let rows = kept(layer.units(), &gone);
        let weights = layer.weights.select(Axis(0), &rows).select(Axis(1), &cols);
        // Constants folded from the layer below: bias_j += sum_k w[j, k] * c_k, in f64.
        let mut bias64: Vec<f64> = rows.iter().map(|&j| f64::from(layer.bias[j])).collect();
        if l > 0 {
            for &(k, reason) in &plan.units[l - 1] {
                if let Reason::Constant { value } = reason {
                    for (b, &j) in bias64.iter_mut().zip(&rows) {
                        *b += f64::from(layer.weights[[j, k]]) * value;
                    }
                }
            }
        }
        layers.push(Layer {
            kind: crate::model::LayerKind::Dense,
            name: layer.name.clone(),
            activation: layer.activation,
            weights,
            bias: Array1::from_iter(bias64.into_iter().map(|b| b as f32)),
            labels: layer
                .labels
                .as_ref()
                .map(|n| rows.iter().map(|&j| n[j].clone()).collect()),
        });
        cols = rows;
    }
    let mut parts = net.to_parts();
    parts.input = input;
    parts.layers = layers;
    Network::from_parts(parts, origin)
}

/// Removes every unit and input feature that qualifies under the module's rules, round
/// after round until nothing more does, and returns the smaller network with a record of
/// what went. `origin` names the model in messages.
///
/// Errors: a usage error when `opts.never_active` does not match the network's hidden
/// layers; a model error when the result does not validate.
pub fn compact(net: &Network, opts: &CompactOptions, origin: &str) -> Result<Compaction> {
    require_dense(net, "compact")?;
    if let Some(na) = &opts.never_active {
        let hidden = net.layers().len() - 1;
        let ok = na.len() == hidden
            && na
                .iter()
                .zip(net.layers())
                .all(|(v, layer)| v.len() == layer.units());
        if !ok {
            return Err(Error::usage(
                "the probe activity given to compaction does not match the model's hidden layers",
            ));
        }
    }
    let mut current = net.clone();
    // Original index of every remaining unit, per layer, and of every remaining input.
    let mut unit_ids: Vec<Vec<usize>> = net
        .layers()
        .iter()
        .map(|l| (0..l.units()).collect())
        .collect();
    let mut input_ids: Vec<usize> = (0..net.input().size).collect();
    let mut never_active = opts.never_active.clone();
    let mut removed = Vec::new();
    // Each productive round removes at least one unit or input, so the loop ends.
    loop {
        let bounds = interval_bounds(&current);
        let p = plan(
            &current,
            &bounds,
            never_active.as_deref(),
            opts.fold_tolerance,
        );
        if p.is_empty() {
            break;
        }
        for &i in &p.inputs {
            removed.push(Removed {
                layer: None,
                index: input_ids[i],
                reason: Reason::ZeroOutgoing,
            });
        }
        for (l, list) in p.units.iter().enumerate() {
            for &(k, reason) in list {
                removed.push(Removed {
                    layer: Some(l),
                    index: unit_ids[l][k],
                    reason,
                });
            }
        }
        current = apply(&current, &p, origin)?;
        input_ids = keep_items(&input_ids, &p.inputs);
        for (l, list) in p.units.iter().enumerate() {
            let gone: Vec<usize> = list.iter().map(|u| u.0).collect();
            unit_ids[l] = keep_items(&unit_ids[l], &gone);
            if let Some(na) = never_active.as_mut()
                && let Some(v) = na.get_mut(l)
            {
                *v = keep_items(v, &gone);
            }
        }
    }
    let zero_inputs_kept = {
        let w = &current.layers()[0].weights;
        (0..current.input().size)
            .filter(|&i| w.column(i).iter().all(|&x| x == 0.0))
            .count()
    };
    Ok(Compaction {
        network: current,
        removed,
        kept_inputs: input_ids,
        zero_inputs_kept,
    })
}

/// The items of `v` whose positions are not in the ascending list `gone`.
fn keep_items<T: Clone>(v: &[T], gone: &[usize]) -> Vec<T> {
    v.iter()
        .enumerate()
        .filter(|(i, _)| gone.binary_search(i).is_err())
        .map(|(_, x)| x.clone())
        .collect()
}

/// How the outputs of a model and its smaller version compare on some data.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Comparison {
    /// Samples compared.
    pub samples: usize,
    /// Largest |original - smaller| over every output of every sample (f64 of f32
    /// outputs); NaN when some output is finite in one model and not in the other.
    pub max_abs_diff: f64,
    /// Row (from 0) where the largest difference occurred.
    pub worst_row: usize,
    /// Samples whose predicted class (argmax) differs.
    pub changed_predictions: usize,
    /// Samples outside the original input box (where removals proven on the box need not
    /// hold).
    pub outside_box: usize,
    /// Correct predictions of the original and of the smaller model, when labelled.
    pub correct: Option<(usize, usize)>,
}

/// Runs `original` and `smaller` on every sample of `probe` (shaped for `original`; the
/// smaller model sees the columns `kept_inputs`) and compares their outputs.
///
/// Errors: those of the probe; a probe error for a chunk of the wrong width, a label that
/// is not an output unit, or a probe with no samples.
pub fn compare(
    original: &Network,
    smaller: &Network,
    kept_inputs: &[usize],
    probe: &mut dyn ProbeSource,
) -> Result<Comparison> {
    compare_with_progress(original, smaller, kept_inputs, probe, &super::Silent)
}

/// [`compare`], reporting the fraction of the probe read to `progress` and stopping with
/// [`Error::Cancelled`] when it asks.
pub fn compare_with_progress(
    original: &Network,
    smaller: &Network,
    kept_inputs: &[usize],
    probe: &mut dyn ProbeSource,
    progress: &dyn Progress,
) -> Result<Comparison> {
    let describe = probe.describe();
    let total = probe.total_rows();
    let outputs = original.output_layer().units();
    let mut c = Comparison::default();
    let mut correct: Option<(usize, usize)> = probe.has_labels().then_some((0, 0));
    while let Some(chunk) = probe.next_chunk(DEFAULT_CHUNK_ROWS)? {
        if progress.cancelled() {
            return Err(Error::Cancelled);
        }
        chunk.check_width(original, &describe)?;
        let x = &chunk.inputs;
        c.outside_box += x
            .rows()
            .into_iter()
            .filter(|r| {
                r.iter()
                    .zip(original.input().low.iter().zip(&original.input().high))
                    .any(|(v, (lo, hi))| v < lo || v > hi)
            })
            .count();
        let a = forward(original, x.view());
        let xs: Array2<f32> = x.select(Axis(1), kept_inputs);
        let b = forward(smaller, xs.view());
        for (r, (ra, rb)) in a.rows().into_iter().zip(b.rows()).enumerate() {
            for (&va, &vb) in ra.iter().zip(rb.iter()) {
                let d = if va.is_finite() && vb.is_finite() {
                    (f64::from(va) - f64::from(vb)).abs()
                } else if va.to_bits() == vb.to_bits() || (va.is_nan() && vb.is_nan()) {
                    0.0
                } else {
                    f64::NAN
                };
                if d > c.max_abs_diff || (d.is_nan() && !c.max_abs_diff.is_nan()) {
                    c.max_abs_diff = d;
                    c.worst_row = chunk.first_row + r;
                }
            }
        }
        let pa = argmax_rows(a.view());
        let pb = argmax_rows(b.view());
        c.changed_predictions += pa.iter().zip(&pb).filter(|(p, q)| p != q).count();
        if let (Some((ca, cb)), Some(labels)) = (correct.as_mut(), chunk.labels.as_ref()) {
            if let Some((i, l)) = labels.iter().enumerate().find(|(_, l)| **l >= outputs) {
                return Err(Error::probe(
                    &describe,
                    format!(
                        "row {}: label {l} is not an output unit (the model has {outputs} outputs)",
                        chunk.first_row + i
                    ),
                ));
            }
            *ca += pa
                .iter()
                .zip(labels)
                .filter(|(p, l)| **p == Some(**l))
                .count();
            *cb += pb
                .iter()
                .zip(labels)
                .filter(|(p, l)| **p == Some(**l))
                .count();
        }
        c.samples += x.nrows();
        if let Some(t) = total.filter(|&t| t > 0) {
            progress.set(c.samples as f32 / t as f32);
        }
    }
    if c.samples == 0 {
        return Err(Error::probe(&describe, "the probe has no samples"));
    }
    c.correct = correct;
    Ok(c)
}

impl Comparison {
    /// Accuracy of the original and of the smaller model (`correct / samples`), when the
    /// data was labelled.
    pub fn accuracy(&self) -> Option<(f64, f64)> {
        let n = self.samples as f64;
        self.correct.map(|(a, b)| (a as f64 / n, b as f64 / n))
    }

    /// True when the largest difference is at most `tolerance` (false for NaN).
    pub fn within(&self, tolerance: f64) -> bool {
        self.max_abs_diff <= tolerance
    }
}

/// Per hidden layer, per unit: true for a `relu` unit that screening found never active on
/// its data (`dead_on_probe`, or `dead_proven`, which is never active either). `units` is a
/// screening report of `net`; units it does not list count as active. This is what
/// [`CompactRequest::dead_on_probe`] removes.
pub fn never_active(net: &Network, units: &[UnitScreen]) -> Vec<Vec<bool>> {
    let hidden = net.layers().len() - 1;
    let mut out: Vec<Vec<bool>> = net.layers()[..hidden]
        .iter()
        .map(|l| vec![false; l.units()])
        .collect();
    for u in units {
        let relu = net
            .layers()
            .get(u.layer_index)
            .is_some_and(|l| l.activation == Activation::Relu);
        if let Some(slot) = out.get_mut(u.layer_index).and_then(|v| v.get_mut(u.unit)) {
            *slot = relu && matches!(u.status, Status::DeadOnProbe | Status::DeadProven);
        }
    }
    out
}

/// What a front asks [`compact_checked`] to remove beyond the exact reasons.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct CompactRequest {
    /// Also remove `relu` units never active on the reference data (lossy outside it).
    pub dead_on_probe: bool,
    /// Fold units constant over the box within this tolerance (`None`: never fold).
    pub fold_tolerance: Option<f64>,
}

/// Which data an output check ran on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CheckData {
    /// The reference data (the probe, or uniform box samples without one).
    Reference,
    /// Uniform samples of the input box, checked besides a probe.
    Box,
}

/// A compaction with the comparison of its outputs against the original's.
#[derive(Debug, Clone)]
pub struct CheckedCompaction {
    /// The smaller network and what was removed.
    pub compaction: Compaction,
    /// Outputs compared on the reference data.
    pub reference: Comparison,
    /// Outputs compared on uniform box samples (when those were given besides a probe).
    pub on_box: Option<Comparison>,
    /// The request (lossy when `dead_on_probe`).
    pub request: CompactRequest,
}

impl CheckedCompaction {
    /// The check that forbids writing the smaller model, if any: the reference data must
    /// agree within `tolerance` always; the box samples too unless units never active on
    /// the reference data were removed (such removals are expected to change outputs
    /// elsewhere in the box).
    pub fn refusal(&self, tolerance: f64) -> Option<(CheckData, &Comparison)> {
        if !self.reference.within(tolerance) {
            return Some((CheckData::Reference, &self.reference));
        }
        match &self.on_box {
            Some(b) if !self.request.dead_on_probe && !b.within(tolerance) => {
                Some((CheckData::Box, b))
            }
            _ => None,
        }
    }
}

/// Compacts `net` and checks the result: with `request.dead_on_probe` the reference data
/// is screened first (default screening options) for units never active on it; then
/// [`compact`] runs, and the outputs of both models are compared on the reference data and
/// on `on_box` when given. `reference` opens the reference data afresh each time it is
/// called (it is read once or twice). `origin` names the smaller model in messages.
///
/// Errors: those of the probes, of screening and of [`compact`]; [`Error::Cancelled`] when
/// `progress` asks to stop.
pub fn compact_checked(
    net: &Network,
    request: &CompactRequest,
    reference: &mut dyn FnMut() -> Result<Box<dyn ProbeSource>>,
    on_box: Option<&mut dyn ProbeSource>,
    origin: &str,
    progress: &dyn Progress,
) -> Result<CheckedCompaction> {
    let never = if request.dead_on_probe {
        let mut source = reference()?;
        let report = screen(
            net,
            &mut *source,
            &ScreenOptions::default(),
            &SubProgress::new(progress, 0.0, 0.4),
        )?;
        Some(never_active(net, &report.units))
    } else {
        None
    };
    let opts = CompactOptions {
        fold_tolerance: request.fold_tolerance,
        never_active: never,
    };
    let compaction = compact(net, &opts, origin)?;
    if progress.cancelled() {
        return Err(Error::Cancelled);
    }
    let mut source = reference()?;
    let c = &compaction;
    let on_ref = compare_with_progress(
        net,
        &c.network,
        &c.kept_inputs,
        &mut *source,
        &SubProgress::new(progress, 0.4, 0.7),
    )?;
    let on_box = match on_box {
        Some(u) => Some(compare_with_progress(
            net,
            &c.network,
            &c.kept_inputs,
            u,
            &SubProgress::new(progress, 0.7, 1.0),
        )?),
        None => None,
    };
    progress.set(1.0);
    Ok(CheckedCompaction {
        compaction,
        reference: on_ref,
        on_box,
        request: *request,
    })
}

#[cfg(test)]
mod tests;
