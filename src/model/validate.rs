//! The checks every network passes before any analysis: shapes, box, layout, labels,
//! activations and finite values. Used by [`super::Network::from_parts`], through which every network is made.

use super::types::{self, Activation, InputSpec, Layer, LayerKind, Layout, NetworkParts, Shape};
use crate::error::{Error, Result};

/// What is wrong with a network, for [`validate_shapes`] to attach the source to.
type Problem = std::result::Result<(), String>;

/// The shapes a valid network's layers see and give: the input as the first layer sees
/// it, then each layer's output.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Shapes {
    pub(crate) input: Shape,
    pub(crate) outputs: Vec<Shape>,
}

/// Checks `net` completely and gives its shapes; `origin` names the source in the message.
pub(crate) fn validate_shapes(net: &NetworkParts, origin: &str) -> Result<Shapes> {
    check_network(net).map_err(|problem| Error::model(origin, problem))
}

/// Every check in order: the input, then each layer against the one below it.
fn check_network(net: &NetworkParts) -> std::result::Result<Shapes, String> {
    let inp = &net.input;
    if inp.size == 0 {
        return Err("input: \"size\" must be at least 1".into());
    }
    if net.layers.is_empty() {
        return Err("\"layers\" is empty: a model needs at least one layer".into());
    }
    check_input(inp)?;
    let first = &net.layers[0];
    let input_shape = match (first.kind, inp.layout) {
        (LayerKind::Dense, _) => Shape::Vector(inp.size),
        (
            _,
            Layout::Image {
                height,
                width,
                channels,
            },
        ) => Shape::Map {
            channels,
            height,
            width,
        },
        (kind, Layout::Vector) => {
            return Err(format!(
                "layer '{}': a {} layer needs an image input layout (\"layout\": {{\"kind\": \"image\", ...}}), but the input is a vector of {} values",
                first.name,
                kind.name(),
                inp.size
            ));
        }
    };
    let mut below = input_shape;
    let mut below_name = "the input".to_string();
    let mut below_label = "the input".to_string();
    let mut seen = std::collections::HashSet::new();
    let mut outputs = Vec::with_capacity(net.layers.len());
    for (i, l) in net.layers.iter().enumerate() {
        if l.name.is_empty() {
            return Err(format!("layer {i}: the name is empty"));
        }
        if !seen.insert(l.name.as_str()) {
            return Err(format!(
                "layer name '{}' is used twice; layer names must be unique",
                l.name
            ));
        }
        let label = format!("layer '{}'", l.name);
        let out = if l.kind == LayerKind::Dense {
            let n = below.len();
            if !matches!(below, Shape::Map { .. }) {
                let what = if i == 0 { "inputs" } else { "units" };
                check_shapes(l, &label, n, &format!("{below_label} has {n} {what}"))?;
            }
            types::output_shape(l, below, &below_name)
        } else {
            check_kind_fields(l, &label)?;
            types::output_shape(l, below, &below_name)
        }
        .map_err(|m| format!("{label}: {m}"))?;
        if let Activation::Softmax = l.activation {
            if i + 1 != net.layers.len() {
                return Err(format!(
                    "{label}: softmax is allowed only in the last layer"
                ));
            }
            if l.kind != LayerKind::Dense {
                return Err(format!("{label}: softmax is allowed only on a dense layer"));
            }
        }
        check_values(l, &label)?;
        outputs.push(out);
        below = out;
        below_name = format!("'{}'", l.name);
        below_label = label;
    }
    Ok(Shapes {
        input: input_shape,
        outputs,
    })
}

/// The fields a non-dense layer must have: a conv2d's weights and bias agree; pooling and
/// flatten carry no weights, bias, labels or activation.
fn check_kind_fields(l: &Layer, label: &str) -> Problem {
    match l.kind {
        LayerKind::Dense => Ok(()),
        LayerKind::Conv2d(_) => {
            if l.units() == 0 || l.fan_in() == 0 {
                return Err(format!("{label}: weights are empty"));
            }
            if l.bias.len() != l.units() {
                return Err(format!(
                    "{label}: bias has {} values but the weights have {} filters (output channels)",
                    l.bias.len(),
                    l.units()
                ));
            }
            Ok(())
        }
        LayerKind::MaxPool2d(_) | LayerKind::AvgPool2d(_) | LayerKind::Flatten => {
            if !l.weights.is_empty() || !l.bias.is_empty() {
                return Err(format!(
                    "{label}: a {} layer has no weights or bias",
                    l.kind.name()
                ));
            }
            if l.activation != Activation::Identity {
                return Err(format!(
                    "{label}: a {} layer has no activation (found {})",
                    l.kind.name(),
                    l.activation.name()
                ));
            }
            if l.labels.is_some() {
                return Err(format!(
                    "{label}: a {} layer has no units to label",
                    l.kind.name()
                ));
            }
            Ok(())
        }
    }
}

/// The input box (one finite `low <= high` per input), the image layout and the names.
fn check_input(inp: &InputSpec) -> Problem {
    if inp.low.len() != inp.size || inp.high.len() != inp.size {
        return Err(format!(
            "input: \"low\"/\"high\" have {}/{} values but the input has {}",
            inp.low.len(),
            inp.high.len(),
            inp.size
        ));
    }
    for i in 0..inp.size {
        let (l, h) = (inp.low[i], inp.high[i]);
        if !l.is_finite() || !h.is_finite() {
            return Err(format!(
                "input: the box of input {i} is not finite ({l}, {h})"
            ));
        }
        if l > h {
            return Err(format!(
                "input: \"low\" is above \"high\" for input {i} ({}: {l} > {h})",
                inp.feature_name(i)
            ));
        }
    }
    if let Layout::Image {
        height,
        width,
        channels,
    } = inp.layout
    {
        if channels != 1 && channels != 3 {
            return Err(format!(
                "input: image \"channels\" must be 1 or 3, found {channels}"
            ));
        }
        if height
            .checked_mul(width)
            .and_then(|x| x.checked_mul(channels))
            != Some(inp.size)
        {
            return Err(format!(
                "input: image layout {height} x {width} x {channels} does not match \"size\" {}",
                inp.size
            ));
        }
    }
    if let Some(names) = &inp.names
        && names.len() != inp.size
    {
        return Err(format!(
            "input: \"names\" has {} entries but the input has {}",
            names.len(),
            inp.size
        ));
    }
    if let Some(units) = &inp.units
        && units.len() != inp.size
    {
        return Err(format!(
            "input: \"units\" has {} entries but the input has {}",
            units.len(),
            inp.size
        ));
    }
    Ok(())
}

/// The layer's weights `[units, below]` and bias `[units]`; `below_text` says what lies
/// below ("layer 'h1' has 32 units").
fn check_shapes(l: &Layer, label: &str, below: usize, below_text: &str) -> Problem {
    if l.units() == 0 || l.fan_in() == 0 {
        return Err(format!("{label}: weights are empty"));
    }
    if l.fan_in() != below {
        return Err(format!(
            "{label}: weights have {} columns but {below_text}",
            l.fan_in()
        ));
    }
    if l.bias.len() != l.units() {
        return Err(format!(
            "{label}: bias has {} values but the weights have {} rows (units)",
            l.bias.len(),
            l.units()
        ));
    }
    Ok(())
}

/// The leaky-ReLU slope, finite weights and biases, and one distinct label per unit.
fn check_values(l: &Layer, label: &str) -> Problem {
    if let Activation::LeakyRelu { alpha } = l.activation
        && !(0.0..=1.0).contains(&alpha)
    {
        return Err(format!(
            "{label}: leaky_relu \"alpha\" must be between 0 and 1, found {alpha}"
        ));
    }
    if let Some(((r, c), v)) = l.weights.indexed_iter().find(|(_, v)| !v.is_finite()) {
        return Err(format!(
            "{label}: weights row {r}, column {c} is not finite ({v})"
        ));
    }
    if let Some((k, v)) = l.bias.iter().enumerate().find(|(_, v)| !v.is_finite()) {
        return Err(format!("{label}: bias {k} is not finite ({v})"));
    }
    if let Some(labels) = &l.labels {
        if labels.len() != l.units() {
            return Err(format!(
                "{label}: \"labels\" has {} entries but the layer has {} units",
                labels.len(),
                l.units()
            ));
        }
        let mut uniq = std::collections::HashSet::new();
        if let Some(dup) = labels.iter().find(|s| !uniq.insert(s.as_str())) {
            return Err(format!("{label}: the label \"{dup}\" is used twice"));
        }
    }
    Ok(())
}
