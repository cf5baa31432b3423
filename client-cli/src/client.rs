//! A session with a framewise server over gRPC: open, send frames, read answers.

use anyhow::{Context, Result, bail};
use framewise_proto::v1 as pb;
use pb::frame_analysis_client::FrameAnalysisClient;
use tokio::sync::mpsc;
use tokio_stream::wrappers::ReceiverStream;
use tonic::transport::{Channel, Endpoint};

/// Frames buffered on the client side before `send` waits (flow control does the rest).
pub const SEND_BUFFER: usize = 4;

/// Largest message the client sends or accepts: a 4K UHD RGBA frame plus headroom (matches the server's default).
pub const MAX_MESSAGE_BYTES: usize = 36 * 1024 * 1024;

/// How the client reaches a server: TLS material, connect timeout and keepalive (flags of every command that
/// connects).
#[derive(Debug, Clone, clap::Args)]
pub struct ConnectFlags {
    /// PEM file of the authority that signed the server's certificate, for `https://` servers with a private
    /// authority (the system's authorities are trusted as well).
    #[arg(long, env = "FRAMEWISE_TLS_CA")]
    pub tls_ca: Option<std::path::PathBuf>,
    /// PEM file of this client's certificate, for servers that ask for one (mutual TLS); needs --tls-key.
    #[arg(long, env = "FRAMEWISE_TLS_CERT", requires = "tls_key")]
    pub tls_cert: Option<std::path::PathBuf>,
    /// PEM file of this client's private key; needs --tls-cert.
    #[arg(
        long,
        env = "FRAMEWISE_TLS_KEY",
        requires = "tls_cert",
        hide_env_values = true
    )]
    pub tls_key: Option<std::path::PathBuf>,
    /// Seconds to wait for the connection before giving up.
    #[arg(long, default_value_t = 5.0)]
    pub connect_timeout_s: f64,
    /// Seconds between HTTP/2 keepalive pings on an idle connection (and the TCP keepalive interval); 0 for
    /// none. A ping not answered within as long again ends the connection, so a server that vanished is
    /// noticed.
    #[arg(long, default_value_t = 20.0)]
    pub keepalive_s: f64,
}

impl Default for ConnectFlags {
    fn default() -> Self {
        Self {
            tls_ca: None,
            tls_cert: None,
            tls_key: None,
            connect_timeout_s: 5.0,
            keepalive_s: 20.0,
        }
    }
}

/// Longest connect timeout or keepalive interval accepted: an hour.
const MAX_CONNECT_SECONDS: f64 = 3600.0;

impl ConnectFlags {
    fn seconds(value: f64, flag: &str, zero_ok: bool) -> Result<Option<std::time::Duration>> {
        let ok = value.is_finite()
            && value <= MAX_CONNECT_SECONDS
            && (value > 0.0 || (zero_ok && value == 0.0));
        anyhow::ensure!(
            ok,
            "{flag} {value}: give a number of seconds {} and at most {MAX_CONNECT_SECONDS}",
            if zero_ok { "from 0" } else { "above 0" }
        );
        Ok((value > 0.0).then(|| std::time::Duration::from_secs_f64(value)))
    }

    /// The endpoint for `url` with these settings.
    fn endpoint(&self, url: &str) -> Result<Endpoint> {
        let connect = Self::seconds(self.connect_timeout_s, "--connect-timeout-s", false)?;
        let keepalive = Self::seconds(self.keepalive_s, "--keepalive-s", true)?;
        let mut endpoint = Endpoint::from_shared(url.to_string())
            .with_context(|| format!("`{url}` is not a server URL (write http://HOST:PORT, https://HOST:PORT or unix:PATH)"))?
            .tcp_nodelay(true);
        if let Some(t) = connect {
            endpoint = endpoint.connect_timeout(t);
        }
        if let Some(k) = keepalive {
            endpoint = endpoint
                .http2_keep_alive_interval(k)
                .keep_alive_timeout(k)
                .keep_alive_while_idle(true)
                .tcp_keepalive(Some(k));
        }
        if url.starts_with("https://") {
            let mut tls = tonic::transport::ClientTlsConfig::new().with_native_roots();
            if let Some(ca) = &self.tls_ca {
                let pem = std::fs::read(ca)
                    .with_context(|| format!("reading --tls-ca {}", ca.display()))?;
                tls = tls.ca_certificate(tonic::transport::Certificate::from_pem(pem));
            }
            if let (Some(cert), Some(key)) = (&self.tls_cert, &self.tls_key) {
                let cert = std::fs::read(cert)
                    .with_context(|| format!("reading --tls-cert {}", cert.display()))?;
                let key = std::fs::read(key)
                    .with_context(|| format!("reading --tls-key {}", key.display()))?;
                tls = tls.identity(tonic::transport::Identity::from_pem(cert, key));
            }
            endpoint = endpoint
                .tls_config(tls)
                .with_context(|| format!("the TLS settings for {url}"))?;
        } else if self.tls_ca.is_some() || self.tls_cert.is_some() {
            bail!(
                "`{url}` is not an https:// URL, but TLS files were given: write https://{}",
                url.trim_start_matches("http://")
            );
        }
        Ok(endpoint)
    }
}

/// An error and its chain of causes, each once.
fn causes(error: &dyn std::error::Error) -> String {
    let mut chain = vec![error.to_string()];
    let mut source = error.source();
    while let Some(cause) = source {
        chain.push(cause.to_string());
        source = cause.source();
    }
    chain.dedup();
    chain.join(": ")
}

/// What to do about the usual connection failures, from their causes' text.
fn hint(causes: &str) -> &'static str {
    let lower = causes.to_lowercase();
    if lower.contains("refused") {
        "nothing listens there: is the server running, on this address and port?"
    } else if lower.contains("timed out") || lower.contains("elapsed") {
        "no answer in time: check the address, a firewall, or --connect-timeout-s"
    } else if lower.contains("dns") || lower.contains("resolve") || lower.contains("lookup") {
        "the host name does not resolve: check it"
    } else if lower.contains("unknownissuer")
        || lower.contains("invalid peer certificate")
        || lower.contains("certificate")
    {
        "the server's certificate is not trusted: give its authority with --tls-ca (or FRAMEWISE_TLS_CA); \
         a server that asks for a client certificate needs --tls-cert and --tls-key"
    } else if lower.contains("corrupt message")
        || lower.contains("invalidcontenttype")
        || lower.contains("record")
    {
        "the server does not speak TLS there: try http:// instead of https://"
    } else if lower.contains("frame") || lower.contains("http2") || lower.contains("h2") {
        "the server does not speak plaintext HTTP/2 there: if it uses TLS, write https://"
    } else {
        "check the address and whether the server uses TLS (https://) or not (http://)"
    }
}

/// Why a connection failed, in words a person can act on: the error's whole chain of causes, and a hint for
/// the usual ones.
fn explain_connect_error(url: &str, error: &dyn std::error::Error) -> String {
    let text = causes(error);
    format!("connecting to {url}: {text} ({})", hint(&text))
}

/// Connects to a server: `http://host:port`, or `unix:PATH` for a server's Unix-domain socket on this host
/// (`listen_unix`), which moves large frames faster than TCP loopback (BENCHMARKS.md, section 3).
pub async fn connect(url: &str) -> Result<FrameAnalysisClient<Channel>> {
    connect_with(url, &ConnectFlags::default()).await
}

/// As [`connect`], with TLS material, timeouts and keepalive from `flags`. A URL without a scheme is refused
/// with the one to write.
pub async fn connect_with(url: &str, flags: &ConnectFlags) -> Result<FrameAnalysisClient<Channel>> {
    let known = ["http://", "https://", "unix:"];
    if !known.iter().any(|s| url.starts_with(s)) {
        bail!(
            "`{url}` has no scheme: write http://{url} (https://{url} for a server with TLS, unix:PATH for its socket)"
        );
    }
    let channel = match unix_socket_path(url) {
        Some(path) => {
            // The URI is required by the transport but unused: the connector below opens the socket.
            let endpoint = windows(Endpoint::from_static("http://localhost"));
            let connector = tower::service_fn(move |_: tonic::codegen::http::Uri| {
                let path = path.clone();
                async move {
                    let stream = tokio::net::UnixStream::connect(path).await?;
                    Ok::<_, std::io::Error>(hyper_util::rt::TokioIo::new(stream))
                }
            });
            endpoint.connect_with_connector(connector).await
        }
        None => windows(flags.endpoint(url)?).connect().await,
    }
    .map_err(|e| ServerFailure(explain_connect_error(url, &e)))?;
    Ok(FrameAnalysisClient::new(channel)
        .max_decoding_message_size(MAX_MESSAGE_BYTES)
        .max_encoding_message_size(MAX_MESSAGE_BYTES))
}

/// The HTTP/2 windows the server uses, so that a whole frame can be in flight.
fn windows(endpoint: Endpoint) -> Endpoint {
    endpoint
        .initial_stream_window_size(framewise_server::STREAM_WINDOW_BYTES)
        .initial_connection_window_size(framewise_server::CONNECTION_WINDOW_BYTES)
}

/// The socket path of a `unix:PATH` (or `unix://PATH`) server address.
pub fn unix_socket_path(url: &str) -> Option<std::path::PathBuf> {
    let path = url.strip_prefix("unix://").or(url.strip_prefix("unix:"))?;
    (!path.is_empty()).then(|| path.into())
}

/// Frames handed to a server on the same host through a file in its `shared_frames_dir` (best on a memory file
/// system such as /dev/shm) instead of inside messages: each frame is written into the next of a ring of
/// slots and sent as a [`pb::FileSlice`]. A slot is written again only `slots` frames later, so the caller
/// keeps fewer frames than that waiting for their answers. The file is removed when this is dropped.
pub struct FrameFile {
    file: std::fs::File,
    path: std::path::PathBuf,
    name: String,
    slot_bytes: u64,
    slots: u64,
    next: u64,
}

impl FrameFile {
    /// Creates a new frame file of `slots` slots of `slot_bytes` bytes in `dir`, readable by the owner and
    /// group only.
    pub fn create(dir: &std::path::Path, slots: u64, slot_bytes: u64) -> Result<Self> {
        use std::os::unix::fs::OpenOptionsExt;
        use std::sync::atomic::{AtomicU64, Ordering};
        static NEXT: AtomicU64 = AtomicU64::new(0);
        anyhow::ensure!(
            slots > 0 && slot_bytes > 0,
            "a frame file needs at least one slot of at least one byte"
        );
        let name = format!(
            "framewise-{}-{}.frames",
            std::process::id(),
            NEXT.fetch_add(1, Ordering::Relaxed)
        );
        let path = dir.join(&name);
        let file = std::fs::OpenOptions::new()
            .read(true)
            .write(true)
            .create_new(true)
            .mode(0o640)
            .open(&path)
            .with_context(|| format!("creating the frame file {}", path.display()))?;
        let size = slots
            .checked_mul(slot_bytes)
            .context("the frame file would be too large")?;
        file.set_len(size)
            .with_context(|| format!("sizing the frame file {}", path.display()))?;
        Ok(Self {
            file,
            path,
            name,
            slot_bytes,
            slots,
            next: 0,
        })
    }

    /// The file's name, for the session opening's `frame_file`.
    pub fn name(&self) -> &str {
        &self.name
    }

    /// Writes a frame's bytes into the next slot and returns where they lie.
    pub fn put(&mut self, data: &[u8]) -> Result<pb::FileSlice> {
        use std::os::unix::fs::FileExt;
        let length = data.len() as u64;
        anyhow::ensure!(
            length <= self.slot_bytes,
            "a frame of {length} bytes does not fit a slot of {} bytes",
            self.slot_bytes
        );
        let offset = (self.next % self.slots) * self.slot_bytes;
        self.file
            .write_all_at(data, offset)
            .with_context(|| format!("writing to the frame file {}", self.path.display()))?;
        self.next += 1;
        Ok(pb::FileSlice { offset, length })
    }
}

impl Drop for FrameFile {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.path);
    }
}

/// Adds the bearer token, when there is one.
pub fn with_token<T>(message: T, token: Option<&str>) -> Result<tonic::Request<T>> {
    let mut request = tonic::Request::new(message);
    if let Some(token) = token {
        let value = format!("Bearer {token}")
            .parse()
            .context("the token holds characters a header cannot")?;
        request.metadata_mut().insert("authorization", value);
    }
    Ok(request)
}

/// An open session.
pub struct Session {
    /// The server's answer to the opening.
    pub accepted: pb::SessionAccepted,
    /// Frames go here; drop it to half-close.
    pub frames: mpsc::Sender<pb::SessionInput>,
    /// Answers and the summary come from here.
    pub answers: tonic::Streaming<pb::SessionOutput>,
}

/// Opens a session.
pub async fn open(
    client: &mut FrameAnalysisClient<Channel>,
    opening: pb::SessionOpening,
    token: Option<&str>,
) -> Result<Session> {
    let (frames, rx) = mpsc::channel(SEND_BUFFER);
    frames
        .send(pb::SessionInput {
            item: Some(pb::session_input::Item::Opening(opening)),
        })
        .await
        .context("queueing the session opening")?;
    let response = client
        .run_session(with_token(ReceiverStream::new(rx), token)?)
        .await
        .map_err(status_error)?;
    let mut answers = response.into_inner();
    let first = answers.message().await.map_err(status_error)?;
    match first.and_then(|m| m.item) {
        Some(pb::session_output::Item::Accepted(accepted)) => Ok(Session {
            accepted,
            frames,
            answers,
        }),
        _ => bail!("the server did not accept the session (no SessionAccepted)"),
    }
}

/// A failure of the server or of the way to it (unreachable, gone mid-stream, overloaded), as opposed to a
/// refusal of what was asked. A recording can be re-run on another server after one of these.
#[derive(Debug)]
pub struct ServerFailure(pub String);

impl std::fmt::Display for ServerFailure {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for ServerFailure {}

/// True when the error (or one of its causes) is a [`ServerFailure`].
pub fn is_server_failure(e: &anyhow::Error) -> bool {
    e.chain().any(|c| c.is::<ServerFailure>())
}

/// A gRPC status as an error a person can act on; statuses that say the server or the connection failed
/// (rather than that the request was wrong) are marked as [`ServerFailure`].
pub fn status_error(status: tonic::Status) -> anyhow::Error {
    // A transport failure surfaces as a status whose message is only "transport error": its causes say what.
    let failed = if std::error::Error::source(&status).is_some() {
        let text = causes(&status);
        format!(
            "the connection to the server failed: {text} ({})",
            hint(&text)
        )
    } else {
        format!(
            "the server failed or the connection to it broke ({:?}: {})",
            status.code(),
            status.message()
        )
    };
    let text = format!("server answered {:?}: {}", status.code(), status.message());
    match status.code() {
        tonic::Code::Unavailable
        | tonic::Code::Unknown
        | tonic::Code::Internal
        | tonic::Code::Cancelled
        | tonic::Code::Aborted
        | tonic::Code::DeadlineExceeded
        | tonic::Code::ResourceExhausted => anyhow::Error::new(ServerFailure(failed)),
        _ => anyhow::anyhow!(text),
    }
}

/// The endpoints behind a list of server URLs: an `http://` URL whose host name resolves to several
/// addresses becomes one URL per address (a headless service's name, for instance); IP literals, single
/// addresses and `https://` URLs (whose certificate names the host) stay as given. Duplicates are dropped.
pub async fn expand_endpoints(urls: &[String]) -> Vec<String> {
    let mut out: Vec<String> = Vec::new();
    for url in urls {
        let mut expanded = Vec::new();
        if let Ok(uri) = url.parse::<tonic::codegen::http::Uri>()
            && uri.scheme_str() == Some("http")
            && let Some(host) = uri.host()
            && host.parse::<std::net::IpAddr>().is_err()
        {
            let port = uri.port_u16().unwrap_or(80);
            if let Ok(addrs) = tokio::net::lookup_host((host, port)).await {
                let mut addrs: Vec<std::net::SocketAddr> = addrs.collect();
                addrs.sort();
                addrs.dedup();
                if addrs.len() > 1 {
                    expanded = addrs.iter().map(|a| format!("http://{a}")).collect();
                }
            }
        }
        if expanded.is_empty() {
            expanded.push(url.clone());
        }
        for e in expanded {
            if !out.contains(&e) {
                out.push(e);
            }
        }
    }
    out
}

/// Sends one frame on a session; false when the session has ended.
pub async fn send_frame(frames: &mpsc::Sender<pb::SessionInput>, frame: pb::Frame) -> bool {
    frames
        .send(pb::SessionInput {
            item: Some(pb::session_input::Item::Frame(frame)),
        })
        .await
        .is_ok()
}
