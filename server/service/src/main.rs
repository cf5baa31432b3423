//! `framewise-server`: parses flags, sets up logging, starts the server and waits for SIGTERM or Ctrl-C.
use std::net::SocketAddr;
use std::path::PathBuf;

use anyhow::{Context, Result};
use clap::Parser;
use framewise_engine::CAUTION;
use framewise_server::config::{ModelEntry, ServerConfig, TlsConfig};

/// framewise gRPC server: per-class probabilities for every frame of a live video stream, CPU only.
///
/// Decision support only, not a diagnosis: outputs are probabilities that can be wrong and must be confirmed by a
/// qualified clinician; check local regulations before any clinical use.
///
/// With no arguments it listens on 127.0.0.1:50051 and serves the embedded demo model (a toy, not a medical model).
/// A TOML config file sets everything; flags override it.
#[derive(Parser)]
#[command(version)]
struct Args {
    /// TOML config file.
    #[arg(long, env = "FRAMEWISE_CONFIG")]
    config: Option<PathBuf>,
    /// gRPC address, HOST:PORT (an address or a host name, for instance 127.0.0.1:50051 or localhost:50051)
    /// [default: 127.0.0.1:50051].
    #[arg(long, value_parser = host_port)]
    listen: Option<SocketAddr>,
    /// Also serve on a Unix-domain socket at this path (clients on the same host: `--server unix:PATH`).
    #[arg(long)]
    listen_unix: Option<PathBuf>,
    /// Directory where clients on the Unix socket may place frame files (best on /dev/shm).
    #[arg(long)]
    shared_frames_dir: Option<PathBuf>,
    /// Prometheus text endpoint address, HOST:PORT (for instance 127.0.0.1:9464) [default: none].
    #[arg(long, value_parser = host_port)]
    metrics_listen: Option<SocketAddr>,
    /// Model package directory to serve (repeatable).
    #[arg(long = "model")]
    models: Vec<PathBuf>,
    /// Default model name.
    #[arg(long)]
    default_model: Option<String>,
    /// Do not serve the embedded demo model.
    #[arg(long)]
    no_demo_model: bool,
    /// Refuse to start when any model fails to load.
    #[arg(long)]
    strict_models: bool,
    /// Serve a model that fails its package's self-test, marked as failing in every answer, instead of
    /// refusing it.
    #[arg(long)]
    serve_failed_self_test: bool,
    /// Inference worker threads (0: one per core).
    #[arg(long)]
    workers: Option<usize>,
    /// Inference engine: tract (built in), onnxruntime (needs libonnxruntime.so) or auto (onnxruntime when
    /// its library loads, tract otherwise).
    #[arg(long)]
    engine: Option<framewise_engine::EngineKind>,
    /// ONNX Runtime's shared library, libonnxruntime.so (default: $ORT_DYLIB_PATH, then the system's search
    /// path).
    #[arg(long)]
    onnxruntime_library: Option<PathBuf>,
    /// Threads per inference (1 suits many streams; more make one stream quicker).
    #[arg(long)]
    inference_threads: Option<usize>,
    /// Largest number of open sessions.
    #[arg(long)]
    max_sessions: Option<usize>,
    /// Largest gRPC message in bytes.
    #[arg(long)]
    max_message_bytes: Option<usize>,
    /// Seconds without a message before a session is ended.
    #[arg(long)]
    idle_timeout_s: Option<f64>,
    /// Seconds open sessions get to finish after SIGTERM.
    #[arg(long)]
    drain_s: Option<f64>,
    /// Seconds between HTTP/2 and TCP keepalive probes on a connection; 0 for none [default: 20].
    #[arg(long)]
    keepalive_s: Option<f64>,
    /// TLS certificate chain (PEM).
    #[arg(long, requires = "tls_key")]
    tls_cert: Option<PathBuf>,
    /// TLS private key (PEM).
    #[arg(long, requires = "tls_cert")]
    tls_key: Option<PathBuf>,
    /// Authority for client certificates (mutual TLS).
    #[arg(long, requires = "tls_cert")]
    tls_client_ca: Option<PathBuf>,
    /// Bearer token clients must present (prefer the environment variable to keep it out of process lists).
    #[arg(long, env = "FRAMEWISE_TOKEN", hide_env_values = true)]
    token: Option<String>,
    /// Allow plaintext on a non-loopback address.
    #[arg(long)]
    allow_insecure_remote: bool,
    /// Ask Linux that idle CPUs wake within this many microseconds while the server runs (0: keep them
    /// polling). Cuts the cost of every thread wake-up at the price of power; needs write access to
    /// /dev/cpu_dma_latency.
    #[arg(long)]
    cpu_wake_latency_us: Option<u32>,
}

fn main() {
    if let Err(err) = run() {
        eprintln!("framewise-server: {err:#}");
        std::process::exit(1);
    }
}

/// A listening address from HOST:PORT, the host an address or a name (its first IPv4 address, else its first).
fn host_port(text: &str) -> Result<SocketAddr, String> {
    use std::net::ToSocketAddrs;
    if let Ok(addr) = text.parse() {
        return Ok(addr);
    }
    let addrs: Vec<SocketAddr> = text
        .to_socket_addrs()
        .map_err(|e| {
            format!(
                "`{text}` is not HOST:PORT (for instance 127.0.0.1:50051 or localhost:50051): {e}"
            )
        })?
        .collect();
    addrs
        .iter()
        .find(|a| a.is_ipv4())
        .or(addrs.first())
        .copied()
        .ok_or_else(|| format!("`{text}` resolves to no address"))
}

fn config_from(args: Args) -> Result<ServerConfig> {
    let mut config = match &args.config {
        Some(path) => {
            let text = std::fs::read_to_string(path)
                .with_context(|| format!("reading {}", path.display()))?;
            ServerConfig::from_toml(&text)?
        }
        None => ServerConfig::default(),
    };
    if let Some(v) = args.listen {
        config.listen = v;
    }
    if args.listen_unix.is_some() {
        config.listen_unix = args.listen_unix;
    }
    if args.shared_frames_dir.is_some() {
        config.shared_frames_dir = args.shared_frames_dir;
    }
    if args.metrics_listen.is_some() {
        config.metrics_listen = args.metrics_listen;
    }
    config
        .models
        .extend(args.models.into_iter().map(|path| ModelEntry {
            path,
            sha256: None,
            engine: None,
        }));
    if let Some(v) = args.default_model {
        config.default_model = v;
    }
    if args.no_demo_model {
        config.demo_model = false;
    }
    config.strict_models |= args.strict_models;
    config.serve_failed_self_test |= args.serve_failed_self_test;
    if let Some(v) = args.workers {
        config.workers = v;
    }
    if let Some(v) = args.engine {
        config.engine = v;
    }
    if args.onnxruntime_library.is_some() {
        config.onnxruntime_library = args.onnxruntime_library;
    }
    if let Some(v) = args.inference_threads {
        config.inference_threads = v;
    }
    if let Some(v) = args.max_sessions {
        config.max_sessions = v;
    }
    if let Some(v) = args.max_message_bytes {
        config.max_message_bytes = v;
    }
    if let Some(v) = args.keepalive_s {
        config.keepalive_s = v;
    }
    if let Some(v) = args.idle_timeout_s {
        config.idle_timeout_s = v;
    }
    if let Some(v) = args.drain_s {
        config.drain_s = v;
    }
    if let (Some(cert), Some(key)) = (args.tls_cert, args.tls_key) {
        config.tls = Some(TlsConfig {
            cert,
            key,
            client_ca: args.tls_client_ca,
        });
    }
    if args.token.is_some() {
        config.token = args.token;
    }
    config.allow_insecure_remote |= args.allow_insecure_remote;
    if args.cpu_wake_latency_us.is_some() {
        config.cpu_wake_latency_us = args.cpu_wake_latency_us;
    }
    Ok(config)
}

fn run() -> Result<()> {
    let args = Args::parse();
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env()
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .with_writer(std::io::stderr)
        .init();
    let config = config_from(args)?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the runtime")?;
    runtime.block_on(async move {
        eprintln!("framewise-server: {CAUTION}");
        let server = framewise_server::start(config, None).await?;
        tracing::info!(addr = %server.addr, unix = ?server.unix_path, metrics = ?server.metrics_addr, "serving");
        let token = server.shutdown_token();
        tokio::spawn(async move {
            wait_for_signal().await;
            token.cancel();
        });
        server.wait().await
    })
}

#[cfg(unix)]
async fn wait_for_signal() {
    use tokio::signal::unix::{SignalKind, signal};
    match signal(SignalKind::terminate()) {
        Ok(mut term) => {
            tokio::select! {
                _ = term.recv() => {}
                _ = tokio::signal::ctrl_c() => {}
            }
        }
        Err(_) => {
            let _ = tokio::signal::ctrl_c().await;
        }
    }
}

#[cfg(not(unix))]
async fn wait_for_signal() {
    let _ = tokio::signal::ctrl_c().await;
}
