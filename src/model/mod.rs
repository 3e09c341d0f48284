//! Models: our open JSON schema `receptor-model/1` (dense layers) and `/2` (also
//! convolutional layers), optional safetensors side files, ONNX files (`onnx/`), and
//! validation. Everything here turns bytes into a checked [`Network`]; nothing computes.
//! [`load`] picks the reader by the file's extension, so every command and the app accept
//! both formats through one function.
//!
//! The schema is described for other tools in `assets/model-schema.json` (JSON Schema
//! draft 2020-12).

mod json;
mod network;
pub mod onnx;
mod paths;
pub mod series;
mod tensors;
mod tensors_write;
mod types;
mod validate;
mod write;

pub use network::Network;
pub use paths::{refuse_overwriting_model, resolve_side_path};
pub use tensors_write::{check_side_file_location, tensors_bytes, write_json_with_tensors};
pub use types::{
    Activation, Conv2d, InputSpec, Layer, LayerKind, Layout, NetworkParts, Pool2d,
    SIGMOID_SATURATION_Z, Shape, TANH_SATURATION_Z, window_output,
};
pub use write::{to_json_string, write_json, write_json_to};

use crate::error::{Error, Result};
use std::path::Path;

/// The schema tag of a model whose layers are all dense (read exactly as before version 2).
pub const SCHEMA_TAG: &str = "receptor-model/1";
/// The schema tag of a model with convolutional layers (conv2d, max_pool2d, avg_pool2d,
/// flatten); a version-2 file may also hold dense layers only.
pub const SCHEMA_TAG_2: &str = "receptor-model/2";

/// The input box used when neither the caller nor the model gives one: `[-1, 1]` for every
/// input (ONNX files carry no box).
pub const DEFAULT_BOX: (f32, f32) = (-1.0, 1.0);

/// Options for loading a model.
#[derive(Debug, Clone, Default)]
pub struct LoadOptions {
    /// Allow side-file paths (safetensors, ONNX external data) that are absolute or climb
    /// out of the model's folder.
    pub allow_outside_paths: bool,
    /// An input box given by the user, overriding the model's.
    pub input_box: InputBox,
}

/// An input box given by the user: each end one value (for every input), one value per
/// input, or one per channel of an image layout. `None` leaves that end to the model.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct InputBox {
    /// Lower end.
    pub low: Option<Vec<f32>>,
    /// Upper end.
    pub high: Option<Vec<f32>>,
}

/// Where one end of a network's input box came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BoxSource {
    /// Given by the user (`--low`/`--high`, or the app's box editor).
    Given,
    /// The receptor-model/1 file's `input.low`/`input.high`.
    ModelFile,
    /// An ONNX file's `metadata_props` ([`onnx::META_LOW`], [`onnx::META_HIGH`]).
    Metadata,
    /// Nobody gave one: [`DEFAULT_BOX`].
    Default,
}

/// Where a network's input box came from, end by end.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct BoxOrigin {
    /// The lower end's source.
    pub low: BoxSource,
    /// The upper end's source.
    pub high: BoxSource,
}

impl BoxOrigin {
    /// True when either end is the default [-1, 1] (bounds and preferred inputs depend on
    /// the box, so the fronts say so).
    pub fn uses_default(&self) -> bool {
        self.low == BoxSource::Default || self.high == BoxSource::Default
    }

    /// The notice both fronts show when [`BoxOrigin::uses_default`] (no way to change it
    /// named: each front words that itself).
    pub fn default_notice(&self) -> String {
        format!(
            "no input box in the model: using the default [{}, {}] for every input, and bounds, screening and preferred inputs depend on it",
            DEFAULT_BOX.0, DEFAULT_BOX.1
        )
    }

    /// A short phrase for the model summary: "given", "from the model file", "from the
    /// ONNX metadata", "default [-1, 1]", or both ends when they differ.
    pub fn describe(&self) -> String {
        fn one(s: BoxSource) -> String {
            match s {
                BoxSource::Given => "given".into(),
                BoxSource::ModelFile => "from the model file".into(),
                BoxSource::Metadata => "from the ONNX metadata".into(),
                BoxSource::Default => format!("default [{}, {}]", DEFAULT_BOX.0, DEFAULT_BOX.1),
            }
        }
        if self.low == self.high {
            one(self.low)
        } else {
            format!("low {}, high {}", one(self.low), one(self.high))
        }
    }
}

/// Parses one end of a box: one number or a comma-separated list of numbers, all finite.
pub fn parse_box_values(text: &str) -> std::result::Result<Vec<f32>, String> {
    let values = text
        .split(',')
        .map(|t| {
            let t = t.trim();
            t.parse::<f32>()
                .ok()
                .filter(|v| v.is_finite())
                .ok_or_else(|| format!("'{t}' is not a finite number"))
        })
        .collect::<std::result::Result<Vec<f32>, String>>()?;
    Ok(values)
}

/// One end of a box spread over `size` inputs: one value for all, `size` values as they
/// are, or, for an image layout, one value per channel (receptor's channel-last order).
pub fn spread_box(
    values: &[f32],
    size: usize,
    layout: Layout,
) -> std::result::Result<Vec<f32>, String> {
    match (values.len(), layout) {
        (1, _) => Ok(vec![values[0]; size]),
        (n, _) if n == size => Ok(values.to_vec()),
        (n, Layout::Image { channels, .. }) if n == channels => {
            Ok((0..size).map(|i| values[i % channels]).collect())
        }
        (n, Layout::Image { channels, .. }) => Err(format!(
            "the box has {n} values; give 1, one per channel ({channels}) or one per input ({size})"
        )),
        (n, Layout::Vector) => Err(format!(
            "the box has {n} values; give 1 or one per input ({size})"
        )),
    }
}

/// True when `path` names an ONNX file (extension `.onnx` in any letter case).
pub fn is_onnx(path: &Path) -> bool {
    path.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| e.eq_ignore_ascii_case("onnx"))
}

/// Reads and validates the model file at `path`: ONNX for a `.onnx` extension (any case),
/// else the receptor-model/1 JSON schema (with its safetensors side files).
///
/// Errors name `path` as given and the exact problem; nothing large is allocated from a
/// declared size before the data backing it has been checked.
pub fn load(path: &Path, opts: &LoadOptions) -> Result<Network> {
    load_with_origin(path, opts).map(|(net, _)| net)
}

/// [`load`], also saying where the input box came from (the fronts show it, and warn when
/// it is the default).
pub fn load_with_origin(path: &Path, opts: &LoadOptions) -> Result<(Network, BoxOrigin)> {
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, "cannot read", e))?;
    if meta.is_dir() {
        return Err(Error::model(
            path,
            "is a folder, not a model file (expected a .json or .onnx file)",
        ));
    }
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, "cannot read", e))?;
    let origin = path.display().to_string();
    let base = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => std::path::PathBuf::from("."),
    };
    if is_onnx(path) {
        onnx::from_bytes(&bytes, &origin, &base, opts)
    } else {
        let net = from_json_bytes(&bytes, &origin, &base, opts)?;
        let given = |g: &Option<Vec<f32>>| {
            if g.is_some() {
                BoxSource::Given
            } else {
                BoxSource::ModelFile
            }
        };
        Ok((
            net,
            BoxOrigin {
                low: given(&opts.input_box.low),
                high: given(&opts.input_box.high),
            },
        ))
    }
}

/// Parses and validates a model from JSON text. `origin` names the source in messages;
/// side-file paths are resolved against `base_dir`.
pub fn from_json_str(
    text: &str,
    origin: &str,
    base_dir: &Path,
    opts: &LoadOptions,
) -> Result<Network> {
    from_json_bytes(text.as_bytes(), origin, base_dir, opts)
}

/// Parses and validates a model from JSON bytes (see [`from_json_str`]).
pub fn from_json_bytes(
    bytes: &[u8],
    origin: &str,
    base_dir: &Path,
    opts: &LoadOptions,
) -> Result<Network> {
    let raw = json::parse(bytes, origin)?;
    let mut parts = json::build(raw, origin, base_dir, opts)?;
    // A box given by the user replaces the file's (checked with the rest by from_parts).
    for (given, end) in [
        (&opts.input_box.low, &mut parts.input.low),
        (&opts.input_box.high, &mut parts.input.high),
    ] {
        if let Some(v) = given {
            *end = spread_box(v, parts.input.size, parts.input.layout)
                .map_err(|p| Error::model(origin, format!("input box: {p}")))?;
        }
    }
    Network::from_parts(parts, origin)
}

#[cfg(test)]
mod tests;
