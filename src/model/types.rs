//! The plain data a network is made of: the input's layout and box, activations, layers,
//! and [`NetworkParts`], an unchecked network that [`super::Network::from_parts`] validates.

use ndarray::{Array1, Array2};

/// How the input vector is laid out, for drawing maps and for the total-variation penalty.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Layout {
    /// Tabular features, drawn as a strip.
    Vector,
    /// An image patch: `height x width x channels`, row-major, channel last.
    Image {
        /// Rows of the patch.
        height: usize,
        /// Columns of the patch.
        width: usize,
        /// 1 (grey) or 3 (RGB).
        channels: usize,
    },
}

/// The input domain and layout of a network.
#[derive(Debug, Clone, PartialEq)]
pub struct InputSpec {
    /// Number of input features.
    pub size: usize,
    /// How the features are arranged.
    pub layout: Layout,
    /// Lower end of the input box, one value per input: `[size]`.
    pub low: Vec<f32>,
    /// Upper end of the input box, one value per input: `[size]`.
    pub high: Vec<f32>,
    /// Optional feature names: `[size]`.
    pub names: Option<Vec<String>>,
    /// Optional physical units of the features (`"degC"`, `"%"`, `"A"`; empty for none):
    /// `[size]`.
    pub units: Option<Vec<String>>,
}

impl InputSpec {
    /// A feature vector of `size` unnamed inputs, each in `[low, high]` (not checked here;
    /// [`super::Network::new`] validates).
    pub fn vector_box(size: usize, low: f32, high: f32) -> InputSpec {
        InputSpec {
            size,
            layout: Layout::Vector,
            low: vec![low; size],
            high: vec![high; size],
            names: None,
            units: None,
        }
    }

    /// The name of input `i`: its feature name, or `x{i}`.
    pub fn feature_name(&self, i: usize) -> String {
        match &self.names {
            Some(n) if i < n.len() => n[i].clone(),
            _ => format!("x{i}"),
        }
    }

    /// The unit of input `i`, when the model names one (an empty string counts as none).
    pub fn feature_unit(&self, i: usize) -> Option<&str> {
        self.units
            .as_ref()
            .and_then(|u| u.get(i))
            .map(String::as_str)
            .filter(|u| !u.is_empty())
    }

    /// The centre of the input box: `[size]`.
    pub fn centre(&self) -> Vec<f32> {
        self.low
            .iter()
            .zip(&self.high)
            .map(|(l, h)| 0.5 * (l + h))
            .collect()
    }
}

/// A unit's activation function.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Activation {
    /// `a = z`.
    Identity,
    /// `a = max(z, 0)`.
    Relu,
    /// `a = z` for `z > 0`, else `alpha * z` (0 <= alpha <= 1).
    LeakyRelu {
        /// Slope for negative inputs.
        alpha: f32,
    },
    /// The logistic function `1 / (1 + exp(-z))`, range (0, 1).
    Sigmoid,
    /// `tanh(z)`, range (-1, 1).
    Tanh,
    /// Softmax over the layer's units; allowed in the last layer only.
    Softmax,
}

/// |z| at and beyond which a sigmoid unit counts as saturated: its slope is below 5% of the
/// peak slope 1/4. Normative constant of the `screen` contract (solves
/// sigma(z)(1 - sigma(z)) = 0.0125).
pub const SIGMOID_SATURATION_Z: f64 = 4.3565;
/// |z| at and beyond which a tanh unit counts as saturated: 1 - tanh(z)^2 < 0.05.
/// Normative constant of the `screen` contract.
pub const TANH_SATURATION_Z: f64 = 2.1783;

impl Activation {
    /// The schema's name of this activation.
    pub fn name(&self) -> &'static str {
        match self {
            Activation::Identity => "identity",
            Activation::Relu => "relu",
            Activation::LeakyRelu { .. } => "leaky_relu",
            Activation::Sigmoid => "sigmoid",
            Activation::Tanh => "tanh",
            Activation::Softmax => "softmax",
        }
    }

    /// True for `relu` and `leaky_relu`, the units that can be dead.
    pub fn is_rectifier(&self) -> bool {
        matches!(self, Activation::Relu | Activation::LeakyRelu { .. })
    }

    /// Applies an element-wise activation to one value. Softmax is not element-wise; for it
    /// this returns `z` unchanged (use [`Activation::apply_rows`]).
    #[inline]
    pub fn apply_scalar(&self, z: f32) -> f32 {
        match *self {
            Activation::Identity | Activation::Softmax => z,
            Activation::Relu => z.max(0.0),
            Activation::LeakyRelu { alpha } => {
                if z > 0.0 {
                    z
                } else {
                    alpha * z
                }
            }
            Activation::Sigmoid => 1.0 / (1.0 + (-z).exp()),
            Activation::Tanh => z.tanh(),
        }
    }

    /// The derivative da/dz of an element-wise activation at pre-activation `z`.
    /// (At the kink of a rectifier the derivative from the left is used.)
    #[inline]
    pub fn derivative_scalar(&self, z: f32) -> f32 {
        match *self {
            Activation::Identity | Activation::Softmax => 1.0,
            Activation::Relu => {
                if z > 0.0 {
                    1.0
                } else {
                    0.0
                }
            }
            Activation::LeakyRelu { alpha } => {
                if z > 0.0 {
                    1.0
                } else {
                    alpha
                }
            }
            // Where `s (1 - s)` or `1 - t^2` rounds to exactly 0 in f32 (|z| beyond about 17
            // or 9), the same derivative written without the cancellation, e^-|z| /
            // (1 + e^-|z|)^2 or sech^2 z, stays positive until it underflows: a saturated
            // unit keeps a (tiny) gradient to follow. Elsewhere the usual form is kept.
            Activation::Sigmoid => {
                let s = 1.0 / (1.0 + (-z).exp());
                let d = s * (1.0 - s);
                if d > 0.0 {
                    d
                } else {
                    let e = (-z.abs()).exp();
                    e / ((1.0 + e) * (1.0 + e))
                }
            }
            Activation::Tanh => {
                let t = z.tanh();
                let d = 1.0 - t * t;
                if d > 0.0 {
                    d
                } else {
                    let c = z.cosh();
                    1.0 / (c * c)
                }
            }
        }
    }

    /// Applies the activation to a batch of pre-activations `z: [samples, units]`, in place.
    /// Softmax is taken over each row, stabilised by subtracting the row maximum.
    pub fn apply_rows(&self, z: &mut Array2<f32>) {
        match self {
            Activation::Identity => {}
            Activation::Softmax => {
                for mut row in z.rows_mut() {
                    let m = row.iter().copied().fold(f32::NEG_INFINITY, f32::max);
                    let mut s = 0.0f64;
                    for v in row.iter_mut() {
                        *v = (*v - m).exp();
                        s += f64::from(*v);
                    }
                    let inv = (1.0 / s) as f32;
                    row.mapv_inplace(|v| v * inv);
                }
            }
            a => z.mapv_inplace(|v| a.apply_scalar(v)),
        }
    }
}

/// The shape of the values a layer gives (or the input, as the first layer sees it).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Shape {
    /// A plain vector of features.
    Vector(usize),
    /// A stack of 2-D maps, `[channels, height, width]`. Between layers a map is stored
    /// channel first (PyTorch's order: channel, then row, then column); the network's
    /// input keeps its own layout (row-major, channel last).
    Map {
        /// Channels (feature maps).
        channels: usize,
        /// Rows of each map.
        height: usize,
        /// Columns of each map.
        width: usize,
    },
}

impl Shape {
    /// Number of values: the vector's length or `channels x height x width`.
    pub fn len(&self) -> usize {
        match *self {
            Shape::Vector(n) => n,
            Shape::Map {
                channels,
                height,
                width,
            } => channels * height * width,
        }
    }

    /// True when the shape holds no value.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Positions per channel: `height x width` of a map, 1 for a vector.
    pub fn positions(&self) -> usize {
        match *self {
            Shape::Vector(_) => 1,
            Shape::Map { height, width, .. } => height * width,
        }
    }

    /// Channels of a map; the length of a vector (each entry is its own "channel").
    pub fn channels(&self) -> usize {
        match *self {
            Shape::Vector(n) => n,
            Shape::Map { channels, .. } => channels,
        }
    }

    /// The centre position `(row, column)` of a map (`(h / 2, w / 2)`, rounded down);
    /// `(0, 0)` for a vector.
    pub fn centre(&self) -> (usize, usize) {
        match *self {
            Shape::Vector(_) => (0, 0),
            Shape::Map { height, width, .. } => (height / 2, width / 2),
        }
    }

    /// The flat index of unit / channel `channel` at position `(row, col)`:
    /// `(channel x height + row) x width + col` for a map (channel first), `channel` for a
    /// vector (the position is ignored).
    pub fn index(&self, channel: usize, (row, col): (usize, usize)) -> usize {
        match *self {
            Shape::Vector(_) => channel,
            Shape::Map { height, width, .. } => (channel * height + row) * width + col,
        }
    }

    /// The shape in words: `"64 values"` or `"16 x 30 x 30 map (channels x height x width)"`.
    pub fn describe(&self) -> String {
        match *self {
            Shape::Vector(n) => format!("a vector of {n} values"),
            Shape::Map {
                channels,
                height,
                width,
            } => format!("a {channels} x {height} x {width} map (channels x height x width)"),
        }
    }
}

/// The geometry of a 2-D convolution (zero padding, no groups). Sizes are `[rows, columns]`.
///
/// Output size per axis (PyTorch's `nn.Conv2d` docs):
/// `out = floor((in + 2 padding - dilation (kernel - 1) - 1) / stride) + 1`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Conv2d {
    /// Input channels each filter reads.
    pub in_channels: usize,
    /// Kernel size `[kernel_h, kernel_w]`.
    pub kernel: [usize; 2],
    /// Step between neighbouring outputs, in input pixels, `[h, w]` (at least 1).
    pub stride: [usize; 2],
    /// Zeros added on each side, `[h, w]`.
    pub padding: [usize; 2],
    /// Spacing between kernel taps, `[h, w]` (at least 1; 1 is a plain kernel).
    pub dilation: [usize; 2],
}

/// The geometry of a 2-D pooling window (max or average). Sizes are `[rows, columns]`.
///
/// Average pooling counts padded cells as zeros and always divides by `kernel_h x
/// kernel_w` (PyTorch's default `count_include_pad=True`); max pooling ignores padded cells.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Pool2d {
    /// Window size `[h, w]`.
    pub kernel: [usize; 2],
    /// Step between windows `[h, w]` (at least 1; the schema's default is the kernel).
    pub stride: [usize; 2],
    /// Padding on each side `[h, w]` (at most half the kernel, as in PyTorch).
    pub padding: [usize; 2],
}

/// Output length of one axis of a sliding window (PyTorch's formula, `ceil_mode=False`), or
/// `None` when the window does not fit in the padded input once (or a stride is 0).
pub fn window_output(
    input: usize,
    kernel: usize,
    stride: usize,
    padding: usize,
    dilation: usize,
) -> Option<usize> {
    if stride == 0 || kernel == 0 || dilation == 0 {
        return None;
    }
    let span = dilation.checked_mul(kernel - 1)?.checked_add(1)?;
    let padded = input.checked_add(padding.checked_mul(2)?)?;
    if span > padded {
        return None;
    }
    Some((padded - span) / stride + 1)
}

/// What a layer computes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum LayerKind {
    /// `z = W x + b` on a vector; weights `[units, inputs]`.
    Dense,
    /// A 2-D convolution (cross-correlation, as PyTorch computes it) of a
    /// `[in_channels, height, width]` map; weights `[out_channels, in_channels x kernel_h x
    /// kernel_w]` (PyTorch's `[out, in, kh, kw]` weight with the last three axes flattened
    /// in that order); one unit per output channel.
    Conv2d(Conv2d),
    /// The largest value in each window, per channel; no weights, no activation.
    MaxPool2d(Pool2d),
    /// The mean of each window, per channel; no weights, no activation.
    AvgPool2d(Pool2d),
    /// A `[channels, height, width]` map as a vector in PyTorch order (channel, row,
    /// column); no weights, no activation.
    Flatten,
}

impl LayerKind {
    /// The schema's name of the layer type.
    pub fn name(&self) -> &'static str {
        match self {
            LayerKind::Dense => "dense",
            LayerKind::Conv2d(_) => "conv2d",
            LayerKind::MaxPool2d(_) => "max_pool2d",
            LayerKind::AvgPool2d(_) => "avg_pool2d",
            LayerKind::Flatten => "flatten",
        }
    }

    /// True for the kinds with weights, a bias and an activation (dense, conv2d).
    pub fn has_weights(&self) -> bool {
        matches!(self, LayerKind::Dense | LayerKind::Conv2d(_))
    }

    /// True for the kinds that work on maps (conv2d and the poolings).
    pub fn is_spatial(&self) -> bool {
        matches!(
            self,
            LayerKind::Conv2d(_) | LayerKind::MaxPool2d(_) | LayerKind::AvgPool2d(_)
        )
    }
}

/// One layer: `a = activation(op(x))`, where `op` is the kind's computation (for dense and
/// conv2d layers `op(x) = W x + b`).
///
/// Make one with [`Layer::dense`], [`Layer::conv2d`], [`Layer::max_pool2d`],
/// [`Layer::avg_pool2d`] or [`Layer::flatten`]; the network checks it against the layer
/// below when it is built.
#[derive(Debug, Clone, PartialEq)]
pub struct Layer {
    /// Unique name within the network.
    pub name: String,
    /// What the layer computes, with its geometry.
    pub kind: LayerKind,
    /// The units' activation function (identity for pooling and flatten).
    pub activation: Activation,
    /// Incoming weights, one row per unit: dense `[units, inputs]` (the orientation of
    /// PyTorch's `nn.Linear.weight`); conv2d `[out_channels, in_channels x kernel_h x
    /// kernel_w]` (one filter per row, in PyTorch's order); pooling and flatten `[0, 0]`.
    pub weights: Array2<f32>,
    /// Biases, `[units]` (`[0]` for pooling and flatten).
    pub bias: Array1<f32>,
    /// Optional unit names (class labels on the last layer), `[units]`.
    pub labels: Option<Vec<String>>,
}

impl Layer {
    /// A dense layer: `weights: [units, inputs]`, `bias: [units]`.
    pub fn dense(
        name: impl Into<String>,
        activation: Activation,
        weights: Array2<f32>,
        bias: Array1<f32>,
    ) -> Layer {
        Layer {
            name: name.into(),
            kind: LayerKind::Dense,
            activation,
            weights,
            bias,
            labels: None,
        }
    }

    /// A 2-D convolution from PyTorch-shaped weights `[out_channels, in_channels, kernel_h,
    /// kernel_w]` (`nn.Conv2d.weight`) and `bias: [out_channels]`; `stride`, `padding` and
    /// `dilation` are `[h, w]`.
    pub fn conv2d(
        name: impl Into<String>,
        activation: Activation,
        weights: ndarray::Array4<f32>,
        bias: Array1<f32>,
        stride: [usize; 2],
        padding: [usize; 2],
        dilation: [usize; 2],
    ) -> Layer {
        let (o, i, kh, kw) = weights.dim();
        let flat: Vec<f32> = weights.iter().copied().collect();
        let weights = Array2::from_shape_vec((o, i * kh * kw), flat)
            .unwrap_or_else(|_| Array2::zeros((o, i * kh * kw)));
        Layer {
            name: name.into(),
            kind: LayerKind::Conv2d(Conv2d {
                in_channels: i,
                kernel: [kh, kw],
                stride,
                padding,
                dilation,
            }),
            activation,
            weights,
            bias,
            labels: None,
        }
    }

    fn parameterless(name: impl Into<String>, kind: LayerKind) -> Layer {
        Layer {
            name: name.into(),
            kind,
            activation: Activation::Identity,
            weights: Array2::zeros((0, 0)),
            bias: Array1::zeros(0),
            labels: None,
        }
    }

    /// A max pooling layer (`nn.MaxPool2d(kernel, stride, padding)`), sizes `[h, w]`.
    pub fn max_pool2d(
        name: impl Into<String>,
        kernel: [usize; 2],
        stride: [usize; 2],
        padding: [usize; 2],
    ) -> Layer {
        Layer::parameterless(
            name,
            LayerKind::MaxPool2d(Pool2d {
                kernel,
                stride,
                padding,
            }),
        )
    }

    /// An average pooling layer (`nn.AvgPool2d(kernel, stride, padding)`, padded cells
    /// counted), sizes `[h, w]`. A kernel as large as the map is a global average pooling.
    pub fn avg_pool2d(
        name: impl Into<String>,
        kernel: [usize; 2],
        stride: [usize; 2],
        padding: [usize; 2],
    ) -> Layer {
        Layer::parameterless(
            name,
            LayerKind::AvgPool2d(Pool2d {
                kernel,
                stride,
                padding,
            }),
        )
    }

    /// A flatten layer (`nn.Flatten()`): a map becomes a vector in channel, row, column
    /// order.
    pub fn flatten(name: impl Into<String>) -> Layer {
        Layer::parameterless(name, LayerKind::Flatten)
    }

    /// Number of units in this layer: dense units or conv2d output channels (0 for pooling
    /// and flatten, which have no units of their own).
    pub fn units(&self) -> usize {
        self.weights.nrows()
    }

    /// Number of inputs of each unit: the layer below's values for dense,
    /// `in_channels x kernel_h x kernel_w` for conv2d (0 for pooling and flatten).
    pub fn fan_in(&self) -> usize {
        self.weights.ncols()
    }

    /// True for layers with weights (dense, conv2d).
    pub fn has_weights(&self) -> bool {
        self.kind.has_weights()
    }

    /// The shape this layer gives for an input of shape `input`, or what is wrong (the
    /// message names neither the layer nor the source; validation adds them).
    pub fn output_shape(&self, input: Shape) -> std::result::Result<Shape, String> {
        output_shape(self, input, "the layer below")
    }

    /// The name of unit `k`: its label, or `{prefix}{k}`.
    pub fn unit_name(&self, k: usize, prefix: &str) -> String {
        match &self.labels {
            Some(l) if k < l.len() => l[k].clone(),
            _ => format!("{prefix}{k}"),
        }
    }
}

/// See [`Layer::output_shape`]; `below` names what lies below in messages ("'c1'", "the
/// input").
pub(crate) fn output_shape(
    l: &Layer,
    input: Shape,
    below: &str,
) -> std::result::Result<Shape, String> {
    let map = |what: &str| match input {
        Shape::Map {
            channels,
            height,
            width,
        } => Ok((channels, height, width)),
        Shape::Vector(n) => Err(format!(
            "a {what} layer needs a map [channels, height, width] below it, but {below} gives a vector of {n} values (it needs an image input layout, or a convolution or pooling below)"
        )),
    };
    match l.kind {
        LayerKind::Dense => match input {
            Shape::Vector(n) => {
                if l.fan_in() == n {
                    Ok(Shape::Vector(l.units()))
                } else {
                    Err(format!(
                        "weights have {} columns but {below} gives {n} values",
                        l.fan_in()
                    ))
                }
            }
            Shape::Map { .. } => Err(format!(
                "a dense layer after a spatial map needs a flatten first: {below} gives {}",
                input.describe()
            )),
        },
        LayerKind::Conv2d(c) => {
            let (ch, h, w) = map("conv2d")?;
            if c.in_channels != ch {
                return Err(format!(
                    "weights expect {} input channels but {below} gives {ch} ({})",
                    c.in_channels,
                    input.describe()
                ));
            }
            if c.in_channels * c.kernel[0] * c.kernel[1] != l.fan_in() {
                return Err(format!(
                    "weights have {} values per filter but {} input channels x {} x {} kernel need {}",
                    l.fan_in(),
                    c.in_channels,
                    c.kernel[0],
                    c.kernel[1],
                    c.in_channels * c.kernel[0] * c.kernel[1]
                ));
            }
            let (oh, ow) =
                window_sizes((h, w), c.kernel, c.stride, c.padding, c.dilation, "kernel")?;
            Ok(Shape::Map {
                channels: l.units(),
                height: oh,
                width: ow,
            })
        }
        LayerKind::MaxPool2d(p) | LayerKind::AvgPool2d(p) => {
            let (ch, h, w) = map(l.kind.name())?;
            for a in 0..2 {
                if p.padding[a] * 2 > p.kernel[a] {
                    return Err(format!(
                        "padding {:?} must be at most half the kernel {:?} (as in PyTorch)",
                        p.padding, p.kernel
                    ));
                }
            }
            let (oh, ow) = window_sizes((h, w), p.kernel, p.stride, p.padding, [1, 1], "window")?;
            Ok(Shape::Map {
                channels: ch,
                height: oh,
                width: ow,
            })
        }
        LayerKind::Flatten => match input {
            Shape::Map { .. } => Ok(Shape::Vector(input.len())),
            Shape::Vector(n) => Err(format!(
                "flatten is in the wrong place: it needs a map below it, but {below} gives a vector of {n} values"
            )),
        },
    }
}

/// The output `(height, width)` of a sliding window, or why there is none.
fn window_sizes(
    (h, w): (usize, usize),
    kernel: [usize; 2],
    stride: [usize; 2],
    padding: [usize; 2],
    dilation: [usize; 2],
    what: &str,
) -> std::result::Result<(usize, usize), String> {
    if stride.contains(&0) {
        return Err(format!("stride {stride:?} must be at least 1"));
    }
    if kernel.contains(&0) {
        return Err(format!("{what} {kernel:?} must be at least 1"));
    }
    if dilation.contains(&0) {
        return Err(format!("dilation {dilation:?} must be at least 1"));
    }
    match (
        window_output(h, kernel[0], stride[0], padding[0], dilation[0]),
        window_output(w, kernel[1], stride[1], padding[1], dilation[1]),
    ) {
        (Some(oh), Some(ow)) => Ok((oh, ow)),
        _ => Err(format!(
            "the {what} {} x {} (dilation {} x {}) is larger than the padded input {} x {} (input {h} x {w}, padding {} x {}), so the output map would be empty",
            kernel[0],
            kernel[1],
            dilation[0],
            dilation[1],
            h.saturating_add(padding[0].saturating_mul(2)),
            w.saturating_add(padding[1].saturating_mul(2)),
            padding[0],
            padding[1]
        )),
    }
}

/// The parts of a network, not yet checked: edit these, then make a [`super::Network`] with
/// [`super::Network::from_parts`], which validates them.
#[derive(Debug, Clone, PartialEq)]
pub struct NetworkParts {
    /// The training step the model was saved at (`"step"` in the file), if known.
    pub step: Option<u64>,
    /// Free-text name.
    pub name: String,
    /// Optional free-text description.
    pub description: Option<String>,
    /// Input size, layout and box.
    pub input: InputSpec,
    /// The layers from input to output.
    pub layers: Vec<Layer>,
    /// Unknown top-level keys of the model file, kept so a rewritten model keeps them.
    pub extra: serde_json::Map<String, serde_json::Value>,
}
