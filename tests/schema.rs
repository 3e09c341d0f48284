//! Every bundled model validates against `assets/model-schema.json`, a JSON Schema in the
//! open draft 2020-12 standard (checked with the `jsonschema` crate, which implements that
//! draft), and the schema itself refuses files the importer refuses for structural reasons.

use std::path::{Path, PathBuf};

fn schema() -> jsonschema::Validator {
    let text = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("assets/model-schema.json"),
    )
    .expect("assets/model-schema.json is readable");
    let value: serde_json::Value = serde_json::from_str(&text).expect("the schema is valid JSON");
    assert_eq!(
        value["$schema"], "https://json-schema.org/draft/2020-12/schema",
        "the schema declares draft 2020-12"
    );
    jsonschema::draft202012::new(&value).expect("the schema compiles under draft 2020-12")
}

fn model_files(dir: &Path, out: &mut Vec<PathBuf>) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for e in entries.flatten() {
        let p = e.path();
        if p.is_dir() {
            model_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "json")
            && std::fs::read_to_string(&p).is_ok_and(|t| {
                t.contains("\"receptor-model/1\"") || t.contains("\"receptor-model/2\"")
            })
        {
            out.push(p);
        }
    }
}

#[test]
fn every_bundled_model_validates_against_the_schema() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let mut files = Vec::new();
    model_files(&root.join("demo-models"), &mut files);
    model_files(&root.join("tests/fixtures/reference"), &mut files);
    model_files(&root.join("tests/fixtures/structured"), &mut files);
    model_files(&root.join("tests/fixtures/conv"), &mut files);
    files.push(root.join("tests/bad-inputs/good-conv-model.json"));
    assert!(!files.is_empty(), "no bundled models found");
    let v = schema();
    for f in &files {
        let text = std::fs::read_to_string(f).unwrap();
        let inst: serde_json::Value = serde_json::from_str(&text).unwrap();
        let errors: Vec<String> = v
            .iter_errors(&inst)
            .map(|e| e.to_string())
            .take(3)
            .collect();
        assert!(errors.is_empty(), "{}: {errors:?}", f.display());
        // And the importer agrees.
        receptor::model::load(f, &receptor::model::LoadOptions::default())
            .unwrap_or_else(|e| panic!("{e}"));
    }
}

#[test]
fn written_models_validate_and_structural_errors_are_refused() {
    let v = schema();
    let good = r#"{"schema": "receptor-model/1", "name": "t",
        "input": {"size": 2, "low": [0, -1], "high": 1},
        "layers": [{"name": "h", "type": "dense", "activation": "leaky_relu", "alpha": 0.1,
                    "weights": [[1, 2], [3, 4]], "bias": [0, 1]},
                   {"name": "o", "type": "dense", "activation": "softmax",
                    "weights": [[1, -1], [0, 2]], "bias": [0, 0], "labels": ["a", "b"]}]}"#;
    let net = receptor::model::from_json_str(good, "t.json", Path::new("."), &Default::default())
        .unwrap();
    let written: serde_json::Value =
        serde_json::from_str(&receptor::model::to_json_string(&net)).unwrap();
    assert!(
        v.is_valid(&written),
        "{:?}",
        v.iter_errors(&written)
            .map(|e| e.to_string())
            .collect::<Vec<_>>()
    );
    let base: serde_json::Value = serde_json::from_str(good).unwrap();
    assert!(v.is_valid(&base));
    type Mutation = fn(&mut serde_json::Value);
    let bad_cases: [(&str, Mutation); 6] = [
        ("wrong tag", |m| m["schema"] = "receptor-model/3".into()),
        ("no layers", |m| m["layers"] = serde_json::json!([])),
        ("string weight", |m| {
            m["layers"][0]["weights"][0][0] = "x".into()
        }),
        ("unknown activation", |m| {
            m["layers"][0]["activation"] = "swish".into()
        }),
        (
            "bad channels",
            |m| {
                m["input"]["layout"] =
                    serde_json::json!({"kind": "image", "height": 1, "width": 1, "channels": 2})
            },
        ),
        ("tensor ref without name", |m| {
            m["layers"][0]["weights"] = serde_json::json!({"safetensors": "w.safetensors"})
        }),
    ];
    for (what, mutate) in bad_cases {
        let mut m = base.clone();
        mutate(&mut m);
        assert!(!v.is_valid(&m), "the schema should refuse: {what}");
    }
}

/// Version 2: a written convolutional model validates; conv layers in a version 1 file, a
/// pooling layer with weights, 3-D conv weights, a zero stride and a grouped convolution
/// are refused.
#[test]
fn version_2_models_validate_and_structural_errors_are_refused() {
    let v = schema();
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let net = receptor::model::load(
        &root.join("tests/fixtures/conv/cnn_rgb.json"),
        &receptor::model::LoadOptions::default(),
    )
    .unwrap();
    let written: serde_json::Value =
        serde_json::from_str(&receptor::model::to_json_string(&net)).unwrap();
    assert_eq!(written["schema"], "receptor-model/2");
    assert!(
        v.is_valid(&written),
        "{:?}",
        v.iter_errors(&written)
            .map(|e| e.to_string())
            .collect::<Vec<_>>()
    );
    let base: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(root.join("tests/bad-inputs/good-conv-model.json")).unwrap(),
    )
    .unwrap();
    assert!(v.is_valid(&base));
    type Mutation = fn(&mut serde_json::Value);
    let bad_cases: [(&str, Mutation); 5] = [
        ("conv in version 1", |m| {
            m["schema"] = "receptor-model/1".into()
        }),
        ("pool with weights", |m| {
            m["layers"][2]["weights"] = serde_json::json!([[1.0]])
        }),
        ("3-D conv weights", |m| {
            m["layers"][0]["weights"] = serde_json::json!([[[1.0]]])
        }),
        ("zero stride", |m| m["layers"][1]["stride"] = 0.into()),
        ("groups", |m| m["layers"][1]["groups"] = 2.into()),
    ];
    for (what, mutate) in bad_cases {
        let mut m = base.clone();
        mutate(&mut m);
        assert!(!v.is_valid(&m), "the schema should refuse: {what}");
    }
}
