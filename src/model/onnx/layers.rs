//! The one place where ONNX operators become receptor layers.
//!
//! The chain is walked once with the shape of the value flowing through it: a map
//! `[N, C, H, W]` or a flat vector `[N, F]`. `Gemm`, `MatMul` and `Conv` start a layer with
//! weights; `Add` of a constant adds to its bias; `BatchNormalization` right after it is
//! folded into its weights and bias exactly (in `f64`, per unit or output channel); an
//! activation closes it. `MaxPool`, `AveragePool` and `GlobalAveragePool` become pooling
//! layers. `Flatten` (axis 1) or `Reshape` to `[N, -1]` of a computed map becomes a
//! flatten layer (ONNX and receptor both flatten channel, then row, then column);
//! `Identity` and `Dropout` change no numbers.
//!
//! An image input keeps receptor's channel-last order (`x[(row * W + col) * C + c]`): a
//! convolution or pooling reads it in place (the network's first spatial layer reads the
//! input channel-last), and when the input image is flattened straight into a dense layer
//! that layer's columns are permuted from ONNX's channel-first order.

use super::Context;
use super::graph::{Chain, Step, is_default_domain};
use super::proto::{self, NodeProto, TensorProto};
use super::tensor::{self, Constant};
use crate::error::Result;
use crate::model::{Activation, Conv2d, Layer, LayerKind, Layout, window_output};
use ndarray::{Array1, Array2};

/// What receptor reads instead of an unsupported operator.
const SUPPORTED: &str = "receptor reads Gemm, MatMul (+ Add of a bias), Conv (group 1), MaxPool, AveragePool, GlobalAveragePool, Relu, LeakyRelu, Sigmoid, Tanh, Softmax (last), Flatten (axis 1), Reshape to [N, -1], Identity, Dropout, and BatchNormalization right after Gemm, MatMul or Conv";
/// The operators this reader maps to layers (every other one is refused).
const OPERATORS: &[&str] = &[
    "Gemm",
    "MatMul",
    "Conv",
    "MaxPool",
    "AveragePool",
    "GlobalAveragePool",
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
const ACTIVATION_PLACE: &str = "receptor reads one activation right after each Gemm, MatMul or Conv (with its bias and BatchNormalization)";

/// The layers and the input they read.
#[derive(Debug)]
pub struct Lowered {
    /// Input size (features, or `H * W * C`).
    pub input_size: usize,
    /// Vector, or image with its shape.
    pub layout: Layout,
    /// The layers, input to output.
    pub layers: Vec<Layer>,
}

/// The value between two operators (the batch axis left out).
#[derive(Debug, Clone, Copy, PartialEq)]
enum Value {
    /// `[C, H, W]` in ONNX's order: the input image, or a map computed by a layer.
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

/// A dense or conv2d layer being assembled: `weights: [units, inputs]` (conv2d: `[out,
/// in x kh x kw]`, ONNX's `[out, in, kh, kw]` with the last three axes flattened),
/// `bias: [units]`, in `f64`.
struct Dense<'a> {
    name: String,
    units: usize,
    inputs: usize,
    weights: Vec<f64>,
    bias: Vec<f64>,
    activation: Option<(Activation, Step<'a>)>,
    /// Columns in ONNX's channel-first order of the input image `(C, H, W)`.
    chw: Option<(usize, usize, usize)>,
    /// The convolution's geometry (`None` for a dense layer).
    conv: Option<Conv2d>,
}

/// A layer being assembled: one with weights (still open to a bias, a normalisation and
/// an activation), or a finished one without weights (pooling, flatten).
enum Item<'a> {
    Weighted(Dense<'a>),
    Fixed(Layer),
}

/// Walks the chain and builds the layers (see the module comment).
pub fn lower(chain: &Chain<'_>, ctx: &Context) -> Result<Lowered> {
    let (mut value, batch_is_one) = input_value(chain, ctx)?;
    let input = value;
    let mut items: Vec<Item<'_>> = Vec::new();
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
        let makes_layer = matches!(
            op,
            "Gemm" | "MatMul" | "Conv" | "MaxPool" | "AveragePool" | "GlobalAveragePool"
        ) || (matches!(op, "Flatten" | "Reshape") && !items.is_empty());
        if makes_layer && let Some(s) = softmax {
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
                    Value::Image { .. } if axis == 1 || axis == -3 => {
                        flatten_map(&mut items, step, value)
                    }
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
            "Reshape" => {
                value = reshape(chain, step, value, batch_is_one, ctx)?;
                if let (Value::Flat { chw: Some(_), .. }, false) = (value, items.is_empty()) {
                    value = flatten_map(&mut items, step, value);
                }
            }
            "Gemm" | "MatMul" => {
                let d = new_dense(chain, step, value, items.len(), ctx)?;
                value = Value::Flat {
                    f: d.units,
                    chw: None,
                };
                items.push(Item::Weighted(d));
            }
            "Conv" => {
                let (d, out) = new_conv(chain, step, value, items.len(), ctx)?;
                value = out;
                items.push(Item::Weighted(d));
            }
            "MaxPool" | "AveragePool" | "GlobalAveragePool" => {
                let (layer, out) = new_pool(step, value, items.len(), ctx)?;
                value = out;
                items.push(Item::Fixed(layer));
            }
            "Add" => {
                let d = open_dense(&mut items, step, "Add", ctx)?;
                let other = node
                    .input
                    .iter()
                    .find(|i| chain.constants.contains_key(i.as_str()));
                let c = match other {
                    Some(name) => constant_floats(chain, name, step, ctx)?,
                    None => return Err(ctx.node_error(step, "adds no constant", SUPPORTED)),
                };
                let b = if d.conv.is_some() {
                    per_channel(&c, d.units)
                } else {
                    per_unit(&c, d.units)
                };
                let b = b.ok_or_else(|| {
                    ctx.node_error(
                        step,
                        &format!("adds a constant of shape {:?} to {} units", c.dims, d.units),
                        if d.conv.is_some() {
                            "receptor reads a bias of shape [channels, 1, 1] or [1, channels, 1, 1] after a Conv"
                        } else {
                            "receptor reads a bias of shape [units] or [1, units]"
                        },
                    )
                })?;
                for (x, y) in d.bias.iter_mut().zip(b) {
                    *x += y;
                }
            }
            "BatchNormalization" => {
                let d = open_dense(&mut items, step, "BatchNormalization", ctx)?;
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
                        if axis != 1 && axis != -1 || matches!(value, Value::Image { .. }) {
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
                let d = open_dense(&mut items, step, op, ctx)?;
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
    let first_weighted = items.iter().find_map(|i| match i {
        Item::Weighted(d) => Some(d),
        Item::Fixed(_) => None,
    });
    let Some(first_weighted) = first_weighted else {
        return Err(ctx.error(format!(
            "the graph has no Gemm, MatMul or Conv layer; {SUPPORTED}"
        )));
    };
    let (input_size, layout) = match input {
        Value::Image { c, h, w } => (
            c * h * w,
            Layout::Image {
                height: h,
                width: w,
                channels: c,
            },
        ),
        Value::Flat { f, .. } => (f, Layout::Vector),
        Value::FlatUnknown => (first_weighted.inputs, Layout::Vector),
    };
    if let Value::Image { .. } = value {
        return Err(ctx.error(
            "the graph's output is an image; receptor reads networks whose output is a vector [N, units] (add Flatten and a Gemm)",
        ));
    }
    Ok(Lowered {
        input_size,
        layout,
        layers: finish(items),
    })
}

/// A computed map flattened: a flatten layer, and the flat value it gives. The input image
/// itself is not flattened by a layer (the dense layer after it permutes its columns).
fn flatten_map(items: &mut Vec<Item<'_>>, step: Step<'_>, value: Value) -> Value {
    let (f, chw) = match value {
        Value::Image { c, h, w } => (c * h * w, (c, h, w)),
        Value::Flat {
            f, chw: Some(chw), ..
        } => (f, chw),
        other => return other,
    };
    if items.is_empty() {
        return Value::Flat { f, chw: Some(chw) };
    }
    items.push(Item::Fixed(Layer::flatten(node_layer_name(
        step.node,
        &format!("flatten{}", items.len()),
    ))));
    Value::Flat { f, chw: None }
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
        "Conv" => &[
            "auto_pad",
            "dilations",
            "group",
            "kernel_shape",
            "pads",
            "strides",
        ],
        "MaxPool" => &[
            "auto_pad",
            "ceil_mode",
            "dilations",
            "kernel_shape",
            "pads",
            "storage_order",
            "strides",
        ],
        "AveragePool" => &[
            "auto_pad",
            "ceil_mode",
            "count_include_pad",
            "dilations",
            "kernel_shape",
            "pads",
            "strides",
        ],
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

fn attr_ints<'n>(node: &'n NodeProto, name: &str) -> Option<&'n [i64]> {
    node.attribute
        .iter()
        .find(|a| a.name == name)
        .map(|a| a.ints.as_slice())
}

fn attr_string<'n>(node: &'n NodeProto, name: &str) -> Option<&'n str> {
    node.attribute
        .iter()
        .find(|a| a.name == name)
        .and_then(|a| a.s.as_deref())
        .map(|s| std::str::from_utf8(s).unwrap_or("(not UTF-8)"))
}

fn attr_float(node: &NodeProto, name: &str) -> Option<f32> {
    node.attribute
        .iter()
        .find(|a| a.name == name)
        .and_then(|a| a.f)
}

/// The constant (initializer) called `name`, or a message naming the node that reads it.
fn constant<'c>(
    chain: &Chain<'c>,
    name: &str,
    step: Step<'_>,
    ctx: &Context,
) -> Result<&'c TensorProto> {
    chain.constants.get(name).copied().ok_or_else(|| {
        ctx.node_error(
            step,
            &format!("reads '{name}', which is not a constant"),
            SUPPORTED,
        )
    })
}

/// The constant called `name` as floats, or a message naming the node.
fn constant_floats(
    chain: &Chain<'_>,
    name: &str,
    step: Step<'_>,
    ctx: &Context,
) -> Result<Constant> {
    let t = constant(chain, name, step, ctx)?;
    tensor::floats(t, &format!("tensor '{name}'"), ctx)
}

/// The constant called `name` as int64 values (a `Reshape` target).
fn constant_ints(
    chain: &Chain<'_>,
    name: &str,
    step: Step<'_>,
    ctx: &Context,
) -> Result<(Vec<usize>, Vec<i64>)> {
    let t = constant(chain, name, step, ctx)?;
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
        name: layer_name(node, b_name, &format!("dense{index}")),
        units,
        inputs,
        weights,
        bias,
        activation: None,
        chw,
        conv: None,
    })
}

/// A `Conv` (group 1) as a new conv2d layer reading the map `value`, and the map it gives.
/// Weights `[out, in, kh, kw]`, optional bias `[out]`; `strides`, `dilations` and
/// symmetric `pads` as in the ONNX operator definition of Conv.
fn new_conv<'a>(
    chain: &Chain<'a>,
    step: Step<'a>,
    value: Value,
    index: usize,
    ctx: &Context,
) -> Result<(Dense<'a>, Value)> {
    let node = step.node;
    let group = attr_int(node, "group").unwrap_or(1);
    if group != 1 {
        return Err(ctx.node_error(
            step,
            &format!("has group = {group} (a grouped convolution)"),
            "receptor reads Conv with group = 1 (every filter reads every input channel)",
        ));
    }
    let Value::Image { c, h, w } = value else {
        return Err(ctx.node_error(
            step,
            "reads a 2-D value",
            "receptor reads Conv on a 4-D map [N, C, H, W]",
        ));
    };
    let current_first = node
        .input
        .first()
        .is_some_and(|i| !chain.constants.contains_key(i.as_str()));
    let w_name = node.input.get(1).map(String::as_str).unwrap_or("");
    if !current_first || !chain.constants.contains_key(w_name) {
        return Err(ctx.node_error(
            step,
            "does not convolve the incoming value (first input) with a constant kernel (second input)",
            "receptor reads Conv(X, W, B) with W and B stored in the file",
        ));
    }
    let wt = constant_floats(chain, w_name, step, ctx)?;
    let &[out, inp, kh, kw] = wt.dims.as_slice() else {
        return Err(ctx.node_error(
            step,
            &format!("has a weight tensor of shape {:?}", wt.dims),
            "receptor reads 2-D convolutions with weights [out_channels, in_channels, kh, kw]",
        ));
    };
    if inp != c {
        return Err(ctx.node_error(
            step,
            &format!("has weights for {inp} input channels but the map before it has {c}"),
            "the kernel must match the map below",
        ));
    }
    if out == 0 || kh == 0 || kw == 0 {
        return Err(ctx.node_error(
            step,
            &format!("has an empty weight tensor {:?}", wt.dims),
            "a convolution needs at least one filter of at least 1 x 1",
        ));
    }
    if let Some(k) = attr_ints(node, "kernel_shape")
        && k != [kh as i64, kw as i64]
    {
        return Err(ctx.node_error(
            step,
            &format!("has kernel_shape {k:?} but weights of shape {:?}", wt.dims),
            "kernel_shape must match the weights' last two dimensions",
        ));
    }
    let stride = pair(step, ctx, "strides")?;
    let dilation = pair(step, ctx, "dilations")?;
    let padding = pads(step, ctx)?;
    let geom = Conv2d {
        in_channels: c,
        kernel: [kh, kw],
        stride,
        padding,
        dilation,
    };
    let (oh, ow) = window_fit(step, ctx, (h, w), geom.kernel, stride, padding, dilation)?;
    let mut bias = vec![0.0f64; out];
    if let Some(b_name) = node.input.get(2).filter(|b| !b.is_empty()) {
        let b = constant_floats(chain, b_name, step, ctx)?;
        if b.dims != [out] {
            return Err(ctx.node_error(
                step,
                &format!("has a bias of shape {:?} for {out} filters", b.dims),
                "receptor reads a Conv bias of shape [out_channels]",
            ));
        }
        bias = b.values;
    }
    let d = Dense {
        name: layer_name(node, w_name, &format!("conv{index}")),
        units: out,
        inputs: inp * kh * kw,
        weights: wt.values,
        bias,
        activation: None,
        chw: None,
        conv: Some(geom),
    };
    Ok((
        d,
        Value::Image {
            c: out,
            h: oh,
            w: ow,
        },
    ))
}

/// A `MaxPool`, `AveragePool` or `GlobalAveragePool` as a pooling layer reading the map
/// `value`, and the map it gives (ONNX operator definitions: strides default to 1,
/// `count_include_pad` to 0).
fn new_pool(step: Step<'_>, value: Value, index: usize, ctx: &Context) -> Result<(Layer, Value)> {
    let node = step.node;
    let op = node.op_type.as_str();
    let Value::Image { c, h, w } = value else {
        return Err(ctx.node_error(
            step,
            "reads a 2-D value",
            &format!("receptor reads {op} on a 4-D map [N, C, H, W]"),
        ));
    };
    let name = node_layer_name(node, &format!("pool{index}"));
    if op == "GlobalAveragePool" {
        let layer = Layer::avg_pool2d(name, [h, w], [1, 1], [0, 0]);
        return Ok((layer, Value::Image { c, h: 1, w: 1 }));
    }
    let kernel = match attr_ints(node, "kernel_shape") {
        Some(&[a, b]) if a >= 1 && b >= 1 => [a as usize, b as usize],
        k => {
            return Err(ctx.node_error(
                step,
                &format!("has kernel_shape {k:?}"),
                &format!("receptor reads {op} with a 2-D kernel_shape of at least 1 x 1"),
            ));
        }
    };
    let stride = pair(step, ctx, "strides")?;
    let dilation = pair(step, ctx, "dilations")?;
    if dilation != [1, 1] {
        return Err(ctx.node_error(
            step,
            &format!("has dilations {dilation:?}"),
            &format!("receptor reads {op} with dilations 1"),
        ));
    }
    let ceil = attr_int(node, "ceil_mode").unwrap_or(0);
    if ceil != 0 {
        return Err(ctx.node_error(
            step,
            &format!("has ceil_mode = {ceil}"),
            &format!("receptor reads {op} with ceil_mode = 0 (output sizes rounded down)"),
        ));
    }
    let order = attr_int(node, "storage_order").unwrap_or(0);
    if order != 0 {
        return Err(ctx.node_error(
            step,
            &format!("has storage_order = {order}"),
            "receptor reads MaxPool with storage_order = 0",
        ));
    }
    let padding = pads(step, ctx)?;
    if op == "AveragePool"
        && attr_int(node, "count_include_pad").unwrap_or(0) == 0
        && padding != [0, 0]
    {
        return Err(ctx.node_error(
            step,
            &format!("has count_include_pad = 0 with pads {padding:?}, so its border windows divide by fewer cells"),
            "receptor reads AveragePool with count_include_pad = 1 (padded cells count as zeros), or without pads",
        ));
    }
    if padding[0] * 2 > kernel[0] || padding[1] * 2 > kernel[1] {
        return Err(ctx.node_error(
            step,
            &format!("has pads {padding:?} larger than half the kernel {kernel:?}"),
            &format!("receptor reads {op} with pads at most half the kernel (windows that are never all padding)"),
        ));
    }
    let (oh, ow) = window_fit(step, ctx, (h, w), kernel, stride, padding, [1, 1])?;
    let layer = if op == "MaxPool" {
        Layer::max_pool2d(name, kernel, stride, padding)
    } else {
        Layer::avg_pool2d(name, kernel, stride, padding)
    };
    Ok((layer, Value::Image { c, h: oh, w: ow }))
}

/// A 2-D `[h, w]` attribute of positive integers (`strides`, `dilations`), 1 when absent.
fn pair(step: Step<'_>, ctx: &Context, name: &str) -> Result<[usize; 2]> {
    match attr_ints(step.node, name) {
        None => Ok([1, 1]),
        Some(&[a, b]) if a >= 1 && b >= 1 => match (usize::try_from(a), usize::try_from(b)) {
            (Ok(a), Ok(b)) => Ok([a, b]),
            _ => Err(ctx.node_error(step, &format!("has {name} [{a}, {b}]"), "sizes too large")),
        },
        Some(v) => Err(ctx.node_error(
            step,
            &format!("has {name} {v:?}"),
            &format!("receptor reads {name} as two values [h, w] of at least 1"),
        )),
    }
}

/// The padding `[h, w]` from `pads` `[h_begin, w_begin, h_end, w_end]` (begin and end must
/// be equal) and `auto_pad` (NOTSET, or VALID meaning no padding).
fn pads(step: Step<'_>, ctx: &Context) -> Result<[usize; 2]> {
    let node = step.node;
    let auto = attr_string(node, "auto_pad").unwrap_or("NOTSET");
    if auto != "NOTSET" && auto != "VALID" {
        return Err(ctx.node_error(
            step,
            &format!("has auto_pad = {auto}"),
            "receptor reads auto_pad NOTSET (explicit symmetric pads) or VALID (no padding)",
        ));
    }
    let p = match attr_ints(node, "pads") {
        None => [0, 0],
        Some(&[hb, wb, he, we]) if hb >= 0 && wb >= 0 && he >= 0 && we >= 0 => {
            if hb != he || wb != we {
                return Err(ctx.node_error(
                    step,
                    &format!("has asymmetric pads [{hb}, {wb}, {he}, {we}] (begin and end differ)"),
                    "receptor reads symmetric pads [h_begin, w_begin, h_end, w_end] with h_begin = h_end and w_begin = w_end",
                ));
            }
            match (usize::try_from(hb), usize::try_from(wb)) {
                (Ok(a), Ok(b)) => [a, b],
                _ => return Err(ctx.node_error(step, "has pads too large", "sizes too large")),
            }
        }
        Some(v) => {
            return Err(ctx.node_error(
                step,
                &format!("has pads {v:?}"),
                "receptor reads pads as four values [h_begin, w_begin, h_end, w_end] of at least 0",
            ));
        }
    };
    if auto == "VALID" && p != [0, 0] {
        return Err(ctx.node_error(
            step,
            &format!("has auto_pad = VALID with pads {p:?}"),
            "receptor reads pads only with auto_pad NOTSET",
        ));
    }
    Ok(p)
}

/// The output `(height, width)` of a window sliding over an `(h, w)` map, or a message
/// naming the node when the window does not fit.
fn window_fit(
    step: Step<'_>,
    ctx: &Context,
    (h, w): (usize, usize),
    kernel: [usize; 2],
    stride: [usize; 2],
    padding: [usize; 2],
    dilation: [usize; 2],
) -> Result<(usize, usize)> {
    match (
        window_output(h, kernel[0], stride[0], padding[0], dilation[0]),
        window_output(w, kernel[1], stride[1], padding[1], dilation[1]),
    ) {
        (Some(oh), Some(ow)) => Ok((oh, ow)),
        _ => Err(ctx.node_error(
            step,
            &format!(
                "has a {} x {} window (dilation {:?}, pads {:?}) that does not fit the {h} x {w} map before it",
                kernel[0], kernel[1], dilation, padding
            ),
            "the window must fit the padded map at least once",
        )),
    }
}

/// A constant broadcast over a `[C, H, W]` map per channel: shapes `[]`, `[1]`,
/// `[C, 1, 1]`, `[1, C, 1, 1]` (ONNX broadcasting aligns the last axes).
fn per_channel(c: &Constant, channels: usize) -> Option<Vec<f64>> {
    let ok = match c.dims.as_slice() {
        [] | [1] | [1, 1, 1] | [1, 1, 1, 1] => true,
        [n, 1, 1] | [1, n, 1, 1] => *n == channels,
        _ => false,
    };
    if !ok {
        return None;
    }
    Some(if c.len() == 1 {
        vec![c.values[0]; channels]
    } else {
        c.values.clone()
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

/// The layer a bias, normalisation or activation applies to: the last one, with weights
/// and still without an activation.
fn open_dense<'d, 'a>(
    items: &'d mut [Item<'a>],
    step: Step<'_>,
    op: &str,
    ctx: &Context,
) -> Result<&'d mut Dense<'a>> {
    let place = if op == "Add" || op == "BatchNormalization" {
        "receptor reads a bias Add and BatchNormalization between Gemm/MatMul/Conv and its activation"
    } else {
        ACTIVATION_PLACE
    };
    match items.last_mut() {
        Some(Item::Weighted(d)) => match d.activation {
            None => Ok(d),
            Some((_, s)) => Err(ctx.node_error(
                step,
                &format!(
                    "follows the activation {} of the layer before",
                    s.node.op_type
                ),
                place,
            )),
        },
        Some(Item::Fixed(l)) => Err(ctx.node_error(
            step,
            &format!("follows a {} layer, which has no weights", l.kind.name()),
            place,
        )),
        None => Err(ctx.node_error(
            step,
            "comes before any Gemm, MatMul or Conv",
            ACTIVATION_PLACE,
        )),
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
/// (`/fc1/Gemm` gives `fc1`), else `fallback`.
fn layer_name(node: &NodeProto, weight: &str, fallback: &str) -> String {
    let from_weight = weight
        .strip_suffix(".weight")
        .or_else(|| weight.strip_suffix("_weight"))
        .filter(|s| !s.is_empty() && !s.contains("::"));
    if let Some(n) = from_weight {
        return n.to_string();
    }
    let from_node = node_layer_name(node, "");
    if !from_node.is_empty() {
        return from_node;
    }
    if !weight.is_empty() && !weight.contains("::") {
        return weight.to_string();
    }
    fallback.to_string()
}

/// A layer name from the node (`/pool1/MaxPool` gives `pool1`), else `fallback`.
fn node_layer_name(node: &NodeProto, fallback: &str) -> String {
    let trimmed = node.name.trim_start_matches('/');
    let trimmed = trimmed
        .strip_suffix(&format!("/{}", node.op_type))
        .unwrap_or(trimmed);
    if trimmed.is_empty() {
        fallback.to_string()
    } else {
        trimmed.to_string()
    }
}

/// The finished layers: activation (identity when none), a dense layer's columns put in
/// receptor's channel-last order when it reads the flattened input image, names made
/// unique (`fc`, `fc_2`, ...).
fn finish(items: Vec<Item<'_>>) -> Vec<Layer> {
    let mut used = std::collections::HashSet::new();
    items
        .into_iter()
        .map(|item| {
            let mut layer = match item {
                Item::Weighted(d) => weighted_layer(d),
                Item::Fixed(l) => l,
            };
            let stem = layer.name.clone();
            let mut k = 2;
            while !used.insert(layer.name.clone()) {
                layer.name = format!("{stem}_{k}");
                k += 1;
            }
            layer
        })
        .collect()
}

/// A dense or conv2d layer from its assembled `f64` parts.
fn weighted_layer(d: Dense<'_>) -> Layer {
    let activation = d.activation.map_or(Activation::Identity, |(a, _)| a);
    let bias = Array1::from_iter(d.bias.iter().map(|&b| b as f32));
    if let Some(g) = d.conv {
        let mut layer = Layer::dense(
            d.name,
            activation,
            Array2::from_shape_fn((d.units, d.inputs), |(u, j)| {
                d.weights[u * d.inputs + j] as f32
            }),
            bias,
        );
        // Same row layout as `Layer::conv2d`: `[out, in x kh x kw]` in ONNX's (and
        // PyTorch's) order.
        layer.kind = LayerKind::Conv2d(g);
        return layer;
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
    Layer::dense(d.name, activation, weights, bias)
}
