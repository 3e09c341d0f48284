//! The one place where ONNX operators become receptor layers.
//!
//! The chain is walked once with the shape of the value flowing through it: an image
//! `[N, C, H, W]` or a flat vector `[N, F]`. `Gemm` and `MatMul` start a dense layer; `Add`
//! of a constant adds to its bias; `BatchNormalization` right after it is folded into its
//! weights and bias exactly (in `f64`); an activation closes it. `Flatten`, `Reshape` to
//! `[N, -1]`, `Identity` and `Dropout` change no numbers. An image input keeps receptor's
//! channel-last order (`x[(row * W + col) * C + c]`), so the first dense layer's columns are
//! permuted from ONNX's channel-first order.

use super::Context;
use super::graph::{Chain, Step, is_default_domain};
use super::proto::{self, NodeProto};
use super::tensor::{self, Constant};
use crate::error::Result;
use crate::model::{Activation, Layer, Layout};
use ndarray::{Array1, Array2};

/// What receptor reads instead of an unsupported operator.
const SUPPORTED: &str = "receptor reads Gemm, MatMul (+ Add of a bias), Relu, LeakyRelu, Sigmoid, Tanh, Softmax (last), Flatten (axis 1), Reshape to [N, -1], Identity, Dropout, and BatchNormalization right after Gemm or MatMul";
/// The operators this reader maps to layers (every other one is refused).
const OPERATORS: &[&str] = &[
    "Gemm",
    "MatMul",
    "Add",
    "BatchNormalization",
    "Relu",
    "LeakyRelu",
    "Sigmoid",
    "Tanh",
    "Softmax",
    "Flatten",
    "Reshape",
    "Identity",
    "Dropout",
];
/// What receptor reads instead of a misplaced activation.
const ACTIVATION_PLACE: &str = "receptor reads one activation right after each Gemm or MatMul (with its bias and BatchNormalization)";

/// The layers and the input they read.
#[derive(Debug)]
pub struct Lowered {
    /// Input size (features, or `H * W * C`).
    pub input_size: usize,
    /// Vector, or image with its shape.
    pub layout: Layout,
    /// The dense layers, input to output.
    pub layers: Vec<Layer>,
}

/// The value between two operators (the batch axis left out).
#[derive(Debug, Clone, Copy, PartialEq)]
enum Value {
    /// `[C, H, W]` in ONNX's order.
    Image { c: usize, h: usize, w: usize },
    /// `[F]`; `chw` is set while the features are still the input image flattened in
    /// ONNX's channel-first order.
    Flat {
        f: usize,
        chw: Option<(usize, usize, usize)>,
    },
    /// `[F]` with `F` unknown until the first dense layer fixes it (a symbolic input width).
    FlatUnknown,
}

/// A dense layer being assembled: `weights: [units, inputs]`, `bias: [units]`, in `f64`.
struct Dense<'a> {
    name: String,
    units: usize,
    inputs: usize,
    weights: Vec<f64>,
    bias: Vec<f64>,
    activation: Option<(Activation, Step<'a>)>,
    /// Columns in ONNX's channel-first order of the input image `(C, H, W)`.
    chw: Option<(usize, usize, usize)>,
}

/// Walks the chain and builds the layers (see the module comment).
pub fn lower(chain: &Chain<'_>, ctx: &Context) -> Result<Lowered> {
    let (mut value, batch_is_one) = input_value(chain, ctx)?;
    let input = value;
    let mut dense: Vec<Dense<'_>> = Vec::new();
    let mut softmax: Option<Step<'_>> = None;
    for &step in &chain.steps {
        let node = step.node;
        if !is_default_domain(node) {
            return Err(ctx.node_error(
                step,
                &format!("operator set '{}' is not the default ONNX one", node.domain),
                SUPPORTED,
            ));
        }
        let op = node.op_type.as_str();
        if !OPERATORS.contains(&op) {
            return Err(ctx.node_error(step, "is an operator receptor does not read", SUPPORTED));
        }
        check_attributes(step, ctx)?;
        if matches!(op, "Gemm" | "MatMul")
            && let Some(s) = softmax
        {
            return Err(ctx.node_error(
                s,
                "is followed by another layer",
                "receptor reads Softmax only as the last operator",
            ));
        }
        match op {
            "Identity" | "Dropout" => {
                if op == "Dropout"
                    && let Some(mode) = node.input.get(2).filter(|m| !m.is_empty())
                {
                    // training_mode is a bool tensor (one byte per value in raw_data, or
                    // int32_data; onnx.proto): any non-zero value, or no constant, is "on".
                    let on = chain.constants.get(mode.as_str()).is_none_or(|t| {
                        t.raw_data.iter().any(|&b| b != 0) || t.int32_data.iter().any(|&b| b != 0)
                    });
                    if on {
                        return Err(ctx.node_error(
                            step,
                            "runs in training mode",
                            "receptor reads Dropout in inference mode (training_mode false), where it does nothing",
                        ));
                    }
                }
            }
            "Flatten" => {
                let axis = attr_int(node, "axis").unwrap_or(1);
                value = match value {
                    Value::Image { c, h, w } if axis == 1 || axis == -3 => Value::Flat {
                        f: c * h * w,
                        chw: Some((c, h, w)),
                    },
                    Value::Flat { .. } | Value::FlatUnknown if axis == 1 || axis == -1 => value,
                    _ => {
                        return Err(ctx.node_error(
                            step,
                            &format!("flattens from axis {axis}"),
                            "receptor reads Flatten with axis 1 (keep the batch axis)",
                        ));
                    }
                };
            }
            "Reshape" => value = reshape(chain, step, value, batch_is_one, ctx)?,
            "Gemm" | "MatMul" => {
                let d = new_dense(chain, step, value, dense.len(), ctx)?;
                value = Value::Flat {
                    f: d.units,
                    chw: None,
                };
                dense.push(d);
            }
            "Add" => {
                let d = open_dense(&mut dense, step, "Add", ctx)?;
                let other = node
                    .input
                    .iter()
                    .find(|i| chain.constants.contains_key(i.as_str()));
                let c = match other {
                    Some(name) => constant_floats(chain, name, step, ctx)?,
                    None => return Err(ctx.node_error(step, "adds no constant", SUPPORTED)),
                };
                let b = per_unit(&c, d.units).ok_or_else(|| {
                    ctx.node_error(
                        step,
                        &format!("adds a constant of shape {:?} to {} units", c.dims, d.units),
                        "receptor reads a bias of shape [units] or [1, units]",
                    )
                })?;
                for (x, y) in d.bias.iter_mut().zip(b) {
                    *x += y;
                }
            }
            "BatchNormalization" => {
                let d = open_dense(&mut dense, step, "BatchNormalization", ctx)?;
                fold_batch_norm(chain, step, d, ctx)?;
            }
            "Relu" | "LeakyRelu" | "Sigmoid" | "Tanh" | "Softmax" => {
                let act = match op {
                    "Relu" => Activation::Relu,
                    "LeakyRelu" => {
                        let alpha = attr_float(node, "alpha").unwrap_or(0.01);
                        if !(0.0..=1.0).contains(&alpha) {
                            return Err(ctx.node_error(
                                step,
                                &format!("has alpha {alpha}"),
                                "receptor reads LeakyRelu with alpha from 0 to 1",
                            ));
                        }
                        Activation::LeakyRelu { alpha }
                    }
                    "Sigmoid" => Activation::Sigmoid,
                    "Tanh" => Activation::Tanh,
                    _ => {
                        let axis = attr_int(node, "axis").unwrap_or(-1);
                        if axis != 1 && axis != -1 {
                            return Err(ctx.node_error(
                                step,
                                &format!("takes the softmax over axis {axis}"),
                                "receptor reads Softmax over the feature axis (1 or -1) of a 2-D value",
                            ));
                        }
                        softmax = Some(step);
                        Activation::Softmax
                    }
                };
                let d = open_dense(&mut dense, step, op, ctx)?;
                d.activation = Some((act, step));
            }
            _ => {
                return Err(ctx.node_error(
                    step,
                    "is an operator receptor does not read",
                    SUPPORTED,
                ));
            }
        }
    }
    if dense.is_empty() {
        return Err(ctx.error(format!(
            "the graph has no Gemm or MatMul layer; {SUPPORTED}"
        )));
    }
    let (input_size, layout) = match (input, dense.first()) {
        (Value::Image { c, h, w }, _) => (
            c * h * w,
            Layout::Image {
                height: h,
                width: w,
                channels: c,
            },
        ),
        (Value::Flat { f, .. }, _) => (f, Layout::Vector),
        (Value::FlatUnknown, Some(d)) => (d.inputs, Layout::Vector),
        (Value::FlatUnknown, None) => (0, Layout::Vector),
    };
    if let Value::Image { .. } = value {
        return Err(ctx.error(
            "the graph's output is an image; receptor reads networks whose output is a vector [N, units]",
        ));
    }
    Ok(Lowered {
        input_size,
        layout,
        layers: finish(dense),
    })
}

/// The graph input's shape: `[N, F]` or `[N, C, H, W]`, and whether `N` is fixed at 1.
fn input_value(chain: &Chain<'_>, ctx: &Context) -> Result<(Value, bool)> {
    let inp = chain.input;
    let t = inp
        .r#type
        .as_ref()
        .and_then(|t| t.tensor_type.as_ref())
        .ok_or_else(|| ctx.error(format!("graph input '{}' is not a tensor", inp.name)))?;
    if !matches!(t.elem_type, proto::FLOAT | proto::FLOAT16 | proto::DOUBLE) {
        return Err(ctx.error(format!(
            "graph input '{}' has element type {}; receptor reads float inputs",
            inp.name,
            tensor::type_name(t.elem_type)
        )));
    }
    let dims: Vec<Option<usize>> = t
        .shape
        .as_ref()
        .ok_or_else(|| {
            ctx.error(format!(
                "graph input '{}' has no shape; receptor needs [N, features] or [N, C, H, W]",
                inp.name
            ))
        })?
        .dim
        .iter()
        .map(|d| {
            d.dim_value
                .and_then(|v| usize::try_from(v).ok())
                .filter(|&v| v > 0)
        })
        .collect();
    let batch_is_one = dims.first() == Some(&Some(1));
    let fixed = |k: usize| -> Result<usize> {
        dims[k].ok_or_else(|| {
            ctx.error(format!(
                "graph input '{}': dimension {k} is not a fixed positive size (a dynamic shape receptor cannot resolve); export with a fixed [C, H, W]",
                inp.name
            ))
        })
    };
    let value = match dims.len() {
        2 => match dims[1] {
            Some(f) => Value::Flat { f, chw: None },
            None => Value::FlatUnknown,
        },
        4 => {
            let (c, h, w) = (fixed(1)?, fixed(2)?, fixed(3)?);
            if c.checked_mul(h).and_then(|x| x.checked_mul(w)).is_none() {
                return Err(ctx.error(format!("graph input '{}' has absurd dimensions", inp.name)));
            }
            Value::Image { c, h, w }
        }
        n => {
            return Err(ctx.error(format!(
                "graph input '{}' has {n} dimensions; receptor reads [N, features] (vector) or [N, C, H, W] (image) inputs",
                inp.name
            )));
        }
    };
    Ok((value, batch_is_one))
}

/// Attributes each operator may carry (others are refused rather than ignored).
fn check_attributes(step: Step<'_>, ctx: &Context) -> Result<()> {
    let allowed: &[&str] = match step.node.op_type.as_str() {
        "Gemm" => &["alpha", "beta", "transA", "transB"],
        "LeakyRelu" => &["alpha"],
        "Softmax" | "Flatten" => &["axis"],
        "Reshape" => &["allowzero"],
        "Dropout" => &["seed", "ratio", "is_test"],
        "BatchNormalization" => &[
            "epsilon",
            "momentum",
            "training_mode",
            "spatial",
            "is_test",
            "consumed_inputs",
        ],
        _ => &[],
    };
    for a in &step.node.attribute {
        if !allowed.contains(&a.name.as_str()) {
            return Err(ctx.node_error(
                step,
                &format!("has attribute '{}', which receptor does not read", a.name),
                &if allowed.is_empty() {
                    format!("receptor reads {} without attributes", step.node.op_type)
                } else {
                    format!(
                        "receptor reads {} with {}",
                        step.node.op_type,
                        allowed.join(", ")
                    )
                },
            ));
        }
    }
    let gemm_trans_a =
        step.node.op_type == "Gemm" && attr_int(step.node, "transA").unwrap_or(0) != 0;
    let bn_training = step.node.op_type == "BatchNormalization"
        && attr_int(step.node, "training_mode").unwrap_or(0) != 0;
    if gemm_trans_a {
        return Err(ctx.node_error(
            step,
            "has transA = 1",
            "receptor reads Gemm with transA = 0 (any transB, alpha, beta)",
        ));
    }
    if bn_training {
        return Err(ctx.node_error(
            step,
            "runs in training mode",
            "receptor reads BatchNormalization in inference mode (training_mode = 0)",
        ));
    }
    Ok(())
}

fn attr_int(node: &NodeProto, name: &str) -> Option<i64> {
    node.attribute
        .iter()
        .find(|a| a.name == name)
        .and_then(|a| a.i)
}

fn attr_float(node: &NodeProto, name: &str) -> Option<f32> {
    node.attribute
        .iter()
        .find(|a| a.name == name)
        .and_then(|a| a.f)
}

/// The constant called `name` as floats, or a message naming the node.
fn constant_floats(
    chain: &Chain<'_>,
    name: &str,
    step: Step<'_>,
    ctx: &Context,
) -> Result<Constant> {
    let t = chain.constants.get(name).ok_or_else(|| {
        ctx.node_error(
            step,
            &format!("reads '{name}', which is not a constant"),
            SUPPORTED,
        )
    })?;
    tensor::floats(t, &format!("tensor '{name}'"), ctx)
}

/// The constant called `name` as int64 values (a `Reshape` target).
fn constant_ints(
    chain: &Chain<'_>,
    name: &str,
    step: Step<'_>,
    ctx: &Context,
) -> Result<(Vec<usize>, Vec<i64>)> {
    let t = chain.constants.get(name).ok_or_else(|| {
        ctx.node_error(
            step,
            &format!("reads '{name}', which is not a constant"),
            SUPPORTED,
        )
    })?;
    tensor::ints(t, &format!("tensor '{name}'"), ctx)
}

/// `Reshape` to `[N, -1]` (or `[N, F]`): a flattening.
fn reshape(
    chain: &Chain<'_>,
    step: Step<'_>,
    value: Value,
    batch_is_one: bool,
    ctx: &Context,
) -> Result<Value> {
    let shape_name = step.node.input.get(1).map(String::as_str).unwrap_or("");
    let (_, target) = constant_ints(chain, shape_name, step, ctx)?;
    let allowzero = attr_int(step.node, "allowzero").unwrap_or(0) != 0;
    let total = match value {
        Value::Image { c, h, w } => Some(c * h * w),
        Value::Flat { f, .. } => Some(f),
        Value::FlatUnknown => None,
    };
    let batch_ok = |d: i64| (d == 0 && !allowzero) || (d == 1 && batch_is_one);
    let ok = match target.as_slice() {
        [b, -1] => batch_ok(*b),
        [b, f] if *f > 0 => (batch_ok(*b) || *b == -1) && total == usize::try_from(*f).ok(),
        _ => false,
    };
    if !ok {
        return Err(ctx.node_error(
            step,
            &format!("reshapes to {target:?}"),
            "receptor reads Reshape to [N, -1] (shape [0, -1]) that keeps the batch axis and flattens the rest",
        ));
    }
    Ok(match value {
        Value::Image { c, h, w } => Value::Flat {
            f: c * h * w,
            chw: Some((c, h, w)),
        },
        v => v,
    })
}

/// A `Gemm` or `MatMul` as a new dense layer reading `value`.
fn new_dense<'a>(
    chain: &Chain<'a>,
    step: Step<'a>,
    value: Value,
    index: usize,
    ctx: &Context,
) -> Result<Dense<'a>> {
    let node = step.node;
    let (f, chw) = match value {
        Value::Flat { f, chw } => (Some(f), chw),
        Value::FlatUnknown => (None, None),
        Value::Image { .. } => {
            return Err(ctx.node_error(
                step,
                "reads a 4-D image value",
                &format!(
                    "receptor reads {} on a 2-D value: add Flatten (axis 1) before it",
                    node.op_type
                ),
            ));
        }
    };
    let current_first = node
        .input
        .first()
        .is_some_and(|i| !chain.constants.contains_key(i.as_str()));
    let b_name = node.input.get(1).map(String::as_str).unwrap_or("");
    if !current_first || !chain.constants.contains_key(b_name) {
        return Err(ctx.node_error(
            step,
            "does not multiply the incoming value (first input) by a constant weight matrix (second input)",
            "receptor reads x * W with W stored in the file",
        ));
    }
    let b = constant_floats(chain, b_name, step, ctx)?;
    if b.dims.len() != 2 {
        return Err(ctx.node_error(
            step,
            &format!("has a weight tensor of shape {:?}", b.dims),
            "receptor reads a 2-D weight matrix",
        ));
    }
    let gemm = node.op_type == "Gemm";
    let trans_b = gemm && attr_int(node, "transB").unwrap_or(0) != 0;
    let alpha = if gemm {
        f64::from(attr_float(node, "alpha").unwrap_or(1.0))
    } else {
        1.0
    };
    let beta = if gemm {
        f64::from(attr_float(node, "beta").unwrap_or(1.0))
    } else {
        1.0
    };
    // B is [K, N] (units N, inputs K), or [N, K] with transB.
    let (units, inputs) = if trans_b {
        (b.dims[0], b.dims[1])
    } else {
        (b.dims[1], b.dims[0])
    };
    if let Some(f) = f
        && f != inputs
    {
        return Err(ctx.node_error(
            step,
            &format!("has weights for {inputs} inputs but the value before it has {f} features"),
            "the weight matrix must match the layer below",
        ));
    }
    if units == 0 || inputs == 0 {
        return Err(ctx.node_error(
            step,
            "has an empty weight matrix",
            "a layer needs at least one unit and one input",
        ));
    }
    let mut weights = vec![0.0f64; units * inputs];
    for n in 0..units {
        for k in 0..inputs {
            let v = if trans_b {
                b.values[n * inputs + k]
            } else {
                b.values[k * units + n]
            };
            weights[n * inputs + k] = alpha * v;
        }
    }
    let mut bias = vec![0.0f64; units];
    if gemm && let Some(c_name) = node.input.get(2).filter(|c| !c.is_empty()) {
        let c = constant_floats(chain, c_name, step, ctx)?;
        let per = per_unit(&c, units).ok_or_else(|| {
            ctx.node_error(
                step,
                &format!("has a C tensor of shape {:?} for {units} units", c.dims),
                "receptor reads C of shape [units], [1, units] or a scalar",
            )
        })?;
        for (x, y) in bias.iter_mut().zip(per) {
            *x = beta * y;
        }
    }
    Ok(Dense {
        name: layer_name(node, b_name, index),
        units,
        inputs,
        weights,
        bias,
        activation: None,
        chw,
    })
}

/// A constant broadcast to `[units]`: shapes `[]`, `[1]`, `[1, 1]`, `[units]`, `[1, units]`.
fn per_unit(c: &Constant, units: usize) -> Option<Vec<f64>> {
    let ok = match c.dims.as_slice() {
        [] | [1] | [1, 1] => true,
        [n] | [1, n] => *n == units,
        _ => false,
    };
    if !ok {
        return None;
    }
    Some(if c.len() == 1 {
        vec![c.values[0]; units]
    } else {
        c.values.clone()
    })
}

/// The dense layer a bias, normalisation or activation applies to: the last one, still
/// without an activation.
fn open_dense<'d, 'a>(
    dense: &'d mut [Dense<'a>],
    step: Step<'_>,
    op: &str,
    ctx: &Context,
) -> Result<&'d mut Dense<'a>> {
    match dense.last_mut() {
        Some(d) if d.activation.is_none() => Ok(d),
        Some(d) => {
            let prev = d
                .activation
                .map(|(_, s)| s.node.op_type.clone())
                .unwrap_or_default();
            Err(ctx.node_error(
                step,
                &format!("follows the activation {prev} of the layer before"),
                if op == "Add" || op == "BatchNormalization" {
                    "receptor reads a bias Add and BatchNormalization between Gemm/MatMul and its activation"
                } else {
                    ACTIVATION_PLACE
                },
            ))
        }
        None => Err(ctx.node_error(step, "comes before any Gemm or MatMul", ACTIVATION_PLACE)),
    }
}

/// Folds `BatchNormalization` (inputs X, scale, B, mean, var) into the layer before it:
/// `y = scale * (z - mean) / sqrt(var + epsilon) + B` with `z = W x + b` gives
/// `W' = s W`, `b' = s (b - mean) + B`, `s = scale / sqrt(var + epsilon)` (ONNX operator
/// definition of BatchNormalization, inference mode).
fn fold_batch_norm(
    chain: &Chain<'_>,
    step: Step<'_>,
    d: &mut Dense<'_>,
    ctx: &Context,
) -> Result<()> {
    let node = step.node;
    let eps = f64::from(attr_float(node, "epsilon").unwrap_or(1e-5));
    let mut params = Vec::with_capacity(4);
    for k in 1..5 {
        let name = node.input.get(k).map(String::as_str).unwrap_or("");
        let c = constant_floats(chain, name, step, ctx)?;
        if c.len() != d.units {
            return Err(ctx.node_error(
                step,
                &format!("has {} values in '{name}' for {} units", c.len(), d.units),
                "receptor folds BatchNormalization with one scale, bias, mean and variance per unit",
            ));
        }
        params.push(c.values);
    }
    let (scale, shift, mean, var) = (&params[0], &params[1], &params[2], &params[3]);
    for u in 0..d.units {
        let denom = var[u] + eps;
        if denom.is_nan() || denom <= 0.0 {
            return Err(ctx.node_error(
                step,
                &format!("has variance + epsilon = {denom} for unit {u}"),
                "a variance + epsilon must be positive",
            ));
        }
        let s = scale[u] / denom.sqrt();
        for w in &mut d.weights[u * d.inputs..(u + 1) * d.inputs] {
            *w *= s;
        }
        d.bias[u] = s * (d.bias[u] - mean[u]) + shift[u];
    }
    Ok(())
}

/// A layer name from the weight tensor (`fc1.weight` gives `fc1`), else from the node
/// (`/fc1/Gemm` gives `fc1`), else `dense{index}`.
fn layer_name(node: &NodeProto, weight: &str, index: usize) -> String {
    let from_weight = weight
        .strip_suffix(".weight")
        .or_else(|| weight.strip_suffix("_weight"))
        .filter(|s| !s.is_empty() && !s.contains("::"));
    if let Some(n) = from_weight {
        return n.to_string();
    }
    let trimmed = node.name.trim_start_matches('/');
    let trimmed = trimmed
        .strip_suffix(&format!("/{}", node.op_type))
        .unwrap_or(trimmed);
    if !trimmed.is_empty() {
        return trimmed.to_string();
    }
    if !weight.is_empty() && !weight.contains("::") {
        return weight.to_string();
    }
    format!("dense{index}")
}

/// The finished layers: activation (identity when none), columns put in receptor's
/// channel-last order, names made unique (`fc`, `fc_2`, ...).
fn finish(dense: Vec<Dense<'_>>) -> Vec<Layer> {
    let mut used = std::collections::HashSet::new();
    dense
        .into_iter()
        .map(|d| {
            let mut name = d.name.clone();
            let mut k = 2;
            while !used.insert(name.clone()) {
                name = format!("{}_{k}", d.name);
                k += 1;
            }
            let col = |j: usize| -> usize {
                match d.chw {
                    // Receptor column j = (row * W + col) * C + ch; ONNX's = ch * H * W + row * W + col.
                    Some((c, h, w)) => {
                        let ch = j % c;
                        let pix = j / c;
                        ch * h * w + pix
                    }
                    None => j,
                }
            };
            let weights = Array2::from_shape_fn((d.units, d.inputs), |(u, j)| {
                d.weights[u * d.inputs + col(j)] as f32
            });
            Layer::dense(
                name,
                d.activation.map_or(Activation::Identity, |(a, _)| a),
                weights,
                Array1::from_iter(d.bias.iter().map(|&b| b as f32)),
            )
        })
        .collect()
}
