//! The preferred-input search against references made outside receptor.
//!
//! Fixtures in `tests/fixtures/prefer/`, written by `scripts/make_prefer_fixtures.py` with
//! Python 3.11.7, numpy 2.4.6, scikit-learn 1.9.1 and scipy 1.17.1 (see `VERSIONS.txt`):
//! scikit-learn `MLPClassifier` networks (two hidden layers, relu and tanh) trained on the
//! digits, iris and breast-cancer data shipped with scikit-learn, and per hidden unit the
//! best pre-activation that plain projected gradient ascent (numpy, float64) reaches from
//! 32 uniform random starts. `ledoit_wolf.json` holds scikit-learn's
//! `sklearn.covariance.ledoit_wolf` of each data set (O. Ledoit & M. Wolf 2004).

use receptor::analysis::Silent;
use receptor::analysis::forward::forward_trace;
use receptor::analysis::prefer::prior::ledoit_wolf;
use receptor::analysis::prefer::{PreferOptions, Reference, prefer, prefer_with};
use receptor::model::{self, LoadOptions, Network};
use receptor::probe::ProbeData;
use receptor::probe::memory::read_probe;
use serde_json::Value;
use std::path::{Path, PathBuf};

const MODELS: [&str; 6] = [
    "digits_relu",
    "digits_tanh",
    "iris_relu",
    "iris_tanh",
    "cancer_relu",
    "cancer_tanh",
];

fn dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/prefer")
}

fn json(name: &str) -> Value {
    let text = std::fs::read_to_string(dir().join(name)).expect("fixture is readable");
    serde_json::from_str(&text).expect("fixture is JSON")
}

fn load(name: &str) -> (Network, Value, ProbeData) {
    let net = model::load(&dir().join(format!("{name}.json")), &LoadOptions::default())
        .expect("fixture model loads");
    let expected = json(&format!("{name}_expected.json"));
    let probe_name = expected["probe"].as_str().expect("probe name");
    let probe = read_probe(&net, Some(&dir().join(probe_name))).expect("fixture probe reads");
    (net, expected, probe)
}

/// Per hidden layer: the reference's best z of each unit.
fn reference_best(net: &Network, expected: &Value) -> Vec<(usize, Vec<f64>)> {
    let mut out: Vec<(usize, Vec<f64>)> = Vec::new();
    for u in expected["units"].as_array().expect("units") {
        let layer = net
            .layer_index(u["layer"].as_str().expect("layer"))
            .expect("layer exists");
        let z = u["best_z"].as_f64().expect("best_z");
        match out.iter_mut().find(|(l, _)| *l == layer) {
            Some((_, v)) => v.push(z),
            None => out.push((layer, vec![z])),
        }
    }
    out
}

/// The smallest `z / best_z` over every hidden unit (for a negative reference, the check is
/// `z >= best_z - 0.01 |best_z|`, reported as `1 - (best_z - z) / |best_z|`).
fn worst_ratio(
    net: &Network,
    expected: &Value,
    opts: &PreferOptions,
    reference: Option<&Reference>,
) -> f64 {
    let mut worst = f64::INFINITY;
    for (layer, best) in reference_best(net, expected) {
        let units: Vec<usize> = (0..best.len()).collect();
        let found = prefer_with(net, layer, &units, opts, reference, &Silent).expect("search");
        for (p, b) in found.iter().zip(&best) {
            assert!(p.finite);
            let ratio = 1.0 - (b - f64::from(p.preactivation)) / b.abs().max(1e-6);
            worst = worst.min(ratio);
        }
    }
    worst
}

/// The bar: at the default settings (no data), every hidden unit of every
/// reference network reaches at least 99% of the best of 32 random restarts of plain
/// projected gradient ascent (numpy, `scripts/make_prefer_fixtures.py`).
#[test]
fn defaults_reach_99_percent_on_every_reference_network() {
    let mut short = Vec::new();
    for name in MODELS {
        let (net, expected, _) = load(name);
        let worst = worst_ratio(&net, &expected, &PreferOptions::default(), None);
        println!("{name}: worst z / reference = {worst:.5}");
        if worst < 0.99 {
            short.push(format!("{name} {worst:.4}"));
        }
    }
    assert!(short.is_empty(), "below 99% of the reference: {short:?}");
}

#[test]
fn data_starts_never_lose_to_the_best_sample() {
    // With reference data (prior weight 0: starts only) no result is below the best
    // reference sample of its unit (the samples are starts, and the best point of every
    // start is kept).
    for name in MODELS {
        let (net, expected, probe) = load(name);
        let reference = Reference::new(&net, &probe).expect("reference data");
        let opts = PreferOptions::default()
            .with_prior_weight(0.0)
            .expect("valid weight");
        let worst = worst_ratio(&net, &expected, &opts, Some(&reference));
        println!("{name} with data starts: worst z / reference = {worst:.5}");
        for layer in 0..net.layers().len() {
            let units: Vec<usize> = (0..net.layers()[layer].units()).collect();
            let found =
                prefer_with(&net, layer, &units, &opts, Some(&reference), &Silent).expect("ok");
            let t = forward_trace(&net, reference.candidates(), layer);
            for p in &found {
                let best_sample = t.pre[layer]
                    .column(p.unit)
                    .iter()
                    .fold(f32::NEG_INFINITY, |m, v| m.max(*v));
                assert!(
                    p.preactivation >= best_sample - 1e-5 * best_sample.abs().max(1.0),
                    "{name} layer {layer} unit {}: {} below sample {best_sample}",
                    p.unit,
                    p.preactivation
                );
            }
        }
    }
}

#[test]
fn ledoit_wolf_matches_scikit_learn() {
    let lw = json("ledoit_wolf.json");
    for (data, want) in lw["data"].as_object().expect("data sets") {
        let net = model::load(
            &dir().join(format!("{data}_relu.json")),
            &LoadOptions::default(),
        )
        .expect("model");
        let probe = read_probe(
            &net,
            Some(&dir().join(want["probe"].as_str().expect("probe"))),
        )
        .expect("probe");
        let got = ledoit_wolf(probe.inputs.view(), &probe.origin).expect("estimate");
        let shrinkage = want["shrinkage"].as_f64().expect("shrinkage");
        println!(
            "{data}: shrinkage {} (scikit-learn {shrinkage})",
            got.shrinkage
        );
        assert!((got.shrinkage - shrinkage).abs() < 1e-9, "{data} shrinkage");
        let cov = want["covariance"].as_array().expect("covariance");
        let scale = got.covariance.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        for (i, row) in cov.iter().enumerate() {
            for (j, v) in row.as_array().expect("row").iter().enumerate() {
                let w = v.as_f64().expect("number");
                assert!(
                    (got.covariance[[i, j]] - w).abs() <= 1e-9 * scale,
                    "{data} covariance[{i}, {j}]: {} vs {w}",
                    got.covariance[[i, j]]
                );
            }
        }
        for (m, w) in got.mean.iter().zip(want["mean"].as_array().expect("mean")) {
            assert!((m - w.as_f64().expect("number")).abs() < 1e-9);
        }
    }
}

#[test]
fn the_prior_keeps_class_units_near_the_digits() {
    // The data prior's purpose: the output units' preferred inputs lie nearer the data. The
    // distance to the nearest real digit (in box widths) falls with the prior, the raw z
    // stays the reported value, and the prior's own penalty is lower.
    let (net, _, probe) = load("digits_relu");
    let reference = Reference::new(&net, &probe).expect("reference");
    let out = net.layers().len() - 1;
    let units: Vec<usize> = (0..10).collect();
    let plain = prefer(&net, out, &units, &PreferOptions::default(), &Silent).expect("plain");
    let near = prefer_with(
        &net,
        out,
        &units,
        &PreferOptions::default(),
        Some(&reference),
        &Silent,
    )
    .expect("prior");
    let nearest = |x: &[f32]| -> f64 {
        probe
            .inputs
            .rows()
            .into_iter()
            .map(|r| {
                r.iter()
                    .zip(x)
                    .map(|(a, b)| f64::from(a - b).powi(2))
                    .sum::<f64>()
            })
            .fold(f64::INFINITY, f64::min)
            .sqrt()
    };
    let mean_dist = |v: &[receptor::analysis::prefer::Preferred]| {
        v.iter().map(|p| nearest(&p.input)).sum::<f64>() / v.len() as f64
    };
    let (dp, dn) = (mean_dist(&plain), mean_dist(&near));
    println!("mean distance to the nearest digit: plain {dp:.2}, prior {dn:.2}");
    assert!(dn < 0.6 * dp, "plain {dp}, prior {dn}");
    for (a, b) in plain.iter().zip(&near) {
        let pa = reference.prior().penalty(&a.input);
        let pb = reference.prior().penalty(&b.input);
        assert!(pb < pa, "unit {}: prior penalty {pb} vs plain {pa}", a.unit);
        // The reported value is the raw z at the input.
        let x = ndarray::Array2::from_shape_vec((1, 64), b.input.clone()).expect("shape");
        let t = forward_trace(&net, x.view(), out);
        let z = t.pre[out][[0, b.unit]];
        assert!((z - b.preactivation).abs() <= 1e-5 * z.abs().max(1.0));
    }
}
