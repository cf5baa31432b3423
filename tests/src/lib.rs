//! Shared helpers for framewise's integration tests: the workspace root, the embedded demo model, the
//! reference fixtures made by `tests/reference/make_fixtures.py` (onnxruntime, OpenCV, SciPy), and a
//! server started on a free loopback port.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::{Arc, OnceLock};

use framewise_engine::{EngineKind, EngineOptions, Model, ModelPackage};

/// The seeded generator the tests draw random frames from.
pub use framewise_models_demo::rng::SplitMix64 as Rng;

/// The workspace root.
pub fn workspace_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_default()
}

/// The Python interpreter with the pinned reference packages: `FRAMEWISE_PYTHON`, else the workspace's
/// `.venv`.
pub fn python() -> PathBuf {
    match std::env::var_os("FRAMEWISE_PYTHON") {
        Some(p) => PathBuf::from(p),
        None => workspace_root().join(".venv/bin/python"),
    }
}

/// A release binary of the workspace (`framewise`, `framewise-server`, `framewise-synth`), built by
/// `tests/run-all` before the tests run.
pub fn binary(name: &str) -> PathBuf {
    let path = workspace_root().join("target/release").join(name);
    assert!(
        path.exists(),
        "{} is missing: build it with `cargo build --release --workspace --bins` (tests/run-all does)",
        path.display()
    );
    path
}

/// A loopback port that was free a moment ago (bound to port 0, then released).
pub fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .map(|a| a.port())
        .expect("a free loopback port")
}

/// Writes a synthetic phantom sweep recording (frames and labels.csv) with `framewise-synth` into `dir`
/// and returns its frame count.
pub fn synth_sweep(dir: &Path, seconds: u32, width: u32, height: u32, seed: u64) -> u64 {
    let synth = Command::new(binary("framewise-synth"))
        .args(["sweep", "--seconds", &seconds.to_string(), "--fps", "30"])
        .args([
            "--width",
            &width.to_string(),
            "--height",
            &height.to_string(),
        ])
        .args(["--seed", &seed.to_string(), "--out"])
        .arg(dir)
        .output()
        .expect("framewise-synth runs");
    assert!(
        synth.status.success(),
        "{}",
        String::from_utf8_lossy(&synth.stderr)
    );
    framewise_cli::recording::Recording::open(dir)
        .expect("recording opens")
        .frames
        .len() as u64
}

/// The embedded demo package, with its self-test cases.
pub fn demo_package() -> ModelPackage {
    framewise_models_demo::package::demo_package().expect("the embedded demo package parses")
}

/// The embedded demo model on tract, loaded once.
pub fn demo_model() -> Arc<Model> {
    static MODEL: OnceLock<Arc<Model>> = OnceLock::new();
    MODEL
        .get_or_init(|| {
            let model =
                framewise_engine::load_model(&demo_package(), None, &EngineOptions::default());
            Arc::new(model.expect("the embedded demo model loads and passes its self-test"))
        })
        .clone()
}

/// ONNX Runtime's shared library from the reference venv's `onnxruntime` wheel (`onnxruntime/capi/`), found
/// once by asking that Python where the package lives.
pub fn onnxruntime_library() -> PathBuf {
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| {
        let out = Command::new(python())
            .args([
                "-c",
                "import glob, os, onnxruntime; \
                 d = os.path.join(os.path.dirname(onnxruntime.__file__), 'capi'); \
                 print(sorted(glob.glob(os.path.join(d, 'libonnxruntime.so*')))[-1])",
            ])
            .output()
            .expect("the reference Python runs");
        assert!(
            out.status.success(),
            "no libonnxruntime.so in the reference venv: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        PathBuf::from(String::from_utf8_lossy(&out.stdout).trim())
    })
    .clone()
}

/// Engine options for ONNX Runtime with the reference venv's library.
pub fn onnxruntime_options(threads: usize) -> EngineOptions {
    EngineOptions {
        kind: EngineKind::OnnxRuntime,
        onnxruntime_library: Some(onnxruntime_library()),
        threads,
        ..EngineOptions::default()
    }
}

/// The embedded demo model on ONNX Runtime, loaded once.
pub fn demo_model_onnxruntime() -> Arc<Model> {
    static MODEL: OnceLock<Arc<Model>> = OnceLock::new();
    MODEL
        .get_or_init(|| {
            let model =
                framewise_engine::load_model(&demo_package(), None, &onnxruntime_options(1));
            Arc::new(model.expect("the embedded demo model loads on ONNX Runtime"))
        })
        .clone()
}

/// The reference fixtures folder: `FRAMEWISE_FIXTURES` if set, else made once under `target/` by running
/// `tests/reference/make_fixtures.py` with [`python`].
pub fn fixtures() -> PathBuf {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    DIR.get_or_init(|| {
        if let Some(dir) = std::env::var_os("FRAMEWISE_FIXTURES") {
            return PathBuf::from(dir);
        }
        let dir = workspace_root().join("target/reference-fixtures");
        if dir.join("index.json").exists() && fixtures_fresh(&dir) {
            return dir;
        }
        let script = workspace_root().join("tests/reference/make_fixtures.py");
        let status = Command::new(python())
            .arg(&script)
            .arg("--out")
            .arg(&dir)
            .status()
            .unwrap_or_else(|e| {
                panic!(
                    "the reference checks need Python with the pinned packages ({}): {e}; run `bash tests/run-all` once",
                    python().display()
                )
            });
        assert!(status.success(), "{} failed; run `bash tests/run-all` to set up the venv", script.display());
        dir
    })
    .clone()
}

/// Fixtures are fresh when they are newer than the demo model and the scripts that make them.
fn fixtures_fresh(dir: &Path) -> bool {
    let modified = |p: &Path| std::fs::metadata(p).and_then(|m| m.modified()).ok();
    let Some(made) = modified(&dir.join("index.json")) else {
        return false;
    };
    let root = workspace_root();
    [
        "models-demo/package/phantom-zones.onnx",
        "models-demo/package/manifest.toml",
        "models-demo/scripts/make_bench_model.py",
        "tests/reference/make_fixtures.py",
        "tests/reference/exact.py",
        "models-demo/scripts/make_self_test.py",
        "models-demo/package/self-test/cases.toml",
    ]
    .iter()
    .all(|f| modified(&root.join(f)).is_some_and(|m| m <= made))
}

/// Reads a raw little-endian array file from the fixtures.
pub fn read_bytes(name: &str) -> Vec<u8> {
    let path = fixtures().join(name);
    std::fs::read(&path).unwrap_or_else(|e| panic!("reading fixture {}: {e}", path.display()))
}

/// Reads a float32 array file from the fixtures.
pub fn read_f32(name: &str) -> Vec<f32> {
    read_bytes(name)
        .chunks_exact(4)
        .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
        .collect()
}

/// The fixtures' index.
pub fn index() -> serde_json::Value {
    let path = fixtures().join("index.json");
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("reading {}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("parsing {}: {e}", path.display()))
}

/// Largest absolute difference between two byte arrays, and how many bytes differ.
pub fn byte_diff(a: &[u8], b: &[u8]) -> (u8, usize) {
    assert_eq!(a.len(), b.len(), "lengths differ");
    a.iter().zip(b).fold((0u8, 0usize), |(m, n), (x, y)| {
        let d = x.abs_diff(*y);
        (m.max(d), n + usize::from(d > 0))
    })
}

/// Largest absolute difference between two float arrays.
pub fn max_abs_diff(a: &[f32], b: &[f64]) -> f64 {
    assert_eq!(
        a.len(),
        b.len(),
        "lengths differ: {} vs {}",
        a.len(),
        b.len()
    );
    a.iter()
        .zip(b)
        .map(|(x, y)| (f64::from(*x) - y).abs())
        .fold(0.0, f64::max)
}

/// A value-by-value comparison of ours against a reference: how many values, how many differ, the largest
/// absolute difference and the mean signed one (ours minus the reference). A bias inside a tolerance still
/// shows in the mean.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Diff {
    /// Values compared.
    pub count: usize,
    /// Values that differ at all.
    pub differing: usize,
    /// Largest |ours - reference|.
    pub max_abs: f64,
    /// Sum of (ours - reference).
    pub sum: f64,
}

impl Diff {
    /// Compares two equally long sequences.
    pub fn of(
        ours: impl IntoIterator<Item = f64>,
        reference: impl IntoIterator<Item = f64>,
    ) -> Self {
        let (mut ours, mut reference) = (ours.into_iter(), reference.into_iter());
        let mut diff = Self::default();
        loop {
            match (ours.next(), reference.next()) {
                (Some(a), Some(b)) => diff.push(a - b),
                (None, None) => return diff,
                _ => panic!(
                    "the two sequences differ in length (after {} values)",
                    diff.count
                ),
            }
        }
    }

    /// Compares two byte arrays.
    pub fn bytes(ours: &[u8], reference: &[u8]) -> Self {
        Self::of(
            ours.iter().map(|&v| f64::from(v)),
            reference.iter().map(|&v| f64::from(v)),
        )
    }

    /// Adds one difference.
    pub fn push(&mut self, d: f64) {
        self.count += 1;
        self.differing += usize::from(d != 0.0);
        self.max_abs = self.max_abs.max(d.abs());
        self.sum += d;
    }

    /// Adds another comparison's values.
    pub fn add(&mut self, other: &Diff) {
        self.count += other.count;
        self.differing += other.differing;
        self.max_abs = self.max_abs.max(other.max_abs);
        self.sum += other.sum;
    }

    /// The mean signed difference.
    pub fn mean(&self) -> f64 {
        if self.count == 0 {
            0.0
        } else {
            self.sum / self.count as f64
        }
    }
}

impl std::fmt::Display for Diff {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "{} of {} values differ, max {:.3e}, mean signed {:+.3e}",
            self.differing,
            self.count,
            self.max_abs,
            self.mean()
        )
    }
}
