//! receptor's forward pass on ONNX files compared with onnxruntime (CPU).
//!
//! The models in `tests/fixtures/onnx/` were built with the `onnx` Python package (and one
//! exported from PyTorch by `tools/receptor_export.py`'s `export_onnx`), and their outputs
//! on the probe rows computed by onnxruntime's CPU execution provider, all by
//! `scripts/make_onnx_fixtures.py` (versions in `tests/fixtures/onnx/VERSIONS.txt`). Every
//! supported operator appears at least once: Gemm (transB, alpha, beta, C of several
//! shapes), MatMul + Add, Relu, LeakyRelu, Sigmoid, Tanh, Softmax, Flatten, Reshape (from a
//! Constant node), Identity, Dropout, BatchNormalization (folded); float32, float16 and
//! float64 initializers in raw_data and in the typed fields; external data; an image input
//! (channel-first in ONNX, channel-last in receptor's probe rows); labels and box from
//! metadata_props.
//!
//! Each model is checked as read directly and after `receptor convert` (inline tensors and
//! a safetensors side file): outputs within 1e-4 of onnxruntime's.

use ndarray::Array2;
use receptor::analysis::forward::forward;
use receptor::model::{self, BoxSource, Layout, LoadOptions, Network};
use receptor::probe;
use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::Command;

/// The tolerance for receptor (float32) against onnxruntime.
const TOL: f64 = 1e-4;

const CASES: [&str; 8] = [
    "gemm_chain",
    "matmul_add",
    "batchnorm_f16",
    "double_weights",
    "external_data",
    "image_flatten",
    "grey_reshape",
    "torch_mlp",
];

fn dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/onnx")
}

fn expected(name: &str) -> Value {
    let text = std::fs::read_to_string(dir().join(format!("{name}_expected.json")))
        .unwrap_or_else(|e| panic!("{name}: expected values: {e}"));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{name}: expected values: {e}"))
}

fn probe_rows(name: &str, net: &Network) -> Array2<f32> {
    let mut src = probe::open(&dir().join(format!("{name}_probe.csv")), net)
        .unwrap_or_else(|e| panic!("{name}: probe: {e}"));
    probe::read_all(src.as_mut())
        .unwrap_or_else(|e| panic!("{name}: probe: {e}"))
        .inputs
}

/// Largest |receptor - onnxruntime| over every output of every probe row.
fn worst_difference(name: &str, net: &Network) -> f64 {
    let x = probe_rows(name, net);
    let out = forward(net, x.view());
    let want = expected(name);
    let rows = want["outputs"].as_array().expect("outputs");
    assert_eq!(rows.len(), out.nrows(), "{name}: rows");
    let mut worst = 0.0f64;
    for (r, row) in rows.iter().enumerate() {
        let row = row.as_array().expect("a row");
        assert_eq!(row.len(), out.ncols(), "{name}: outputs per row");
        for (k, v) in row.iter().enumerate() {
            let d = (f64::from(out[[r, k]]) - v.as_f64().expect("a number")).abs();
            worst = worst.max(d);
        }
    }
    worst
}

fn layout_text(l: Layout) -> String {
    match l {
        Layout::Vector => "vector".into(),
        Layout::Image {
            height,
            width,
            channels,
        } => format!("image {height}x{width}x{channels}"),
    }
}

#[test]
fn onnx_models_match_onnxruntime() {
    for name in CASES {
        let path = dir().join(format!("{name}.onnx"));
        let (net, origin) = model::load_with_origin(&path, &LoadOptions::default())
            .unwrap_or_else(|e| panic!("{name}: does not load: {e}"));
        let want = expected(name);
        let names: Vec<&str> = net.layers().iter().map(|l| l.name.as_str()).collect();
        let want_names: Vec<&str> = want["layers"]
            .as_array()
            .expect("layers")
            .iter()
            .map(|v| v.as_str().expect("a name"))
            .collect();
        assert_eq!(names, want_names, "{name}: layer names");
        assert_eq!(
            layout_text(net.input().layout),
            want["layout"].as_str().expect("layout"),
            "{name}: layout"
        );
        if let Some(labels) = want["labels"].as_array() {
            let got = net.output_layer().labels.clone().expect("labels");
            let labels: Vec<String> = labels.iter().map(|v| v.as_str().unwrap().into()).collect();
            assert_eq!(got, labels, "{name}: labels from metadata_props");
            assert_eq!(origin.low, BoxSource::Metadata, "{name}: box from metadata");
        }
        let worst = worst_difference(name, &net);
        eprintln!("{name}: largest |receptor - onnxruntime| = {worst:.3e}");
        assert!(worst <= TOL, "{name}: differs from onnxruntime by {worst}");
    }
}

#[test]
fn converted_models_match_onnxruntime() {
    let bin = env!("CARGO_BIN_EXE_receptor");
    let tmp = tempfile::tempdir().expect("a temporary folder");
    for name in CASES {
        let path = dir().join(format!("{name}.onnx"));
        for side in [false, true] {
            let out = tmp.path().join(format!("{name}-{side}.json"));
            let mut cmd = Command::new(bin);
            cmd.arg("convert").arg(&path).arg("--out").arg(&out);
            if side {
                cmd.arg("--tensors")
                    .arg(tmp.path().join(format!("{name}.safetensors")));
            }
            let run = cmd.output().expect("receptor runs");
            assert!(
                run.status.success(),
                "{name}: convert failed: {}",
                String::from_utf8_lossy(&run.stderr)
            );
            let net = model::load(&out, &LoadOptions::default())
                .unwrap_or_else(|e| panic!("{name}: converted model does not load: {e}"));
            let direct = model::load(&path, &LoadOptions::default()).expect("loads");
            assert_eq!(
                net.input(),
                direct.input(),
                "{name}: input spec survives convert"
            );
            let worst = worst_difference(name, &net);
            assert!(worst <= TOL, "{name} (converted): differs by {worst}");
        }
    }
}
