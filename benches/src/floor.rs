//! The transport's floor: a server on framewise's wire contract and HTTP/2 settings that answers each frame
//! the moment its message is decoded (or after a pause as long as an inference, its threads idle meanwhile),
//! with an answer of the same shape as framewise's, and does nothing else (no preprocessing, no worker, no
//! inference, no filter). Its round trip less the pause is what gRPC, HTTP/2, the async runtime and the
//! connection cost on this host; framewise's overhead above it is the server's own.

use std::net::SocketAddr;
use std::os::unix::fs::FileTypeExt;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::{Context, Result};
use framewise_proto::v1 as pb;
use framewise_proto::v1::frame_analysis_server::{FrameAnalysis, FrameAnalysisServer};
use tokio::sync::mpsc;
use tokio_stream::wrappers::ReceiverStream;
use tokio_util::sync::CancellationToken;
use tonic::{Request, Response, Status, Streaming};

/// Why the floor refuses every call but a session.
const ONLY_FRAMES: &str = "the transport floor only answers frames";

/// Answers a session's frames at once, or after `pause`; every other call is refused.
struct Floor {
    classes: usize,
    pause: Duration,
}

#[tonic::async_trait]
impl FrameAnalysis for Floor {
    type RunSessionStream = ReceiverStream<Result<pb::SessionOutput, Status>>;

    async fn run_session(
        &self,
        request: Request<Streaming<pb::SessionInput>>,
    ) -> Result<Response<Self::RunSessionStream>, Status> {
        let mut inbound = request.into_inner();
        // Answers a session may have waiting for the client, as in framewise's sessions.
        let (outbox, answers) = mpsc::channel(framewise_server::config::ANSWER_BUFFER);
        let (classes, pause) = (self.classes, self.pause);
        // One task per session reads, answers and hands the answer to the response stream, as framewise's
        // every-frame sessions do.
        tokio::spawn(async move {
            while let Ok(Some(input)) = inbound.message().await {
                let item = match input.item {
                    Some(pb::session_input::Item::Opening(_)) => {
                        pb::session_output::Item::Accepted(pb::SessionAccepted {
                            caution: framewise_engine::CAUTION.into(),
                            ..Default::default()
                        })
                    }
                    Some(pb::session_input::Item::Frame(frame)) => {
                        // A pause stands in for an inference, on a thread of its own as framewise's
                        // workers are: the runtime's threads go idle meanwhile, and the hand-back wakes
                        // them. Its length, measured on that thread, is reported as the inference time so
                        // that the client subtracts it as it does framewise's; the hand-back is not.
                        let mut paused_us = 0;
                        if !pause.is_zero() {
                            let paused = tokio::task::spawn_blocking(move || {
                                let start = Instant::now();
                                std::thread::sleep(pause);
                                start.elapsed().as_micros() as u64
                            });
                            match paused.await {
                                Ok(us) => paused_us = us,
                                Err(_) => break,
                            }
                        }
                        pb::session_output::Item::Answer(pb::Answer {
                            seq: frame.seq,
                            capture_time_us: frame.capture_time_us,
                            outcome: Some(pb::answer::Outcome::Result(pb::FrameResult {
                                raw: vec![0.0; classes],
                                smoothed: vec![0.0; classes],
                                decision: Some(pb::Decision::default()),
                                quality: Some(pb::Quality::default()),
                                timings: Some(pb::StageTimings {
                                    inference_us: paused_us,
                                    ..Default::default()
                                }),
                                deadline_missed: false,
                            })),
                            model: Some(pb::ModelIdentity::default()),
                            caution: framewise_engine::CAUTION.into(),
                        })
                    }
                    None => continue,
                };
                let out = pb::SessionOutput { item: Some(item) };
                if outbox.send(Ok(out)).await.is_err() {
                    break;
                }
            }
        });
        Ok(Response::new(ReceiverStream::new(answers)))
    }

    async fn list_model_cards(
        &self,
        _: Request<pb::ModelCardsRequest>,
    ) -> Result<Response<pb::ModelCards>, Status> {
        Err(Status::unimplemented(ONLY_FRAMES))
    }

    async fn get_model_card(
        &self,
        _: Request<pb::ModelCardRequest>,
    ) -> Result<Response<pb::ModelCard>, Status> {
        Err(Status::unimplemented(ONLY_FRAMES))
    }

    async fn read_statistics(
        &self,
        _: Request<pb::StatisticsRequest>,
    ) -> Result<Response<pb::ServerStatistics>, Status> {
        Err(Status::unimplemented(ONLY_FRAMES))
    }
}

/// A running floor server on TCP loopback and a Unix socket.
pub struct FloorServer {
    pub addr: SocketAddr,
    pub socket: PathBuf,
    stop: CancellationToken,
    tasks: Vec<tokio::task::JoinHandle<Result<(), tonic::transport::Error>>>,
}

impl FloorServer {
    /// Serves on 127.0.0.1 (a free port) and on `socket`, with framewise's HTTP/2 settings and message limit;
    /// each frame is answered after `pause` (zero: at once).
    pub async fn start(socket: &Path, classes: usize, pause: Duration) -> Result<Self> {
        let max = framewise_server::ServerConfig::default().max_message_bytes;
        let service = FrameAnalysisServer::new(Floor { classes, pause })
            .max_decoding_message_size(max)
            .max_encoding_message_size(max);
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
        let addr = listener.local_addr()?;
        // A socket left by an earlier run goes; anything else at that path is refused by the bind.
        if std::fs::symlink_metadata(socket).is_ok_and(|m| m.file_type().is_socket()) {
            let _ = std::fs::remove_file(socket);
        }
        let unix = tokio::net::UnixListener::bind(socket)
            .with_context(|| format!("binding {}", socket.display()))?;
        let stop = CancellationToken::new();
        let stopped = |token: &CancellationToken| {
            let token = token.clone();
            async move { token.cancelled().await }
        };
        let tcp = framewise_server::transport()
            .add_service(service.clone())
            .serve_with_incoming_shutdown(
                tonic::transport::server::TcpIncoming::from(listener).with_nodelay(Some(true)),
                stopped(&stop),
            );
        let unix = framewise_server::transport()
            .add_service(service)
            .serve_with_incoming_shutdown(
                tokio_stream::wrappers::UnixListenerStream::new(unix),
                stopped(&stop),
            );
        Ok(Self {
            addr,
            socket: socket.to_path_buf(),
            stop,
            tasks: vec![tokio::spawn(tcp), tokio::spawn(unix)],
        })
    }

    /// Stops both listeners, waits for them and removes the socket.
    pub async fn stop(mut self) -> Result<()> {
        self.stop.cancel();
        let mut first_error = Ok(());
        for task in std::mem::take(&mut self.tasks) {
            let ended = match task.await {
                Ok(served) => served.map_err(anyhow::Error::from),
                Err(e) => Err(e.into()),
            };
            if first_error.is_ok() {
                first_error = ended;
            }
        }
        first_error
    }
}

/// A floor dropped on an error path stops serving and leaves no socket behind.
impl Drop for FloorServer {
    fn drop(&mut self) {
        self.stop.cancel();
        let _ = std::fs::remove_file(&self.socket);
    }
}
