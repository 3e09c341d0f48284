//! Constructed networks with known answers for compaction. Every expected removal is worked
//! out by hand in the comments from the closed-form range of a linear function over a box
//! (max of `b + w·x` is `b + sum_i max(w_i lo_i, w_i hi_i)`).

use super::*;
use crate::analysis::Silent;
use crate::analysis::screen::tests::MemProbe;
use crate::analysis::screen::{ScreenOptions, Status, screen};
use crate::model::{InputSpec, Layer, Layout};
use approx::assert_abs_diff_eq;
use ndarray::{Array2, array};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn input(n: usize) -> InputSpec {
    InputSpec {
        units: None,
        size: n,
        layout: Layout::Vector,
        low: vec![0.0; n],
        high: vec![1.0; n],
        names: Some((0..n).map(|i| format!("f{i}")).collect()),
    }
}

fn layer(name: &str, act: Activation, w: Array2<f32>, b: Array1<f32>) -> Layer {
    Layer {
        kind: crate::model::LayerKind::Dense,
        name: name.into(),
        activation: act,
        weights: w,
        bias: b,
        labels: None,
    }
}

/// Uniform samples of the box of `net`, seeded.
fn box_samples(net: &Network, n: usize, seed: u64) -> Array2<f32> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    Array2::from_shape_fn((n, net.input().size), |(_, i)| {
        rng.random_range(net.input().low[i]..=net.input().high[i])
    })
}

/// Largest |difference| of the outputs of `a` on `x` and of `b` on the kept columns.
fn max_diff(a: &Network, b: &Network, kept: &[usize], x: &Array2<f32>) -> f64 {
    let ya = forward(a, x.view());
    let yb = forward(b, x.select(Axis(1), kept).view());
    ya.iter()
        .zip(yb.iter())
        .map(|(p, q)| (f64::from(*p) - f64::from(*q)).abs())
        .fold(0.0, f64::max)
}

/// Box [0, 1]^3, hidden relu layer of 4 units, softmax output of 2:
///   u0: z = x0 + x1          (upper 2: kept)
///   u1: z = -x0 - 1          (upper -1 <= 0: dead_proven)
///   u2: z = x1 - 0.5         (upper 0.5: kept)
///   u3: z = 2 x0 - x1 + 0.1  (upper 2.1: kept)
/// Input x2 has weight 0 in every unit: removed (zero_outgoing).
fn planted() -> Network {
    let h = layer(
        "h",
        Activation::Relu,
        array![
            [1.0, 1.0, 0.0],
            [-1.0, 0.0, 0.0],
            [0.0, 1.0, 0.0],
            [2.0, -1.0, 0.0]
        ],
        array![0.0, -1.0, -0.5, 0.1],
    );
    let mut o = layer(
        "out",
        Activation::Softmax,
        array![[1.0, 5.0, -1.0, 0.5], [-1.0, 7.0, 2.0, 0.25]],
        array![0.0, 0.1],
    );
    o.labels = Some(vec!["no".into(), "yes".into()]);
    Network::new("test", "planted", input(3), vec![h, o]).expect("valid")
}

#[test]
fn planted_dead_unit_and_zero_input_column() {
    let net = planted();
    let c = compact(&net, &CompactOptions::default(), "t").unwrap();
    let s = &c.network;
    assert_eq!(
        c.removed,
        vec![
            Removed {
                layer: None,
                index: 2,
                reason: Reason::ZeroOutgoing
            },
            Removed {
                layer: Some(0),
                index: 1,
                reason: Reason::DeadProven
            },
        ]
    );
    assert_eq!(c.kept_inputs, vec![0, 1]);
    assert_eq!(s.input().size, 2);
    assert_eq!(s.input().names, Some(vec!["f0".into(), "f1".into()]));
    assert_eq!(s.input().low, vec![0.0, 0.0]);
    assert_eq!(
        s.layers()[0].weights,
        array![[1.0, 1.0], [0.0, 1.0], [2.0, -1.0]]
    );
    assert_eq!(s.layers()[0].bias, array![0.0, -0.5, 0.1]);
    // Column 1 of the output layer (the dead unit's outgoing weights) is gone.
    assert_eq!(
        s.layers()[1].weights,
        array![[1.0, -1.0, 0.5], [-1.0, 2.0, 0.25]]
    );
    assert_eq!(s.layers()[1].bias, array![0.0, 0.1]);
    assert_eq!(s.layers()[1].labels, net.layers()[1].labels);
    assert_eq!(c.counts(Some(0)), vec![("dead_proven", 1)]);
    assert_eq!(c.counts(None), vec![("zero_outgoing", 1)]);
    // Same outputs on the box (a dead relu outputs exactly 0 there).
    let x = box_samples(&net, 2000, 1);
    assert!(max_diff(&net, s, &c.kept_inputs, &x) <= 1e-6);
    let cmp = compare(
        &net,
        s,
        &c.kept_inputs,
        &mut MemProbe::new(x, Some(vec![0; 2000])),
    )
    .unwrap();
    assert_eq!(cmp.samples, 2000);
    assert!(cmp.max_abs_diff <= 1e-6);
    assert_eq!(cmp.changed_predictions, 0);
    assert_eq!(cmp.outside_box, 0);
    let (before, after) = cmp.correct.unwrap();
    assert_eq!(before, after);
    // Nothing left to remove: compacting again is the identity.
    let again = compact(s, &CompactOptions::default(), "t").unwrap();
    assert!(again.removed.is_empty());
    assert_eq!(&again.network, s);
}

#[test]
fn zero_outgoing_cascades_down_to_the_inputs() {
    // Box [0, 1]^2. h1 (relu, 2 units): a = relu(x0), b = relu(x1).
    // h2 (relu, 2 units): c = relu(a + 0.5), d = relu(b - 3) (upper 1 - 3 = -2: dead_proven).
    // out (identity): y = c.
    // d dead -> b's only non-zero outgoing weight went to d -> b is zero_outgoing ->
    // x1's only non-zero weight went to b -> x1 is zero_outgoing. Found in one round.
    let h1 = layer(
        "h1",
        Activation::Relu,
        array![[1.0, 0.0], [0.0, 1.0]],
        array![0.0, 0.0],
    );
    let h2 = layer(
        "h2",
        Activation::Relu,
        array![[1.0, 0.0], [0.0, 1.0]],
        array![0.5, -3.0],
    );
    let o = layer("out", Activation::Identity, array![[1.0, 1.0]], array![0.0]);
    let net = Network::new("test", "c", input(2), vec![h1, h2, o]).unwrap();
    let c = compact(&net, &CompactOptions::default(), "t").unwrap();
    let mut got: Vec<(Option<usize>, usize, &str)> = c
        .removed
        .iter()
        .map(|r| (r.layer, r.index, r.reason.as_str()))
        .collect();
    got.sort_by_key(|g| (g.0.map_or(-1, |l| l as i64), g.1));
    assert_eq!(
        got,
        vec![
            (None, 1, "zero_outgoing"),
            (Some(0), 1, "zero_outgoing"),
            (Some(1), 1, "dead_proven")
        ]
    );
    assert_eq!(c.network.parameter_count(), 2 + 2 + 2);
    let x = box_samples(&net, 500, 2);
    assert_eq!(max_diff(&net, &c.network, &c.kept_inputs, &x), 0.0);
}

#[test]
fn leaky_sigmoid_and_tanh_units_are_never_removed_as_dead() {
    // Every unit's pre-activation is z = -x0 - 10 <= -10 on the box, but the outputs are
    // alpha z, sigmoid(z) > 0 and tanh(z) ~ -1: not zero, so nothing is dead.
    for act in [
        Activation::LeakyRelu { alpha: 0.1 },
        Activation::Sigmoid,
        Activation::Tanh,
        Activation::Identity,
    ] {
        let h = layer(
            "h",
            act,
            array![[-1.0, 0.0], [1.0, 1.0]],
            array![-10.0, 0.0],
        );
        let o = layer("out", Activation::Identity, array![[1.0, 1.0]], array![0.0]);
        let net = Network::new("test", "n", input(2), vec![h, o]).unwrap();
        let c = compact(&net, &CompactOptions::default(), "t").unwrap();
        assert!(c.removed.is_empty(), "{act:?}: {:?}", c.removed);
    }
}

#[test]
fn tanh_bounded_to_a_constant_is_folded_only_when_asked() {
    // Box [0, 1]^2. h (tanh): u0 = tanh(0.5 x0 + 20) in [tanh(20), tanh(20.5)]; in f64
    // 1 - tanh(20) = 2 exp(-40) ~ 8.5e-18, so the interval is narrower than 1e-6 and its
    // midpoint is 1 to within 1e-17. u1 = tanh(x1) varies over [0, tanh(1)].
    // out (identity): y0 = 3 u0 + u1 + 0.25, y1 = -2 u0.
    // Folding u0 = 1: bias becomes (0.25 + 3, 0 - 2) = (3.25, -2).
    let h = layer(
        "h",
        Activation::Tanh,
        array![[0.5, 0.0], [0.0, 1.0]],
        array![20.0, 0.0],
    );
    let o = layer(
        "out",
        Activation::Identity,
        array![[3.0, 1.0], [-2.0, 0.0]],
        array![0.25, 0.0],
    );
    let net = Network::new("test", "tanh", input(2), vec![h, o]).unwrap();
    let plain = compact(&net, &CompactOptions::default(), "t").unwrap();
    assert!(plain.removed.is_empty());
    let opts = CompactOptions {
        fold_tolerance: Some(DEFAULT_FOLD_TOLERANCE),
        never_active: None,
    };
    let c = compact(&net, &opts, "t").unwrap();
    // The folded unit, and x0, which fed only that unit.
    assert_eq!(c.removed.len(), 2);
    assert_eq!(c.removed[0].layer, None);
    assert_eq!(c.removed[0].index, 0);
    assert_eq!(c.removed[1].layer, Some(0));
    assert_eq!(c.removed[1].index, 0);
    let Reason::Constant { value } = c.removed[1].reason else {
        panic!("{:?}", c.removed[1].reason)
    };
    assert_abs_diff_eq!(value, 1.0, epsilon = 1e-15);
    let s = &c.network;
    // Only u1 = tanh(x1) is left, reading the one input left, x1.
    assert_eq!(s.layers()[0].weights, array![[1.0]]);
    assert_eq!(s.layers()[1].weights, array![[1.0], [0.0]]);
    assert_eq!(s.layers()[1].bias, array![3.25, -2.0]);
    assert_eq!(c.kept_inputs, vec![1]);
    let x = box_samples(&net, 1000, 3);
    assert!(max_diff(&net, s, &c.kept_inputs, &x) <= 1e-6);
    // u1 spans [0, tanh(1)] = [0, 0.76]: not constant, kept.
    assert_eq!(c.counts(Some(0)), vec![("constant", 1)]);
}

#[test]
fn dead_relu_is_dead_proven_even_when_folding() {
    // u0 = relu(-x0 - 1): dead_proven (value 0, no bias change), not "constant".
    let h = layer(
        "h",
        Activation::Relu,
        array![[-1.0, 0.0], [0.0, 1.0]],
        array![-1.0, 0.0],
    );
    let o = layer("out", Activation::Identity, array![[4.0, 1.0]], array![0.5]);
    let net = Network::new("test", "n", input(2), vec![h, o]).unwrap();
    let opts = CompactOptions {
        fold_tolerance: Some(1e-6),
        never_active: None,
    };
    let c = compact(&net, &opts, "t").unwrap();
    assert_eq!(c.removed[1].reason, Reason::DeadProven);
    assert_eq!(c.network.layers()[1].bias, array![0.5]);
}

#[test]
fn dead_on_probe_needs_the_option_and_screening_finds_it() {
    // Box [0, 1]^2. u0 = relu(x0 - 0.5): upper 0.5, not provably dead, but never active on
    // a probe whose x0 <= 0.4. u1 = relu(x1): active. out = u0 + u1 (identity).
    let h = layer(
        "h",
        Activation::Relu,
        array![[1.0, 0.0], [0.0, 1.0]],
        array![-0.5, 0.0],
    );
    let o = layer("out", Activation::Identity, array![[1.0, 1.0]], array![0.0]);
    let net = Network::new("test", "n", input(2), vec![h, o]).unwrap();
    let probe = Array2::from_shape_fn((25, 2), |(r, c)| {
        if c == 0 {
            (r / 5) as f32 / 10.0
        } else {
            (r % 5) as f32 / 4.0
        }
    });
    let report = screen(
        &net,
        &mut MemProbe::new(probe.clone(), None),
        &ScreenOptions::default(),
        &Silent,
    )
    .unwrap();
    assert_eq!(report.units[0].status, Status::DeadOnProbe);
    let never: Vec<Vec<bool>> = vec![
        report
            .units
            .iter()
            .map(|u| matches!(u.status, Status::DeadOnProbe | Status::DeadProven))
            .collect(),
    ];
    assert!(
        compact(&net, &CompactOptions::default(), "t")
            .unwrap()
            .removed
            .is_empty()
    );
    let opts = CompactOptions {
        fold_tolerance: None,
        never_active: Some(never),
    };
    let c = compact(&net, &opts, "t").unwrap();
    assert_eq!(c.counts(Some(0)), vec![("dead_on_probe", 1)]);
    // x0 fed only u0: gone with it.
    assert_eq!(c.kept_inputs, vec![1]);
    // Exact on the probe; at x0 = 1 (in the box, off the probe) the output drops by 0.5.
    assert_eq!(max_diff(&net, &c.network, &c.kept_inputs, &probe), 0.0);
    let corner = array![[1.0f32, 0.0]];
    assert_abs_diff_eq!(
        max_diff(&net, &c.network, &c.kept_inputs, &corner),
        0.5,
        epsilon = 1e-7
    );
    // A wrongly shaped activity list is refused.
    let bad = CompactOptions {
        fold_tolerance: None,
        never_active: Some(vec![vec![true]]),
    };
    assert!(compact(&net, &bad, "t").is_err());
}

#[test]
fn output_units_stay_and_every_layer_keeps_a_unit() {
    // Every hidden unit is dead and the output unit 1 has only zero weights: the output
    // layer keeps both units and the hidden layer keeps its first unit.
    let h = layer(
        "h",
        Activation::Relu,
        array![[-1.0, 0.0], [0.0, -1.0]],
        array![-1.0, -1.0],
    );
    let o = layer(
        "out",
        Activation::Identity,
        array![[1.0, 1.0], [0.0, 0.0]],
        array![0.0, 2.0],
    );
    let net = Network::new("test", "n", input(2), vec![h, o]).unwrap();
    let c = compact(&net, &CompactOptions::default(), "t").unwrap();
    assert_eq!(c.network.layers()[1].units(), 2);
    assert_eq!(c.network.layers()[0].units(), 1);
    assert!(c.network.input().size >= 1);
    let x = box_samples(&net, 100, 4);
    assert_eq!(max_diff(&net, &c.network, &c.kept_inputs, &x), 0.0);
}

#[test]
fn image_inputs_are_kept_and_counted() {
    // A 2 x 2 grey image whose pixel 3 has no non-zero outgoing weight.
    let mut inp = input(4);
    inp.layout = Layout::Image {
        height: 2,
        width: 2,
        channels: 1,
    };
    let h = layer(
        "h",
        Activation::Relu,
        array![[1.0, 1.0, 1.0, 0.0]],
        array![0.0],
    );
    let o = layer("out", Activation::Identity, array![[1.0]], array![0.0]);
    let net = Network::new("test", "img", inp, vec![h, o]).unwrap();
    let c = compact(&net, &CompactOptions::default(), "t").unwrap();
    assert!(c.removed.is_empty());
    assert_eq!(c.zero_inputs_kept, 1);
    assert_eq!(c.network.input().layout, net.input().layout);
}

#[test]
fn screen_finds_no_proven_dead_unit_after_compaction() {
    // Random relu nets with strongly negative biases, so that many units are provably dead;
    // after compaction `screen` (the same bounds) reports none, and outputs agree on the box.
    for seed in 0..5 {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut layers = crate::analysis::test_nets::random_layers(
            &mut rng,
            &[6, 12, 10, 3],
            &[Activation::Relu, Activation::Relu, Activation::Softmax],
            0.5,
        );
        for b in layers[0].bias.iter_mut().step_by(3) {
            *b = -10.0;
        }
        for b in layers[1].bias.iter_mut().step_by(2) {
            *b = -8.0;
        }
        let inp = InputSpec {
            units: None,
            names: None,
            ..input(6)
        };
        let net = Network::new("test", "r", inp, layers).unwrap();
        let c = compact(&net, &CompactOptions::default(), "t").unwrap();
        assert!(
            c.removed.iter().any(|r| r.reason == Reason::DeadProven),
            "seed {seed}"
        );
        let r = screen(
            &c.network,
            crate::probe::uniform(&c.network, 200, 0).as_mut(),
            &ScreenOptions::default(),
            &Silent,
        )
        .unwrap();
        assert!(
            r.units.iter().all(|u| u.status != Status::DeadProven),
            "seed {seed}"
        );
        let x = box_samples(&net, 1000, seed);
        assert!(
            max_diff(&net, &c.network, &c.kept_inputs, &x) <= 1e-6,
            "seed {seed}"
        );
    }
}

#[test]
fn compare_counts_rows_outside_the_box() {
    let net = planted();
    let c = compact(&net, &CompactOptions::default(), "t").unwrap();
    // Row 1 has x0 = -5 < 0: outside the box.
    let x = array![[0.5f32, 0.5, 0.5], [-5.0, 0.0, 0.0]];
    let cmp = compare(
        &net,
        &c.network,
        &c.kept_inputs,
        &mut MemProbe::new(x, None),
    )
    .unwrap();
    assert_eq!(cmp.outside_box, 1);
    assert_eq!(cmp.samples, 2);
    // There the dead unit u1 = relu(5 - 1) = 4 is active: the original's logits are
    // (20, 28.1), the compacted model's (0, 0.1); softmax (3.0e-4, 0.9997) vs
    // (0.475, 0.525).
    assert_abs_diff_eq!(cmp.max_abs_diff, 0.4747, epsilon = 1e-3);
    assert_eq!(cmp.worst_row, 1);
    assert!(cmp.correct.is_none());
}

/// The net of `dead_on_probe_needs_the_option_and_screening_finds_it` with its probe
/// (x0 <= 0.4, so u0 = relu(x0 - 0.5) is never active on it) and labels 0.
fn off_probe_net() -> (Network, Array2<f32>) {
    let h = layer(
        "h",
        Activation::Relu,
        array![[1.0, 0.0], [0.0, 1.0]],
        array![-0.5, 0.0],
    );
    let o = layer("out", Activation::Identity, array![[1.0, 1.0]], array![0.0]);
    let net = Network::new("test", "n", input(2), vec![h, o]).unwrap();
    let probe = Array2::from_shape_fn((25, 2), |(r, c)| {
        if c == 0 {
            (r / 5) as f32 / 10.0
        } else {
            (r % 5) as f32 / 4.0
        }
    });
    (net, probe)
}

#[test]
fn checked_compaction_refuses_by_the_one_rule_both_fronts_use() {
    let (net, probe) = off_probe_net();
    let labels = Some(vec![0; probe.nrows()]);
    let open = || -> Result<Box<dyn ProbeSource>> {
        Ok(Box::new(MemProbe::new(probe.clone(), labels.clone())))
    };
    // The box corner x = (1, 0) is where u0 is active: out = 0.5 there, 0 after removal.
    let corner = array![[1.0f32, 0.0]];
    let lossy = CompactRequest {
        dead_on_probe: true,
        fold_tolerance: None,
    };
    let checked = compact_checked(
        &net,
        &lossy,
        &mut || open(),
        Some(&mut MemProbe::new(corner.clone(), None)),
        "t",
        &Silent,
    )
    .unwrap();
    // never_active from screening: u0 is dead on the probe, u1 is not.
    assert_eq!(
        checked.compaction.counts(Some(0)),
        vec![("dead_on_probe", 1)]
    );
    assert_eq!(checked.reference.samples, 25);
    assert_eq!(checked.reference.max_abs_diff, 0.0);
    // One output unit: every prediction is class 0, so accuracy is 1 before and after.
    assert_eq!(checked.reference.accuracy(), Some((1.0, 1.0)));
    let on_box = checked.on_box.as_ref().unwrap();
    assert_abs_diff_eq!(on_box.max_abs_diff, 0.5, epsilon = 1e-7);
    // Lossy removals may change outputs off the reference data: not refused.
    assert_eq!(checked.refusal(DEFAULT_CHECK_TOLERANCE), None);
    // The same difference on the box refuses an exact request ...
    let mut exact = checked.clone();
    exact.request.dead_on_probe = false;
    assert_eq!(
        exact.refusal(DEFAULT_CHECK_TOLERANCE).map(|r| r.0),
        Some(CheckData::Box)
    );
    // ... and a difference on the reference data refuses any request.
    let mut bad = checked.clone();
    bad.reference.max_abs_diff = 2e-5;
    assert_eq!(
        bad.refusal(DEFAULT_CHECK_TOLERANCE).map(|r| r.0),
        Some(CheckData::Reference)
    );
    bad.reference.max_abs_diff = f64::NAN;
    assert!(
        bad.refusal(DEFAULT_CHECK_TOLERANCE).is_some(),
        "NaN refuses"
    );

    // Exact request: nothing qualifies, the check still runs.
    let plain = compact_checked(
        &net,
        &CompactRequest::default(),
        &mut || open(),
        None,
        "t",
        &Silent,
    )
    .unwrap();
    assert!(plain.compaction.removed.is_empty());
    assert!(plain.on_box.is_none());
    assert_eq!(plain.refusal(DEFAULT_CHECK_TOLERANCE), None);
}

#[test]
fn never_active_takes_relu_units_screening_found_dead() {
    let (net, probe) = off_probe_net();
    let report = screen(
        &net,
        &mut MemProbe::new(probe, None),
        &ScreenOptions::default(),
        &Silent,
    )
    .unwrap();
    assert_eq!(never_active(&net, &report.units), vec![vec![true, false]]);
    // A tanh unit is never taken, whatever its status.
    let mut parts = net.to_parts();
    parts.layers[0].activation = Activation::Tanh;
    let t = Network::from_parts(parts, "t").unwrap();
    let mut units = report.units.clone();
    units[0].status = Status::DeadOnProbe;
    assert_eq!(never_active(&t, &units), vec![vec![false, false]]);
}

#[test]
fn layer_summaries_list_every_removal_with_original_numbers() {
    let net = planted();
    let c = compact(&net, &CompactOptions::default(), "t").unwrap();
    let s = c.layer_summaries(&net);
    assert_eq!(s.len(), 3, "the input and two layers");
    assert_eq!(
        (s[0].name.as_str(), s[0].before, s[0].after),
        ("input", 3, 2)
    );
    assert_eq!(s[0].removed, vec![(2, Reason::ZeroOutgoing)]);
    assert_eq!(s[0].activation, None);
    assert_eq!((s[1].name.as_str(), s[1].before, s[1].after), ("h", 4, 3));
    assert_eq!(s[1].removed, vec![(1, Reason::DeadProven)]);
    assert_eq!(s[1].counts, vec![("dead_proven", 1)]);
    assert_eq!(s[2].removed_count(), 0);
    assert_eq!(s[2].activation, Some(Activation::Softmax));
}
