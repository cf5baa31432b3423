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

/// Connects to a server URL (`http://host:port`).
pub async fn connect(url: &str) -> Result<FrameAnalysisClient<Channel>> {
    let endpoint = Endpoint::from_shared(url.to_string())
        .with_context(|| format!("`{url}` is not a server URL"))?
        .tcp_nodelay(true)
        .initial_stream_window_size(framewise_server::STREAM_WINDOW_BYTES)
        .initial_connection_window_size(framewise_server::CONNECTION_WINDOW_BYTES);
    let channel = endpoint
        .connect()
        .await
        .with_context(|| format!("connecting to {url}"))?;
    Ok(FrameAnalysisClient::new(channel)
        .max_decoding_message_size(MAX_MESSAGE_BYTES)
        .max_encoding_message_size(MAX_MESSAGE_BYTES))
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
        .converse(with_token(ReceiverStream::new(rx), token)?)
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

/// A gRPC status as an error a person can act on.
pub fn status_error(status: tonic::Status) -> anyhow::Error {
    anyhow::anyhow!("server answered {:?}: {}", status.code(), status.message())
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
