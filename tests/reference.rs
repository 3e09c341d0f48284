//! receptor's forward pass, statistics, interval bounds and screening compared with numbers
//! produced by independent reference code: scikit-learn's `MLPClassifier.predict_proba` /
//! `predict` and numpy implementations of the published definitions.
//!
//! The fixtures in `tests/fixtures/reference/` were written by
//! `scripts/make_reference_fixtures.py` with Python 3.11.7, numpy 2.4.6, scikit-learn 1.9.1
//! and scipy 1.17.1 (see `VERSIONS.txt` there and the `versions` key of each
//! `*_expected.json`). Data: iris and breast cancer as shipped with scikit-learn.
//!
//! The stored weights and inputs are float32 values and sklearn predicted with exactly those
//! values (rounded before predicting), so the remaining differences are float32 arithmetic
//! (receptor's forward pass) versus float64 (sklearn, numpy).

use approx::assert_abs_diff_eq;
use ndarray::Array2;
use receptor::analysis::{bounds, forward, screen, sparsity};
use receptor::model::{self, LoadOptions, Network};
use receptor::probe;
use serde_json::Value;
use std::path::{Path, PathBuf};

/// The models written by the generator script.
const MODELS: [&str; 3] = ["iris_relu", "iris_logistic", "cancer_tanh"];

/// Probabilities: the tolerance for float32 forward vs sklearn's float64 (the generator's
/// own numpy forward pass matches sklearn to 1e-12).
const PROBA_TOL: f64 = 1e-5;

fn fixture_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/reference")
}

struct Fixture {
    net: Network,
    inputs: Array2<f32>,
    labels: Option<Vec<usize>>,
    expected: Value,
}

fn load_fixture(name: &'static str) -> Fixture {
    let dir = fixture_dir();
    let net = model::load(&dir.join(format!("{name}.json")), &LoadOptions::default())
        .unwrap_or_else(|e| panic!("{name}: model does not load: {e}"));
    let mut src = probe::open(&dir.join(format!("{name}_probe.csv")), &net)
        .unwrap_or_else(|e| panic!("{name}: probe does not open: {e}"));
    let data = probe::read_all(src.as_mut()).unwrap_or_else(|e| panic!("{name}: probe: {e}"));
    let text = std::fs::read_to_string(dir.join(format!("{name}_expected.json")))
        .unwrap_or_else(|e| panic!("{name}: expected values: {e}"));
    let expected: Value =
        serde_json::from_str(&text).unwrap_or_else(|e| panic!("{name}: expected values: {e}"));
    Fixture {
        net,
        inputs: data.inputs,
        labels: data.labels,
        expected,
    }
}

fn f(v: &Value) -> f64 {
    v.as_f64()
        .unwrap_or_else(|| panic!("fixture value {v} is not a number"))
}

fn u(v: &Value) -> usize {
    v.as_u64()
        .unwrap_or_else(|| panic!("fixture value {v} is not an index")) as usize
}

fn arr<'a>(v: &'a Value, key: &str) -> &'a Vec<Value> {
    v[key]
        .as_array()
        .unwrap_or_else(|| panic!("fixture key '{key}' is not an array"))
}

/// Float32 forward pass vs float64 reference: an absolute tolerance that grows with the
/// magnitude of the value (the summands of a pre-activation are as large as the value or
/// larger; 1e-5 relative is ~100 float32 ulps).
fn scaled_tol(expected: f64) -> f64 {
    1e-5 * expected.abs().max(1.0)
}

#[test]
fn fixtures_have_the_documented_shape() {
    for name in MODELS {
        let fx = load_fixture(name);
        let n = u(&fx.expected["samples"]);
        assert_eq!(fx.inputs.nrows(), n, "{name}: probe rows");
        assert_eq!(
            fx.inputs.ncols(),
            fx.net.input().size,
            "{name}: probe width"
        );
        assert_eq!(arr(&fx.expected, "predict_proba").len(), n, "{name}");
        // The probe's `label` column holds class names; the importer maps them to the output
        // units in the order of the model's labels, which is sklearn's `classes_` order.
        let target: Vec<usize> = arr(&fx.expected, "target").iter().map(u).collect();
        assert_eq!(fx.labels.as_ref(), Some(&target), "{name}: probe labels");
    }
}

/// scikit-learn 1.9.1 `MLPClassifier.predict_proba` on the same float32 weights and inputs.
#[test]
fn forward_matches_sklearn_predict_proba() {
    for name in MODELS {
        let fx = load_fixture(name);
        let out = forward::forward(&fx.net, fx.inputs.view());
        let proba = arr(&fx.expected, "predict_proba");
        assert_eq!(out.nrows(), proba.len(), "{name}");
        for (r, row) in proba.iter().enumerate() {
            let row = row.as_array().expect("proba row");
            assert_eq!(out.ncols(), row.len(), "{name}: outputs");
            for (k, p) in row.iter().enumerate() {
                let ours = f64::from(out[[r, k]]);
                assert!(
                    (ours - f(p)).abs() <= PROBA_TOL,
                    "{name}: sample {r}, class {k}: receptor {ours} vs sklearn {}",
                    f(p)
                );
            }
        }
    }
}

/// scikit-learn 1.9.1 `MLPClassifier.predict` (argmax of predict_proba, as class index into
/// `classes_`) agrees with the argmax of receptor's output on every sample.
#[test]
fn argmax_matches_sklearn_predict() {
    for name in MODELS {
        let fx = load_fixture(name);
        let out = forward::forward(&fx.net, fx.inputs.view());
        let predict: Vec<usize> = arr(&fx.expected, "predict").iter().map(u).collect();
        for (r, row) in out.rows().into_iter().enumerate() {
            let mut best = 0;
            for k in 1..row.len() {
                if row[k] > row[best] {
                    best = k;
                }
            }
            assert_eq!(best, predict[r], "{name}: sample {r}: {row}");
        }
    }
}

/// Hidden pre-activations and activations of a few samples: numpy 2.4.6 float64
/// `a @ W.T + b` layer by layer (identical to sklearn's forward pass, checked by the
/// generator to 1e-12 on the output).
#[test]
fn trace_matches_numpy() {
    for name in MODELS {
        let fx = load_fixture(name);
        let trace = &fx.expected["trace"];
        let rows: Vec<usize> = arr(trace, "rows").iter().map(u).collect();
        let last = fx.net.layers().len() - 1;
        let ours = forward::forward_trace(&fx.net, fx.inputs.view(), last);
        assert_eq!(
            ours.pre.len(),
            fx.net.layers().len(),
            "{name}: traced layers"
        );
        assert_eq!(
            ours.post.len(),
            fx.net.layers().len(),
            "{name}: traced layers"
        );
        for (key, got) in [("pre", &ours.pre), ("post", &ours.post)] {
            for (l, layer) in arr(trace, key).iter().enumerate() {
                for (i, sample) in layer.as_array().expect("trace layer").iter().enumerate() {
                    for (k, v) in sample.as_array().expect("trace row").iter().enumerate() {
                        let e = f(v);
                        let o = f64::from(got[l][[rows[i], k]]);
                        assert!(
                            (o - e).abs() <= scaled_tol(e),
                            "{name}: {key} layer {l}, sample {}, unit {k}: receptor {o} vs numpy {e}",
                            rows[i]
                        );
                    }
                }
            }
        }
    }
}

/// Per-unit statistics computed by the generator in numpy 2.4.6 (float64) from the published
/// definitions: L1, L2, max |w|; near_zero_frac with tol 0.01 x the layer's max |w| (the
/// `stats` contract); Hoyer (2004) sparseness; Gini index per Hurley & Rickard (2009).
#[test]
fn statistics_match_numpy() {
    for name in MODELS {
        let fx = load_fixture(name);
        let (units, layers) = sparsity::all_stats(&fx.net, None);
        let expected = arr(&fx.expected, "stats");
        assert_eq!(units.len(), expected.len(), "{name}: stats rows");
        for (s, e) in units.iter().zip(expected) {
            let at = format!("{name}: layer {} unit {}", s.layer, s.unit);
            assert_eq!(s.layer, e["layer"].as_str().unwrap_or_default(), "{at}");
            assert_eq!(s.layer_index, u(&e["layer_index"]), "{at}");
            assert_eq!(s.unit, u(&e["unit"]), "{at}");
            assert_eq!(s.fan_in, u(&e["fan_in"]), "{at}");
            // Sums of a few dozen float32 values accumulated in f64 on both sides.
            assert_abs_diff_eq!(s.l1, f(&e["l1"]), epsilon = 1e-9 * f(&e["l1"]).max(1.0));
            assert_abs_diff_eq!(s.l2, f(&e["l2"]), epsilon = 1e-9 * f(&e["l2"]).max(1.0));
            assert_abs_diff_eq!(s.max_abs, f(&e["max_abs"]), epsilon = 1e-12);
            assert_abs_diff_eq!(s.near_zero_frac, f(&e["near_zero_frac"]), epsilon = 1e-12);
            assert_abs_diff_eq!(s.hoyer, f(&e["hoyer"]), epsilon = 1e-9);
            assert_abs_diff_eq!(s.gini, f(&e["gini"]), epsilon = 1e-9);
            assert_abs_diff_eq!(f64::from(s.bias), f(&e["bias"]), epsilon = 1e-12);
        }
        let summaries = arr(&fx.expected, "layer_summaries");
        assert_eq!(layers.len(), summaries.len(), "{name}: summaries");
        for (s, e) in layers.iter().zip(summaries) {
            assert_eq!(s.layer, e["layer"].as_str().unwrap_or_default(), "{name}");
            assert_eq!(s.units, u(&e["units"]), "{name}: {}", s.layer);
            assert_eq!(s.fan_in, u(&e["fan_in"]), "{name}: {}", s.layer);
            assert_abs_diff_eq!(s.zero_tol, f(&e["zero_tol"]), epsilon = 1e-12);
            assert_abs_diff_eq!(s.max_abs, f(&e["max_abs"]), epsilon = 1e-12);
            assert_abs_diff_eq!(s.mean_hoyer, f(&e["mean_hoyer"]), epsilon = 1e-9);
            assert_abs_diff_eq!(s.mean_gini, f(&e["mean_gini"]), epsilon = 1e-9);
            assert_abs_diff_eq!(s.near_zero_frac, f(&e["near_zero_frac"]), epsilon = 1e-12);
        }
    }
}

/// Interval bounds vs plain interval bound propagation in numpy 2.4.6 (float64; Gowal et al.
/// 2018, "On the effectiveness of interval bound propagation...", eqs. 5-6). The first layer
/// must equal the exact box extremes b + sum(max(w*low, w*high)) (and min); deeper layers
/// must be at least as tight as plain IBP (the contract welcomes a tighter sound method) and
/// must contain every pre-activation of the probe data, which lies inside the box.
#[test]
fn bounds_match_numpy_interval_propagation() {
    for name in MODELS {
        let fx = load_fixture(name);
        let b = bounds::interval_bounds(&fx.net);
        let lower = arr(&fx.expected["bounds"], "lower");
        let upper = arr(&fx.expected["bounds"], "upper");
        assert_eq!(b.lower.len(), fx.net.layers().len(), "{name}");
        assert_eq!(b.upper.len(), fx.net.layers().len(), "{name}");
        let last = fx.net.layers().len() - 1;
        let trace = forward::forward_trace(&fx.net, fx.inputs.view(), last);
        for l in 0..fx.net.layers().len() {
            let lo = lower[l].as_array().expect("lower");
            let hi = upper[l].as_array().expect("upper");
            assert_eq!(b.lower[l].len(), lo.len(), "{name}: layer {l}");
            for k in 0..lo.len() {
                let (el, eh) = (f(&lo[k]), f(&hi[k]));
                let (ol, oh) = (b.lower[l][k], b.upper[l][k]);
                let at = format!(
                    "{name}: layer {l} unit {k}: receptor [{ol}, {oh}] vs IBP [{el}, {eh}]"
                );
                // Both sides add a few dozen products of f32 values in f64.
                let tol = 1e-9 * (el.abs() + eh.abs()).max(1.0);
                if l == 0 {
                    assert_abs_diff_eq!(oh, eh, epsilon = tol);
                    assert_abs_diff_eq!(ol, el, epsilon = tol);
                } else {
                    assert!(
                        oh <= eh + tol && ol >= el - tol,
                        "not as tight as IBP: {at}"
                    );
                }
                assert!(ol <= oh, "empty interval: {at}");
                // Soundness on the data (the float32 forward pass may round by scaled_tol).
                for r in 0..fx.inputs.nrows() {
                    let z = f64::from(trace.pre[l][[r, k]]);
                    let slack = scaled_tol(z);
                    assert!(
                        z <= oh + slack && z >= ol - slack,
                        "{at}: probe sample {r} has z = {z}"
                    );
                }
            }
        }
    }
}

/// `screen` on the probe: active_frac, mean and max of each hidden unit computed in numpy
/// 2.4.6 from the `screen` contract (rectifiers: z > 0; sigmoid/tanh: |z| below the
/// normative saturation thresholds 4.3565 / 2.1783), and the status by the contract's
/// rules with plain IBP upper bounds. A unit the numpy side calls `dead_on_probe` may be
/// `dead_proven` in receptor when receptor's bounds are tighter than plain IBP.
#[test]
fn screen_matches_numpy() {
    for name in MODELS {
        let fx = load_fixture(name);
        let mut src = probe::open(&fixture_dir().join(format!("{name}_probe.csv")), &fx.net)
            .unwrap_or_else(|e| panic!("{name}: {e}"));
        let report = screen::screen(
            &fx.net,
            src.as_mut(),
            &screen::ScreenOptions::default(),
            &receptor::analysis::Silent,
        )
        .unwrap_or_else(|e| panic!("{name}: screen: {e}"));
        let expected = arr(&fx.expected, "screen");
        assert_eq!(report.samples, u(&fx.expected["samples"]), "{name}");
        assert_eq!(report.units.len(), expected.len(), "{name}: screened units");
        for (s, e) in report.units.iter().zip(expected) {
            let at = format!("{name}: layer {} unit {}", s.layer, s.unit);
            assert_eq!(s.layer, e["layer"].as_str().unwrap_or_default(), "{at}");
            assert_eq!(s.unit, u(&e["unit"]), "{at}");
            assert_eq!(
                s.activation,
                e["activation"].as_str().unwrap_or_default(),
                "{at}"
            );
            // Fractions of 150 or 569 samples; a sample whose z lies within float32 rounding
            // of the threshold could flip, so allow one sample's worth.
            let n = report.samples as f64;
            assert_abs_diff_eq!(
                s.active_frac,
                f(&e["active_frac"]),
                epsilon = 1.0 / n + 1e-12
            );
            let (em, ex) = (f(&e["mean"]), f(&e["max"]));
            assert!(
                (s.mean - em).abs() <= scaled_tol(em),
                "{at}: mean {} vs {em}",
                s.mean
            );
            assert!(
                (s.max - ex).abs() <= scaled_tol(ex),
                "{at}: max {} vs {ex}",
                s.max
            );
            let ibp = f(&e["ibp_upper_bound"]);
            let tol = 1e-9 * ibp.abs().max(1.0);
            if s.layer_index == 0 {
                assert_abs_diff_eq!(s.upper_bound, ibp, epsilon = tol);
            } else {
                assert!(
                    s.upper_bound <= ibp + tol,
                    "{at}: {} above IBP {ibp}",
                    s.upper_bound
                );
            }
            let want = e["status"].as_str().unwrap_or_default();
            let got = s.status.as_str();
            let tighter_proof = want == "dead_on_probe" && got == "dead_proven";
            assert!(
                got == want || tighter_proof,
                "{at}: status {got}, numpy says {want}"
            );
        }
    }
}
