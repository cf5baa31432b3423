//! The client's commands end to end: replay (server and offline, interrupted and resumed), bench, metrics.

use std::path::Path;
use std::sync::Arc;

use framewise_cli::recording::Recording;
use framewise_cli::replay::{self, FrameSource, Pacing, Target};
use framewise_cli::settings::SessionFlags;
use framewise_models_demo::recording::{Recording as Synthetic, RecordingKind};
use framewise_server::{ModelRegistry, ServerConfig};
use framewise_tests::demo_model;

fn flags() -> SessionFlags {
    SessionFlags {
        model_name: String::new(),
        filter: "exp:300".into(),
        enter: 0.6,
        exit: 0.4,
        dwell_ms: 300.0,
        min_focus: 0.0,
        max_clipped: 1.0,
        roi: None,
        policy: "every".into(),
        deadline_ms: 0,
        yuv: None,
        source_label: "test".into(),
    }
}

fn synthetic_recording(dir: &Path, frames_seconds: f64) -> Arc<dyn FrameSource> {
    let rec = Synthetic::plan(
        RecordingKind::Sweep {
            seconds: frames_seconds,
            fps: 30.0,
        },
        5,
        160,
        120,
    );
    rec.write(dir, |_| {}).expect("recording written");
    Arc::new(Recording::open(dir).expect("recording opens"))
}

/// The lines of a results file without the fields that measure time.
fn comparable(path: &Path) -> Vec<serde_json::Value> {
    std::fs::read_to_string(path)
        .expect("results")
        .lines()
        .map(|l| {
            let mut v: serde_json::Value = serde_json::from_str(l).expect("whole JSON line");
            if let Some(o) = v.as_object_mut() {
                o.remove("timings_us");
                o.remove("round_trip_us");
                o.remove("engine_at");
            }
            v
        })
        .collect()
}

async fn start_server() -> framewise_server::RunningServer {
    let config = ServerConfig {
        listen: "127.0.0.1:0".parse().expect("addr"),
        ..Default::default()
    };
    framewise_server::start(config, Some(ModelRegistry::new(vec![demo_model()])))
        .await
        .expect("server starts")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn replay_through_the_server_equals_offline_and_resumes_without_duplicates() {
    let dir = tempdir("replay");
    let source = synthetic_recording(&dir.join("rec"), 3.0);
    let server = start_server().await;
    let url = format!("http://{}", server.addr);
    let target = Target::Server {
        url,
        token: None,
        connect: Default::default(),
    };
    let full = dir.join("full.jsonl");
    let tally = replay::replay(
        source.clone(),
        &target,
        &flags(),
        Pacing::Fast,
        Some(&full),
        false,
        |_| {},
    )
    .await
    .expect("replay runs");
    assert_eq!(tally.results, source.len());

    // Offline gives the same numbers (the engine code is shared; timestamps are converted the same way).
    let offline = dir.join("offline.jsonl");
    replay::replay(
        source.clone(),
        &Target::Offline {
            model: None,
            engine: Default::default(),
        },
        &flags(),
        Pacing::Fast,
        Some(&offline),
        false,
        |_| {},
    )
    .await
    .expect("offline replay runs");
    assert_eq!(
        comparable(&full)[1..],
        comparable(&offline)[1..],
        "server and offline lines differ"
    );

    // An interrupted run: the file ends inside a line. Resuming keeps the whole lines, cuts the torn one
    // and adds the rest once each.
    let interrupted = dir.join("interrupted.jsonl");
    let bytes = std::fs::read(&full).expect("full file");
    let cut = bytes.len() * 2 / 5;
    std::fs::write(&interrupted, &bytes[..cut]).expect("torn file");
    let tally = replay::replay(
        source.clone(),
        &target,
        &flags(),
        Pacing::Fast,
        Some(&interrupted),
        true,
        |_| {},
    )
    .await
    .expect("resumed replay runs");
    assert!(
        tally.kept > 0 && tally.kept < source.len(),
        "kept {}",
        tally.kept
    );
    assert_eq!(tally.kept + tally.written, source.len());
    assert_eq!(
        comparable(&interrupted),
        comparable(&full),
        "the resumed file differs from an uninterrupted run"
    );
    server.stop().await.expect("stops");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn unreadable_frames_are_reported_and_the_rest_goes_on() {
    let dir = tempdir("unreadable");
    let rec_dir = dir.join("rec");
    let _ = synthetic_recording(&rec_dir, 1.0);
    std::fs::write(rec_dir.join("frame_000003.png"), b"not a png").expect("corrupt a frame");
    let source: Arc<dyn FrameSource> = Arc::new(Recording::open(&rec_dir).expect("opens"));
    let out = dir.join("out.jsonl");
    let tally = replay::replay(
        source.clone(),
        &Target::Offline {
            model: None,
            engine: Default::default(),
        },
        &flags(),
        Pacing::Fast,
        Some(&out),
        false,
        |_| {},
    )
    .await
    .expect("replay runs");
    assert_eq!(tally.errors, 1);
    assert_eq!(tally.results, source.len() - 1);
    let lines = comparable(&out);
    assert_eq!(lines[0]["kind"], "header");
    assert!(
        lines[0]["caution"]
            .as_str()
            .expect("caution")
            .contains("Decision support only")
    );
    // The file's header says what the model's self-test showed where it ran.
    let self_test = &lines[0]["model"]["self_test"];
    assert_eq!(self_test["verdict"], "passed", "{self_test}");
    assert!(
        self_test["largest_deviation"]
            .as_f64()
            .is_some_and(|d| d <= 1e-4),
        "{self_test}"
    );
    let bad = lines
        .iter()
        .find(|l| l["seq"] == 3)
        .expect("frame 3 answered");
    assert_eq!(bad["kind"], "error");
    assert!(
        bad["error"]
            .as_str()
            .expect("message")
            .contains("decode_failed"),
        "{bad}"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bench_writes_a_valid_report_and_gates() {
    let dir = tempdir("bench");
    let server = start_server().await;
    let args = framewise_cli::bench::BenchArgs {
        servers: vec![format!("http://{}", server.addr)],
        token: None,
        connect: Default::default(),
        sessions: 2,
        fps: 10.0,
        seconds: 2.0,
        width: 320,
        height: 240,
        format: "nv12".into(),
        late_ms: 100.0,
        json: Some(dir.join("bench.json")),
        hdr_log: Some(dir.join("bench.hlog")),
        plot: Some(dir.join("bench.png")),
        latencies: Some(dir.join("latencies.csv")),
        max_p99_ms: Some(60_000.0),
        min_fps: Some(1.0),
        session: flags(),
    };
    let (report, pass) = framewise_cli::bench::run(args.clone())
        .await
        .expect("bench runs");
    assert!(pass, "generous gates pass");
    assert_eq!(report.scheduled, 40);
    assert_eq!(report.results + report.skipped + report.failed, 40);
    assert!(report.end_to_end_ms.p50 > 0.0 && report.end_to_end_ms.p99 >= report.end_to_end_ms.p50);
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("bench.json")).expect("json"))
            .expect("valid JSON");
    assert!(
        json["caution"]
            .as_str()
            .expect("caution")
            .contains("Decision support only")
    );
    // HdrHistogram interval log: a comment and one tagged interval line.
    let log = std::fs::read_to_string(dir.join("bench.hlog")).expect("log");
    assert!(log.contains("Tag=end_to_end_us,"), "{log}");
    let plot = image::open(dir.join("bench.png")).expect("the PNG plot decodes");
    assert!(plot.width() > 0 && plot.height() > 0);
    // The raw latencies behind the report, against NumPy: numpy.percentile(method="inverted_cdf") (the
    // nearest-rank definition) over the CSV's column. HdrHistogram (3 significant figures) reports the highest
    // value equivalent to a sample (up to 0.1% above it) and may round the rank to the neighbouring sample,
    // so ours lies between the samples one rank below and above, within 0.1%.
    let csv = dir.join("latencies.csv");
    let text = std::fs::read_to_string(&csv).expect("latencies");
    assert!(
        text.starts_with('#') && text.contains("not a diagnosis"),
        "caution first"
    );
    assert_eq!(
        text.lines().filter(|l| !l.starts_with('#')).count() as u64,
        report.results + 1,
        "a header and one row per result"
    );
    let numpy = std::process::Command::new(framewise_tests::python())
        .arg("-c")
        .arg(
            "import sys, json, numpy as np\n\
             x = np.sort(np.loadtxt(sys.argv[1], delimiter=',', skiprows=2, usecols=3))\n\
             out = []\n\
             for q in (50, 90, 99, 99.9, 100):\n\
             \x20   v = float(np.percentile(x, q, method='inverted_cdf'))\n\
             \x20   i = int(np.searchsorted(x, v))\n\
             \x20   out.append([float(x[max(i - 1, 0)]), v, float(x[min(i + 1, len(x) - 1)])])\n\
             print(json.dumps(out))",
        )
        .arg(&csv)
        .output()
        .expect("python runs");
    assert!(
        numpy.status.success(),
        "{}",
        String::from_utf8_lossy(&numpy.stderr)
    );
    let expected: Vec<[f64; 3]> = serde_json::from_slice(&numpy.stdout).expect("NumPy's answer");
    let e = &report.end_to_end_ms;
    for (ours_ms, [below, theirs, above]) in [e.p50, e.p90, e.p99, e.p999, e.max]
        .into_iter()
        .zip(expected)
    {
        let ours = ours_ms * 1000.0;
        assert!(
            ours >= below * (1.0 - 1e-3) - 1.0 && ours <= above * (1.0 + 1e-3) + 1.0,
            "ours {ours} us, NumPy {theirs} (neighbours {below}..{above})"
        );
    }
    let strict = framewise_cli::bench::BenchArgs {
        max_p99_ms: Some(0.001),
        seconds: 0.5,
        json: None,
        hdr_log: None,
        plot: None,
        latencies: None,
        ..args
    };
    let (_, pass) = framewise_cli::bench::run(strict).await.expect("bench runs");
    assert!(!pass, "an impossible p99 gate fails");
    server.stop().await.expect("stops");
}

fn tempdir(name: &str) -> std::path::PathBuf {
    let dir = framewise_tests::workspace_root()
        .join("target/test-scratch")
        .join(format!("{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).expect("scratch dir");
    dir
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn on_the_demo_sweep_smoothed_calls_change_far_less_often_than_raw_arg_max() {
    // The demo's recording and settings, offline (the same engine code as the server's).
    let source: Arc<dyn FrameSource> =
        Arc::new(framewise_cli::demo::Synthetic::sweep(20.0, 30.0, 42));
    let dir = tempdir("demo-sweep");
    let out = dir.join("demo.jsonl");
    let flags = SessionFlags {
        dwell_ms: 500.0,
        max_clipped: framewise_cli::demo::DEMO_MAX_CLIPPED,
        ..flags()
    };
    replay::replay(
        source,
        &Target::Offline {
            model: None,
            engine: Default::default(),
        },
        &flags,
        Pacing::Fast,
        Some(&out),
        false,
        |_| {},
    )
    .await
    .expect("replay runs");
    let (header, records) = framewise_cli::score::read_results(&out).expect("results read");
    let report = framewise_cli::score::Report::compute(&records, &header.classes).expect("scored");
    eprintln!(
        "demo sweep: accuracy raw {:.3} smoothed {:.3}; call changes/min raw {:.1} decisions {:.1}",
        report.raw.accuracy,
        report.smoothed.accuracy,
        report.raw_calls.call_changes_per_minute,
        report.decisions.call_changes_per_minute
    );
    // A sanity bound only (the measured figures go in the README): the decisions change call at least five
    // times less often than the per-frame arg-max.
    assert!(
        report.raw_calls.call_changes_per_minute >= 5.0 * report.decisions.call_changes_per_minute,
        "raw {} vs decisions {} call changes per minute",
        report.raw_calls.call_changes_per_minute,
        report.decisions.call_changes_per_minute
    );
    assert!(report.raw.accuracy > 0.0 && report.smoothed.accuracy > 0.0);

    // The plots in both formats: the PNG is the SVG's drawing at twice its size, with its text drawn.
    for ext in ["svg", "png"] {
        framewise_cli::plot::timeline(&header, &records, &dir.join(format!("timeline.{ext}")))
            .expect("timeline plot");
        framewise_cli::plot::reliability(&header, &report, &dir.join(format!("reliability.{ext}")))
            .expect("reliability plot");
    }
    for name in ["timeline", "reliability"] {
        assert_png_draws_the_svg(
            &dir.join(format!("{name}.svg")),
            &dir.join(format!("{name}.png")),
        );
    }
    let refused = framewise_cli::plot::timeline(&header, &records, &dir.join("timeline.jpg"));
    assert!(
        format!("{:#}", refused.expect_err("a .jpg plot is refused")).contains(".svg or .png"),
        "the error names the formats"
    );
}

/// Checks a PNG plot against the SVG of the same drawing: decoded by the `image` crate's PNG decoder (the
/// PNG specification's format), it is twice the SVG's declared width and height, its footer holds the caution
/// in the caution's red (#aa0000) and the model line in grey (#555555), so text was set with the embedded
/// font, and the first class's line colour (#1b6ca8) is drawn.
fn assert_png_draws_the_svg(svg: &std::path::Path, png: &std::path::Path) {
    let svg = std::fs::read_to_string(svg).expect("svg");
    let attr = |name: &str| -> u32 {
        let at = svg.find(&format!(" {name}=\"")).expect("size attribute") + name.len() + 3;
        let end = svg[at..].find('"').expect("closing quote") + at;
        svg[at..end].parse::<f64>().expect("number") as u32
    };
    let (w, h) = (attr("width"), attr("height"));
    let img = image::open(png).expect("PNG decodes").to_rgb8();
    assert_eq!(img.dimensions(), (2 * w, 2 * h), "PNG is the drawing at 2x");
    let near = |p: &image::Rgb<u8>, c: [u8; 3]| p.0.iter().zip(c).all(|(a, b)| a.abs_diff(b) <= 24);
    let count = |rows: std::ops::Range<u32>, c: [u8; 3]| {
        rows.flat_map(|y| (0..img.width()).map(move |x| (x, y)))
            .filter(|&(x, y)| near(img.get_pixel(x, y), c))
            .count()
    };
    // The footer: the model line's baseline is 30 units above the bottom, the caution's 12.
    let footer = 2 * h - 2 * 46..2 * h;
    assert!(
        count(footer.clone(), [0xaa, 0, 0]) > 500,
        "caution text drawn in red"
    );
    assert!(
        count(footer, [0x55, 0x55, 0x55]) > 200,
        "model line drawn in grey"
    );
    assert!(
        count(0..2 * h, [0x1b, 0x6c, 0xa8]) > 200,
        "first class's colour drawn"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn csv_output_carries_the_caution_and_the_same_numbers_as_json_lines() {
    let dir = tempdir("csv");
    let rec_dir = dir.join("rec");
    let _ = synthetic_recording(&rec_dir, 1.0);
    std::fs::write(rec_dir.join("frame_000002.png"), b"broken").expect("corrupt a frame");
    let source: Arc<dyn FrameSource> = Arc::new(Recording::open(&rec_dir).expect("opens"));
    let (json, csv) = (dir.join("out.jsonl"), dir.join("out.csv"));
    for out in [&json, &csv] {
        replay::replay(
            source.clone(),
            &Target::Offline {
                model: None,
                engine: Default::default(),
            },
            &flags(),
            Pacing::Fast,
            Some(out),
            false,
            |_| {},
        )
        .await
        .expect("replay runs");
    }
    let text = std::fs::read_to_string(&csv).expect("csv");
    let mut lines = text.lines();
    assert!(
        lines
            .next()
            .expect("caution line")
            .contains("Decision support only")
    );
    assert!(lines.next().expect("model line").contains("sha256"));
    lines.next().expect("settings line");
    let columns: Vec<&str> = lines.next().expect("column names").split(',').collect();
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    assert_eq!(rows.len(), source.len());
    assert!(
        rows.iter().all(|r| r.len() == columns.len()),
        "every row has every column"
    );
    let raw_plain = columns
        .iter()
        .position(|c| *c == "raw_plain")
        .expect("raw_plain column");
    let jsonl = comparable(&json);
    for (row, line) in rows.iter().zip(&jsonl[1..]) {
        let from_json = line["raw"]
            .as_array()
            .and_then(|v| v.first())
            .and_then(|v| v.as_f64());
        match from_json {
            Some(v) => assert_eq!(row[raw_plain].parse::<f32>().expect("number"), v as f32),
            None => assert_eq!(row[raw_plain], "", "an error row has empty probabilities"),
        }
    }
}
