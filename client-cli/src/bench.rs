//! `bench`: N concurrent sessions at a set frame rate for a set duration, open loop. Frames are sent on
//! schedule whatever the answers do, and latency is measured from each frame's scheduled send time, so a
//! stall shows up in the percentiles instead of slowing the load (no coordinated omission).

use std::path::PathBuf;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use clap::Args;
use framewise_engine::latency::{
    LatencyBook, MAX_TRACKED_US, StageTimings, new_histogram, percentiles,
};
use framewise_engine::{CAUTION, PixelFormat};
use framewise_models_demo::phantom::{Drum, random_view};
use framewise_models_demo::rng::SplitMix64;
use framewise_proto::v1 as pb;
use hdrhistogram::Histogram;
use serde::Serialize;

use crate::client;
use crate::output::table;
use crate::settings::SessionFlags;

/// Options of `bench`.
#[derive(Debug, Clone, Args)]
pub struct BenchArgs {
    /// Server URL; repeat to spread sessions over several servers (round robin).
    #[arg(
        long = "server",
        default_value = "http://127.0.0.1:50051",
        env = "FRAMEWISE_SERVER"
    )]
    pub servers: Vec<String>,
    /// Bearer token.
    #[arg(long, env = "FRAMEWISE_TOKEN", hide_env_values = true)]
    pub token: Option<String>,
    #[command(flatten)]
    pub connect: client::ConnectFlags,
    /// Concurrent sessions.
    #[arg(long, default_value_t = 4)]
    pub sessions: usize,
    /// Frames per second per session.
    #[arg(long, default_value_t = 30.0)]
    pub fps: f64,
    /// Seconds of load.
    #[arg(long, default_value_t = 10.0)]
    pub seconds: f64,
    /// Synthetic frame width.
    #[arg(long, default_value_t = 640)]
    pub width: u32,
    /// Synthetic frame height.
    #[arg(long, default_value_t = 480)]
    pub height: u32,
    /// Synthetic frame format (rgb8, bgr8, rgba8, bgra8, gray8, nv12, i420, yuyv, png, jpeg).
    #[arg(long, default_value = "rgb8")]
    pub format: String,
    /// A frame slower than this end to end counts as late (ms). Published work on laparoscopic video found
    /// task performance degrading at about 100 ms of added delay.
    #[arg(long, default_value_t = 100.0)]
    pub late_ms: f64,
    /// Write the JSON report here.
    #[arg(long)]
    pub json: Option<PathBuf>,
    /// Write the end-to-end latency histogram here (HdrHistogram V2 log, base64).
    #[arg(long)]
    pub hdr_log: Option<PathBuf>,
    /// Write the latency percentile plot here (.svg or .png).
    #[arg(long)]
    pub plot: Option<PathBuf>,
    /// Write every answered frame's end-to-end latency here (CSV: session, seq, server, end_to_end_us), for
    /// analysis outside framewise. Held in memory until the run ends (about 24 bytes per frame).
    #[arg(long)]
    pub latencies: Option<PathBuf>,
    /// Release gate: fail (exit 3) when the end-to-end p99 exceeds this many ms.
    #[arg(long)]
    pub max_p99_ms: Option<f64>,
    /// Release gate: fail (exit 3) when the achieved total frame rate is below this.
    #[arg(long)]
    pub min_fps: Option<f64>,
    /// Session settings.
    #[command(flatten)]
    pub session: SessionFlags,
}

/// Percentiles in milliseconds.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Millis {
    /// Samples.
    pub count: u64,
    /// 50th.
    pub p50: f64,
    /// 90th.
    pub p90: f64,
    /// 99th.
    pub p99: f64,
    /// 99.9th.
    pub p999: f64,
    /// Largest.
    pub max: f64,
}

fn millis(h: &Histogram<u64>) -> Millis {
    let p = percentiles("", h);
    let ms = |v: u64| v as f64 / 1000.0;
    Millis {
        count: p.count,
        p50: ms(p.p50),
        p90: ms(p.p90),
        p99: ms(p.p99),
        p999: ms(p.p999),
        max: ms(p.max),
    }
}

/// The bench report.
#[derive(Debug, Clone, Serialize)]
pub struct BenchReport {
    /// The caution.
    pub caution: String,
    /// Servers used.
    pub servers: Vec<String>,
    /// Model identity as the first session saw it.
    pub model: serde_json::Value,
    /// Sessions asked for.
    pub sessions: usize,
    /// Sessions that failed (with the reason).
    pub failed_sessions: Vec<String>,
    /// Target frames per second per session.
    pub fps_per_session: f64,
    /// Seconds of load.
    pub seconds: f64,
    /// Frame size and format.
    pub frame: String,
    /// Frames scheduled.
    pub scheduled: u64,
    /// Frames answered with a result.
    pub results: u64,
    /// Frames skipped by the server.
    pub skipped: u64,
    /// Frames answered with an error, or never answered.
    pub failed: u64,
    /// Results slower than `late_ms`.
    pub late: u64,
    /// Late threshold.
    pub late_ms: f64,
    /// Results per second over the run.
    pub achieved_fps: f64,
    /// End to end, from each frame's scheduled send time to its answer.
    pub end_to_end_ms: Millis,
    /// Server stages as the answers report them.
    pub server_stages_ms: Vec<(String, Millis)>,
    /// How the sessions and answers were spread over the servers (they add up to the totals above).
    pub per_server: Vec<ServerShare>,
}

/// One server's part of a bench run.
#[derive(Debug, Clone, Default, Serialize)]
pub struct ServerShare {
    /// The server.
    pub server: String,
    /// Sessions assigned to it.
    pub sessions: Vec<usize>,
    /// Sessions that failed on it (session numbers; the reasons are in `failed_sessions`).
    pub failed_sessions: Vec<usize>,
    /// Frames it answered with a result.
    pub results: u64,
    /// Frames it skipped.
    pub skipped: u64,
    /// Frames it answered with an error.
    pub errors: u64,
}

struct Shared {
    end_to_end: Histogram<u64>,
    stages: LatencyBook,
    results: u64,
    skipped: u64,
    failed: u64,
    late: u64,
    model: Option<pb::ModelIdentity>,
    failures: Vec<String>,
    shares: Vec<ServerShare>,
    /// (session, seq, server, end-to-end µs) of every result, kept only when `--latencies` asks for them.
    raw: Option<Vec<(u32, u64, u32, u64)>>,
}

/// Synthetic frames: a few phantom views, encoded once, sent in turn.
fn synthetic_frames(
    width: u32,
    height: u32,
    format: PixelFormat,
) -> Result<Vec<prost::bytes::Bytes>> {
    let mut rng = SplitMix64::new(77);
    let drum = Drum::random(8, &mut rng);
    (0..8)
        .map(|_| {
            let view = random_view(&drum, &mut rng);
            let rgb = drum.render(&view, width, height);
            framewise_engine::frame::encode_from_rgb(&rgb, width, height, format)
                .map(prost::bytes::Bytes::from)
                .map_err(|e| anyhow::anyhow!("{e}"))
        })
        .collect()
}

/// Runs the benchmark; returns the report and whether the gates passed.
pub async fn run(mut args: BenchArgs) -> Result<(BenchReport, bool)> {
    args.servers = client::expand_endpoints(&args.servers).await;
    anyhow::ensure!(
        args.sessions >= 1 && args.sessions <= 1024,
        "--sessions must be 1..=1024"
    );
    anyhow::ensure!(
        args.fps > 0.0 && args.fps <= 1000.0,
        "--fps must be in (0, 1000]"
    );
    anyhow::ensure!(
        args.seconds > 0.0 && args.seconds <= 86_400.0,
        "--seconds must be in (0, 86400]"
    );
    anyhow::ensure!(!args.servers.is_empty(), "give at least one --server");
    if let Some(path) = &args.plot {
        crate::plot::PlotFormat::of(path)?;
    }
    let format = PixelFormat::from_name(&args.format)
        .with_context(|| format!("--format {}: not a known pixel format", args.format))?;
    eprintln!(
        "framewise bench: {} sessions x {} fps x {} s, {}x{} {format}. {CAUTION}",
        args.sessions, args.fps, args.seconds, args.width, args.height
    );
    let frames = Arc::new(synthetic_frames(args.width, args.height, format)?);
    let opening = args.session.opening()?;
    let shared = Arc::new(Mutex::new(Shared {
        end_to_end: new_histogram(),
        stages: LatencyBook::new(),
        results: 0,
        skipped: 0,
        failed: 0,
        late: 0,
        model: None,
        failures: Vec::new(),
        raw: args.latencies.as_ref().map(|_| Vec::new()),
        shares: args
            .servers
            .iter()
            .map(|s| ServerShare {
                server: s.clone(),
                ..Default::default()
            })
            .collect(),
    }));
    let interval = Duration::from_secs_f64(1.0 / args.fps);
    let per_session = (args.seconds * args.fps).round().max(1.0) as u64;
    let start = Instant::now() + Duration::from_millis(300);
    let mut tasks = Vec::new();
    for s in 0..args.sessions {
        let server = s % args.servers.len();
        let url = args.servers[server].clone();
        if let Ok(mut sh) = shared.lock() {
            sh.shares[server].sessions.push(s);
        }
        let (frames, shared, opening, token, connect) = (
            frames.clone(),
            shared.clone(),
            opening.clone(),
            args.token.clone(),
            args.connect.clone(),
        );
        let (width, height, late_us) = (args.width, args.height, (args.late_ms * 1000.0) as u64);
        // Sessions are staggered across one frame interval so that they do not all send at once.
        let offset = interval.mul_f64(s as f64 / args.sessions as f64);
        tasks.push(tokio::spawn(async move {
            let outcome = one_session(
                &url,
                &connect,
                s,
                server,
                token.as_deref(),
                opening,
                frames,
                width,
                height,
                format,
                start + offset,
                interval,
                per_session,
                late_us,
                &shared,
            )
            .await;
            if let Err(e) = outcome
                && let Ok(mut sh) = shared.lock()
            {
                sh.failures.push(format!("session {s} on {url}: {e:#}"));
                sh.shares[server].failed_sessions.push(s);
            }
        }));
    }
    for t in tasks {
        t.await.context("a bench session task failed")?;
    }
    let elapsed = start.elapsed().as_secs_f64().max(1e-9);
    let mut sh = shared
        .lock()
        .map_err(|_| anyhow::anyhow!("bench state poisoned"))?;
    let scheduled = per_session * args.sessions as u64;
    let answered = sh.results + sh.skipped + sh.failed;
    let report = BenchReport {
        caution: CAUTION.into(),
        servers: args.servers.clone(),
        model: sh.model.as_ref().map_or(serde_json::Value::Null, |m| {
            let self_test = m.self_test.as_ref().map(crate::output::SelfTestInfo::from).unwrap_or_default();
            serde_json::json!({"name": m.name, "version": m.version, "sha256": m.sha256, "engine": m.engine,
                "self_test": self_test})
        }),
        sessions: args.sessions,
        failed_sessions: sh.failures.clone(),
        fps_per_session: args.fps,
        seconds: args.seconds,
        frame: format!("{}x{} {format}", args.width, args.height),
        scheduled,
        results: sh.results,
        skipped: sh.skipped,
        failed: sh.failed + scheduled.saturating_sub(answered),
        late: sh.late,
        late_ms: args.late_ms,
        achieved_fps: sh.results as f64 / elapsed,
        end_to_end_ms: millis(&sh.end_to_end),
        server_stages_ms: sh
            .stages
            .summary()
            .iter()
            .filter_map(|p| sh.stages.stage(p.stage).map(|h| (p.stage.to_string(), millis(h))))
            .collect(),
        per_server: sh
            .shares
            .iter()
            .map(|s| {
                let mut s = s.clone();
                s.failed_sessions.sort_unstable();
                s
            })
            .collect(),
    };
    if let Some(path) = &args.hdr_log {
        write_hdr_log(&sh.end_to_end, path)?;
    }
    if let Some(path) = &args.plot {
        crate::plot::percentiles(&report, &sh.end_to_end, path)?;
    }
    if let (Some(path), Some(raw)) = (&args.latencies, sh.raw.as_mut()) {
        write_latencies(raw, &args.servers, path)?;
    }
    drop(sh);
    if let Some(path) = &args.json {
        std::fs::write(path, serde_json::to_string_pretty(&report)?)
            .with_context(|| format!("writing {}", path.display()))?;
    }
    let mut pass = true;
    if let Some(limit) = args.max_p99_ms
        && report.end_to_end_ms.p99 > limit
    {
        eprintln!(
            "framewise bench: gate failed: end-to-end p99 {:.2} ms > {limit} ms",
            report.end_to_end_ms.p99
        );
        pass = false;
    }
    if let Some(limit) = args.min_fps
        && report.achieved_fps < limit
    {
        eprintln!(
            "framewise bench: gate failed: achieved {:.1} fps < {limit} fps",
            report.achieved_fps
        );
        pass = false;
    }
    if report.results == 0 {
        bail!("no frame got a result: {:?}", report.failed_sessions);
    }
    Ok((report, pass))
}

#[allow(clippy::too_many_arguments)]
async fn one_session(
    url: &str,
    connect: &client::ConnectFlags,
    session_index: usize,
    server: usize,
    token: Option<&str>,
    opening: pb::SessionOpening,
    frames: Arc<Vec<prost::bytes::Bytes>>,
    width: u32,
    height: u32,
    format: PixelFormat,
    start: Instant,
    interval: Duration,
    count: u64,
    late_us: u64,
    shared: &Arc<Mutex<Shared>>,
) -> Result<()> {
    let mut grpc = client::connect_with(url, connect).await?;
    let session = client::open(&mut grpc, opening, token).await?;
    if let Ok(mut sh) = shared.lock()
        && sh.model.is_none()
    {
        sh.model = session.accepted.model.clone();
    }
    let (w, h) = if format.is_encoded() {
        (0, 0)
    } else {
        (width, height)
    };
    let sender = {
        let tx = session.frames;
        tokio::spawn(async move {
            for i in 0..count {
                let due = start + interval.mul_f64(i as f64);
                tokio::time::sleep_until(due.into()).await;
                let frame = pb::Frame {
                    file_slice: None,
                    seq: i,
                    capture_time_us: (due.duration_since(start).as_micros() as i64) + 1_000_000,
                    format: framewise_server::convert::wire_format(format) as i32,
                    width: w,
                    height: h,
                    stride: 0,
                    data: frames[i as usize % frames.len()].clone(),
                };
                if !client::send_frame(&tx, frame).await {
                    break;
                }
            }
        })
    };
    let mut answers = session.answers;
    while let Some(message) = answers.message().await.map_err(client::status_error)? {
        let Some(pb::session_output::Item::Answer(a)) = message.item else {
            continue;
        };
        let due = start + interval.mul_f64(a.seq as f64);
        let e2e = Instant::now().saturating_duration_since(due).as_micros() as u64;
        let mut sh = shared
            .lock()
            .map_err(|_| anyhow::anyhow!("bench state poisoned"))?;
        match a.outcome {
            Some(pb::answer::Outcome::Result(r)) => {
                sh.results += 1;
                sh.shares[server].results += 1;
                sh.end_to_end
                    .saturating_record(e2e.clamp(1, MAX_TRACKED_US));
                if let Some(raw) = sh.raw.as_mut() {
                    raw.push((session_index as u32, a.seq, server as u32, e2e));
                }
                if e2e > late_us {
                    sh.late += 1;
                }
                if let Some(t) = r.timings {
                    sh.stages.record(&StageTimings {
                        queue_us: t.queue_us,
                        preprocess_us: t.preprocess_us,
                        inference_us: t.inference_us,
                        filter_us: t.filter_us,
                        total_us: t.total_us,
                    });
                }
            }
            Some(pb::answer::Outcome::Skipped(_)) => {
                sh.skipped += 1;
                sh.shares[server].skipped += 1;
            }
            _ => {
                sh.failed += 1;
                sh.shares[server].errors += 1;
            }
        }
    }
    sender.await.context("the frame sender failed")?;
    Ok(())
}

/// The raw latencies as CSV, in session then sequence order, after a comment line with the caution.
fn write_latencies(
    raw: &mut [(u32, u64, u32, u64)],
    servers: &[String],
    path: &std::path::Path,
) -> Result<()> {
    use std::fmt::Write as _;
    raw.sort_unstable();
    let mut out = String::with_capacity(raw.len() * 24 + 256);
    let _ = writeln!(
        out,
        "# framewise bench end-to-end latency per answered frame, microseconds from its scheduled send time. {CAUTION}"
    );
    out.push_str("session,seq,server,end_to_end_us\n");
    for &(session, seq, server, us) in raw.iter() {
        let server = servers.get(server as usize).map_or("", String::as_str);
        let _ = writeln!(out, "{session},{seq},{server},{us}");
    }
    std::fs::write(path, out).with_context(|| format!("writing {}", path.display()))
}

fn write_hdr_log(h: &Histogram<u64>, path: &std::path::Path) -> Result<()> {
    use hdrhistogram::serialization::V2Serializer;
    use hdrhistogram::serialization::interval_log::{IntervalLogWriterBuilder, Tag};
    let mut out = Vec::new();
    let mut serializer = V2Serializer::new();
    {
        let mut builder = IntervalLogWriterBuilder::new();
        builder.add_comment(&format!(
            "framewise bench end-to-end latency, microseconds. {CAUTION}"
        ));
        let mut writer = builder
            .begin_log_with(&mut out, &mut serializer)
            .map_err(|e| anyhow::anyhow!("{e:?}"))?;
        let tag = Tag::new("end_to_end_us");
        writer
            .write_histogram(h, Duration::ZERO, Duration::from_secs(1), tag)
            .map_err(|e| anyhow::anyhow!("writing the histogram log: {e:?}"))?;
    }
    std::fs::write(path, out).with_context(|| format!("writing {}", path.display()))
}

/// The report for people.
pub fn human(r: &BenchReport) -> String {
    let mut out = String::new();
    out.push_str(&format!(
        "{} sessions x {} fps for {} s, {} frames\nscheduled {}  results {}  skipped {}  failed {}  late (> {} ms) {}\nachieved {:.1} frames per second\n\n",
        r.sessions, r.fps_per_session, r.seconds, r.frame, r.scheduled, r.results, r.skipped, r.failed, r.late_ms, r.late, r.achieved_fps
    ));
    let row = |name: &str, m: &Millis| {
        vec![
            name.to_string(),
            m.count.to_string(),
            format!("{:.2}", m.p50),
            format!("{:.2}", m.p90),
            format!("{:.2}", m.p99),
            format!("{:.2}", m.p999),
            format!("{:.2}", m.max),
        ]
    };
    let mut rows = vec![row("end to end", &r.end_to_end_ms)];
    rows.extend(
        r.server_stages_ms
            .iter()
            .map(|(s, m)| row(&format!("server {s}"), m)),
    );
    out.push_str(&table(
        &["latency (ms)", "count", "p50", "p90", "p99", "p99.9", "max"],
        &rows,
    ));
    if r.per_server.len() > 1 {
        let rows: Vec<Vec<String>> = r
            .per_server
            .iter()
            .map(|s| {
                vec![
                    s.server.clone(),
                    s.sessions.len().to_string(),
                    s.failed_sessions.len().to_string(),
                    s.results.to_string(),
                    s.skipped.to_string(),
                    s.errors.to_string(),
                ]
            })
            .collect();
        out.push('\n');
        out.push_str(&table(
            &[
                "server", "sessions", "failed", "results", "skipped", "errors",
            ],
            &rows,
        ));
    }
    for f in &r.failed_sessions {
        out.push_str(&format!("failed: {f}\n"));
    }
    out.push_str(&format!("caution: {CAUTION}"));
    out
}
