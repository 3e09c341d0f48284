//! Reading tensors from safetensors side files: bounds-checked before any tensor is read,
//! converted from f32, f16, bf16 or f64 to f32.

use super::paths::resolve_side_path;
use crate::error::{Error, Result};
use ndarray::{Array1, Array2};
use safetensors::{Dtype, SafeTensors};
use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// Side files opened while loading one model, each read once.
pub(crate) struct SideFiles<'a> {
    origin: &'a str,
    base_dir: &'a Path,
    allow_outside: bool,
    files: HashMap<PathBuf, Vec<u8>>,
}

impl<'a> SideFiles<'a> {
    pub(crate) fn new(origin: &'a str, base_dir: &'a Path, allow_outside: bool) -> Self {
        SideFiles {
            origin,
            base_dir,
            allow_outside,
            files: HashMap::new(),
        }
    }

    fn bytes(&mut self, rel: &str, what: &str) -> Result<(PathBuf, &[u8])> {
        let path = resolve_side_path(self.origin, what, self.base_dir, rel, self.allow_outside)?;
        if !self.files.contains_key(&path) {
            let meta = std::fs::metadata(&path).map_err(|e| {
                Error::model(
                    self.origin,
                    format!("{what}: cannot read side file {}: {e}", path.display()),
                )
            })?;
            if meta.is_dir() {
                return Err(Error::model(
                    self.origin,
                    format!("{what}: side file {} is a folder", path.display()),
                ));
            }
            let data = std::fs::read(&path).map_err(|e| {
                Error::model(
                    self.origin,
                    format!("{what}: cannot read side file {}: {e}", path.display()),
                )
            })?;
            self.files.insert(path.clone(), data);
        }
        let data = self.files.get(&path).map(Vec::as_slice).unwrap_or(&[]);
        Ok((path, data))
    }

    /// Reads tensor `name` of side file `rel` as f32 values with its shape.
    pub(crate) fn tensor(
        &mut self,
        rel: &str,
        name: &str,
        what: &str,
    ) -> Result<(Vec<usize>, Vec<f32>)> {
        self.read(rel, name, what)
    }

    /// Reads tensor `name` of side file `rel` as f32 values with its shape.
    fn read(&mut self, rel: &str, name: &str, what: &str) -> Result<(Vec<usize>, Vec<f32>)> {
        let origin = self.origin;
        let (path, bytes) = self.bytes(rel, what)?;
        let side = path.display().to_string();
        let err = |m: String| Error::model(origin, format!("{what}: {side}: {m}"));
        // SafeTensors::deserialize checks the header length against the file, the JSON
        // header, and that every tensor's offsets lie inside the data area and match its
        // dtype and shape, before we touch any tensor bytes.
        let st = SafeTensors::deserialize(bytes)
            .map_err(|e| err(format!("not a valid safetensors file: {e}")))?;
        let view = st.tensor(name).map_err(|_| {
            let mut names: Vec<String> = st.names().into_iter().map(str::to_string).collect();
            names.sort();
            let shown = if names.len() > 8 {
                format!("{}, ...", names[..8].join(", "))
            } else {
                names.join(", ")
            };
            err(format!("has no tensor \"{name}\" (it has: {shown})"))
        })?;
        let shape = view.shape().to_vec();
        let data = view.data();
        let values: Vec<f32> = match view.dtype() {
            Dtype::F32 => data
                .chunks_exact(4)
                .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
                .collect(),
            Dtype::F64 => data
                .chunks_exact(8)
                .map(|c| {
                    f64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]) as f32
                })
                .collect(),
            Dtype::F16 => data
                .chunks_exact(2)
                .map(|c| half::f16::from_le_bytes([c[0], c[1]]).to_f32())
                .collect(),
            Dtype::BF16 => data
                .chunks_exact(2)
                .map(|c| half::bf16::from_le_bytes([c[0], c[1]]).to_f32())
                .collect(),
            other => {
                return Err(err(format!(
                    "tensor \"{name}\" has dtype {other:?}; receptor reads F32, F16, BF16 or F64"
                )));
            }
        };
        let expected: usize = shape.iter().product();
        if values.len() != expected {
            return Err(err(format!(
                "tensor \"{name}\" holds {} values but its shape {shape:?} needs {expected}",
                values.len()
            )));
        }
        if let Some(i) = values.iter().position(|v| !v.is_finite()) {
            return Err(err(format!(
                "tensor \"{name}\" has a value that is not finite at flat index {i} ({})",
                values[i]
            )));
        }
        Ok((shape, values))
    }

    /// A weight matrix `[units, inputs]` from a side file.
    pub(crate) fn matrix(&mut self, rel: &str, name: &str, what: &str) -> Result<Array2<f32>> {
        let (shape, values) = self.read(rel, name, what)?;
        if shape.len() != 2 || shape[0] == 0 || shape[1] == 0 {
            return Err(Error::model(
                self.origin,
                format!(
                    "{what}: tensor \"{name}\" has shape {shape:?}; weights must be 2-D [units, inputs] with no zero dimension"
                ),
            ));
        }
        Array2::from_shape_vec((shape[0], shape[1]), values)
            .map_err(|e| Error::model(self.origin, format!("{what}: {e}")))
    }

    /// A bias vector `[units]` from a side file (shape `[units]` or `[units, 1]`).
    pub(crate) fn vector(&mut self, rel: &str, name: &str, what: &str) -> Result<Array1<f32>> {
        let (shape, values) = self.read(rel, name, what)?;
        let ok = shape.len() == 1 || (shape.len() == 2 && shape[1] == 1);
        if !ok {
            return Err(Error::model(
                self.origin,
                format!(
                    "{what}: tensor \"{name}\" has shape {shape:?}; a bias must be 1-D [units]"
                ),
            ));
        }
        Ok(Array1::from_vec(values))
    }
}
