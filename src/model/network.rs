//! The validated network every other part of receptor works on.
//!
//! A [`Network`] can only be made through validation ([`Network::new`],
//! [`Network::from_parts`], or the loaders in [`crate::model`]), and its fields are private,
//! so holding one means every shape and value has been checked.

use super::types::{InputSpec, Layer, LayerKind, NetworkParts, Shape};

/// A validated feed-forward network. Construct it with [`crate::model::load`],
/// [`Network::new`] or [`Network::from_parts`], which all check every shape and value.
#[derive(Debug, Clone, PartialEq)]
pub struct Network {
    step: Option<u64>,
    name: String,
    description: Option<String>,
    input: InputSpec,
    layers: Vec<Layer>,
    extra: serde_json::Map<String, serde_json::Value>,
    /// The input as the first layer sees it (derived by validation).
    input_shape: Shape,
    /// Each layer's output shape (derived by validation).
    shapes: Vec<Shape>,
}

impl Network {
    /// Builds a network from parts and validates it (the same checks as loading a file;
    /// `origin` names the source in error messages).
    pub fn new(
        origin: &str,
        name: impl Into<String>,
        input: InputSpec,
        layers: Vec<Layer>,
    ) -> crate::Result<Self> {
        Network::from_parts(
            NetworkParts {
                step: None,
                name: name.into(),
                description: None,
                input,
                layers,
                extra: serde_json::Map::new(),
            },
            origin,
        )
    }

    /// Validates `parts` (the same checks as loading a file; `origin` names the source in
    /// error messages) and makes them a network.
    pub fn from_parts(parts: NetworkParts, origin: &str) -> crate::Result<Self> {
        let shapes = super::validate::validate_shapes(&parts, origin)?;
        let NetworkParts {
            step,
            name,
            description,
            input,
            layers,
            extra,
        } = parts;
        Ok(Network {
            step,
            name,
            description,
            input,
            layers,
            extra,
            input_shape: shapes.input,
            shapes: shapes.outputs,
        })
    }

    /// The network taken apart, to edit and validate again with [`Network::from_parts`].
    pub fn into_parts(self) -> NetworkParts {
        NetworkParts {
            step: self.step,
            name: self.name,
            description: self.description,
            input: self.input,
            layers: self.layers,
            extra: self.extra,
        }
    }

    /// A copy of the network's parts (see [`Network::into_parts`]).
    pub fn to_parts(&self) -> NetworkParts {
        self.clone().into_parts()
    }

    /// Free-text name.
    pub fn name(&self) -> &str {
        &self.name
    }

    /// The training step this model was saved at, when the file says (`"step"`); orders a
    /// series of checkpoints.
    pub fn step(&self) -> Option<u64> {
        self.step
    }

    /// Optional free-text description.
    pub fn description(&self) -> Option<&str> {
        self.description.as_deref()
    }

    /// Input size, layout and box.
    pub fn input(&self) -> &InputSpec {
        &self.input
    }

    /// The layers from input to output (at least one).
    pub fn layers(&self) -> &[Layer] {
        &self.layers
    }

    /// Layer `i`.
    ///
    /// # Panics
    /// When `i` is not below the number of layers.
    pub fn layer(&self, i: usize) -> &Layer {
        &self.layers[i]
    }

    /// Unknown top-level keys of the model file, kept so a rewritten model keeps them.
    pub fn extra(&self) -> &serde_json::Map<String, serde_json::Value> {
        &self.extra
    }

    /// The input as the first layer sees it: a vector of `input().size` values before a
    /// dense layer, else the image as a `[channels, height, width]` map (stored row-major,
    /// channel last, as the input layout says).
    pub fn input_shape(&self) -> Shape {
        self.input_shape
    }

    /// The shape of layer `i`'s output (its pre-activations and activations).
    ///
    /// # Panics
    /// When `i` is not below the number of layers.
    pub fn output_shape(&self, i: usize) -> Shape {
        self.shapes[i]
    }

    /// The shape layer `i` reads: the output of layer `i - 1`, or [`Network::input_shape`].
    ///
    /// # Panics
    /// When `i` is not below the number of layers.
    pub fn input_shape_of(&self, i: usize) -> Shape {
        assert!(i < self.layers.len(), "layer {i} of {}", self.layers.len());
        if i == 0 {
            self.input_shape
        } else {
            self.shapes[i - 1]
        }
    }

    /// True when every layer is dense (the model is a `receptor-model/1` model).
    pub fn is_dense_only(&self) -> bool {
        self.layers.iter().all(|l| l.kind == LayerKind::Dense)
    }

    /// The index of the layer called `name`.
    pub fn layer_index(&self, name: &str) -> Option<usize> {
        self.layers.iter().position(|l| l.name == name)
    }

    /// Finds a layer by name, or gives [`crate::Error::UnknownLayer`] listing the layer names.
    pub fn require_layer(&self, name: &str) -> crate::Result<usize> {
        self.layer_index(name)
            .ok_or_else(|| crate::Error::UnknownLayer {
                name: name.to_string(),
                layers: self.layers.iter().map(|l| l.name.clone()).collect(),
            })
    }

    /// The last layer.
    pub fn output_layer(&self) -> &Layer {
        &self.layers[self.layers.len() - 1]
    }

    /// Names of the output units: the last layer's labels, else `out0`, `out1`, ...
    pub fn output_names(&self) -> Vec<String> {
        let out = self.output_layer();
        (0..out.units()).map(|k| out.unit_name(k, "out")).collect()
    }

    /// Total number of weights and biases.
    pub fn parameter_count(&self) -> usize {
        self.layers
            .iter()
            .map(|l| l.weights.len() + l.bias.len())
            .sum()
    }
}
