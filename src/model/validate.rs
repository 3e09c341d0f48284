//! The checks every network passes before any analysis: shapes, box, layout, labels,
//! activations and finite values. Used by the importer and by [`Network::new`].

use super::network::{Activation, Layout, Network};
use crate::error::{Error, Result};

/// Checks `net` completely; `origin` names the source in the message.
pub fn validate(net: &Network, origin: &str) -> Result<()> {
    let err = |m: String| Error::model(origin, m);
    let inp = &net.input;
    if inp.size == 0 {
        return Err(err("input: \"size\" must be at least 1".into()));
    }
    if net.layers.is_empty() {
        return Err(err(
            "\"layers\" is empty: a model needs at least one layer".into()
        ));
    }
    if inp.low.len() != inp.size || inp.high.len() != inp.size {
        return Err(err(format!(
            "input: \"low\"/\"high\" have {}/{} values but the input has {}",
            inp.low.len(),
            inp.high.len(),
            inp.size
        )));
    }
    for i in 0..inp.size {
        let (l, h) = (inp.low[i], inp.high[i]);
        if !l.is_finite() || !h.is_finite() {
            return Err(err(format!(
                "input: the box of input {i} is not finite ({l}, {h})"
            )));
        }
        if l > h {
            return Err(err(format!(
                "input: \"low\" is above \"high\" for input {i} ({}: {l} > {h})",
                inp.feature_name(i)
            )));
        }
    }
    if let Layout::Image {
        height,
        width,
        channels,
    } = inp.layout
    {
        if channels != 1 && channels != 3 {
            return Err(err(format!(
                "input: image \"channels\" must be 1 or 3, found {channels}"
            )));
        }
        if height
            .checked_mul(width)
            .and_then(|x| x.checked_mul(channels))
            != Some(inp.size)
        {
            return Err(err(format!(
                "input: image layout {height} x {width} x {channels} does not match \"size\" {}",
                inp.size
            )));
        }
    }
    if let Some(names) = &inp.names
        && names.len() != inp.size
    {
        return Err(err(format!(
            "input: \"names\" has {} entries but the input has {}",
            names.len(),
            inp.size
        )));
    }
    let mut below = inp.size;
    let mut below_name = "the input".to_string();
    let n = net.layers.len();
    let mut seen = std::collections::HashSet::new();
    for (i, l) in net.layers.iter().enumerate() {
        let label = format!("layer '{}'", l.name);
        if l.name.is_empty() {
            return Err(err(format!("layer {i}: the name is empty")));
        }
        if !seen.insert(l.name.as_str()) {
            return Err(err(format!(
                "layer name '{}' is used twice; layer names must be unique",
                l.name
            )));
        }
        if l.units() == 0 || l.fan_in() == 0 {
            return Err(err(format!("{label}: weights are empty")));
        }
        if l.fan_in() != below {
            let what = if i == 0 {
                "inputs".to_string()
            } else {
                "units".to_string()
            };
            return Err(err(format!(
                "{label}: weights have {} columns but {below_name} has {below} {what}",
                l.fan_in()
            )));
        }
        if l.bias.len() != l.units() {
            return Err(err(format!(
                "{label}: bias has {} values but the weights have {} rows (units)",
                l.bias.len(),
                l.units()
            )));
        }
        if let Activation::Softmax = l.activation
            && i + 1 != n
        {
            return Err(err(format!(
                "{label}: softmax is allowed only in the last layer"
            )));
        }
        if let Activation::LeakyRelu { alpha } = l.activation
            && !(0.0..=1.0).contains(&alpha)
        {
            return Err(err(format!(
                "{label}: leaky_relu \"alpha\" must be between 0 and 1, found {alpha}"
            )));
        }
        if let Some(((r, c), v)) = l.weights.indexed_iter().find(|(_, v)| !v.is_finite()) {
            return Err(err(format!(
                "{label}: weights row {r}, column {c} is not finite ({v})"
            )));
        }
        if let Some((k, v)) = l.bias.iter().enumerate().find(|(_, v)| !v.is_finite()) {
            return Err(err(format!("{label}: bias {k} is not finite ({v})")));
        }
        if let Some(labels) = &l.labels {
            if labels.len() != l.units() {
                return Err(err(format!(
                    "{label}: \"labels\" has {} entries but the layer has {} units",
                    labels.len(),
                    l.units()
                )));
            }
            let mut uniq = std::collections::HashSet::new();
            if let Some(dup) = labels.iter().find(|s| !uniq.insert(s.as_str())) {
                return Err(err(format!("{label}: the label \"{dup}\" is used twice")));
            }
        }
        below = l.units();
        below_name = format!("layer '{}'", l.name);
    }
    Ok(())
}
