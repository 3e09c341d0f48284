//! receptor's convolution, pooling and flatten layers compared with PyTorch.
//!
//! The fixtures in `tests/fixtures/conv/` were written by `scripts/make_conv_fixtures.py`
//! with PyTorch 2.15.0 (CPU), numpy 2.4.6 and Python 3.11.7 (see `VERSIONS.txt` there and
//! the `versions` key of each `*_expected.json`): every layer's pre-activations from
//! `torch.nn.functional.conv2d` / `max_pool2d` / `avg_pool2d` / `torch.flatten` / `linear`,
//! input gradients from `torch.autograd`, and the first layer's exact range over the box by
//! the closed form `b + W+ high + W- low` evaluated with `conv2d`. PyTorch computed in
//! float64 on the same float32 values, so what remains is receptor's float32 arithmetic.
//!
//! Checked here as well, without PyTorch: gradients against central finite differences, and
//! interval bounds never below any pre-activation sampled in the box.

use approx::assert_abs_diff_eq;
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use receptor::analysis::{bounds, forward, gradient};
use receptor::model::{self, LoadOptions, Network};
use serde_json::Value;
use std::path::{Path, PathBuf};

const MODELS: [&str; 3] = ["cnn_rgb", "cnn_grey_dilated", "cnn_flatten_first"];

fn dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/conv")
}

fn load(name: &str) -> (Network, Value) {
    let net = model::load(&dir().join(format!("{name}.json")), &LoadOptions::default())
        .unwrap_or_else(|e| panic!("{name}: model does not load: {e}"));
    let text = std::fs::read_to_string(dir().join(format!("{name}_expected.json")))
        .unwrap_or_else(|e| panic!("{name}: {e}"));
    (
        net,
        serde_json::from_str(&text).expect("expected values parse"),
    )
}

fn matrix(v: &Value) -> Array2<f32> {
    let rows = v.as_array().expect("a list of rows");
    let cols = rows[0].as_array().expect("a row").len();
    Array2::from_shape_fn((rows.len(), cols), |(r, c)| {
        rows[r][c].as_f64().expect("a number") as f32
    })
}

fn vector(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("a list")
        .iter()
        .map(|x| x.as_f64().expect("a number"))
        .collect()
}

#[test]
fn every_layer_matches_pytorch() {
    for name in MODELS {
        let (net, exp) = load(name);
        let x = matrix(&exp["inputs"]);
        let last = net.layers().len() - 1;
        let t = forward::forward_trace(&net, x.view(), last);
        for (l, layer) in net.layers().iter().enumerate() {
            let want = matrix(&exp["pre"][&layer.name]);
            assert_eq!(t.pre[l].dim(), want.dim(), "{name} '{}': shape", layer.name);
            for (g, w) in t.pre[l].iter().zip(want.iter()) {
                assert_abs_diff_eq!(*g, *w, epsilon = 1e-5 * (1.0 + w.abs()));
            }
        }
        let out = forward::forward(&net, x.view());
        let want = matrix(&exp["output"]);
        for (g, w) in out.iter().zip(want.iter()) {
            assert_abs_diff_eq!(*g, *w, epsilon = 1e-5);
        }
    }
}

#[test]
fn input_gradients_match_pytorch_autograd() {
    for name in MODELS {
        let (net, exp) = load(name);
        let x = matrix(&exp["inputs"]);
        for g in exp["grads"].as_array().expect("grads") {
            let layer = net
                .layer_index(g["layer"].as_str().expect("name"))
                .expect("layer exists");
            let index = g["index"].as_u64().expect("index") as usize;
            let s = g["sample"].as_u64().expect("sample") as usize;
            let row = x.slice(ndarray::s![s..s + 1, ..]);
            let (z, grad) = gradient::input_gradient(&net, layer, &[index], row);
            assert_abs_diff_eq!(f64::from(z[0]), g["z"].as_f64().expect("z"), epsilon = 1e-5);
            let want = vector(&g["grad"]);
            assert_eq!(grad.ncols(), want.len());
            for (a, b) in grad.iter().zip(&want) {
                assert_abs_diff_eq!(f64::from(*a), *b, epsilon = 1e-5 * (1.0 + b.abs()));
            }
        }
    }
}

#[test]
fn first_layer_bounds_are_the_exact_range() {
    for name in ["cnn_rgb", "cnn_grey_dilated"] {
        let (net, exp) = load(name);
        let b = bounds::interval_bounds(&net);
        let (lo, up) = (vector(&exp["first_lower"]), vector(&exp["first_upper"]));
        assert_eq!(b.upper[0].len(), up.len());
        for k in 0..up.len() {
            assert_abs_diff_eq!(b.upper[0][k], up[k], epsilon = 1e-9);
            assert_abs_diff_eq!(b.lower[0][k], lo[k], epsilon = 1e-9);
        }
    }
}

/// Soundness (Gowal et al. 2018): every pre-activation at random points and random
/// vertices of the box lies inside the bounds, on every layer (1e-5 covers the float32
/// rounding of the sampled forward pass).
#[test]
fn bounds_hold_on_sampled_inputs() {
    for name in MODELS {
        let (net, _) = load(name);
        let b = bounds::interval_bounds(&net);
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let n = net.input().size;
        let (low, high) = (&net.input().low, &net.input().high);
        let x = Array2::from_shape_fn((400, n), |(r, i)| {
            if r % 2 == 0 {
                rng.random_range(low[i]..=high[i])
            } else if rng.random_bool(0.5) {
                high[i]
            } else {
                low[i]
            }
        });
        let t = forward::forward_trace(&net, x.view(), net.layers().len() - 1);
        for l in 0..net.layers().len() {
            for row in t.pre[l].rows() {
                for (k, &z) in row.iter().enumerate() {
                    let z = f64::from(z);
                    assert!(
                        z <= b.upper[l][k] + 1e-5 && z >= b.lower[l][k] - 1e-5,
                        "{name} layer {l} value {k}: {z} outside [{}, {}]",
                        b.lower[l][k],
                        b.upper[l][k]
                    );
                }
            }
        }
    }
}

/// Central finite differences (common practice, no source), `(f(x + h) - f(x - h)) / 2h`
/// with f32 forward passes and h = 1e-2, on the smooth model (tanh, average pooling,
/// sigmoid) for every value of every layer with weights at two samples.
#[test]
fn gradients_match_central_finite_differences() {
    let (net, exp) = load("cnn_grey_dilated");
    let x = matrix(&exp["inputs"]);
    let h = 1e-2f64;
    for l in [0usize, 2, 4] {
        let width = net.output_shape(l).len();
        for s in [1usize, 4] {
            let row = x.slice(ndarray::s![s..s + 1, ..]).to_owned();
            for v in 0..width {
                let (_, g) = gradient::input_gradient(&net, l, &[v], row.view());
                for i in (0..row.ncols()).step_by(7) {
                    let at = |d: f64| {
                        let mut r = row.clone();
                        r[[0, i]] = (f64::from(r[[0, i]]) + d) as f32;
                        f64::from(forward::forward_trace(&net, r.view(), l).pre[l][[0, v]])
                    };
                    let fd = (at(h) - at(-h)) / (2.0 * h);
                    assert_abs_diff_eq!(f64::from(g[[0, i]]), fd, epsilon = 2e-3);
                }
            }
        }
    }
}

/// A conv network written with inline weights and with a safetensors side file reads back
/// to the same network, and a dense-only network is still written as version 1.
#[test]
fn conv_models_round_trip_through_the_writers() {
    let (net, _) = load("cnn_rgb");
    let text = model::to_json_string(&net);
    assert!(text.contains("\"receptor-model/2\""));
    let back = model::from_json_str(&text, "round trip", Path::new("."), &LoadOptions::default())
        .expect("written model reads back");
    assert_eq!(back, net);
    let tmp = tempfile::tempdir().expect("temp dir");
    let json = tmp.path().join("m.json");
    let side = tmp.path().join("m.safetensors");
    model::write_json_with_tensors(&net, &json, &side).expect("write with side file");
    let back = model::load(&json, &LoadOptions::default()).expect("reads back");
    assert_eq!(back, net);
    let (dense, _) = load("cnn_flatten_first");
    let mut parts = dense.into_parts();
    parts.layers.remove(0);
    parts.input.layout = model::Layout::Vector;
    let dense = Network::from_parts(parts, "dense").expect("dense-only network");
    assert!(model::to_json_string(&dense).contains("\"receptor-model/1\""));
}
