//! The ONNX protobuf messages, reduced to the fields the reader uses.
//!
//! Field numbers and types are those of the published ONNX specification, `onnx/onnx.proto`
//! of the ONNX project (proto2 syntax; the same numbers in every IR version since 3). Each
//! field below names its message and number there. Fields we do not declare are skipped by
//! the decoder, so a file from a newer exporter still reads. `prost` checks every length
//! prefix against the bytes that remain before copying, and limits message nesting.

/// `StringStringEntryProto` (onnx.proto): a key-value pair (metadata, external data).
#[derive(Clone, PartialEq, prost::Message)]
pub struct StringStringEntryProto {
    /// `key = 1`.
    #[prost(string, tag = "1")]
    pub key: String,
    /// `value = 2`.
    #[prost(string, tag = "2")]
    pub value: String,
}

/// `ModelProto` (onnx.proto): the file's top-level message.
#[derive(Clone, PartialEq, prost::Message)]
pub struct ModelProto {
    /// `ir_version = 1`.
    #[prost(int64, tag = "1")]
    pub ir_version: i64,
    /// `producer_name = 2`.
    #[prost(string, tag = "2")]
    pub producer_name: String,
    /// `producer_version = 3`.
    #[prost(string, tag = "3")]
    pub producer_version: String,
    /// `doc_string = 6`.
    #[prost(string, tag = "6")]
    pub doc_string: String,
    /// `graph = 7`.
    #[prost(message, optional, tag = "7")]
    pub graph: Option<GraphProto>,
    /// `opset_import = 8`.
    #[prost(message, repeated, tag = "8")]
    pub opset_import: Vec<OperatorSetIdProto>,
    /// `metadata_props = 14`.
    #[prost(message, repeated, tag = "14")]
    pub metadata_props: Vec<StringStringEntryProto>,
}

/// `OperatorSetIdProto` (onnx.proto): an operator set the model uses.
#[derive(Clone, PartialEq, prost::Message)]
pub struct OperatorSetIdProto {
    /// `domain = 1` (empty: the default ONNX operator set).
    #[prost(string, tag = "1")]
    pub domain: String,
    /// `version = 2`.
    #[prost(int64, tag = "2")]
    pub version: i64,
}

/// `GraphProto` (onnx.proto): nodes in topological order, constants, inputs and outputs.
#[derive(Clone, PartialEq, prost::Message)]
pub struct GraphProto {
    /// `node = 1`.
    #[prost(message, repeated, tag = "1")]
    pub node: Vec<NodeProto>,
    /// `name = 2`.
    #[prost(string, tag = "2")]
    pub name: String,
    /// `initializer = 5`.
    #[prost(message, repeated, tag = "5")]
    pub initializer: Vec<TensorProto>,
    /// `input = 11`.
    #[prost(message, repeated, tag = "11")]
    pub input: Vec<ValueInfoProto>,
    /// `output = 12`.
    #[prost(message, repeated, tag = "12")]
    pub output: Vec<ValueInfoProto>,
}

/// `NodeProto` (onnx.proto): one operator application.
#[derive(Clone, PartialEq, prost::Message)]
pub struct NodeProto {
    /// `input = 1` (an empty name is an omitted optional input).
    #[prost(string, repeated, tag = "1")]
    pub input: Vec<String>,
    /// `output = 2`.
    #[prost(string, repeated, tag = "2")]
    pub output: Vec<String>,
    /// `name = 3`.
    #[prost(string, tag = "3")]
    pub name: String,
    /// `op_type = 4`.
    #[prost(string, tag = "4")]
    pub op_type: String,
    /// `attribute = 5`.
    #[prost(message, repeated, tag = "5")]
    pub attribute: Vec<AttributeProto>,
    /// `domain = 7` (empty or `ai.onnx`: the default operator set).
    #[prost(string, tag = "7")]
    pub domain: String,
}

/// `AttributeProto` (onnx.proto): a named operator attribute.
#[derive(Clone, PartialEq, prost::Message)]
pub struct AttributeProto {
    /// `name = 1`.
    #[prost(string, tag = "1")]
    pub name: String,
    /// `f = 2` (FLOAT).
    #[prost(float, optional, tag = "2")]
    pub f: Option<f32>,
    /// `i = 3` (INT).
    #[prost(int64, optional, tag = "3")]
    pub i: Option<i64>,
    /// `s = 4` (STRING).
    #[prost(bytes = "vec", optional, tag = "4")]
    pub s: Option<Vec<u8>>,
    /// `t = 5` (TENSOR).
    #[prost(message, optional, tag = "5")]
    pub t: Option<TensorProto>,
    /// `floats = 7` (FLOATS).
    #[prost(float, repeated, tag = "7")]
    pub floats: Vec<f32>,
    /// `ints = 8` (INTS).
    #[prost(int64, repeated, tag = "8")]
    pub ints: Vec<i64>,
    /// `type = 20` (the `AttributeType` enum: FLOAT 1, INT 2, STRING 3, TENSOR 4,
    /// FLOATS 6, INTS 7, ...).
    #[prost(int32, tag = "20")]
    pub r#type: i32,
}

/// `TensorProto` (onnx.proto): a constant tensor (an initializer or a `Constant`'s value).
#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorProto {
    /// `dims = 1`.
    #[prost(int64, repeated, tag = "1")]
    pub dims: Vec<i64>,
    /// `data_type = 2` (`TensorProto.DataType`: FLOAT 1, INT64 7, FLOAT16 10, DOUBLE 11).
    #[prost(int32, tag = "2")]
    pub data_type: i32,
    /// `float_data = 4` (FLOAT values).
    #[prost(float, repeated, tag = "4")]
    pub float_data: Vec<f32>,
    /// `int32_data = 5` (FLOAT16 values, one bit pattern in the low 16 bits of each).
    #[prost(int32, repeated, tag = "5")]
    pub int32_data: Vec<i32>,
    /// `int64_data = 7` (INT64 values).
    #[prost(int64, repeated, tag = "7")]
    pub int64_data: Vec<i64>,
    /// `name = 8`.
    #[prost(string, tag = "8")]
    pub name: String,
    /// `raw_data = 9` (fixed-width little-endian values).
    #[prost(bytes = "vec", tag = "9")]
    pub raw_data: Vec<u8>,
    /// `double_data = 10` (DOUBLE values).
    #[prost(double, repeated, tag = "10")]
    pub double_data: Vec<f64>,
    /// `external_data = 13` (keys `location`, `offset`, `length`, `checksum`).
    #[prost(message, repeated, tag = "13")]
    pub external_data: Vec<StringStringEntryProto>,
    /// `data_location = 14` (`DataLocation`: DEFAULT 0, EXTERNAL 1).
    #[prost(int32, tag = "14")]
    pub data_location: i32,
}

/// `ValueInfoProto` (onnx.proto): a graph input's or output's name and type.
#[derive(Clone, PartialEq, prost::Message)]
pub struct ValueInfoProto {
    /// `name = 1`.
    #[prost(string, tag = "1")]
    pub name: String,
    /// `type = 2`.
    #[prost(message, optional, tag = "2")]
    pub r#type: Option<TypeProto>,
}

/// `TypeProto` (onnx.proto), the tensor case only (`tensor_type = 1` of its `value` oneof;
/// sequences and maps are not read, so a graph input of such a type has no tensor type).
#[derive(Clone, PartialEq, prost::Message)]
pub struct TypeProto {
    /// `tensor_type = 1`.
    #[prost(message, optional, tag = "1")]
    pub tensor_type: Option<TypeProtoTensor>,
}

/// `TypeProto.Tensor` (onnx.proto).
#[derive(Clone, PartialEq, prost::Message)]
pub struct TypeProtoTensor {
    /// `elem_type = 1` (a `TensorProto.DataType`).
    #[prost(int32, tag = "1")]
    pub elem_type: i32,
    /// `shape = 2`.
    #[prost(message, optional, tag = "2")]
    pub shape: Option<TensorShapeProto>,
}

/// `TensorShapeProto` (onnx.proto).
#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorShapeProto {
    /// `dim = 1`.
    #[prost(message, repeated, tag = "1")]
    pub dim: Vec<Dimension>,
}

/// `TensorShapeProto.Dimension` (onnx.proto): the `value` oneof read as two optional
/// fields (`dim_value = 1`, `dim_param = 2`); at most one is set.
#[derive(Clone, PartialEq, prost::Message)]
pub struct Dimension {
    /// `dim_value = 1`: a fixed size.
    #[prost(int64, optional, tag = "1")]
    pub dim_value: Option<i64>,
    /// `dim_param = 2`: a symbolic size such as `batch`.
    #[prost(string, optional, tag = "2")]
    pub dim_param: Option<String>,
}

/// `TensorProto.DataType` FLOAT.
pub const FLOAT: i32 = 1;
/// `TensorProto.DataType` INT64.
pub const INT64: i32 = 7;
/// `TensorProto.DataType` FLOAT16.
pub const FLOAT16: i32 = 10;
/// `TensorProto.DataType` DOUBLE.
pub const DOUBLE: i32 = 11;
/// `TensorProto.DataLocation` EXTERNAL.
pub const EXTERNAL: i32 = 1;
