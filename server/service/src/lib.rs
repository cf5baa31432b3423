//! The framewise service: the engine behind a gRPC server that device integrators stream live frames into.
//!
//! # Layout
//! - [`config`]: settings (TOML file and flags) and their limits.
//! - [`registry`]: the models served, loaded and warmed up before the server reports SERVING.
//! - [`pool`]: CPU worker threads for decoding, preprocessing and inference, off the async runtime.
//! - [`service`] and [`session`]: admission, frame policies and answers; [`convert`] maps the wire types.
//! - [`stats`] and [`metrics`]: counters, latency histograms and the Prometheus text endpoint.
//! - [`wake`]: the optional hold on idle CPUs' wake-up time.
//!
//! [`start`] runs the whole server on a listener, so tests start the real thing on `127.0.0.1:0`.

pub mod config;
pub mod convert;
pub mod metrics;
pub mod pool;
pub mod registry;
pub mod service;
pub mod session;
pub mod stats;
pub mod wake;

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use anyhow::{Context, Result};
use framewise_proto::v1::frame_analysis_server::FrameAnalysisServer;
use tokio::net::TcpListener;
use tokio::task::JoinHandle;
use tokio_util::sync::CancellationToken;
use tonic::transport::{Certificate, Identity, ServerTlsConfig};

pub use config::ServerConfig;
pub use registry::ModelRegistry;

use crate::service::Service;
use crate::stats::ServerStats;

/// Time the transport gets to close connections after the sessions ended.
pub const TRANSPORT_CLOSE_GRACE: Duration = Duration::from_secs(2);
/// HTTP/2 receive window per stream (session): bytes a client may send before the server has read them. 4 MiB
/// holds a whole 1920x1080 NV12 frame (3 MB) and bounds what a stuck client can leave buffered.
pub const STREAM_WINDOW_BYTES: u32 = 4 << 20;
/// HTTP/2 receive window per connection (all its sessions together).
pub const CONNECTION_WINDOW_BYTES: u32 = 16 << 20;
/// Largest HTTP/2 frame the server accepts (the protocol allows up to 16 MiB - 1; the default is 16 KiB).
pub const HTTP2_MAX_FRAME_BYTES: u32 = 1 << 20;

/// The gRPC transport with the server's HTTP/2 settings. Flow control is sized for frames: a 1920x1080 NV12
/// frame is 3 MB, which the protocol's default 64 KiB windows would let through in many acknowledged pieces.
/// The windows also bound what one session and one connection can have in flight before the server reads it.
pub fn transport() -> tonic::transport::Server {
    tonic::transport::Server::builder()
        .initial_stream_window_size(Some(STREAM_WINDOW_BYTES))
        .initial_connection_window_size(Some(CONNECTION_WINDOW_BYTES))
        .max_frame_size(Some(HTTP2_MAX_FRAME_BYTES))
}

/// A running server.
pub struct RunningServer {
    /// The gRPC address it listens on.
    pub addr: SocketAddr,
    /// The Unix-domain socket it also listens on, when configured.
    pub unix_path: Option<PathBuf>,
    /// The metrics address, when enabled.
    pub metrics_addr: Option<SocketAddr>,
    /// Server statistics.
    pub stats: Arc<ServerStats>,
    shutdown: CancellationToken,
    task: JoinHandle<Result<()>>,
}

impl RunningServer {
    /// Asks the server to stop: NOT_SERVING, no new sessions, open ones get the drain deadline.
    pub fn begin_shutdown(&self) {
        self.shutdown.cancel();
    }

    /// A token that stops the server when cancelled.
    pub fn shutdown_token(&self) -> CancellationToken {
        self.shutdown.clone()
    }

    /// Waits until the server has stopped.
    pub async fn wait(self) -> Result<()> {
        self.task.await.context("the server task failed")?
    }

    /// Stops the server and waits for it.
    pub async fn stop(self) -> Result<()> {
        self.begin_shutdown();
        self.wait().await
    }
}

/// Loads the models (unless given), binds, and serves until shut down.
pub async fn start(config: ServerConfig, registry: Option<ModelRegistry>) -> Result<RunningServer> {
    config.validate()?;
    // Held until the server task ends, so the request lasts exactly as long as the server serves.
    let wake_hold = match config.cpu_wake_latency_us {
        Some(us) => {
            let hold = wake::CpuWakeHold::hold(Path::new(wake::CPU_LATENCY_DEVICE), us)?;
            tracing::info!(microseconds = us, device = %hold.device().display(), "holding idle CPUs' wake-up time");
            Some(hold)
        }
        None => None,
    };
    let registry = match registry {
        Some(r) => r,
        None => {
            let cfg = config.clone();
            let (registry, failures) =
                tokio::task::spawn_blocking(move || ModelRegistry::load(&cfg))
                    .await
                    .context("model loading panicked")?
                    .map_err(|f| {
                        anyhow::anyhow!("model {} could not be loaded: {}", f.source, f.error)
                    })?;
            for f in failures {
                tracing::error!(source = %f.source, error = %f.error, "model not loaded; serving the others");
            }
            registry
        }
    };
    for model in registry.all() {
        let id = model.identity();
        let self_test = id.self_test.summary();
        if id.self_test.verdict() == "failed" {
            tracing::warn!(name = %id.name, version = %id.version, sha256 = %id.sha256, engine = id.engine, %self_test, "model served although its self-test failed (serve_failed_self_test)");
        } else {
            tracing::info!(name = %id.name, version = %id.version, sha256 = %id.sha256, engine = id.engine, %self_test, "model ready");
        }
    }
    let pool = pool::WorkerPool::start(config.worker_count(), config.max_sessions * 2)
        .context("starting worker threads")?;
    let stats = Arc::new(ServerStats::default());
    let draining = Arc::new(AtomicBool::new(false));
    let hard_stop = CancellationToken::new();
    let shutdown = CancellationToken::new();

    let listener = TcpListener::bind(config.listen)
        .await
        .with_context(|| format!("binding {}", config.listen))?;
    let addr = listener.local_addr()?;
    let unix_listener = match &config.listen_unix {
        Some(path) => Some(bind_unix(path).await?),
        None => None,
    };
    let metrics_addr = match config.metrics_listen {
        Some(at) => {
            let l = TcpListener::bind(at)
                .await
                .with_context(|| format!("binding the metrics port {at}"))?;
            let local = l.local_addr()?;
            tokio::spawn(metrics::serve(l, stats.clone(), shutdown.clone()));
            Some(local)
        }
        None => None,
    };

    let service = Service::new(
        &config,
        registry,
        pool,
        stats.clone(),
        draining.clone(),
        hard_stop.clone(),
    );
    let grpc = FrameAnalysisServer::new(service)
        .max_decoding_message_size(config.max_message_bytes)
        .max_encoding_message_size(config.max_message_bytes);
    // Reflection, so that general-purpose gRPC tools can list and call the service: both protocol versions,
    // with the contract's and the health service's descriptors.
    let reflection = || {
        tonic_reflection::server::Builder::configure()
            .register_encoded_file_descriptor_set(framewise_proto::v1::FILE_DESCRIPTOR_SET)
            .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
    };
    let reflection_v1 = reflection().build_v1().context("the reflection service")?;
    let reflection_v1alpha = reflection()
        .build_v1alpha()
        .context("the reflection service")?;
    let (health, health_service) = tonic_health::server::health_reporter();
    health.set_serving::<FrameAnalysisServer<Service>>().await;
    health
        .set_service_status("", tonic_health::ServingStatus::Serving)
        .await;

    let keepalive = config.keepalive();
    let with_keepalive = |server: tonic::transport::Server| {
        server
            .http2_keepalive_interval(keepalive)
            .http2_keepalive_timeout(keepalive)
            .tcp_keepalive(keepalive)
    };
    let mut builder = with_keepalive(transport());
    if let Some(tls) = &config.tls {
        let cert =
            std::fs::read(&tls.cert).with_context(|| format!("reading {}", tls.cert.display()))?;
        let key =
            std::fs::read(&tls.key).with_context(|| format!("reading {}", tls.key.display()))?;
        let mut tls_config = ServerTlsConfig::new().identity(Identity::from_pem(cert, key));
        if let Some(ca) = &tls.client_ca {
            let ca = std::fs::read(ca).with_context(|| format!("reading {}", ca.display()))?;
            tls_config = tls_config.client_ca_root(Certificate::from_pem(ca));
        }
        builder = builder.tls_config(tls_config).context("TLS settings")?;
    }
    let transport_stop = CancellationToken::new();
    let stopped = |token: &CancellationToken| {
        let token = token.clone();
        async move { token.cancelled().await }
    };
    // No Nagle delay: an answer is a small write that must leave at once.
    let incoming = tonic::transport::server::TcpIncoming::from(listener).with_nodelay(Some(true));
    let tcp = builder
        .add_service(health_service.clone())
        .add_service(reflection_v1.clone())
        .add_service(reflection_v1alpha.clone())
        .add_service(grpc.clone())
        .serve_with_incoming_shutdown(incoming, stopped(&transport_stop));
    // The same services on the Unix socket, without TLS (the socket file's permissions decide who connects).
    let unix = unix_listener.map(|l| {
        with_keepalive(transport())
            .add_service(health_service)
            .add_service(reflection_v1)
            .add_service(reflection_v1alpha)
            .add_service(grpc)
            .serve_with_incoming_shutdown(
                tokio_stream::wrappers::UnixListenerStream::new(l),
                stopped(&transport_stop),
            )
    });
    let unix_path = config.listen_unix.clone();
    let serve = {
        let unix_path = unix_path.clone();
        async move {
            let unix = async move {
                match unix {
                    Some(serve) => serve.await,
                    None => Ok(()),
                }
            };
            let (tcp, unix) = tokio::join!(tcp, unix);
            if let Some(path) = unix_path {
                let _ = std::fs::remove_file(path);
            }
            tcp.and(unix)
        }
    };
    let drain = config.drain();
    let task = {
        let (shutdown, stats) = (shutdown.clone(), stats.clone());
        tokio::spawn(async move {
            let _wake_hold = wake_hold;
            let serving = tokio::spawn(serve);
            shutdown.cancelled().await;
            tracing::info!("shutting down: NOT_SERVING, no new sessions");
            health
                .set_not_serving::<FrameAnalysisServer<Service>>()
                .await;
            health
                .set_service_status("", tonic_health::ServingStatus::NotServing)
                .await;
            draining.store(true, Ordering::Relaxed);
            let deadline = tokio::time::Instant::now() + drain;
            while stats.sessions_open.load(Ordering::Relaxed) > 0
                && tokio::time::Instant::now() < deadline
            {
                tokio::time::sleep(Duration::from_millis(20)).await;
            }
            let left = stats.sessions_open.load(Ordering::Relaxed);
            if left > 0 {
                tracing::warn!(
                    sessions = left,
                    "drain deadline passed; ending the open sessions"
                );
            }
            hard_stop.cancel();
            let settle = tokio::time::Instant::now() + TRANSPORT_CLOSE_GRACE;
            while stats.sessions_open.load(Ordering::Relaxed) > 0
                && tokio::time::Instant::now() < settle
            {
                tokio::time::sleep(Duration::from_millis(10)).await;
            }
            transport_stop.cancel();
            match tokio::time::timeout(TRANSPORT_CLOSE_GRACE, serving).await {
                Ok(Ok(result)) => result.context("the gRPC transport failed"),
                Ok(Err(e)) => Err(anyhow::anyhow!("the gRPC transport task failed: {e}")),
                Err(_) => {
                    tracing::warn!("connections still open after the grace period; closing");
                    Ok(())
                }
            }
        })
    };
    Ok(RunningServer {
        addr,
        unix_path,
        metrics_addr,
        stats,
        shutdown,
        task,
    })
}

/// Binds the Unix-domain socket at `path`: a socket file left by a server that is gone is replaced, one that a
/// running server answers on is not, and anything else at the path is refused. The socket is made readable and
/// writable by its owner and group only.
async fn bind_unix(path: &Path) -> Result<tokio::net::UnixListener> {
    use std::os::unix::fs::{FileTypeExt, PermissionsExt};
    if let Ok(meta) = std::fs::symlink_metadata(path) {
        anyhow::ensure!(
            meta.file_type().is_socket(),
            "{} exists and is not a socket; choose another listen_unix path",
            path.display()
        );
        anyhow::ensure!(
            tokio::net::UnixStream::connect(path).await.is_err(),
            "another process is serving on {}",
            path.display()
        );
        std::fs::remove_file(path)
            .with_context(|| format!("removing the stale socket {}", path.display()))?;
    }
    let listener = tokio::net::UnixListener::bind(path)
        .with_context(|| format!("binding the Unix socket {}", path.display()))?;
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(0o660))
        .with_context(|| format!("setting the permissions of {}", path.display()))?;
    Ok(listener)
}
