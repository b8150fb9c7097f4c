//! The subset of the ONNX IR's protobuf messages that ingot reads, as
//! `prost` messages derived by hand.
//!
//! Field numbers and types follow `onnx/onnx.proto` of the ONNX IR
//! specification (open standard). Messages and fields ingot never reads are
//! left out; protobuf skips unknown fields when decoding, so a model that
//! carries them (training info, functions, sparse initializers, doc strings)
//! still decodes. No build script and no `protoc`: the derive macro is the
//! whole decoder, and the same structs encode models for tests and
//! benchmarks.

// The derive macro writes the field accessors; the structs mirror a foreign
// specification, so their names follow it rather than ingot's wording.
#![allow(missing_docs)]

/// `ModelProto`: the file's top-level message.
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct ModelProto {
    #[prost(int64, tag = "1")]
    pub ir_version: i64,
    #[prost(message, repeated, tag = "8")]
    pub opset_import: Vec<OperatorSetIdProto>,
    #[prost(string, tag = "2")]
    pub producer_name: String,
    #[prost(string, tag = "3")]
    pub producer_version: String,
    #[prost(string, tag = "4")]
    pub domain: String,
    #[prost(int64, tag = "5")]
    pub model_version: i64,
    #[prost(string, tag = "6")]
    pub doc_string: String,
    #[prost(message, optional, tag = "7")]
    pub graph: Option<GraphProto>,
    #[prost(message, repeated, tag = "14")]
    pub metadata_props: Vec<StringStringEntryProto>,
}

/// `StringStringEntryProto`: a key/value pair (metadata, external data).
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct StringStringEntryProto {
    #[prost(string, tag = "1")]
    pub key: String,
    #[prost(string, tag = "2")]
    pub value: String,
}

/// `OperatorSetIdProto`: an operator set and its version.
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct OperatorSetIdProto {
    #[prost(string, tag = "1")]
    pub domain: String,
    #[prost(int64, tag = "2")]
    pub version: i64,
}

/// `GraphProto`: nodes, initializers, inputs and outputs.
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct GraphProto {
    #[prost(message, repeated, tag = "1")]
    pub node: Vec<NodeProto>,
    #[prost(string, tag = "2")]
    pub name: String,
    #[prost(message, repeated, tag = "5")]
    pub initializer: Vec<TensorProto>,
    #[prost(string, tag = "10")]
    pub doc_string: String,
    #[prost(message, repeated, tag = "11")]
    pub input: Vec<ValueInfoProto>,
    #[prost(message, repeated, tag = "12")]
    pub output: Vec<ValueInfoProto>,
    #[prost(message, repeated, tag = "13")]
    pub value_info: Vec<ValueInfoProto>,
}

/// `NodeProto`: one operator application.
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct NodeProto {
    #[prost(string, repeated, tag = "1")]
    pub input: Vec<String>,
    #[prost(string, repeated, tag = "2")]
    pub output: Vec<String>,
    #[prost(string, tag = "3")]
    pub name: String,
    #[prost(string, tag = "4")]
    pub op_type: String,
    #[prost(string, tag = "7")]
    pub domain: String,
    #[prost(message, repeated, tag = "5")]
    pub attribute: Vec<AttributeProto>,
    #[prost(string, tag = "6")]
    pub doc_string: String,
}

/// `AttributeProto.AttributeType` values ingot reads.
pub mod attr_type {
    /// A single float in `f`.
    pub const FLOAT: i32 = 1;
    /// A single integer in `i`.
    pub const INT: i32 = 2;
    /// A byte string in `s`.
    pub const STRING: i32 = 3;
    /// A tensor in `t`.
    pub const TENSOR: i32 = 4;
    /// Floats in `floats`.
    pub const FLOATS: i32 = 6;
    /// Integers in `ints`.
    pub const INTS: i32 = 7;
}

/// `AttributeProto`: a named attribute of a node.
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct AttributeProto {
    #[prost(string, tag = "1")]
    pub name: String,
    #[prost(string, tag = "21")]
    pub ref_attr_name: String,
    #[prost(string, tag = "13")]
    pub doc_string: String,
    #[prost(int32, tag = "20")]
    pub r#type: i32,
    #[prost(float, tag = "2")]
    pub f: f32,
    #[prost(int64, tag = "3")]
    pub i: i64,
    #[prost(bytes = "vec", tag = "4")]
    pub s: Vec<u8>,
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
    /// 32-bit float.
    pub const FLOAT: i32 = 1;
    /// Unsigned 8-bit integer.
    pub const UINT8: i32 = 2;
    /// Signed 8-bit integer.
    pub const INT8: i32 = 3;
    /// Unsigned 16-bit integer.
    pub const UINT16: i32 = 4;
    /// Signed 16-bit integer.
    pub const INT16: i32 = 5;
    /// Signed 32-bit integer.
    pub const INT32: i32 = 6;
    /// Signed 64-bit integer.
    pub const INT64: i32 = 7;
    /// Byte strings.
    pub const STRING: i32 = 8;
    /// Booleans.
    pub const BOOL: i32 = 9;
    /// IEEE 754 half precision.
    pub const FLOAT16: i32 = 10;
    /// 64-bit float.
    pub const DOUBLE: i32 = 11;
    /// Unsigned 32-bit integer.
    pub const UINT32: i32 = 12;
    /// Unsigned 64-bit integer.
    pub const UINT64: i32 = 13;
    /// bfloat16 (the upper half of an f32).
    pub const BFLOAT16: i32 = 16;

    /// The specification's name of a data type, for messages.
    pub fn name(t: i32) -> String {
        match t {
            FLOAT => "FLOAT".into(),
            UINT8 => "UINT8".into(),
            INT8 => "INT8".into(),
            UINT16 => "UINT16".into(),
            INT16 => "INT16".into(),
            INT32 => "INT32".into(),
            INT64 => "INT64".into(),
            STRING => "STRING".into(),
            BOOL => "BOOL".into(),
            FLOAT16 => "FLOAT16".into(),
            DOUBLE => "DOUBLE".into(),
            UINT32 => "UINT32".into(),
            UINT64 => "UINT64".into(),
            BFLOAT16 => "BFLOAT16".into(),
            o => format!("data type {o}"),
        }
    }
}

/// `TensorProto.DataLocation::EXTERNAL`.
pub const DATA_LOCATION_EXTERNAL: i32 = 1;

/// `TensorProto`: a constant tensor (initializer or attribute value).
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct TensorProto {
    #[prost(int64, repeated, tag = "1")]
    pub dims: Vec<i64>,
    #[prost(int32, tag = "2")]
    pub data_type: i32,
    #[prost(float, repeated, tag = "4")]
    pub float_data: Vec<f32>,
    #[prost(int32, repeated, tag = "5")]
    pub int32_data: Vec<i32>,
    #[prost(int64, repeated, tag = "7")]
    pub int64_data: Vec<i64>,
    #[prost(string, tag = "8")]
    pub name: String,
    #[prost(string, tag = "12")]
    pub doc_string: String,
    #[prost(bytes = "vec", tag = "9")]
    pub raw_data: Vec<u8>,
    #[prost(message, repeated, tag = "13")]
    pub external_data: Vec<StringStringEntryProto>,
    #[prost(int32, tag = "14")]
    pub data_location: i32,
    #[prost(double, repeated, tag = "10")]
    pub double_data: Vec<f64>,
    #[prost(uint64, repeated, tag = "11")]
    pub uint64_data: Vec<u64>,
}

/// `ValueInfoProto`: a named value and its type.
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct ValueInfoProto {
    #[prost(string, tag = "1")]
    pub name: String,
    #[prost(message, optional, tag = "2")]
    pub r#type: Option<TypeProto>,
    #[prost(string, tag = "3")]
    pub doc_string: String,
}

/// `TypeProto`; only the tensor branch is read.
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct TypeProto {
    #[prost(message, optional, tag = "1")]
    pub tensor_type: Option<TypeProtoTensor>,
    #[prost(string, tag = "6")]
    pub denotation: String,
}

/// `TypeProto.Tensor`: element type and shape.
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct TypeProtoTensor {
    #[prost(int32, tag = "1")]
    pub elem_type: i32,
    #[prost(message, optional, tag = "2")]
    pub shape: Option<TensorShapeProto>,
}

/// `TensorShapeProto`.
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct TensorShapeProto {
    #[prost(message, repeated, tag = "1")]
    pub dim: Vec<Dimension>,
}

/// `TensorShapeProto.Dimension`: a number, a symbolic name, or unknown.
#[derive(Clone, PartialEq, ::prost::Message)]
pub struct Dimension {
    #[prost(int64, optional, tag = "1")]
    pub dim_value: Option<i64>,
    #[prost(string, optional, tag = "2")]
    pub dim_param: Option<String>,
    #[prost(string, tag = "3")]
    pub denotation: String,
}
