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

/// Connects to a server: `http://host:port`, or `unix:PATH` for a server's Unix-domain socket on this host
/// (`listen_unix`), which moves large frames faster than TCP loopback (BENCHMARKS.md, section 3).
pub async fn connect(url: &str) -> Result<FrameAnalysisClient<Channel>> {
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
        None => {
            let endpoint = Endpoint::from_shared(url.to_string())
                .with_context(|| format!("`{url}` is not a server URL"))?
                .tcp_nodelay(true);
            windows(endpoint).connect().await
        }
    }
    .map_err(|e| ServerFailure(format!("connecting to {url}: {e}")))?;
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
    let failed = format!(
        "the server failed or the connection to it broke ({:?}: {})",
        status.code(),
        status.message()
    );
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
