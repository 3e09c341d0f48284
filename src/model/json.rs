//! Parsing the JSON model file into a raw, unchecked form, then building the
//! [`NetworkParts`] that [`super::Network::from_parts`] validates.
//!
//! Inline tensors are parsed straight into flat `f32` buffers (no per-number JSON values),
//! and problems inside a tensor (a string, a null, a ragged row, a value too large for
//! f32) are recorded with their row and column instead of aborting the parse, so that the
//! message can name the layer.

use super::tensors::SideFiles;
use super::types::{Activation, Conv2d, InputSpec, Layer, LayerKind, Layout, NetworkParts};
use super::{LoadOptions, SCHEMA_TAG, SCHEMA_TAG_2};
use crate::error::{Error, Result};
use ndarray::{Array1, Array2};
use serde::Deserialize;
use serde::de::{self, DeserializeSeed, Deserializer, IgnoredAny, MapAccess, SeqAccess, Visitor};
use std::fmt;
use std::path::Path;

/// The model file as written, before any check.
#[derive(Debug, Default)]
pub(crate) struct RawModel {
    schema: Option<serde_json::Value>,
    name: Option<String>,
    step: Option<serde_json::Value>,
    description: Option<String>,
    input: Option<RawInput>,
    layers: Option<Vec<RawLayer>>,
    extra: serde_json::Map<String, serde_json::Value>,
}

#[derive(Debug, Deserialize)]
struct RawInput {
    size: Option<serde_json::Value>,
    layout: Option<RawLayout>,
    low: Option<RawBound>,
    high: Option<RawBound>,
    names: Option<Vec<String>>,
    units: Option<Vec<String>>,
}

#[derive(Debug, Deserialize)]
struct RawLayout {
    kind: String,
    height: Option<u64>,
    width: Option<u64>,
    channels: Option<u64>,
}

#[derive(Debug, Deserialize)]
#[serde(untagged)]
enum RawBound {
    Scalar(f64),
    Array(Vec<f64>),
}

#[derive(Debug, Deserialize)]
struct RawLayer {
    name: Option<String>,
    #[serde(rename = "type")]
    kind: Option<String>,
    activation: Option<String>,
    alpha: Option<f64>,
    weights: Option<TensorSrc>,
    bias: Option<TensorSrc>,
    labels: Option<Vec<String>>,
    kernel: Option<serde_json::Value>,
    stride: Option<serde_json::Value>,
    padding: Option<serde_json::Value>,
    dilation: Option<serde_json::Value>,
    groups: Option<serde_json::Value>,
}

/// Where a tensor's values are: inline in the JSON, or in a safetensors side file.
#[derive(Debug)]
enum TensorSrc {
    Inline(InlineTensor),
    Side { file: String, tensor: String },
}

/// Deepest nesting of an inline tensor: 4-D (a conv2d's `[out, in, kh, kw]` weights).
const MAX_DIMS: usize = 4;

/// An inline tensor parsed into a flat buffer, with the first problem found (if any).
#[derive(Debug, Default)]
struct InlineTensor {
    data: Vec<f32>,
    /// Length of each row (the lists inside the outer list), or empty for a 1-D list.
    row_lens: Vec<usize>,
    /// `counts[d]`: the number of entries of every list at nesting level `d + 1` (level 1
    /// is a row of the outer list).
    counts: Vec<Vec<usize>>,
    /// True when the outer list held numbers (1-D).
    flat: bool,
    /// Bit `l` set when a list at nesting level `l` (0 = the outer list) holds numbers.
    leaf_levels: u8,
    /// Index path of the value being read.
    path: Vec<usize>,
    /// First problem: (index path, description).
    problem: Option<(Vec<usize>, String)>,
}

impl InlineTensor {
    fn note(&mut self, why: String) {
        if self.problem.is_none() {
            self.problem = Some((self.path.clone(), why));
        }
    }

    /// Records that a list at nesting `level` holds numbers.
    fn leaf_at(&mut self, level: usize) {
        self.leaf_levels |= 1 << level;
    }

    /// The first problem, including numbers at two depths of nesting (a ragged tensor).
    fn first_problem(&self) -> Option<String> {
        if let Some(p) = &self.problem {
            return Some(problem_text(p));
        }
        (self.leaf_levels.count_ones() > 1)
            .then(|| "numbers at different depths of nesting (a ragged tensor)".to_string())
    }
}

/// One JSON value inside a tensor list.
enum Cell {
    Num(f64),
    Row,
    Bad(String),
}

/// Deserialises one cell of a list at nesting `level` (0 = the outer list): a number or a
/// list one level deeper (recording into `t`).
struct CellSeed<'a> {
    t: &'a mut InlineTensor,
    level: usize,
}

impl<'de> DeserializeSeed<'de> for CellSeed<'_> {
    type Value = Cell;
    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<Cell, D::Error> {
        d.deserialize_any(self)
    }
}

impl<'de> Visitor<'de> for CellSeed<'_> {
    type Value = Cell;
    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("a number or a list of numbers")
    }
    fn visit_f64<E: de::Error>(self, v: f64) -> Result<Cell, E> {
        Ok(Cell::Num(v))
    }
    fn visit_i64<E: de::Error>(self, v: i64) -> Result<Cell, E> {
        Ok(Cell::Num(v as f64))
    }
    fn visit_u64<E: de::Error>(self, v: u64) -> Result<Cell, E> {
        Ok(Cell::Num(v as f64))
    }
    fn visit_str<E: de::Error>(self, v: &str) -> Result<Cell, E> {
        let shown: String = v.chars().take(20).collect();
        Ok(Cell::Bad(format!(
            "a string \"{shown}\" where a number belongs"
        )))
    }
    fn visit_bool<E: de::Error>(self, v: bool) -> Result<Cell, E> {
        Ok(Cell::Bad(format!("{v} where a number belongs")))
    }
    fn visit_unit<E: de::Error>(self) -> Result<Cell, E> {
        Ok(Cell::Bad("null where a number belongs".into()))
    }
    fn visit_none<E: de::Error>(self) -> Result<Cell, E> {
        self.visit_unit()
    }
    fn visit_map<A: MapAccess<'de>>(self, mut m: A) -> Result<Cell, A::Error> {
        while m.next_entry::<IgnoredAny, IgnoredAny>()?.is_some() {}
        Ok(Cell::Bad("an object where a number belongs".into()))
    }
    fn visit_seq<A: SeqAccess<'de>>(self, mut s: A) -> Result<Cell, A::Error> {
        // This list sits at nesting level `self.level + 1`.
        let level = self.level + 1;
        if level >= MAX_DIMS {
            while s.next_element::<IgnoredAny>()?.is_some() {}
            return Ok(Cell::Bad(format!(
                "a nested list where a number belongs (tensors have at most {MAX_DIMS} dimensions)"
            )));
        }
        let t = self.t;
        let start = t.data.len();
        let mut i = 0usize;
        let (mut saw_num, mut saw_list) = (false, false);
        loop {
            t.path.truncate(level);
            t.path.push(i);
            let Some(cell) = s.next_element_seed(CellSeed { t: &mut *t, level })? else {
                break;
            };
            t.path.truncate(level);
            t.path.push(i);
            match cell {
                Cell::Num(v) => {
                    if saw_list {
                        t.note("a number where a list belongs (a ragged tensor)".into());
                    }
                    saw_num = true;
                    push_number(t, v);
                }
                Cell::Row => {
                    if saw_num {
                        t.note("a nested list where a number belongs".into());
                    }
                    saw_list = true;
                }
                Cell::Bad(why) => {
                    t.note(why);
                    t.data.push(0.0);
                }
            }
            i += 1;
        }
        t.path.truncate(level);
        if saw_num {
            t.leaf_at(level);
        }
        if level == 1 {
            t.row_lens.push(t.data.len() - start);
        }
        if t.counts.len() < level {
            t.counts.resize_with(level, Vec::new);
        }
        t.counts[level - 1].push(i);
        Ok(Cell::Row)
    }
}

fn push_number(t: &mut InlineTensor, v: f64) {
    let x = v as f32;
    if !x.is_finite() {
        t.note(format!("the value {v} is not a finite 32-bit float"));
    }
    t.data.push(x);
}

struct TensorVisitor;

impl<'de> Visitor<'de> for TensorVisitor {
    type Value = TensorSrc;
    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str(
            "a list of numbers, a list of rows, or {\"safetensors\": FILE, \"tensor\": NAME}",
        )
    }
    fn visit_seq<A: SeqAccess<'de>>(self, mut s: A) -> Result<TensorSrc, A::Error> {
        let mut t = InlineTensor::default();
        let mut i = 0usize;
        let mut saw_rows = false;
        let mut saw_numbers = false;
        loop {
            t.path.clear();
            t.path.push(i);
            let Some(cell) = s.next_element_seed(CellSeed {
                t: &mut t,
                level: 0,
            })?
            else {
                break;
            };
            t.path.clear();
            t.path.push(i);
            match cell {
                Cell::Num(v) => {
                    saw_numbers = true;
                    push_number(&mut t, v);
                }
                Cell::Row => saw_rows = true,
                Cell::Bad(why) => t.note(why),
            }
            i += 1;
        }
        t.path.clear();
        if saw_rows && saw_numbers && t.problem.is_none() {
            t.problem = Some((vec![0], "a mix of numbers and rows".into()));
        }
        if saw_numbers {
            t.leaf_at(0);
        }
        t.flat = !saw_rows;
        Ok(TensorSrc::Inline(t))
    }
    fn visit_map<A: MapAccess<'de>>(self, mut m: A) -> Result<TensorSrc, A::Error> {
        let mut file = None;
        let mut tensor = None;
        while let Some(k) = m.next_key::<String>()? {
            match k.as_str() {
                "safetensors" => file = Some(m.next_value::<String>()?),
                "tensor" => tensor = Some(m.next_value::<String>()?),
                _ => {
                    m.next_value::<IgnoredAny>()?;
                }
            }
        }
        match (file, tensor) {
            (Some(file), Some(tensor)) => Ok(TensorSrc::Side { file, tensor }),
            _ => Err(de::Error::custom(
                "a tensor reference needs both \"safetensors\" (the file) and \"tensor\" (its name)",
            )),
        }
    }
}

impl<'de> Deserialize<'de> for TensorSrc {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        d.deserialize_any(TensorVisitor)
    }
}

struct ModelVisitor;

impl<'de> Visitor<'de> for ModelVisitor {
    type Value = RawModel;
    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("a JSON object (a receptor model)")
    }
    fn visit_map<A: MapAccess<'de>>(self, mut m: A) -> Result<RawModel, A::Error> {
        let mut raw = RawModel::default();
        while let Some(k) = m.next_key::<String>()? {
            match k.as_str() {
                "schema" => raw.schema = Some(m.next_value()?),
                "name" => raw.name = Some(m.next_value()?),
                "description" => raw.description = m.next_value()?,
                "step" => raw.step = Some(m.next_value()?),
                "input" => raw.input = Some(m.next_value()?),
                "layers" => raw.layers = Some(m.next_value()?),
                _ => {
                    let v: serde_json::Value = m.next_value()?;
                    raw.extra.insert(k, v);
                }
            }
        }
        Ok(raw)
    }
}

impl<'de> Deserialize<'de> for RawModel {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        d.deserialize_map(ModelVisitor)
    }
}

/// Parses JSON bytes into the raw form. Syntax errors and wrong JSON types become one
/// message with line and column.
pub(crate) fn parse(bytes: &[u8], origin: &str) -> Result<RawModel> {
    if bytes.iter().all(u8::is_ascii_whitespace) {
        return Err(Error::model(
            origin,
            "the file is empty (expected a JSON model)",
        ));
    }
    let text = std::str::from_utf8(bytes).map_err(|e| {
        Error::model(
            origin,
            format!(
                "not a JSON model: the file is not UTF-8 text (invalid byte at offset {})",
                e.valid_up_to()
            ),
        )
    })?;
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let mut de = serde_json::Deserializer::from_str(text);
    let raw = RawModel::deserialize(&mut de).map_err(|e| json_error(origin, &e))?;
    de.end().map_err(|e| json_error(origin, &e))?;
    Ok(raw)
}

fn json_error(origin: &str, e: &serde_json::Error) -> Error {
    use serde_json::error::Category;
    let what = match e.classify() {
        Category::Eof => "not valid JSON (the file ends too early; truncated?)",
        Category::Syntax => "not valid JSON",
        Category::Data => "does not follow the receptor-model schema",
        Category::Io => "cannot be read",
    };
    let mut msg = format!("{what}: {e}");
    if matches!(e.classify(), Category::Syntax)
        && (msg.contains("expected value") || msg.contains("invalid number"))
    {
        msg.push_str(" (NaN and Infinity are not JSON; weights must be finite numbers)");
    }
    Error::model(origin, msg)
}

fn layer_label(i: usize, name: Option<&str>) -> String {
    match name {
        Some(n) => format!("layer '{n}'"),
        None => format!("layer {i} (unnamed)"),
    }
}

/// Turns the raw form into [`NetworkParts`], reading side files and checking every declared
/// shape against the data it describes. Runs the cheap checks first (schema tag, input,
/// layer kinds) so that the first message is the most basic problem.
pub(crate) fn build(
    raw: RawModel,
    origin: &str,
    base_dir: &Path,
    opts: &LoadOptions,
) -> Result<NetworkParts> {
    let err = |msg: String| Error::model(origin, msg);
    let version = check_schema(raw.schema.as_ref()).map_err(err)?;
    let step = parse_step(raw.step.as_ref()).map_err(err)?;
    let input = raw
        .input
        .ok_or_else(|| err("missing \"input\" (size, layout, low, high)".into()))?;
    let layers_raw = raw
        .layers
        .ok_or_else(|| err("missing \"layers\" (a list of layers)".into()))?;
    if layers_raw.is_empty() {
        return Err(err(
            "\"layers\" is empty: a model needs at least one layer".into()
        ));
    }
    // Checked against the first layer's data before anything is allocated from it.
    let declared_size = declared_input_size(input.size.as_ref()).map_err(err)?;

    let mut side = SideFiles::new(origin, base_dir, opts.allow_outside_paths);
    let mut layers = Vec::with_capacity(layers_raw.len());
    let mut seen = std::collections::HashSet::new();
    let n_layers = layers_raw.len();
    for (i, l) in layers_raw.into_iter().enumerate() {
        layers.push(build_layer(
            i, n_layers, l, origin, version, &mut side, &mut seen,
        )?);
    }

    let size = if layers[0].kind == LayerKind::Dense {
        let first_fan_in = layers[0].fan_in();
        if declared_size != first_fan_in as u64 {
            return Err(err(format!(
                "input: \"size\" is {declared_size} but the first layer '{}' has {first_fan_in} weight columns",
                layers[0].name
            )));
        }
        first_fan_in
    } else {
        // A spatial first layer reads the image layout; its product is checked against
        // "size" below, before anything is allocated from it.
        let image = input
            .layout
            .as_ref()
            .filter(|l| l.kind == "image")
            .and_then(|l| {
                l.height?
                    .checked_mul(l.width?)?
                    .checked_mul(l.channels.unwrap_or(1))
            });
        match image {
            Some(n) if n == declared_size && n <= (1u64 << 32) => n as usize,
            Some(n) => {
                return Err(err(format!(
                    "input: image layout holds {n} values but \"size\" is {declared_size}"
                )));
            }
            None => {
                return Err(err(format!(
                    "layer '{}': a {} layer needs an image input layout (\"layout\": {{\"kind\": \"image\", \"height\": H, \"width\": W, \"channels\": C}})",
                    layers[0].name,
                    layers[0].kind.name()
                )));
            }
        }
    };
    let layout = parse_layout(input.layout, size).map_err(err)?;
    let low = expand_bound(input.low, -1.0, size, "low").map_err(|m| err(format!("input: {m}")))?;
    let high =
        expand_bound(input.high, 1.0, size, "high").map_err(|m| err(format!("input: {m}")))?;
    Ok(NetworkParts {
        step,
        name: raw.name.unwrap_or_default(),
        description: raw.description,
        input: InputSpec {
            size,
            layout,
            low,
            high,
            names: input.names,
            units: input.units,
        },
        layers,
        extra: raw.extra,
    })
}

/// The optional top-level `"step"`: a whole number from 0 (a training step).
pub(crate) fn parse_step(
    step: Option<&serde_json::Value>,
) -> std::result::Result<Option<u64>, String> {
    match step {
        None => Ok(None),
        Some(v) => v.as_u64().map(Some).ok_or_else(|| {
            format!("\"step\" must be a whole number from 0 (a training step), not {v}")
        }),
    }
}

/// The `"schema"` tag must be [`SCHEMA_TAG`] or [`SCHEMA_TAG_2`]; gives the version (1 or 2).
fn check_schema(schema: Option<&serde_json::Value>) -> std::result::Result<u8, String> {
    match schema {
        None => Err(format!(
            "missing \"schema\": a receptor model must say \"schema\": \"{SCHEMA_TAG}\" (or \"{SCHEMA_TAG_2}\" with convolutional layers)"
        )),
        Some(serde_json::Value::String(s)) if s == SCHEMA_TAG => Ok(1),
        Some(serde_json::Value::String(s)) if s == SCHEMA_TAG_2 => Ok(2),
        Some(other) => Err(format!(
            "unsupported schema {other}: this version of receptor reads \"{SCHEMA_TAG}\" and \"{SCHEMA_TAG_2}\""
        )),
    }
}

/// The input's declared `"size"`: a whole number of at least 1.
fn declared_input_size(size: Option<&serde_json::Value>) -> std::result::Result<u64, String> {
    match size {
        None => Err("input: missing \"size\"".into()),
        Some(v) => v.as_u64().filter(|&n| n >= 1).ok_or_else(|| {
            format!("input: \"size\" must be a whole number of at least 1, found {v}")
        }),
    }
}

/// Layer `i` of `n_layers`: its name (not one of `seen`, which it joins), kind and
/// activation, then its weights and bias read inline or from a side file. `version` is the
/// file's schema version: the layer types other than dense need version 2.
fn build_layer(
    i: usize,
    n_layers: usize,
    l: RawLayer,
    origin: &str,
    version: u8,
    side: &mut SideFiles<'_>,
    seen: &mut std::collections::HashSet<String>,
) -> Result<Layer> {
    let err = |msg: String| Error::model(origin, msg);
    let label = layer_label(i, l.name.as_deref());
    let name = match l.name {
        Some(ref n) if !n.is_empty() => n.clone(),
        _ => return Err(err(format!("{label}: missing or empty \"name\""))),
    };
    if !seen.insert(name.clone()) {
        return Err(err(format!(
            "layer name '{name}' is used twice; layer names must be unique"
        )));
    }
    const TYPES: &str =
        "dense; with \"schema\": \"receptor-model/2\" also conv2d, max_pool2d, avg_pool2d, flatten";
    let kind = match l.kind.as_deref() {
        Some("dense") => "dense",
        Some(t @ ("conv2d" | "max_pool2d" | "avg_pool2d" | "flatten")) => {
            if version < 2 {
                return Err(err(format!(
                    "{label}: layer type \"{t}\" needs \"schema\": \"{SCHEMA_TAG_2}\" (this file says \"{SCHEMA_TAG}\", which has dense layers only)"
                )));
            }
            t
        }
        None => {
            return Err(err(format!("{label}: missing \"type\" (one of: {TYPES})")));
        }
        Some(t) => {
            return Err(err(format!(
                "{label}: unsupported layer type \"{t}\" (supported: {TYPES})"
            )));
        }
    };
    let pair = |v: &Option<serde_json::Value>, key: &str, default: usize, min: usize| {
        parse_pair(v.as_ref(), default, min).map_err(|m| err(format!("{label}: \"{key}\" {m}")))
    };
    match kind {
        "max_pool2d" | "avg_pool2d" | "flatten" => {
            for (key, present) in [
                ("weights", l.weights.is_some()),
                ("bias", l.bias.is_some()),
                ("labels", l.labels.is_some()),
            ] {
                if present {
                    return Err(err(format!("{label}: a {kind} layer has no \"{key}\"")));
                }
            }
            if let Some(a) = l.activation.as_deref()
                && a != "identity"
            {
                return Err(err(format!(
                    "{label}: a {kind} layer has no activation (found \"{a}\")"
                )));
            }
            if kind == "flatten" {
                return Ok(Layer::flatten(name));
            }
            let kernel = match &l.kernel {
                None => return Err(err(format!("{label}: missing \"kernel\""))),
                k => pair(k, "kernel", 1, 1)?,
            };
            let stride = pair(&l.stride, "stride", 0, 1)?;
            let stride = if l.stride.is_none() { kernel } else { stride };
            let padding = pair(&l.padding, "padding", 0, 0)?;
            return Ok(if kind == "max_pool2d" {
                Layer::max_pool2d(name, kernel, stride, padding)
            } else {
                Layer::avg_pool2d(name, kernel, stride, padding)
            });
        }
        _ => {}
    }
    let activation = parse_activation(l.activation.as_deref(), l.alpha)
        .map_err(|m| err(format!("{label}: {m}")))?;
    if activation == Activation::Softmax && i + 1 != n_layers {
        return Err(err(format!(
            "{label}: softmax is allowed only in the last layer (this is layer {} of {n_layers})",
            i + 1
        )));
    }
    let weights_src = l
        .weights
        .ok_or_else(|| err(format!("{label}: missing \"weights\"")))?;
    let (weights, kind) = if kind == "conv2d" {
        if let Some(g) = &l.groups
            && g.as_u64() != Some(1)
        {
            return Err(err(format!(
                "{label}: \"groups\" {g} is not supported (only 1: grouped and depthwise convolutions are not read yet)"
            )));
        }
        if l.kernel.is_some() {
            return Err(err(format!(
                "{label}: a conv2d layer takes its kernel size from its weights [out_channels, in_channels, kernel_h, kernel_w]; drop \"kernel\""
            )));
        }
        let w4 = match weights_src {
            TensorSrc::Inline(t) => {
                inline_4d(t).map_err(|m| err(format!("{label}: weights: {m}")))?
            }
            TensorSrc::Side { file, tensor } => {
                let (shape, values) = side.tensor(&file, &tensor, &format!("{label} weights"))?;
                if shape.len() != 4 || shape.contains(&0) {
                    return Err(err(format!(
                        "{label}: weights: tensor \"{tensor}\" has shape {shape:?}; conv2d weights must be 4-D [out_channels, in_channels, kernel_h, kernel_w] with no zero dimension"
                    )));
                }
                ndarray::Array4::from_shape_vec((shape[0], shape[1], shape[2], shape[3]), values)
                    .map_err(|e| err(format!("{label}: weights: {e}")))?
            }
        };
        let (o, c, kh, kw) = w4.dim();
        let flat = w4
            .into_shape_with_order((o, c * kh * kw))
            .map_err(|e| err(format!("{label}: weights: {e}")))?;
        let geometry = Conv2d {
            in_channels: c,
            kernel: [kh, kw],
            stride: pair(&l.stride, "stride", 1, 1)?,
            padding: pair(&l.padding, "padding", 0, 0)?,
            dilation: pair(&l.dilation, "dilation", 1, 1)?,
        };
        (flat, LayerKind::Conv2d(geometry))
    } else {
        for (key, present) in [
            ("kernel", l.kernel.is_some()),
            ("stride", l.stride.is_some()),
            ("padding", l.padding.is_some()),
            ("dilation", l.dilation.is_some()),
            ("groups", l.groups.is_some()),
        ] {
            if present {
                return Err(err(format!("{label}: a dense layer has no \"{key}\"")));
            }
        }
        let w = match weights_src {
            TensorSrc::Inline(t) => {
                inline_matrix(t).map_err(|m| err(format!("{label}: weights: {m}")))?
            }
            TensorSrc::Side { file, tensor } => {
                side.matrix(&file, &tensor, &format!("{label} weights"))?
            }
        };
        (w, LayerKind::Dense)
    };
    let bias = match l.bias {
        None => Array1::zeros(weights.nrows()),
        Some(TensorSrc::Inline(t)) => {
            inline_vector(t).map_err(|m| err(format!("{label}: bias: {m}")))?
        }
        Some(TensorSrc::Side { file, tensor }) => {
            side.vector(&file, &tensor, &format!("{label} bias"))?
        }
    };
    Ok(Layer {
        name,
        kind,
        activation,
        weights,
        bias,
        labels: l.labels,
    })
}

/// A size given as one whole number or `[h, w]`, each at least `min`; `default` for both
/// when absent.
fn parse_pair(
    v: Option<&serde_json::Value>,
    default: usize,
    min: usize,
) -> std::result::Result<[usize; 2], String> {
    let one = |x: &serde_json::Value| -> std::result::Result<usize, String> {
        match x.as_u64() {
            Some(n) if n >= min as u64 && n <= (1 << 20) => Ok(n as usize),
            _ => Err(format!(
                "must be a whole number from {min} to {} (or a pair [h, w] of them), found {x}",
                1 << 20
            )),
        }
    };
    match v {
        None => Ok([default, default]),
        Some(serde_json::Value::Array(a)) if a.len() == 2 => Ok([one(&a[0])?, one(&a[1])?]),
        Some(serde_json::Value::Array(a)) => Err(format!(
            "must be one number or a pair [h, w], found a list of {}",
            a.len()
        )),
        Some(x) => {
            let n = one(x)?;
            Ok([n, n])
        }
    }
}

/// The input layout (vector when absent); an image's height x width x channels must be
/// `size`.
fn parse_layout(layout: Option<RawLayout>, size: usize) -> std::result::Result<Layout, String> {
    let Some(l) = layout else {
        return Ok(Layout::Vector);
    };
    match l.kind.as_str() {
        "vector" => Ok(Layout::Vector),
        "image" => {
            let (h, w, c) = match (l.height, l.width, l.channels) {
                (Some(h), Some(w), c) => (h, w, c.unwrap_or(1)),
                _ => {
                    return Err(
                        "input: an image layout needs \"height\" and \"width\" (and \"channels\", 1 or 3)"
                            .into(),
                    );
                }
            };
            if c != 1 && c != 3 {
                return Err(format!(
                    "input: image \"channels\" must be 1 or 3, found {c}"
                ));
            }
            let prod = h.checked_mul(w).and_then(|x| x.checked_mul(c));
            if prod != Some(size as u64) || h == 0 || w == 0 {
                return Err(format!(
                    "input: image layout {h} x {w} x {c} does not match \"size\" {size}"
                ));
            }
            Ok(Layout::Image {
                height: h as usize,
                width: w as usize,
                channels: c as usize,
            })
        }
        k => Err(format!(
            "input: unknown layout kind \"{k}\" (expected \"image\" or \"vector\")"
        )),
    }
}

fn parse_activation(
    name: Option<&str>,
    alpha: Option<f64>,
) -> std::result::Result<Activation, String> {
    Ok(match name {
        None => return Err("missing \"activation\"".into()),
        Some("identity") => Activation::Identity,
        Some("relu") => Activation::Relu,
        Some("leaky_relu") => {
            let a = alpha.unwrap_or(0.01);
            if !(0.0..=1.0).contains(&a) {
                return Err(format!(
                    "leaky_relu \"alpha\" must be between 0 and 1, found {a}"
                ));
            }
            Activation::LeakyRelu { alpha: a as f32 }
        }
        Some("sigmoid") => Activation::Sigmoid,
        Some("tanh") => Activation::Tanh,
        Some("softmax") => Activation::Softmax,
        Some(other) => {
            return Err(format!(
                "unknown activation \"{other}\" (expected identity, relu, leaky_relu, sigmoid, tanh or softmax)"
            ));
        }
    })
}

fn problem_text(p: &(Vec<usize>, String)) -> String {
    match p.0.as_slice() {
        [r, c] => format!("row {r}, column {c}: {}", p.1),
        [c] => format!("entry {c}: {}", p.1),
        path => format!("at index {path:?}: {}", p.1),
    }
}

fn inline_matrix(t: InlineTensor) -> std::result::Result<Array2<f32>, String> {
    if let Some(p) = t.first_problem() {
        return Err(p);
    }
    if t.flat {
        return Err(if t.data.is_empty() {
            "empty: a layer needs at least one unit (one row)".into()
        } else {
            "a flat list of numbers; weights must be a list of rows, one per unit".into()
        });
    }
    if t.counts.len() > 1 {
        return Err(
            "a nested list where a number belongs: a dense layer's weights are 2-D, a list of rows"
                .into(),
        );
    }
    let rows = t.row_lens.len();
    let cols = t.row_lens[0];
    if cols == 0 {
        return Err("row 0 is empty: every unit needs at least one incoming weight".into());
    }
    if let Some((r, &len)) = t.row_lens.iter().enumerate().find(|(_, l)| **l != cols) {
        return Err(format!(
            "row {r} has {len} values but row 0 has {cols}; every row must have the same length"
        ));
    }
    Array2::from_shape_vec((rows, cols), t.data).map_err(|e| e.to_string())
}

/// A 4-D inline tensor `[a, b, c, d]` (a conv2d's weights), every list of one level the
/// same length.
fn inline_4d(t: InlineTensor) -> std::result::Result<ndarray::Array4<f32>, String> {
    if let Some(p) = t.first_problem() {
        return Err(p);
    }
    let dims = if t.flat { 1 } else { 1 + t.counts.len() };
    if dims != 4 || t.leaf_levels != 1 << 3 {
        return Err(format!(
            "a {dims}-D list; conv2d weights are 4-D [out_channels, in_channels, kernel_h, kernel_w]"
        ));
    }
    let mut shape = vec![t.row_lens.len()];
    for (d, lens) in t.counts.iter().enumerate() {
        let first = lens.first().copied().unwrap_or(0);
        if lens.iter().any(|&l| l != first) {
            return Err(format!(
                "ragged: the lists at depth {} have different lengths",
                d + 2
            ));
        }
        shape.push(first);
    }
    if shape.contains(&0) {
        return Err(format!("shape {shape:?} has an empty dimension"));
    }
    ndarray::Array4::from_shape_vec((shape[0], shape[1], shape[2], shape[3]), t.data)
        .map_err(|e| format!("shape {shape:?}: {e}"))
}

fn inline_vector(t: InlineTensor) -> std::result::Result<Array1<f32>, String> {
    if let Some(p) = t.first_problem() {
        return Err(p);
    }
    if !t.flat {
        return Err("a list of rows; a bias must be a flat list of numbers".into());
    }
    Ok(Array1::from_vec(t.data))
}

fn expand_bound(
    b: Option<RawBound>,
    default: f32,
    size: usize,
    what: &str,
) -> std::result::Result<Vec<f32>, String> {
    match b {
        None => Ok(vec![default; size]),
        Some(RawBound::Scalar(v)) => {
            let x = v as f32;
            if !x.is_finite() {
                return Err(format!("\"{what}\" must be a finite number, found {v}"));
            }
            Ok(vec![x; size])
        }
        Some(RawBound::Array(a)) => {
            if a.len() != size {
                return Err(format!(
                    "\"{what}\" has {} values but the input has {size}",
                    a.len()
                ));
            }
            a.iter()
                .enumerate()
                .map(|(i, &v)| {
                    let x = v as f32;
                    if x.is_finite() {
                        Ok(x)
                    } else {
                        Err(format!(
                            "\"{what}\"[{i}] must be a finite number, found {v}"
                        ))
                    }
                })
                .collect()
        }
    }
}
