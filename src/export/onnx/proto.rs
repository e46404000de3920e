//! The ONNX messages kernelpress writes and reads, derived by hand with prost (field numbers
//! from the standard's `onnx.proto`, which is proto2: scalars are `optional` so that zeros
//! are written, and the repeated integer and float fields of attributes and shapes are not
//! packed). Only the messages an SVM import and a feature-program export need.

#![allow(missing_docs)]

/// `ModelProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct ModelProto {
    #[prost(int64, optional, tag = "1")]
    pub ir_version: Option<i64>,
    #[prost(message, repeated, tag = "8")]
    pub opset_import: Vec<OperatorSetIdProto>,
    #[prost(string, optional, tag = "2")]
    pub producer_name: Option<String>,
    #[prost(string, optional, tag = "3")]
    pub producer_version: Option<String>,
    #[prost(string, optional, tag = "4")]
    pub domain: Option<String>,
    #[prost(int64, optional, tag = "5")]
    pub model_version: Option<i64>,
    #[prost(string, optional, tag = "6")]
    pub doc_string: Option<String>,
    #[prost(message, optional, tag = "7")]
    pub graph: Option<GraphProto>,
    #[prost(message, repeated, tag = "14")]
    pub metadata_props: Vec<StringStringEntryProto>,
}

/// `OperatorSetIdProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct OperatorSetIdProto {
    #[prost(string, optional, tag = "1")]
    pub domain: Option<String>,
    #[prost(int64, optional, tag = "2")]
    pub version: Option<i64>,
}

/// `StringStringEntryProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct StringStringEntryProto {
    #[prost(string, optional, tag = "1")]
    pub key: Option<String>,
    #[prost(string, optional, tag = "2")]
    pub value: Option<String>,
}

/// `GraphProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct GraphProto {
    #[prost(message, repeated, tag = "1")]
    pub node: Vec<NodeProto>,
    #[prost(string, optional, tag = "2")]
    pub name: Option<String>,
    #[prost(message, repeated, tag = "5")]
    pub initializer: Vec<TensorProto>,
    #[prost(string, optional, tag = "10")]
    pub doc_string: Option<String>,
    #[prost(message, repeated, tag = "11")]
    pub input: Vec<ValueInfoProto>,
    #[prost(message, repeated, tag = "12")]
    pub output: Vec<ValueInfoProto>,
    #[prost(message, repeated, tag = "13")]
    pub value_info: Vec<ValueInfoProto>,
}

/// `NodeProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct NodeProto {
    #[prost(string, repeated, tag = "1")]
    pub input: Vec<String>,
    #[prost(string, repeated, tag = "2")]
    pub output: Vec<String>,
    #[prost(string, optional, tag = "3")]
    pub name: Option<String>,
    #[prost(string, optional, tag = "4")]
    pub op_type: Option<String>,
    #[prost(string, optional, tag = "7")]
    pub domain: Option<String>,
    #[prost(message, repeated, tag = "5")]
    pub attribute: Vec<AttributeProto>,
    #[prost(string, optional, tag = "6")]
    pub doc_string: Option<String>,
}

/// `AttributeProto.AttributeType` values.
pub mod attr_type {
    pub const FLOAT: i32 = 1;
    pub const INT: i32 = 2;
    pub const STRING: i32 = 3;
    pub const TENSOR: i32 = 4;
    pub const FLOATS: i32 = 6;
    pub const INTS: i32 = 7;
    pub const STRINGS: i32 = 8;
}

/// `AttributeProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct AttributeProto {
    #[prost(string, optional, tag = "1")]
    pub name: Option<String>,
    #[prost(int32, optional, tag = "20")]
    pub r#type: Option<i32>,
    #[prost(float, optional, tag = "2")]
    pub f: Option<f32>,
    #[prost(int64, optional, tag = "3")]
    pub i: Option<i64>,
    #[prost(bytes = "vec", optional, tag = "4")]
    pub s: Option<Vec<u8>>,
    #[prost(message, optional, tag = "5")]
    pub t: Option<TensorProto>,
    #[prost(float, repeated, packed = "false", tag = "7")]
    pub floats: Vec<f32>,
    #[prost(int64, repeated, packed = "false", tag = "8")]
    pub ints: Vec<i64>,
    #[prost(bytes = "vec", repeated, tag = "9")]
    pub strings: Vec<Vec<u8>>,
}

/// `TensorProto.DataType` values.
pub mod data_type {
    pub const FLOAT: i32 = 1;
    pub const INT8: i32 = 3;
    pub const INT32: i32 = 6;
    pub const INT64: i32 = 7;
    pub const STRING: i32 = 8;
    pub const BOOL: i32 = 9;
    pub const FLOAT16: i32 = 10;
    pub const DOUBLE: i32 = 11;
}

/// `TensorProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorProto {
    #[prost(int64, repeated, packed = "false", tag = "1")]
    pub dims: Vec<i64>,
    #[prost(int32, optional, tag = "2")]
    pub data_type: Option<i32>,
    #[prost(float, repeated, tag = "4")]
    pub float_data: Vec<f32>,
    #[prost(int32, repeated, tag = "5")]
    pub int32_data: Vec<i32>,
    #[prost(bytes = "vec", repeated, tag = "6")]
    pub string_data: Vec<Vec<u8>>,
    #[prost(int64, repeated, tag = "7")]
    pub int64_data: Vec<i64>,
    #[prost(string, optional, tag = "8")]
    pub name: Option<String>,
    #[prost(bytes = "vec", optional, tag = "9")]
    pub raw_data: Option<Vec<u8>>,
    #[prost(double, repeated, tag = "10")]
    pub double_data: Vec<f64>,
}

/// `ValueInfoProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct ValueInfoProto {
    #[prost(string, optional, tag = "1")]
    pub name: Option<String>,
    #[prost(message, optional, tag = "2")]
    pub r#type: Option<TypeProto>,
    #[prost(string, optional, tag = "3")]
    pub doc_string: Option<String>,
}

/// `TypeProto` (only the tensor case).
#[derive(Clone, PartialEq, prost::Message)]
pub struct TypeProto {
    #[prost(message, optional, tag = "1")]
    pub tensor_type: Option<TypeTensor>,
}

/// `TypeProto.Tensor`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct TypeTensor {
    #[prost(int32, optional, tag = "1")]
    pub elem_type: Option<i32>,
    #[prost(message, optional, tag = "2")]
    pub shape: Option<TensorShapeProto>,
}

/// `TensorShapeProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorShapeProto {
    #[prost(message, repeated, tag = "1")]
    pub dim: Vec<Dimension>,
}

/// `TensorShapeProto.Dimension`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct Dimension {
    #[prost(int64, optional, tag = "1")]
    pub dim_value: Option<i64>,
    #[prost(string, optional, tag = "2")]
    pub dim_param: Option<String>,
}
