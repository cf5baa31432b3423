//! One session: the opening, then every frame answered exactly once under the session's frame policy, then
//! the summary.
//!
//! Every-frame: the session reads the next frame only after answering the previous one, so when the server
//! falls behind the transport's flow control slows the sender. Latest-only: a reader keeps at most one
//! frame waiting and answers an overtaken one as skipped at once.
//!
//! A client that takes no answer for the idle timeout (or still none at the drain deadline) is ended: its
//! session must not hold a slot and its buffered frames forever.

use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use framewise_engine::latency::{LatencyBook, StageTimings};
use framewise_engine::pipeline::{self, Scratch, Smoother};
use framewise_engine::{CAUTION, FrameRef, Model, PixelFormat};
use framewise_proto::v1 as pb;
use tokio::sync::{Notify, mpsc};
use tokio_util::sync::CancellationToken;
use tonic::Status;

use crate::convert::{self, FramePolicy, SessionPlan};
use crate::pool::WorkerPool;
use crate::stats::{ServerStats, bump};

/// What a session needs from the server.
#[derive(Clone)]
pub struct SessionContext {
    /// Session id.
    pub id: String,
    /// The model.
    pub model: Arc<Model>,
    /// The checked opening.
    pub plan: SessionPlan,
    /// Worker pool.
    pub pool: WorkerPool,
    /// Server statistics.
    pub stats: Arc<ServerStats>,
    /// Idle timeout.
    pub idle_timeout: Duration,
    /// Cancelled when the server's drain deadline passes.
    pub hard_stop: CancellationToken,
    /// The session's frame file, when its opening named one.
    pub frame_file: Option<Arc<std::fs::File>>,
    /// Largest file slice a frame may name (the server's largest message).
    pub max_slice_bytes: u64,
}

/// Answers go out through this channel.
pub type Outbox = mpsc::Sender<Result<pb::SessionOutput, Status>>;

/// A frame with its arrival time.
struct Arrived {
    frame: pb::Frame,
    arrival: Instant,
}

/// Per-session counters and histograms.
#[derive(Default)]
struct Tally {
    frames: u64,
    results: u64,
    skipped: u64,
    errors: u64,
    deadline_missed: u64,
    latency: LatencyBook,
}

/// The moving parts of a session that process frames in order.
struct Processor {
    ctx: SessionContext,
    identity: pb::ModelIdentity,
    scratch: Option<Scratch>,
    /// Where a frame read from the frame file is put; reused from frame to frame.
    file_buffer: Option<Vec<u8>>,
    smoother: Smoother,
    started: Instant,
    tally: Arc<Mutex<Tally>>,
}

fn answer(
    seq: u64,
    capture_time_us: i64,
    identity: &pb::ModelIdentity,
    outcome: pb::answer::Outcome,
) -> pb::SessionOutput {
    pb::SessionOutput {
        item: Some(pb::session_output::Item::Answer(pb::Answer {
            seq,
            capture_time_us,
            outcome: Some(outcome),
            model: Some(identity.clone()),
            caution: CAUTION.into(),
        })),
    }
}

fn frame_error(kind: &str, message: String) -> pb::answer::Outcome {
    pb::answer::Outcome::Error(pb::FrameError {
        kind: kind.into(),
        message,
    })
}

impl Processor {
    /// The capture time to use: the frame's, or the arrival time since the session started.
    fn capture_time_us(&self, arrived: &Arrived) -> i64 {
        if arrived.frame.capture_time_us != 0 {
            arrived.frame.capture_time_us
        } else {
            arrived.arrival.duration_since(self.started).as_micros() as i64
        }
    }

    /// Analyses one frame and returns its answer.
    async fn process(&mut self, arrived: Arrived) -> pb::SessionOutput {
        let seq = arrived.frame.seq;
        let t_us = self.capture_time_us(&arrived);
        let format = match convert::pixel_format(arrived.frame.format) {
            Ok(Some(f)) => Some(f),
            Ok(None) => self.ctx.plan.default_format,
            Err(v) => {
                self.count_error();
                return answer(
                    seq,
                    t_us,
                    &self.identity,
                    frame_error(
                        "bad_format",
                        format!("frame {seq}: pixel format {v} is not known"),
                    ),
                );
            }
        };
        let Some(format) = format else {
            self.count_error();
            let message =
                format!("frame {seq}: no pixel format, and the session set no default_format");
            return answer(
                seq,
                t_us,
                &self.identity,
                frame_error("bad_format", message),
            );
        };
        // A frame in the session's frame file: its slice and the file, checked before it goes to a worker.
        let from_file = match (arrived.frame.file_slice, &self.ctx.frame_file) {
            (None, _) => None,
            (Some(_), None) => {
                self.count_error();
                let message = format!(
                    "frame {seq}: it names a file slice, but the session's opening named no frame_file"
                );
                return answer(
                    seq,
                    t_us,
                    &self.identity,
                    frame_error("bad_file_slice", message),
                );
            }
            (Some(s), Some(file)) => {
                let problem = if !arrived.frame.data.is_empty() {
                    Some("it has both data and a file slice; give the pixels in one".to_string())
                } else if s.length > self.ctx.max_slice_bytes {
                    Some(format!(
                        "its file slice of {} bytes is larger than the server's largest frame, {} bytes",
                        s.length, self.ctx.max_slice_bytes
                    ))
                } else {
                    None
                };
                if let Some(problem) = problem {
                    self.count_error();
                    let message = format!("frame {seq}: {problem}");
                    return answer(
                        seq,
                        t_us,
                        &self.identity,
                        frame_error("bad_file_slice", message),
                    );
                }
                Some((s, file.clone()))
            }
        };
        let model = self.ctx.model.clone();
        let spec = self.ctx.plan.settings.frame;
        let mut scratch = self.scratch.take().unwrap_or_default();
        let mut buffer = self.file_buffer.take().unwrap_or_default();
        let frame = arrived.frame;
        let queued = Instant::now();
        let work = move || {
            let queue_us = pipeline::micros_since(queued);
            // A frame file's slice is read here, on the worker, and counted as preprocessing: the frame's
            // only copy.
            let start = Instant::now();
            let data = match &from_file {
                Some((slice, file)) => read_slice(file, *slice, &mut buffer).map(|()| &buffer[..]),
                None => Ok(&frame.data[..]),
            };
            let read_us = match from_file {
                Some(_) => pipeline::micros_since(start),
                None => 0,
            };
            let result = data.map_err(|e| ("bad_file_slice", e)).and_then(|data| {
                let frame_ref = FrameRef {
                    data,
                    ..frame_ref(&frame, format)
                };
                pipeline::analyse(&model, &frame_ref, &spec, &mut scratch)
                    .map(|mut a| {
                        a.preprocess_us += read_us;
                        a
                    })
                    .map_err(|e| (e.kind(), e.to_string()))
            });
            (scratch, buffer, queue_us, result)
        };
        let (scratch, buffer, queue_us, result) = match self.ctx.pool.run(work).await {
            Ok(done) => done,
            Err(stopped) => {
                self.count_error();
                return answer(
                    seq,
                    t_us,
                    &self.identity,
                    frame_error("unavailable", format!("frame {seq}: {stopped}")),
                );
            }
        };
        self.scratch = Some(scratch);
        self.file_buffer = Some(buffer);
        let analysed = match result {
            Ok(a) => a,
            Err((kind, e)) => {
                self.count_error();
                return answer(
                    seq,
                    t_us,
                    &self.identity,
                    frame_error(kind, format!("frame {seq}: {e}")),
                );
            }
        };
        let filter_start = Instant::now();
        let smoothed = self
            .smoother
            .smooth(t_us as f64 / 1000.0, &analysed.raw, &analysed.quality);
        let filter_us = pipeline::micros_since(filter_start);
        let timings = StageTimings {
            queue_us,
            preprocess_us: analysed.preprocess_us,
            inference_us: analysed.inference_us,
            filter_us,
            total_us: pipeline::micros_since(arrived.arrival),
        };
        let deadline_missed =
            self.ctx.plan.deadline_us > 0 && timings.total_us > self.ctx.plan.deadline_us;
        self.ctx.stats.record(&timings);
        bump(&self.ctx.stats.results);
        if deadline_missed {
            bump(&self.ctx.stats.deadline_missed);
        }
        if let Ok(mut tally) = self.tally.lock() {
            tally.results += 1;
            tally.deadline_missed += u64::from(deadline_missed);
            tally.latency.record(&timings);
        }
        let result = pb::FrameResult {
            raw: analysed.raw,
            smoothed: smoothed.smoothed,
            decision: Some(convert::decision(
                smoothed.decision,
                self.ctx.model.classes(),
            )),
            quality: Some(convert::quality(&analysed.quality, &smoothed.verdict)),
            timings: Some(convert::timings(&timings)),
            deadline_missed,
        };
        answer(
            seq,
            t_us,
            &self.identity,
            pb::answer::Outcome::Result(result),
        )
    }

    fn count_error(&self) {
        bump(&self.ctx.stats.errors);
        if let Ok(mut tally) = self.tally.lock() {
            tally.errors += 1;
        }
    }
}

/// Reads a frame's file slice into `buffer` (resized to it).
fn read_slice(
    file: &std::fs::File,
    slice: pb::FileSlice,
    buffer: &mut Vec<u8>,
) -> Result<(), String> {
    use std::os::unix::fs::FileExt;
    let (offset, length) = (slice.offset, slice.length);
    buffer.resize(length as usize, 0);
    file.read_exact_at(buffer, offset).map_err(|e| match e.kind() {
        std::io::ErrorKind::UnexpectedEof => format!(
            "its file slice (offset {offset}, {length} bytes) goes past the end of the frame file"
        ),
        _ => format!("its file slice (offset {offset}, {length} bytes) could not be read: {e}"),
    })
}

fn frame_ref(frame: &pb::Frame, format: PixelFormat) -> FrameRef<'_> {
    FrameRef {
        format,
        width: frame.width,
        height: frame.height,
        stride: frame.stride,
        data: &frame.data,
    }
}

/// Reads the next frame, with the idle timeout. `Ok(None)` when the client half-closed.
async fn next_frame(
    inbound: &mut tonic::Streaming<pb::SessionInput>,
    ctx: &SessionContext,
) -> Result<Option<Arrived>, Status> {
    let message = tokio::select! {
        m = tokio::time::timeout(ctx.idle_timeout, inbound.message()) => m,
        _ = ctx.hard_stop.cancelled() => return Err(Status::unavailable("the server is shutting down; the session was ended at the drain deadline")),
    };
    let message = match message {
        Err(_) => {
            // The server's own limit, not the caller's deadline: the session is cancelled by the server.
            return Err(Status::cancelled(format!(
                "no message for {:.0} s (idle timeout); the session was ended by the server",
                ctx.idle_timeout.as_secs_f64()
            )));
        }
        Ok(Err(status)) => return Err(status),
        Ok(Ok(None)) => return Ok(None),
        Ok(Ok(Some(m))) => m,
    };
    match message.item {
        Some(pb::session_input::Item::Frame(frame)) => Ok(Some(Arrived {
            frame,
            arrival: Instant::now(),
        })),
        Some(pb::session_input::Item::Opening(_)) => Err(Status::invalid_argument(
            "session input: a second SessionOpening arrived; only frames may follow the first",
        )),
        None => Err(Status::invalid_argument(
            "session input: a message with neither opening nor frame",
        )),
    }
}

/// Why an answer could not be handed to the client's stream.
enum Undelivered {
    /// The client went away: a normal end.
    Gone,
    /// The client took no answer for the idle timeout, or the drain deadline passed while it took none.
    Stuck(Status),
}

/// Hands an answer to the client's stream, waiting at most the idle timeout (and not past the drain
/// deadline) for the client to make room by reading.
async fn deliver(
    outbox: &Outbox,
    ctx: &SessionContext,
    message: pb::SessionOutput,
) -> Result<(), Undelivered> {
    tokio::select! {
        // A client that is reading is served first, also after the drain deadline.
        biased;
        sent = tokio::time::timeout(ctx.idle_timeout, outbox.send(Ok(message))) => match sent {
            Ok(Ok(())) => Ok(()),
            Ok(Err(_)) => Err(Undelivered::Gone),
            Err(_) => Err(Undelivered::Stuck(Status::cancelled(format!(
                "the client read no answer for {:.0} s (idle timeout); the session was ended by the server",
                ctx.idle_timeout.as_secs_f64()
            )))),
        },
        _ = ctx.hard_stop.cancelled() => Err(Undelivered::Stuck(Status::unavailable(
            "the server is shutting down; the session was ended at the drain deadline",
        ))),
    }
}

/// Runs a session after its opening was accepted: answers every frame and sends the summary.
pub async fn run(ctx: SessionContext, inbound: tonic::Streaming<pb::SessionInput>, outbox: Outbox) {
    let tally = Arc::new(Mutex::new(Tally::default()));
    let smoother = match Smoother::new(&ctx.plan.settings, ctx.model.classes().len()) {
        Ok(s) => s,
        Err(e) => {
            let _ = outbox
                .send(Err(Status::invalid_argument(e.to_string())))
                .await;
            return;
        }
    };
    let processor = Processor {
        identity: convert::identity(&ctx.model),
        ctx: ctx.clone(),
        scratch: Some(Scratch::default()),
        file_buffer: Some(Vec::new()),
        smoother,
        started: Instant::now(),
        tally: tally.clone(),
    };
    let ended = match ctx.plan.policy {
        FramePolicy::EveryFrame => every_frame(processor, inbound, &outbox).await,
        FramePolicy::LatestOnly => latest_only(processor, inbound, &outbox).await,
    };
    let summary = {
        let tally = tally.lock().map(|t| Tally {
            frames: t.frames,
            results: t.results,
            skipped: t.skipped,
            errors: t.errors,
            deadline_missed: t.deadline_missed,
            latency: t.latency.clone(),
        });
        tally.unwrap_or_default()
    };
    let stages = summary.latency.summary();
    let total = stages
        .iter()
        .find(|s| s.stage == "total")
        .cloned()
        .unwrap_or_default();
    tracing::info!(
        session = %ctx.id,
        source = %ctx.plan.source_label,
        frames = summary.frames,
        results = summary.results,
        skipped = summary.skipped,
        errors = summary.errors,
        deadline_missed = summary.deadline_missed,
        total_p50_us = total.p50,
        total_p99_us = total.p99,
        total_max_us = total.max,
        "session ended"
    );
    match ended {
        Ok(()) => {
            let message = pb::SessionOutput {
                item: Some(pb::session_output::Item::Summary(pb::SessionSummary {
                    session_id: ctx.id.clone(),
                    frames: summary.frames,
                    results: summary.results,
                    skipped: summary.skipped,
                    errors: summary.errors,
                    deadline_missed: summary.deadline_missed,
                    stages: convert::percentiles(&stages),
                    caution: CAUTION.into(),
                })),
            };
            finish(outbox, Ok(message));
        }
        Err(status) => finish(outbox, Err(status)),
    }
}

/// Sends the session's last message. When the client is not reading and its stream is full, the message
/// waits for it in a small task of its own, so that the session (its slot, its frames) ends now; the task
/// ends when the client reads or leaves.
fn finish(outbox: Outbox, last: Result<pb::SessionOutput, Status>) {
    if let Err(mpsc::error::TrySendError::Full(last)) = outbox.try_send(last) {
        tokio::spawn(async move {
            let _ = outbox.send(last).await;
        });
    }
}

fn count_frame(tally: &Mutex<Tally>, stats: &ServerStats) {
    bump(&stats.frames);
    if let Ok(mut t) = tally.lock() {
        t.frames += 1;
    }
}

async fn every_frame(
    mut processor: Processor,
    mut inbound: tonic::Streaming<pb::SessionInput>,
    outbox: &Outbox,
) -> Result<(), Status> {
    loop {
        let Some(arrived) = next_frame(&mut inbound, &processor.ctx).await? else {
            return Ok(());
        };
        count_frame(&processor.tally, &processor.ctx.stats);
        let out = processor.process(arrived).await;
        match deliver(outbox, &processor.ctx, out).await {
            Ok(()) => {}
            // The client went away: a normal end.
            Err(Undelivered::Gone) => return Ok(()),
            Err(Undelivered::Stuck(status)) => return Err(status),
        }
    }
}

/// The single waiting slot of a latest-only session.
struct Slot {
    waiting: Option<Arrived>,
    closed: Option<Result<(), Status>>,
}

async fn latest_only(
    mut processor: Processor,
    mut inbound: tonic::Streaming<pb::SessionInput>,
    outbox: &Outbox,
) -> Result<(), Status> {
    let slot = Arc::new(Mutex::new(Slot {
        waiting: None,
        closed: None,
    }));
    let wake = Arc::new(Notify::new());
    let reader = {
        let (slot, wake, outbox) = (slot.clone(), wake.clone(), outbox.clone());
        let ctx = processor.ctx.clone();
        let identity = processor.identity.clone();
        let tally = processor.tally.clone();
        let started = processor.started;
        tokio::spawn(async move {
            let end = loop {
                match next_frame(&mut inbound, &ctx).await {
                    Ok(Some(arrived)) => {
                        count_frame(&tally, &ctx.stats);
                        let by = arrived.frame.seq;
                        let overtaken = slot
                            .lock()
                            .ok()
                            .and_then(|mut s| s.waiting.replace(arrived));
                        wake.notify_one();
                        if let Some(old) = overtaken {
                            bump(&ctx.stats.skipped);
                            if let Ok(mut t) = tally.lock() {
                                t.skipped += 1;
                            }
                            let t_us = if old.frame.capture_time_us != 0 {
                                old.frame.capture_time_us
                            } else {
                                old.arrival.duration_since(started).as_micros() as i64
                            };
                            let skipped =
                                pb::answer::Outcome::Skipped(pb::Skipped { overtaken_by: by });
                            let out = answer(old.frame.seq, t_us, &identity, skipped);
                            match deliver(&outbox, &ctx, out).await {
                                Ok(()) => {}
                                Err(Undelivered::Gone) => break Ok(()),
                                Err(Undelivered::Stuck(status)) => break Err(status),
                            }
                        }
                    }
                    Ok(None) => break Ok(()),
                    Err(status) => break Err(status),
                }
            };
            if let Ok(mut s) = slot.lock() {
                s.closed = Some(end);
            }
            wake.notify_one();
        })
    };
    let result = loop {
        let next = {
            match slot.lock() {
                Ok(mut s) => match s.waiting.take() {
                    Some(a) => Ok(Some(a)),
                    None => match s.closed.take() {
                        Some(end) => Err(end),
                        None => Ok(None),
                    },
                },
                Err(_) => Err(Err(Status::internal("session state poisoned"))),
            }
        };
        match next {
            Ok(Some(arrived)) => {
                let out = processor.process(arrived).await;
                match deliver(outbox, &processor.ctx, out).await {
                    Ok(()) => {}
                    Err(Undelivered::Gone) => break Ok(()),
                    Err(Undelivered::Stuck(status)) => break Err(status),
                }
            }
            Ok(None) => wake.notified().await,
            Err(end) => break end,
        }
    };
    reader.abort();
    result
}
