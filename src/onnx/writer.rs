//! A small ONNX graph writer over tract-onnx's protobuf types.
//!
//! The tests build networks with known weights through it and the trainer exports
//! its networks through it, so both produce files that any ONNX runtime can load.

use prost::Message;
use tract_onnx::pb;
use tract_onnx::pb::attribute_proto::AttributeType;
use tract_onnx::pb::tensor_proto::DataType;
use tract_onnx::pb::tensor_shape_proto::{dimension, Dimension};

/// Opset written into every file (ONNX operator set 13 and later share the ops used here).
pub const OPSET: i64 = 13;
/// IR version 7 is what opset 13 was released with.
const IR_VERSION: i64 = 7;

/// One axis of a graph input or output.
#[derive(Clone, Debug)]
pub enum Dim {
    Fixed(i64),
    Symbol(&'static str),
}

/// Node attribute values used by the ops this project writes.
#[derive(Clone, Debug)]
pub enum Attr {
    Int(i64),
    Ints(Vec<i64>),
    Float(f32),
    Str(&'static str),
}

/// Builds one graph; names of intermediate values are generated.
#[derive(Default)]
pub struct GraphWriter {
    graph: pb::GraphProto,
    counter: usize,
    /// The model's `metadata_props`, in the order given.
    metadata: Vec<pb::StringStringEntryProto>,
}

impl GraphWriter {
    pub fn new(name: &str) -> Self {
        let mut w = Self::default();
        w.graph.name = name.to_string();
        w
    }

    /// Records a key and value in the model's metadata (`metadata_props`), e.g. the
    /// geometry a network was trained for.
    pub fn metadata(&mut self, key: &str, value: &str) {
        self.metadata.push(pb::StringStringEntryProto { key: key.to_string(), value: value.to_string() });
    }

    fn fresh(&mut self, stem: &str) -> String {
        self.counter += 1;
        format!("{stem}_{}", self.counter)
    }

    /// Declares a float input and returns its name.
    pub fn input(&mut self, name: &str, dims: &[Dim]) -> String {
        self.graph.input.push(value_info(name, dims));
        name.to_string()
    }

    /// Declares `value` as a graph output under `name` (through an Identity when renamed).
    pub fn output(&mut self, value: &str, name: &str, dims: &[Dim]) {
        if value != name {
            self.node_named("Identity", &[value], name, &[]);
        }
        self.graph.output.push(value_info(name, dims));
    }

    /// Adds a float constant and returns its name.
    pub fn constant(&mut self, stem: &str, dims: &[i64], data: &[f32]) -> String {
        assert_eq!(dims.iter().product::<i64>() as usize, data.len(), "constant {stem}: shape and data disagree");
        let name = self.fresh(stem);
        self.graph.initializer.push(pb::TensorProto {
            dims: dims.to_vec(),
            data_type: DataType::Float as i32,
            raw_data: data.iter().flat_map(|v| v.to_le_bytes()).collect(),
            name: name.clone(),
            ..Default::default()
        });
        name
    }

    /// Adds an int64 constant (shapes, axes) and returns its name.
    pub fn constant_i64(&mut self, stem: &str, data: &[i64]) -> String {
        let name = self.fresh(stem);
        self.graph.initializer.push(pb::TensorProto {
            dims: vec![data.len() as i64],
            data_type: DataType::Int64 as i32,
            raw_data: data.iter().flat_map(|v| v.to_le_bytes()).collect(),
            name: name.clone(),
            ..Default::default()
        });
        name
    }

    /// Adds a node with one output and returns the output's name.
    pub fn node(&mut self, op: &str, inputs: &[&str], attrs: &[(&str, Attr)]) -> String {
        let out = self.fresh(&op.to_lowercase());
        self.node_named(op, inputs, &out, attrs);
        out
    }

    fn node_named(&mut self, op: &str, inputs: &[&str], out: &str, attrs: &[(&str, Attr)]) {
        let name = self.fresh(&format!("{op}_node"));
        self.graph.node.push(pb::NodeProto {
            input: inputs.iter().map(|s| s.to_string()).collect(),
            output: vec![out.to_string()],
            name,
            op_type: op.to_string(),
            attribute: attrs.iter().map(|(k, v)| attribute(k, v)).collect(),
            ..Default::default()
        });
    }

    /// 2-D convolution, weights `[out, in, k, k]`, symmetric zero padding.
    #[allow(clippy::too_many_arguments)] // the operator's own parameters, named as ONNX names them
    pub fn conv(
        &mut self,
        x: &str,
        weights: &[f32],
        bias: &[f32],
        cin: usize,
        k: usize,
        stride: usize,
        pad: usize,
    ) -> String {
        let cout = bias.len();
        assert_eq!(weights.len(), cout * cin * k * k, "conv weights: expected {cout}x{cin}x{k}x{k}");
        let w = self.constant("conv_w", &[cout as i64, cin as i64, k as i64, k as i64], weights);
        let b = self.constant("conv_b", &[cout as i64], bias);
        let (k, s, p) = (k as i64, stride as i64, pad as i64);
        self.node(
            "Conv",
            &[x, &w, &b],
            &[
                ("kernel_shape", Attr::Ints(vec![k, k])),
                ("strides", Attr::Ints(vec![s, s])),
                ("pads", Attr::Ints(vec![p, p, p, p])),
            ],
        )
    }

    /// Fully connected layer on `[N, cin]`: `x · Wᵀ + b` with `W` as `[cout, cin]`.
    pub fn dense(&mut self, x: &str, weights: &[f32], bias: &[f32], cin: usize) -> String {
        let cout = bias.len();
        assert_eq!(weights.len(), cout * cin, "dense weights: expected {cout}x{cin}");
        let w = self.constant("dense_w", &[cout as i64, cin as i64], weights);
        let b = self.constant("dense_b", &[cout as i64], bias);
        self.node("Gemm", &[x, &w, &b], &[("transB", Attr::Int(1))])
    }

    /// Pads the two spatial axes of `[N, C, H, W]` by `p` on each side, repeating edge pixels.
    pub fn pad_edge(&mut self, x: &str, p: i64) -> String {
        let pads = self.constant_i64("pads", &[0, 0, p, p, 0, 0, p, p]);
        self.node("Pad", &[x, &pads], &[("mode", Attr::Str("edge"))])
    }

    pub fn pool(&mut self, op: &str, x: &str, k: usize, stride: usize) -> String {
        self.node(
            op,
            &[x],
            &[
                ("kernel_shape", Attr::Ints(vec![k as i64, k as i64])),
                ("strides", Attr::Ints(vec![stride as i64, stride as i64])),
            ],
        )
    }

    /// Max pool whose last window may hang over the edge (ONNX `ceil_mode`): every input
    /// pixel lands in some window, so a thumbnail of any size maps to `ceil(len / k)` cells.
    pub fn max_pool_ceil(&mut self, x: &str, k: usize) -> String {
        let k = k as i64;
        self.node(
            "MaxPool",
            &[x],
            &[
                ("kernel_shape", Attr::Ints(vec![k, k])),
                ("strides", Attr::Ints(vec![k, k])),
                ("ceil_mode", Attr::Int(1)),
            ],
        )
    }

    /// `[N, C, H, W]` → `[N, C]` by a global pool (`GlobalAveragePool` or `GlobalMaxPool`).
    pub fn global_pool(&mut self, op: &str, x: &str) -> String {
        let pooled = self.node(op, &[x], &[]);
        self.node("Flatten", &[&pooled], &[("axis", Attr::Int(1))])
    }

    pub fn unary(&mut self, op: &str, x: &str) -> String {
        self.node(op, &[x], &[])
    }

    pub fn binary(&mut self, op: &str, a: &str, b: &str) -> String {
        self.node(op, &[a, b], &[])
    }

    /// Multiplies by a scalar.
    pub fn scale(&mut self, x: &str, factor: f32) -> String {
        let c = self.constant("scale", &[1], &[factor]);
        self.binary("Mul", x, &c)
    }

    pub fn concat(&mut self, xs: &[&str], axis: i64) -> String {
        self.node("Concat", xs, &[("axis", Attr::Int(axis))])
    }

    /// Serialises the graph as a complete ONNX model.
    pub fn finish(self, producer: &str) -> Vec<u8> {
        pb::ModelProto {
            ir_version: IR_VERSION,
            opset_import: vec![pb::OperatorSetIdProto { domain: String::new(), version: OPSET }],
            producer_name: producer.to_string(),
            producer_version: env!("CARGO_PKG_VERSION").to_string(),
            graph: Some(self.graph),
            metadata_props: self.metadata,
            ..Default::default()
        }
        .encode_to_vec()
    }
}

fn value_info(name: &str, dims: &[Dim]) -> pb::ValueInfoProto {
    let dim = dims
        .iter()
        .map(|d| Dimension {
            value: Some(match d {
                Dim::Fixed(n) => dimension::Value::DimValue(*n),
                Dim::Symbol(s) => dimension::Value::DimParam(s.to_string()),
            }),
            ..Default::default()
        })
        .collect();
    pb::ValueInfoProto {
        name: name.to_string(),
        r#type: Some(pb::TypeProto {
            value: Some(pb::type_proto::Value::TensorType(pb::type_proto::Tensor {
                elem_type: DataType::Float as i32,
                shape: Some(pb::TensorShapeProto { dim }),
            })),
            ..Default::default()
        }),
        ..Default::default()
    }
}

fn attribute(name: &str, value: &Attr) -> pb::AttributeProto {
    let mut a = pb::AttributeProto { name: name.to_string(), ..Default::default() };
    match value {
        Attr::Int(i) => {
            a.r#type = AttributeType::Int as i32;
            a.i = *i;
        }
        Attr::Ints(v) => {
            a.r#type = AttributeType::Ints as i32;
            a.ints = v.clone();
        }
        Attr::Float(f) => {
            a.r#type = AttributeType::Float as i32;
            a.f = *f;
        }
        Attr::Str(t) => {
            a.r#type = AttributeType::String as i32;
            a.s = t.as_bytes().to_vec();
        }
    }
    a
}
