//! Model packages (an `.onnx` file and its manifest) and CPU inference with tract or ONNX Runtime.
//!
//! At load the manifest is checked against the graph (input name, layout, size, dtype, class count), the
//! operators against what the engine implements, and the file's SHA-256 becomes part of the model's identity.
//! With tract the plan is optimised for concrete shapes and shared by every worker thread, each of which keeps
//! its own run state; with ONNX Runtime each concurrent caller gets its own session. Both are warmed up once.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use sha2::{Digest, Sha256};
use tract_onnx::pb;
use tract_onnx::prelude::*;

use crate::cases::{SelfTest, SelfTestOutcome};
use crate::engine::{EngineKind, EngineOptions};
pub use crate::engine::{ONNXRUNTIME_ENGINE, TRACT_ENGINE};
use crate::manifest::{Layout, Manifest, ManifestError, OutputKind};

/// Largest `.onnx` file accepted (1 GiB).
pub const MAX_MODEL_BYTES: usize = 1 << 30;

/// Largest batch a symbolic-batch model is run with.
pub const MAX_BATCH: usize = 64;

/// Who a model is: enough to trace any result to the exact file, and whether its self-test passed here.
#[derive(Debug, Clone, PartialEq)]
pub struct ModelIdentity {
    /// Name from the manifest.
    pub name: String,
    /// Version from the manifest.
    pub version: String,
    /// SHA-256 of the `.onnx` file, lower-case hex.
    pub sha256: String,
    /// The engine that runs it.
    pub engine: &'static str,
    /// What the package's self-test showed on this host ([`crate::selftest`]).
    pub self_test: SelfTestOutcome,
}

/// One node's part of an inference, from [`Model::node_times`].
#[derive(Debug, Clone, PartialEq)]
pub struct NodeTime {
    /// The node's name in the optimised plan; tract keeps the ONNX node's name at its start.
    pub name: String,
    /// The operator that runs it.
    pub op: String,
    /// Mean microseconds per run.
    pub micros: f64,
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
    /// The package's self-test cases cannot be used.
    #[error(transparent)]
    SelfTestInvalid(#[from] crate::cases::CasesError),
    /// The model's outputs on its own reference cases differ from the validation pipeline's.
    #[error(
        "model `{model}` failed its self-test on the {engine} engine: {summary}. The probabilities this host \
         gives are not the ones the model was validated with: check the manifest's recipe against the \
         validation pipeline (or serve it marked as failing with --serve-failed-self-test)"
    )]
    SelfTestFailed {
        model: String,
        engine: &'static str,
        summary: String,
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
    /// The reference cases the manifest's `self_test` names, read with their images.
    pub self_test: Option<SelfTest>,
}

impl ModelPackage {
    /// A package from a manifest's text and the ONNX bytes.
    pub fn from_parts(manifest_toml: &str, onnx: impl Into<Arc<[u8]>>) -> Result<Self, ModelError> {
        let manifest = Manifest::parse(manifest_toml)?;
        let onnx = onnx.into();
        if onnx.len() > MAX_MODEL_BYTES {
            return Err(ModelError::TooLarge(onnx.len()));
        }
        Ok(Self {
            manifest,
            onnx,
            self_test: None,
        })
    }

    /// The package with reference cases from a cases file's text (`name` for messages), each image read by
    /// `read` from its name: for embedded packages.
    pub fn with_self_test(
        mut self,
        name: &str,
        text: &str,
        read: impl FnMut(&str) -> Result<Vec<u8>, String>,
    ) -> Result<Self, ModelError> {
        self.self_test = Some(SelfTest::parse(
            name,
            text,
            self.manifest.classes.len(),
            read,
        )?);
        Ok(self)
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
        let self_test = match manifest.self_test.as_str() {
            "" => None,
            cases if !crate::cases::is_inside(cases) => {
                return Err(ModelError::Manifest(ManifestError::Field {
                    field: "self_test",
                    problem: format!(
                        "is `{cases}`; name the cases file by a path inside the package, relative to the \
                         manifest"
                    ),
                }));
            }
            cases => Some(SelfTest::read(&dir.join(cases), manifest.classes.len())?),
        };
        Ok(Self {
            manifest,
            onnx,
            self_test,
        })
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
    /// Input shape for batch 1.
    input_shape: [usize; 4],
    backend: Backend,
}

enum Backend {
    Tract(Box<TractModel>),
    #[cfg(feature = "onnxruntime")]
    OnnxRuntime(crate::engine::onnxruntime::OrtModel),
}

struct TractModel {
    /// The optimised graph with concrete batch 1.
    plan: Arc<TypedRunnableModel>,
    /// Run states of the batch-1 plan not in use; each caller takes one and gives it back, so buffers are
    /// reused from frame to frame.
    states: Mutex<Vec<TypedSimpleState>>,
    /// Present when the graph's batch dimension is symbolic: the typed (unoptimised) model to derive
    /// concrete plans for other batch sizes from, and the plans made so far.
    batching: Option<Batching>,
}

struct Batching {
    typed: TypedModel,
    symbol: Symbol,
    run_options: RunOptions,
    plans: Mutex<HashMap<usize, Arc<TypedRunnableModel>>>,
}

impl std::fmt::Debug for Model {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Model")
            .field("identity", &self.identity)
            .finish_non_exhaustive()
    }
}

/// A declared dimension of an ONNX value: a positive size, or free (a name, -1, 0, or nothing), as exporters
/// write them.
#[derive(Debug, Clone, PartialEq)]
enum Dim {
    Fixed(i64),
    Free(String),
}

impl std::fmt::Display for Dim {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Dim::Fixed(v) => write!(f, "{v}"),
            Dim::Free(s) if s.is_empty() => f.write_str("?"),
            Dim::Free(s) => f.write_str(s),
        }
    }
}

/// The element type of a tensor value and its declared dimensions (`None` when it declares no shape).
fn value_type(info: &pb::ValueInfoProto) -> Option<(i32, Option<Vec<Dim>>)> {
    let pb::type_proto::Value::TensorType(tensor) = info.r#type.as_ref()?.value.as_ref()?;
    let dims = tensor.shape.as_ref().map(|shape| {
        shape
            .dim
            .iter()
            .map(|d| match &d.value {
                Some(pb::tensor_shape_proto::dimension::Value::DimValue(v)) if *v > 0 => {
                    Dim::Fixed(*v)
                }
                Some(pb::tensor_shape_proto::dimension::Value::DimValue(v)) => {
                    Dim::Free(v.to_string())
                }
                Some(pb::tensor_shape_proto::dimension::Value::DimParam(s)) => Dim::Free(s.clone()),
                None => Dim::Free(String::new()),
            })
            .collect()
    });
    Some((tensor.elem_type, dims))
}

fn shape_text(dims: &[Dim]) -> String {
    let parts: Vec<String> = dims.iter().map(|d| d.to_string()).collect();
    format!("[{}]", parts.join(", "))
}

/// What the graph's image input needs: the batch-1 shape in the manifest's layout, whether the graph left its
/// batch free (so that tract may run several frames at once), and whether any dimension was free or missing
/// (so that the engines get a copy with the manifest's sizes written in).
#[derive(Debug, Clone, PartialEq)]
struct InputPlan {
    shape: [usize; 4],
    batch_free: bool,
    any_free: bool,
}

const ONNX_FLOAT: i32 = 1;

impl Model {
    /// Checks and prepares a package on tract with one thread. `pinned_sha256`, when given, must match the
    /// file's hash.
    pub fn load(package: &ModelPackage, pinned_sha256: Option<&str>) -> Result<Self, ModelError> {
        Self::load_with(package, pinned_sha256, &EngineOptions::default())
    }

    /// Checks and prepares a package on the engine the options choose. With [`EngineKind::Auto`], ONNX
    /// Runtime is used when its library loads and tract otherwise.
    pub fn load_with(
        package: &ModelPackage,
        pinned_sha256: Option<&str>,
        options: &EngineOptions,
    ) -> Result<Self, ModelError> {
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
        let mut proto = onnx
            .proto_model_for_read(&mut &package.onnx[..])
            .map_err(|e| ModelError::NotOnnx(format!("{e:#}")))?;
        let graph = proto
            .graph
            .as_ref()
            .ok_or_else(|| ModelError::NotOnnx("it holds no graph".into()))?;
        let plan = check_input(&manifest, graph)?;
        let input_shape = plan.shape;
        check_output_declared(&manifest, graph)?;
        // Free or missing input dimensions are written in from the manifest, in the engines' copy of the
        // graph (the file and its SHA-256 are untouched): ONNX Runtime takes a 0 literally, and a copy with
        // concrete sizes lets both engines type every node.
        if plan.any_free {
            fix_input_shape(&mut proto, &manifest.input.tensor, input_shape);
        }

        let use_onnxruntime = match options.kind {
            EngineKind::Tract => false,
            EngineKind::OnnxRuntime => {
                crate::engine::load_onnxruntime(options).map_err(|e| ModelError::Engine {
                    engine: ONNXRUNTIME_ENGINE,
                    reason: e.0,
                })?;
                true
            }
            EngineKind::Auto => crate::engine::load_onnxruntime(options).is_ok(),
        };
        let (backend, engine) = if use_onnxruntime {
            let bytes: Arc<[u8]> = if plan.any_free {
                use prost::Message;
                proto.encode_to_vec().into()
            } else {
                package.onnx.clone()
            };
            (
                onnxruntime_backend(bytes, &manifest, options)?,
                ONNXRUNTIME_ENGINE,
            )
        } else {
            if let Some(graph) = proto.graph.as_ref() {
                check_operators(graph, &onnx)?;
            }
            let tract = contain_panic(TRACT_ENGINE, || {
                tract_backend(
                    &onnx,
                    &proto,
                    &manifest,
                    plan.batch_free,
                    input_shape,
                    options.threads,
                )
            })?;
            (Backend::Tract(Box::new(tract)), TRACT_ENGINE)
        };
        let identity = ModelIdentity {
            name: manifest.name.clone(),
            version: manifest.version.clone(),
            sha256,
            engine,
            // [`crate::selftest::load`] runs the cases and records what they showed.
            self_test: if package.self_test.is_some() {
                SelfTestOutcome::NotRun
            } else {
                SelfTestOutcome::Absent
            },
        };
        let model = Self {
            manifest,
            identity,
            input_shape,
            backend,
        };
        // Warm-up: the first run allocates and touches everything once. It also checks the class count for
        // the engine that does not expose output shapes before running.
        let zeros = vec![0.0f32; model.input_len()];
        let k = model.manifest.classes.len();
        let raw = contain_panic(engine, || {
            model.run(1, &zeros).map_err(|e| ModelError::Engine {
                engine,
                reason: e.0,
            })
        })?;
        if raw.len() != k {
            return Err(ModelError::Mismatch {
                field: "classes",
                manifest: format!("{k} classes ({})", model.manifest.classes.join(", ")),
                graph: format!("an output of {} values per frame", raw.len()),
            });
        }
        Ok(model)
    }

    /// The manifest.
    pub fn manifest(&self) -> &Manifest {
        &self.manifest
    }

    /// Records what the package's self-test showed ([`crate::selftest::load`]).
    pub(crate) fn set_self_test(&mut self, outcome: SelfTestOutcome) {
        self.identity.self_test = outcome;
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
        match &self.backend {
            Backend::Tract(t) => t.batching.is_some(),
            #[cfg(feature = "onnxruntime")]
            Backend::OnnxRuntime(_) => false,
        }
    }

    /// Runs one frame's input tensor (in the manifest's layout) and returns class probabilities (softmax
    /// applied when the manifest says the outputs are logits).
    pub fn infer(&self, input: &[f32]) -> Result<Vec<f32>, InferenceError> {
        let raw = self.run(1, input)?;
        let mut out = self.scores(raw, 1)?;
        Ok(out.pop().unwrap_or_default())
    }

    /// Where an inference's time goes, node by node: `runs` runs of one frame's `input` on tract's optimised
    /// plan (the plan [`Model::infer`] runs), after one untimed run, with each node's mean time per run.
    /// `None` for ONNX Runtime, whose own profiler does this job. For measuring; not used while serving.
    pub fn node_times(
        &self,
        input: &[f32],
        runs: usize,
    ) -> Result<Option<Vec<NodeTime>>, InferenceError> {
        if input.len() != self.input_len() {
            return Err(InferenceError(format!(
                "input tensor has {} values, expected {}",
                input.len(),
                self.input_len()
            )));
        }
        match &self.backend {
            Backend::Tract(t) => t.node_times(self.input_shape, input, runs).map(Some),
            #[cfg(feature = "onnxruntime")]
            Backend::OnnxRuntime(_) => Ok(None),
        }
    }

    /// Runs several frames' input tensors as one batch. Needs a symbolic batch dimension (tract).
    pub fn infer_batch(&self, inputs: &[&[f32]]) -> Result<Vec<Vec<f32>>, InferenceError> {
        let n = inputs.len();
        if n == 0 {
            return Ok(Vec::new());
        }
        if n == 1 {
            return Ok(vec![self.infer(inputs[0])?]);
        }
        if !self.can_batch() {
            return Err(InferenceError(
                "the model has a fixed batch dimension of 1 (or its engine runs single frames)"
                    .into(),
            ));
        }
        if n > MAX_BATCH {
            return Err(InferenceError(format!(
                "batch of {n} is larger than the limit of {MAX_BATCH}"
            )));
        }
        let mut joined = Vec::with_capacity(n * self.input_len());
        for input in inputs {
            joined.extend_from_slice(input);
        }
        let raw = self.run(n, &joined)?;
        self.scores(raw, n)
    }

    /// Runs a batch through the engine and returns its raw output values.
    fn run(&self, batch: usize, input: &[f32]) -> Result<Vec<f32>, InferenceError> {
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
        match &self.backend {
            Backend::Tract(t) => t.run(shape, input),
            #[cfg(feature = "onnxruntime")]
            Backend::OnnxRuntime(o) => o.run(shape, input).map_err(InferenceError),
        }
    }

    /// Splits raw outputs into frames and applies softmax to logits.
    fn scores(&self, values: Vec<f32>, batch: usize) -> Result<Vec<Vec<f32>>, InferenceError> {
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

#[cfg(feature = "onnxruntime")]
fn onnxruntime_backend(
    onnx: Arc<[u8]>,
    manifest: &Manifest,
    options: &EngineOptions,
) -> Result<Backend, ModelError> {
    crate::engine::onnxruntime::OrtModel::new(
        &options.library_path(),
        onnx,
        options.threads,
        &manifest.input.tensor,
        &manifest.output.tensor,
    )
    .map(Backend::OnnxRuntime)
    .map_err(|reason| ModelError::Engine {
        engine: ONNXRUNTIME_ENGINE,
        reason,
    })
}

#[cfg(not(feature = "onnxruntime"))]
fn onnxruntime_backend(
    _onnx: Arc<[u8]>,
    _manifest: &Manifest,
    _options: &EngineOptions,
) -> Result<Backend, ModelError> {
    Err(ModelError::Engine {
        engine: ONNXRUNTIME_ENGINE,
        reason: "this build has no ONNX Runtime engine (cargo feature `onnxruntime` off)".into(),
    })
}

/// Runs an engine's preparation of a graph, turning a panic inside the engine into a refusal of the model:
/// a corrupt file can reach engine code that indexes without checking (a bit-flipped `Flatten` axis did).
fn contain_panic<T>(
    engine: &'static str,
    prepare: impl FnOnce() -> Result<T, ModelError>,
) -> Result<T, ModelError> {
    std::panic::catch_unwind(std::panic::AssertUnwindSafe(prepare)).unwrap_or_else(|payload| {
        let what = crate::panic_text(payload.as_ref());
        Err(ModelError::Engine {
            engine,
            reason: format!("it failed inside the engine ({what}); the file may be corrupt"),
        })
    })
}

/// Prepares the tract plan: each Conv's BatchNormalization folded in (`fold.rs`), typed with a symbolic batch
/// when the graph has one (so other batch sizes can be derived), concretised to batch 1, optimised, and run on
/// a private thread pool when `threads` > 1.
fn tract_backend(
    onnx: &tract_onnx::Onnx,
    proto: &pb::ModelProto,
    manifest: &Manifest,
    symbolic: bool,
    input_shape: [usize; 4],
    threads: usize,
) -> Result<TractModel, ModelError> {
    let engine_error = |e: TractError| ModelError::Engine {
        engine: TRACT_ENGINE,
        reason: format!("{e:#}"),
    };
    // tract's copy of the graph with each Conv's BatchNormalization folded into it (`fold.rs`).
    let mut folded = proto.clone();
    crate::fold::fold_conv_batchnorm(&mut folded, &[manifest.output.tensor.as_str()]);
    let inference = || -> Result<InferenceModel, ModelError> {
        let inference = onnx.model_for_proto_model(&folded).map_err(engine_error)?;
        if manifest.output.tensor.is_empty() {
            Ok(inference)
        } else {
            inference
                .with_outputs_by_name([manifest.output.tensor.as_str()])
                .map_err(engine_error)
        }
    };
    // A free batch is typed as a symbol, so that plans for other batch sizes can be derived. Some exported
    // graphs cannot be typed that way (a Reshape whose shape is computed from the input's, for instance):
    // they are loaded with batch 1, as every frame runs anyway.
    let typed = if symbolic {
        let inference = inference()?;
        let batch = inference.symbols.sym("framewise_batch");
        let mut shape: TVec<TDim> = input_shape.iter().map(|&d| TDim::from(d)).collect();
        shape[0] = batch.clone().into();
        inference
            .with_input_fact(0, f32::fact(shape).into())
            .and_then(|m| m.into_typed())
            .ok()
            .map(|typed| (typed, batch))
    } else {
        None
    };
    let batch_one = || -> Result<TypedModel, ModelError> {
        inference()?
            .with_input_fact(0, f32::fact(input_shape).into())
            .and_then(|m| m.into_typed())
            .map_err(|e| ModelError::Engine {
                engine: TRACT_ENGINE,
                reason: format!(
                    "it cannot type the graph with the input `{}` fixed to {input_shape:?}: {e:#}",
                    manifest.input.tensor
                ),
            })
    };
    let (concrete, typed) = match typed {
        Some((typed, symbol)) => match concretize(&typed, &symbol, 1) {
            Ok(concrete) => (concrete, Some((typed, symbol))),
            Err(_) => (batch_one()?, None),
        },
        None => (batch_one()?, None),
    };
    check_output(manifest, &concrete)?;
    let run_options = tract_run_options(threads);
    let plan = concrete
        .into_optimized()
        .map_err(engine_error)?
        .into_runnable_with_options(&run_options)
        .map_err(engine_error)?;
    Ok(TractModel {
        plan,
        states: Mutex::new(Vec::new()),
        batching: typed.map(|(typed, symbol)| Batching {
            typed,
            symbol,
            run_options,
            plans: Mutex::new(HashMap::new()),
        }),
    })
}

/// Plan options: a private pool for tract's multithreaded matrix products when more than one thread.
fn tract_run_options(threads: usize) -> RunOptions {
    RunOptions {
        executor: (threads > 1).then(|| {
            tract_linalg::multithread::Executor::multithread_with_name(threads, "framewise-mm")
        }),
        ..RunOptions::default()
    }
}

impl TractModel {
    fn run(&self, shape: [usize; 4], input: &[f32]) -> Result<Vec<f32>, InferenceError> {
        let fail = |e: TractError| InferenceError(format!("{e:#}"));
        let tensor = Tensor::from_shape(&shape, input).map_err(fail)?;
        let outputs = if shape[0] == 1 {
            let taken = self
                .states
                .lock()
                .map_err(|_| InferenceError("run state pool poisoned".into()))?
                .pop();
            let mut state = match taken {
                Some(state) => state,
                None => self.plan.spawn().map_err(fail)?,
            };
            let outputs = state.run(tvec![tensor.into()]);
            // A state whose run failed is dropped rather than reused.
            if outputs.is_ok()
                && let Ok(mut states) = self.states.lock()
            {
                states.push(state);
            }
            outputs.map_err(fail)?
        } else {
            let batching = self.batching.as_ref().ok_or_else(|| {
                InferenceError("the model has a fixed batch dimension of 1".into())
            })?;
            batching
                .plan(shape[0])?
                .run(tvec![tensor.into()])
                .map_err(fail)?
        };
        let first = outputs
            .first()
            .ok_or_else(|| InferenceError("the model produced no output".into()))?;
        let view = first.to_plain_array_view::<f32>().map_err(fail)?;
        Ok(view.iter().copied().collect())
    }

    fn node_times(
        &self,
        shape: [usize; 4],
        input: &[f32],
        runs: usize,
    ) -> Result<Vec<NodeTime>, InferenceError> {
        let fail = |e: TractError| InferenceError(format!("{e:#}"));
        let mut state = self.plan.spawn().map_err(fail)?;
        let nodes = self.plan.model().nodes();
        let mut micros = vec![0.0f64; nodes.len()];
        for run in 0..=runs {
            let tensor = Tensor::from_shape(&shape, input).map_err(fail)?;
            state
                .run_plan_with_eval(tvec![tensor.into()], |ctx, op_state, node, inputs| {
                    let start = std::time::Instant::now();
                    let outputs = tract_onnx::tract_core::plan::eval(ctx, op_state, node, inputs);
                    if run > 0 {
                        micros[node.id] += start.elapsed().as_secs_f64() * 1e6;
                    }
                    outputs
                })
                .map_err(fail)?;
        }
        let runs = runs.max(1) as f64;
        Ok(nodes
            .iter()
            .filter(|n| micros[n.id] > 0.0)
            .map(|n| NodeTime {
                name: n.name.clone(),
                op: n.op().name().to_string(),
                micros: micros[n.id] / runs,
            })
            .collect())
    }
}

impl Batching {
    fn plan(&self, n: usize) -> Result<Arc<TypedRunnableModel>, InferenceError> {
        let mut plans = self
            .plans
            .lock()
            .map_err(|_| InferenceError("plan cache poisoned".into()))?;
        if let Some(plan) = plans.get(&n) {
            return Ok(plan.clone());
        }
        let plan = concretize(&self.typed, &self.symbol, n)
            .and_then(|m| m.into_optimized())
            .and_then(|m| m.into_runnable_with_options(&self.run_options))
            .map_err(|e| InferenceError(format!("{e:#}")))?;
        plans.insert(n, plan.clone());
        Ok(plan)
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

/// Checks the graph's image input against the manifest and says what it needs (see [`InputPlan`]). A
/// dimension the graph fixes must be the manifest's; a free one (a name, -1, 0, or none) takes the
/// manifest's size; the batch must be free or 1.
fn check_input(manifest: &Manifest, graph: &pb::GraphProto) -> Result<InputPlan, ModelError> {
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
                "inputs {} (framewise needs exactly one image input, the weights as initializers)",
                quoted(&names)
            ),
        });
    }
    let name = &spec.tensor;
    let (elem, dims) = value_type(inputs[0]).ok_or_else(|| ModelError::Mismatch {
        field: "input.tensor",
        manifest: format!("`{name}` is a tensor"),
        graph: "no tensor type declared for it".into(),
    })?;
    if elem != ONNX_FLOAT {
        return Err(ModelError::Mismatch {
            field: "input.tensor",
            manifest: "float32 (framewise feeds float32)".into(),
            graph: format!("element type {elem} (ONNX TensorProto.DataType) for `{name}`"),
        });
    }
    let (h, w) = (spec.height as usize, spec.width as usize);
    let (expected, axes): ([usize; 4], [&str; 4]) = match spec.layout {
        Layout::Nchw => ([1, 3, h, w], ["batch", "channels", "height", "width"]),
        Layout::Nhwc => ([1, h, w, 3], ["batch", "height", "width", "channels"]),
    };
    let declared = dims.unwrap_or_else(|| vec![Dim::Free(String::new()); 4]);
    if declared.len() != 4 {
        return Err(ModelError::Mismatch {
            field: "input.layout",
            manifest: format!("{:?}, a rank-4 image input", spec.layout),
            graph: format!(
                "input `{name}` of rank {} ({}); framewise feeds [batch, 3, height, width] (nchw) or [batch, height, width, 3] (nhwc)",
                declared.len(),
                shape_text(&declared)
            ),
        });
    }
    let field_of = |axis: &str| match axis {
        "height" => "input.height",
        "width" => "input.width",
        "channels" => "input.layout",
        _ => "input.tensor",
    };
    for (i, dim) in declared.iter().enumerate() {
        let Dim::Fixed(v) = dim else { continue };
        if *v == expected[i] as i64 {
            continue;
        }
        let axis = axes[i];
        let fix = match axis {
            "batch" => "framewise runs one frame at a time: export the model with a batch of 1 or a free batch".to_string(),
            "channels" => format!(
                "check input.layout (the model's 3 channels are not on axis {i} of a {:?} layout)",
                spec.layout
            ),
            _ => format!("set {} = {v}, or use a model exported for {} {}", field_of(axis), axis, expected[i]),
        };
        return Err(ModelError::Mismatch {
            field: field_of(axis),
            manifest: format!(
                "{axis} {} ({:?} input [{}])",
                expected[i],
                spec.layout,
                expected.map(|d| d.to_string()).join(", ")
            ),
            graph: format!(
                "{axis} {v} on axis {i} of input `{name}` {}; {fix}",
                shape_text(&declared)
            ),
        });
    }
    Ok(InputPlan {
        shape: expected,
        batch_free: !matches!(declared[0], Dim::Fixed(_)),
        any_free: declared.iter().any(|d| !matches!(d, Dim::Fixed(_))),
    })
}

fn quoted(names: &[&str]) -> String {
    let parts: Vec<String> = names.iter().map(|n| format!("`{n}`")).collect();
    format!("[{}]", parts.join(", "))
}

/// Writes `shape` into the declared shape of the graph input `name` (its dimensions all fixed).
fn fix_input_shape(proto: &mut pb::ModelProto, name: &str, shape: [usize; 4]) {
    use pb::tensor_shape_proto::{Dimension, dimension::Value};
    let Some(graph) = proto.graph.as_mut() else {
        return;
    };
    let Some(input) = graph.input.iter_mut().find(|i| i.name == name) else {
        return;
    };
    let Some(pb::type_proto::Value::TensorType(tensor)) =
        input.r#type.as_mut().and_then(|t| t.value.as_mut())
    else {
        return;
    };
    tensor.shape = Some(pb::TensorShapeProto {
        dim: shape
            .iter()
            .map(|&d| Dimension {
                value: Some(Value::DimValue(d as i64)),
                ..Default::default()
            })
            .collect(),
    });
}

fn check_output_declared(manifest: &Manifest, graph: &pb::GraphProto) -> Result<(), ModelError> {
    let names: Vec<&str> = graph.output.iter().map(|o| o.name.as_str()).collect();
    let names = quoted(&names);
    let wanted = &manifest.output.tensor;
    let info = if wanted.is_empty() {
        graph.output.first()
    } else {
        graph.output.iter().find(|o| &o.name == wanted)
    };
    let info = info.ok_or_else(|| ModelError::Mismatch {
        field: "output.tensor",
        manifest: format!("`{wanted}`"),
        graph: format!("outputs {names}"),
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
