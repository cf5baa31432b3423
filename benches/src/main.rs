//! `framewise-benchmarks`: the measurements behind BENCHMARKS.md, one command each.
//!
//! - `inference`: bare inference per frame on the demo model and the MobileNetV2-shaped network, for tract,
//!   the ONNX Runtime engine and Python onnxruntime (the reference), with 1 and 2 threads.
//! - `preprocess` (`preprocess.rs`): one frame to the 224x224 input tensor, per pixel format, frame size and
//!   resize recipe.
//! - `transport`: the floor under moving a frame, bare TCP loopback and Unix-socket round trips and a copy.
//! - `overhead`: end-to-end time through a loopback server (one session, every frame) minus the inference
//!   time the server reports, for 224x224 RGB and 1920x1080 NV12 frames; before each row the same frames go
//!   to the transport's floor (`floor.rs`), a server on the same wire that answers at once, so that what
//!   framewise adds above gRPC, HTTP/2 and the connection can be read apart.
//! - `ops`: where an inference's time goes on the MobileNetV2-shaped network, by kind of layer, for tract
//!   (its plan timed node by node) and Python onnxruntime (its own profiler).
//! - `throughput`: the bare engine's frames per second (with `--rate`, fed open loop at a fixed rate).
//!
//! Saturation and the Python peer are measured by `benches/saturation.py` with `framewise bench`.
//!
//! Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
//! confirmed by a qualified clinician; check local regulations before any clinical use.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use clap::{Parser, Subcommand};
use framewise_engine::frame::encode_from_rgb;
use framewise_engine::{CAUTION, EngineKind, EngineOptions, Model, ModelPackage, PixelFormat};
use framewise_models_demo::phantom::{Drum, random_view};
use framewise_models_demo::rng::SplitMix64;
use framewise_proto::v1 as pb;
use serde_json::json;

mod floor;
mod preprocess;

#[derive(Parser)]
#[command(about = "framewise benchmarks (numbers for BENCHMARKS.md)")]
struct Args {
    #[command(subcommand)]
    command: Bench,
    /// Also write the figures as JSON here.
    #[arg(long, global = true)]
    json: Option<PathBuf>,
}

#[derive(Subcommand)]
enum Bench {
    /// Bare inference per frame: tract, the ONNX Runtime engine and Python onnxruntime.
    Inference {
        /// Frames timed per configuration on the MobileNetV2-shaped network (ten times as many on the demo
        /// model).
        #[arg(long, default_value_t = 300)]
        frames: usize,
    },
    /// One frame to the input tensor per pixel format, size and resize recipe.
    Preprocess {
        /// Frames timed per configuration.
        #[arg(long, default_value_t = 60)]
        frames: usize,
        /// Frame sizes, WIDTHxHEIGHT, comma-separated.
        #[arg(
            long,
            value_delimiter = ',',
            default_value = "640x480,1280x720,1920x1080"
        )]
        sizes: Vec<String>,
        /// Pixel formats (raw ones), comma-separated; all when not given.
        #[arg(long, value_delimiter = ',')]
        formats: Vec<String>,
    },
    /// Bare throughput: `workers` threads running single frames on one shared model, as the server's workers do.
    Throughput {
        /// tract or onnxruntime.
        #[arg(long)]
        engine: EngineKind,
        /// Threads running inferences at once.
        #[arg(long, default_value_t = 2)]
        workers: usize,
        /// Seconds to run.
        #[arg(long, default_value_t = 5.0)]
        seconds: f64,
        /// Model package (default: the MobileNetV2-shaped network).
        #[arg(long)]
        model: Option<PathBuf>,
        /// Idle this long after each inference (ms): how fast an inference is when the core has rested
        /// between frames, as it does in a server fed at a frame rate.
        #[arg(long, default_value_t = 0.0)]
        pause_ms: f64,
        /// Open loop: frames are due at this total rate (frames per second) and taken in order by the
        /// workers, as a server's queue would hold them; latency is counted from each frame's due time, so
        /// its p99 can be held to the same limit as a server's at saturation.
        #[arg(long)]
        rate: Option<f64>,
    },
    /// Service overhead: end-to-end through a loopback server minus the reported inference time, beside the
    /// round trip of a server on the same wire that answers each frame at once (the transport's floor).
    Overhead {
        /// Frames per configuration.
        #[arg(long, default_value_t = 300)]
        frames: usize,
        /// Only these engines (tract, onnxruntime), comma-separated; both when not given.
        #[arg(long, value_delimiter = ',')]
        engines: Vec<EngineKind>,
        /// Only these frames: rgb224 (224x224 RGB), nv12-1080 (1920x1080 NV12); both when not given.
        #[arg(long, value_delimiter = ',')]
        kinds: Vec<String>,
        /// Only these connections: tcp, unix, file (Unix socket and frame file); all when not given.
        #[arg(long, value_delimiter = ',')]
        connections: Vec<String>,
        /// The server's `cpu_wake_latency_us`: hold idle CPUs' wake-up time to this many microseconds
        /// during the run (0: keep them polling; needs write access to /dev/cpu_dma_latency).
        #[arg(long)]
        cpu_wake_latency_us: Option<u32>,
        /// The transport's floor answers each frame after this pause (ms) instead of at once, its threads
        /// idle meanwhile as while an inference runs; the pause is subtracted like an inference.
        #[arg(long, default_value_t = 0.0)]
        floor_pause_ms: f64,
    },
    /// Where an inference's time goes, by kind of layer: tract's plan timed node by node beside Python
    /// onnxruntime's profiler, one thread each, on the MobileNetV2-shaped network.
    Ops {
        /// Frames timed per runtime.
        #[arg(long, default_value_t = 100)]
        frames: usize,
    },
    /// The floor under moving a frame: a round trip of `bytes` over bare TCP loopback and a bare Unix socket
    /// (plain blocking sockets, one byte back; no gRPC, no HTTP/2), and one memory copy of that size.
    Transport {
        /// Bytes per round trip (default: a 1920x1080 NV12 frame).
        #[arg(long, value_delimiter = ',', default_value = "150528,3110400")]
        bytes: Vec<usize>,
        /// Round trips per row.
        #[arg(long, default_value_t = 200)]
        trips: usize,
    },
}

fn main() {
    if let Err(e) = run() {
        eprintln!("framewise-benchmarks: {e:#}");
        std::process::exit(1);
    }
}

fn run() -> Result<()> {
    let args = Args::parse();
    eprintln!("{CAUTION}");
    let figures = match args.command {
        Bench::Inference { frames } => inference(frames)?,
        Bench::Preprocess {
            frames,
            sizes,
            formats,
        } => preprocess::run(frames, &sizes, &formats)?,
        Bench::Throughput {
            engine: kind,
            workers,
            seconds,
            model,
            pause_ms,
            rate,
        } => match rate {
            Some(rate) => open_loop(kind, workers, seconds, model, rate)?,
            None => throughput(kind, workers, seconds, model, pause_ms)?,
        },
        Bench::Transport { bytes, trips } => transport(&bytes, trips)?,
        Bench::Ops { frames } => ops(frames)?,
        Bench::Overhead {
            frames,
            engines,
            kinds,
            connections,
            cpu_wake_latency_us,
            floor_pause_ms,
        } => {
            let runtime = tokio::runtime::Builder::new_multi_thread()
                .worker_threads(2)
                .enable_all()
                .build()?;
            runtime.block_on(overhead(
                frames,
                &engines,
                &kinds,
                &connections,
                cpu_wake_latency_us,
                floor_pause_ms,
            ))?
        }
    };
    if let Some(path) = args.json {
        let doc = json!({"caution": CAUTION, "machine": machine(), "figures": figures});
        std::fs::write(&path, serde_json::to_string_pretty(&doc)?)
            .with_context(|| format!("writing {}", path.display()))?;
    }
    Ok(())
}

/// The machine, as BENCHMARKS.md states it.
fn machine() -> serde_json::Value {
    let cpu = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|t| {
            t.lines()
                .find(|l| l.starts_with("model name"))
                .and_then(|l| l.split(':').nth(1))
                .map(|s| s.trim().to_string())
        })
        .unwrap_or_default();
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    json!({"cpu": cpu, "cores": cores})
}

/// Median and 99th percentile (nearest rank) of millisecond samples.
pub(crate) fn summary(mut ms: Vec<f64>) -> (f64, f64) {
    ms.sort_by(f64::total_cmp);
    if ms.is_empty() {
        return (0.0, 0.0);
    }
    let rank = ((0.99 * ms.len() as f64).ceil() as usize).clamp(1, ms.len());
    (ms[ms.len() / 2], ms[rank - 1])
}

fn demo_package() -> Result<ModelPackage> {
    Ok(framewise_models_demo::package::demo_package()?)
}

/// The MobileNetV2-shaped network (made by models-demo/scripts/make_bench_model.py with the reference
/// fixtures) and its directory.
pub(crate) fn bench_package() -> Result<(ModelPackage, PathBuf)> {
    let dir = framewise_tests::fixtures().join("bench-model");
    Ok((ModelPackage::read(&dir)?, dir))
}

fn engine(kind: EngineKind, threads: usize) -> EngineOptions {
    EngineOptions {
        kind,
        onnxruntime_library: (kind != EngineKind::Tract).then(framewise_tests::onnxruntime_library),
        threads,
        ..EngineOptions::default()
    }
}

fn time_model(model: &Model, frames: usize) -> Result<(f64, f64)> {
    let mut rng = SplitMix64::new(3);
    let inputs: Vec<Vec<f32>> = (0..8)
        .map(|_| {
            (0..model.input_len())
                .map(|_| rng.below(1000) as f32 / 1000.0)
                .collect()
        })
        .collect();
    for input in inputs.iter().cycle().take(20) {
        model.infer(input)?;
    }
    let mut ms = Vec::with_capacity(frames);
    for input in inputs.iter().cycle().take(frames) {
        let t = Instant::now();
        model.infer(input)?;
        ms.push(t.elapsed().as_secs_f64() * 1000.0);
    }
    Ok(summary(ms))
}

/// Runs one of the Python helpers in `benches/` with the reference venv's interpreter on a model, and reads
/// the JSON it prints.
fn python_helper(script: &str, onnx: &Path, args: &[&str]) -> Result<serde_json::Value> {
    let path = framewise_tests::workspace_root()
        .join("benches")
        .join(script);
    let out = Command::new(framewise_tests::python())
        .arg(&path)
        .args(["--model".as_ref(), onnx.as_os_str()])
        .args(args)
        .output()
        .with_context(|| format!("running benches/{script}"))?;
    if !out.status.success() {
        bail!("{script} failed: {}", String::from_utf8_lossy(&out.stderr));
    }
    Ok(serde_json::from_slice(&out.stdout)?)
}

fn python_reference(onnx: &Path, threads: usize, frames: usize) -> Result<(f64, f64)> {
    let v = python_helper(
        "reference_inference.py",
        onnx,
        &[
            "--threads",
            &threads.to_string(),
            "--frames",
            &frames.to_string(),
        ],
    )?;
    Ok((
        v["median_ms"].as_f64().unwrap_or(f64::NAN),
        v["p99_ms"].as_f64().unwrap_or(f64::NAN),
    ))
}

/// The kind of layer an optimised graph's node belongs to: that of the longest ONNX node or tensor name the
/// node's name starts with (followed by anything but a letter or digit, so that `conv_1` is not taken for
/// `conv_12`), or `unmatched` when none does.
fn layer_kind<'a>(
    node: &str,
    kinds: &'a serde_json::Map<String, serde_json::Value>,
    unmatched: &'a str,
) -> &'a str {
    kinds
        .iter()
        .filter(|(name, _)| {
            node.strip_prefix(name.as_str())
                .is_some_and(|rest| !rest.starts_with(|c: char| c.is_ascii_alphanumeric()))
        })
        .max_by_key(|(name, _)| name.len())
        .and_then(|(_, kind)| kind.as_str())
        .unwrap_or(unmatched)
}

fn ops(frames: usize) -> Result<serde_json::Value> {
    let (bench, bench_dir) = bench_package()?;
    let onnx = bench_dir.join(&bench.manifest.file);
    let reference = python_helper(
        "reference_ops.py",
        &onnx,
        &["--frames", &frames.to_string()],
    )?;
    let empty = serde_json::Map::new();
    let kinds = reference["layer_kinds"].as_object().unwrap_or(&empty);
    let ort_nodes = reference["nodes"].as_object().unwrap_or(&empty);

    let model = Model::load_with(&bench, None, &engine(EngineKind::Tract, 1))?;
    let mut rng = SplitMix64::new(3);
    let input: Vec<f32> = (0..model.input_len())
        .map(|_| rng.below(1000) as f32 / 1000.0)
        .collect();
    for _ in 0..5 {
        model.infer(&input)?;
    }
    let tract_nodes = model
        .node_times(&input, frames)?
        .context("tract gave no node times")?;

    // kind -> (onnxruntime µs, its nodes, tract µs, its nodes), in the order kinds first appear.
    type Row = (String, f64, usize, f64, usize);
    fn row<'t>(table: &'t mut Vec<Row>, kind: &str) -> &'t mut Row {
        let i = match table.iter().position(|r| r.0 == kind) {
            Some(i) => i,
            None => {
                table.push((kind.to_string(), 0.0, 0, 0.0, 0));
                table.len() - 1
            }
        };
        &mut table[i]
    }
    const OWN: &str = "the runtime's own nodes (layout changes)";
    let mut table: Vec<Row> = Vec::new();
    let mut ort_ops = std::collections::BTreeMap::<String, f64>::new();
    for (name, node) in ort_nodes {
        let us = node["us"].as_f64().unwrap_or(0.0);
        let r = row(&mut table, layer_kind(name, kinds, OWN));
        r.1 += us;
        r.2 += 1;
        *ort_ops
            .entry(node["op"].as_str().unwrap_or("?").to_string())
            .or_default() += us;
    }
    let mut tract_ops = std::collections::BTreeMap::<String, f64>::new();
    for node in &tract_nodes {
        let r = row(&mut table, layer_kind(&node.name, kinds, OWN));
        r.3 += node.micros;
        r.4 += 1;
        *tract_ops.entry(node.op.clone()).or_default() += node.micros;
    }
    let (ort_total, tract_total) = table
        .iter()
        .fold((0.0, 0.0), |(a, b), r| (a + r.1, b + r.3));
    println!(
        "| kind of layer | Python onnxruntime ms | its nodes | tract ms | its nodes | tract / onnxruntime | share of tract's time |"
    );
    println!("|---|---|---|---|---|---|---|");
    let mut rows = Vec::new();
    for (kind, ort_us, ort_n, tract_us, tract_n) in &table {
        let ratio = if *ort_us > 0.0 {
            format!("{:.2}", tract_us / ort_us)
        } else {
            "-".into()
        };
        println!(
            "| {kind} | {:.3} | {ort_n} | {:.3} | {tract_n} | {ratio} | {:.0} % |",
            ort_us / 1000.0,
            tract_us / 1000.0,
            100.0 * tract_us / tract_total.max(f64::MIN_POSITIVE)
        );
        rows.push(
            json!({"kind": kind, "onnxruntime_ms": ort_us / 1000.0, "onnxruntime_nodes": ort_n,
            "tract_ms": tract_us / 1000.0, "tract_nodes": tract_n}),
        );
    }
    println!(
        "| all nodes | {:.3} | {} | {:.3} | {} | {:.2} | 100 % |",
        ort_total / 1000.0,
        ort_nodes.len(),
        tract_total / 1000.0,
        tract_nodes.len(),
        tract_total / ort_total.max(f64::MIN_POSITIVE)
    );
    let by_op = |ops: &std::collections::BTreeMap<String, f64>| {
        let mut v: Vec<_> = ops.iter().collect();
        v.sort_by(|a, b| b.1.total_cmp(a.1));
        v.iter()
            .map(|(op, us)| format!("{op} {:.3} ms", *us / 1000.0))
            .collect::<Vec<_>>()
            .join(", ")
    };
    println!();
    println!("Operators, Python onnxruntime: {}", by_op(&ort_ops));
    println!("Operators, tract: {}", by_op(&tract_ops));
    Ok(
        json!({"ops": {"frames": frames, "reference": reference["engine"], "kinds": rows,
        "onnxruntime_operators_ms": ort_ops.iter().map(|(k, v)| (k.clone(), v / 1000.0)).collect::<std::collections::BTreeMap<_, _>>(),
        "tract_operators_ms": tract_ops.iter().map(|(k, v)| (k.clone(), v / 1000.0)).collect::<std::collections::BTreeMap<_, _>>(),
        "tract_nodes": tract_nodes.iter().map(|n| json!({"name": n.name, "op": n.op, "ms": n.micros / 1000.0})).collect::<Vec<_>>()}}),
    )
}

fn inference(frames: usize) -> Result<serde_json::Value> {
    let scratch = framewise_tests::workspace_root().join("target/bench-scratch");
    std::fs::create_dir_all(&scratch)?;
    let demo = demo_package()?;
    let demo_onnx = scratch.join("phantom-zones.onnx");
    std::fs::write(&demo_onnx, &demo.onnx[..])?;
    let (bench, bench_dir) = bench_package()?;
    let bench_onnx = bench_dir.join(&bench.manifest.file);
    let mut rows = Vec::new();
    println!("| model | threads | engine | median ms | p99 ms | median / reference |");
    println!("|---|---|---|---|---|---|");
    for (name, package, onnx, n) in [
        ("demo 96x96 CNN", &demo, &demo_onnx, frames * 10),
        ("MobileNetV2-shaped 224x224", &bench, &bench_onnx, frames),
    ] {
        for threads in [1, 2] {
            let (ref_med, ref_p99) = python_reference(onnx, threads, n)?;
            println!(
                "| {name} | {threads} | Python onnxruntime (reference) | {ref_med:.3} | {ref_p99:.3} | 1.00 |"
            );
            rows.push(
                json!({"model": name, "threads": threads, "engine": "python-onnxruntime",
                "median_ms": ref_med, "p99_ms": ref_p99}),
            );
            for kind in [EngineKind::OnnxRuntime, EngineKind::Tract] {
                let model = Model::load_with(package, None, &engine(kind, threads))?;
                let (med, p99) = time_model(&model, n)?;
                println!(
                    "| {name} | {threads} | framewise {kind} | {med:.3} | {p99:.3} | {:.2} |",
                    med / ref_med
                );
                rows.push(
                    json!({"model": name, "threads": threads, "engine": kind.to_string(),
                    "median_ms": med, "p99_ms": p99, "ratio": med / ref_med}),
                );
            }
        }
    }
    Ok(json!({"inference": rows}))
}

/// The bare benches' model (the given package, or the MobileNetV2-shaped network) on one engine with one
/// thread, and a fixed input tensor for it.
fn bare_model(kind: EngineKind, package: Option<PathBuf>) -> Result<(Model, Vec<f32>)> {
    let bench = match package {
        Some(dir) => ModelPackage::read(&dir)?,
        None => bench_package()?.0,
    };
    let model = Model::load_with(&bench, None, &engine(kind, 1))?;
    let input: Vec<f32> = (0..model.input_len())
        .map(|i| (i % 255) as f32 / 255.0)
        .collect();
    Ok((model, input))
}

fn throughput(
    kind: EngineKind,
    workers: usize,
    seconds: f64,
    model: Option<PathBuf>,
    pause_ms: f64,
) -> Result<serde_json::Value> {
    let (model, input) = bare_model(kind, model)?;
    let stop = Instant::now() + Duration::from_secs_f64(seconds);
    let start = Instant::now();
    let pause = Duration::from_secs_f64(pause_ms.max(0.0) / 1000.0);
    let times: Vec<f64> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..workers.max(1))
            .map(|_| {
                scope.spawn(|| {
                    let mut times = Vec::new();
                    while Instant::now() < stop {
                        let t = Instant::now();
                        if model.infer(&input).is_ok() {
                            times.push(t.elapsed().as_secs_f64() * 1000.0);
                        }
                        if !pause.is_zero() {
                            std::thread::sleep(pause);
                        }
                    }
                    times
                })
            })
            .collect();
        handles
            .into_iter()
            .flat_map(|h| h.join().unwrap_or_default())
            .collect()
    });
    let fps = times.len() as f64 / start.elapsed().as_secs_f64();
    let (median, p99) = summary(times);
    let figures = json!({"engine": kind.to_string(), "workers": workers, "pause_ms": pause_ms,
        "frames_per_second": fps, "inference_median_ms": median, "inference_p99_ms": p99});
    println!("{figures}");
    Ok(json!({ "throughput": figures }))
}

/// The bare engine fed at a fixed rate: frame i is due at i / rate seconds, the workers take frames in order
/// (waiting for a frame that is not yet due), and each frame's latency runs from its due time to the end of
/// its inference, queueing included.
fn open_loop(
    kind: EngineKind,
    workers: usize,
    seconds: f64,
    model: Option<PathBuf>,
    rate: f64,
) -> Result<serde_json::Value> {
    if !(rate.is_finite() && rate > 0.0) {
        bail!("--rate {rate}: expected a positive number of frames per second");
    }
    let (model, input) = bare_model(kind, model)?;
    for _ in 0..5 {
        model.infer(&input)?;
    }
    let next = std::sync::atomic::AtomicU64::new(0);
    let start = Instant::now();
    let window = Duration::from_secs_f64(seconds);
    let latencies: Vec<f64> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..workers.max(1))
            .map(|_| {
                scope.spawn(|| {
                    let mut latencies = Vec::new();
                    loop {
                        let i = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        let due = Duration::from_secs_f64(i as f64 / rate);
                        if due >= window {
                            break;
                        }
                        if let Some(wait) = due.checked_sub(start.elapsed()) {
                            std::thread::sleep(wait);
                        }
                        if model.infer(&input).is_ok() {
                            let done = start.elapsed();
                            latencies.push(done.saturating_sub(due).as_secs_f64() * 1000.0);
                        }
                    }
                    latencies
                })
            })
            .collect();
        handles
            .into_iter()
            .flat_map(|h| h.join().unwrap_or_default())
            .collect()
    });
    let scheduled = (rate * seconds).ceil();
    let answered = latencies.len();
    let achieved = answered as f64 / start.elapsed().as_secs_f64();
    let (p50, p99) = summary(latencies);
    let figures = json!({"engine": kind.to_string(), "workers": workers, "rate": rate,
        "scheduled": scheduled, "answered": answered, "achieved_fps": achieved,
        "latency_p50_ms": p50, "latency_p99_ms": p99});
    println!("{figures}");
    Ok(json!({ "open_loop": figures }))
}

/// Synthetic frames (invented phantom views) in a format and size.
pub(crate) fn frames_of(
    format: PixelFormat,
    width: u32,
    height: u32,
    count: usize,
) -> Result<Vec<Vec<u8>>> {
    let mut rng = SplitMix64::new(11);
    let drum = Drum::random(8, &mut rng);
    (0..count)
        .map(|_| {
            let rgb = drum.render(&random_view(&drum, &mut rng), width, height);
            encode_from_rgb(&rgb, width, height, format).map_err(|e| anyhow::anyhow!("{e}"))
        })
        .collect()
}

/// Round trips of `n` bytes over a connected pair of blocking sockets, with a pause between them as between
/// frames; the peer reads the whole message and answers one byte.
fn round_trips<S: std::io::Read + std::io::Write + Send + 'static>(
    mut client: S,
    mut server: S,
    n: usize,
    trips: usize,
) -> Result<Vec<f64>> {
    let peer = std::thread::spawn(move || -> std::io::Result<()> {
        let mut buf = vec![0u8; n];
        for _ in 0..trips {
            server.read_exact(&mut buf)?;
            server.write_all(&[1])?;
        }
        Ok(())
    });
    let data = vec![7u8; n];
    let mut out = Vec::with_capacity(trips);
    for _ in 0..trips {
        let t = Instant::now();
        client.write_all(&data)?;
        client.read_exact(&mut [0u8; 1])?;
        out.push(t.elapsed().as_secs_f64() * 1000.0);
        std::thread::sleep(Duration::from_millis(20));
    }
    peer.join()
        .map_err(|_| anyhow::anyhow!("the peer thread panicked"))??;
    Ok(out)
}

fn transport(sizes: &[usize], trips: usize) -> Result<serde_json::Value> {
    let mut rows = Vec::new();
    println!(
        "| bytes | bare TCP loopback round trip p50 ms | p99 ms | bare Unix socket round trip p50 ms | p99 ms | one memory copy p50 ms |"
    );
    println!("|---|---|---|---|---|---|");
    for &n in sizes {
        let listener = std::net::TcpListener::bind("127.0.0.1:0")?;
        let client = std::net::TcpStream::connect(listener.local_addr()?)?;
        let (server, _) = listener.accept()?;
        client.set_nodelay(true)?;
        server.set_nodelay(true)?;
        let (tcp50, tcp99) = summary(round_trips(client, server, n, trips)?);
        let (a, b) = std::os::unix::net::UnixStream::pair()?;
        let (unix50, unix99) = summary(round_trips(a, b, n, trips)?);
        let (src, mut dst) = (vec![7u8; n], vec![0u8; n]);
        let mut copies = Vec::with_capacity(trips);
        for _ in 0..trips {
            let t = Instant::now();
            dst.copy_from_slice(std::hint::black_box(&src));
            std::hint::black_box(&dst);
            copies.push(t.elapsed().as_secs_f64() * 1000.0);
            std::thread::sleep(Duration::from_millis(20));
        }
        let (copy50, _) = summary(copies);
        println!("| {n} | {tcp50:.3} | {tcp99:.3} | {unix50:.3} | {unix99:.3} | {copy50:.3} |");
        rows.push(json!({"bytes": n, "tcp_p50_ms": tcp50, "tcp_p99_ms": tcp99,
            "unix_p50_ms": unix50, "unix_p99_ms": unix99, "copy_p50_ms": copy50}));
    }
    Ok(json!({"transport": rows}))
}

async fn overhead(
    frames: usize,
    engines: &[EngineKind],
    kinds: &[String],
    connections: &[String],
    cpu_wake_latency_us: Option<u32>,
    floor_pause_ms: f64,
) -> Result<serde_json::Value> {
    for k in kinds {
        if !["rgb224", "nv12-1080"].contains(&k.as_str()) {
            bail!("--kinds {k}: expected rgb224 or nv12-1080");
        }
    }
    for c in connections {
        if !["tcp", "unix", "file"].contains(&c.as_str()) {
            bail!("--connections {c}: expected tcp, unix or file");
        }
    }
    if !(0.0..=1000.0).contains(&floor_pause_ms) {
        bail!("--floor-pause-ms {floor_pause_ms}: expected 0 to 1000");
    }
    let chosen = |list: &[String], name: &str| list.is_empty() || list.iter().any(|l| l == name);
    let (bench, bench_dir) = bench_package()?;
    let socket =
        std::env::temp_dir().join(format!("framewise-overhead-{}.sock", std::process::id()));
    // Frame files on a memory file system where there is one, as a capture process would place them.
    let shm = std::path::Path::new("/dev/shm");
    let frames_dir = if shm.is_dir() {
        shm.to_path_buf()
    } else {
        std::env::temp_dir()
    };
    // The transport's floor, on the same runtime, measured just before each row with the same frames.
    let floor_socket =
        std::env::temp_dir().join(format!("framewise-floor-{}.sock", std::process::id()));
    let floor = floor::FloorServer::start(
        &floor_socket,
        bench.manifest.classes.len(),
        Duration::from_secs_f64(floor_pause_ms / 1000.0),
    )
    .await?;
    let (floor_tcp, floor_unix) = (
        format!("http://{}", floor.addr),
        format!("unix:{}", floor_socket.display()),
    );
    let mut rows = Vec::new();
    println!(
        "| engine | frames | connection | round trip p50 ms | inference p50 ms | overhead p50 ms | overhead p99 ms | of which preprocessing p50 | of which hand-over to a worker p50 | of which the rest in the server p50 | of which transport (outside the server) p50 | transport floor p50 ms (round trip less its pause) | overhead above the floor p50 ms |"
    );
    println!("|---|---|---|---|---|---|---|---|---|---|---|---|---|");
    for kind in [EngineKind::OnnxRuntime, EngineKind::Tract] {
        if !engines.is_empty() && !engines.contains(&kind) {
            continue;
        }
        let options = engine(kind, 1);
        let config = framewise_server::ServerConfig {
            listen: "127.0.0.1:0".parse()?,
            listen_unix: Some(socket.clone()),
            shared_frames_dir: Some(frames_dir.clone()),
            demo_model: false,
            models: vec![framewise_server::config::ModelEntry {
                path: bench_dir.clone(),
                sha256: None,
                engine: None,
            }],
            engine: kind,
            onnxruntime_library: options.onnxruntime_library.clone(),
            cpu_wake_latency_us,
            ..Default::default()
        };
        let server = framewise_server::start(config, None).await?;
        let unix = format!("unix:{}", socket.display());
        // (short name, name, framewise's address, the floor's address, frames by file)
        let all = [
            (
                "tcp",
                "tcp loopback",
                format!("http://{}", server.addr),
                &floor_tcp,
                false,
            ),
            ("unix", "unix socket", unix.clone(), &floor_unix, false),
            ("file", "unix socket + frame file", unix, &floor_unix, true),
        ];
        let connections: Vec<_> = all
            .into_iter()
            .filter(|(short, ..)| chosen(connections, short))
            .map(|(_, name, url, floor_url, by_file)| (name, url, floor_url, by_file))
            .collect();
        for (short, format, w, h) in [
            ("rgb224", PixelFormat::Rgb8, 224u32, 224u32),
            ("nv12-1080", PixelFormat::Nv12, 1920, 1080),
        ] {
            if !chosen(kinds, short) {
                continue;
            }
            let data: Vec<prost::bytes::Bytes> = frames_of(format, w, h, 4)?
                .into_iter()
                .map(Into::into)
                .collect();
            for (connection, url, floor_url, by_file) in &connections {
                let mut file = match by_file {
                    true => Some(framewise_cli::client::FrameFile::create(
                        &frames_dir,
                        2,
                        data[0].len() as u64,
                    )?),
                    false => None,
                };
                // The floor's round trip less its pause (zero unless --floor-pause-ms).
                let floor_trips: Vec<f64> =
                    one_session(floor_url, format, w, h, &data, frames, file.as_mut())
                        .await?
                        .iter()
                        .map(|s| s.round_trip - s.inference)
                        .collect();
                let (floor50, _) = summary(floor_trips);
                let samples = one_session(url, format, w, h, &data, frames, file.as_mut()).await?;
                let of = |f: fn(&Sample) -> f64| summary(samples.iter().map(f).collect());
                let ((rtt50, _), (inf50, _), (o50, o99)) = (
                    of(|s| s.round_trip),
                    of(|s| s.inference),
                    of(|s| s.round_trip - s.inference),
                );
                let ((pre50, _), (queue50, _)) = (of(|s| s.preprocess), of(|s| s.queue));
                // The rest in the server: the session's own work (answer, filter, bookkeeping) and the
                // hand-back from the worker, everything between arrival and hand-off not timed as a stage.
                let (rest50, _) = of(|s| s.total - s.queue - s.preprocess - s.inference);
                let (out50, _) = of(|s| s.round_trip - s.total);
                let above = o50 - floor50;
                println!(
                    "| {kind} | {format} {w}x{h} | {connection} | {rtt50:.3} | {inf50:.3} | {o50:.3} | {o99:.3} | {pre50:.3} | {queue50:.3} | {rest50:.3} | {out50:.3} | {floor50:.3} | {above:.3} |"
                );
                rows.push(
                    json!({"engine": kind.to_string(), "format": format.to_string(), "width": w,
                    "height": h, "connection": connection, "round_trip_p50_ms": rtt50,
                    "inference_p50_ms": inf50, "overhead_p50_ms": o50, "overhead_p99_ms": o99,
                    "preprocess_p50_ms": pre50, "queue_p50_ms": queue50,
                    "rest_in_server_p50_ms": rest50, "outside_server_p50_ms": out50,
                    "floor_round_trip_p50_ms": floor50, "above_floor_p50_ms": above}),
                );
            }
        }
        server.stop().await?;
    }
    floor.stop().await?;
    Ok(
        json!({"overhead": rows, "cpu_wake_latency_us": cpu_wake_latency_us, "floor_pause_ms": floor_pause_ms}),
    )
}

/// One frame's times in ms: the client's round trip and the stage timings the server reported.
struct Sample {
    round_trip: f64,
    inference: f64,
    preprocess: f64,
    queue: f64,
    total: f64,
}

/// One every-frame session: each frame is sent when the previous answer is back, then a pause to the next
/// 33 ms tick, so no frame queues behind another. With a frame file, each frame is written into it and sent
/// as a file slice (the writing counts in the round trip). Returns one sample per frame after warm-up.
async fn one_session(
    url: &str,
    format: PixelFormat,
    w: u32,
    h: u32,
    data: &[prost::bytes::Bytes],
    frames: usize,
    mut frame_file: Option<&mut framewise_cli::client::FrameFile>,
) -> Result<Vec<Sample>> {
    // The client's own connection code (TCP or Unix socket, the same HTTP/2 windows as the CLI).
    let mut client = framewise_cli::client::connect(url).await?;
    let (tx, rx) = tokio::sync::mpsc::channel(2);
    tx.send(pb::SessionInput {
        item: Some(pb::session_input::Item::Opening(pb::SessionOpening {
            policy: pb::FramePolicy::EveryFrame as i32,
            frame_file: frame_file
                .as_ref()
                .map(|f| f.name().to_string())
                .unwrap_or_default(),
            ..Default::default()
        })),
    })
    .await?;
    let mut answers = client
        .run_session(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await?
        .into_inner();
    answers.message().await?.context("no SessionAccepted")?;
    let mut out = Vec::with_capacity(frames);
    let start = Instant::now();
    for i in 0..frames + 10 {
        let pixels = &data[i % data.len()];
        let sent = Instant::now();
        let (data, file_slice) = match frame_file.as_deref_mut() {
            Some(file) => (Default::default(), Some(file.put(pixels)?)),
            None => (pixels.clone(), None),
        };
        let frame = pb::Frame {
            file_slice,
            seq: i as u64,
            capture_time_us: 0,
            format: framewise_server::convert::wire_format(format) as i32,
            width: w,
            height: h,
            stride: 0,
            data,
        };
        tx.send(pb::SessionInput {
            item: Some(pb::session_input::Item::Frame(frame)),
        })
        .await?;
        let answer = answers.message().await?.context("stream ended")?;
        let rtt = sent.elapsed().as_secs_f64() * 1000.0;
        let Some(pb::session_output::Item::Answer(a)) = answer.item else {
            bail!("expected an answer")
        };
        let Some(pb::answer::Outcome::Result(r)) = a.outcome else {
            bail!("frame {i} was not analysed: {:?}", a.outcome)
        };
        let t = r.timings.unwrap_or_default();
        let ms = |us: u64| us as f64 / 1000.0;
        if i >= 10 {
            out.push(Sample {
                round_trip: rtt,
                inference: ms(t.inference_us),
                preprocess: ms(t.preprocess_us),
                queue: ms(t.queue_us),
                total: ms(t.total_us),
            });
        }
        let next = Duration::from_micros(33_333 * (i as u64 + 1));
        if let Some(wait) = next.checked_sub(start.elapsed()) {
            tokio::time::sleep(wait).await;
        }
    }
    drop(tx);
    while answers.message().await?.is_some() {}
    Ok(out)
}
