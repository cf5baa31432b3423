//! Faults, load and shutdown against real server processes: disconnects, slow readers, idle sessions,
//! floods, kill and restart during replay, SIGTERM with live sessions, and a bounded soak.
//!
//! Every test starts `target/release/framewise-server` (built by `tests/run-all` before the tests) on free
//! loopback ports and stops it itself, also when an assertion fails: a guard kills and reaps every child
//! process when it drops. The oracle is the service's own contract, not a speed target: every frame is
//! answered exactly once (a result, a skipped notice or a per-frame error); a session ends with its
//! SessionSummary or a clear gRPC status; the server's resident memory stays bounded; the process exits
//! with code 0 after SIGTERM. Latency bounds are generous no-starvation checks (500 ms at 30 frames per
//! second); the measured figures are printed (`--nocapture`) and recorded in RELIABILITY.md.
//!
//! Run: `cargo build --release --workspace --bins`, then
//! `cargo test --release -p framewise-tests --test faults -- --nocapture --test-threads 1`.
//! `FRAMEWISE_SOAK_SECONDS` sets the soak's length per frame policy (default 60).
//!
//! Frames are invented phantom renders (framewise-models-demo), never patient data.

use std::collections::{BTreeMap, HashMap};
use std::fs::File;
use std::future::Future;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use framewise_models_demo::phantom::{Drum, random_view};
use framewise_proto::v1 as pb;
use framewise_tests::{Rng, binary, free_port, synth_sweep, workspace_root};
use pb::frame_analysis_client::FrameAnalysisClient;
use tokio::sync::mpsc;
use tokio::task::JoinHandle;
use tokio_stream::wrappers::ReceiverStream;
use tonic::transport::{Channel, Endpoint};
use tonic_health::pb::HealthCheckRequest;
use tonic_health::pb::health_check_response::ServingStatus;
use tonic_health::pb::health_client::HealthClient;

/// The no-starvation bound on a victim's round-trip p99 while a fault runs: 15 frame intervals at 30 fps.
/// Not a speed target (speed belongs in benchmarks); a starved session would blow far past it.
const VICTIM_P99_BOUND_MS: f64 = 500.0;
/// The bound on the server's resident memory growth while a fault runs.
const FAULT_RSS_GROWTH_BOUND_MIB: f64 = 100.0;
/// Frames per second of victims and soak sessions: live endoscopy video.
const FPS: f64 = 30.0;

// ---------------------------------------------------------------------------------------------------------
// Processes

/// A scratch folder under target/ for one test's logs and files.
fn scratch(name: &str) -> PathBuf {
    let dir = workspace_root()
        .join("target/test-scratch")
        .join(format!("faults-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).expect("scratch dir");
    dir
}

fn loopback(port: u16) -> SocketAddr {
    SocketAddr::from(([127, 0, 0, 1], port))
}

/// A child process that is killed (SIGKILL) and reaped when the guard drops, so that a failing test
/// leaves nothing running.
struct ChildGuard {
    child: Child,
}

impl ChildGuard {
    fn spawn(command: &mut Command) -> Self {
        let child = command
            .stdin(Stdio::null())
            .spawn()
            .unwrap_or_else(|e| panic!("starting {command:?}: {e}"));
        Self { child }
    }

    fn pid(&self) -> u32 {
        self.child.id()
    }

    /// The exit status, if the process has ended.
    fn exited(&mut self) -> Option<ExitStatus> {
        self.child.try_wait().ok().flatten()
    }

    /// Waits up to `limit` for the process to end.
    async fn wait_exit(&mut self, limit: Duration) -> Option<ExitStatus> {
        let end = Instant::now() + limit;
        loop {
            if let Some(status) = self.exited() {
                return Some(status);
            }
            if Instant::now() >= end {
                return None;
            }
            tokio::time::sleep(Duration::from_millis(5)).await;
        }
    }

    /// SIGKILL, then reap.
    fn kill(&mut self) {
        if self.exited().is_none() {
            let _ = self.child.kill();
        }
        let _ = self.child.wait();
    }

    /// Sends a signal by name (`TERM`, `KILL`) with the system's `kill`.
    fn signal(&self, name: &str) {
        let status = Command::new("kill")
            .arg(format!("-{name}"))
            .arg(self.pid().to_string())
            .status()
            .expect("kill runs");
        assert!(status.success(), "kill -{name} {} failed", self.pid());
    }
}

impl Drop for ChildGuard {
    fn drop(&mut self) {
        self.kill();
    }
}

/// A `framewise-server` process on loopback ports, SERVING.
struct ServerProcess {
    process: ChildGuard,
    addr: SocketAddr,
    metrics: SocketAddr,
    url: String,
    log: PathBuf,
}

impl ServerProcess {
    /// Starts a server on free loopback ports with extra flags. A port taken between the probe and the
    /// start fails the start; then it tries again on other ports.
    async fn start(dir: &Path, extra: &[&str]) -> Self {
        let mut failures = Vec::new();
        for attempt in 0..3 {
            match Self::start_on(dir, loopback(free_port()), extra, attempt).await {
                Ok(server) => return server,
                Err(e) => failures.push(e),
            }
        }
        panic!("the server did not start: {failures:#?}");
    }

    /// Starts a server on `addr` (and a free metrics port) and waits until its health says SERVING.
    async fn start_on(
        dir: &Path,
        addr: SocketAddr,
        extra: &[&str],
        attempt: u32,
    ) -> Result<Self, String> {
        let metrics = loopback(free_port());
        let log = dir.join(format!("server-{}-{attempt}.log", addr.port()));
        let file = File::create(&log).map_err(|e| format!("{}: {e}", log.display()))?;
        let mut process = ChildGuard::spawn(
            Command::new(binary("framewise-server"))
                .arg("--listen")
                .arg(addr.to_string())
                .arg("--metrics-listen")
                .arg(metrics.to_string())
                .args(extra)
                .env("RUST_LOG", "info")
                .env("NO_COLOR", "1")
                .stdout(Stdio::null())
                .stderr(file),
        );
        let url = format!("http://{addr}");
        let deadline = Instant::now() + Duration::from_secs(60);
        loop {
            if let Some(status) = process.exited() {
                return Err(format!(
                    "exited with {status} on {addr}: {}",
                    log_tail(&log)
                ));
            }
            if let Some(mut health) = health_client(&url).await
                && health_status(&mut health).await.ok() == Some(ServingStatus::Serving as i32)
            {
                break;
            }
            if Instant::now() > deadline {
                return Err(format!("not SERVING within 60 s: {}", log_tail(&log)));
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        Ok(Self {
            process,
            addr,
            metrics,
            url,
            log,
        })
    }

    fn pid(&self) -> u32 {
        self.process.pid()
    }

    /// The server's resident memory now.
    fn rss_mib(&self) -> f64 {
        rss_mib(self.pid())
    }

    /// The unlabelled metrics of the Prometheus text endpoint.
    async fn metrics(&self) -> HashMap<String, f64> {
        metrics(self.metrics).await
    }

    /// Waits up to `limit` for the open-session gauge to read `expected`; returns the last reading.
    async fn wait_sessions_open(&self, expected: f64, limit: Duration) -> f64 {
        let end = Instant::now() + limit;
        loop {
            let open = self
                .metrics()
                .await
                .get("framewise_sessions_open")
                .copied()
                .unwrap_or(f64::NAN);
            if open == expected || Instant::now() >= end {
                return open;
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }
}

fn log_tail(path: &Path) -> String {
    let text = std::fs::read_to_string(path).unwrap_or_default();
    let lines: Vec<&str> = text.lines().collect();
    lines[lines.len().saturating_sub(20)..].join("\n")
}

/// Resident memory of a process in MiB: the `VmRSS` line of /proc/<pid>/status (kB).
fn rss_mib(pid: u32) -> f64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap_or_default();
    status
        .lines()
        .find_map(|l| l.strip_prefix("VmRSS:"))
        .and_then(|v| v.split_whitespace().next())
        .and_then(|kb| kb.parse::<f64>().ok())
        .map_or(f64::NAN, |kb| kb / 1024.0)
}

/// Reads the Prometheus text endpoint once; unlabelled samples by name.
async fn metrics(addr: SocketAddr) -> HashMap<String, f64> {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    let mut out = HashMap::new();
    let Ok(mut socket) = tokio::net::TcpStream::connect(addr).await else {
        return out;
    };
    let mut text = String::new();
    if socket
        .write_all(b"GET /metrics HTTP/1.1\r\nHost: localhost\r\n\r\n")
        .await
        .is_err()
        || socket.read_to_string(&mut text).await.is_err()
    {
        return out;
    }
    for line in text.lines().filter(|l| l.starts_with("framewise_")) {
        let mut parts = line.split_whitespace();
        if let (Some(name), Some(value)) = (parts.next(), parts.next())
            && !name.contains('{')
            && let Ok(v) = value.parse::<f64>()
        {
            out.insert(name.to_string(), v);
        }
    }
    out
}

/// Samples a process's resident memory at a fixed period until stopped.
struct RssSampler {
    samples: Arc<Mutex<Vec<(Instant, f64)>>>,
    stop: Arc<AtomicBool>,
    task: JoinHandle<()>,
}

impl RssSampler {
    fn start(pid: u32, every: Duration) -> Self {
        let samples = Arc::new(Mutex::new(Vec::new()));
        let stop = Arc::new(AtomicBool::new(false));
        let task = {
            let (samples, stop) = (samples.clone(), stop.clone());
            tokio::spawn(async move {
                let mut tick = tokio::time::interval(every);
                while !stop.load(Ordering::Relaxed) {
                    tick.tick().await;
                    let rss = rss_mib(pid);
                    if let Ok(mut s) = samples.lock() {
                        s.push((Instant::now(), rss));
                    }
                }
            })
        };
        Self {
            samples,
            stop,
            task,
        }
    }

    /// The samples taken in `[from, to)`.
    fn between(&self, from: Instant, to: Instant) -> Vec<f64> {
        self.samples
            .lock()
            .map(|s| {
                s.iter()
                    .filter(|(t, _)| *t >= from && *t < to)
                    .map(|(_, v)| *v)
                    .collect()
            })
            .unwrap_or_default()
    }

    async fn finish(self) -> Vec<(Instant, f64)> {
        self.stop.store(true, Ordering::Relaxed);
        let _ = self.task.await;
        self.samples.lock().map(|s| s.clone()).unwrap_or_default()
    }
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len().max(1) as f64
}

fn max(v: &[f64]) -> f64 {
    v.iter().copied().fold(f64::NAN, f64::max)
}

// ---------------------------------------------------------------------------------------------------------
// Clients

async fn health_client(url: &str) -> Option<HealthClient<Channel>> {
    let endpoint = Endpoint::from_shared(url.to_string())
        .ok()?
        .connect_timeout(Duration::from_secs(1));
    endpoint.connect().await.ok().map(HealthClient::new)
}

/// The server-wide health status ("" service).
async fn health_status(health: &mut HealthClient<Channel>) -> Result<i32, tonic::Status> {
    let request = HealthCheckRequest {
        service: String::new(),
    };
    Ok(health.check(request).await?.into_inner().status)
}

async fn connect_to(endpoint: Endpoint) -> FrameAnalysisClient<Channel> {
    let channel = endpoint.connect().await.expect("connects to the server");
    FrameAnalysisClient::new(channel)
        .max_decoding_message_size(64 << 20)
        .max_encoding_message_size(64 << 20)
}

async fn connect(url: &str) -> FrameAnalysisClient<Channel> {
    connect_to(Endpoint::from_shared(url.to_string()).expect("server URL")).await
}

fn opening(policy: pb::FramePolicy, label: &str) -> pb::SessionOpening {
    pb::SessionOpening {
        policy: policy as i32,
        source_label: label.into(),
        ..Default::default()
    }
}

fn frame_input(frame: pb::Frame) -> pb::SessionInput {
    pb::SessionInput {
        item: Some(pb::session_input::Item::Frame(frame)),
    }
}

/// Frame `seq` of a stream at `FPS`, made from a template (the pixels are shared, not copied).
fn numbered(template: &pb::Frame, seq: u64) -> pb::Frame {
    pb::Frame {
        seq,
        capture_time_us: 1_000_000 + (seq as f64 * 1e6 / FPS).round() as i64,
        ..template.clone()
    }
}

/// Packed RGB renders of random phantom views (invented demo data, no patient data).
fn phantom_frames(width: u32, height: u32, count: usize, seed: u64) -> Arc<Vec<pb::Frame>> {
    let mut rng = Rng::new(seed);
    let drum = Drum::random(8, &mut rng);
    let frames = (0..count)
        .map(|_| {
            let view = random_view(&drum, &mut rng);
            pb::Frame {
                file_slice: None,
                seq: 0,
                capture_time_us: 0,
                format: pb::PixelFormat::Rgb8 as i32,
                width,
                height,
                stride: 0,
                data: drum.render(&view, width, height).into(),
            }
        })
        .collect();
    Arc::new(frames)
}

/// An open session: frames go into `tx` (drop it to half-close), answers come from `answers`.
struct OpenSession {
    tx: mpsc::Sender<pb::SessionInput>,
    answers: tonic::Streaming<pb::SessionOutput>,
}

/// Opens a session and reads its SessionAccepted. `buffer` frames wait in the client before `send` blocks.
async fn open(
    client: &mut FrameAnalysisClient<Channel>,
    opening: pb::SessionOpening,
    buffer: usize,
) -> Result<OpenSession, tonic::Status> {
    let (tx, rx) = mpsc::channel(buffer);
    let first = pb::SessionInput {
        item: Some(pb::session_input::Item::Opening(opening)),
    };
    tx.send(first)
        .await
        .map_err(|_| tonic::Status::internal("queueing the opening"))?;
    let mut answers = client
        .run_session(ReceiverStream::new(rx))
        .await?
        .into_inner();
    match answers.message().await?.and_then(|m| m.item) {
        Some(pb::session_output::Item::Accepted(_)) => Ok(OpenSession { tx, answers }),
        other => panic!("the first message is not SessionAccepted: {other:?}"),
    }
}

/// Every answer a session got: the oracle that each frame was answered exactly once.
#[derive(Debug, Default)]
struct Ledger {
    /// Answers per sequence number.
    counts: BTreeMap<u64, u32>,
    /// Sequence numbers in the order the answers arrived.
    order: Vec<u64>,
    results: u64,
    skipped: u64,
    errors: u64,
    first_error: Option<String>,
    /// Skipped notices whose overtaking frame is not newer.
    bad_overtakes: u64,
}

impl Ledger {
    fn record(&mut self, a: &pb::Answer) {
        *self.counts.entry(a.seq).or_default() += 1;
        self.order.push(a.seq);
        match &a.outcome {
            Some(pb::answer::Outcome::Result(_)) => self.results += 1,
            Some(pb::answer::Outcome::Skipped(s)) => {
                self.skipped += 1;
                if s.overtaken_by <= a.seq {
                    self.bad_overtakes += 1;
                }
            }
            Some(pb::answer::Outcome::Error(e)) => {
                self.errors += 1;
                self.first_error
                    .get_or_insert_with(|| format!("{}: {}", e.kind, e.message));
            }
            None => {
                self.errors += 1;
                self.first_error
                    .get_or_insert_with(|| format!("frame {} has no outcome", a.seq));
            }
        }
    }

    fn answered(&self) -> u64 {
        self.order.len() as u64
    }

    /// Frames 0..n were each answered exactly once, and nothing else was answered.
    fn check_exactly_once(&self, n: u64) -> Result<(), String> {
        if let Some((seq, times)) = self.counts.iter().find(|(_, c)| **c != 1) {
            return Err(format!("frame {seq} answered {times} times"));
        }
        let answered: Vec<u64> = self.counts.keys().copied().collect();
        if answered != (0..n).collect::<Vec<_>>() {
            let missing: Vec<u64> = (0..n).filter(|s| !self.counts.contains_key(s)).collect();
            let extra: Vec<u64> = answered.iter().copied().filter(|s| *s >= n).collect();
            return Err(format!(
                "{n} frames sent, {} answered; missing {:?}, never sent {:?}",
                answered.len(),
                &missing[..missing.len().min(10)],
                &extra[..extra.len().min(10)]
            ));
        }
        if self.bad_overtakes > 0 {
            return Err(format!(
                "{} skipped notices name an overtaking frame that is not newer",
                self.bad_overtakes
            ));
        }
        Ok(())
    }

    /// In order, as the every-frame policy promises.
    fn in_order(&self) -> bool {
        self.order.windows(2).all(|w| w[0] < w[1])
    }
}

/// What to stream in one paced session.
#[derive(Clone)]
struct Load {
    url: String,
    label: String,
    policy: pb::FramePolicy,
    frames: Arc<Vec<pb::Frame>>,
    /// Frame `i` is due at `start + i / FPS` (open loop: frames go on schedule whatever the answers do).
    start: Instant,
    /// Frames at most.
    limit: u64,
    /// Set to stop sending and half-close.
    stop: Arc<AtomicBool>,
}

/// How a paced session went.
#[derive(Debug)]
struct Paced {
    label: String,
    /// Frames handed to the transport.
    sent: u64,
    ledger: Ledger,
    /// Per result: when its frame was due, and the round trip from then to its answer.
    round_trips: Vec<(Instant, Duration)>,
    summary: Option<pb::SessionSummary>,
    status: Option<tonic::Status>,
    ended_at: Instant,
}

impl Paced {
    /// The session ended with its summary, every frame sent was answered exactly once, with no error,
    /// and the summary agrees.
    fn check_complete(&self) -> Result<(), String> {
        let who = &self.label;
        if let Some(status) = &self.status {
            return Err(format!(
                "{who}: ended with {:?}: {}",
                status.code(),
                status.message()
            ));
        }
        let Some(summary) = &self.summary else {
            return Err(format!("{who}: no SessionSummary"));
        };
        self.ledger
            .check_exactly_once(self.sent)
            .map_err(|e| format!("{who}: {e}"))?;
        if self.ledger.errors > 0 {
            return Err(format!(
                "{who}: {} error answers, first: {:?}",
                self.ledger.errors, self.ledger.first_error
            ));
        }
        if summary.frames != self.sent
            || summary.results != self.ledger.results
            || summary.skipped != self.ledger.skipped
            || summary.errors != 0
        {
            return Err(format!(
                "{who}: summary {}/{}/{}/{} (frames/results/skipped/errors) against {} sent, {} results, {} skipped",
                summary.frames,
                summary.results,
                summary.skipped,
                summary.errors,
                self.sent,
                self.ledger.results,
                self.ledger.skipped
            ));
        }
        Ok(())
    }

    fn round_trips_between(&self, from: Instant, to: Instant) -> Vec<Duration> {
        self.round_trips
            .iter()
            .filter(|(due, _)| *due >= from && *due < to)
            .map(|(_, rt)| *rt)
            .collect()
    }
}

fn frame_interval() -> Duration {
    Duration::from_secs_f64(1.0 / FPS)
}

/// A session that sends frames on schedule until `stop` is set or `limit` frames went, then half-closes and
/// reads to the end of the stream.
async fn paced_session(load: Load) -> Paced {
    let mut client = connect(&load.url).await;
    let session = open(&mut client, opening(load.policy, &load.label), 4)
        .await
        .unwrap_or_else(|s| panic!("{}: the session did not open: {s}", load.label));
    let interval = frame_interval();
    let sent = Arc::new(AtomicU64::new(0));
    let sender = {
        let (load, sent, tx) = (load.clone(), sent.clone(), session.tx);
        tokio::spawn(async move {
            for seq in 0..load.limit {
                let due = load.start + interval.mul_f64(seq as f64);
                tokio::time::sleep_until(due.into()).await;
                if load.stop.load(Ordering::Relaxed) {
                    break;
                }
                let template = &load.frames[seq as usize % load.frames.len()];
                if tx.send(frame_input(numbered(template, seq))).await.is_err() {
                    break;
                }
                sent.fetch_add(1, Ordering::Relaxed);
            }
            // Dropping `tx` half-closes the stream; the server then sends its summary.
        })
    };
    let mut answers = session.answers;
    let mut ledger = Ledger::default();
    let mut round_trips = Vec::new();
    let (mut summary, mut status) = (None, None);
    loop {
        match answers.message().await {
            Ok(Some(message)) => match message.item {
                Some(pb::session_output::Item::Answer(a)) => {
                    if matches!(a.outcome, Some(pb::answer::Outcome::Result(_))) {
                        let due = load.start + interval.mul_f64(a.seq as f64);
                        round_trips.push((due, due.elapsed()));
                    }
                    ledger.record(&a);
                }
                Some(pb::session_output::Item::Summary(s)) => summary = Some(s),
                other => panic!("{}: unexpected message {other:?}", load.label),
            },
            Ok(None) => break,
            Err(s) => {
                status = Some(s);
                break;
            }
        }
    }
    let ended_at = Instant::now();
    sender.abort();
    let _ = sender.await;
    Paced {
        label: load.label,
        sent: sent.load(Ordering::Relaxed),
        ledger,
        round_trips,
        summary,
        status,
        ended_at,
    }
}

/// Nearest-rank percentile (the smallest sample with at least p % of the samples at or below it), in ms.
fn percentile_ms(samples: &[Duration], p: f64) -> f64 {
    if samples.is_empty() {
        return f64::NAN;
    }
    let mut sorted = samples.to_vec();
    sorted.sort();
    let rank = ((p / 100.0) * sorted.len() as f64).ceil().max(1.0) as usize;
    sorted[rank.min(sorted.len()) - 1].as_secs_f64() * 1000.0
}

// ---------------------------------------------------------------------------------------------------------
// Faults with victims

/// Figures of one fault run.
struct FaultFigures {
    p99_before_ms: f64,
    p99_during_ms: f64,
    rss_before: f64,
    rss_during_max: f64,
    rss_after: f64,
}

/// Runs `fault` while two victim sessions stream 640x480 RGB at 30 fps (every frame), and checks the
/// victims: every frame answered exactly once with a result, a summary, a round-trip p99 during the fault
/// under the no-starvation bound; and the server's memory: growth during the fault under the bound.
/// `fault` returns a line describing what it did.
async fn under_fault(
    name: &str,
    server: &ServerProcess,
    fault: impl Future<Output = String>,
) -> FaultFigures {
    let sampler = RssSampler::start(server.pid(), Duration::from_millis(100));
    let frames = phantom_frames(640, 480, 8, 21);
    let stop = Arc::new(AtomicBool::new(false));
    let start = Instant::now() + Duration::from_millis(200);
    let victims: Vec<JoinHandle<Paced>> = (0..2)
        .map(|v| {
            tokio::spawn(paced_session(Load {
                url: server.url.clone(),
                label: format!("victim {v}"),
                policy: pb::FramePolicy::EveryFrame,
                frames: frames.clone(),
                start,
                limit: u64::MAX,
                stop: stop.clone(),
            }))
        })
        .collect();
    // One second of warm-up, three seconds before the fault, the fault, two seconds after it.
    tokio::time::sleep_until((start + Duration::from_secs(1)).into()).await;
    let before_from = Instant::now();
    tokio::time::sleep(Duration::from_secs(3)).await;
    let fault_from = Instant::now();
    let what = fault.await;
    let fault_to = Instant::now();
    tokio::time::sleep(Duration::from_secs(2)).await;
    let after_to = Instant::now();
    stop.store(true, Ordering::Relaxed);
    let mut done = Vec::new();
    for v in victims {
        let paced = tokio::time::timeout(Duration::from_secs(30), v)
            .await
            .expect("the victims end within 30 s of half-closing")
            .expect("victim task");
        done.push(paced);
    }
    let rss_before = mean(&sampler.between(before_from, fault_from));
    let rss_during_max = max(&sampler.between(fault_from, fault_to));
    let rss_after = mean(&sampler.between(fault_to + Duration::from_secs(1), after_to));
    sampler.finish().await;
    let collect = |from, to| -> Vec<Duration> {
        done.iter()
            .flat_map(|p| p.round_trips_between(from, to))
            .collect()
    };
    let (before, during) = (
        collect(before_from, fault_from),
        collect(fault_from, fault_to),
    );
    let figures = FaultFigures {
        p99_before_ms: percentile_ms(&before, 99.0),
        p99_during_ms: percentile_ms(&during, 99.0),
        rss_before,
        rss_during_max,
        rss_after,
    };
    let frames_sent: u64 = done.iter().map(|p| p.sent).sum();
    eprintln!(
        "faults: {name}: {what}\nfaults: {name}: victims 2 x 640x480 RGB at 30 fps, {frames_sent} frames; round trip p50/p99 before {:.1}/{:.1} ms (n {}), during {:.1}/{:.1} ms (n {}), fault {:.1} s\nfaults: {name}: server RSS before {:.1} MiB, during max {:.1} MiB, after {:.1} MiB",
        percentile_ms(&before, 50.0),
        figures.p99_before_ms,
        before.len(),
        percentile_ms(&during, 50.0),
        figures.p99_during_ms,
        during.len(),
        (fault_to - fault_from).as_secs_f64(),
        figures.rss_before,
        figures.rss_during_max,
        figures.rss_after,
    );
    for p in &done {
        if let Err(e) = p.check_complete() {
            panic!("{name}: {e}");
        }
        assert!(
            p.ledger.in_order(),
            "{name}: {}: answers out of order",
            p.label
        );
        assert_eq!(
            p.ledger.results, p.sent,
            "{name}: {}: every frame has a result",
            p.label
        );
    }
    assert!(
        !during.is_empty(),
        "{name}: the victims got answers during the fault"
    );
    assert!(
        figures.p99_during_ms < VICTIM_P99_BOUND_MS,
        "{name}: a victim's round-trip p99 during the fault is {:.1} ms (bound {VICTIM_P99_BOUND_MS} ms): starved",
        figures.p99_during_ms
    );
    assert!(
        figures.rss_during_max - figures.rss_before < FAULT_RSS_GROWTH_BOUND_MIB,
        "{name}: server RSS grew from {:.1} to {:.1} MiB during the fault (bound +{FAULT_RSS_GROWTH_BOUND_MIB} MiB)",
        figures.rss_before,
        figures.rss_during_max
    );
    let open = server.wait_sessions_open(0.0, Duration::from_secs(5)).await;
    assert_eq!(
        open, 0.0,
        "{name}: sessions still open after every client left"
    );
    figures
}

/// Clients that vanish mid-stream: in-process ones cancel their stream after a few frames (RST_STREAM),
/// client processes are killed with SIGKILL while sending (the kernel closes the connection, often in the
/// middle of a frame).
async fn disconnecting_clients(server: &ServerProcess, dir: &Path) -> String {
    let frames = phantom_frames(640, 480, 4, 31);
    let mut rng = Rng::new(5);
    let before = server.metrics().await;
    let (mut cancelled, mut killed) = (0, 0);
    for i in 0..12u64 {
        if i % 2 == 0 {
            let mut client = connect(&server.url).await;
            let session = open(
                &mut client,
                opening(pb::FramePolicy::EveryFrame, "vanishes"),
                2,
            )
            .await
            .expect("opens");
            let n = 5 + rng.below(40);
            let (tx, mut answers) = (session.tx, session.answers);
            let sender = {
                let frames = frames.clone();
                tokio::spawn(async move {
                    for seq in 0.. {
                        let template = &frames[seq as usize % frames.len()];
                        if tx.send(frame_input(numbered(template, seq))).await.is_err() {
                            break;
                        }
                    }
                })
            };
            // Read some answers, then drop the stream while frames are still going.
            for _ in 0..n {
                if !matches!(answers.message().await, Ok(Some(_))) {
                    break;
                }
            }
            drop(answers);
            sender.abort();
            drop(client);
            cancelled += 1;
        } else {
            let log = File::create(dir.join(format!("vanishing-client-{i}.log"))).expect("log");
            let mut process = ChildGuard::spawn(
                Command::new(binary("framewise"))
                    .args(["bench", "--server", &server.url])
                    .args(["--sessions", "1", "--fps", "60", "--seconds", "30"])
                    .args(["--width", "640", "--height", "480"])
                    .stdout(Stdio::null())
                    .stderr(log),
            );
            // Killed a random moment after its session opened, while frames are going.
            let total = |m: &HashMap<String, f64>| m.get("framewise_sessions_total").copied();
            let opened_before = total(&server.metrics().await);
            let waited = Instant::now();
            while total(&server.metrics().await) == opened_before
                && waited.elapsed() < Duration::from_secs(10)
            {
                tokio::time::sleep(Duration::from_millis(10)).await;
            }
            tokio::time::sleep(Duration::from_millis(100 + rng.below(500))).await;
            process.kill();
            killed += 1;
        }
    }
    let after = server.metrics().await;
    let opened = after
        .get("framewise_sessions_total")
        .copied()
        .unwrap_or(0.0)
        - before
            .get("framewise_sessions_total")
            .copied()
            .unwrap_or(0.0);
    // Only the victims remain.
    let open = server.wait_sessions_open(2.0, Duration::from_secs(5)).await;
    assert_eq!(
        open, 2.0,
        "the vanished clients' sessions were not all ended"
    );
    format!(
        "{cancelled} clients cancelled their stream mid-way, {killed} client processes were SIGKILLed while sending; {opened} sessions opened, all ended (open sessions back to the 2 victims)"
    )
}

/// Clients that keep sending but stop reading answers. Their receive window is 16 KiB, so once about
/// forty answers wait unread the server's writes stop; each session then stops reading frames, and HTTP/2
/// flow control blocks the clients' sends. Afterwards they read again and every frame is answered.
async fn slow_readers(server: &ServerProcess) -> String {
    const READERS: usize = 4;
    const FRAMES: u64 = 300;
    let frames = phantom_frames(640, 480, 4, 41);
    let endpoint = Endpoint::from_shared(server.url.clone())
        .expect("url")
        .initial_stream_window_size(16 * 1024);
    let mut readers = Vec::new();
    for _ in 0..READERS {
        let mut client = connect_to(endpoint.clone()).await;
        let session = open(
            &mut client,
            opening(pb::FramePolicy::EveryFrame, "slow reader"),
            1,
        )
        .await
        .expect("opens");
        let sent = Arc::new(AtomicU64::new(0));
        let sender = {
            let (frames, sent, tx) = (frames.clone(), sent.clone(), session.tx);
            tokio::spawn(async move {
                for seq in 0..FRAMES {
                    let template = &frames[seq as usize % frames.len()];
                    if tx.send(frame_input(numbered(template, seq))).await.is_err() {
                        break;
                    }
                    sent.fetch_add(1, Ordering::Relaxed);
                }
            })
        };
        readers.push((client, session.answers, sent, sender));
    }
    tokio::time::sleep(Duration::from_secs(3)).await;
    let at_3s: Vec<u64> = readers
        .iter()
        .map(|r| r.2.load(Ordering::Relaxed))
        .collect();
    tokio::time::sleep(Duration::from_secs(1)).await;
    let at_4s: Vec<u64> = readers
        .iter()
        .map(|r| r.2.load(Ordering::Relaxed))
        .collect();
    let rss_blocked = server.rss_mib();
    for (a, b) in at_3s.iter().zip(&at_4s) {
        assert!(
            a == b && *b < FRAMES,
            "a slow reader's sends did not block: {a} then {b} of {FRAMES} frames sent"
        );
    }
    // Reading again: every frame sent is answered, once, in order, and the summary follows.
    let mut answered = Vec::new();
    for (client, mut answers, sent, sender) in readers {
        let mut ledger = Ledger::default();
        let mut summary = None;
        let read = tokio::time::timeout(Duration::from_secs(60), async {
            while let Some(m) = answers.message().await.expect("answers") {
                match m.item {
                    Some(pb::session_output::Item::Answer(a)) => ledger.record(&a),
                    Some(pb::session_output::Item::Summary(s)) => summary = Some(s),
                    other => panic!("unexpected {other:?}"),
                }
            }
        })
        .await;
        assert!(
            read.is_ok(),
            "a slow reader's session did not end after it read again"
        );
        sender.await.expect("sender");
        drop(client);
        let sent = sent.load(Ordering::Relaxed);
        assert_eq!(sent, FRAMES);
        ledger
            .check_exactly_once(FRAMES)
            .expect("slow reader answers");
        assert!(ledger.in_order() && ledger.errors == 0);
        assert_eq!(
            summary.map(|s| s.frames),
            Some(FRAMES),
            "slow reader summary"
        );
        answered.push(ledger.answered());
    }
    format!(
        "{READERS} clients stopped reading (16 KiB receive window) and sent {FRAMES} frames each as fast as they could: sends blocked at {at_4s:?} frames (unchanged over 1 s); server RSS while blocked {rss_blocked:.1} MiB; reading again, {answered:?} answers, each frame exactly once"
    )
}

/// Sessions that send nothing: some send their opening and then nothing, some not even the opening.
/// The idle timeout ends both with DEADLINE_EXCEEDED.
async fn idle_sessions(server: &ServerProcess, idle_s: f64) -> String {
    let mut tasks = Vec::new();
    for i in 0..12 {
        let url = server.url.clone();
        tasks.push(tokio::spawn(async move {
            let mut client = connect(&url).await;
            let t0 = Instant::now();
            if i < 8 {
                let session = open(&mut client, opening(pb::FramePolicy::EveryFrame, "idle"), 1)
                    .await
                    .expect("opens");
                let mut answers = session.answers;
                let status = answers
                    .message()
                    .await
                    .expect_err("ended by the idle timeout");
                drop(session.tx);
                (true, t0.elapsed(), status)
            } else {
                // A stream with no opening: kept open (the sender is held) but silent.
                let (tx, rx) = mpsc::channel::<pb::SessionInput>(1);
                let status = client
                    .run_session(ReceiverStream::new(rx))
                    .await
                    .expect_err("refused after the idle timeout");
                drop(tx);
                (false, t0.elapsed(), status)
            }
        }));
    }
    let (mut opened, mut silent) = (Vec::new(), Vec::new());
    for t in tasks {
        let (with_opening, elapsed, status) = t.await.expect("idle task");
        assert_eq!(status.code(), tonic::Code::Cancelled, "{status:?}");
        if with_opening {
            assert!(
                status.message().contains("idle timeout"),
                "{}",
                status.message()
            );
            opened.push(elapsed.as_secs_f64());
        } else {
            assert!(
                status.message().contains("no SessionOpening"),
                "{}",
                status.message()
            );
            silent.push(elapsed.as_secs_f64());
        }
        assert!(
            elapsed.as_secs_f64() >= idle_s * 0.9 && elapsed.as_secs_f64() < idle_s + 3.0,
            "an idle session ended after {elapsed:?} (idle timeout {idle_s} s)"
        );
    }
    let open = server.wait_sessions_open(2.0, Duration::from_secs(5)).await;
    assert_eq!(open, 2.0, "idle sessions still open");
    let range = |v: &[f64]| {
        let lo = v.iter().copied().fold(f64::INFINITY, f64::min);
        format!("{lo:.2}..{:.2} s", max(v))
    };
    format!(
        "{} sessions sent their opening and then nothing, {} streams sent nothing at all (idle timeout {idle_s} s): all ended with DEADLINE_EXCEEDED after {} and {}",
        opened.len(),
        silent.len(),
        range(&opened),
        range(&silent)
    )
}

/// A latest-only session that sends 640x480 frames as fast as it can for `seconds`: each frame is answered
/// once, as a result or as skipped.
async fn flood(server: &ServerProcess, seconds: f64) -> String {
    let frames = phantom_frames(640, 480, 4, 51);
    let mut client = connect(&server.url).await;
    let session = open(
        &mut client,
        opening(pb::FramePolicy::LatestOnly, "flood"),
        4,
    )
    .await
    .expect("opens");
    let sent = Arc::new(AtomicU64::new(0));
    let t0 = Instant::now();
    let sender = {
        let (frames, sent, tx) = (frames.clone(), sent.clone(), session.tx);
        tokio::spawn(async move {
            let end = Instant::now() + Duration::from_secs_f64(seconds);
            let mut seq = 0u64;
            while Instant::now() < end {
                let template = &frames[seq as usize % frames.len()];
                if tx.send(frame_input(numbered(template, seq))).await.is_err() {
                    break;
                }
                seq += 1;
                sent.fetch_add(1, Ordering::Relaxed);
            }
        })
    };
    let mut answers = session.answers;
    let mut ledger = Ledger::default();
    let mut summary = None;
    while let Some(m) = answers.message().await.expect("flood answers") {
        match m.item {
            Some(pb::session_output::Item::Answer(a)) => ledger.record(&a),
            Some(pb::session_output::Item::Summary(s)) => summary = Some(s),
            other => panic!("unexpected {other:?}"),
        }
    }
    let elapsed = t0.elapsed().as_secs_f64();
    sender.await.expect("flood sender");
    let sent = sent.load(Ordering::Relaxed);
    ledger.check_exactly_once(sent).expect("flood answers");
    assert_eq!(ledger.errors, 0, "{:?}", ledger.first_error);
    let summary = summary.expect("flood summary");
    assert_eq!(
        (summary.frames, summary.results, summary.skipped),
        (sent, ledger.results, ledger.skipped)
    );
    format!(
        "one latest-only session sent {sent} frames of 640x480 RGB in {elapsed:.1} s ({:.0} frames/s): {} results, {} skipped, 0 errors, each frame answered exactly once",
        sent as f64 / elapsed,
        ledger.results,
        ledger.skipped
    )
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn clients_that_vanish_mid_stream_have_their_sessions_ended_and_others_go_on() {
    let dir = scratch("disconnect");
    let server = ServerProcess::start(&dir, &[]).await;
    under_fault("disconnects", &server, disconnecting_clients(&server, &dir)).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn clients_that_stop_reading_are_held_by_flow_control_in_bounded_memory() {
    let dir = scratch("slow-reader");
    let server = ServerProcess::start(&dir, &[]).await;
    under_fault("slow readers", &server, slow_readers(&server)).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn silent_sessions_are_ended_by_the_idle_timeout_and_others_go_on() {
    let dir = scratch("idle");
    let server = ServerProcess::start(&dir, &["--idle-timeout-s", "2"]).await;
    under_fault("idle sessions", &server, idle_sessions(&server, 2.0)).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_latest_only_flood_is_answered_frame_by_frame_and_others_go_on() {
    let dir = scratch("flood");
    let server = ServerProcess::start(&dir, &[]).await;
    under_fault("latest-only flood", &server, flood(&server, 5.0)).await;
}

/// A client that stops reading for good (its answers, then its frames, held by flow control) must not
/// keep its session, its slot and its buffered frames forever: after the idle timeout without taking an
/// answer its session is ended, and when it reads again it finds the answers that were waiting, each once,
/// then DEADLINE_EXCEEDED naming the idle timeout.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_client_that_never_reads_again_is_ended_after_the_idle_timeout_and_frees_its_slot() {
    const IDLE_S: f64 = 2.0;
    let dir = scratch("stuck-reader");
    let server =
        ServerProcess::start(&dir, &["--idle-timeout-s", "2", "--max-sessions", "2"]).await;
    let rss_start = server.rss_mib();
    let frames = phantom_frames(640, 480, 4, 81);
    let endpoint = Endpoint::from_shared(server.url.clone())
        .expect("url")
        .initial_stream_window_size(16 * 1024);
    let mut stuck = Vec::new();
    for policy in [pb::FramePolicy::EveryFrame, pb::FramePolicy::LatestOnly] {
        let mut client = connect_to(endpoint.clone()).await;
        let session = open(&mut client, opening(policy, "never reads"), 1)
            .await
            .expect("opens");
        let sent = Arc::new(AtomicU64::new(0));
        let sender = {
            let (frames, sent, tx) = (frames.clone(), sent.clone(), session.tx);
            tokio::spawn(async move {
                for seq in 0.. {
                    let template = &frames[seq as usize % frames.len()];
                    if tx.send(frame_input(numbered(template, seq))).await.is_err() {
                        break;
                    }
                    sent.fetch_add(1, Ordering::Relaxed);
                }
            })
        };
        stuck.push((policy, client, session.answers, sent, sender));
    }
    // Both slots are taken, and both clients' sends stop once flow control holds them.
    let mut last: Vec<u64> = vec![0; stuck.len()];
    let waited = Instant::now();
    let blocked_at = loop {
        assert!(
            waited.elapsed() < Duration::from_secs(30),
            "the clients' sends never blocked: {last:?} frames sent"
        );
        tokio::time::sleep(Duration::from_millis(300)).await;
        let now: Vec<u64> = stuck.iter().map(|s| s.3.load(Ordering::Relaxed)).collect();
        if now == last && now.iter().all(|n| *n > 0) {
            break Instant::now();
        }
        last = now;
    };
    let rss_stuck = server.rss_mib();
    let mut probe = connect(&server.url).await;
    let refused = open(&mut probe, opening(pb::FramePolicy::EveryFrame, "probe"), 1)
        .await
        .err()
        .expect("no third session while two are open");
    assert_eq!(
        refused.code(),
        tonic::Code::ResourceExhausted,
        "{refused:?}"
    );

    // The idle timeout ends both sessions; their slots are free again.
    let open_now = server
        .wait_sessions_open(0.0, Duration::from_secs_f64(IDLE_S + 5.0))
        .await;
    let freed_after = blocked_at.elapsed().as_secs_f64();
    assert_eq!(
        open_now, 0.0,
        "sessions whose clients stopped reading were still open {freed_after:.1} s after they blocked (idle timeout {IDLE_S} s)"
    );
    let rss_freed = server.rss_mib();
    let fresh = open(&mut probe, opening(pb::FramePolicy::EveryFrame, "probe"), 1)
        .await
        .expect("a new session opens once the stuck ones are ended");
    drop(fresh);

    // Reading again: the answers that waited, each frame at most once, then the status.
    let mut figures = Vec::new();
    for (policy, client, mut answers, sent, sender) in stuck {
        let mut ledger = Ledger::default();
        let status = tokio::time::timeout(Duration::from_secs(10), async {
            loop {
                match answers.message().await {
                    Ok(Some(m)) => match m.item {
                        Some(pb::session_output::Item::Answer(a)) => ledger.record(&a),
                        other => panic!("{policy:?}: unexpected {other:?}"),
                    },
                    Ok(None) => panic!("{policy:?}: the stream ended without a status"),
                    Err(status) => break status,
                }
            }
        })
        .await
        .expect("the stuck client finds the end of its stream when it reads again");
        sender.abort();
        drop(client);
        assert_eq!(status.code(), tonic::Code::Cancelled, "{status:?}");
        assert!(
            status.message().contains("idle timeout"),
            "{}",
            status.message()
        );
        assert!(
            ledger.counts.values().all(|c| *c == 1),
            "{policy:?}: an answer came twice"
        );
        assert_eq!(ledger.errors, 0, "{:?}", ledger.first_error);
        if policy == pb::FramePolicy::EveryFrame {
            let k = ledger.answered();
            ledger
                .check_exactly_once(k)
                .expect("a prefix of the frames, in order");
            assert!(ledger.in_order());
        }
        figures.push(format!(
            "{policy:?}: {} frames sent, {} answers waiting",
            sent.load(Ordering::Relaxed),
            ledger.answered()
        ));
    }
    eprintln!(
        "faults: stuck readers: 2 clients (every frame, latest only) stopped reading for good; sessions ended {freed_after:.1} s after their sends blocked (idle timeout {IDLE_S} s), a new session then opened; {}; server RSS at start {rss_start:.1} MiB, while stuck {rss_stuck:.1} MiB, after the end {rss_freed:.1} MiB",
        figures.join("; ")
    );
}

// ---------------------------------------------------------------------------------------------------------
// Kill and restart during replay

/// The lines of a results file by sequence number (the header under `u64::MAX`), without the fields that
/// measure time; and how many lines each sequence number has.
fn results_by_seq(path: &Path) -> (BTreeMap<u64, serde_json::Value>, BTreeMap<u64, u32>) {
    let text = std::fs::read_to_string(path).expect("results file");
    let (mut lines, mut counts) = (BTreeMap::new(), BTreeMap::new());
    for line in text.lines() {
        let mut v: serde_json::Value = serde_json::from_str(line).unwrap_or_else(|e| {
            panic!("{}: a line is not whole JSON ({e}): {line}", path.display())
        });
        if let Some(o) = v.as_object_mut() {
            o.remove("timings_us");
            o.remove("round_trip_us");
        }
        let key = if v["kind"] == "header" {
            u64::MAX
        } else {
            v["seq"].as_u64().expect("seq")
        };
        *counts.entry(key).or_default() += 1;
        lines.insert(key, v);
    }
    (lines, counts)
}

fn replay_command(rec: &Path, url: &str, out: &Path) -> Command {
    let mut command = Command::new(binary("framewise"));
    command
        .arg("replay")
        .arg(rec)
        .args(["--server", url])
        .arg("--out")
        .arg(out);
    command
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn replay_survives_a_server_killed_mid_way_and_resumes_to_every_frame_once() {
    let dir = scratch("kill-restart");
    let rec = dir.join("rec");
    let frames = synth_sweep(&rec, 6, 320, 240, 7);
    assert_eq!(frames, 180);

    let mut server = ServerProcess::start(&dir, &[]).await;
    let addr = server.addr;
    // An uninterrupted replay, the reference.
    let full = dir.join("full.jsonl");
    let reference = replay_command(&rec, &server.url, &full)
        .output()
        .expect("replay runs");
    assert!(
        reference.status.success(),
        "{}",
        String::from_utf8_lossy(&reference.stderr)
    );

    // The same replay at the recorded pace; the server is killed (SIGKILL) after about a third of it.
    let cut = dir.join("cut.jsonl");
    let stderr_path = dir.join("cut.stderr");
    let mut client = ChildGuard::spawn(
        replay_command(&rec, &server.url, &cut)
            .args(["--speed", "1"])
            .stdout(Stdio::null())
            .stderr(File::create(&stderr_path).expect("stderr file")),
    );
    let waited = Instant::now();
    while std::fs::read_to_string(&cut).map_or(0, |t| t.lines().count()) < 60
        && waited.elapsed() < Duration::from_secs(5)
    {
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let killed = Instant::now();
    server.process.kill();
    let status = client
        .wait_exit(Duration::from_secs(15))
        .await
        .expect("the client exits after the server died");
    let client_exit_ms = killed.elapsed().as_secs_f64() * 1000.0;
    let stderr = std::fs::read_to_string(&stderr_path).unwrap_or_default();
    assert!(
        !status.success(),
        "the client exited with success though the server died"
    );
    assert!(
        stderr.contains("server")
            && (stderr.contains("connection") || stderr.contains("transport")),
        "the client's message names neither the server nor the connection: {stderr}"
    );
    // No torn last line: the file ends with a newline and every line is whole JSON.
    let text = std::fs::read_to_string(&cut).expect("cut file");
    assert!(
        text.ends_with('\n'),
        "the interrupted output ends inside a line"
    );
    let (cut_lines, _) = results_by_seq(&cut);
    let kept = cut_lines.len() as u64 - 1;
    assert!(
        kept > 0 && kept < frames,
        "{kept} of {frames} frames written before the kill"
    );

    // The server comes back on the same port; the replay resumes.
    drop(server);
    let server = ServerProcess::start_on(&dir, addr, &[], 9)
        .await
        .expect("the server restarts on the same port");
    let resumed = replay_command(&rec, &server.url, &cut)
        .args(["--speed", "1", "--resume"])
        .output()
        .expect("replay --resume runs");
    let resumed_stderr = String::from_utf8_lossy(&resumed.stderr);
    assert!(resumed.status.success(), "{resumed_stderr}");
    assert!(
        resumed_stderr.contains("kept from before"),
        "{resumed_stderr}"
    );

    // Every frame once; every line equal to the uninterrupted run's (raw, smoothed, decision, quality).
    let (final_lines, counts) = results_by_seq(&cut);
    let (full_lines, _) = results_by_seq(&full);
    let mut expected: BTreeMap<u64, u32> = (0..frames).map(|s| (s, 1)).collect();
    expected.insert(u64::MAX, 1);
    assert_eq!(counts, expected, "each frame exactly once, one header");
    let raw_equal = (0..frames)
        .filter(|s| final_lines[s]["raw"] == full_lines[s]["raw"])
        .count();
    assert_eq!(
        raw_equal as u64, frames,
        "raw probabilities differ from the uninterrupted run"
    );
    let differing: Vec<u64> = (0..frames)
        .filter(|s| final_lines[s] != full_lines[s])
        .collect();
    assert!(
        differing.is_empty(),
        "lines differ from the uninterrupted run at frames {differing:?}"
    );
    assert_eq!(final_lines[&u64::MAX], full_lines[&u64::MAX], "header");
    eprintln!(
        "faults: kill and restart: {frames} frames at 30 fps; server SIGKILLed after {kept} lines were written; client exited {:?} {client_exit_ms:.0} ms later with: {}\nfaults: kill and restart: restarted on {addr}; --resume kept {kept} lines, wrote {}; final file: {frames} frames, each exactly once, raw and smoothed equal to an uninterrupted replay on all {frames}",
        status.code(),
        stderr.trim(),
        frames - kept
    );
}

// ---------------------------------------------------------------------------------------------------------
// SIGTERM with live sessions

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigterm_with_16_live_sessions_goes_not_serving_first_drains_and_exits_0() {
    const DRAIN_S: f64 = 3.0;
    let dir = scratch("sigterm");
    let mut server = ServerProcess::start(&dir, &["--drain-s", "3"]).await;
    let frames = phantom_frames(320, 240, 8, 61);
    let start = Instant::now() + Duration::from_millis(300);
    // Half the sessions finish once the server says NOT_SERVING; the other half keep streaming.
    let (finishing, streaming) = (
        Arc::new(AtomicBool::new(false)),
        Arc::new(AtomicBool::new(false)),
    );
    let sessions: Vec<(bool, JoinHandle<Paced>)> = (0..16)
        .map(|i| {
            let finishes = i % 2 == 0;
            let load = Load {
                url: server.url.clone(),
                label: format!("session {i}"),
                policy: pb::FramePolicy::EveryFrame,
                frames: frames.clone(),
                start: start + frame_interval().mul_f64(i as f64 / 16.0),
                limit: u64::MAX,
                stop: if finishes {
                    finishing.clone()
                } else {
                    streaming.clone()
                },
            };
            (finishes, tokio::spawn(paced_session(load)))
        })
        .collect();
    tokio::time::sleep_until((start + Duration::from_secs(2)).into()).await;
    let mut health = health_client(&server.url).await.expect("health connects");
    assert_eq!(
        health_status(&mut health).await.ok(),
        Some(ServingStatus::Serving as i32)
    );
    let open_before = server
        .metrics()
        .await
        .get("framewise_sessions_open")
        .copied();
    assert_eq!(open_before, Some(16.0));

    let signalled = Instant::now();
    server.process.signal("TERM");
    let not_serving_at = loop {
        match health_status(&mut health).await {
            Ok(s) if s == ServingStatus::NotServing as i32 => break signalled.elapsed(),
            Ok(_) => {}
            Err(e) => panic!("the health check failed before it said NOT_SERVING: {e}"),
        }
        assert!(
            signalled.elapsed() < Duration::from_secs(2),
            "still SERVING 2 s after SIGTERM"
        );
        tokio::time::sleep(Duration::from_millis(2)).await;
    };
    finishing.store(true, Ordering::Relaxed);
    // New sessions are refused while the open ones drain.
    let mut late = connect(&server.url).await;
    let refused = open(&mut late, opening(pb::FramePolicy::EveryFrame, "late"), 1)
        .await
        .err()
        .expect("a new session is refused during the drain");
    let refused_at = signalled.elapsed();
    assert_eq!(refused.code(), tonic::Code::Unavailable, "{refused:?}");
    drop(late);

    let exit = server
        .process
        .wait_exit(Duration::from_secs_f64(DRAIN_S + 8.0))
        .await
        .expect("the server exits within the drain deadline and the close grace");
    let exited_at = signalled.elapsed();
    assert_eq!(
        exit.code(),
        Some(0),
        "exit status {exit}: {}",
        log_tail(&server.log)
    );

    let mut summaries = Vec::new();
    let mut ended_by_status = Vec::new();
    let (mut answered, mut in_flight) = (0, 0);
    for (finishes, task) in sessions {
        let p = tokio::time::timeout(Duration::from_secs(20), task)
            .await
            .expect("every session ends")
            .expect("session task");
        let ended = p.ended_at.saturating_duration_since(signalled);
        assert!(
            ended > not_serving_at,
            "{} ended {ended:?} after SIGTERM, before health said NOT_SERVING ({not_serving_at:?})",
            p.label
        );
        answered += p.ledger.answered();
        if finishes {
            // Half-closed during the drain: every frame answered once and the summary.
            if let Err(e) = p.check_complete() {
                panic!("{e}");
            }
            summaries.push(ended.as_secs_f64());
        } else {
            // Still streaming at the deadline: ended with UNAVAILABLE naming the drain deadline. The frames
            // the session read were answered, once and in order, with no gap; the rest were in flight.
            let status = p.status.as_ref().unwrap_or_else(|| {
                panic!(
                    "{} was not ended with a status; summary {:?}",
                    p.label, p.summary
                )
            });
            assert_eq!(status.code(), tonic::Code::Unavailable, "{status:?}");
            assert!(
                status.message().contains("drain deadline"),
                "{}",
                status.message()
            );
            let k = p.ledger.answered();
            p.ledger
                .check_exactly_once(k)
                .unwrap_or_else(|e| panic!("{}: {e}", p.label));
            assert!(p.ledger.in_order() && p.ledger.errors == 0 && k <= p.sent);
            in_flight += p.sent - k;
            assert!(
                ended.as_secs_f64() >= DRAIN_S - 0.2 && ended.as_secs_f64() < DRAIN_S + 2.0,
                "{} ended {ended:?} after SIGTERM; the drain deadline is {DRAIN_S} s",
                p.label
            );
            ended_by_status.push(ended.as_secs_f64());
        }
    }
    let range = |v: &[f64]| {
        let lo = v.iter().copied().fold(f64::INFINITY, f64::min);
        format!("{:.0}..{:.0} ms", lo * 1000.0, max(v) * 1000.0)
    };
    eprintln!(
        "faults: SIGTERM: 16 sessions of 320x240 RGB at 30 fps, drain {DRAIN_S} s; after the signal: NOT_SERVING at {:.1} ms, a new session refused (UNAVAILABLE) at {:.1} ms, 8 half-closing sessions got their summaries at {}, 8 streaming sessions ended with UNAVAILABLE (drain deadline) at {}, process exited with code 0 at {:.0} ms; {answered} answers, each frame once; {in_flight} frames were in flight when the streaming sessions were ended",
        not_serving_at.as_secs_f64() * 1000.0,
        refused_at.as_secs_f64() * 1000.0,
        range(&summaries),
        range(&ended_by_status),
        exited_at.as_secs_f64() * 1000.0,
    );
    assert!(
        exited_at.as_secs_f64() < DRAIN_S + 5.0,
        "exit {exited_at:?} after SIGTERM"
    );
}

// ---------------------------------------------------------------------------------------------------------
// Soak

fn soak_seconds() -> f64 {
    std::env::var("FRAMEWISE_SOAK_SECONDS")
        .ok()
        .and_then(|s| s.parse::<f64>().ok())
        .filter(|s| *s >= 3.0)
        .unwrap_or(60.0)
}

/// 16 sessions of 320x240 RGB at 30 fps for `FRAMEWISE_SOAK_SECONDS` (default 60) on the demo model, with
/// the server's RSS sampled every second: every frame answered exactly once, no error, the server's counters
/// agree, and no memory growth after warm-up (the mean of the last third of the samples against the mean
/// of the second third: less than 10 % or 20 MiB, whichever is larger).
async fn soak(policy: pb::FramePolicy, name: &str) {
    let seconds = soak_seconds();
    let dir = scratch(&format!("soak-{name}"));
    let server = ServerProcess::start(&dir, &[]).await;
    let sampler = RssSampler::start(server.pid(), Duration::from_secs(1));
    let frames = phantom_frames(320, 240, 8, 71);
    let per_session = (seconds * FPS).round() as u64;
    let start = Instant::now() + Duration::from_millis(300);
    let stop = Arc::new(AtomicBool::new(false));
    let tasks: Vec<JoinHandle<Paced>> = (0..16)
        .map(|i| {
            tokio::spawn(paced_session(Load {
                url: server.url.clone(),
                label: format!("{name} session {i}"),
                policy,
                frames: frames.clone(),
                start: start + frame_interval().mul_f64(i as f64 / 16.0),
                limit: per_session,
                stop: stop.clone(),
            }))
        })
        .collect();
    let mut done = Vec::new();
    for t in tasks {
        done.push(
            tokio::time::timeout(Duration::from_secs_f64(seconds + 60.0), t)
                .await
                .expect("the soak sessions end")
                .expect("session task"),
        );
    }
    // The samples taken while all 16 sessions were streaming.
    let first_end = done.iter().map(|p| p.ended_at).min().unwrap_or(start);
    let samples: Vec<f64> = sampler
        .finish()
        .await
        .into_iter()
        .filter(|(t, _)| *t >= start && *t < first_end)
        .map(|(_, v)| v)
        .collect();
    assert!(samples.len() >= 3, "too few RSS samples: {}", samples.len());
    let third = samples.len() / 3;
    let (second, last) = (
        mean(&samples[third..2 * third]),
        mean(&samples[samples.len() - third..]),
    );
    let bound = (second * 0.10).max(20.0);
    let round_trips: Vec<Duration> = done
        .iter()
        .flat_map(|p| p.round_trips.iter().map(|(_, rt)| *rt))
        .collect();
    let sent: u64 = done.iter().map(|p| p.sent).sum();
    let results: u64 = done.iter().map(|p| p.ledger.results).sum();
    let skipped: u64 = done.iter().map(|p| p.ledger.skipped).sum();
    let errors: u64 = done.iter().map(|p| p.ledger.errors).sum();
    let counters = server.metrics().await;
    let counter = |n: &str| counters.get(n).copied().unwrap_or(f64::NAN);
    eprintln!(
        "faults: soak {name}: 16 sessions x 30 fps x {seconds} s, 320x240 RGB: {sent} frames sent, {results} results, {skipped} skipped, {errors} errors; round trip p50 {:.1} ms, p99 {:.1} ms, max {:.1} ms\nfaults: soak {name}: server RSS {} samples: first {:.1}, min {:.1}, max {:.1}, mean of the second third {second:.1}, of the last third {last:.1} MiB (growth {:+.1} MiB, bound {bound:.1}); server counters frames {} results {} skipped {} errors {}",
        percentile_ms(&round_trips, 50.0),
        percentile_ms(&round_trips, 99.0),
        percentile_ms(&round_trips, 100.0),
        samples.len(),
        samples.first().copied().unwrap_or(f64::NAN),
        samples.iter().copied().fold(f64::INFINITY, f64::min),
        max(&samples),
        last - second,
        counter("framewise_frames_total"),
        counter("framewise_results_total"),
        counter("framewise_skipped_total"),
        counter("framewise_frame_errors_total"),
    );
    for p in &done {
        if let Err(e) = p.check_complete() {
            panic!("{e}");
        }
        assert_eq!(
            p.sent, per_session,
            "{}: every scheduled frame was sent",
            p.label
        );
        if policy == pb::FramePolicy::EveryFrame {
            assert!(p.ledger.in_order(), "{}: out of order", p.label);
            assert_eq!(
                p.ledger.results, p.sent,
                "{}: every frame has a result",
                p.label
            );
        }
    }
    assert_eq!(counter("framewise_frames_total"), sent as f64);
    assert_eq!(counter("framewise_results_total"), results as f64);
    assert_eq!(counter("framewise_skipped_total"), skipped as f64);
    assert_eq!(counter("framewise_frame_errors_total"), 0.0);
    assert!(
        last - second < bound,
        "server RSS grew after warm-up: {second:.1} -> {last:.1} MiB (bound {bound:.1} MiB)"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn soak_every_frame_16_sessions_answers_every_frame_without_memory_growth() {
    soak(pb::FramePolicy::EveryFrame, "every").await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn soak_latest_only_16_sessions_answers_every_frame_without_memory_growth() {
    soak(pb::FramePolicy::LatestOnly, "latest").await;
}

/// Flags out of range are refused at start, naming the flag and its range, instead of aborting the process
/// (a stack-guard abort for 99,999 worker threads, a duration overflow for 1e20 seconds).
#[test]
fn out_of_range_start_up_flags_are_refused_with_their_range() {
    for (flag, value, says) in [
        ("--workers", "99999", "workers"),
        ("--idle-timeout-s", "1e20", "idle_timeout_s"),
        ("--drain-s", "1e20", "drain_s"),
        ("--keepalive-s=-1", "", "keepalive_s"),
    ] {
        let out = Command::new(binary("framewise-server"))
            .args(["--listen", &format!("127.0.0.1:{}", free_port()), flag])
            .args((!value.is_empty()).then_some(value))
            .output()
            .expect("the server binary runs");
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(1), "{flag} {value}: {stderr}");
        assert!(
            stderr.contains(says) && stderr.contains("must be"),
            "{flag} {value}: {stderr}"
        );
    }
}

/// `--listen` takes a host name (resolved, IPv4 first), and names the value it cannot use.
#[test]
fn listen_takes_host_names_and_names_what_it_cannot_resolve() {
    // Parsed and resolved: the server gets as far as checking its other settings.
    let out = Command::new(binary("framewise-server"))
        .args([
            "--listen",
            &format!("localhost:{}", free_port()),
            "--workers",
            "99999",
        ])
        .output()
        .expect("the server binary runs");
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("workers") && !stderr.contains("HOST:PORT"),
        "{stderr}"
    );
    let out = Command::new(binary("framewise-server"))
        .args(["--listen", "no-such-host.invalid:1"])
        .output()
        .expect("the server binary runs");
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.contains("no-such-host.invalid:1") && stderr.contains("HOST:PORT"),
        "{stderr}"
    );
}
