//! `receptor compact` on the over-driven demo model: it removes exactly the units that are
//! proven dead (sound interval upper bound <= 0 over the box, the definition `screen` uses),
//! the smaller model's outputs equal the original's on the labelled probe and on uniform
//! samples of the box (max |difference| <= 1e-5), and `screen` of the smaller model finds no
//! proven-dead rectifier unit.
//!
//! Why the outputs must agree: a relu unit whose pre-activation is <= 0 everywhere in the
//! box outputs exactly 0 there, so its outgoing weights multiply 0 (closed form, no
//! tolerance needed beyond float32 summation order).

use ndarray::{Array2, Axis};
use receptor::analysis::Silent;
use receptor::analysis::bounds::interval_bounds;
use receptor::analysis::compact::{CompactOptions, Reason, compact};
use receptor::analysis::forward::forward;
use receptor::analysis::screen::{ScreenOptions, Status, screen};
use receptor::model::{self, Activation, LoadOptions, Network};
use receptor::probe;
use std::path::{Path, PathBuf};
use std::process::Command;

fn demo(file: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("demo-models")
        .join(file)
}

fn overdriven() -> Network {
    model::load(
        &demo("solder-joints-overdriven.json"),
        &LoadOptions::default(),
    )
    .expect("the demo loads")
}

fn max_diff(a: &Network, b: &Network, kept: &[usize], x: &Array2<f32>) -> f64 {
    let ya = forward(a, x.view());
    let yb = forward(b, x.select(Axis(1), kept).view());
    ya.iter()
        .zip(yb.iter())
        .map(|(p, q)| (f64::from(*p) - f64::from(*q)).abs())
        .fold(0.0, f64::max)
}

fn probe_inputs(net: &Network) -> Array2<f32> {
    let mut src = probe::open(&demo("solder-joints-probe.csv"), net).expect("probe opens");
    probe::read_all(src.as_mut()).expect("probe reads").inputs
}

fn box_inputs(net: &Network, n: usize, seed: u64) -> Array2<f32> {
    let mut src = probe::uniform(net, n, seed);
    probe::read_all(src.as_mut())
        .expect("uniform samples")
        .inputs
}

#[test]
fn compacting_the_overdriven_demo_removes_exactly_the_proven_dead_units() {
    let net = overdriven();
    let bounds = interval_bounds(&net);
    let hidden = net.layers().len() - 1;
    let mut proven: Vec<(usize, usize)> = Vec::new();
    for l in 0..hidden {
        assert_eq!(net.layers()[l].activation, Activation::Relu);
        for k in 0..net.layers()[l].units() {
            if bounds.upper[l][k] <= 0.0 {
                proven.push((l, k));
            }
        }
    }
    assert!(!proven.is_empty(), "the demo has proven-dead units");
    let c = compact(&net, &CompactOptions::default(), "small.json").expect("compacts");
    let mut removed: Vec<(usize, usize)> = c
        .removed
        .iter()
        .map(|r| {
            assert_eq!(r.reason, Reason::DeadProven, "{r:?}");
            (r.layer.expect("a unit, not an input"), r.index)
        })
        .collect();
    removed.sort_unstable();
    assert_eq!(removed, proven);
    assert_eq!(c.network.input().size, net.input().size);
    for l in 0..hidden {
        let gone = proven.iter().filter(|p| p.0 == l).count();
        assert_eq!(
            c.network.layers()[l].units(),
            net.layers()[l].units() - gone
        );
    }

    let x = probe_inputs(&net);
    let d = max_diff(&net, &c.network, &c.kept_inputs, &x);
    assert!(d <= 1e-5, "labelled probe: {d}");
    let u = box_inputs(&net, 4096, 7);
    let d = max_diff(&net, &c.network, &c.kept_inputs, &u);
    assert!(d <= 1e-5, "uniform box samples: {d}");

    let mut src = probe::uniform(&c.network, 4096, 0);
    let r = screen(&c.network, src.as_mut(), &ScreenOptions::default(), &Silent).expect("screen");
    assert!(r.units.iter().all(|u| u.status != Status::DeadProven));
}

#[test]
fn compact_command_writes_a_smaller_model_with_a_side_file() {
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("small.json");
    let tensors = d.path().join("small.safetensors");
    let r = Command::new(env!("CARGO_BIN_EXE_receptor"))
        .arg("compact")
        .arg(demo("solder-joints-overdriven.json"))
        .arg("--out")
        .arg(&out)
        .arg("--tensors")
        .arg(&tensors)
        .arg("--probe")
        .arg(demo("solder-joints-probe.csv"))
        .output()
        .expect("receptor runs");
    let stderr = String::from_utf8_lossy(&r.stderr);
    assert!(r.status.success(), "{stderr}");
    let net = overdriven();
    let small = model::load(&out, &LoadOptions::default()).expect("the output loads");
    // The summary names every layer and what was removed from it.
    for l in net.layers() {
        assert!(stderr.contains(&format!("layer '{}'", l.name)), "{stderr}");
    }
    assert!(stderr.contains("dead_proven"), "{stderr}");
    assert!(stderr.contains("largest |difference|"), "{stderr}");
    assert!(small.parameter_count() < net.parameter_count());
    let c = compact(&net, &CompactOptions::default(), "x").unwrap();
    assert_eq!(small, c.network);
    let x = probe_inputs(&net);
    assert!(max_diff(&net, &small, &c.kept_inputs, &x) <= 1e-5);
    // Exactly two files were written, no temporary left behind.
    assert_eq!(std::fs::read_dir(d.path()).unwrap().count(), 2);
    assert_valid_in_schema(&out);
    // Inline tensors: also valid, and the same network.
    let inline = d.path().join("inline.json");
    let r = Command::new(env!("CARGO_BIN_EXE_receptor"))
        .arg("compact")
        .arg(demo("solder-joints-overdriven.json"))
        .arg("--out")
        .arg(&inline)
        .output()
        .expect("receptor runs");
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    assert_valid_in_schema(&inline);
    let again = model::load(&inline, &LoadOptions::default()).expect("loads");
    assert_eq!(again, small);
}

/// The written file validates against `assets/model-schema.json` (JSON Schema draft
/// 2020-12, checked with the `jsonschema` crate).
fn assert_valid_in_schema(file: &Path) {
    let schema: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(
            Path::new(env!("CARGO_MANIFEST_DIR")).join("assets/model-schema.json"),
        )
        .expect("schema readable"),
    )
    .expect("schema is JSON");
    let v = jsonschema::draft202012::new(&schema).expect("schema compiles");
    let inst: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(file).expect("readable")).expect("JSON");
    let errors: Vec<String> = v
        .iter_errors(&inst)
        .map(|e| e.to_string())
        .take(3)
        .collect();
    assert!(errors.is_empty(), "{}: {errors:?}", file.display());
}
