//! Structured (unit) pruning compared with an independent numpy implementation.
//!
//! The fixture in `tests/fixtures/structured/` was written by
//! `scripts/make_structured_fixtures.py` with Python 3.11.7, numpy 2.4.6, scikit-learn 1.9.1
//! and scipy 1.17.1 (see `VERSIONS.txt` there and the `versions` key of the expected file):
//! a scikit-learn `MLPClassifier` (32, 16) relu trained on the optical digits set shipped
//! with scikit-learn, its held-out 30% as the labelled probe, and, computed with plain
//! numpy, the unit scores (L1 norm of incoming weights, H. Li et al., ICLR 2017; mean
//! |activation| on the probe), the ranking (ascending score, ties to the lower index) and
//! the accuracy after physically removing the lowest-ranked `floor(f n + 1e-9)` units at
//! f = 0, 0.1, ..., 0.9, from every hidden layer at once and one layer at a time.
//!
//! numpy computes in float64 and receptor in float32, so the fixture records per point how
//! many samples have their two largest probabilities within 1e-5 ("near ties", where the
//! two could disagree); the number of correct predictions must agree to within that count
//! (it is 0 for every point of this fixture, so the curves must agree exactly).

use receptor::analysis::Silent;
use receptor::analysis::structured::{self, removal_order};
use receptor::model::{self, LoadOptions, Network};
use receptor::probe;
use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::Command;

fn dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/structured")
}

fn load() -> (Network, Value) {
    let net = model::load(&dir().join("digits_relu.json"), &LoadOptions::default())
        .expect("fixture model loads");
    let text = std::fs::read_to_string(dir().join("digits_relu_expected.json"))
        .expect("expected values are readable");
    (
        net,
        serde_json::from_str(&text).expect("expected values are JSON"),
    )
}

fn open_probe(net: &Network) -> Box<dyn probe::ProbeSource> {
    probe::open(&dir().join("digits_relu_probe.csv"), net).expect("fixture probe opens")
}

fn f64s(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_f64().expect("a number"))
        .collect()
}

fn usizes(v: &Value) -> Vec<usize> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_u64().expect("an index") as usize)
        .collect()
}

fn scores(net: &Network, criterion: &str) -> Vec<Vec<f64>> {
    match criterion {
        "l1" => structured::l1_scores(net),
        _ => structured::mean_abs_activation(net, open_probe(net).as_mut(), &Silent)
            .expect("activation scores"),
    }
}

#[test]
fn scores_and_rankings_match_numpy() {
    let (net, exp) = load();
    for criterion in ["l1", "activation"] {
        let ours = scores(&net, criterion);
        let theirs = exp["scores"][criterion].as_array().expect("scores");
        assert_eq!(ours.len(), theirs.len());
        for (l, (o, t)) in ours.iter().zip(theirs).enumerate() {
            let t = f64s(t);
            assert_eq!(o.len(), t.len());
            for (k, (a, b)) in o.iter().zip(&t).enumerate() {
                // float32 activations summed in f64 vs numpy's float64 activations.
                assert!(
                    (a - b).abs() <= 1e-5 * b.abs().max(1.0),
                    "{criterion} layer {l} unit {k}: receptor {a} vs numpy {b}"
                );
            }
            let rank = usizes(&exp["rankings"][criterion][l]);
            assert_eq!(removal_order(o), rank, "{criterion} layer {l}");
        }
    }
}

#[test]
fn accuracy_curves_match_numpy() {
    let (net, exp) = load();
    let fractions = f64s(&exp["fractions"]);
    let curves = exp["curves"].as_array().expect("curves");
    for criterion in ["l1", "activation"] {
        let s = scores(&net, criterion);
        for per_layer in [false, true] {
            let pts = structured::unit_sweep(
                &net,
                &s,
                &fractions,
                per_layer,
                open_probe(&net).as_mut(),
                &Silent,
            )
            .expect("sweep");
            let want: Vec<&Value> = curves
                .iter()
                .filter(|c| c["criterion"] == criterion && (c["layer"] == "all") != per_layer)
                .collect();
            assert_eq!(pts.len(), want.len(), "{criterion} per_layer {per_layer}");
            for (p, w) in pts.iter().zip(want) {
                let layer = p
                    .layer
                    .map_or("all".to_string(), |l| net.layers()[l].name.clone());
                let what = format!("{criterion} {layer} {}", p.fraction);
                assert_eq!(w["layer"], layer.as_str(), "{what}");
                assert_eq!(Some(p.fraction), w["fraction"].as_f64(), "{what}");
                assert_eq!(Some(p.removed as u64), w["removed"].as_u64(), "{what}");
                assert_eq!(Some(p.units as u64), w["units"].as_u64(), "{what}");
                assert_eq!(
                    Some(p.parameters as u64),
                    w["parameters"].as_u64(),
                    "{what}"
                );
                assert_eq!(Some(p.samples as u64), w["samples"].as_u64(), "{what}");
                let theirs = w["correct"].as_u64().expect("correct") as i64;
                let slack = w["near_ties"].as_u64().expect("near_ties") as i64;
                assert!(
                    (p.correct as i64 - theirs).abs() <= slack,
                    "{what}: receptor {} correct, numpy {theirs} (near ties {slack})",
                    p.correct
                );
            }
        }
    }
}

#[test]
fn command_line_curve_matches_numpy() {
    // The same comparison through the real binary: `prune-sweep --by unit --per-layer
    // --criterion activation`, CSV on standard output.
    let (_net, exp) = load();
    let out = Command::new(env!("CARGO_BIN_EXE_receptor"))
        .args([
            "prune-sweep",
            "digits_relu.json",
            "--probe",
            "digits_relu_probe.csv",
            "--by",
            "unit",
            "--criterion",
            "activation",
            "--per-layer",
        ])
        .current_dir(dir())
        .output()
        .expect("receptor runs");
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let mut lines = stdout.lines();
    assert_eq!(
        lines.next(),
        Some("criterion,layer,fraction,removed,units,parameters,accuracy")
    );
    let want: Vec<&Value> = exp["curves"]
        .as_array()
        .expect("curves")
        .iter()
        .filter(|c| c["criterion"] == "activation" && c["layer"] != "all")
        .collect();
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    assert_eq!(rows.len(), want.len());
    for (r, w) in rows.iter().zip(want) {
        assert_eq!(r[1], w["layer"].as_str().expect("layer"));
        assert_eq!(r[3].parse::<u64>().ok(), w["removed"].as_u64());
        let acc: f64 = r[6].parse().expect("accuracy");
        let correct = w["correct"].as_f64().expect("correct");
        let samples = w["samples"].as_f64().expect("samples");
        assert_eq!(acc, correct / samples, "{r:?}");
    }
}
