//! Model packages (an `.onnx` file and its manifest) and CPU inference with tract.
//!
//! At load the manifest is checked against the graph (input name, layout, size, dtype, class count), the
//! operators against what tract implements, and the file's SHA-256 becomes part of the model's identity.
//! The plan is optimised for concrete shapes, warmed up once, and shared by every worker thread.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use sha2::{Digest, Sha256};
use tract_onnx::pb;
use tract_onnx::prelude::*;

use crate::manifest::{Layout, Manifest, ManifestError, OutputKind};

/// Name of the inference engine, as results report it.
pub const TRACT_ENGINE: &str = "tract";

/// Largest `.onnx` file accepted (1 GiB).
pub const MAX_MODEL_BYTES: usize = 1 << 30;

/// Largest batch a symbolic-batch model is run with.
pub const MAX_BATCH: usize = 64;

/// Who a model is: enough to trace any result to the exact file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ModelIdentity {
    /// Name from the manifest.
    pub name: String,
    /// Version from the manifest.
    pub version: String,
    /// SHA-256 of the `.onnx` file, lower-case hex.
    pub sha256: String,
    /// The engine that runs it.
    pub engine: &'static str,
}

/// Why a model package cannot be used.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ModelError {
    /// A file could not be read.
    #[error("cannot read {path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    /// The manifest is invalid.
    #[error(transparent)]
    Manifest(#[from] ManifestError),
    /// The `.onnx` file is not a readable ONNX model.
    #[error("the ONNX file is not a readable model: {0}")]
    NotOnnx(String),
    /// The file is too large.
    #[error("the ONNX file is {0} bytes, more than the limit of {MAX_MODEL_BYTES}")]
    TooLarge(usize),
    /// The manifest and the graph disagree.
    #[error("manifest field `{field}` says {manifest}, but the model has {graph}")]
    Mismatch {
        field: &'static str,
        manifest: String,
        graph: String,
    },
    /// The graph uses an operator the engine does not implement.
    #[error(
        "node `{node}` uses operator `{op}` (domain `{domain}`), which the {engine} engine cannot run"
    )]
    UnsupportedOperator {
        node: String,
        op: String,
        domain: String,
        engine: &'static str,
    },
    /// The pinned hash does not match.
    #[error("the ONNX file's SHA-256 is {actual}, but {expected} was pinned")]
    HashMismatch { expected: String, actual: String },
    /// The engine could not prepare the model.
    #[error("the {engine} engine could not prepare the model: {reason}")]
    Engine {
        engine: &'static str,
        reason: String,
    },
}

/// Why one inference failed.
#[derive(Debug, Clone, thiserror::Error)]
#[error("inference failed: {0}")]
pub struct InferenceError(pub String);

/// A model package as read from disk or from embedded bytes, not yet prepared.
#[derive(Debug, Clone)]
pub struct ModelPackage {
    /// The manifest.
    pub manifest: Manifest,
    /// The `.onnx` bytes.
    pub onnx: Arc<[u8]>,
}

impl ModelPackage {
    /// A package from a manifest's text and the ONNX bytes.
    pub fn from_parts(manifest_toml: &str, onnx: impl Into<Arc<[u8]>>) -> Result<Self, ModelError> {
        let manifest = Manifest::parse(manifest_toml)?;
        let onnx = onnx.into();
        if onnx.len() > MAX_MODEL_BYTES {
            return Err(ModelError::TooLarge(onnx.len()));
        }
        Ok(Self { manifest, onnx })
    }

    /// Reads a package directory holding `manifest.toml` and the `.onnx` file it names. A path to a
    /// manifest file is accepted too.
    pub fn read(path: &Path) -> Result<Self, ModelError> {
        let manifest_path = if path.is_dir() {
            path.join("manifest.toml")
        } else {
            path.to_path_buf()
        };
        let dir = manifest_path.parent().unwrap_or(Path::new("."));
        let text = std::fs::read_to_string(&manifest_path).map_err(|source| ModelError::Io {
            path: manifest_path.clone(),
            source,
        })?;
        let manifest = Manifest::parse(&text)?;
        let onnx_path = dir.join(&manifest.file);
        let size = std::fs::metadata(&onnx_path)
            .map_err(|source| ModelError::Io {
                path: onnx_path.clone(),
                source,
            })?
            .len();
        if size > MAX_MODEL_BYTES as u64 {
            return Err(ModelError::TooLarge(size as usize));
        }
        let onnx: Arc<[u8]> = std::fs::read(&onnx_path)
            .map_err(|source| ModelError::Io {
                path: onnx_path,
                source,
            })?
            .into();
        Ok(Self { manifest, onnx })
    }

    /// SHA-256 of the ONNX bytes, lower-case hex.
    pub fn sha256(&self) -> String {
        hex::encode(Sha256::digest(&self.onnx))
    }
}

/// A prepared model: checked, optimised, warmed up, and safe to share across threads.
pub struct Model {
    manifest: Manifest,
    identity: ModelIdentity,
    /// The optimised graph with concrete batch 1.
    plan: Arc<TypedRunnableModel>,
    /// Input shape for batch 1.
    input_shape: [usize; 4],
    /// Present when the graph's batch dimension is symbolic: the typed (unoptimised) model to derive
    /// concrete plans for other batch sizes from, and the plans made so far.
    batching: Option<Batching>,
}

struct Batching {
    typed: TypedModel,
    symbol: Symbol,
    plans: Mutex<HashMap<usize, Arc<TypedRunnableModel>>>,
}

impl std::fmt::Debug for Model {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Model")
            .field("identity", &self.identity)
            .finish_non_exhaustive()
    }
}

/// Dimension of an ONNX value: a number, a symbol, or unknown.
#[derive(Debug, Clone, PartialEq)]
enum Dim {
    Fixed(i64),
    Symbolic(String),
}

impl std::fmt::Display for Dim {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Dim::Fixed(v) => write!(f, "{v}"),
            Dim::Symbolic(s) if s.is_empty() => f.write_str("?"),
            Dim::Symbolic(s) => f.write_str(s),
        }
    }
}

fn value_type(info: &pb::ValueInfoProto) -> Option<(i32, Vec<Dim>)> {
    let pb::type_proto::Value::TensorType(tensor) = info.r#type.as_ref()?.value.as_ref()?;
    let dims = tensor
        .shape
        .as_ref()?
        .dim
        .iter()
        .map(|d| match &d.value {
            Some(pb::tensor_shape_proto::dimension::Value::DimValue(v)) => Dim::Fixed(*v),
            Some(pb::tensor_shape_proto::dimension::Value::DimParam(s)) => Dim::Symbolic(s.clone()),
            None => Dim::Symbolic(String::new()),
        })
        .collect();
    Some((tensor.elem_type, dims))
}

fn shape_text(dims: &[Dim]) -> String {
    let parts: Vec<String> = dims.iter().map(|d| d.to_string()).collect();
    format!("[{}]", parts.join(", "))
}

const ONNX_FLOAT: i32 = 1;

impl Model {
    /// Checks and prepares a package. `pinned_sha256`, when given, must match the file's hash.
    pub fn load(package: &ModelPackage, pinned_sha256: Option<&str>) -> Result<Self, ModelError> {
        let manifest = package.manifest.clone();
        let sha256 = package.sha256();
        if let Some(expected) = pinned_sha256
            && !expected.eq_ignore_ascii_case(&sha256)
        {
            return Err(ModelError::HashMismatch {
                expected: expected.to_lowercase(),
                actual: sha256,
            });
        }
        let onnx = tract_onnx::onnx();
        let proto = onnx
            .proto_model_for_read(&mut &package.onnx[..])
            .map_err(|e| ModelError::NotOnnx(format!("{e:#}")))?;
        let graph = proto
            .graph
            .as_ref()
            .ok_or_else(|| ModelError::NotOnnx("it holds no graph".into()))?;
        check_operators(graph, &onnx)?;
        let (batch_symbol, input_shape) = check_input(&manifest, graph)?;
        check_output_declared(&manifest, graph)?;

        let engine_error = |e: TractError| ModelError::Engine {
            engine: TRACT_ENGINE,
            reason: format!("{e:#}"),
        };
        let mut inference = onnx.model_for_proto_model(&proto).map_err(engine_error)?;
        if !manifest.output.tensor.is_empty() {
            inference = inference
                .with_outputs_by_name([manifest.output.tensor.as_str()])
                .map_err(engine_error)?;
        }
        // Type the graph with a symbolic batch (when it has one) so that other batch sizes can be derived,
        // then make the batch-1 plan from it.
        let symbolic = batch_symbol.is_some();
        let typed = if symbolic {
            let batch = inference.symbols.sym("framewise_batch");
            let mut shape: TVec<TDim> = input_shape.iter().map(|&d| TDim::from(d)).collect();
            shape[0] = batch.clone().into();
            let fact = f32::fact(shape);
            let typed = inference
                .with_input_fact(0, fact.into())
                .map_err(engine_error)?
                .into_typed()
                .map_err(engine_error)?;
            Some((typed, batch))
        } else {
            None
        };
        let concrete = match &typed {
            Some((typed, symbol)) => concretize(typed, symbol, 1).map_err(engine_error)?,
            None => {
                let fact = f32::fact(input_shape);
                let inference = onnx.model_for_proto_model(&proto).map_err(engine_error)?;
                let inference = if manifest.output.tensor.is_empty() {
                    inference
                } else {
                    inference
                        .with_outputs_by_name([manifest.output.tensor.as_str()])
                        .map_err(engine_error)?
                };
                inference
                    .with_input_fact(0, fact.into())
                    .map_err(engine_error)?
                    .into_typed()
                    .map_err(engine_error)?
            }
        };
        check_output(&manifest, &concrete)?;
        let plan = concrete
            .into_optimized()
            .map_err(engine_error)?
            .into_runnable()
            .map_err(engine_error)?;
        let identity = ModelIdentity {
            name: manifest.name.clone(),
            version: manifest.version.clone(),
            sha256,
            engine: TRACT_ENGINE,
        };
        let model = Self {
            manifest,
            identity,
            plan,
            input_shape,
            batching: typed.map(|(typed, symbol)| Batching {
                typed,
                symbol,
                plans: Mutex::new(HashMap::new()),
            }),
        };
        // Warm-up: the first run allocates and touches everything once.
        let zeros = vec![0.0f32; model.input_len()];
        model.infer(&zeros).map_err(|e| ModelError::Engine {
            engine: TRACT_ENGINE,
            reason: e.0,
        })?;
        Ok(model)
    }

    /// The manifest.
    pub fn manifest(&self) -> &Manifest {
        &self.manifest
    }

    /// Name, version, SHA-256 and engine.
    pub fn identity(&self) -> &ModelIdentity {
        &self.identity
    }

    /// Class names in output order.
    pub fn classes(&self) -> &[String] {
        &self.manifest.classes
    }

    /// Number of `f32` values of one frame's input tensor.
    pub fn input_len(&self) -> usize {
        self.input_shape.iter().product()
    }

    /// Shape of the batch-1 input tensor.
    pub fn input_shape(&self) -> [usize; 4] {
        self.input_shape
    }

    /// True when the graph has a symbolic batch dimension, so [`Model::infer_batch`] can run several frames.
    pub fn can_batch(&self) -> bool {
        self.batching.is_some()
    }

    /// Runs one frame's input tensor (in the manifest's layout) and returns class probabilities (softmax
    /// applied when the manifest says the outputs are logits).
    pub fn infer(&self, input: &[f32]) -> Result<Vec<f32>, InferenceError> {
        let mut out = self.run(&self.plan, 1, input)?;
        Ok(out.pop().unwrap_or_default())
    }

    /// Runs several frames' input tensors as one batch. Needs a symbolic batch dimension.
    pub fn infer_batch(&self, inputs: &[&[f32]]) -> Result<Vec<Vec<f32>>, InferenceError> {
        let n = inputs.len();
        if n == 0 {
            return Ok(Vec::new());
        }
        if n == 1 {
            return Ok(vec![self.infer(inputs[0])?]);
        }
        let batching = self
            .batching
            .as_ref()
            .ok_or_else(|| InferenceError("the model has a fixed batch dimension of 1".into()))?;
        if n > MAX_BATCH {
            return Err(InferenceError(format!(
                "batch of {n} is larger than the limit of {MAX_BATCH}"
            )));
        }
        let plan = {
            let mut plans = batching
                .plans
                .lock()
                .map_err(|_| InferenceError("plan cache poisoned".into()))?;
            match plans.get(&n) {
                Some(plan) => plan.clone(),
                None => {
                    let plan = concretize(&batching.typed, &batching.symbol, n)
                        .and_then(|m| m.into_optimized())
                        .and_then(|m| m.into_runnable())
                        .map_err(|e| InferenceError(format!("{e:#}")))?;
                    plans.insert(n, plan.clone());
                    plan
                }
            }
        };
        let mut joined = Vec::with_capacity(n * self.input_len());
        for input in inputs {
            joined.extend_from_slice(input);
        }
        self.run(&plan, n, &joined)
    }

    fn run(
        &self,
        plan: &Arc<TypedRunnableModel>,
        batch: usize,
        input: &[f32],
    ) -> Result<Vec<Vec<f32>>, InferenceError> {
        let per_frame = self.input_len();
        if input.len() != per_frame * batch {
            return Err(InferenceError(format!(
                "input tensor has {} values, expected {} for a batch of {batch}",
                input.len(),
                per_frame * batch
            )));
        }
        let mut shape = self.input_shape;
        shape[0] = batch;
        let tensor =
            Tensor::from_shape(&shape, input).map_err(|e| InferenceError(format!("{e:#}")))?;
        let outputs = plan
            .run(tvec![tensor.into()])
            .map_err(|e| InferenceError(format!("{e:#}")))?;
        let first = outputs
            .first()
            .ok_or_else(|| InferenceError("the model produced no output".into()))?;
        let view = first
            .to_plain_array_view::<f32>()
            .map_err(|e| InferenceError(format!("{e:#}")))?;
        let values: Vec<f32> = view.iter().copied().collect();
        let k = self.manifest.classes.len();
        if values.len() != k * batch {
            return Err(InferenceError(format!(
                "output has {} values, expected {}",
                values.len(),
                k * batch
            )));
        }
        Ok(values
            .chunks_exact(k)
            .map(|scores| match self.manifest.output.kind {
                OutputKind::Logits => softmax(scores),
                OutputKind::Probabilities => scores.to_vec(),
            })
            .collect())
    }
}

fn concretize(typed: &TypedModel, symbol: &Symbol, batch: usize) -> TractResult<TypedModel> {
    let subs: HashMap<Symbol, TDim> = [(symbol.clone(), TDim::from(batch))].into_iter().collect();
    typed.set_symbols(&subs)
}

/// Softmax in double precision, rounded to `f32` once at the end.
pub fn softmax(scores: &[f32]) -> Vec<f32> {
    let max = scores.iter().copied().fold(f32::NEG_INFINITY, f32::max) as f64;
    let exps: Vec<f64> = scores.iter().map(|&s| (s as f64 - max).exp()).collect();
    let sum: f64 = exps.iter().sum();
    exps.iter().map(|e| (e / sum) as f32).collect()
}

fn check_operators(graph: &pb::GraphProto, onnx: &tract_onnx::Onnx) -> Result<(), ModelError> {
    for (i, node) in graph.node.iter().enumerate() {
        let standard = node.domain.is_empty() || node.domain == "ai.onnx";
        if !standard || !onnx.op_register.0.contains_key(&node.op_type) {
            let name = if node.name.is_empty() {
                format!("#{i}")
            } else {
                node.name.clone()
            };
            return Err(ModelError::UnsupportedOperator {
                node: name,
                op: node.op_type.clone(),
                domain: if node.domain.is_empty() {
                    "ai.onnx".into()
                } else {
                    node.domain.clone()
                },
                engine: TRACT_ENGINE,
            });
        }
    }
    Ok(())
}

/// Checks the graph's image input against the manifest; returns the batch symbol (if symbolic) and the
/// batch-1 input shape in the manifest's layout.
fn check_input(
    manifest: &Manifest,
    graph: &pb::GraphProto,
) -> Result<(Option<String>, [usize; 4]), ModelError> {
    let initializers: Vec<&str> = graph.initializer.iter().map(|t| t.name.as_str()).collect();
    let inputs: Vec<&pb::ValueInfoProto> = graph
        .input
        .iter()
        .filter(|i| !initializers.contains(&i.name.as_str()))
        .collect();
    let names: Vec<&str> = inputs.iter().map(|i| i.name.as_str()).collect();
    let spec = &manifest.input;
    if inputs.len() != 1 || names[0] != spec.tensor {
        return Err(ModelError::Mismatch {
            field: "input.tensor",
            manifest: format!("`{}`", spec.tensor),
            graph: format!(
                "inputs {names:?} (framewise needs exactly one image input, the weights as initializers)"
            ),
        });
    }
    let (elem, dims) = value_type(inputs[0]).ok_or_else(|| ModelError::Mismatch {
        field: "input.tensor",
        manifest: format!("`{}` is a tensor", spec.tensor),
        graph: "no tensor type declared for it".into(),
    })?;
    if elem != ONNX_FLOAT {
        return Err(ModelError::Mismatch {
            field: "input.tensor",
            manifest: "float32 (framewise feeds float32)".into(),
            graph: format!("element type {elem} (ONNX TensorProto.DataType)"),
        });
    }
    let (h, w) = (spec.height as usize, spec.width as usize);
    let expected: [usize; 4] = match spec.layout {
        Layout::Nchw => [1, 3, h, w],
        Layout::Nhwc => [1, h, w, 3],
    };
    if dims.len() != 4 {
        return Err(ModelError::Mismatch {
            field: "input.layout",
            manifest: format!("{:?} (rank 4)", spec.layout),
            graph: format!("input shape {}", shape_text(&dims)),
        });
    }
    let field_of = |axis: usize| match (spec.layout, axis) {
        (_, 0) => "input.tensor",
        (Layout::Nchw, 1) | (Layout::Nhwc, 3) => "input.layout",
        (Layout::Nchw, 2) | (Layout::Nhwc, 1) => "input.height",
        _ => "input.width",
    };
    let mut batch_symbol = None;
    for (axis, dim) in dims.iter().enumerate() {
        match dim {
            Dim::Fixed(v) if *v == expected[axis] as i64 => {}
            Dim::Symbolic(s) if axis == 0 => batch_symbol = Some(s.clone()),
            Dim::Symbolic(_) if axis != 0 && field_of(axis) != "input.layout" => {}
            _ => {
                let expected_text: Vec<String> = expected
                    .iter()
                    .enumerate()
                    .map(|(i, v)| {
                        if i == 0 {
                            "batch".into()
                        } else {
                            v.to_string()
                        }
                    })
                    .collect();
                return Err(ModelError::Mismatch {
                    field: field_of(axis),
                    manifest: format!(
                        "input shape [{}] ({:?})",
                        expected_text.join(", "),
                        spec.layout
                    ),
                    graph: format!("input shape {}", shape_text(&dims)),
                });
            }
        }
    }
    Ok((batch_symbol, expected))
}

fn check_output_declared(manifest: &Manifest, graph: &pb::GraphProto) -> Result<(), ModelError> {
    let names: Vec<&str> = graph.output.iter().map(|o| o.name.as_str()).collect();
    let wanted = &manifest.output.tensor;
    let info = if wanted.is_empty() {
        graph.output.first()
    } else {
        graph.output.iter().find(|o| &o.name == wanted)
    };
    let info = info.ok_or_else(|| ModelError::Mismatch {
        field: "output.tensor",
        manifest: format!("`{wanted}`"),
        graph: format!("outputs {names:?}"),
    })?;
    if let Some((elem, _)) = value_type(info)
        && elem != ONNX_FLOAT
    {
        return Err(ModelError::Mismatch {
            field: "output.tensor",
            manifest: "float32 class scores".into(),
            graph: format!(
                "element type {elem} (ONNX TensorProto.DataType) for `{}`",
                info.name
            ),
        });
    }
    Ok(())
}

fn check_output(manifest: &Manifest, typed: &TypedModel) -> Result<(), ModelError> {
    let fact = typed.output_fact(0).map_err(|e| ModelError::Engine {
        engine: TRACT_ENGINE,
        reason: format!("{e:#}"),
    })?;
    let k = manifest.classes.len();
    let shape = fact.shape.as_concrete().map(|s| s.to_vec());
    let values = shape.as_ref().map(|s| s.iter().product::<usize>());
    if fact.datum_type != f32::datum_type() || values != Some(k) {
        let graph = match shape {
            Some(s) => format!(
                "an output of shape {s:?} ({} values per frame, {:?})",
                values.unwrap_or(0),
                fact.datum_type
            ),
            None => format!("an output of shape {:?}", fact.shape),
        };
        return Err(ModelError::Mismatch {
            field: "classes",
            manifest: format!("{k} classes ({})", manifest.classes.join(", ")),
            graph,
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn softmax_is_stable_and_normalised() {
        let p = softmax(&[1000.0, 1000.0, 0.0]);
        assert!((p[0] - 0.5).abs() < 1e-6 && (p[1] - 0.5).abs() < 1e-6 && p[2] < 1e-30);
        // Worked value: softmax([1, 2, 3]) = [0.09003057, 0.24472847, 0.66524096] (common practice,
        // e^x / sum e^x computed by hand).
        let p = softmax(&[1.0, 2.0, 3.0]);
        for (got, want) in p.iter().zip([0.090_030_57f32, 0.244_728_47, 0.665_240_96]) {
            assert!((got - want).abs() < 1e-7, "{got} vs {want}");
        }
    }
}
