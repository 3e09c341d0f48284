//! Models: our open JSON schema `receptor-model/1` (dense layers) and `/2` (also
//! convolutional layers), optional safetensors side files, and
//! validation. Everything here turns bytes into a checked [`Network`]; nothing computes.
//!
//! The schema is described for other tools in `assets/model-schema.json` (JSON Schema
//! draft 2020-12).

mod json;
mod network;
mod paths;
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

/// Options for loading a model.
#[derive(Debug, Clone, Copy, Default)]
pub struct LoadOptions {
    /// Allow side-file paths that are absolute or climb out of the model's folder.
    pub allow_outside_paths: bool,
}

/// Reads and validates the model file at `path` (and its safetensors side files).
///
/// Errors name `path` as given and the exact problem; nothing large is allocated from a
/// declared size before the data backing it has been checked.
pub fn load(path: &Path, opts: &LoadOptions) -> Result<Network> {
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, "cannot read", e))?;
    if meta.is_dir() {
        return Err(Error::model(
            path,
            "is a folder, not a model file (expected a .json file)",
        ));
    }
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, "cannot read", e))?;
    let origin = path.display().to_string();
    let base = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => std::path::PathBuf::from("."),
    };
    from_json_bytes(&bytes, &origin, &base, opts)
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
    let parts = json::build(raw, origin, base_dir, opts)?;
    Network::from_parts(parts, origin)
}

#[cfg(test)]
mod tests;
