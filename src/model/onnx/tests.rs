//! Unit tests of the ONNX reader on models built in memory with our own message structs
//! (encoded by prost). Expected values come from the ONNX operator definitions (Gemm:
//! `Y = alpha * A * B' + beta * C`; BatchNormalization in inference mode:
//! `Y = scale * (X - mean) / sqrt(var + epsilon) + B`), computed here in f64.

use super::proto::*;
use super::*;
use crate::model::{Activation, BoxSource, InputBox, Layout};
use prost::Message;

fn t(name: &str, dims: &[i64], values: &[f32]) -> TensorProto {
    TensorProto {
        dims: dims.to_vec(),
        data_type: FLOAT,
        name: name.into(),
        raw_data: values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        ..Default::default()
    }
}

fn attr_f(name: &str, f: f32) -> AttributeProto {
    AttributeProto {
        name: name.into(),
        f: Some(f),
        r#type: 1,
        ..Default::default()
    }
}

fn attr_i(name: &str, i: i64) -> AttributeProto {
    AttributeProto {
        name: name.into(),
        i: Some(i),
        r#type: 2,
        ..Default::default()
    }
}

fn node(op: &str, inputs: &[&str], out: &str, attrs: Vec<AttributeProto>) -> NodeProto {
    NodeProto {
        input: inputs.iter().map(|s| s.to_string()).collect(),
        output: vec![out.into()],
        name: format!("{op}_{out}"),
        op_type: op.into(),
        attribute: attrs,
        ..Default::default()
    }
}

fn value(name: &str, dims: &[i64]) -> ValueInfoProto {
    ValueInfoProto {
        name: name.into(),
        r#type: Some(TypeProto {
            tensor_type: Some(TypeProtoTensor {
                elem_type: FLOAT,
                shape: Some(TensorShapeProto {
                    dim: dims
                        .iter()
                        .map(|&d| Dimension {
                            dim_value: (d > 0).then_some(d),
                            dim_param: (d <= 0).then(|| "batch".to_string()),
                        })
                        .collect(),
                }),
            }),
        }),
    }
}

fn bytes(
    nodes: Vec<NodeProto>,
    inits: Vec<TensorProto>,
    input: &[i64],
    meta: &[(&str, &str)],
) -> Vec<u8> {
    let last = nodes
        .last()
        .map(|n| n.output[0].clone())
        .unwrap_or_default();
    ModelProto {
        ir_version: 8,
        graph: Some(GraphProto {
            node: nodes,
            name: "g".into(),
            initializer: inits,
            input: vec![value("x", input)],
            output: vec![value(&last, &[0, 1])],
        }),
        metadata_props: meta
            .iter()
            .map(|(k, v)| StringStringEntryProto {
                key: k.to_string(),
                value: v.to_string(),
            })
            .collect(),
        ..Default::default()
    }
    .encode_to_vec()
}

fn read(b: &[u8], opts: &LoadOptions) -> Result<(Network, BoxOrigin)> {
    from_bytes(b, "m.onnx", Path::new("."), opts)
}

#[test]
fn gemm_attributes_follow_the_operator_definition() {
    // B is [K=3, N=2] (transB = 0); C is [2]; alpha 0.5, beta 2.
    let b = [1.0, -2.0, 0.5, 4.0, 3.0, 0.25];
    let c = [0.1, -0.3];
    let m = bytes(
        vec![node(
            "Gemm",
            &["x", "B", "C"],
            "y",
            vec![attr_f("alpha", 0.5), attr_f("beta", 2.0)],
        )],
        vec![t("B", &[3, 2], &b), t("C", &[2], &c)],
        &[0, 3],
        &[],
    );
    let (net, origin) = read(&m, &LoadOptions::default()).expect("reads");
    let l = &net.layers()[0];
    for n in 0..2 {
        for k in 0..3 {
            assert_eq!(
                l.weights[[n, k]],
                0.5 * b[k * 2 + n],
                "W[{n}, {k}] = alpha B[k, n]"
            );
        }
        assert!((l.bias[n] - 2.0 * c[n]).abs() < 1e-7, "bias = beta C");
    }
    assert_eq!(net.input().size, 3, "the symbolic width is resolved from B");
    assert_eq!(origin.low, BoxSource::Default);
    assert_eq!(net.input().low, vec![-1.0; 3]);
}

#[test]
fn batch_normalization_is_folded_exactly() {
    let w = [0.5, -1.0, 2.0, 0.25];
    let (scale, shift, mean, var, eps) = (
        [1.5f32, 0.5],
        [0.2f32, -0.4],
        [0.3f32, -0.1],
        [0.8f32, 2.0],
        1e-3f32,
    );
    let m = bytes(
        vec![
            node("Gemm", &["x", "W", "b"], "z", vec![attr_i("transB", 1)]),
            node(
                "BatchNormalization",
                &["z", "s", "sh", "mu", "v"],
                "n",
                vec![attr_f("epsilon", eps)],
            ),
            node("Relu", &["n"], "y", vec![]),
        ],
        vec![
            t("W", &[2, 2], &w),
            t("b", &[2], &[0.05, -0.05]),
            t("s", &[2], &scale),
            t("sh", &[2], &shift),
            t("mu", &[2], &mean),
            t("v", &[2], &var),
        ],
        &[0, 2],
        &[],
    );
    let (net, _) = read(&m, &LoadOptions::default()).expect("reads");
    let l = &net.layers()[0];
    assert_eq!(l.activation, Activation::Relu);
    let x = [0.7f64, -0.2];
    for u in 0..2 {
        let z = f64::from(w[u * 2]) * x[0] + f64::from(w[u * 2 + 1]) * x[1] + [0.05f64, -0.05][u];
        let want = f64::from(scale[u]) * (z - f64::from(mean[u]))
            / (f64::from(var[u]) + f64::from(eps)).sqrt()
            + f64::from(shift[u]);
        let got = f64::from(l.weights[[u, 0]]) * x[0]
            + f64::from(l.weights[[u, 1]]) * x[1]
            + f64::from(l.bias[u]);
        assert!((got - want).abs() < 1e-6, "unit {u}: {got} vs {want}");
    }
}

#[test]
fn image_columns_become_channel_last() {
    // [N, C=3, H=1, W=2]: ONNX column c * 2 + w holds weight c * 2 + w; receptor's column
    // for (w, c) is w * 3 + c (the schema's channel-last order).
    let w: Vec<f32> = (0..6).map(|i| i as f32).collect();
    let m = bytes(
        vec![
            node("Flatten", &["x"], "f", vec![]),
            node("Gemm", &["f", "W", "b"], "y", vec![attr_i("transB", 1)]),
        ],
        vec![t("W", &[1, 6], &w), t("b", &[1], &[0.0])],
        &[0, 3, 1, 2],
        &[("receptor.low", "0,-1,-2"), ("receptor.high", "1")],
    );
    let (net, origin) = read(&m, &LoadOptions::default()).expect("reads");
    assert_eq!(
        net.input().layout,
        Layout::Image {
            height: 1,
            width: 2,
            channels: 3
        }
    );
    for col in 0..2 {
        for c in 0..3 {
            assert_eq!(
                net.layers()[0].weights[[0, col * 3 + c]],
                (c * 2 + col) as f32
            );
        }
    }
    // One box value per channel, spread over the channel-last inputs.
    assert_eq!(net.input().low, vec![0.0, -1.0, -2.0, 0.0, -1.0, -2.0]);
    assert_eq!(origin.low, BoxSource::Metadata);
}

#[test]
fn given_box_wins_over_metadata_and_names_are_unique() {
    let m = bytes(
        vec![
            node(
                "Gemm",
                &["x", "a.weight", "b"],
                "h",
                vec![attr_i("transB", 1)],
            ),
            node("Tanh", &["h"], "t", vec![]),
            node(
                "Gemm",
                &["t", "a_weight", "b"],
                "y",
                vec![attr_i("transB", 1)],
            ),
        ],
        vec![
            t("a.weight", &[1, 2], &[1.0, 2.0]),
            t("a_weight", &[1, 1], &[3.0]),
            t("b", &[1], &[0.5]),
        ],
        &[0, 2],
        &[("receptor.low", "-5"), ("receptor.high", "5")],
    );
    let opts = LoadOptions {
        input_box: InputBox {
            low: Some(vec![0.0, 0.25]),
            high: None,
        },
        ..LoadOptions::default()
    };
    let (net, origin) = read(&m, &opts).expect("reads");
    assert_eq!(net.input().low, vec![0.0, 0.25]);
    assert_eq!(net.input().high, vec![5.0, 5.0]);
    assert_eq!(
        (origin.low, origin.high),
        (BoxSource::Given, BoxSource::Metadata)
    );
    let names: Vec<&str> = net.layers().iter().map(|l| l.name.as_str()).collect();
    assert_eq!(names, ["a", "a_2"]);
}

/// A one-layer model of two inputs with `meta` as its metadata.
fn two_input_model(meta: &[(&str, &str)]) -> Vec<u8> {
    bytes(
        vec![node("Gemm", &["x", "W"], "y", vec![attr_i("transB", 1)])],
        vec![t("W", &[1, 2], &[1.0, 2.0])],
        &[0, 2],
        meta,
    )
}

#[test]
fn names_and_units_come_from_metadata() {
    let m = two_input_model(&[
        ("receptor.names", r#"["air_temp", "current"]"#),
        ("receptor.units", r#"["degC", "A"]"#),
    ]);
    let (net, _) = read(&m, &LoadOptions::default()).expect("reads");
    assert_eq!(net.input().feature_name(0), "air_temp");
    assert_eq!(net.input().feature_unit(0), Some("degC"));
    assert_eq!(net.input().feature_unit(1), Some("A"));
    let (plain, _) = read(&two_input_model(&[]), &LoadOptions::default()).expect("reads");
    assert_eq!(plain.input().feature_unit(0), None);
}

#[test]
fn bad_units_metadata_names_the_key_and_the_count() {
    let e = read(
        &two_input_model(&[("receptor.units", r#"["degC"]"#)]),
        &LoadOptions::default(),
    )
    .unwrap_err()
    .to_string();
    assert!(
        e.contains("m.onnx") && e.contains("\"units\" has 1 entries"),
        "{e}"
    );
    let e = read(
        &two_input_model(&[("receptor.units", "degC")]),
        &LoadOptions::default(),
    )
    .unwrap_err()
    .to_string();
    assert!(
        e.contains("receptor.units") && e.contains("JSON array"),
        "{e}"
    );
}

#[test]
fn external_data_outside_the_folder_needs_permission() {
    let dir = tempfile::tempdir().expect("temp dir");
    let sub = dir.path().join("models");
    std::fs::create_dir(&sub).expect("mkdir");
    let data: Vec<u8> = [1.0f32, 2.0].iter().flat_map(|v| v.to_le_bytes()).collect();
    std::fs::write(dir.path().join("w.bin"), &data).expect("write");
    let mut w = t("W", &[1, 2], &[]);
    w.raw_data.clear();
    w.data_location = EXTERNAL;
    w.external_data = vec![StringStringEntryProto {
        key: "location".into(),
        value: "../w.bin".into(),
    }];
    let m = bytes(
        vec![node("Gemm", &["x", "W"], "y", vec![attr_i("transB", 1)])],
        vec![w],
        &[0, 2],
        &[],
    );
    let e = from_bytes(&m, "m.onnx", &sub, &LoadOptions::default()).unwrap_err();
    assert!(matches!(e, Error::OutsidePath { .. }), "{e}");
    let opts = LoadOptions {
        allow_outside_paths: true,
        ..LoadOptions::default()
    };
    let (net, _) = from_bytes(&m, "m.onnx", &sub, &opts).expect("allowed");
    assert_eq!(net.layers()[0].weights.as_slice().unwrap(), &[1.0, 2.0]);
}

#[test]
fn box_values_spread_by_count() {
    use crate::model::{parse_box_values, spread_box};
    assert_eq!(parse_box_values(" -1, 2.5 ").unwrap(), vec![-1.0, 2.5]);
    assert!(parse_box_values("1,,2").is_err());
    assert!(parse_box_values("inf").is_err());
    assert_eq!(
        spread_box(&[3.0], 2, Layout::Vector).unwrap(),
        vec![3.0, 3.0]
    );
    assert!(spread_box(&[1.0, 2.0], 3, Layout::Vector).is_err());
}

#[test]
fn dropout_is_read_only_in_inference_mode() {
    let flag = |on: bool| TensorProto {
        dims: vec![],
        data_type: 9, // BOOL (onnx.proto): one byte per value in raw_data
        name: "mode".into(),
        raw_data: vec![u8::from(on)],
        ..Default::default()
    };
    for on in [false, true] {
        let m = bytes(
            vec![
                node("Gemm", &["x", "W"], "h", vec![attr_i("transB", 1)]),
                node("Dropout", &["h", "", "mode"], "y", vec![]),
            ],
            vec![t("W", &[1, 2], &[1.0, 2.0]), flag(on)],
            &[0, 2],
            &[],
        );
        let r = read(&m, &LoadOptions::default());
        match (on, r) {
            (false, Ok(_)) => {}
            (true, Err(e)) => assert!(e.to_string().contains("training mode"), "{e}"),
            (_, r) => panic!("training_mode {on}: {:?}", r.map(|_| ())),
        }
    }
}

fn attr_ints(name: &str, v: &[i64]) -> AttributeProto {
    AttributeProto {
        name: name.into(),
        ints: v.to_vec(),
        r#type: 7,
        ..Default::default()
    }
}

fn attr_s(name: &str, s: &str) -> AttributeProto {
    AttributeProto {
        name: name.into(),
        s: Some(s.as_bytes().to_vec()),
        r#type: 3,
        ..Default::default()
    }
}

/// `[N, 1, 2, 2]` -> Conv (1 x 1, two filters) -> `middle` -> GlobalAveragePool ->
/// Flatten -> Gemm (2 -> 1).
fn conv_model(
    conv_attrs: Vec<AttributeProto>,
    middle: Vec<NodeProto>,
    extra: Vec<TensorProto>,
) -> Vec<u8> {
    let last = middle
        .last()
        .map(|n| n.output[0].clone())
        .unwrap_or_else(|| "c".to_string());
    let mut nodes = vec![node("Conv", &["x", "K"], "c", conv_attrs)];
    nodes.extend(middle);
    nodes.push(node("GlobalAveragePool", &[&last], "g", vec![]));
    nodes.push(node("Flatten", &["g"], "f", vec![]));
    nodes.push(node(
        "Gemm",
        &["f", "W", "b"],
        "y",
        vec![attr_i("transB", 1)],
    ));
    let mut inits = vec![
        t("K", &[2, 1, 1, 1], &[2.0, -1.0]),
        t("W", &[1, 2], &[1.0, 1.0]),
        t("b", &[1], &[0.0]),
    ];
    inits.extend(extra);
    bytes(nodes, inits, &[0, 1, 2, 2], &[])
}

#[test]
fn conv_bias_and_batch_norm_fold_per_channel() {
    // Add of a [1, C, 1, 1] bias, then BatchNormalization (ONNX operator definition):
    // s = scale / sqrt(var + eps), W' = s W, b' = s (b - mean) + B, per output channel.
    let (scale, shift, mean, var, eps) = ([2.0, 1.0], [0.0, 1.0], [1.0, 0.0], [3.0, 0.25], 1.0);
    let m = conv_model(
        vec![],
        vec![
            node("Add", &["c", "cb"], "a", vec![]),
            node(
                "BatchNormalization",
                &["a", "s", "sh", "mu", "v"],
                "n",
                vec![attr_f("epsilon", eps)],
            ),
            node("Relu", &["n"], "r", vec![]),
        ],
        vec![
            t("cb", &[1, 2, 1, 1], &[0.5, 1.0]),
            t("s", &[2], &scale),
            t("sh", &[2], &shift),
            t("mu", &[2], &mean),
            t("v", &[2], &var),
        ],
    );
    let (net, _) = read(&m, &LoadOptions::default()).expect("reads");
    let kinds: Vec<&str> = net.layers().iter().map(|l| l.kind.name()).collect();
    assert_eq!(kinds, ["conv2d", "avg_pool2d", "flatten", "dense"]);
    let conv = &net.layers()[0];
    assert_eq!(conv.activation, Activation::Relu);
    let (w, b) = ([2.0f64, -1.0], [0.5f64, 1.0]);
    for u in 0..2 {
        let s = f64::from(scale[u]) / (f64::from(var[u]) + f64::from(eps)).sqrt();
        let want_w = s * w[u];
        let want_b = s * (b[u] - f64::from(mean[u])) + f64::from(shift[u]);
        assert!(
            (f64::from(conv.weights[[u, 0]]) - want_w).abs() < 1e-6,
            "W'[{u}]"
        );
        assert!((f64::from(conv.bias[u]) - want_b).abs() < 1e-6, "b'[{u}]");
    }
    // GlobalAveragePool: an average pool whose window is the whole 2 x 2 map.
    assert_eq!(
        net.layers()[1].kind,
        crate::model::LayerKind::AvgPool2d(crate::model::Pool2d {
            kernel: [2, 2],
            stride: [1, 1],
            padding: [0, 0]
        })
    );
}

#[test]
fn conv_and_pool_attributes_outside_the_subset_are_refused() {
    let refused = |m: Vec<u8>, want: &str| {
        let e = read(&m, &LoadOptions::default())
            .expect_err("refused")
            .to_string();
        assert!(e.contains(want), "{e}");
        assert!(e.contains("m.onnx"), "{e}");
    };
    refused(
        conv_model(vec![attr_s("auto_pad", "SAME_UPPER")], vec![], vec![]),
        "has auto_pad = SAME_UPPER",
    );
    refused(
        conv_model(vec![attr_ints("pads", &[1, 0, 0, 0])], vec![], vec![]),
        "asymmetric pads [1, 0, 0, 0]",
    );
    let pool = |attrs| {
        vec![
            node("MaxPool", &["c"], "p", attrs),
            node("Relu", &["p"], "r", vec![]),
        ]
    };
    refused(
        conv_model(
            vec![],
            pool(vec![attr_ints("kernel_shape", &[1, 1])]),
            vec![],
        ),
        "follows a max_pool2d layer",
    );
    let pool_only = |attrs| vec![node("MaxPool", &["c"], "p", attrs)];
    refused(
        conv_model(
            vec![],
            pool_only(vec![
                attr_ints("kernel_shape", &[2, 2]),
                attr_i("ceil_mode", 1),
            ]),
            vec![],
        ),
        "has ceil_mode = 1",
    );
    refused(
        conv_model(
            vec![],
            pool_only(vec![
                attr_ints("kernel_shape", &[2, 2]),
                attr_ints("pads", &[2, 2, 2, 2]),
            ]),
            vec![],
        ),
        "larger than half the kernel",
    );
    // A [C] constant broadcasts over the width in ONNX, not over the channels.
    refused(
        conv_model(
            vec![],
            vec![node("Add", &["c", "cb"], "a", vec![])],
            vec![t("cb", &[2], &[0.5, 1.0])],
        ),
        "adds a constant of shape [2]",
    );
}
