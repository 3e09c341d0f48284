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
}

impl InputSpec {
    /// The name of input `i`: its feature name, or `x{i}`.
    pub fn feature_name(&self, i: usize) -> String {
        match &self.names {
            Some(n) if i < n.len() => n[i].clone(),
            _ => format!("x{i}"),
        }
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

/// One dense layer: `a = activation(W x + b)`.
#[derive(Debug, Clone, PartialEq)]
pub struct Layer {
    /// Unique name within the network.
    pub name: String,
    /// The units' activation function.
    pub activation: Activation,
    /// Incoming weights, `[units, inputs]` (row = one unit's incoming weights; the
    /// orientation of PyTorch's `nn.Linear.weight`).
    pub weights: Array2<f32>,
    /// Biases, `[units]`.
    pub bias: Array1<f32>,
    /// Optional unit names (class labels on the last layer), `[units]`.
    pub labels: Option<Vec<String>>,
}

impl Layer {
    /// Number of units in this layer.
    pub fn units(&self) -> usize {
        self.weights.nrows()
    }

    /// Number of inputs of each unit (units of the layer below, or the input size).
    pub fn fan_in(&self) -> usize {
        self.weights.ncols()
    }

    /// The name of unit `k`: its label, or `{prefix}{k}`.
    pub fn unit_name(&self, k: usize, prefix: &str) -> String {
        match &self.labels {
            Some(l) if k < l.len() => l[k].clone(),
            _ => format!("{prefix}{k}"),
        }
    }
}

/// The parts of a network, not yet checked: edit these, then make a [`super::Network`] with
/// [`super::Network::from_parts`], which validates them.
#[derive(Debug, Clone, PartialEq)]
pub struct NetworkParts {
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
