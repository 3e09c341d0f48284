//! The command line and the app draw preferred inputs with one renderer: `receptor prefer
//! --png` (the real binary) and the app's "whole grid of the layer" export, given the same
//! preferred inputs, write byte-identical PNG files. The inputs come from the binary's own
//! JSON output (shortest round-trip floats, so they reach the app's export bit for bit).
//!
//! Beside the comparison, each grid is checked against the drawing rule that `prefer --help`
//! states: the low end of the input box is black, the high end white, in between
//! `round(255 (x - low) / (high - low))` (three channels: each channel so).

use receptor::app::colour::ScaleMode;
use receptor::app::export::{ExportData, write};
use std::path::Path;
use std::process::Command;
use std::sync::Arc;

/// A 2 x 3 one-channel image input on [-1, 1], a relu layer and a deeper identity layer.
const GREY: &str = r#"{"schema": "receptor-model/1", "name": "grey",
  "input": {"size": 6, "layout": {"kind": "image", "height": 2, "width": 3, "channels": 1},
            "low": -1, "high": 1},
  "layers": [
    {"name": "a", "type": "dense", "activation": "relu",
     "weights": [[1, -1, 0, 0.5, 0, 0], [0, 0, 1, 0, -1, 0.25], [-0.5, 0, 0, 0, 0, 1]],
     "bias": [0, 0.1, 0]},
    {"name": "b", "type": "dense", "activation": "identity",
     "weights": [[1, 0.5, 0], [0, -1, 1], [0.25, 0.25, 0.25]], "bias": [0, 0, 0]}]}"#;

/// A 1 x 2 RGB image input on [0, 1] with a deeper layer.
const RGB: &str = r#"{"schema": "receptor-model/1", "name": "rgb",
  "input": {"size": 6, "layout": {"kind": "image", "height": 1, "width": 2, "channels": 3},
            "low": 0, "high": 1},
  "layers": [
    {"name": "a", "type": "dense", "activation": "relu",
     "weights": [[1, 0, 0, 0, 0, 1], [0, 1, 0, 1, 0, 0]], "bias": [0, 0]},
    {"name": "b", "type": "dense", "activation": "identity",
     "weights": [[1, -1], [-1, 1]], "bias": [0, 0]}]}"#;

/// A vector input of 5 features with per-feature boxes and a deeper layer.
const VECTOR: &str = r#"{"schema": "receptor-model/1", "name": "vec",
  "input": {"size": 5, "low": [0, -1, 0, -2, 0], "high": [1, 1, 2, 2, 0.5]},
  "layers": [
    {"name": "a", "type": "dense", "activation": "relu",
     "weights": [[1, 0, 0, -1, 0], [0, 1, 1, 0, 0], [0, 0, 0, 1, 1], [-1, 0, 1, 0, 0]],
     "bias": [0, 0, 0, 0]},
    {"name": "b", "type": "dense", "activation": "relu",
     "weights": [[1, 0, 0, 1], [0, 1, -1, 0], [1, 1, 1, 1], [0, 0, 1, -1], [-1, 1, 0, 0]],
     "bias": [0, 0, 0, 0, 0]}]}"#;

/// Runs `receptor prefer MODEL --layer LAYER --all` with JSON and PNG output in `dir`;
/// returns the preferred inputs in unit order and the PNG bytes.
fn cli_prefer(dir: &Path, model: &str, layer: &str) -> (Vec<Vec<f32>>, Vec<u8>) {
    let out = Command::new(env!("CARGO_BIN_EXE_receptor"))
        .args([
            "prefer",
            model,
            "--layer",
            layer,
            "--all",
            "--steps",
            "40",
            "--restarts",
            "2",
            "--format",
            "json",
            "--out",
            "p.json",
            "--png",
            "cli.png",
        ])
        .current_dir(dir)
        .output()
        .expect("the receptor binary runs");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let json: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.join("p.json")).expect("p.json written"))
            .expect("valid JSON");
    let rows = json["rows"].as_array().expect("rows");
    let inputs = rows
        .iter()
        .enumerate()
        .map(|(k, r)| {
            assert_eq!(r["unit"].as_u64(), Some(k as u64), "rows in unit order");
            r["input"]
                .as_array()
                .expect("input array")
                .iter()
                .map(|v| v.as_f64().expect("finite input") as f32)
                .collect()
        })
        .collect();
    (
        inputs,
        std::fs::read(dir.join("cli.png")).expect("cli.png written"),
    )
}

/// The grid PNG the app exports for `layer` with these preferred inputs, in unit order.
fn app_grid(dir: &Path, model: &str, layer: &str, inputs: &[Vec<f32>]) -> Vec<u8> {
    let net = receptor::model::load(&dir.join(model), &Default::default()).expect("model loads");
    let layer = net.require_layer(layer).expect("layer exists");
    let data = ExportData::Grid {
        order: (0..inputs.len()).collect(),
        preferred: inputs.iter().cloned().map(Some).collect(),
        net: Arc::new(net),
        layer,
        scale: ScaleMode::default(),
    };
    let path = dir.join("app.png");
    write(&data, &path).expect("the app writes its grid");
    std::fs::read(&path).expect("app.png written")
}

/// The grey level `prefer --help` promises for `x` in `[low, high]`.
fn level(x: f32, low: f32, high: f32) -> u8 {
    (((x - low) / (high - low)).clamp(0.0, 1.0) * 255.0).round() as u8
}

#[test]
fn prefer_png_and_app_grid_export_are_the_same_bytes() {
    let d = tempfile::tempdir().expect("temporary folder");
    for (name, text) in [("grey.json", GREY), ("rgb.json", RGB), ("vec.json", VECTOR)] {
        std::fs::write(d.path().join(name), text).expect("model written");
        let (inputs, cli_png) = cli_prefer(d.path(), name, "b");
        let app_png = app_grid(d.path(), name, "b", &inputs);
        assert_eq!(&cli_png[..8], b"\x89PNG\r\n\x1a\n", "{name}: a PNG file");
        assert!(
            cli_png == app_png,
            "{name}: prefer --png ({} bytes) and the app's grid export ({} bytes) differ",
            cli_png.len(),
            app_png.len()
        );

        // The drawing rule, checked at the top left pixel of the first tile (grid gap 2 px;
        // image tiles sit under a band holding their unit index, vector strips right of a
        // margin holding it: the index "4" is one 3-pixel glyph drawn 2x, 6 px, plus 4 px):
        // input 0 (grey, vector) or inputs 0..3 (the RGB pixel).
        let img = image::load_from_memory(&cli_png)
            .expect("decodes")
            .to_rgb8();
        let (x0, y0) = match name {
            "vec.json" => (2 + 10, 2),
            _ => (2, 2 + receptor::report::annotate::LABEL_BAND as u32),
        };
        let got = img.get_pixel(x0, y0).0;
        let x = &inputs[0];
        let want = match name {
            "rgb.json" => [
                level(x[0], 0.0, 1.0),
                level(x[1], 0.0, 1.0),
                level(x[2], 0.0, 1.0),
            ],
            "grey.json" => [level(x[0], -1.0, 1.0); 3],
            _ => [level(x[0], 0.0, 1.0); 3],
        };
        assert_eq!(
            got,
            want,
            "{name}: first pixel of unit 0, input {:?}",
            &x[..3]
        );
    }
}
