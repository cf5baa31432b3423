//! A Prometheus text endpoint on its own port: counters and latency histograms in seconds, no per-session
//! labels. A minimal HTTP/1.1 responder: every request gets the current exposition.

use std::fmt::Write as _;
use std::sync::Arc;

use framewise_engine::latency::STAGES;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;

use crate::stats::ServerStats;

/// Histogram bucket bounds in seconds (0.5 ms to 1 s; a frame interval at 30 fps is 33 ms).
pub const BUCKETS_S: [f64; 12] = [
    0.0005, 0.001, 0.002, 0.005, 0.010, 0.020, 0.033, 0.050, 0.100, 0.200, 0.500, 1.0,
];

/// Largest request read before answering.
const MAX_REQUEST_BYTES: usize = 8192;

/// Renders the exposition text.
pub fn render(stats: &ServerStats) -> String {
    let s = stats.snapshot();
    let mut out = String::new();
    let _ = writeln!(
        out,
        "# framewise metrics. Decision support only, not a diagnosis."
    );
    for (name, help, value) in [
        (
            "framewise_sessions_open",
            "Sessions open now.",
            s.sessions_open,
        ),
        (
            "framewise_sessions_total",
            "Sessions opened since start.",
            s.sessions_total,
        ),
        (
            "framewise_sessions_refused_total",
            "Sessions refused.",
            s.sessions_refused,
        ),
        ("framewise_frames_total", "Frames received.", s.frames),
        ("framewise_results_total", "Frames analysed.", s.results),
        (
            "framewise_skipped_total",
            "Frames skipped (latest-only policy).",
            s.skipped,
        ),
        (
            "framewise_frame_errors_total",
            "Frames answered with an error.",
            s.errors,
        ),
        (
            "framewise_deadline_missed_total",
            "Frames past their deadline.",
            s.deadline_missed,
        ),
    ] {
        let kind = if name == "framewise_sessions_open" {
            "gauge"
        } else {
            "counter"
        };
        let _ = writeln!(
            out,
            "# HELP {name} {help}\n# TYPE {name} {kind}\n{name} {value}"
        );
    }
    let _ = writeln!(
        out,
        "# HELP framewise_stage_seconds Time per stage in the server.\n# TYPE framewise_stage_seconds histogram"
    );
    for stage in STAGES {
        let Some(h) = s.book.stage(stage) else {
            continue;
        };
        for bound in BUCKETS_S {
            let count = h.count_between(0, (bound * 1e6) as u64);
            let _ = writeln!(
                out,
                "framewise_stage_seconds_bucket{{stage=\"{stage}\",le=\"{bound}\"}} {count}"
            );
        }
        let _ = writeln!(
            out,
            "framewise_stage_seconds_bucket{{stage=\"{stage}\",le=\"+Inf\"}} {}",
            h.len()
        );
        let sum_s = h.mean() * h.len() as f64 / 1e6;
        let _ = writeln!(
            out,
            "framewise_stage_seconds_sum{{stage=\"{stage}\"}} {sum_s}"
        );
        let _ = writeln!(
            out,
            "framewise_stage_seconds_count{{stage=\"{stage}\"}} {}",
            h.len()
        );
    }
    out
}

/// Serves the exposition until `stop` is cancelled.
pub async fn serve(listener: TcpListener, stats: Arc<ServerStats>, stop: CancellationToken) {
    loop {
        let accepted = tokio::select! {
            a = listener.accept() => a,
            _ = stop.cancelled() => return,
        };
        let Ok((mut socket, _)) = accepted else {
            continue;
        };
        let stats = stats.clone();
        tokio::spawn(async move {
            let mut buf = vec![0u8; MAX_REQUEST_BYTES];
            let mut read = 0;
            // Read until the end of the request head (or the limit, or a short timeout).
            while read < buf.len() {
                let n = match tokio::time::timeout(
                    std::time::Duration::from_secs(5),
                    socket.read(&mut buf[read..]),
                )
                .await
                {
                    Ok(Ok(n)) if n > 0 => n,
                    _ => break,
                };
                read += n;
                if buf[..read].windows(4).any(|w| w == b"\r\n\r\n") {
                    break;
                }
            }
            let body = render(&stats);
            let head = format!(
                "HTTP/1.1 200 OK\r\nContent-Type: text/plain; version=0.0.4\r\nContent-Length: {}\r\nConnection: close\r\n\r\n",
                body.len()
            );
            let _ = socket.write_all(head.as_bytes()).await;
            let _ = socket.write_all(body.as_bytes()).await;
            let _ = socket.shutdown().await;
        });
    }
}
