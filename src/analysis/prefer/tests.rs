//! Unit tests of the search: closed forms, bounds, penalties, refusals, cancellation.

use super::search::for_each_neighbour_pair;
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
        units: None,
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
        let res = prefer(&net, layer, &units, &PreferOptions::default(), &Silent).expect("prefer");
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
    let input = InputSpec::vector_box(2, 0.5, 1.0);
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

#[test]
fn a_flat_start_is_moved_off_and_never_reported_worse() {
    // ReLU network with zero biases and the box centred on 0: at the centre every
    // first-layer pre-activation is 0, the left derivative of ReLU there is 0, so the
    // gradient of a second-layer unit is exactly zero (a flat start). A unit with a
    // positive weight on an active first-layer unit can reach z > 0 (e.g. x = +-e_i along
    // that unit's weights), so a search stuck at the centre (z = 0) would be wrong.
    let input = InputSpec::vector_box(3, -1.0, 1.0);
    let h1 = Layer {
        kind: crate::model::LayerKind::Dense,
        name: "h1".into(),
        activation: Activation::Relu,
        weights: array![[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, -1.0]],
        bias: array![0.0, 0.0, 0.0],
        labels: None,
    };
    let h2 = Layer {
        kind: crate::model::LayerKind::Dense,
        name: "h2".into(),
        activation: Activation::Relu,
        weights: array![[1.0, 1.0, 1.0], [-1.0, 2.0, 0.0]],
        bias: array![0.0, 0.0],
        labels: None,
    };
    let net = Network::new("test", "t", input, vec![h1, h2]).expect("valid");
    let one = PreferOptions::new(200, 1, 0, 0.0, 0.0).expect("valid");
    let res = prefer(&net, 1, &[0, 1], &one, &Silent).expect("prefer");
    // Closed forms: unit 0 is relu(x0) + relu(x1) + relu(-x2) <= 3 at (1, 1, -1); unit 1
    // is -relu(x0) + 2 relu(x1) <= 2 at (x0 <= 0, 1, any).
    assert!(res[0].steps > 0 && res[1].steps > 0);
    assert_abs_diff_eq!(res[0].preactivation, 3.0, epsilon = 1e-3);
    assert_abs_diff_eq!(res[1].preactivation, 2.0, epsilon = 1e-3);
    // The result is the best point seen: never below the start's z (0 here).
    for r in &res {
        assert!(r.preactivation >= 0.0);
    }
}

#[test]
fn facets_differ_and_report_their_spread() {
    let net = random_net(
        21,
        &[16, 12, 4],
        &[Activation::Tanh, Activation::Identity],
        Layout::Vector,
    );
    let opts = PreferOptions::default().with_facets(3).expect("valid");
    let res = prefer(&net, 1, &[0, 2], &opts, &Silent).expect("prefer");
    assert_eq!(res.len(), 6);
    for (i, r) in res.iter().enumerate() {
        assert_eq!(r.unit, [0, 2][i / 3]);
        assert_eq!(r.facet, i % 3);
    }
    for u in 0..2 {
        let f = &res[3 * u..3 * u + 3];
        // The spread is the mean of the three pairwise distances.
        let d = |a: usize, b: usize| {
            facet_distance(
                &f[a].input,
                &f[b].input,
                &net.input().low,
                &net.input().high,
            )
        };
        let mean = (d(0, 1) + d(0, 2) + d(1, 2)) / 3.0;
        assert_abs_diff_eq!(f[0].spread, mean, epsilon = 1e-6);
        assert!(mean > 0.05, "facets of unit {} coincide: {mean}", f[0].unit);
    }
    // Facet 0 has no repulsion and the same starts as a one-facet search: the same answer.
    let single = prefer(&net, 1, &[0, 2], &PreferOptions::default(), &Silent).expect("prefer");
    assert_eq!(res[0].input, single[0].input);
    assert_eq!(res[3].input, single[1].input);
    assert!(PreferOptions::default().with_facets(0).is_err());
    assert!(PreferOptions::default().with_prior_weight(-1.0).is_err());
    // Distance in box widths: opposite corners are 1 apart.
    assert_abs_diff_eq!(
        facet_distance(&[0.0, 0.0], &[2.0, 4.0], &[0.0, 0.0], &[2.0, 4.0]),
        1.0
    );
}

#[test]
fn exploration_budget_scales_with_the_work_of_a_start() {
    // Work of one step on layer 1 of a 256-64-16 network, counted by hand: 256 inputs plus
    // 256 x 64 weights plus 64 outputs, twice (forward and backward), plus the target's 64
    // incoming weights: 2 (256 + 16384 + 64) + 64 = 33472 multiply-adds.
    let small = random_net(
        3,
        &[256, 64, 16],
        &[Activation::Tanh, Activation::Tanh],
        Layout::Vector,
    );
    assert_eq!(step_work(&small, 1), 33472.0);
    // 2.5e9 / (33472 x 1000 steps) = 74.7: 74 starts.
    assert_eq!(exploration_starts(&small, 1), 74);
    // None on the first layer (linear objective: the main search finds its maximum).
    assert_eq!(exploration_starts(&small, 0), 0);
    // A tiny network is capped; a wide one gets none (over the budget).
    let tiny = random_net(
        4,
        &[4, 8, 3],
        &[Activation::Tanh, Activation::Tanh],
        Layout::Vector,
    );
    assert_eq!(exploration_starts(&tiny, 1), EXPLORE_MAX_STARTS);
    let wide = random_net(
        5,
        &[784, 512, 8],
        &[Activation::Relu, Activation::Relu],
        Layout::Vector,
    );
    // 2 (784 + 784 x 512 + 512) + 512 = 805 408 per step: 2.5e9 / 8.05e8 = 3.1 < 16.
    assert_eq!(exploration_starts(&wide, 1), 0);
}

#[test]
fn exploration_does_not_depend_on_the_other_units_of_the_call() {
    // Each unit's exploration starts come from its own generator stream, so asking for a
    // unit alone or with others explores the same points. Here the main search is made the
    // same too (one restart: the box centre), so the results agree exactly.
    let net = random_net(
        6,
        &[6, 10, 5],
        &[Activation::Tanh, Activation::Tanh],
        Layout::Vector,
    );
    assert!(exploration_starts(&net, 1) > 0);
    let opts = PreferOptions::new(50, 1, 7, 0.0, 0.0).expect("valid");
    let all = prefer(&net, 1, &[0, 1, 2, 3, 4], &opts, &Silent).expect("all");
    let one = prefer(&net, 1, &[3], &opts, &Silent).expect("one");
    assert_eq!(all[3].input, one[0].input);
    // The exploration ran: its starts run longer than the main search's 50 steps.
    assert!(all.iter().any(|p| p.steps > 50));
}
