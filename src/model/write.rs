//! Writing a network back in the `receptor-model/1` schema (dense-only models) or `/2`
//! (with convolutional layers), with inline tensors.
//!
//! Numbers are printed in the shortest form that reads back to the same `f32`. The layout
//! is compact but readable: one line per weight row.

use super::Network;
use super::types::{Activation, LayerKind, Layout};
use super::{SCHEMA_TAG, SCHEMA_TAG_2};
use crate::error::Result;
use std::io::{self, Write};
use std::path::Path;

/// Writes `net` to `path` atomically (temporary file in the same folder, then rename).
pub fn write_json(net: &Network, path: &Path) -> Result<()> {
    crate::atomic::write_atomic(path, |w| write_json_to(net, w))
}

/// The model as a JSON string.
pub fn to_json_string(net: &Network) -> String {
    let mut buf = Vec::new();
    // Writing into a Vec cannot fail.
    let _ = write_json_to(net, &mut buf);
    String::from_utf8(buf).unwrap_or_default()
}

fn num(w: &mut dyn Write, x: f32) -> io::Result<()> {
    serde_json::to_writer(&mut *w, &x).map_err(io::Error::other)
}

fn json(w: &mut dyn Write, v: &impl serde::Serialize) -> io::Result<()> {
    serde_json::to_writer(&mut *w, v).map_err(io::Error::other)
}

fn list(w: &mut dyn Write, xs: impl IntoIterator<Item = f32>) -> io::Result<()> {
    w.write_all(b"[")?;
    for (i, x) in xs.into_iter().enumerate() {
        if i > 0 {
            w.write_all(b", ")?;
        }
        num(w, x)?;
    }
    w.write_all(b"]")
}

fn bound(w: &mut dyn Write, v: &[f32]) -> io::Result<()> {
    match v.first() {
        Some(&first) if v.iter().all(|&x| x == first) => num(w, first),
        _ => list(w, v.iter().copied()),
    }
}

/// Writes `net` as JSON into `w`.
pub fn write_json_to(net: &Network, w: &mut dyn Write) -> io::Result<()> {
    write_json_inner(net, w, None)
}

/// Writes `net` as JSON into `w`; with `side = Some(file)` every layer's weights and bias
/// are references `{"safetensors": file, "tensor": "NAME.weight" / "NAME.bias"}` instead of
/// inline numbers.
pub(crate) fn write_json_inner(
    net: &Network,
    w: &mut dyn Write,
    side: Option<&str>,
) -> io::Result<()> {
    w.write_all(b"{\n  \"schema\": ")?;
    // Dense-only models stay version 1, readable by every receptor.
    let tag = if net.is_dense_only() {
        SCHEMA_TAG
    } else {
        SCHEMA_TAG_2
    };
    json(w, &tag)?;
    w.write_all(b",\n  \"name\": ")?;
    json(w, &net.name())?;
    if let Some(step) = net.step() {
        write!(w, ",\n  \"step\": {step}")?;
    }
    if let Some(d) = net.description() {
        w.write_all(b",\n  \"description\": ")?;
        json(w, &d)?;
    }
    let inp = net.input();
    write!(w, ",\n  \"input\": {{\n    \"size\": {}", inp.size)?;
    match inp.layout {
        Layout::Vector => w.write_all(b",\n    \"layout\": {\"kind\": \"vector\"}")?,
        Layout::Image {
            height,
            width,
            channels,
        } => write!(
            w,
            ",\n    \"layout\": {{\"kind\": \"image\", \"height\": {height}, \"width\": {width}, \"channels\": {channels}}}"
        )?,
    }
    w.write_all(b",\n    \"low\": ")?;
    bound(w, &inp.low)?;
    w.write_all(b",\n    \"high\": ")?;
    bound(w, &inp.high)?;
    if let Some(names) = &inp.names {
        w.write_all(b",\n    \"names\": ")?;
        json(w, names)?;
    }
    if let Some(units) = &inp.units {
        w.write_all(b",\n    \"units\": ")?;
        json(w, units)?;
    }
    w.write_all(b"\n  },\n  \"layers\": [")?;
    for (i, l) in net.layers().iter().enumerate() {
        w.write_all(if i == 0 { b"\n    {" } else { b",\n    {" })?;
        w.write_all(b"\"name\": ")?;
        json(w, &l.name)?;
        w.write_all(b", \"type\": ")?;
        json(w, &l.kind.name())?;
        match l.kind {
            LayerKind::Flatten => {
                w.write_all(b"}")?;
                continue;
            }
            LayerKind::MaxPool2d(p) | LayerKind::AvgPool2d(p) => {
                write!(
                    w,
                    ", \"kernel\": [{}, {}], \"stride\": [{}, {}], \"padding\": [{}, {}]}}",
                    p.kernel[0], p.kernel[1], p.stride[0], p.stride[1], p.padding[0], p.padding[1]
                )?;
                continue;
            }
            LayerKind::Conv2d(c) => write!(
                w,
                ", \"stride\": [{}, {}], \"padding\": [{}, {}], \"dilation\": [{}, {}]",
                c.stride[0], c.stride[1], c.padding[0], c.padding[1], c.dilation[0], c.dilation[1]
            )?,
            LayerKind::Dense => {}
        }
        w.write_all(b", \"activation\": ")?;
        json(w, &l.activation.name())?;
        if let Activation::LeakyRelu { alpha } = l.activation {
            w.write_all(b", \"alpha\": ")?;
            num(w, alpha)?;
        }
        if let Some(labels) = &l.labels {
            w.write_all(b", \"labels\": ")?;
            json(w, labels)?;
        }
        if let Some(file) = side {
            let reference = |w: &mut dyn Write, tensor: String| -> io::Result<()> {
                w.write_all(b"{\"safetensors\": ")?;
                json(w, &file)?;
                w.write_all(b", \"tensor\": ")?;
                json(w, &tensor)?;
                w.write_all(b"}")
            };
            w.write_all(b",\n     \"weights\": ")?;
            reference(w, super::tensors_write::weight_name(&l.name))?;
            w.write_all(b",\n     \"bias\": ")?;
            reference(w, super::tensors_write::bias_name(&l.name))?;
            w.write_all(b"}")?;
            continue;
        }
        w.write_all(b",\n     \"weights\": [")?;
        for (r, row) in l.weights.rows().into_iter().enumerate() {
            w.write_all(if r == 0 { b"\n      " } else { b",\n      " })?;
            match l.kind {
                // One filter [in_channels, kernel_h, kernel_w] as nested lists.
                LayerKind::Conv2d(c) => {
                    let (kh, kw) = (c.kernel[0], c.kernel[1]);
                    w.write_all(b"[")?;
                    for ch in 0..c.in_channels {
                        w.write_all(if ch == 0 { b"[" } else { b", [" })?;
                        for y in 0..kh {
                            if y > 0 {
                                w.write_all(b", ")?;
                            }
                            let at = (ch * kh + y) * kw;
                            list(w, row.iter().skip(at).take(kw).copied())?;
                        }
                        w.write_all(b"]")?;
                    }
                    w.write_all(b"]")?;
                }
                _ => list(w, row.iter().copied())?,
            }
        }
        w.write_all(b"\n     ],\n     \"bias\": ")?;
        list(w, l.bias.iter().copied())?;
        w.write_all(b"}")?;
    }
    w.write_all(b"\n  ]")?;
    for (k, v) in net.extra() {
        w.write_all(b",\n  ")?;
        json(w, k)?;
        w.write_all(b": ")?;
        json(w, v)?;
    }
    w.write_all(b"\n}\n")
}
