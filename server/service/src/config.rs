//! Server settings: a TOML file (opt-in) overridden by flags. Every limit is a named, documented field.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

use framewise_engine::{EngineKind, EngineOptions};
use serde::Deserialize;

/// Default gRPC address: loopback only.
pub const DEFAULT_LISTEN: &str = "127.0.0.1:50051";
/// Default largest gRPC message: a 4K UHD RGBA frame (3840 x 2160 x 4 = 33,177,600 bytes) plus headroom.
pub const DEFAULT_MAX_MESSAGE_BYTES: usize = 36 * 1024 * 1024;
/// Default largest number of open sessions.
pub const DEFAULT_MAX_SESSIONS: usize = 64;
/// Default keepalive interval of the server's connections.
pub const DEFAULT_KEEPALIVE_S: f64 = 20.0;
/// Default idle timeout: a session that sends nothing for this long is ended.
pub const DEFAULT_IDLE_TIMEOUT_S: f64 = 30.0;
/// Default drain deadline after SIGTERM.
pub const DEFAULT_DRAIN_S: f64 = 10.0;
/// Most worker threads (each holds a stack and a model's run state; more than this buys nothing on any CPU).
pub const MAX_WORKERS: usize = 256;
/// Longest idle timeout or drain deadline: one day.
pub const MAX_SECONDS: f64 = 86_400.0;
/// Answers buffered per session before the session stops reading frames (back-pressure on the client).
pub const ANSWER_BUFFER: usize = 16;

/// The server's settings.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct ServerConfig {
    /// gRPC address.
    pub listen: SocketAddr,
    /// Also serve gRPC on a Unix-domain socket at this path, for a capture process on the same host: no
    /// TCP stack in between, so a large frame costs less to move (a 1920x1080 NV12 frame 2.1 to 2.7 ms
    /// against 2.6 to 3.3 ms over TCP loopback, BENCHMARKS.md section 3).
    /// Who may connect is set by the socket file's permissions (owner and group, 0660); TLS is not used on
    /// it, the token is. None (the default) for TCP only.
    pub listen_unix: Option<PathBuf>,
    /// A directory (best on a memory file system such as /dev/shm) where capture processes on this host place
    /// frame files: a session on the Unix socket names one in its opening and sends only where each frame
    /// lies in it, so the pixels cross no socket. Only plain files directly inside it are opened. None (the
    /// default) refuses frame files.
    pub shared_frames_dir: Option<PathBuf>,
    /// Prometheus text endpoint address; none to turn it off.
    pub metrics_listen: Option<SocketAddr>,
    /// Model package directories to serve besides the embedded demo model.
    pub models: Vec<ModelEntry>,
    /// The default model's name; empty for the first of `models`, or the demo model.
    pub default_model: String,
    /// Serve the embedded demo model.
    pub demo_model: bool,
    /// Refuse to start when a model fails to load (otherwise it is logged and skipped).
    pub strict_models: bool,
    /// Serve a model whose self-test fails (its probabilities on its own reference cases differ from the
    /// validation pipeline's beyond the package's tolerance), marked as failing in every answer's model
    /// identity. Off (the default): such a model is refused.
    pub serve_failed_self_test: bool,
    /// Inference worker threads; 0 for one per core.
    pub workers: usize,
    /// The inference engine for every model without its own `engine`: tract, onnxruntime or auto.
    pub engine: EngineKind,
    /// ONNX Runtime's shared library (libonnxruntime.so); none for `ORT_DYLIB_PATH`, then the system's
    /// search path.
    pub onnxruntime_library: Option<PathBuf>,
    /// Threads one inference may use. 1 (the default) with one worker per core serves many streams best;
    /// fewer workers with more threads each make one stream quicker.
    pub inference_threads: usize,
    /// Largest gRPC message in bytes.
    pub max_message_bytes: usize,
    /// Largest frame width in pixels.
    pub max_frame_width: u32,
    /// Largest frame height in pixels.
    pub max_frame_height: u32,
    /// Largest number of open sessions; more get RESOURCE_EXHAUSTED.
    pub max_sessions: usize,
    /// Seconds without a message before a session is ended.
    pub idle_timeout_s: f64,
    /// Seconds between HTTP/2 keepalive pings on a connection (and the TCP keepalive interval); a ping not
    /// answered within as long again closes the connection, so a client that vanished frees its sessions
    /// without waiting for the idle timeout. 0 for none.
    pub keepalive_s: f64,
    /// Seconds open sessions get to finish after SIGTERM.
    pub drain_s: f64,
    /// TLS settings; none for plaintext.
    pub tls: Option<TlsConfig>,
    /// Bearer token required at session start and on unary calls; none for no token.
    pub token: Option<String>,
    /// Allow plaintext on a non-loopback address (off: the server refuses).
    pub allow_insecure_remote: bool,
    /// While the server runs, ask Linux that idle CPUs wake within this many microseconds (its CPU latency
    /// QoS, `/dev/cpu_dma_latency`; 0 keeps idle CPUs polling). Every frame wakes threads on other CPUs
    /// several times, and a sleeping CPU makes each wake-up slower: on the development VM this took a
    /// 224x224 frame's service overhead p50 from 0.71–0.82 to 0.51–0.69 ms (BENCHMARKS.md section 3). It costs power,
    /// and needs write access to the device (root's by default); the server refuses to start without it. None
    /// (the default) leaves the system's setting alone.
    pub cpu_wake_latency_us: Option<u32>,
}

/// One model package to load.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModelEntry {
    /// Package directory (holding manifest.toml) or manifest path.
    pub path: PathBuf,
    /// SHA-256 the `.onnx` file must have.
    #[serde(default)]
    pub sha256: Option<String>,
    /// The engine for this model; none for the server's `engine`.
    #[serde(default)]
    pub engine: Option<EngineKind>,
}

/// TLS files (PEM).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TlsConfig {
    /// Server certificate chain.
    pub cert: PathBuf,
    /// Server private key.
    pub key: PathBuf,
    /// Authority that client certificates must be signed by (mutual TLS); none for server-only TLS.
    #[serde(default)]
    pub client_ca: Option<PathBuf>,
}

impl Default for ServerConfig {
    fn default() -> Self {
        Self {
            listen: DEFAULT_LISTEN
                .parse()
                .unwrap_or_else(|_| SocketAddr::from(([127, 0, 0, 1], 50051))),
            listen_unix: None,
            shared_frames_dir: None,
            metrics_listen: None,
            models: Vec::new(),
            default_model: String::new(),
            demo_model: true,
            strict_models: false,
            serve_failed_self_test: false,
            workers: 0,
            engine: EngineKind::Tract,
            onnxruntime_library: None,
            inference_threads: 1,
            max_message_bytes: DEFAULT_MAX_MESSAGE_BYTES,
            max_frame_width: framewise_engine::frame::DEFAULT_FRAME_LIMITS.max_width,
            max_frame_height: framewise_engine::frame::DEFAULT_FRAME_LIMITS.max_height,
            max_sessions: DEFAULT_MAX_SESSIONS,
            idle_timeout_s: DEFAULT_IDLE_TIMEOUT_S,
            keepalive_s: DEFAULT_KEEPALIVE_S,
            drain_s: DEFAULT_DRAIN_S,
            tls: None,
            token: None,
            allow_insecure_remote: false,
            cpu_wake_latency_us: None,
        }
    }
}

/// A setting that cannot be used.
#[derive(Debug, thiserror::Error)]
#[error("server setting `{field}`: {problem}")]
pub struct ConfigError {
    /// The setting.
    pub field: &'static str,
    /// What is wrong.
    pub problem: String,
}

impl ServerConfig {
    /// Parses a TOML config file's text.
    pub fn from_toml(text: &str) -> Result<Self, ConfigError> {
        toml::from_str(text).map_err(|e| ConfigError {
            field: "config",
            problem: e.to_string(),
        })
    }

    /// Checks the settings.
    pub fn validate(&self) -> Result<(), ConfigError> {
        let bad = |field, problem: String| Err(ConfigError { field, problem });
        if !self.listen.ip().is_loopback() && self.tls.is_none() && !self.allow_insecure_remote {
            return bad(
                "listen",
                format!(
                    "{} is not a loopback address and TLS is off; configure TLS, or set allow_insecure_remote = true \
                     (--allow-insecure-remote) if the network is otherwise protected",
                    self.listen
                ),
            );
        }
        if let Some(path) = &self.listen_unix
            && (path.as_os_str().is_empty() || path.as_os_str().len() > 100)
        {
            // sun_path holds 108 bytes on Linux with its terminating zero; 100 leaves room on other systems.
            return bad(
                "listen_unix",
                format!(
                    "`{}` cannot be a socket path: it must be 1 to 100 bytes long",
                    path.display()
                ),
            );
        }
        if let Some(dir) = &self.shared_frames_dir {
            if self.listen_unix.is_none() {
                return bad(
                    "shared_frames_dir",
                    "frame files are read only for sessions on the Unix socket; set listen_unix too".into(),
                );
            }
            if !dir.is_dir() {
                return bad(
                    "shared_frames_dir",
                    format!("`{}` is not a directory", dir.display()),
                );
            }
        }
        if self.workers > MAX_WORKERS {
            return bad(
                "workers",
                format!(
                    "is {}; it must be from 0 (one per core) to {MAX_WORKERS}",
                    self.workers
                ),
            );
        }
        if self.inference_threads == 0 || self.inference_threads > 256 {
            return bad(
                "inference_threads",
                format!("is {}; it must be from 1 to 256", self.inference_threads),
            );
        }
        if self.max_sessions == 0 {
            return bad("max_sessions", "must be at least 1".into());
        }
        if self.max_message_bytes < 1024 {
            return bad(
                "max_message_bytes",
                format!("is {}; it must be at least 1024", self.max_message_bytes),
            );
        }
        if self.max_frame_width == 0 || self.max_frame_height == 0 {
            return bad(
                "max_frame_width",
                "frame limits must be at least 1 pixel".into(),
            );
        }
        for (field, v) in [
            ("idle_timeout_s", self.idle_timeout_s),
            ("drain_s", self.drain_s),
        ] {
            if !(v.is_finite() && v > 0.0 && v <= MAX_SECONDS) {
                return bad(
                    field,
                    format!(
                        "is {v}; it must be a number of seconds above 0 and at most {MAX_SECONDS}"
                    ),
                );
            }
        }
        if !(self.keepalive_s.is_finite() && (0.0..=MAX_SECONDS).contains(&self.keepalive_s)) {
            return bad(
                "keepalive_s",
                format!(
                    "is {}; it must be 0 (none) or a number of seconds up to {MAX_SECONDS}",
                    self.keepalive_s
                ),
            );
        }
        if let Some(token) = &self.token
            && token.len() < 16
        {
            return bad("token", "must be at least 16 characters".into());
        }
        if let Some(us) = self.cpu_wake_latency_us
            && us > crate::wake::MAX_WAKE_LATENCY_US
        {
            return bad(
                "cpu_wake_latency_us",
                format!(
                    "is {us}; it must be from 0 to {} microseconds",
                    crate::wake::MAX_WAKE_LATENCY_US
                ),
            );
        }
        if !self.demo_model && self.models.is_empty() {
            return bad(
                "models",
                "no model to serve: give a model package or keep the demo model".into(),
            );
        }
        Ok(())
    }

    /// Worker threads to run.
    pub fn worker_count(&self) -> usize {
        if self.workers > 0 {
            self.workers
        } else {
            std::thread::available_parallelism()
                .map(|n| n.get())
                .unwrap_or(1)
        }
    }

    /// Engine options for a model entry (none for the demo model).
    pub fn engine_options(&self, entry: Option<&ModelEntry>) -> EngineOptions {
        EngineOptions {
            kind: entry.and_then(|e| e.engine).unwrap_or(self.engine),
            onnxruntime_library: self.onnxruntime_library.clone(),
            threads: self.inference_threads,
            serve_failed_self_test: self.serve_failed_self_test,
        }
    }

    /// Idle timeout.
    pub fn idle_timeout(&self) -> Duration {
        Duration::from_secs_f64(self.idle_timeout_s)
    }

    /// Keepalive interval, none for 0.
    pub fn keepalive(&self) -> Option<Duration> {
        (self.keepalive_s > 0.0).then(|| Duration::from_secs_f64(self.keepalive_s))
    }

    /// Drain deadline.
    pub fn drain(&self) -> Duration {
        Duration::from_secs_f64(self.drain_s)
    }
}
