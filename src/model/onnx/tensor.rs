//! Constant tensors of an ONNX file (initializers and `Constant` values) as `f64` or `i64`
//! values: inline `raw_data` (little-endian), the typed fields, or an external data file
//! beside the model. Every size is checked against the bytes that back it before anything
//! is allocated from it.

use super::Context;
use super::proto::{self, TensorProto};
use crate::error::{Error, Result};
use std::io::{Read, Seek, SeekFrom};

/// A decoded constant: its shape and its values in row-major order (`[product of dims]`).
#[derive(Debug, Clone)]
pub struct Constant {
    /// The shape (every entry at least 0).
    pub dims: Vec<usize>,
    /// The values, widened to `f64` (float32, float16 and float64 are exact in it).
    pub values: Vec<f64>,
}

impl Constant {
    /// Number of elements.
    pub fn len(&self) -> usize {
        self.values.len()
    }
}

/// The shape of `t` and its number of elements, refusing negative or overflowing sizes.
fn shape(t: &TensorProto, what: &str) -> std::result::Result<(Vec<usize>, usize), String> {
    let mut dims = Vec::with_capacity(t.dims.len().min(16));
    let mut count: usize = 1;
    for &d in &t.dims {
        let d = usize::try_from(d).map_err(|_| format!("{what} has a negative size {d}"))?;
        count = count
            .checked_mul(d)
            .ok_or_else(|| format!("{what} has absurd dimensions {:?}", t.dims))?;
        dims.push(d);
    }
    Ok((dims, count))
}

/// Bytes per element of a floating-point `data_type`, or why it is not one we read.
fn float_width(data_type: i32, what: &str) -> std::result::Result<usize, String> {
    match data_type {
        proto::FLOAT => Ok(4),
        proto::FLOAT16 => Ok(2),
        proto::DOUBLE => Ok(8),
        other => Err(format!(
            "{what} has element type {other} ({}); receptor reads float32, float16 and float64 weights",
            type_name(other)
        )),
    }
}

/// The name of a `TensorProto.DataType` value (onnx.proto).
pub fn type_name(data_type: i32) -> &'static str {
    match data_type {
        1 => "float32",
        2 => "uint8",
        3 => "int8",
        4 => "uint16",
        5 => "int16",
        6 => "int32",
        7 => "int64",
        8 => "string",
        9 => "bool",
        10 => "float16",
        11 => "float64",
        12 => "uint32",
        13 => "uint64",
        16 => "bfloat16",
        _ => "unknown",
    }
}

/// Decodes a floating-point constant. `what` names it in messages ("initializer 'fc1.weight'").
pub fn floats(t: &TensorProto, what: &str, ctx: &Context) -> Result<Constant> {
    let problem = |p: String| Error::model(&ctx.origin, p);
    let (dims, count) = shape(t, what).map_err(problem)?;
    let width = float_width(t.data_type, what).map_err(problem)?;
    let values = if is_external(t) {
        let bytes = external_bytes(t, what, count, width, ctx)?;
        from_le(&bytes, t.data_type)
    } else if !t.raw_data.is_empty() || count == 0 {
        check_len(t.raw_data.len(), count, width, what).map_err(problem)?;
        from_le(&t.raw_data, t.data_type)
    } else {
        let found = match t.data_type {
            proto::FLOAT => t.float_data.len(),
            proto::FLOAT16 => t.int32_data.len(),
            _ => t.double_data.len(),
        };
        if found != count {
            return Err(problem(format!(
                "{what}: its shape {:?} needs {count} values but the file holds {found}",
                t.dims
            )));
        }
        match t.data_type {
            proto::FLOAT => t.float_data.iter().map(|&v| f64::from(v)).collect(),
            // float16 bit patterns sit in the low 16 bits of int32_data (onnx.proto).
            proto::FLOAT16 => t
                .int32_data
                .iter()
                .map(|&v| f64::from(half::f16::from_bits((v & 0xffff) as u16)))
                .collect(),
            _ => t.double_data.clone(),
        }
    };
    Ok(Constant { dims, values })
}

/// Decodes an integer constant (a `Reshape` target shape): int64 only.
pub fn ints(t: &TensorProto, what: &str, ctx: &Context) -> Result<(Vec<usize>, Vec<i64>)> {
    let problem = |p: String| Error::model(&ctx.origin, p);
    let (dims, count) = shape(t, what).map_err(problem)?;
    if t.data_type != proto::INT64 {
        return Err(problem(format!(
            "{what} has element type {} where int64 is expected",
            type_name(t.data_type)
        )));
    }
    let values = if is_external(t) {
        let bytes = external_bytes(t, what, count, 8, ctx)?;
        bytes
            .chunks_exact(8)
            .map(|c| i64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]))
            .collect()
    } else if !t.raw_data.is_empty() {
        check_len(t.raw_data.len(), count, 8, what).map_err(problem)?;
        t.raw_data
            .chunks_exact(8)
            .map(|c| i64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]))
            .collect()
    } else {
        if t.int64_data.len() != count {
            return Err(problem(format!(
                "{what}: its shape {:?} needs {count} values but the file holds {}",
                t.dims,
                t.int64_data.len()
            )));
        }
        t.int64_data.clone()
    };
    Ok((dims, values))
}

fn is_external(t: &TensorProto) -> bool {
    t.data_location == proto::EXTERNAL || !t.external_data.is_empty()
}

/// Checks that `bytes` is exactly `count` elements of `width` bytes.
fn check_len(
    bytes: usize,
    count: usize,
    width: usize,
    what: &str,
) -> std::result::Result<(), String> {
    match count.checked_mul(width) {
        Some(n) if n == bytes => Ok(()),
        Some(n) => Err(format!(
            "{what}: its shape needs {n} bytes of data but it holds {bytes}"
        )),
        None => Err(format!("{what}: its shape is too large to hold in memory")),
    }
}

/// Little-endian values of `data_type` (checked to be a float type whose width divides
/// `bytes.len()`), widened to `f64`.
fn from_le(bytes: &[u8], data_type: i32) -> Vec<f64> {
    match data_type {
        proto::FLOAT16 => bytes
            .chunks_exact(2)
            .map(|c| f64::from(half::f16::from_le_bytes([c[0], c[1]])))
            .collect(),
        proto::DOUBLE => bytes
            .chunks_exact(8)
            .map(|c| f64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]))
            .collect(),
        _ => bytes
            .chunks_exact(4)
            .map(|c| f64::from(f32::from_le_bytes([c[0], c[1], c[2], c[3]])))
            .collect(),
    }
}

/// Reads the `count * width` bytes of an external tensor, after checking the path (inside
/// the model's folder unless allowed), the offset and length against the file's size.
fn external_bytes(
    t: &TensorProto,
    what: &str,
    count: usize,
    width: usize,
    ctx: &Context,
) -> Result<Vec<u8>> {
    let problem = |p: String| Error::model(&ctx.origin, p);
    let mut location = None;
    let mut offset: u64 = 0;
    let mut length: Option<u64> = None;
    for e in &t.external_data {
        match e.key.as_str() {
            "location" => location = Some(e.value.as_str()),
            "offset" => {
                offset = e.value.trim().parse().map_err(|_| {
                    problem(format!(
                        "{what}: external data offset '{}' is not a whole number",
                        e.value
                    ))
                })?;
            }
            "length" => {
                length = Some(e.value.trim().parse().map_err(|_| {
                    problem(format!(
                        "{what}: external data length '{}' is not a whole number",
                        e.value
                    ))
                })?);
            }
            _ => {}
        }
    }
    let location = location.ok_or_else(|| {
        problem(format!(
            "{what}: its data is stored externally but no \"location\" is given"
        ))
    })?;
    let need = count
        .checked_mul(width)
        .ok_or_else(|| problem(format!("{what}: its shape is too large to hold in memory")))?;
    let need64 = need as u64;
    if let Some(l) = length
        && l != need64
    {
        return Err(problem(format!(
            "{what}: its shape needs {need} bytes but its external data length is {l}"
        )));
    }
    let path = crate::model::resolve_side_path(
        &ctx.origin,
        what,
        &ctx.base_dir,
        location,
        ctx.allow_outside_paths,
    )?;
    let mut f = std::fs::File::open(&path).map_err(|e| {
        problem(format!(
            "{what}: cannot open external data '{location}': {e}"
        ))
    })?;
    let size = f
        .metadata()
        .map_err(|e| {
            problem(format!(
                "{what}: cannot read external data '{location}': {e}"
            ))
        })?
        .len();
    if offset.checked_add(need64).is_none_or(|end| end > size) {
        return Err(problem(format!(
            "{what}: needs {need} bytes at offset {offset} of external data '{location}', which has {size} bytes"
        )));
    }
    let mut buf = vec![0u8; need];
    f.seek(SeekFrom::Start(offset))
        .and_then(|_| f.read_exact(&mut buf))
        .map_err(|e| {
            problem(format!(
                "{what}: cannot read external data '{location}': {e}"
            ))
        })?;
    Ok(buf)
}
