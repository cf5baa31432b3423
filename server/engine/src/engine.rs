//! Which inference engine runs a model, and with how many threads.
//!
//! Two engines sit behind [`crate::Model`]:
//! - **tract** (pure Rust, always built in, needs nothing installed): the default.
//! - **ONNX Runtime**, with the cargo feature `onnxruntime` (on by default): its C library is loaded at run
//!   time from a path (config, flag, or the `ORT_DYLIB_PATH` environment variable), never downloaded or
//!   linked at build time. It is several times faster on convolutional networks on this kind of CPU (see
//!   BENCHMARKS.md).
//!
//! `auto` means ONNX Runtime when its library loads and tract otherwise; the engine that ran is part of the
//! model's identity, so every result says which one it was.

use std::path::PathBuf;

use serde::{Deserialize, Serialize};

/// Name of the tract engine, as results report it.
pub const TRACT_ENGINE: &str = "tract";
/// Name of the ONNX Runtime engine, as results report it.
pub const ONNXRUNTIME_ENGINE: &str = "onnxruntime";
/// The environment variable naming ONNX Runtime's shared library when no path is configured (the name the
/// `ort` crate uses).
pub const ONNXRUNTIME_LIBRARY_ENV: &str = "ORT_DYLIB_PATH";

/// The engine a model should run on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum EngineKind {
    /// tract, pure Rust.
    #[default]
    Tract,
    /// ONNX Runtime's C library, loaded at run time.
    #[serde(rename = "onnxruntime")]
    OnnxRuntime,
    /// ONNX Runtime when its library loads, tract otherwise.
    Auto,
}

impl std::str::FromStr for EngineKind {
    type Err = String;

    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s {
            "tract" => Ok(Self::Tract),
            "onnxruntime" => Ok(Self::OnnxRuntime),
            "auto" => Ok(Self::Auto),
            other => Err(format!(
                "unknown engine `{other}`; expected tract, onnxruntime or auto"
            )),
        }
    }
}

impl std::fmt::Display for EngineKind {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Self::Tract => TRACT_ENGINE,
            Self::OnnxRuntime => ONNXRUNTIME_ENGINE,
            Self::Auto => "auto",
        })
    }
}

/// How to run a model.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct EngineOptions {
    /// Which engine.
    pub kind: EngineKind,
    /// ONNX Runtime's shared library; none for `ORT_DYLIB_PATH`, then the system's search path.
    pub onnxruntime_library: Option<PathBuf>,
    /// Threads one inference may use (intra-op). 1 suits many streams with one worker per core; more suits
    /// one stream that must be as quick as possible.
    pub threads: usize,
    /// Serve a model whose self-test failed, marked as failing in its identity, instead of refusing it.
    pub serve_failed_self_test: bool,
}

impl Default for EngineOptions {
    fn default() -> Self {
        Self {
            kind: EngineKind::Tract,
            onnxruntime_library: None,
            threads: 1,
            serve_failed_self_test: false,
        }
    }
}

impl EngineOptions {
    /// Options for one engine with one thread per inference.
    pub fn of(kind: EngineKind) -> Self {
        Self {
            kind,
            ..Self::default()
        }
    }

    /// The library path to try: the configured one, else `ORT_DYLIB_PATH`, else the bare file name for the
    /// system's search path.
    pub fn library_path(&self) -> PathBuf {
        self.onnxruntime_library
            .clone()
            .or_else(|| std::env::var_os(ONNXRUNTIME_LIBRARY_ENV).map(PathBuf::from))
            .unwrap_or_else(|| PathBuf::from("libonnxruntime.so"))
    }
}

/// Why ONNX Runtime cannot be used.
#[derive(Debug, Clone, thiserror::Error)]
#[error("ONNX Runtime is not available: {0}")]
pub struct RuntimeUnavailable(pub String);

#[cfg(feature = "onnxruntime")]
pub(crate) mod onnxruntime {
    //! ONNX Runtime through the `ort` crate, with the library loaded at run time.

    use std::path::{Path, PathBuf};
    use std::sync::{Mutex, OnceLock};

    use ort::session::Session;
    use ort::session::builder::GraphOptimizationLevel;
    use ort::value::TensorRef;

    use super::RuntimeUnavailable;

    /// The process's one ONNX Runtime environment and the library it came from.
    struct Loaded {
        env: ort::environment::Environment,
        path: PathBuf,
        version: String,
    }

    /// Set once the library has loaded; a failed load is not kept, so a later call with a good path works.
    static RUNTIME: OnceLock<Loaded> = OnceLock::new();
    static LOADING: Mutex<()> = Mutex::new(());

    fn runtime(path: &Path) -> Result<&'static Loaded, RuntimeUnavailable> {
        let loaded = match RUNTIME.get() {
            Some(l) => l,
            None => {
                let _one_at_a_time = LOADING.lock().map_err(|_| {
                    RuntimeUnavailable("an earlier attempt to load it panicked".into())
                })?;
                match RUNTIME.get() {
                    Some(l) => l,
                    None => {
                        let loaded = load_library(path).map_err(RuntimeUnavailable)?;
                        RUNTIME.get_or_init(|| loaded)
                    }
                }
            }
        };
        if loaded.path != path {
            return Err(RuntimeUnavailable(format!(
                "the library was already loaded from {} in this process; it cannot also be loaded from {}",
                loaded.path.display(),
                path.display()
            )));
        }
        Ok(loaded)
    }

    fn load_library(path: &Path) -> Result<Loaded, String> {
        let builder = ort::init_from(path).map_err(|e| {
            format!(
                "{e} (give the path of libonnxruntime.so with --onnxruntime-library, the config's \
                 `onnxruntime_library`, or {}; the onnxruntime wheel from PyPI carries one under \
                 onnxruntime/capi/)",
                super::ONNXRUNTIME_LIBRARY_ENV
            )
        })?;
        let env = builder
            .with_name("framewise")
            .with_telemetry(false)
            .build()
            .map_err(|e| format!("{e}"))?;
        let version = ort::info()
            .split(',')
            .next()
            .unwrap_or_default()
            .trim()
            .to_string();
        Ok(Loaded {
            env,
            path: path.to_path_buf(),
            version,
        })
    }

    /// Loads the library (once per process) and says which build it is.
    pub fn load(path: &Path) -> Result<String, RuntimeUnavailable> {
        runtime(path).map(|l| l.version.clone())
    }

    /// One model in ONNX Runtime: a pool of sessions, one per thread that runs it at the same time
    /// (`Session::run` needs exclusive access).
    pub struct OrtModel {
        onnx: std::sync::Arc<[u8]>,
        threads: usize,
        input: String,
        output: String,
        idle: Mutex<Vec<Session>>,
        path: PathBuf,
    }

    impl OrtModel {
        pub fn new(
            path: &Path,
            onnx: std::sync::Arc<[u8]>,
            threads: usize,
            input: &str,
            output: &str,
        ) -> Result<Self, String> {
            runtime(path).map_err(|e| e.0)?;
            let mut model = Self {
                onnx,
                threads: threads.max(1),
                input: input.to_string(),
                output: output.to_string(),
                idle: Mutex::new(Vec::new()),
                path: path.to_path_buf(),
            };
            let session = model.session()?;
            if model.output.is_empty() {
                // The manifest names no output: the graph's first one.
                model.output = session
                    .outputs()
                    .first()
                    .map(|o| o.name().to_string())
                    .ok_or("the model has no output")?;
            }
            model.give_back(session);
            Ok(model)
        }

        fn session(&self) -> Result<Session, String> {
            let loaded = runtime(&self.path).map_err(|e| e.0)?;
            let fail = |e: ort::Error| format!("{e}");
            let mut builder = Session::builder(&loaded.env)
                .map_err(fail)?
                .with_optimization_level(GraphOptimizationLevel::All)
                .map_err(|e| format!("{e}"))?
                .with_intra_threads(self.threads)
                .map_err(|e| format!("{e}"))?
                .with_inter_threads(1)
                .map_err(|e| format!("{e}"))?;
            if self.threads == 1 {
                // One thread per inference: no thread pool to spin.
                builder = builder
                    .with_intra_op_spinning(false)
                    .map_err(|e| format!("{e}"))?;
            }
            builder.commit_from_memory(&self.onnx).map_err(fail)
        }

        fn give_back(&self, session: Session) {
            if let Ok(mut idle) = self.idle.lock() {
                idle.push(session);
            }
        }

        /// Runs a batch of `shape[0]` frames and returns the output values in order.
        pub fn run(&self, shape: [usize; 4], input: &[f32]) -> Result<Vec<f32>, String> {
            let taken = self.idle.lock().map_err(|_| "session pool poisoned")?.pop();
            let mut session = match taken {
                Some(s) => s,
                None => self.session()?,
            };
            let result = (|| {
                let dims = shape.map(|d| d as i64);
                let tensor =
                    TensorRef::from_array_view((dims, input)).map_err(|e| format!("{e}"))?;
                let outputs = session
                    .run(ort::inputs![self.input.as_str() => tensor])
                    .map_err(|e| format!("{e}"))?;
                let value = outputs
                    .get(self.output.as_str())
                    .ok_or_else(|| format!("the model produced no output `{}`", self.output))?;
                let (_, values) = value
                    .try_extract_tensor::<f32>()
                    .map_err(|e| format!("{e}"))?;
                Ok(values.to_vec())
            })();
            self.give_back(session);
            result
        }
    }
}

/// Loads ONNX Runtime's library (once per process) from the options' path and returns its version.
pub fn load_onnxruntime(options: &EngineOptions) -> Result<String, RuntimeUnavailable> {
    #[cfg(feature = "onnxruntime")]
    {
        onnxruntime::load(&options.library_path())
    }
    #[cfg(not(feature = "onnxruntime"))]
    {
        let _ = options;
        Err(RuntimeUnavailable(
            "this build has no ONNX Runtime engine (cargo feature `onnxruntime` off)".into(),
        ))
    }
}
