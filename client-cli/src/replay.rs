//! `replay`: sends a recording through a server (or the offline engine) and writes one JSON line per frame.
//! Also the streaming core that `demo` uses.

use std::collections::{HashMap, HashSet};
use std::io::{BufRead, Seek, Write};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use framewise_engine::{Analyser, CAUTION, FrameRef, Model, ModelPackage};
use framewise_proto::v1 as pb;

use crate::client;
use crate::output::{self, FrameRecord, Header, ModelInfo, Timings};
use crate::recording::FrameData;
use crate::settings::SessionFlags;

/// Where frames come from.
pub trait FrameSource: Send + Sync {
    /// Number of frames.
    fn len(&self) -> usize;
    /// True when there are no frames.
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// Name, capture time (ms) and label of frame `i`.
    fn meta(&self, i: usize) -> (String, f64, Option<String>);
    /// The bytes of frame `i`.
    fn read(&self, i: usize) -> Result<FrameData>;
    /// A description for the header.
    fn describe(&self) -> String;
    /// The YUV code range the source states for its frames (a Y4M header's `XCOLORRANGE`), if any; used
    /// when `--yuv` is not given.
    fn yuv_range(&self) -> Option<framewise_engine::YuvRange> {
        None
    }
}

impl FrameSource for crate::recording::Recording {
    fn len(&self) -> usize {
        self.frames.len()
    }
    fn meta(&self, i: usize) -> (String, f64, Option<String>) {
        let f = &self.frames[i];
        (f.name.clone(), f.timestamp_ms, f.label.clone())
    }
    fn read(&self, i: usize) -> Result<FrameData> {
        crate::recording::Recording::read(self, &self.frames[i])
    }
    fn yuv_range(&self) -> Option<framewise_engine::YuvRange> {
        self.yuv_range()
    }
    fn describe(&self) -> String {
        self.path.display().to_string()
    }
}

/// How fast frames are sent.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Pacing {
    /// At the recorded timestamps divided by a speed factor.
    Speed(f64),
    /// As fast as answers come back.
    Fast,
}

/// Keeps the recorded pace: frame times are measured from the first frame's.
struct Pacer {
    pacing: Pacing,
    start: Instant,
    t0: f64,
}

impl Pacer {
    fn start(pacing: Pacing, source: &dyn FrameSource) -> Self {
        let t0 = if source.is_empty() {
            0.0
        } else {
            source.meta(0).1
        };
        Self {
            pacing,
            start: Instant::now(),
            t0,
        }
    }

    /// Waits until the frame recorded at `t_ms` is due.
    async fn wait(&self, t_ms: f64) {
        if let Pacing::Speed(speed) = self.pacing {
            let due =
                self.start + Duration::from_secs_f64(((t_ms - self.t0) / speed / 1000.0).max(0.0));
            tokio::time::sleep_until(due.into()).await;
        }
    }
}

/// Where the engine runs.
#[derive(Debug, Clone)]
pub enum Target {
    /// A server at this URL, with an optional token and how to reach it.
    Server {
        url: String,
        token: Option<String>,
        connect: crate::client::ConnectFlags,
    },
    /// In this process, with this model package (or the embedded demo model).
    Offline {
        model: Option<PathBuf>,
        engine: framewise_engine::EngineOptions,
    },
}

impl Target {
    /// The server's URL, or "the offline engine".
    pub fn describe(&self) -> String {
        match self {
            Target::Server { url, .. } => url.clone(),
            Target::Offline { .. } => "the offline engine".into(),
        }
    }
}

/// What a replay did.
#[derive(Debug, Clone, Default)]
pub struct ReplayTally {
    /// Frames in the recording.
    pub frames: usize,
    /// Lines written now (excluding ones kept from an earlier run).
    pub written: usize,
    /// Frames already in the output (resume).
    pub kept: usize,
    /// Results.
    pub results: usize,
    /// Skipped.
    pub skipped: usize,
    /// Errors (unreadable frames and per-frame errors).
    pub errors: usize,
    /// Wall time.
    pub elapsed: Duration,
    /// The header written (or found).
    pub header: Option<Header>,
}

/// Loads the model for offline runs.
pub fn load_offline_model(
    path: Option<&Path>,
    engine: &framewise_engine::EngineOptions,
) -> Result<Arc<Model>> {
    let package = match path {
        Some(p) => ModelPackage::read(p)
            .with_context(|| format!("reading the model package {}", p.display()))?,
        None => framewise_models_demo::package::demo_package()?,
    };
    let model = framewise_engine::load_model(&package, None, engine)
        .with_context(|| format!("loading the model {}", package.manifest.name))?;
    Ok(Arc::new(model))
}

/// Seqs already written to `path` (whole lines only); truncates a torn last line. Returns the header too.
fn existing_output(path: &Path) -> Result<(HashSet<u64>, Option<Header>)> {
    let mut seqs = HashSet::new();
    let Ok(mut file) = std::fs::OpenOptions::new()
        .read(true)
        .write(true)
        .open(path)
    else {
        return Ok((seqs, None));
    };
    let mut header = None;
    let mut good_len = 0u64;
    {
        let mut reader = std::io::BufReader::new(&mut file);
        let mut line = String::new();
        loop {
            line.clear();
            let n = reader.read_line(&mut line)?;
            if n == 0 || !line.ends_with('\n') {
                break;
            }
            if let Ok(v) = serde_json::from_str::<serde_json::Value>(&line) {
                if v["kind"] == "header" {
                    header = serde_json::from_value(v).ok();
                } else if let Some(seq) = v["seq"].as_u64() {
                    seqs.insert(seq);
                }
            } else {
                break;
            }
            good_len += n as u64;
        }
    }
    file.set_len(good_len)?;
    file.seek(std::io::SeekFrom::End(0))?;
    Ok((seqs, header))
}

/// Replays `source` to `target`, writing JSON lines to `out` (`None` for standard output) and calling
/// `on_record` for every record (live display, progress).
pub async fn replay(
    source: Arc<dyn FrameSource>,
    target: &Target,
    flags: &SessionFlags,
    pacing: Pacing,
    out: Option<&Path>,
    resume: bool,
    mut on_record: impl FnMut(&FrameRecord) + Send,
) -> Result<ReplayTally> {
    let started = Instant::now();
    // A `.csv` output gets CSV rows (caution and model identity in comment lines at the top); anything else
    // JSON Lines.
    let csv = out.is_some_and(|p| p.extension().is_some_and(|e| e.eq_ignore_ascii_case("csv")));
    if csv && resume {
        bail!("--resume needs a JSON Lines output (.jsonl); CSV output cannot be resumed");
    }
    let csv_classes = std::sync::atomic::AtomicUsize::new(0);
    let (done, old_header) = match (out, resume) {
        (Some(path), true) => existing_output(path)?,
        _ => (HashSet::new(), None),
    };
    let mut writer: Box<dyn Write + Send> = match out {
        Some(path) => {
            if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
                std::fs::create_dir_all(dir)
                    .with_context(|| format!("creating {}", dir.display()))?;
            }
            let file = if resume {
                std::fs::OpenOptions::new()
                    .create(true)
                    .append(true)
                    .open(path)
            } else {
                std::fs::File::create(path)
            }
            .with_context(|| format!("opening {}", path.display()))?;
            Box::new(std::io::BufWriter::new(file))
        }
        None => Box::new(std::io::stdout()),
    };
    let mut tally = ReplayTally {
        frames: source.len(),
        kept: done.len(),
        ..Default::default()
    };
    let opening = flags.opening_for(source.yuv_range())?;
    let mut emit = |record: FrameRecord,
                    tally: &mut ReplayTally,
                    writer: &mut Box<dyn Write + Send>|
     -> Result<()> {
        match record.kind.as_str() {
            "result" => tally.results += 1,
            "skipped" => tally.skipped += 1,
            _ => tally.errors += 1,
        }
        on_record(&record);
        if !done.contains(&record.seq) {
            if csv {
                let classes = csv_classes.load(std::sync::atomic::Ordering::Relaxed);
                output::write_csv_row(writer, &record, classes).context("writing the output")?;
            } else {
                output::write_line(writer, &record).context("writing the output")?;
            }
            tally.written += 1;
        }
        Ok(())
    };
    let write_header = |header: &Header, writer: &mut Box<dyn Write + Send>| -> Result<()> {
        if let Some(old) = &old_header {
            // The same model file on the same engine; its self-test figures belong to the host that ran it
            // (a resume may run on another server).
            let model = |m: &ModelInfo| {
                (
                    m.name.clone(),
                    m.version.clone(),
                    m.sha256.clone(),
                    m.engine.clone(),
                )
            };
            if model(&old.model) != model(&header.model) || old.source != header.source {
                bail!(
                    "cannot resume: the output was written with model {} ({}) from {}, not {} ({}) from {}",
                    old.model.name,
                    old.model.sha256,
                    old.source,
                    header.model.name,
                    header.model.sha256,
                    header.source
                );
            }
            return Ok(());
        }
        if csv {
            csv_classes.store(header.classes.len(), std::sync::atomic::Ordering::Relaxed);
            output::write_csv_header(writer, header).context("writing the header")
        } else {
            output::write_line(writer, header).context("writing the header")
        }
    };
    match target {
        Target::Offline { model, engine } => {
            let model = load_offline_model(model.as_deref(), engine)?;
            let plan =
                framewise_server::convert::session_plan(&opening, &model, Default::default())
                    .map_err(|e| anyhow::anyhow!("{e}"))?;
            let mut analyser = Analyser::new(model.clone(), &plan.settings)?;
            let id = model.identity();
            let header = Header {
                kind: "header".into(),
                caution: CAUTION.into(),
                framewise: env!("CARGO_PKG_VERSION").into(),
                model: ModelInfo::from(id),
                classes: model.classes().to_vec(),
                model_caution: model.manifest().caution.clone(),
                source: source.describe(),
                engine_at: "offline".into(),
                settings: settings_json(&framewise_server::convert::wire_settings(&plan, &id.name)),
            };
            write_header(&header, &mut writer)?;
            tally.header = Some(header);
            let pacer = Pacer::start(pacing, source.as_ref());
            for i in 0..source.len() {
                let (name, t_ms, label) = source.meta(i);
                pacer.wait(t_ms).await;
                let mut record = FrameRecord {
                    seq: i as u64,
                    name,
                    t_ms,
                    label,
                    kind: "error".into(),
                    ..Default::default()
                };
                match source.read(i) {
                    Err(e) => record.error = Some(format!("unreadable: {e:#}")),
                    Ok(data) => {
                        let frame = FrameRef {
                            format: data.format,
                            width: data.width,
                            height: data.height,
                            stride: 0,
                            data: &data.data,
                        };
                        // The same time the server's session would use for this frame.
                        match analyser.analyse(&frame, capture_us(t_ms) as f64 / 1000.0) {
                            Ok(outcome) => {
                                record.kind = "result".into();
                                record.raw = outcome.analysed.raw;
                                record.smoothed = outcome.smoothed.smoothed;
                                if let framewise_engine::Decision::Class { index, confidence } =
                                    outcome.smoothed.decision
                                {
                                    record.decision = model.classes().get(index).cloned();
                                    record.confidence = confidence;
                                }
                                record.usable = outcome.smoothed.verdict.usable;
                                record.focus = outcome.analysed.quality.focus;
                                record.clipped = outcome.analysed.quality.dark_share
                                    + outcome.analysed.quality.bright_share;
                                let t = outcome.timings;
                                record.timings_us = Timings {
                                    queue: t.queue_us,
                                    preprocess: t.preprocess_us,
                                    inference: t.inference_us,
                                    filter: t.filter_us,
                                    total: t.total_us,
                                };
                            }
                            Err(e) => record.error = Some(format!("{}: {e}", e.kind())),
                        }
                    }
                }
                emit(record, &mut tally, &mut writer)?;
            }
        }
        Target::Server {
            url,
            token,
            connect,
        } => {
            let mut grpc = client::connect_with(url, connect).await?;
            let session = client::open(&mut grpc, opening.clone(), token.as_deref()).await?;
            let accepted = session.accepted.clone();
            let header = Header {
                kind: "header".into(),
                caution: accepted.caution.clone(),
                framewise: env!("CARGO_PKG_VERSION").into(),
                model: accepted
                    .model
                    .as_ref()
                    .map(ModelInfo::from)
                    .unwrap_or_default(),
                classes: accepted.classes.clone(),
                model_caution: accepted.model_caution.clone(),
                source: source.describe(),
                engine_at: url.clone(),
                settings: accepted
                    .settings
                    .as_ref()
                    .map(settings_json)
                    .unwrap_or_default(),
            };
            write_header(&header, &mut writer)?;
            tally.header = Some(header);
            let sent_at: Arc<Mutex<HashMap<u64, Instant>>> = Arc::new(Mutex::new(HashMap::new()));
            let (local_tx, mut local_rx) = tokio::sync::mpsc::unbounded_channel::<FrameRecord>();
            let sender = {
                let (source, sent_at, frames) = (source.clone(), sent_at.clone(), session.frames);
                tokio::spawn(async move {
                    let pacer = Pacer::start(pacing, source.as_ref());
                    for i in 0..source.len() {
                        let (name, t_ms, label) = source.meta(i);
                        pacer.wait(t_ms).await;
                        let data = match source.read(i) {
                            Ok(d) => d,
                            Err(e) => {
                                let record = FrameRecord {
                                    kind: "error".into(),
                                    seq: i as u64,
                                    name,
                                    t_ms,
                                    label,
                                    error: Some(format!("unreadable: {e:#}")),
                                    ..Default::default()
                                };
                                let _ = local_tx.send(record);
                                continue;
                            }
                        };
                        let frame = pb::Frame {
                            file_slice: None,
                            seq: i as u64,
                            capture_time_us: capture_us(t_ms),
                            format: framewise_server::convert::wire_format(data.format) as i32,
                            width: data.width,
                            height: data.height,
                            stride: 0,
                            data: data.data.into(),
                        };
                        if let Ok(mut m) = sent_at.lock() {
                            m.insert(i as u64, Instant::now());
                        }
                        if !client::send_frame(&frames, frame).await {
                            break;
                        }
                    }
                    // Dropping `frames` half-closes the stream; the server then sends its summary.
                })
            };
            let mut answers = session.answers;
            let mut summary = None;
            loop {
                tokio::select! {
                    biased;
                    Some(local) = local_rx.recv() => emit(local, &mut tally, &mut writer)?,
                    message = answers.message() => {
                        let message = message.map_err(client::status_error)?;
                        match message.and_then(|m| m.item) {
                            Some(pb::session_output::Item::Answer(a)) => {
                                let i = a.seq as usize;
                                if i >= source.len() {
                                    bail!("the server answered frame {} which was never sent", a.seq);
                                }
                                let (name, t_ms, label) = source.meta(i);
                                let mut record = FrameRecord::from_answer(&a, name, t_ms, label);
                                if let Some(at) = sent_at.lock().ok().and_then(|mut m| m.remove(&a.seq)) {
                                    record.round_trip_us = at.elapsed().as_micros() as u64;
                                }
                                emit(record, &mut tally, &mut writer)?;
                            }
                            Some(pb::session_output::Item::Summary(s)) => summary = Some(s),
                            Some(pb::session_output::Item::Accepted(_)) => bail!("the server sent a second SessionAccepted"),
                            None => break,
                        }
                    }
                }
            }
            sender.await.context("the frame sender failed")?;
            while let Ok(local) = local_rx.try_recv() {
                emit(local, &mut tally, &mut writer)?;
            }
            if summary.is_none() {
                return Err(client::ServerFailure(format!(
                    "{url} closed the session without a summary"
                ))
                .into());
            }
        }
    }
    writer.flush().context("flushing the output")?;
    tally.elapsed = started.elapsed();
    let answered = tally.results + tally.skipped + tally.errors;
    if answered != tally.frames {
        bail!(
            "{} of {} frames were answered; frames were lost",
            answered,
            tally.frames
        );
    }
    Ok(tally)
}

/// Recording times are sent shifted by one second, because a capture time of 0 means "none" on the wire.
pub const CAPTURE_OFFSET_US: i64 = 1_000_000;

/// The capture time sent for a frame recorded at `t_ms`.
pub fn capture_us(t_ms: f64) -> i64 {
    (t_ms * 1000.0).round() as i64 + CAPTURE_OFFSET_US
}

/// Settings as JSON for headers.
pub fn settings_json(s: &pb::SessionOpening) -> serde_json::Value {
    let filter = match s.filter.as_ref().and_then(|f| f.kind.as_ref()) {
        Some(pb::filter_settings::Kind::PassThrough(_)) | None => {
            serde_json::json!({"kind": "pass_through"})
        }
        Some(pb::filter_settings::Kind::Exponential(e)) => {
            serde_json::json!({"kind": "exponential", "tau_ms": e.tau_ms})
        }
        Some(pb::filter_settings::Kind::Window(w)) => {
            serde_json::json!({"kind": "window", "frames": w.frames, "span_ms": w.span_ms})
        }
        Some(pb::filter_settings::Kind::Forward(f)) => {
            serde_json::json!({"kind": "forward", "stay": f.stay, "priors": f.priors, "step_ms": f.step_ms})
        }
    };
    serde_json::json!({
        "filter": filter,
        "decision": s.decision.as_ref().map(|d| serde_json::json!({"enter": d.enter, "exit": d.exit, "dwell_ms": d.dwell_ms})),
        "quality": s.quality.as_ref().map(|q| serde_json::json!({"min_focus": q.min_focus, "max_clipped": q.max_clipped})),
        "region": s.region.as_ref().map(|r| serde_json::json!({"x": r.x, "y": r.y, "width": r.width, "height": r.height})),
        "policy": match pb::FramePolicy::try_from(s.policy) {
            Ok(pb::FramePolicy::LatestOnly) => "latest_only",
            _ => "every_frame",
        },
        "deadline_ms": s.deadline_ms,
        "yuv_matrix": match pb::YuvMatrix::try_from(s.yuv_matrix) {
            Ok(pb::YuvMatrix::Bt709) => "bt709",
            _ => "bt601",
        },
        "yuv_range": match pb::YuvRange::try_from(s.yuv_range) {
            Ok(pb::YuvRange::Full) => "full",
            _ => "limited",
        },
    })
}
