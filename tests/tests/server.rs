//! The real server on a free loopback port: sessions, frame policies, errors, limits, cautions.

use std::time::Duration;

use framewise_engine::{Analyser, CAUTION, FrameRef, PixelFormat};
use framewise_proto::v1 as pb;
use framewise_server::{ModelRegistry, ServerConfig};
use framewise_tests::{Rng, demo_model};
use pb::frame_analysis_client::FrameAnalysisClient;
use tokio::sync::mpsc;
use tokio_stream::wrappers::ReceiverStream;
use tonic::transport::Channel;

struct TestServer {
    server: framewise_server::RunningServer,
    url: String,
}

async fn start(config: ServerConfig) -> TestServer {
    let config = ServerConfig {
        listen: "127.0.0.1:0".parse().expect("addr"),
        ..config
    };
    let registry = ModelRegistry::new(vec![demo_model()]);
    let server = framewise_server::start(config, Some(registry))
        .await
        .expect("server starts");
    let url = format!("http://{}", server.addr);
    TestServer { server, url }
}

async fn client(url: &str) -> FrameAnalysisClient<Channel> {
    FrameAnalysisClient::connect(url.to_string())
        .await
        .expect("connects")
        .max_decoding_message_size(64 << 20)
        .max_encoding_message_size(64 << 20)
}

fn opening(policy: pb::FramePolicy) -> pb::SessionOpening {
    pb::SessionOpening {
        policy: policy as i32,
        ..Default::default()
    }
}

fn frame_msg(
    seq: u64,
    t_us: i64,
    format: PixelFormat,
    w: u32,
    h: u32,
    data: Vec<u8>,
) -> pb::SessionInput {
    pb::SessionInput {
        item: Some(pb::session_input::Item::Frame(pb::Frame {
            file_slice: None,
            seq,
            capture_time_us: t_us,
            format: framewise_server::convert::wire_format(format) as i32,
            width: w,
            height: h,
            stride: 0,
            data: data.into(),
        })),
    }
}

fn noise_frame(rng: &mut Rng, w: u32, h: u32) -> Vec<u8> {
    (0..w * h * 3).map(|_| rng.below(256) as u8).collect()
}

/// Opens a session, sends `inputs` (after the opening) and collects every output until the stream ends.
async fn run_session(
    url: &str,
    opening: pb::SessionOpening,
    inputs: Vec<pb::SessionInput>,
) -> Result<Vec<pb::SessionOutput>, tonic::Status> {
    run_session_on(client(url).await, opening, inputs).await
}

/// As [`run_session`], on a connected client.
async fn run_session_on(
    mut grpc: FrameAnalysisClient<Channel>,
    opening: pb::SessionOpening,
    inputs: Vec<pb::SessionInput>,
) -> Result<Vec<pb::SessionOutput>, tonic::Status> {
    let (tx, rx) = mpsc::channel(8);
    tx.send(pb::SessionInput {
        item: Some(pb::session_input::Item::Opening(opening)),
    })
    .await
    .expect("queue opening");
    let sender = tokio::spawn(async move {
        for input in inputs {
            if tx.send(input).await.is_err() {
                break;
            }
        }
    });
    let mut answers = grpc
        .run_session(ReceiverStream::new(rx))
        .await?
        .into_inner();
    let mut out = Vec::new();
    while let Some(m) = answers.message().await? {
        out.push(m);
    }
    let _ = sender.await;
    Ok(out)
}

/// Opens an every-frame session and keeps it open: the frame sender and the answers after SessionAccepted.
async fn open_held(
    url: &str,
) -> (
    mpsc::Sender<pb::SessionInput>,
    tonic::Streaming<pb::SessionOutput>,
) {
    let mut grpc = client(url).await;
    let (tx, rx) = mpsc::channel(4);
    let first = pb::SessionInput {
        item: Some(pb::session_input::Item::Opening(opening(
            pb::FramePolicy::EveryFrame,
        ))),
    };
    tx.send(first).await.expect("queue");
    let mut answers = grpc
        .run_session(ReceiverStream::new(rx))
        .await
        .expect("session opens")
        .into_inner();
    assert!(answers.message().await.expect("accepted").is_some());
    (tx, answers)
}

fn answers(outputs: &[pb::SessionOutput]) -> Vec<&pb::Answer> {
    outputs
        .iter()
        .filter_map(|o| match &o.item {
            Some(pb::session_output::Item::Answer(a)) => Some(a),
            _ => None,
        })
        .collect()
}

/// Each answer's sequence number, raw and smoothed probabilities; every answer must be a result.
fn results_of(outputs: &[pb::SessionOutput]) -> Vec<(u64, Vec<f32>, Vec<f32>)> {
    answers(outputs)
        .iter()
        .map(|a| match &a.outcome {
            Some(pb::answer::Outcome::Result(r)) => (a.seq, r.raw.clone(), r.smoothed.clone()),
            other => panic!("frame {}: {other:?}", a.seq),
        })
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_frame_answers_each_of_1000_frames_once_in_order_with_the_caution() {
    let t = start(ServerConfig::default()).await;
    let mut rng = Rng::new(1);
    let inputs = (0..1000u64)
        .map(|i| {
            frame_msg(
                i,
                1_000_000 + i as i64 * 33_333,
                PixelFormat::Rgb8,
                32,
                24,
                noise_frame(&mut rng, 32, 24),
            )
        })
        .collect();
    let outputs = run_session(&t.url, opening(pb::FramePolicy::EveryFrame), inputs)
        .await
        .expect("session runs");
    let Some(pb::session_output::Item::Accepted(accepted)) = &outputs[0].item else {
        panic!("first output is not SessionAccepted")
    };
    assert_eq!(accepted.caution, CAUTION);
    assert_eq!(accepted.classes, demo_model().classes());
    // The opening says what the demo package's self-test showed on this server.
    let report = accepted
        .model
        .as_ref()
        .and_then(|m| m.self_test.clone())
        .expect("a self-test report");
    assert_eq!(
        (report.verdict.as_str(), report.cases, report.failed),
        ("passed", 6, 0)
    );
    assert!(
        report.largest_deviation > 0.0 && report.tolerance == 1e-4,
        "{report:?}"
    );
    let answers = answers(&outputs);
    let seqs: Vec<u64> = answers.iter().map(|a| a.seq).collect();
    assert_eq!(
        seqs,
        (0..1000).collect::<Vec<_>>(),
        "every sequence number once, in order"
    );
    for a in &answers {
        assert_eq!(a.caution, CAUTION, "caution in every answer");
        assert!(
            matches!(a.outcome, Some(pb::answer::Outcome::Result(_))),
            "frame {} has a result",
            a.seq
        );
        assert_eq!(
            a.model.as_ref().map(|m| m.sha256.as_str()),
            Some(demo_model().identity().sha256.as_str())
        );
    }
    let Some(pb::session_output::Item::Summary(summary)) = &outputs.last().expect("outputs").item
    else {
        panic!("no summary")
    };
    assert_eq!(
        (summary.frames, summary.results, summary.errors),
        (1000, 1000, 0)
    );
    assert_eq!(summary.caution, CAUTION);
    t.server.stop().await.expect("stops");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn streamed_results_equal_the_offline_engine_bit_for_bit() {
    // Property over random frame sequences (seeded): formats, sizes, timestamps with jitter and gaps.
    let t = start(ServerConfig::default()).await;
    for seed in 0..4u64 {
        let mut rng = Rng::new(100 + seed);
        let (w, h) = (
            2 * (8 + rng.below(60) as u32),
            2 * (8 + rng.below(40) as u32),
        );
        let mut frames = Vec::new();
        let mut t_us = 1_000_000i64;
        for seq in 0..40u64 {
            t_us += 20_000 + rng.below(40_000) as i64;
            let format = [
                PixelFormat::Rgb8,
                PixelFormat::Bgr8,
                PixelFormat::Nv12,
                PixelFormat::Gray8,
            ][rng.below(4) as usize];
            let len = match format {
                PixelFormat::Rgb8 | PixelFormat::Bgr8 => w * h * 3,
                PixelFormat::Nv12 => w * h * 3 / 2,
                _ => w * h,
            };
            let data: Vec<u8> = (0..len).map(|_| rng.below(256) as u8).collect();
            frames.push((seq, t_us, format, data));
        }
        let filter = match seed % 3 {
            0 => pb::filter_settings::Kind::Exponential(pb::Exponential { tau_ms: 150.0 }),
            1 => pb::filter_settings::Kind::Window(pb::Window {
                frames: 5,
                span_ms: 0.0,
            }),
            _ => pb::filter_settings::Kind::Forward(pb::Forward {
                stay: vec![0.95],
                priors: vec![],
                step_ms: 0.0,
            }),
        };
        let opening = pb::SessionOpening {
            filter: Some(pb::FilterSettings { kind: Some(filter) }),
            decision: Some(pb::DecisionSettings {
                enter: 0.5,
                exit: 0.3,
                dwell_ms: 100.0,
            }),
            ..opening(pb::FramePolicy::EveryFrame)
        };
        let inputs = frames
            .iter()
            .map(|(s, t, f, d)| frame_msg(*s, *t, *f, w, h, d.clone()))
            .collect();
        let outputs = run_session(&t.url, opening.clone(), inputs)
            .await
            .expect("session runs");
        let model = demo_model();
        let plan = framewise_server::convert::session_plan(&opening, &model, Default::default())
            .expect("valid");
        let mut offline = Analyser::new(model.clone(), &plan.settings).expect("valid");
        for (a, (seq, t_us, format, data)) in answers(&outputs).iter().zip(&frames) {
            assert_eq!(a.seq, *seq);
            let frame = FrameRef {
                format: *format,
                width: w,
                height: h,
                stride: 0,
                data,
            };
            let expected = offline
                .analyse(&frame, *t_us as f64 / 1000.0)
                .expect("offline analyses");
            let Some(pb::answer::Outcome::Result(r)) = &a.outcome else {
                panic!("frame {seq}: no result")
            };
            // Reference: the offline engine on the same frames; the server must not change a single bit.
            assert_eq!(r.raw, expected.analysed.raw, "seed {seed} frame {seq}: raw");
            assert_eq!(
                r.smoothed, expected.smoothed.smoothed,
                "seed {seed} frame {seq}: smoothed"
            );
            let d = r.decision.clone().unwrap_or_default();
            let expected_decision = match expected.smoothed.decision {
                framewise_engine::Decision::Undetermined => None,
                framewise_engine::Decision::Class { index, confidence } => {
                    Some((index as u32, confidence))
                }
            };
            assert_eq!(
                d.determined.then_some((d.class_index, d.confidence)),
                expected_decision,
                "seed {seed} frame {seq}: decision"
            );
        }
    }
    t.server.stop().await.expect("stops");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_unix_socket_gives_the_answers_tcp_gives_and_guards_its_path() {
    use std::os::unix::fs::PermissionsExt;
    let dir = std::env::temp_dir().join(format!("framewise-unix-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("temp dir");
    let path = dir.join("frames.sock");
    let config = || ServerConfig {
        listen: "127.0.0.1:0".parse().expect("addr"),
        listen_unix: Some(path.clone()),
        ..Default::default()
    };
    let registry = || Some(ModelRegistry::new(vec![demo_model()]));
    // Something other than a socket at the path is left alone and refused.
    std::fs::write(&path, b"not a socket").expect("write");
    let refused = framewise_server::start(config(), registry()).await;
    let message = format!("{:#}", refused.err().expect("a regular file is refused"));
    assert!(message.contains("is not a socket"), "{message}");
    assert_eq!(std::fs::read(&path).expect("still there"), b"not a socket");
    std::fs::remove_file(&path).expect("remove");
    // A socket file left by a server that is gone is replaced.
    drop(std::os::unix::net::UnixListener::bind(&path).expect("stale socket"));
    let t = start(config()).await;
    let mode = std::fs::metadata(&path)
        .expect("socket")
        .permissions()
        .mode();
    assert_eq!(mode & 0o777, 0o660, "owner and group only");
    // One that a running server answers on is not taken over.
    let second = framewise_server::start(config(), registry()).await;
    let message = format!("{:#}", second.err().expect("a served socket is refused"));
    assert!(message.contains("another process is serving"), "{message}");
    // The same frames over both connections give the same answers.
    let mut rng = Rng::new(77);
    let inputs: Vec<pb::SessionInput> = (0..12u64)
        .map(|seq| {
            let data = noise_frame(&mut rng, 64, 48);
            frame_msg(
                seq,
                1_000 + seq as i64 * 33_000,
                PixelFormat::Rgb8,
                64,
                48,
                data,
            )
        })
        .collect();
    let over_tcp = run_session(&t.url, opening(pb::FramePolicy::EveryFrame), inputs.clone())
        .await
        .expect("tcp session");
    let unix_client = framewise_cli::client::connect(&format!("unix:{}", path.display()))
        .await
        .expect("connects over the socket");
    let over_unix = run_session_on(unix_client, opening(pb::FramePolicy::EveryFrame), inputs)
        .await
        .expect("unix session");
    let (tcp, unix) = (results_of(&over_tcp), results_of(&over_unix));
    assert_eq!(tcp.len(), 12);
    assert_eq!(tcp, unix, "the connection must not change an answer");
    t.server.stop().await.expect("stops");
    assert!(!path.exists(), "the socket file is removed at shutdown");
    let _ = std::fs::remove_dir(&dir);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn frames_read_from_a_frame_file_give_the_answers_inline_frames_give() {
    use framewise_cli::client::FrameFile;
    let dir = std::env::temp_dir().join(format!("framewise-frames-{}", std::process::id()));
    let shared = dir.join("shared");
    std::fs::create_dir_all(&shared).expect("temp dir");
    let path = dir.join("frames.sock");
    // The settings are checked: frame files need the Unix socket and a directory.
    let no_socket = ServerConfig {
        shared_frames_dir: Some(shared.clone()),
        ..Default::default()
    };
    assert!(
        no_socket.validate().is_err(),
        "frame files without a Unix socket"
    );
    let not_a_dir = ServerConfig {
        listen_unix: Some(path.clone()),
        shared_frames_dir: Some(dir.join("missing")),
        ..Default::default()
    };
    assert!(
        not_a_dir.validate().is_err(),
        "a directory that is not there"
    );
    let t = start(ServerConfig {
        listen_unix: Some(path.clone()),
        shared_frames_dir: Some(shared.clone()),
        ..Default::default()
    })
    .await;
    let unix = format!("unix:{}", path.display());
    let unix_client = || async {
        framewise_cli::client::connect(&unix)
            .await
            .expect("connects")
    };
    let with_file = |name: &str| pb::SessionOpening {
        frame_file: name.to_string(),
        ..opening(pb::FramePolicy::EveryFrame)
    };
    let (w, h) = (64u32, 48u32);
    let mut rng = Rng::new(91);
    let frames: Vec<(PixelFormat, Vec<u8>)> = (0..10)
        .map(|i| {
            if i % 2 == 0 {
                (PixelFormat::Rgb8, noise_frame(&mut rng, w, h))
            } else {
                let len = (w * h * 3 / 2) as usize;
                (
                    PixelFormat::Nv12,
                    (0..len).map(|_| rng.below(256) as u8).collect(),
                )
            }
        })
        .collect();
    let t_us = |i: usize| 1_000 + i as i64 * 33_000;
    let inline: Vec<pb::SessionInput> = frames
        .iter()
        .enumerate()
        .map(|(i, (f, d))| frame_msg(i as u64, t_us(i), *f, w, h, d.clone()))
        .collect();
    // One slot per frame: every frame is written before the session starts.
    let mut file =
        FrameFile::create(&shared, frames.len() as u64, (w * h * 3) as u64).expect("frame file");
    let by_file: Vec<pb::SessionInput> = frames
        .iter()
        .enumerate()
        .map(|(i, (f, d))| {
            let mut input = frame_msg(i as u64, t_us(i), *f, w, h, Vec::new());
            if let Some(pb::session_input::Item::Frame(frame)) = &mut input.item {
                frame.file_slice = Some(file.put(d).expect("slot"));
            }
            input
        })
        .collect();
    let expected = results_of(
        &run_session_on(
            unix_client().await,
            opening(pb::FramePolicy::EveryFrame),
            inline,
        )
        .await
        .expect("inline session"),
    );
    let read = results_of(
        &run_session_on(unix_client().await, with_file(file.name()), by_file)
            .await
            .expect("frame-file session"),
    );
    assert_eq!(expected.len(), frames.len());
    // Reference: the same frames sent inline; where the pixels come from must not change a bit.
    assert_eq!(read, expected);

    // Bad slices get error answers and the session goes on.
    let good = {
        let mut input = frame_msg(4, t_us(4), PixelFormat::Rgb8, w, h, Vec::new());
        if let Some(pb::session_input::Item::Frame(frame)) = &mut input.item {
            frame.file_slice = Some(pb::FileSlice {
                offset: 0,
                length: u64::from(w * h * 3),
            });
        }
        input
    };
    let with_slice = |seq: u64, slice: pb::FileSlice, data: Vec<u8>| {
        let mut input = frame_msg(seq, t_us(seq as usize), PixelFormat::Rgb8, w, h, data);
        if let Some(pb::session_input::Item::Frame(frame)) = &mut input.item {
            frame.file_slice = Some(slice);
        }
        input
    };
    let past_end = pb::FileSlice {
        offset: u64::from(w * h * 3) * frames.len() as u64 - 10,
        length: u64::from(w * h * 3),
    };
    let huge = pb::FileSlice {
        offset: 0,
        length: 1 << 40,
    };
    let bad = vec![
        with_slice(0, past_end, Vec::new()),
        with_slice(1, huge, Vec::new()),
        with_slice(
            2,
            pb::FileSlice {
                offset: 0,
                length: 3,
            },
            vec![1, 2, 3],
        ),
        good.clone(),
    ];
    let outputs = run_session_on(unix_client().await, with_file(file.name()), bad)
        .await
        .expect("session with bad slices");
    let got = answers(&outputs);
    assert_eq!(got.len(), 4);
    for (a, what) in got[..3]
        .iter()
        .zip(["past the end", "larger than", "both data and"])
    {
        match &a.outcome {
            Some(pb::answer::Outcome::Error(e)) => {
                assert_eq!(e.kind, "bad_file_slice");
                assert!(e.message.contains(what), "{}", e.message);
            }
            other => panic!("frame {}: expected an error, got {other:?}", a.seq),
        }
    }
    assert!(
        matches!(got[3].outcome, Some(pb::answer::Outcome::Result(_))),
        "the session goes on"
    );
    // A slice in a session that named no frame file.
    let outputs = run_session_on(
        unix_client().await,
        opening(pb::FramePolicy::EveryFrame),
        vec![good.clone()],
    )
    .await
    .expect("session without a frame file");
    match &answers(&outputs)[0].outcome {
        Some(pb::answer::Outcome::Error(e)) => {
            assert!(e.message.contains("named no frame_file"), "{}", e.message)
        }
        other => panic!("expected an error, got {other:?}"),
    }

    // Openings that name a file the server must not open are refused.
    std::fs::write(dir.join("outside"), b"secret").expect("write");
    std::os::unix::fs::symlink(dir.join("outside"), shared.join("link")).expect("symlink");
    for (name, expected) in [
        ("../outside", "not a plain file name"),
        ("missing.frames", "no file"),
        ("link", "not a plain file"),
    ] {
        let status = run_session_on(unix_client().await, with_file(name), Vec::new())
            .await
            .expect_err("refused");
        assert_eq!(status.code(), tonic::Code::InvalidArgument);
        assert!(
            status.message().contains(expected),
            "{name}: {}",
            status.message()
        );
    }
    // Over TCP the same opening is refused: frame files are for the host's own processes.
    let status = run_session(&t.url, with_file(file.name()), Vec::new())
        .await
        .expect_err("refused over TCP");
    assert_eq!(status.code(), tonic::Code::InvalidArgument);
    assert!(
        status.message().contains("Unix socket"),
        "{}",
        status.message()
    );
    t.server.stop().await.expect("stops");
    // A server without a shared frames directory reads no frame files.
    let plain = start(ServerConfig::default()).await;
    let status = run_session(&plain.url, with_file("x"), Vec::new())
        .await
        .expect_err("refused");
    assert!(
        status.message().contains("reads no frame files"),
        "{}",
        status.message()
    );
    plain.server.stop().await.expect("stops");
    drop(file);
    let _ = std::fs::remove_dir_all(&dir);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_frames_get_error_answers_and_the_session_goes_on() {
    let t = start(ServerConfig::default()).await;
    let mut rng = Rng::new(7);
    let good =
        |rng: &mut Rng, seq| frame_msg(seq, 0, PixelFormat::Rgb8, 16, 16, noise_frame(rng, 16, 16));
    let inputs = vec![
        good(&mut rng, 0),
        frame_msg(
            1,
            0,
            PixelFormat::Nv12,
            1920,
            1080,
            vec![0; 1920 * 1080 * 3 / 2 - 1],
        ),
        frame_msg(2, 0, PixelFormat::Nv12, 5, 4, vec![0; 30]),
        frame_msg(
            3,
            0,
            PixelFormat::Png,
            0,
            0,
            b"\x89PNG\r\n\x1a\nnot really".to_vec(),
        ),
        frame_msg(4, 0, PixelFormat::Rgb8, 100_000, 100_000, vec![]),
        pb::SessionInput {
            item: Some(pb::session_input::Item::Frame(pb::Frame {
                seq: 5,
                format: 99,
                ..Default::default()
            })),
        },
        good(&mut rng, 6),
    ];
    let outputs = run_session(&t.url, opening(pb::FramePolicy::EveryFrame), inputs)
        .await
        .expect("session runs");
    let answers = answers(&outputs);
    let kinds: Vec<String> = answers
        .iter()
        .map(|a| match &a.outcome {
            Some(pb::answer::Outcome::Result(_)) => "result".to_string(),
            Some(pb::answer::Outcome::Error(e)) => e.kind.clone(),
            other => format!("{other:?}"),
        })
        .collect();
    assert_eq!(
        kinds,
        [
            "result",
            "bad_length",
            "odd_dimension",
            "decode_failed",
            "too_large",
            "bad_format",
            "result"
        ]
    );
    let Some(pb::answer::Outcome::Error(e)) = &answers[1].outcome else {
        panic!("no error")
    };
    assert_eq!(
        e.message,
        "frame 1: nv12 buffer is 3110399 bytes, expected 3110400 for 1920x1080 with stride 1920"
    );
    t.server.stop().await.expect("stops");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn latest_only_answers_every_frame_as_result_or_skipped() {
    // One worker and large PNG frames sent back to back: the server falls behind and must skip.
    let t = start(ServerConfig {
        workers: 1,
        ..Default::default()
    })
    .await;
    let mut rng = Rng::new(9);
    let (w, h) = (1280u32, 720u32);
    let pixels = noise_frame(&mut rng, w, h);
    let mut png = Vec::new();
    image_png(&pixels, w, h, &mut png);
    let inputs = (0..60u64)
        .map(|i| {
            frame_msg(
                i,
                1_000_000 + i as i64 * 1000,
                PixelFormat::Png,
                0,
                0,
                png.clone(),
            )
        })
        .collect();
    let outputs = run_session(&t.url, opening(pb::FramePolicy::LatestOnly), inputs)
        .await
        .expect("session runs");
    let answers = answers(&outputs);
    let mut seen: Vec<u64> = answers.iter().map(|a| a.seq).collect();
    seen.sort();
    assert_eq!(
        seen,
        (0..60).collect::<Vec<_>>(),
        "every frame answered exactly once"
    );
    let skipped: Vec<(u64, u64)> = answers
        .iter()
        .filter_map(|a| match &a.outcome {
            Some(pb::answer::Outcome::Skipped(s)) => Some((a.seq, s.overtaken_by)),
            _ => None,
        })
        .collect();
    assert!(
        !skipped.is_empty(),
        "a server that falls behind skips frames in latest-only mode"
    );
    assert!(
        skipped.iter().all(|(seq, by)| by > seq),
        "a frame is overtaken only by a newer one"
    );
    let last = answers
        .iter()
        .find(|a| a.seq == 59)
        .expect("last frame answered");
    assert!(
        matches!(last.outcome, Some(pb::answer::Outcome::Result(_))),
        "the newest frame is analysed"
    );
    let Some(pb::session_output::Item::Summary(summary)) = &outputs.last().expect("outputs").item
    else {
        panic!("no summary")
    };
    assert_eq!(summary.results + summary.skipped, 60);
    t.server.stop().await.expect("stops");
}

fn image_png(rgb: &[u8], w: u32, h: u32, out: &mut Vec<u8>) {
    use image::ImageEncoder;
    image::codecs::png::PngEncoder::new(out)
        .write_image(rgb, w, h, image::ExtendedColorType::Rgb8)
        .expect("png encodes");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sixteen_concurrent_sessions_complete() {
    let t = start(ServerConfig::default()).await;
    let mut tasks = Vec::new();
    for s in 0..16u64 {
        let url = t.url.clone();
        tasks.push(tokio::spawn(async move {
            let mut rng = Rng::new(500 + s);
            let inputs = (0..30u64)
                .map(|i| {
                    frame_msg(
                        i,
                        0,
                        PixelFormat::Rgb8,
                        48,
                        32,
                        noise_frame(&mut rng, 48, 32),
                    )
                })
                .collect();
            run_session(&url, opening(pb::FramePolicy::EveryFrame), inputs).await
        }));
    }
    for task in tasks {
        let outputs = task.await.expect("task").expect("session");
        assert_eq!(answers(&outputs).len(), 30);
    }
    t.server.stop().await.expect("stops");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn openings_are_checked_and_limits_hold() {
    let t = start(ServerConfig {
        max_sessions: 1,
        ..Default::default()
    })
    .await;
    // A session that stays open holds the only place.
    let (tx, mut held) = open_held(&t.url).await;
    let err = run_session(&t.url, opening(pb::FramePolicy::EveryFrame), vec![])
        .await
        .expect_err("second session refused");
    assert_eq!(err.code(), tonic::Code::ResourceExhausted);
    drop(tx);
    while held.message().await.expect("summary").is_some() {}
    tokio::time::sleep(Duration::from_millis(50)).await;

    let bad_model = pb::SessionOpening {
        model: "no-such-model".into(),
        ..Default::default()
    };
    let err = run_session(&t.url, bad_model, vec![])
        .await
        .expect_err("unknown model");
    assert_eq!(err.code(), tonic::Code::NotFound);
    assert!(err.message().contains("`model`"), "{}", err.message());

    let bad_tau = pb::SessionOpening {
        filter: Some(pb::FilterSettings {
            kind: Some(pb::filter_settings::Kind::Exponential(pb::Exponential {
                tau_ms: 0.0,
            })),
        }),
        ..Default::default()
    };
    let err = run_session(&t.url, bad_tau, vec![])
        .await
        .expect_err("tau 0");
    assert_eq!(err.code(), tonic::Code::InvalidArgument);
    assert!(
        err.message().contains("exponential.tau_ms"),
        "{}",
        err.message()
    );

    let bad_enter = pb::SessionOpening {
        decision: Some(pb::DecisionSettings {
            enter: 1.5,
            exit: 0.2,
            dwell_ms: 0.0,
        }),
        ..Default::default()
    };
    let err = run_session(&t.url, bad_enter, vec![])
        .await
        .expect_err("enter above 1");
    assert_eq!(err.code(), tonic::Code::InvalidArgument);
    assert!(
        err.message().contains("decision.enter"),
        "{}",
        err.message()
    );
    t.server.stop().await.expect("stops");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_token_is_required_when_set() {
    let token = "a-long-enough-test-token".to_string();
    let t = start(ServerConfig {
        token: Some(token.clone()),
        ..Default::default()
    })
    .await;
    let err = run_session(&t.url, opening(pb::FramePolicy::EveryFrame), vec![])
        .await
        .expect_err("no token");
    assert_eq!(err.code(), tonic::Code::Unauthenticated);
    let mut grpc = client(&t.url).await;
    let mut request = tonic::Request::new(pb::ModelCardsRequest {});
    request.metadata_mut().insert(
        "authorization",
        "Bearer wrong-token-of-some-length".parse().expect("header"),
    );
    assert_eq!(
        grpc.list_model_cards(request)
            .await
            .expect_err("wrong token")
            .code(),
        tonic::Code::Unauthenticated
    );
    let mut request = tonic::Request::new(pb::ModelCardsRequest {});
    request.metadata_mut().insert(
        "authorization",
        format!("Bearer {token}").parse().expect("header"),
    );
    let reply = grpc
        .list_model_cards(request)
        .await
        .expect("right token")
        .into_inner();
    assert_eq!(reply.models.len(), 1);
    assert_eq!(reply.caution, CAUTION);
    let identity = reply.models[0].identity.clone().expect("identity");
    assert_eq!(
        identity.self_test.map(|r| r.verdict),
        Some("passed".to_string())
    );
    assert_eq!(
        t.server.stats.snapshot().frames,
        0,
        "no frame was processed without the token"
    );
    t.server.stop().await.expect("stops");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn python_clients_use_the_contract_the_health_protocol_and_reflection() {
    // Reference clients: grpcio with stubs generated from our .proto by grpcio-tools, the
    // grpcio-health-checking package's standard health client, and grpcio-reflection's descriptor database
    // (server reflection v1alpha).
    let t = start(ServerConfig::default()).await;
    let script = framewise_tests::workspace_root().join("tests/reference/py_client.py");
    let output = tokio::process::Command::new(framewise_tests::python())
        .arg(&script)
        .arg("--target")
        .arg(t.server.addr.to_string())
        .output()
        .await
        .expect("python runs");
    let stdout = String::from_utf8_lossy(&output.stdout);
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        output.status.success(),
        "python client failed:\n{stdout}\n{stderr}"
    );
    assert!(stdout.contains("health: SERVING"), "{stdout}");
    assert!(stdout.contains("reflection: "), "{stdout}");
    assert!(stdout.contains("answers: 5"), "{stdout}");
    t.server.stop().await.expect("stops");
}

/// Server reflection, v1 (v1alpha is exercised by the Python client above): the services listed, and the
/// contract's file described with its rpcs, as general-purpose gRPC tools read them.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reflection_lists_the_services_and_describes_the_contract() {
    use tonic_reflection::pb::v1::ServerReflectionRequest;
    use tonic_reflection::pb::v1::server_reflection_client::ServerReflectionClient;
    use tonic_reflection::pb::v1::server_reflection_request::MessageRequest;
    use tonic_reflection::pb::v1::server_reflection_response::MessageResponse;
    let t = start(ServerConfig::default()).await;
    let channel = Channel::from_shared(t.url.clone())
        .expect("url")
        .connect()
        .await
        .expect("connects");
    let request = |m| ServerReflectionRequest {
        host: String::new(),
        message_request: Some(m),
    };
    let asks = tokio_stream::iter(vec![
        request(MessageRequest::ListServices(String::new())),
        request(MessageRequest::FileContainingSymbol(
            "framewise.v1.FrameAnalysis".into(),
        )),
    ]);
    let mut replies = ServerReflectionClient::new(channel)
        .server_reflection_info(asks)
        .await
        .expect("reflection answers")
        .into_inner();
    let Some(MessageResponse::ListServicesResponse(list)) = replies
        .message()
        .await
        .expect("a reply")
        .and_then(|r| r.message_response)
    else {
        panic!("no service list")
    };
    let names: Vec<&str> = list.service.iter().map(|s| s.name.as_str()).collect();
    for wanted in ["framewise.v1.FrameAnalysis", "grpc.health.v1.Health"] {
        assert!(names.contains(&wanted), "{names:?}");
    }
    let Some(MessageResponse::FileDescriptorResponse(files)) = replies
        .message()
        .await
        .expect("a reply")
        .and_then(|r| r.message_response)
    else {
        panic!("no file descriptor")
    };
    let described = files.file_descriptor_proto.concat();
    for rpc in [
        "RunSession",
        "ListModelCards",
        "GetModelCard",
        "ReadStatistics",
    ] {
        assert!(
            described.windows(rpc.len()).any(|w| w == rpc.as_bytes()),
            "{rpc} is not in the described file"
        );
    }
    t.server.stop().await.expect("stops");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_metrics_endpoint_exposes_counters_and_latency_histograms() {
    let t = start(ServerConfig {
        metrics_listen: Some("127.0.0.1:0".parse().expect("addr")),
        ..Default::default()
    })
    .await;
    let mut rng = Rng::new(11);
    let inputs = (0..5u64)
        .map(|i| {
            frame_msg(
                i,
                0,
                PixelFormat::Rgb8,
                16,
                16,
                noise_frame(&mut rng, 16, 16),
            )
        })
        .collect();
    run_session(&t.url, opening(pb::FramePolicy::EveryFrame), inputs)
        .await
        .expect("session runs");
    let addr = t.server.metrics_addr.expect("metrics address");
    let mut socket = tokio::net::TcpStream::connect(addr)
        .await
        .expect("connects");
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    socket
        .write_all(b"GET /metrics HTTP/1.1\r\nHost: localhost\r\n\r\n")
        .await
        .expect("request");
    let mut text = String::new();
    socket.read_to_string(&mut text).await.expect("response");
    // Reference: the Prometheus text exposition format (counters, histograms with le buckets in seconds).
    assert!(text.starts_with("HTTP/1.1 200 OK"), "{text}");
    assert!(text.contains("framewise_results_total 5"), "{text}");
    assert!(
        text.contains("# TYPE framewise_stage_seconds histogram"),
        "{text}"
    );
    assert!(
        text.contains(r#"framewise_stage_seconds_count{stage="total"} 5"#),
        "{text}"
    );
    assert!(
        text.contains(r#"framewise_stage_seconds_bucket{stage="inference",le="+Inf"} 5"#),
        "{text}"
    );
    assert!(
        !text.contains("session=") && !text.contains("session_id"),
        "no per-session labels"
    );
    t.server.stop().await.expect("stops");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_idle_session_is_ended_with_a_clear_status() {
    let t = start(ServerConfig {
        idle_timeout_s: 0.3,
        ..Default::default()
    })
    .await;
    let (tx, mut answers) = open_held(&t.url).await;
    let err = answers
        .message()
        .await
        .expect_err("ended by the idle timeout");
    // Not DEADLINE_EXCEEDED, which is the caller's own deadline: the server cancelled the session.
    assert_eq!(err.code(), tonic::Code::Cancelled);
    assert!(err.message().contains("idle timeout"), "{}", err.message());
    drop(tx);
    t.server.stop().await.expect("stops");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_goes_not_serving_refuses_new_sessions_and_lets_open_ones_finish() {
    let t = start(ServerConfig {
        drain_s: 5.0,
        ..Default::default()
    })
    .await;
    let channel = tonic::transport::Channel::from_shared(t.url.clone())
        .expect("url")
        .connect()
        .await
        .expect("connects");
    let mut health = tonic_health::pb::health_client::HealthClient::new(channel);
    let check = |name: &str| tonic_health::pb::HealthCheckRequest {
        service: name.to_string(),
    };
    let serving = tonic_health::pb::health_check_response::ServingStatus::Serving as i32;
    assert_eq!(
        health
            .check(check(""))
            .await
            .expect("health")
            .into_inner()
            .status,
        serving
    );

    // An open session, then shutdown begins.
    let (tx, mut answers) = open_held(&t.url).await;
    let token = t.server.shutdown_token();
    token.cancel();
    tokio::time::sleep(Duration::from_millis(200)).await;
    let not_serving = tonic_health::pb::health_check_response::ServingStatus::NotServing as i32;
    assert_eq!(
        health
            .check(check(""))
            .await
            .expect("health")
            .into_inner()
            .status,
        not_serving,
        "NOT_SERVING first"
    );
    let err = run_session(&t.url, opening(pb::FramePolicy::EveryFrame), vec![])
        .await
        .expect_err("new session refused");
    assert_eq!(err.code(), tonic::Code::Unavailable);

    // The open session still gets its frames answered and its summary.
    let mut rng = Rng::new(3);
    for seq in 0..3u64 {
        tx.send(frame_msg(
            seq,
            0,
            PixelFormat::Rgb8,
            16,
            16,
            noise_frame(&mut rng, 16, 16),
        ))
        .await
        .expect("frame");
    }
    drop(tx);
    let mut results = 0;
    let mut summary = false;
    while let Some(m) = answers.message().await.expect("answers") {
        match m.item {
            Some(pb::session_output::Item::Answer(_)) => results += 1,
            Some(pb::session_output::Item::Summary(_)) => summary = true,
            _ => {}
        }
    }
    assert_eq!((results, summary), (3, true));
    tokio::time::timeout(Duration::from_secs(10), t.server.wait())
        .await
        .expect("stops within the deadline")
        .expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_server_on_the_onnxruntime_engine_says_so_in_every_answer_and_matches_the_engine_offline()
{
    let library = framewise_tests::onnxruntime_library();
    let config = ServerConfig {
        listen: "127.0.0.1:0".parse().expect("addr"),
        engine: framewise_engine::EngineKind::OnnxRuntime,
        onnxruntime_library: Some(library),
        ..ServerConfig::default()
    };
    // No registry given: the server loads the demo model itself, on the configured engine.
    let server = framewise_server::start(config, None)
        .await
        .expect("server starts on ONNX Runtime");
    let url = format!("http://{}", server.addr);
    let mut rng = Rng::new(7);
    let frames: Vec<Vec<u8>> = (0..30).map(|_| noise_frame(&mut rng, 64, 48)).collect();
    let inputs = frames
        .iter()
        .enumerate()
        .map(|(i, d)| {
            frame_msg(
                i as u64,
                1_000_000 + i as i64 * 33_333,
                PixelFormat::Rgb8,
                64,
                48,
                d.clone(),
            )
        })
        .collect();
    let outputs = run_session(&url, opening(pb::FramePolicy::EveryFrame), inputs)
        .await
        .expect("session runs");
    let Some(pb::session_output::Item::Accepted(accepted)) = &outputs[0].item else {
        panic!("first output is not SessionAccepted")
    };
    assert_eq!(
        accepted.model.as_ref().map(|m| m.engine.as_str()),
        Some("onnxruntime")
    );
    let model = framewise_tests::demo_model_onnxruntime();
    let mut scratch = framewise_engine::pipeline::Scratch::default();
    let answers = answers(&outputs);
    assert_eq!(answers.len(), frames.len());
    for (a, data) in answers.iter().zip(&frames) {
        assert_eq!(
            a.model.as_ref().map(|m| m.engine.as_str()),
            Some("onnxruntime"),
            "frame {}: every answer names the engine",
            a.seq
        );
        let Some(pb::answer::Outcome::Result(r)) = &a.outcome else {
            panic!("frame {}: no result", a.seq)
        };
        let frame = FrameRef {
            format: PixelFormat::Rgb8,
            width: 64,
            height: 48,
            stride: 0,
            data,
        };
        let expected =
            framewise_engine::pipeline::analyse(&model, &frame, &Default::default(), &mut scratch)
                .expect("offline analyses");
        // Reference: the same engine offline (itself checked against Python onnxruntime in the reference
        // tests); the service must not change the numbers.
        assert_eq!(r.raw, expected.raw, "frame {}", a.seq);
    }
    server.stop().await.expect("stops");
}

/// The effective CPU latency bound: reading the device gives the aggregated request as a native-endian s32
/// (Linux kernel documentation, Documentation/power/pm_qos_interface.rst; with no request it is the kernel's
/// default of 2,000 seconds).
fn effective_cpu_latency_us() -> Option<i32> {
    let bytes = std::fs::read(framewise_server::wake::CPU_LATENCY_DEVICE).ok()?;
    Some(i32::from_ne_bytes(bytes.get(..4)?.try_into().ok()?))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_wake_latency_bound_is_held_while_the_server_runs_and_released_when_it_stops() {
    let device = std::path::Path::new(framewise_server::wake::CPU_LATENCY_DEVICE);
    let writable = std::fs::OpenOptions::new().write(true).open(device).is_ok();
    let config = ServerConfig {
        listen: "127.0.0.1:0".parse().expect("addr"),
        cpu_wake_latency_us: Some(0),
        ..ServerConfig::default()
    };
    let registry = ModelRegistry::new(vec![demo_model()]);
    if !writable {
        // Without access the server refuses to start and says why, rather than run without the bound.
        eprintln!(
            "{} is not writable here: checking the refusal",
            device.display()
        );
        let Err(err) = framewise_server::start(config, Some(registry)).await else {
            panic!("the server started without the device");
        };
        let text = format!("{err:#}");
        assert!(text.contains("cpu_wake_latency_us = 0"), "{text}");
        assert!(text.contains("write access"), "{text}");
        return;
    }
    let before = effective_cpu_latency_us().expect("the device reads");
    let server = framewise_server::start(config, Some(registry))
        .await
        .expect("server starts");
    assert_eq!(
        effective_cpu_latency_us(),
        Some(0),
        "the server holds the bound while it runs"
    );
    let url = format!("http://{}", server.addr);
    let mut rng = Rng::new(11);
    let inputs = (0..3)
        .map(|i| {
            frame_msg(
                i,
                i as i64 * 33_333,
                PixelFormat::Rgb8,
                32,
                24,
                noise_frame(&mut rng, 32, 24),
            )
        })
        .collect();
    let outputs = run_session(&url, opening(pb::FramePolicy::EveryFrame), inputs)
        .await
        .expect("session runs");
    assert_eq!(answers(&outputs).len(), 3);
    server.stop().await.expect("server stops");
    assert_eq!(
        effective_cpu_latency_us(),
        Some(before),
        "the request is withdrawn when the server stops"
    );
}

#[test]
fn a_wake_latency_bound_out_of_range_is_refused() {
    let config = ServerConfig {
        cpu_wake_latency_us: Some(framewise_server::wake::MAX_WAKE_LATENCY_US + 1),
        ..ServerConfig::default()
    };
    let err = config.validate().expect_err("out of range");
    assert_eq!(err.field, "cpu_wake_latency_us");
}
