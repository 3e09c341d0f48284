//! Importer tests: one per error class of the contract, side files, and write/read round trips.

use super::*;
use safetensors::{Dtype, tensor::TensorView};
use std::path::PathBuf;

const GOOD: &str = r#"{
  "schema": "receptor-model/1",
  "name": "tiny",
  "input": {"size": 4, "layout": {"kind": "image", "height": 2, "width": 2, "channels": 1},
            "low": -1, "high": [1, 1, 2, 2], "names": ["a", "b", "c", "d"]},
  "layers": [
    {"name": "h1", "type": "dense", "activation": "relu",
     "weights": [[0.1, -0.2, 0.3, 0.4], [1, 2, 3, 4], [0, 0, 0, 0]], "bias": [0.5, -1, 0]},
    {"name": "out", "type": "dense", "activation": "softmax",
     "weights": [[1, 2, 3], [-1, -2, -3]], "bias": [0, 0], "labels": ["yes", "no"]}
  ],
  "trained_by": {"tool": "something", "epochs": 3}
}"#;

fn load_str(text: &str) -> Result<Network> {
    from_json_str(text, "m.json", Path::new("."), &LoadOptions::default())
}

fn err_of(text: &str) -> String {
    match load_str(text) {
        Ok(_) => panic!("expected an error for:\n{text}"),
        Err(e) => e.to_string(),
    }
}

fn with(old: &str, new: &str) -> String {
    assert!(GOOD.contains(old), "fixture does not contain {old}");
    GOOD.replacen(old, new, 1)
}

#[test]
fn loads_a_good_model() {
    let net = load_str(GOOD).unwrap();
    assert_eq!(net.input().size, 4);
    assert_eq!(
        net.input().layout,
        Layout::Image {
            height: 2,
            width: 2,
            channels: 1
        }
    );
    assert_eq!(net.input().low, vec![-1.0; 4]);
    assert_eq!(net.input().high, vec![1.0, 1.0, 2.0, 2.0]);
    assert_eq!(net.layers().len(), 2);
    assert_eq!(net.layers()[0].weights.dim(), (3, 4));
    assert_eq!(net.layers()[0].weights[[1, 2]], 3.0);
    assert_eq!(net.layers()[1].activation, Activation::Softmax);
    assert_eq!(net.output_names(), vec!["yes", "no"]);
    assert!(
        net.extra().contains_key("trained_by"),
        "unknown keys are kept"
    );
}

#[test]
fn round_trips_through_write() {
    let net = load_str(GOOD).unwrap();
    let text = to_json_string(&net);
    let back = load_str(&text).unwrap();
    assert_eq!(net, back);
}

#[test]
fn written_floats_round_trip_exactly() {
    let mut parts = load_str(GOOD).unwrap().into_parts();
    parts.layers[0].weights[[0, 0]] = 0.1f32 + f32::EPSILON;
    parts.layers[0].weights[[0, 1]] = 1.0e-30;
    parts.layers[0].weights[[0, 2]] = -3.402_823_5e38;
    let net = Network::from_parts(parts, "test").unwrap();
    let back = load_str(&to_json_string(&net)).unwrap();
    assert_eq!(net.layers()[0].weights, back.layers()[0].weights);
}

#[test]
fn leaky_relu_alpha_defaults_and_is_checked() {
    let net = load_str(&with("\"relu\"", "\"leaky_relu\"")).unwrap();
    assert_eq!(
        net.layers()[0].activation,
        Activation::LeakyRelu { alpha: 0.01 }
    );
    let e = err_of(&with("\"relu\"", "\"leaky_relu\", \"alpha\": 2"));
    assert!(e.contains("alpha"), "{e}");
}

#[test]
fn schema_tag_is_required() {
    let e = err_of(&with("\"schema\": \"receptor-model/1\",", ""));
    assert!(e.starts_with("m.json: missing \"schema\""), "{e}");
    let e = err_of(&with("receptor-model/1", "receptor-model/3"));
    assert!(
        e.contains("unsupported schema") && e.contains("receptor-model/3"),
        "{e}"
    );
    // Version 2 reads dense-only models too.
    assert!(load_str(&with("receptor-model/1", "receptor-model/2")).is_ok());
}

#[test]
fn invalid_and_truncated_json() {
    let e = err_of("{\"schema\": ");
    assert!(e.contains("m.json") && e.contains("truncated"), "{e}");
    let e = err_of("{\"schema\" \"x\"}");
    assert!(e.contains("not valid JSON"), "{e}");
    let e = err_of("");
    assert!(e.contains("empty"), "{e}");
    let e = err_of("[1, 2]");
    assert!(e.contains("schema"), "{e}");
    let e = load_str(GOOD).map(|_| ()).and_then(|_| {
        from_json_bytes(
            b"\xff\xfe{}",
            "m.json",
            Path::new("."),
            &LoadOptions::default(),
        )
        .map(|_| ())
    });
    assert!(e.unwrap_err().to_string().contains("UTF-8"));
}

#[test]
fn nan_and_infinity_are_refused() {
    let e = err_of(&with("0.1, -0.2", "NaN, -0.2"));
    assert!(e.contains("NaN"), "{e}");
    let e = err_of(&with("0.1, -0.2", "Infinity, -0.2"));
    assert!(e.contains("not valid JSON"), "{e}");
    // Finite in JSON, infinite as f32.
    let e = err_of(&with("0.1, -0.2", "1e39, -0.2"));
    assert!(
        e.contains("layer 'h1'") && e.contains("row 0, column 0") && e.contains("finite"),
        "{e}"
    );
}

#[test]
fn strings_and_nulls_in_tensors_name_layer_row_and_column() {
    let e = err_of(&with("[1, 2, 3, 4]", "[1, 2, \"3\", 4]"));
    assert!(
        e.contains("layer 'h1': weights: row 1, column 2") && e.contains("string"),
        "{e}"
    );
    let e = err_of(&with("[1, 2, 3, 4]", "[1, null, 3, 4]"));
    assert!(e.contains("row 1, column 1") && e.contains("null"), "{e}");
    let e = err_of(&with("\"bias\": [0.5, -1, 0]", "\"bias\": [0.5, true, 0]"));
    assert!(e.contains("bias: entry 1"), "{e}");
    let e = err_of(&with("[1, 2, 3, 4]", "[1, [2], 3, 4]"));
    assert!(e.contains("nested"), "{e}");
}

#[test]
fn every_shape_mismatch_is_named() {
    let e = err_of(&with("[1, 2, 3, 4]", "[1, 2, 3]"));
    assert!(
        e.contains("layer 'h1': weights: row 1 has 3 values but row 0 has 4"),
        "{e}"
    );
    let e = err_of(&with("[[1, 2, 3], [-1, -2, -3]]", "[[1, 2], [-1, -2]]"));
    assert!(
        e.contains("layer 'out': weights have 2 columns but layer 'h1' has 3 units"),
        "{e}"
    );
    let e = err_of(&with("\"bias\": [0.5, -1, 0]", "\"bias\": [0.5, -1]"));
    assert!(
        e.contains("layer 'h1': bias has 2 values but the weights have 3 rows"),
        "{e}"
    );
    let e = err_of(&with("\"size\": 4", "\"size\": 5"));
    assert!(
        e.contains("\"size\" is 5 but the first layer 'h1' has 4 weight columns"),
        "{e}"
    );
    let e = err_of(&with("\"height\": 2", "\"height\": 3"));
    assert!(
        e.contains("image layout 3 x 2 x 1 does not match \"size\" 4"),
        "{e}"
    );
    let e = err_of(&with("\"channels\": 1", "\"channels\": 2"));
    assert!(e.contains("channels"), "{e}");
    let e = err_of(&with("[1, 1, 2, 2]", "[1, 1, 2]"));
    assert!(
        e.contains("\"high\" has 3 values but the input has 4"),
        "{e}"
    );
    let e = err_of(&with("[\"a\", \"b\", \"c\", \"d\"]", "[\"a\"]"));
    assert!(e.contains("\"names\" has 1 entries"), "{e}");
    let e = err_of(&with("[\"yes\", \"no\"]", "[\"yes\"]"));
    assert!(
        e.contains("\"labels\" has 1 entries but the layer has 2 units"),
        "{e}"
    );
    let e = err_of(&with(
        "\"weights\": [[1, 2, 3], [-1, -2, -3]]",
        "\"weights\": []",
    ));
    assert!(e.contains("layer 'out': weights: empty"), "{e}");
    let e = err_of(&with("\"low\": -1", "\"low\": 3"));
    assert!(e.contains("\"low\" is above \"high\""), "{e}");
}

#[test]
fn absurd_declared_sizes_do_not_allocate() {
    // 10^12 inputs: must be refused by comparing with the data, not by allocating.
    let e = err_of(&with("\"size\": 4", "\"size\": 1000000000000"));
    assert!(e.contains("\"size\" is 1000000000000"), "{e}");
    let e = err_of(&with(
        "\"height\": 2, \"width\": 2",
        "\"height\": 4294967296, \"width\": 4294967296",
    ));
    assert!(e.contains("does not match"), "{e}");
    let e = err_of(&with("\"size\": 4", "\"size\": -3"));
    assert!(e.contains("whole number"), "{e}");
}

#[test]
fn names_activations_and_types_are_checked() {
    let e = err_of(&with("\"name\": \"out\"", "\"name\": \"h1\""));
    assert!(e.contains("'h1' is used twice"), "{e}");
    let e = err_of(&with("\"relu\"", "\"softmax\""));
    assert!(
        e.contains("layer 'h1': softmax is allowed only in the last layer"),
        "{e}"
    );
    let e = err_of(&with("\"relu\"", "\"swish\""));
    assert!(e.contains("unknown activation \"swish\""), "{e}");
    let e = err_of(&with(
        "\"type\": \"dense\", \"activation\": \"relu\"",
        "\"type\": \"conv\", \"activation\": \"relu\"",
    ));
    assert!(e.contains("unsupported layer type \"conv\""), "{e}");
    let e = err_of(&with("\"layers\": [", "\"layers\": [], \"x\": ["));
    assert!(e.contains("\"layers\" is empty"), "{e}");
}

#[test]
fn deep_nesting_is_an_error_not_a_crash() {
    let deep = format!("{}{}", "[".repeat(100_000), "]".repeat(100_000));
    let text = with(
        "\"trained_by\": {",
        &format!("\"deep\": {deep}, \"trained_by\": {{"),
    );
    let e = err_of(&text);
    assert!(e.contains("recursion limit"), "{e}");
}

#[test]
fn bias_may_be_omitted() {
    let net = load_str(&with(", \"bias\": [0.5, -1, 0]", "")).unwrap();
    assert_eq!(net.layers()[0].bias.to_vec(), vec![0.0; 3]);
}

fn f32_bytes(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

fn side_model(dir: &Path, file: &str) -> String {
    GOOD.replace(
        "\"weights\": [[0.1, -0.2, 0.3, 0.4], [1, 2, 3, 4], [0, 0, 0, 0]], \"bias\": [0.5, -1, 0]",
        &format!(
            "\"weights\": {{\"safetensors\": \"{file}\", \"tensor\": \"h1.weight\"}}, \
             \"bias\": {{\"safetensors\": \"{file}\", \"tensor\": \"h1.bias\"}}"
        ),
    )
    .replace(
        "\"name\": \"tiny\"",
        &format!("\"name\": \"side {}\"", dir.display()),
    )
}

fn write_side(path: &Path, dtype: Dtype, w: &[u8], b: &[u8]) {
    let wv = TensorView::new(dtype, vec![3, 4], w).unwrap();
    let bv = TensorView::new(dtype, vec![3], b).unwrap();
    let bytes = safetensors::serialize([("h1.weight", wv), ("h1.bias", bv)], None).unwrap();
    std::fs::write(path, bytes).unwrap();
}

const W: [f32; 12] = [0.1, -0.2, 0.3, 0.4, 1.0, 2.0, 3.0, 4.0, 0.0, 0.0, 0.0, 0.0];
const B: [f32; 3] = [0.5, -1.0, 0.0];

fn load_side(dir: &Path, text: &str) -> Result<Network> {
    let p = dir.join("m.json");
    std::fs::write(&p, text).unwrap();
    load(&p, &LoadOptions::default())
}

#[test]
fn side_files_in_every_dtype_match_the_inline_model() {
    let inline = load_str(GOOD).unwrap();
    let dir = tempfile::tempdir().unwrap();
    let cases: Vec<(Dtype, Vec<u8>, Vec<u8>, f32)> = vec![
        (Dtype::F32, f32_bytes(&W), f32_bytes(&B), 0.0),
        (
            Dtype::F64,
            W.iter().flat_map(|&x| f64::from(x).to_le_bytes()).collect(),
            B.iter().flat_map(|&x| f64::from(x).to_le_bytes()).collect(),
            0.0,
        ),
        (
            Dtype::F16,
            W.iter()
                .flat_map(|&x| half::f16::from_f32(x).to_le_bytes())
                .collect(),
            B.iter()
                .flat_map(|&x| half::f16::from_f32(x).to_le_bytes())
                .collect(),
            1e-3,
        ),
        (
            Dtype::BF16,
            W.iter()
                .flat_map(|&x| half::bf16::from_f32(x).to_le_bytes())
                .collect(),
            B.iter()
                .flat_map(|&x| half::bf16::from_f32(x).to_le_bytes())
                .collect(),
            4e-3,
        ),
    ];
    for (dtype, w, b, tol) in cases {
        write_side(&dir.path().join("w.safetensors"), dtype, &w, &b);
        let net = load_side(dir.path(), &side_model(dir.path(), "w.safetensors")).unwrap();
        for (x, y) in net.layers()[0]
            .weights
            .iter()
            .zip(inline.layers()[0].weights.iter())
        {
            // f16 has 11 significant bits, bf16 8 (IEEE 754-2008 binary16; bfloat16): the
            // relative rounding error is at most 2^-11 and 2^-8.
            assert!(
                (x - y).abs() <= tol * y.abs().max(1.0),
                "{dtype:?}: {x} vs {y}"
            );
        }
        assert_eq!(net.layers()[0].bias.len(), 3);
    }
}

#[test]
fn side_file_errors_are_clear() {
    let dir = tempfile::tempdir().unwrap();
    let st = dir.path().join("w.safetensors");
    // Missing file.
    let e = load_side(dir.path(), &side_model(dir.path(), "w.safetensors"))
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("layer 'h1' weights: cannot read side file"),
        "{e}"
    );
    // Wrong dtype.
    let ints: Vec<u8> = (0..12i32).flat_map(|x| x.to_le_bytes()).collect();
    let wv = TensorView::new(Dtype::I32, vec![3, 4], &ints).unwrap();
    std::fs::write(
        &st,
        safetensors::serialize([("h1.weight", wv)], None).unwrap(),
    )
    .unwrap();
    let e = load_side(dir.path(), &side_model(dir.path(), "w.safetensors"))
        .unwrap_err()
        .to_string();
    assert!(e.contains("dtype I32"), "{e}");
    // Missing tensor name.
    write_side(&st, Dtype::F32, &f32_bytes(&W), &f32_bytes(&B));
    let text = side_model(dir.path(), "w.safetensors").replace("h1.bias", "h1.b");
    let e = load_side(dir.path(), &text).unwrap_err().to_string();
    assert!(
        e.contains("has no tensor \"h1.b\"") && e.contains("h1.bias"),
        "{e}"
    );
    // Wrong shape: weights stored 1-D.
    let flat_w = f32_bytes(&W);
    let wv = TensorView::new(Dtype::F32, vec![12], &flat_w).unwrap();
    let good_b = f32_bytes(&B);
    let bv = TensorView::new(Dtype::F32, vec![3], &good_b).unwrap();
    std::fs::write(
        &st,
        safetensors::serialize([("h1.weight", wv), ("h1.bias", bv)], None).unwrap(),
    )
    .unwrap();
    let e = load_side(dir.path(), &side_model(dir.path(), "w.safetensors"))
        .unwrap_err()
        .to_string();
    assert!(e.contains("weights must be 2-D"), "{e}");
    // A header that lies about offsets: claims more data than the file has.
    let header = r#"{"h1.weight":{"dtype":"F32","shape":[3,4],"data_offsets":[0,4800000]}}"#;
    let mut bytes = (header.len() as u64).to_le_bytes().to_vec();
    bytes.extend_from_slice(header.as_bytes());
    bytes.extend_from_slice(&[0u8; 48]);
    std::fs::write(&st, &bytes).unwrap();
    let e = load_side(dir.path(), &side_model(dir.path(), "w.safetensors"))
        .unwrap_err()
        .to_string();
    assert!(e.contains("not a valid safetensors file"), "{e}");
    // A header length larger than the file.
    let mut bytes = (1u64 << 40).to_le_bytes().to_vec();
    bytes.extend_from_slice(b"{}");
    std::fs::write(&st, &bytes).unwrap();
    let e = load_side(dir.path(), &side_model(dir.path(), "w.safetensors"))
        .unwrap_err()
        .to_string();
    assert!(e.contains("not a valid safetensors file"), "{e}");
    // NaN inside a side file.
    let mut w = W;
    w[5] = f32::NAN;
    write_side(&st, Dtype::F32, &f32_bytes(&w), &f32_bytes(&B));
    let e = load_side(dir.path(), &side_model(dir.path(), "w.safetensors"))
        .unwrap_err()
        .to_string();
    assert!(e.contains("not finite at flat index 5"), "{e}");
}

#[test]
fn side_paths_outside_the_folder_need_permission() {
    let dir = tempfile::tempdir().unwrap();
    let sub = dir.path().join("models");
    std::fs::create_dir(&sub).unwrap();
    write_side(
        &dir.path().join("w.safetensors"),
        Dtype::F32,
        &f32_bytes(&W),
        &f32_bytes(&B),
    );
    let text = side_model(&sub, "../w.safetensors");
    let p = sub.join("m.json");
    std::fs::write(&p, &text).unwrap();
    let err = load(&p, &LoadOptions::default()).unwrap_err();
    // The core's message names the model and the path but no command-line flag; the command
    // line adds its flag, the app its button, from the variant.
    assert!(
        matches!(&err, crate::Error::OutsidePath { path, .. } if path == "../w.safetensors"),
        "{err:?}"
    );
    let e = err.to_string();
    assert!(
        e.contains("m.json") && e.contains("climbs out") && !e.contains("--"),
        "{e}"
    );
    let ok = load(
        &p,
        &LoadOptions {
            allow_outside_paths: true,
            ..LoadOptions::default()
        },
    )
    .unwrap();
    assert_eq!(ok.layers()[0].weights.dim(), (3, 4));
    // Staying inside through a detour is fine.
    std::fs::create_dir(sub.join("w")).unwrap();
    write_side(
        &sub.join("x.safetensors"),
        Dtype::F32,
        &f32_bytes(&W),
        &f32_bytes(&B),
    );
    std::fs::write(&p, side_model(&sub, "w/../x.safetensors")).unwrap();
    assert!(load(&p, &LoadOptions::default()).is_ok());
}

#[test]
fn files_that_are_not_models() {
    let dir = tempfile::tempdir().unwrap();
    let e = load(dir.path(), &LoadOptions::default())
        .unwrap_err()
        .to_string();
    assert!(e.contains("is a folder"), "{e}");
    let missing: PathBuf = dir.path().join("nope.json");
    let e = load(&missing, &LoadOptions::default())
        .unwrap_err()
        .to_string();
    assert!(e.contains("nope.json: cannot read"), "{e}");
    let garbage = dir.path().join("g.json");
    std::fs::write(&garbage, [0u8, 159, 146, 150, 7, 8]).unwrap();
    let e = load(&garbage, &LoadOptions::default())
        .unwrap_err()
        .to_string();
    assert!(e.contains("g.json"), "{e}");
}

#[test]
fn step_and_units_round_trip_through_write() {
    // The optional top-level "step" and "input.units" (schema receptor-model/1) survive a
    // write and a read, and the reader gives each feature its unit.
    let mut v: serde_json::Value = serde_json::from_str(GOOD).unwrap();
    v["step"] = serde_json::json!(1200);
    let size = v["input"]["size"].as_u64().unwrap() as usize;
    let units: Vec<String> = (0..size)
        .map(|i| {
            if i == 0 {
                String::new()
            } else {
                format!("u{i}")
            }
        })
        .collect();
    v["input"]["units"] = serde_json::json!(units);
    let net = load_str(&v.to_string()).unwrap();
    assert_eq!(net.step(), Some(1200));
    assert_eq!(
        net.input().feature_unit(0),
        None,
        "an empty unit counts as none"
    );
    assert_eq!(net.input().feature_unit(1), Some("u1"));
    let back = load_str(&to_json_string(&net)).unwrap();
    assert_eq!(net, back);
    assert_eq!(back.step(), Some(1200));
}
