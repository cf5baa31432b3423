//! The gRPC service: session admission (token, limits, model, settings) and the unary calls.
//! Engine errors become gRPC statuses here, once.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};

use framewise_engine::{CAUTION, FrameLimits};
use framewise_proto::v1 as pb;
use pb::frame_analysis_server::FrameAnalysis;
use tokio::sync::{Semaphore, mpsc};
use tokio_stream::wrappers::ReceiverStream;
use tokio_util::sync::CancellationToken;
use tonic::{Request, Response, Status, Streaming};

use crate::config::{ANSWER_BUFFER, ServerConfig};
use crate::convert;
use crate::pool::WorkerPool;
use crate::registry::ModelRegistry;
use crate::session::{self, SessionContext};
use crate::stats::{ServerStats, bump};

/// Shared state of the service.
pub struct Service {
    registry: ModelRegistry,
    pool: WorkerPool,
    stats: Arc<ServerStats>,
    sessions: Arc<Semaphore>,
    max_sessions: usize,
    limits: FrameLimits,
    token: Option<String>,
    idle_timeout: std::time::Duration,
    draining: Arc<AtomicBool>,
    hard_stop: CancellationToken,
    next_id: AtomicU64,
    shared_frames_dir: Option<std::path::PathBuf>,
    max_message_bytes: usize,
}

impl Service {
    /// A service over loaded models and a worker pool.
    pub fn new(
        config: &ServerConfig,
        registry: ModelRegistry,
        pool: WorkerPool,
        stats: Arc<ServerStats>,
        draining: Arc<AtomicBool>,
        hard_stop: CancellationToken,
    ) -> Self {
        Self {
            registry,
            pool,
            stats,
            sessions: Arc::new(Semaphore::new(config.max_sessions)),
            max_sessions: config.max_sessions,
            limits: FrameLimits {
                max_width: config.max_frame_width,
                max_height: config.max_frame_height,
            },
            token: config.token.clone(),
            idle_timeout: config.idle_timeout(),
            draining,
            hard_stop,
            next_id: AtomicU64::new(1),
            shared_frames_dir: config.shared_frames_dir.clone(),
            max_message_bytes: config.max_message_bytes,
        }
    }

    fn authorise<T>(&self, request: &Request<T>) -> Result<(), Status> {
        let Some(expected) = &self.token else {
            return Ok(());
        };
        let given = request
            .metadata()
            .get("authorization")
            .and_then(|v| v.to_str().ok())
            .and_then(|v| v.strip_prefix("Bearer "));
        match given {
            Some(given) if constant_time_eq(given.as_bytes(), expected.as_bytes()) => Ok(()),
            Some(_) => Err(Status::unauthenticated("the bearer token is not valid")),
            None => Err(Status::unauthenticated(
                "this server needs `authorization: Bearer <token>`",
            )),
        }
    }

    /// Opens the frame file a session's opening names: a plain file directly inside `shared_frames_dir`,
    /// for a session on the Unix socket only. The file is checked before opening and the opened file is the
    /// one that was checked (same device and inode), so a swapped-in link is not followed.
    fn open_frame_file(&self, name: &str, on_unix_socket: bool) -> Result<std::fs::File, String> {
        use std::os::unix::fs::MetadataExt;
        let field = "session opening field `frame_file`";
        let Some(dir) = &self.shared_frames_dir else {
            return Err(format!(
                "{field}: this server reads no frame files (its shared_frames_dir is not set)"
            ));
        };
        if !on_unix_socket {
            return Err(format!(
                "{field}: frame files are read only for sessions on the server's Unix socket"
            ));
        }
        if name.is_empty()
            || name.len() > 255
            || name == "."
            || name == ".."
            || name.contains(['/', '\0'])
        {
            return Err(format!(
                "{field}: `{name}` is not a plain file name (no directories, at most 255 bytes)"
            ));
        }
        let path = dir.join(name);
        let checked = std::fs::symlink_metadata(&path).map_err(|e| {
            format!("{field}: no file `{name}` in the shared frames directory: {e}")
        })?;
        if !checked.file_type().is_file() {
            return Err(format!("{field}: `{name}` is not a plain file"));
        }
        let file = std::fs::File::open(&path)
            .map_err(|e| format!("{field}: `{name}` could not be opened: {e}"))?;
        let opened = file
            .metadata()
            .map_err(|e| format!("{field}: `{name}` could not be read: {e}"))?;
        if (opened.dev(), opened.ino()) != (checked.dev(), checked.ino()) {
            return Err(format!(
                "{field}: `{name}` changed while it was being opened"
            ));
        }
        Ok(file)
    }

    fn refuse(&self, status: Status) -> Status {
        bump(&self.stats.sessions_refused);
        status
    }
}

/// Compares two byte strings in time that depends only on their lengths.
fn constant_time_eq(a: &[u8], b: &[u8]) -> bool {
    if a.len() != b.len() {
        return false;
    }
    a.iter().zip(b).fold(0u8, |acc, (x, y)| acc | (x ^ y)) == 0
}

/// Decrements the open-session gauge when a session task ends, however it ends.
struct OpenSession(Arc<ServerStats>);

impl Drop for OpenSession {
    fn drop(&mut self) {
        self.0.sessions_open.fetch_sub(1, Ordering::Relaxed);
    }
}

#[tonic::async_trait]
impl FrameAnalysis for Service {
    type RunSessionStream = ReceiverStream<Result<pb::SessionOutput, Status>>;

    async fn run_session(
        &self,
        request: Request<Streaming<pb::SessionInput>>,
    ) -> Result<Response<Self::RunSessionStream>, Status> {
        self.authorise(&request).map_err(|s| self.refuse(s))?;
        if self.draining.load(Ordering::Relaxed) {
            return Err(self.refuse(Status::unavailable(
                "the server is shutting down and takes no new sessions",
            )));
        }
        let permit = self.sessions.clone().try_acquire_owned().map_err(|_| {
            self.refuse(Status::resource_exhausted(format!(
                "the server already has its maximum of {} open sessions",
                self.max_sessions
            )))
        })?;
        let on_unix_socket = request
            .extensions()
            .get::<tonic::transport::server::UdsConnectInfo>()
            .is_some();
        let mut inbound = request.into_inner();
        let first = tokio::time::timeout(self.idle_timeout, inbound.message())
            .await
            .map_err(|_| {
                self.refuse(Status::cancelled(
                    "no SessionOpening arrived within the idle timeout; the session was ended by the server",
                ))
            })?
            .map_err(|s| self.refuse(s))?;
        let opening = match first.and_then(|m| m.item) {
            Some(pb::session_input::Item::Opening(o)) => o,
            Some(pb::session_input::Item::Frame(_)) => {
                return Err(self.refuse(Status::invalid_argument(
                    "session input: the first message must be a SessionOpening, not a frame",
                )));
            }
            None => {
                return Err(self.refuse(Status::invalid_argument(
                    "session input: the stream ended before a SessionOpening",
                )));
            }
        };
        let model = self.registry.get(&opening.model).cloned().ok_or_else(|| {
            let known: Vec<&str> = self
                .registry
                .all()
                .iter()
                .map(|m| m.identity().name.as_str())
                .collect();
            self.refuse(Status::not_found(format!(
                "session opening field `model`: no model named `{}`; this server has {known:?}",
                opening.model
            )))
        })?;
        let plan = convert::session_plan(&opening, &model, self.limits)
            .map_err(|e| self.refuse(Status::invalid_argument(e.to_string())))?;
        let frame_file = match opening.frame_file.as_str() {
            "" => None,
            name => Some(Arc::new(
                self.open_frame_file(name, on_unix_socket)
                    .map_err(|e| self.refuse(Status::invalid_argument(e)))?,
            )),
        };
        let id = format!("s{:06}", self.next_id.fetch_add(1, Ordering::Relaxed));
        let accepted = pb::SessionAccepted {
            session_id: id.clone(),
            model: Some(convert::identity(&model)),
            classes: model.classes().to_vec(),
            input: Some(convert::input_recipe(&model)),
            settings: Some(convert::wire_settings(&plan, &model.identity().name)),
            caution: CAUTION.into(),
            model_caution: model.manifest().caution.clone(),
            intended_use: model.manifest().intended_use.clone(),
        };
        let (outbox, answers) = mpsc::channel(ANSWER_BUFFER);
        let first = pb::SessionOutput {
            item: Some(pb::session_output::Item::Accepted(accepted)),
        };
        outbox
            .send(Ok(first))
            .await
            .map_err(|_| Status::cancelled("the client left"))?;
        bump(&self.stats.sessions_total);
        self.stats.sessions_open.fetch_add(1, Ordering::Relaxed);
        tracing::info!(session = %id, model = %model.identity().name, source = %plan.source_label, policy = ?plan.policy, "session opened");
        let ctx = SessionContext {
            id,
            model,
            plan,
            pool: self.pool.clone(),
            stats: self.stats.clone(),
            idle_timeout: self.idle_timeout,
            hard_stop: self.hard_stop.clone(),
            frame_file,
            max_slice_bytes: self.max_message_bytes as u64,
        };
        let open = OpenSession(self.stats.clone());
        tokio::spawn(async move {
            let _permit = permit;
            let _open = open;
            session::run(ctx, inbound, outbox).await;
        });
        Ok(Response::new(ReceiverStream::new(answers)))
    }

    async fn list_model_cards(
        &self,
        request: Request<pb::ModelCardsRequest>,
    ) -> Result<Response<pb::ModelCards>, Status> {
        self.authorise(&request)?;
        let models = self
            .registry
            .all()
            .iter()
            .enumerate()
            .map(|(i, m)| convert::model_card(m, i == 0))
            .collect();
        Ok(Response::new(pb::ModelCards {
            models,
            caution: CAUTION.into(),
        }))
    }

    async fn get_model_card(
        &self,
        request: Request<pb::ModelCardRequest>,
    ) -> Result<Response<pb::ModelCard>, Status> {
        self.authorise(&request)?;
        let name = &request.get_ref().name;
        let model = self
            .registry
            .get(name)
            .ok_or_else(|| Status::not_found(format!("no model named `{name}`")))?;
        let is_default = self.registry.get("").is_some_and(|d| Arc::ptr_eq(d, model));
        Ok(Response::new(convert::model_card(model, is_default)))
    }

    async fn read_statistics(
        &self,
        request: Request<pb::StatisticsRequest>,
    ) -> Result<Response<pb::ServerStatistics>, Status> {
        self.authorise(&request)?;
        let s = self.stats.snapshot();
        Ok(Response::new(pb::ServerStatistics {
            sessions_open: s.sessions_open,
            sessions_total: s.sessions_total,
            frames: s.frames,
            results: s.results,
            skipped: s.skipped,
            errors: s.errors,
            deadline_missed: s.deadline_missed,
            stages: convert::percentiles(&s.stages),
            uptime_s: s.uptime_s,
            caution: CAUTION.into(),
        }))
    }
}
