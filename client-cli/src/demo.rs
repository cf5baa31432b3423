//! `demo`: the whole path in one command, with nothing to set up. Starts a server in this process on the
//! embedded demo model, generates a synthetic phantom sweep, streams it at its recorded pace while showing
//! the live call, then prints the summary and writes the results and plots.

use std::io::IsTerminal;
use std::path::PathBuf;
use std::sync::Arc;

use anyhow::{Context, Result};
use clap::Args;
use framewise_engine::CAUTION;
use framewise_models_demo::phantom::CLASSES;
use framewise_models_demo::recording::{Recording, RecordingKind};

use crate::output::{self, FrameRecord};
use crate::recording::FrameData;
use crate::replay::{self, FrameSource, Pacing, Target};
use crate::score;
use crate::settings::SessionFlags;

/// The demo's exposure gate: the largest share of clipped pixels a frame may have and still update the filter.
pub const DEMO_MAX_CLIPPED: f64 = 0.3;

/// Options of `demo`.
#[derive(Debug, Clone, Args)]
pub struct DemoArgs {
    /// Length of the synthetic sweep in seconds.
    #[arg(long, default_value_t = 20.0)]
    pub seconds: f64,
    /// Frame rate of the sweep.
    #[arg(long, default_value_t = 30.0)]
    pub fps: f64,
    /// Seed of the sweep.
    #[arg(long, default_value_t = 42)]
    pub seed: u64,
    /// Send frames as fast as answers come back instead of at the recorded pace.
    #[arg(long)]
    pub fast: bool,
    /// Folder for results.jsonl, summary.json and the plots.
    #[arg(long, default_value = "out/demo")]
    pub out: PathBuf,
    /// Session settings.
    #[command(flatten)]
    pub session: SessionFlags,
    /// Engine of the in-process server.
    #[command(flatten)]
    pub engine: crate::settings::EngineFlags,
}

/// The synthetic sweep as a frame source (frames rendered on demand).
pub struct Synthetic {
    recording: Recording,
    description: String,
}

impl Synthetic {
    /// The demo's sweep: `seconds` at `fps`, 640x480, from `seed`.
    pub fn sweep(seconds: f64, fps: f64, seed: u64) -> Self {
        let recording = Recording::plan(RecordingKind::Sweep { seconds, fps }, seed, 640, 480);
        let description =
            format!("synthetic phantom sweep, seed {seed}, {seconds} s at {fps} fps, 640x480");
        Self {
            recording,
            description,
        }
    }
}

impl FrameSource for Synthetic {
    fn len(&self) -> usize {
        self.recording.len()
    }
    fn meta(&self, i: usize) -> (String, f64, Option<String>) {
        let (t, label) = self.recording.meta(i).unwrap_or_default();
        (format!("frame_{i:06}"), t, Some(CLASSES[label].to_string()))
    }
    fn read(&self, i: usize) -> Result<FrameData> {
        let (width, height) = self.recording.size();
        let data = self.recording.render(i).context("no such frame")?;
        Ok(FrameData {
            format: framewise_engine::PixelFormat::Rgb8,
            width,
            height,
            data,
        })
    }
    fn describe(&self) -> String {
        self.description.clone()
    }
}

/// Threads rendering demo frames ahead of the sender: one 640x480 frame takes about 50 ms on one core here,
/// longer than a 30 fps frame interval.
pub const RENDER_THREADS: usize = 2;

/// Frames rendered at most this far ahead of the sender (bounds memory: 60 frames of 640x480 RGB is 55 MB).
pub const RENDER_AHEAD: usize = 60;

/// A frame source whose frames are rendered ahead on background threads, so that the sender can keep the
/// recorded pace.
pub struct Prefetched {
    inner: Arc<Synthetic>,
    state: Arc<(std::sync::Mutex<PrefetchState>, std::sync::Condvar)>,
}

#[derive(Default)]
struct PrefetchState {
    ready: std::collections::BTreeMap<usize, Result<FrameData, String>>,
    /// The next frame the sender will ask for.
    wanted: usize,
    /// The next frame a render thread will take.
    next: usize,
}

impl Prefetched {
    /// Starts `threads` render threads over `source`.
    pub fn start(source: Synthetic, threads: usize) -> Self {
        let inner = Arc::new(source);
        let state = Arc::new((
            std::sync::Mutex::new(PrefetchState::default()),
            std::sync::Condvar::new(),
        ));
        for _ in 0..threads.max(1) {
            let (inner, state) = (inner.clone(), state.clone());
            std::thread::spawn(move || {
                loop {
                    let i = {
                        let (lock, cvar) = &*state;
                        let Ok(mut st) = lock.lock() else { return };
                        while st.next < inner.len() && st.next >= st.wanted + RENDER_AHEAD {
                            st = match cvar.wait(st) {
                                Ok(g) => g,
                                Err(_) => return,
                            };
                        }
                        if st.next >= inner.len() {
                            return;
                        }
                        st.next += 1;
                        st.next - 1
                    };
                    let frame = inner.read(i).map_err(|e| format!("{e:#}"));
                    let (lock, cvar) = &*state;
                    let Ok(mut st) = lock.lock() else { return };
                    st.ready.insert(i, frame);
                    cvar.notify_all();
                }
            });
        }
        Self { inner, state }
    }
}

impl FrameSource for Prefetched {
    fn len(&self) -> usize {
        self.inner.len()
    }
    fn meta(&self, i: usize) -> (String, f64, Option<String>) {
        self.inner.meta(i)
    }
    fn read(&self, i: usize) -> Result<FrameData> {
        let (lock, cvar) = &*self.state;
        let mut st = lock
            .lock()
            .map_err(|_| anyhow::anyhow!("the frame renderer failed"))?;
        st.wanted = st.wanted.max(i + 1);
        cvar.notify_all();
        loop {
            if let Some(frame) = st.ready.remove(&i) {
                return frame.map_err(|e| anyhow::anyhow!(e));
            }
            if i >= st.next && st.next >= self.inner.len() {
                // Never rendered (out of range): render here.
                drop(st);
                return self.inner.read(i);
            }
            if i + 1 < st.wanted {
                // An older frame than the last one asked for (frames are handed out once): render it here.
                drop(st);
                return self.inner.read(i);
            }
            st = cvar
                .wait(st)
                .map_err(|_| anyhow::anyhow!("the frame renderer failed"))?;
        }
    }
    fn describe(&self) -> String {
        self.inner.describe()
    }
}

/// Runs the demo.
pub async fn run(mut args: DemoArgs) -> Result<()> {
    anyhow::ensure!(
        args.seconds > 0.0 && args.seconds <= 600.0,
        "--seconds must be in (0, 600]"
    );
    anyhow::ensure!(
        args.fps > 0.0 && args.fps <= 120.0,
        "--fps must be in (0, 120]"
    );
    // The phantom sweep has glare bursts and exposure dips: the demo turns the exposure gate on unless told
    // otherwise (frames with more than 30% clipped pixels do not update the filter).
    if args.session.max_clipped == 1.0 {
        args.session.max_clipped = DEMO_MAX_CLIPPED;
    }
    eprintln!("framewise demo. {CAUTION}");
    eprintln!(
        "The demo model is a toy trained on an invented bench-top phantom; it is not a medical model."
    );
    let engine = args.engine.options();
    let config = framewise_server::ServerConfig {
        listen: "127.0.0.1:0".parse()?,
        engine: engine.kind,
        onnxruntime_library: engine.onnxruntime_library.clone(),
        inference_threads: engine.threads,
        ..Default::default()
    };
    let server = framewise_server::start(config, None)
        .await
        .context("starting the in-process server")?;
    let url = format!("http://{}", server.addr);
    eprintln!(
        "in-process server on {url}; streaming a {:.0} s synthetic sweep at {:.0} fps",
        args.seconds, args.fps
    );
    let source: Arc<dyn FrameSource> = Arc::new(Prefetched::start(
        Synthetic::sweep(args.seconds, args.fps, args.seed),
        RENDER_THREADS,
    ));
    std::fs::create_dir_all(&args.out)
        .with_context(|| format!("creating {}", args.out.display()))?;
    let results_path = args.out.join("results.jsonl");
    let live = std::io::stderr().is_terminal();
    let total = source.len();
    let pacing = if args.fast {
        Pacing::Fast
    } else {
        Pacing::Speed(1.0)
    };
    let mut shown = 0usize;
    let tally = replay::replay(
        source.clone(),
        &Target::Server {
            url: url.clone(),
            token: None,
            connect: Default::default(),
        },
        &args.session,
        pacing,
        Some(&results_path),
        false,
        |r: &FrameRecord| {
            shown += 1;
            if live && (shown.is_multiple_of(3) || shown == total) {
                eprint!("\r\x1b[2K{}", live_line(r, shown, total));
            }
        },
    )
    .await?;
    if live {
        eprintln!();
    }
    server.stop().await?;
    let records = score::read_results(&results_path)?;
    let report = score::Report::compute(&records.1, &records.0.classes)?;
    println!("{}", output::caution_line());
    println!(
        "model: {} {} (sha256 {}), engine {}, self-test {}",
        records.0.model.name,
        records.0.model.version,
        records.0.model.sha256,
        records.0.model.engine,
        records.0.model.self_test.summary()
    );
    println!(
        "frames: {} sent, {} results, {} skipped, {} errors, in {:.1} s",
        tally.frames,
        tally.results,
        tally.skipped,
        tally.errors,
        tally.elapsed.as_secs_f64()
    );
    println!("{}", report.human());
    std::fs::write(
        args.out.join("summary.json"),
        serde_json::to_string_pretty(&report.json(&records.0))?,
    )
    .context("writing summary.json")?;
    let mut plots = Vec::new();
    for ext in ["svg", "png"] {
        let path = args.out.join(format!("timeline.{ext}"));
        plots.push(crate::plot::timeline(&records.0, &records.1, &path)?);
        let path = args.out.join(format!("reliability.{ext}"));
        plots.push(crate::plot::reliability(&records.0, &report, &path)?);
    }
    let plots: Vec<String> = plots.iter().map(|p| p.display().to_string()).collect();
    println!("results: {}", results_path.display());
    println!("summary: {}", args.out.join("summary.json").display());
    println!("plots:   {}", plots.join(" "));
    Ok(())
}

fn live_line(r: &FrameRecord, n: usize, total: usize) -> String {
    let label = r.label.as_deref().unwrap_or("-");
    let raw = argmax(&r.raw)
        .map(|(i, p)| format!("{} {:.2}", CLASSES.get(i).unwrap_or(&"?"), p))
        .unwrap_or_default();
    let call = match &r.decision {
        Some(c) => format!("{c} {:.2}", r.confidence),
        None => "undetermined".into(),
    };
    format!(
        "[{n:>4}/{total}] t={:>6.2}s  phantom zone: {label:<8} per-frame: {raw:<13} call: {call:<16} {:>5.1} ms",
        r.t_ms / 1000.0,
        r.round_trip_us as f64 / 1000.0
    )
}

/// Index and value of the largest probability (the first on ties).
pub fn argmax(p: &[f32]) -> Option<(usize, f32)> {
    framewise_engine::scoring::argmax(p).map(|i| (i, p[i]))
}
