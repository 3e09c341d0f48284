//! ONNX import: the bytes of an `.onnx` file into a [`Network`], for graphs that are a
//! chain of supported operators from one input to one output.
//!
//! - `proto.rs`: the protobuf messages (only the fields read; numbers from onnx.proto).
//! - `tensor.rs`: constant tensors (raw, typed or external data), sizes checked first.
//! - `graph.rs`: the node list read as a chain; branches and merges are refused.
//! - `layers.rs`: the one place where operators become layers (Gemm, MatMul + Add, Conv,
//!   MaxPool, AveragePool, GlobalAveragePool, activations, BatchNormalization folded into
//!   the layer before, Flatten, Reshape).
//!
//! ONNX carries no input box: it comes from the caller ([`super::InputBox`]), else from
//! the model's `metadata_props` ([`META_LOW`], [`META_HIGH`]), else [`super::DEFAULT_BOX`].
//! Class labels, feature names and the features' physical units may also come from
//! `metadata_props` ([`META_LABELS`], [`META_NAMES`], [`META_UNITS`]). Errors name the
//! file, and for a node its name, operator type and
//! position, with what receptor reads instead.

mod graph;
mod layers;
mod proto;
mod tensor;

use super::{BoxOrigin, BoxSource, InputSpec, LoadOptions, Network};
use crate::error::{Error, Result};
use graph::Step;
use prost::Message;
use std::path::{Path, PathBuf};

/// `metadata_props` key of the input box's lower end: one number, or a comma-separated
/// list (one per input in receptor's order, or one per channel of an image).
pub const META_LOW: &str = "receptor.low";
/// `metadata_props` key of the input box's upper end (same form as [`META_LOW`]).
pub const META_HIGH: &str = "receptor.high";
/// `metadata_props` key of the output layer's class labels: a JSON array of strings.
pub const META_LABELS: &str = "receptor.labels";
/// `metadata_props` key of the input features' names: a JSON array of strings.
pub const META_NAMES: &str = "receptor.names";
/// `metadata_props` key of the input features' physical units (the schema's `input.units`,
/// e.g. `"degC"`, `"%"`, `"A"`): a JSON array of strings, one per input.
pub const META_UNITS: &str = "receptor.units";

/// Where the reader is and what it may do, for messages and external data.
#[derive(Debug)]
pub struct Context {
    /// The file as the user named it.
    pub origin: String,
    /// The model's folder (external data is resolved against it).
    pub base_dir: PathBuf,
    /// Allow external data outside the model's folder.
    pub allow_outside_paths: bool,
    /// Nodes in the graph (for "node 3 of 7").
    pub node_count: usize,
}

impl Context {
    /// An error about the whole file.
    pub fn error(&self, problem: impl Into<String>) -> Error {
        Error::model(&self.origin, problem)
    }

    /// An error about one node: its name, operator type, position, the problem and what
    /// receptor reads instead, on one line.
    pub fn node_error(&self, step: Step<'_>, problem: &str, instead: &str) -> Error {
        let name = if step.node.name.is_empty() {
            "(unnamed)".to_string()
        } else {
            format!("'{}'", step.node.name)
        };
        Error::model(
            &self.origin,
            format!(
                "node {name} ({}, node {} of {}): {problem}; {instead}",
                step.node.op_type,
                step.pos + 1,
                self.node_count
            ),
        )
    }
}

/// Reads an ONNX model from its bytes. `origin` names the file in messages; external data
/// is resolved against `base_dir`. Returns the validated network and where its box came
/// from.
pub fn from_bytes(
    bytes: &[u8],
    origin: &str,
    base_dir: &Path,
    opts: &LoadOptions,
) -> Result<(Network, BoxOrigin)> {
    let model = proto::ModelProto::decode(bytes)
        .map_err(|e| Error::model(origin, format!("not a readable ONNX file (protobuf: {e})")))?;
    let graph = model
        .graph
        .as_ref()
        .ok_or_else(|| Error::model(origin, "not an ONNX model: it has no graph"))?;
    let ctx = Context {
        origin: origin.to_string(),
        base_dir: base_dir.to_path_buf(),
        allow_outside_paths: opts.allow_outside_paths,
        node_count: graph.node.len(),
    };
    let chain = graph::chain(graph, &ctx)?;
    let lowered = layers::lower(&chain, &ctx)?;
    let meta = |key: &str| {
        model
            .metadata_props
            .iter()
            .find(|p| p.key == key)
            .map(|p| p.value.as_str())
    };

    let size = lowered.input_size;
    let (low, low_from) = side_of_box(
        &ctx,
        opts.input_box.low.as_deref(),
        meta(META_LOW),
        META_LOW,
        size,
        lowered.layout,
        -1.0,
    )?;
    let (high, high_from) = side_of_box(
        &ctx,
        opts.input_box.high.as_deref(),
        meta(META_HIGH),
        META_HIGH,
        size,
        lowered.layout,
        1.0,
    )?;
    let names = match meta(META_NAMES) {
        Some(text) => Some(string_list(&ctx, META_NAMES, text)?),
        None => None,
    };
    let units = match meta(META_UNITS) {
        Some(text) => Some(string_list(&ctx, META_UNITS, text)?),
        None => None,
    };
    let mut layers = lowered.layers;
    if let Some(text) = meta(META_LABELS)
        && let Some(last) = layers.last_mut()
    {
        last.labels = Some(string_list(&ctx, META_LABELS, text)?);
    }
    let name = if graph.name.is_empty() {
        Path::new(origin)
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "onnx model".to_string())
    } else {
        graph.name.clone()
    };
    let input = InputSpec {
        units,
        size,
        layout: lowered.layout,
        low,
        high,
        names,
    };
    let net = Network::new(origin, name, input, layers)?;
    Ok((
        net,
        BoxOrigin {
            low: low_from,
            high: high_from,
        },
    ))
}

/// One end of the box: given by the caller, else from the metadata key, else `default`.
fn side_of_box(
    ctx: &Context,
    given: Option<&[f32]>,
    meta: Option<&str>,
    key: &str,
    size: usize,
    layout: super::Layout,
    default: f32,
) -> Result<(Vec<f32>, BoxSource)> {
    if let Some(v) = given {
        let v = super::spread_box(v, size, layout).map_err(|p| ctx.error(p))?;
        return Ok((v, BoxSource::Given));
    }
    if let Some(text) = meta {
        let v = super::parse_box_values(text)
            .and_then(|v| super::spread_box(&v, size, layout))
            .map_err(|p| ctx.error(format!("metadata \"{key}\": {p}")))?;
        return Ok((v, BoxSource::Metadata));
    }
    Ok((vec![default; size], BoxSource::Default))
}

/// A JSON array of strings from metadata `key`.
fn string_list(ctx: &Context, key: &str, text: &str) -> Result<Vec<String>> {
    serde_json::from_str::<Vec<String>>(text).map_err(|e| {
        ctx.error(format!(
            "metadata \"{key}\" must be a JSON array of strings: {e}"
        ))
    })
}

#[cfg(test)]
mod tests;
