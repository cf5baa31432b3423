//! Folding a BatchNormalization that follows a Conv into the Conv's weights and bias, on the parsed graph in
//! memory, before tract reads it.
//!
//! In inference a BatchNormalization is an affine map per channel, `Y = (X - mean) / sqrt(var + epsilon) *
//! scale + B` (ONNX operator specification, BatchNormalization), so after a Conv it equals the same Conv with
//! each output channel's weights multiplied by `s = scale / sqrt(var + epsilon)` and its bias replaced by
//! `(bias - mean) * s + B`. ONNX Runtime makes this rewrite itself ("Conv BatchNorm Fusion", one of the basic
//! graph optimisations in its documentation, "Graph Optimizations in ONNX Runtime"); tract folds it into
//! ordinary convolutions but keeps it as a pass of its own after a depthwise one (BENCHMARKS.md section 1).
//! The model file, and the SHA-256 a deployment pins, are not touched: only the tract engine's copy of the
//! graph is rewritten, and the reference checks hold tract's outputs to Python onnxruntime's as before.

use std::collections::{HashMap, HashSet};

use tract_onnx::pb;

/// ONNX's FLOAT element type.
const FLOAT: i32 = 1;
/// BatchNormalization's default epsilon (ONNX operator specification).
const DEFAULT_EPSILON: f32 = 1e-5;
/// The first opset whose BatchNormalization has neither `is_test` nor `spatial` (ONNX operator changelog).
const MIN_OPSET: i64 = 9;

/// Folds every BatchNormalization (inference mode) whose input is the only use of a Conv's output, when the
/// weights, the bias and the normalisation's four vectors are float initializers stored in the file. A tensor
/// named in `read_by_name` (one the manifest reads as the output, say) counts as used and keeps its producer.
/// Returns how many were folded. A graph with subgraphs (If, Loop, Scan), or of an opset before 9 (whose
/// BatchNormalization had training-mode and per-element variants), is left as it is, as is any pattern that
/// does not match exactly.
pub fn fold_conv_batchnorm(model: &mut pb::ModelProto, read_by_name: &[&str]) -> usize {
    let opset = model
        .opset_import
        .iter()
        .filter(|o| standard_domain(&o.domain))
        .map(|o| o.version)
        .max();
    if opset.is_none_or(|v| v < MIN_OPSET) {
        return 0;
    }
    let Some(graph) = model.graph.as_mut() else {
        return 0;
    };
    let has_subgraphs = graph.node.iter().any(|n| {
        n.attribute
            .iter()
            .any(|a| a.g.is_some() || !a.graphs.is_empty())
    });
    if has_subgraphs {
        return 0;
    }
    let mut uses: HashMap<&str, usize> = HashMap::new();
    for name in graph.node.iter().flat_map(|n| n.input.iter()) {
        *uses.entry(name.as_str()).or_default() += 1;
    }
    for name in graph
        .output
        .iter()
        .map(|o| o.name.as_str())
        .chain(read_by_name.iter().copied())
    {
        *uses.entry(name).or_default() += 1;
    }
    let producer: HashMap<&str, usize> = graph
        .node
        .iter()
        .enumerate()
        .flat_map(|(i, n)| n.output.iter().map(move |o| (o.as_str(), i)))
        .collect();
    let initializer: HashMap<&str, usize> = graph
        .initializer
        .iter()
        .enumerate()
        .map(|(i, t)| (t.name.as_str(), i))
        .collect();

    // (conv index, bn index, folded weights, folded bias)
    let folds: Vec<(usize, usize, pb::TensorProto, pb::TensorProto)> = graph
        .node
        .iter()
        .enumerate()
        .filter_map(|(b, bn)| {
            let (c, w, bias) = folded(graph, bn, &uses, &producer, &initializer)?;
            Some((c, b, w, bias))
        })
        .collect();
    if folds.is_empty() {
        return 0;
    }

    // Every name the graph uses anywhere, so that a new one cannot meet an old one.
    let mut taken: HashSet<String> = graph
        .initializer
        .iter()
        .map(|t| t.name.clone())
        .chain(graph.node.iter().flat_map(|n| n.output.iter().cloned()))
        .chain(graph.node.iter().flat_map(|n| n.input.iter().cloned()))
        .chain(graph.input.iter().map(|i| i.name.clone()))
        .chain(graph.output.iter().map(|o| o.name.clone()))
        .chain(graph.value_info.iter().map(|v| v.name.clone()))
        .chain(
            graph
                .sparse_initializer
                .iter()
                .filter_map(|t| t.values.as_ref().map(|v| v.name.clone())),
        )
        .collect();
    let mut fresh = |base: String| {
        let mut name = base.clone();
        let mut n = 1;
        while taken.contains(&name) {
            n += 1;
            name = format!("{base}.{n}");
        }
        taken.insert(name.clone());
        name
    };
    let count = folds.len();
    let mut dropped = HashSet::new();
    for (c, b, mut w, mut bias) in folds {
        let out = graph.node[b].output[0].clone();
        w.name = fresh(format!("{out}.folded_weight"));
        bias.name = fresh(format!("{out}.folded_bias"));
        let conv = &mut graph.node[c];
        conv.input.truncate(1);
        conv.input.push(w.name.clone());
        conv.input.push(bias.name.clone());
        conv.output[0] = out;
        graph.initializer.push(w);
        graph.initializer.push(bias);
        dropped.insert(b);
    }
    let mut index = 0;
    graph.node.retain(|_| {
        index += 1;
        !dropped.contains(&(index - 1))
    });
    // Initializers nothing reads any more (the old weights, biases and statistics) go too, unless the graph
    // also declares them as inputs or outputs.
    let read: HashSet<&str> = graph
        .node
        .iter()
        .flat_map(|n| n.input.iter().map(String::as_str))
        .chain(graph.input.iter().map(|i| i.name.as_str()))
        .chain(graph.output.iter().map(|o| o.name.as_str()))
        .collect();
    graph.initializer.retain(|t| read.contains(t.name.as_str()));
    count
}

/// For a BatchNormalization that can be folded: its Conv's index and the Conv's new weights and bias
/// (names left empty).
fn folded(
    graph: &pb::GraphProto,
    bn: &pb::NodeProto,
    uses: &HashMap<&str, usize>,
    producer: &HashMap<&str, usize>,
    initializer: &HashMap<&str, usize>,
) -> Option<(usize, pb::TensorProto, pb::TensorProto)> {
    if bn.op_type != "BatchNormalization" || !standard_domain(&bn.domain) {
        return None;
    }
    if bn.input.len() != 5
        || bn.output.first().is_none_or(|o| o.is_empty())
        || bn.output.iter().skip(1).any(|o| !o.is_empty())
    {
        return None;
    }
    let epsilon = inference_epsilon(bn)?;
    let x = bn.input[0].as_str();
    if uses.get(x) != Some(&1) {
        return None;
    }
    let c = *producer.get(x)?;
    let conv = &graph.node[c];
    if conv.op_type != "Conv" || !standard_domain(&conv.domain) || conv.output.len() != 1 {
        return None;
    }
    let floats = |name: &str| -> Option<(Vec<i64>, Vec<f32>)> {
        let t = &graph.initializer[*initializer.get(name)?];
        float_values(t).map(|v| (t.dims.clone(), v))
    };
    let (w_dims, w) = floats(conv.input.get(1)?)?;
    let m = usize::try_from(*w_dims.first()?).ok()?;
    // The weights hold at least one value per output channel; every length below is checked against m
    // before anything of length m is made, so a file's dimensions alone never size an allocation.
    if m == 0 || w.len() < m || w.len() % m != 0 {
        return None;
    }
    let scale = floats(&bn.input[1])?.1;
    let shift = floats(&bn.input[2])?.1;
    let mean = floats(&bn.input[3])?.1;
    let var = floats(&bn.input[4])?.1;
    let bias = match conv.input.get(2).filter(|n| !n.is_empty()) {
        Some(name) => floats(name)?.1,
        None => vec![0.0; m],
    };
    if [&bias, &scale, &shift, &mean, &var]
        .iter()
        .any(|v| v.len() != m)
    {
        return None;
    }
    let per_channel = w.len() / m;
    let mut folded_w = Vec::with_capacity(w.len());
    let mut folded_b = Vec::with_capacity(m);
    for k in 0..m {
        // The factor and the bias in double precision, each value rounded to float once.
        let s = scale[k] as f64 / (var[k] as f64 + epsilon as f64).sqrt();
        if !s.is_finite() {
            return None;
        }
        folded_w.extend(
            w[k * per_channel..(k + 1) * per_channel]
                .iter()
                .map(|&v| (v as f64 * s) as f32),
        );
        folded_b.push(((bias[k] as f64 - mean[k] as f64) * s + shift[k] as f64) as f32);
    }
    let tensor = |dims: Vec<i64>, values: Vec<f32>| pb::TensorProto {
        dims,
        data_type: FLOAT,
        float_data: values,
        ..Default::default()
    };
    Some((
        c,
        tensor(w_dims, folded_w),
        tensor(vec![m as i64], folded_b),
    ))
}

fn standard_domain(domain: &str) -> bool {
    domain.is_empty() || domain == "ai.onnx"
}

/// The epsilon of a BatchNormalization that normalises with its stored statistics, or None for training mode,
/// any other attribute, an attribute given twice or of the wrong type: those are left to tract as they are.
fn inference_epsilon(bn: &pb::NodeProto) -> Option<f32> {
    use pb::attribute_proto::AttributeType;
    let mut epsilon = DEFAULT_EPSILON;
    let mut seen = HashSet::new();
    for a in &bn.attribute {
        if !seen.insert(a.name.as_str()) {
            return None;
        }
        match (a.name.as_str(), a.r#type) {
            ("epsilon", t) if t == AttributeType::Float as i32 => epsilon = a.f,
            ("momentum", t) if t == AttributeType::Float as i32 => {}
            ("training_mode", t) if t == AttributeType::Int as i32 && a.i == 0 => {}
            _ => return None,
        }
    }
    (epsilon.is_finite() && epsilon >= 0.0).then_some(epsilon)
}

/// A float initializer's values, when they are stored in the file (not external) and match its shape.
fn float_values(t: &pb::TensorProto) -> Option<Vec<f32>> {
    if t.data_type != FLOAT || t.data_location == Some(1) || t.segment.is_some() {
        return None;
    }
    let len = t
        .dims
        .iter()
        .try_fold(1usize, |n, &d| n.checked_mul(usize::try_from(d).ok()?))?;
    let values = if !t.raw_data.is_empty() {
        if t.raw_data.len() != len.checked_mul(4)? {
            return None;
        }
        t.raw_data
            .chunks_exact(4)
            .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
            .collect()
    } else {
        t.float_data.clone()
    };
    (values.len() == len).then_some(values)
}

#[cfg(test)]
mod tests {
    use super::*;
    use tract_onnx::prelude::*;

    fn node(
        op: &str,
        inputs: &[&str],
        output: &str,
        attributes: Vec<pb::AttributeProto>,
    ) -> pb::NodeProto {
        pb::NodeProto {
            op_type: op.into(),
            name: output.into(),
            input: inputs.iter().map(|s| s.to_string()).collect(),
            output: vec![output.into()],
            attribute: attributes,
            ..Default::default()
        }
    }

    fn attribute(name: &str, kind: pb::attribute_proto::AttributeType) -> pb::AttributeProto {
        pb::AttributeProto {
            name: name.into(),
            r#type: kind as i32,
            ..Default::default()
        }
    }

    fn ints(name: &str, values: &[i64]) -> pb::AttributeProto {
        let ints = values.to_vec();
        pb::AttributeProto {
            ints,
            ..attribute(name, pb::attribute_proto::AttributeType::Ints)
        }
    }

    fn int(name: &str, i: i64) -> pb::AttributeProto {
        pb::AttributeProto {
            i,
            ..attribute(name, pb::attribute_proto::AttributeType::Int)
        }
    }

    fn float(name: &str, f: f32) -> pb::AttributeProto {
        pb::AttributeProto {
            f,
            ..attribute(name, pb::attribute_proto::AttributeType::Float)
        }
    }

    fn init(name: &str, dims: &[i64], values: Vec<f32>, raw: bool) -> pb::TensorProto {
        let mut t = pb::TensorProto {
            name: name.into(),
            dims: dims.to_vec(),
            data_type: FLOAT,
            ..Default::default()
        };
        if raw {
            t.raw_data = values.iter().flat_map(|v| v.to_le_bytes()).collect();
        } else {
            t.float_data = values;
        }
        t
    }

    fn value_info(name: &str, dims: &[i64]) -> pb::ValueInfoProto {
        use pb::tensor_shape_proto::{Dimension, dimension};
        pb::ValueInfoProto {
            name: name.into(),
            r#type: Some(pb::TypeProto {
                value: Some(pb::type_proto::Value::TensorType(pb::type_proto::Tensor {
                    elem_type: FLOAT,
                    shape: Some(pb::TensorShapeProto {
                        dim: dims
                            .iter()
                            .map(|&d| Dimension {
                                value: Some(dimension::Value::DimValue(d)),
                                ..Default::default()
                            })
                            .collect(),
                    }),
                })),
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    /// Deterministic values in [-1, 1) (a linear congruential sequence; test data only).
    fn values(n: usize, seed: u64) -> Vec<f32> {
        let mut state = seed;
        (0..n)
            .map(|_| {
                state = state
                    .wrapping_mul(6364136223846793005)
                    .wrapping_add(1442695040888963407);
                ((state >> 40) as f32 / (1u64 << 24) as f32) * 2.0 - 1.0
            })
            .collect()
    }

    /// Input channels and size.
    const C: usize = 3;
    const H: usize = 5;
    const EPSILON: f32 = 1e-3;

    /// One Conv (3x3, pads 1) and its BatchNormalization: `group` groups, `m` output channels.
    #[derive(Clone, Copy)]
    struct Layer {
        group: usize,
        m: usize,
        with_bias: bool,
    }

    /// x [1,3,5,5] → (Conv → BatchNormalization) per layer → y, weights stored raw or as float_data.
    fn conv_bn(layers: &[Layer], raw: bool) -> pb::ModelProto {
        let (mut nodes, mut initializer) = (Vec::new(), Vec::new());
        let (mut x, mut cin) = ("x".to_string(), C);
        for (i, l) in layers.iter().enumerate() {
            let seed = 10 * i as u64;
            let name = |base: &str| format!("{base}{i}");
            let per_group = cin / l.group;
            initializer.push(init(
                &name("w"),
                &[l.m as i64, per_group as i64, 3, 3],
                values(l.m * per_group * 9, seed + 1),
                raw,
            ));
            let mut conv_inputs = vec![x.clone(), name("w")];
            if l.with_bias {
                conv_inputs.push(name("cb"));
                initializer.push(init(&name("cb"), &[l.m as i64], values(l.m, seed + 2), raw));
            }
            let var: Vec<f32> = values(l.m, seed + 6)
                .iter()
                .map(|v| v.abs() + 0.5)
                .collect();
            initializer.extend([
                init(&name("scale"), &[l.m as i64], values(l.m, seed + 3), raw),
                init(&name("shift"), &[l.m as i64], values(l.m, seed + 4), raw),
                init(&name("mean"), &[l.m as i64], values(l.m, seed + 5), raw),
                init(&name("var"), &[l.m as i64], var, raw),
            ]);
            let inputs: Vec<&str> = conv_inputs.iter().map(String::as_str).collect();
            nodes.push(node(
                "Conv",
                &inputs,
                &name("c"),
                vec![
                    ints("kernel_shape", &[3, 3]),
                    ints("pads", &[1, 1, 1, 1]),
                    int("group", l.group as i64),
                ],
            ));
            let y = if i + 1 == layers.len() {
                "y".to_string()
            } else {
                name("y")
            };
            let bn_inputs = [
                name("c"),
                name("scale"),
                name("shift"),
                name("mean"),
                name("var"),
            ];
            let bn_inputs: Vec<&str> = bn_inputs.iter().map(String::as_str).collect();
            nodes.push(node(
                "BatchNormalization",
                &bn_inputs,
                &y,
                vec![float("epsilon", EPSILON)],
            ));
            (x, cin) = (y, l.m);
        }
        pb::ModelProto {
            ir_version: 8,
            opset_import: vec![pb::OperatorSetIdProto {
                domain: String::new(),
                version: 15,
            }],
            graph: Some(pb::GraphProto {
                node: nodes,
                initializer,
                input: vec![value_info("x", &[1, C as i64, H as i64, H as i64])],
                output: vec![value_info("y", &[1, cin as i64, H as i64, H as i64])],
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    fn depthwise(with_bias: bool) -> Layer {
        Layer {
            group: C,
            m: C,
            with_bias,
        }
    }

    fn run(model: &pb::ModelProto, x: &[f32]) -> Vec<f32> {
        let plan = tract_onnx::onnx()
            .model_for_proto_model(model)
            .and_then(|m| m.into_optimized())
            .and_then(|m| m.into_runnable())
            .expect("the test graph loads");
        let input = tract_ndarray::Array4::from_shape_vec((1, C, H, H), x.to_vec()).expect("shape");
        let out = plan
            .run(tvec!(Tensor::from(input).into()))
            .expect("the test graph runs");
        out[0]
            .to_plain_array_view::<f32>()
            .expect("float output")
            .iter()
            .copied()
            .collect()
    }

    /// The unfolded graph computed straight from the ONNX operator specification's definitions of Conv
    /// (cross-correlation, zero padding, groups) and BatchNormalization, in double precision.
    fn by_the_specification(model: &pb::ModelProto, layers: &[Layer], x: &[f32]) -> Vec<f32> {
        let graph = model.graph.as_ref().expect("graph");
        let get = |name: String| {
            graph
                .initializer
                .iter()
                .find(|t| t.name == name)
                .and_then(float_values)
                .expect("initializer")
        };
        let mut input: Vec<f64> = x.iter().map(|&v| v as f64).collect();
        let mut cin = C;
        for (i, l) in layers.iter().enumerate() {
            let w = get(format!("w{i}"));
            let [scale, shift, mean, var] =
                ["scale", "shift", "mean", "var"].map(|n| get(format!("{n}{i}")));
            let bias = if l.with_bias {
                get(format!("cb{i}"))
            } else {
                vec![0.0; l.m]
            };
            let (per_group, m_per_group) = (cin / l.group, l.m / l.group);
            let mut out = Vec::with_capacity(l.m * H * H);
            for k in 0..l.m {
                let first_channel = (k / m_per_group) * per_group;
                for r in 0..H as i64 {
                    for s in 0..H as i64 {
                        let mut acc = bias[k] as f64;
                        for ci in 0..per_group {
                            for di in 0..3i64 {
                                for dj in 0..3i64 {
                                    let (rr, ss) = (r + di - 1, s + dj - 1);
                                    if (0..H as i64).contains(&rr) && (0..H as i64).contains(&ss) {
                                        let wi = ((k * per_group + ci) * 3 + di as usize) * 3
                                            + dj as usize;
                                        let xi = ((first_channel + ci) * H + rr as usize) * H
                                            + ss as usize;
                                        acc += w[wi] as f64 * input[xi];
                                    }
                                }
                            }
                        }
                        out.push(
                            (acc - mean[k] as f64) / (var[k] as f64 + EPSILON as f64).sqrt()
                                * scale[k] as f64
                                + shift[k] as f64,
                        );
                    }
                }
            }
            (input, cin) = (out, l.m);
        }
        input.iter().map(|&v| v as f32).collect()
    }

    fn max_difference(a: &[f32], b: &[f32]) -> f32 {
        assert_eq!(a.len(), b.len());
        a.iter()
            .zip(b)
            .map(|(p, q)| (p - q).abs())
            .fold(0.0, f32::max)
    }

    fn initializer_names(model: &pb::ModelProto) -> Vec<&str> {
        let graph = model.graph.as_ref().expect("graph");
        graph.initializer.iter().map(|t| t.name.as_str()).collect()
    }

    #[test]
    fn each_conv_and_its_normalisation_become_one_conv_with_the_same_outputs() {
        let full = |m, with_bias| Layer {
            group: 1,
            m,
            with_bias,
        };
        let cases: [(&[Layer], bool); 5] = [
            (&[depthwise(false)], true),
            (&[depthwise(true)], false),
            (&[depthwise(true)], true),
            // Output channels differ from input channels, so a mixed-up channel index shows.
            (&[full(4, false)], true),
            // Two folds in one graph: a full convolution to 6 channels, then a grouped one (3 groups).
            (
                &[
                    full(6, true),
                    Layer {
                        group: 3,
                        m: 3,
                        with_bias: false,
                    },
                ],
                false,
            ),
        ];
        for (layers, raw) in cases {
            let original = conv_bn(layers, raw);
            let mut folded = original.clone();
            assert_eq!(fold_conv_batchnorm(&mut folded, &[]), layers.len());
            let graph = folded.graph.as_ref().expect("graph");
            assert!(
                graph.node.iter().all(|n| n.op_type == "Conv"),
                "only Convs are left"
            );
            assert_eq!(graph.node.len(), layers.len());
            assert_eq!(
                graph.node.last().map(|n| n.output.clone()),
                Some(vec!["y".to_string()])
            );
            let names = initializer_names(&folded);
            assert_eq!(
                names.len(),
                2 * layers.len(),
                "old weights dropped: {names:?}"
            );
            assert!(names.iter().all(|n| n.contains(".folded_")));
            let x = values(C * H * H, 7);
            let expected = by_the_specification(&original, layers, &x);
            // The ONNX specification's formulas in double precision against float arithmetic: a few ulps of
            // values of order 1.
            let (after, before) = (run(&folded, &x), run(&original, &x));
            assert!(max_difference(&after, &expected) < 1e-5, "folded");
            assert!(max_difference(&before, &expected) < 1e-5, "unfolded");
        }
    }

    #[test]
    fn new_names_do_not_meet_old_ones() {
        let mut model = conv_bn(&[depthwise(true)], false);
        let graph = model.graph.as_mut().expect("graph");
        graph.value_info.push(value_info("y.folded_weight", &[3]));
        assert_eq!(fold_conv_batchnorm(&mut model, &[]), 1);
        let names = initializer_names(&model);
        assert_eq!(names, vec!["y.folded_weight.2", "y.folded_bias"]);
    }

    #[test]
    fn patterns_that_do_not_match_exactly_are_left_alone() {
        fn unchanged(model: &mut pb::ModelProto, read_by_name: &[&str]) {
            let before = model.clone();
            assert_eq!(fold_conv_batchnorm(model, read_by_name), 0);
            assert_eq!(*model, before);
        }
        let base = || conv_bn(&[depthwise(true)], false);
        // The Conv's output is also a graph output.
        let mut model = base();
        if let Some(g) = model.graph.as_mut() {
            g.output.push(value_info("c0", &[1, 3, 5, 5]));
        }
        unchanged(&mut model, &[]);
        // The Conv's output is read by name (as a manifest's output tensor would be).
        unchanged(&mut base(), &["c0"]);
        // Training mode normalises with the batch's own statistics.
        let mut model = base();
        if let Some(g) = model.graph.as_mut() {
            g.node[1].attribute.push(int("training_mode", 1));
        }
        unchanged(&mut model, &[]);
        // An epsilon given twice, or not as a float.
        let mut model = base();
        if let Some(g) = model.graph.as_mut() {
            g.node[1].attribute.push(float("epsilon", 0.5));
        }
        unchanged(&mut model, &[]);
        let mut model = base();
        if let Some(g) = model.graph.as_mut() {
            g.node[1].attribute = vec![int("epsilon", 1)];
        }
        unchanged(&mut model, &[]);
        // Statistics that are not initializers (here, a graph input).
        let mut model = base();
        if let Some(g) = model.graph.as_mut() {
            g.initializer.retain(|t| t.name != "mean0");
            g.input.push(value_info("mean0", &[3]));
        }
        unchanged(&mut model, &[]);
        // A weight whose stored length does not match its shape.
        let mut model = conv_bn(&[depthwise(false)], true);
        if let Some(g) = model.graph.as_mut() {
            g.initializer[0].raw_data.truncate(8);
        }
        unchanged(&mut model, &[]);
        // A hostile shape: 2^36 output channels and no values. Nothing is allocated for it.
        let mut model = conv_bn(&[depthwise(false)], false);
        if let Some(g) = model.graph.as_mut() {
            g.initializer[0].dims = vec![1 << 36, 0, 3, 3];
            g.initializer[0].float_data.clear();
        }
        unchanged(&mut model, &[]);
        // A normalisation without an output.
        let mut model = base();
        if let Some(g) = model.graph.as_mut() {
            g.node[1].output.clear();
        }
        unchanged(&mut model, &[]);
        // An opset before 9, whose BatchNormalization had training and per-element variants.
        let mut model = base();
        model.opset_import[0].version = 8;
        unchanged(&mut model, &[]);
    }
}
