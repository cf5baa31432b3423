//! Sessions spread over several server processes by the client: `bench` across three servers with one killed
//! mid-run, and `replay` moving to the next server when its server dies.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use framewise_tests::{binary, free_port, synth_sweep, workspace_root};
use tonic_health::pb::HealthCheckRequest;
use tonic_health::pb::health_client::HealthClient;

/// A `framewise-server` process on a free loopback port, killed when dropped.
struct Server {
    child: Child,
    url: String,
}

impl Server {
    async fn start() -> Self {
        let port = free_port();
        let child = Command::new(binary("framewise-server"))
            .args(["--listen", &format!("127.0.0.1:{port}")])
            .env("NO_COLOR", "1")
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("framewise-server starts");
        let url = format!("http://127.0.0.1:{port}");
        let mut server = Self { child, url };
        let deadline = Instant::now() + Duration::from_secs(60);
        loop {
            assert!(
                server.child.try_wait().ok().flatten().is_none(),
                "the server on port {port} exited"
            );
            if let Ok(channel) = tonic::transport::Endpoint::from_shared(server.url.clone())
                .expect("URL")
                .connect()
                .await
                && let Ok(answer) = HealthClient::new(channel)
                    .check(HealthCheckRequest {
                        service: String::new(),
                    })
                    .await
                && answer.into_inner().status == 1
            {
                return server;
            }
            assert!(
                Instant::now() < deadline,
                "the server did not become SERVING"
            );
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }

    fn kill(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        self.kill();
    }
}

fn scratch(name: &str) -> PathBuf {
    let dir = workspace_root().join("target/test-scratch").join(name);
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).expect("scratch dir");
    dir
}

fn read_json(path: &Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(path).expect("report written")).expect("JSON")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bench_spreads_sessions_over_three_servers_and_names_those_lost_with_a_killed_one() {
    let dir = scratch("spread-bench");
    let mut servers = vec![
        Server::start().await,
        Server::start().await,
        Server::start().await,
    ];
    let report = dir.join("bench.json");
    let mut command = Command::new(binary("framewise"));
    command.arg("bench");
    for s in &servers {
        command.args(["--server", &s.url]);
    }
    let bench = command
        .args(["--sessions", "6", "--fps", "10", "--seconds", "6"])
        .args(["--width", "160", "--height", "120", "--json"])
        .arg(&report)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .expect("bench starts");
    // The third server dies a third of the way through.
    tokio::time::sleep(Duration::from_secs(2)).await;
    let killed = servers[2].url.clone();
    servers[2].kill();
    let out = bench.wait_with_output().expect("bench ends");
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        report.exists(),
        "bench wrote no report (exit {:?}): {stderr}",
        out.status
    );
    let r = read_json(&report);
    let shares = r["per_server"].as_array().expect("per_server");
    assert_eq!(shares.len(), 3);
    // Round robin: sessions 0 and 3 on the first server, 1 and 4 on the second, 2 and 5 on the third.
    for (i, share) in shares.iter().enumerate() {
        let sessions: Vec<u64> = share["sessions"]
            .as_array()
            .expect("sessions")
            .iter()
            .filter_map(|v| v.as_u64())
            .collect();
        assert_eq!(sessions, vec![i as u64, i as u64 + 3], "server {i}");
    }
    // Exactly the killed server's sessions are reported as failed, each naming that server.
    let mut failed: Vec<u64> = shares[2]["failed_sessions"]
        .as_array()
        .expect("failed")
        .iter()
        .filter_map(|v| v.as_u64())
        .collect();
    failed.sort_unstable();
    assert_eq!(failed, vec![2, 5], "the killed server's sessions");
    for share in &shares[..2] {
        assert_eq!(share["failed_sessions"].as_array().map(Vec::len), Some(0));
    }
    let reasons: Vec<&str> = r["failed_sessions"]
        .as_array()
        .expect("reasons")
        .iter()
        .filter_map(|v| v.as_str())
        .collect();
    assert_eq!(reasons.len(), 2, "{reasons:?}");
    for reason in &reasons {
        assert!(reason.contains(&killed), "{reason}");
    }
    // The combined report adds up: per-server results sum to the total; the survivors answered all of
    // their 4 sessions x 60 frames.
    let sum: u64 = shares
        .iter()
        .map(|s| s["results"].as_u64().unwrap_or(0))
        .sum();
    assert_eq!(sum, r["results"].as_u64().expect("results"));
    let survivors: u64 = shares[..2]
        .iter()
        .map(|s| s["results"].as_u64().unwrap_or(0))
        .sum();
    assert_eq!(survivors, 4 * 60);
    assert!(
        shares[2]["results"].as_u64().unwrap_or(0) < 2 * 60,
        "the killed server cannot have answered everything"
    );
    assert_eq!(
        r["scheduled"].as_u64(),
        Some(6 * 60),
        "scheduled frames counted"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn replay_moves_to_the_next_server_and_writes_every_frame_once() {
    let dir = scratch("spread-replay");
    let rec = dir.join("rec");
    let frames = synth_sweep(&rec, 5, 160, 120, 3);
    let mut first = Server::start().await;
    let second = Server::start().await;
    let out = dir.join("out.jsonl");
    let replay = Command::new(binary("framewise"))
        .arg("replay")
        .arg(&rec)
        .args([
            "--server",
            &first.url,
            "--server",
            &second.url,
            "--speed",
            "1",
        ])
        .arg("--out")
        .arg(&out)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .expect("replay starts");
    tokio::time::sleep(Duration::from_millis(1500)).await;
    first.kill();
    let done = replay.wait_with_output().expect("replay ends");
    let stderr = String::from_utf8_lossy(&done.stderr);
    assert!(done.status.success(), "replay failed: {stderr}");
    assert!(
        stderr.contains(&first.url) && stderr.contains("re-running the recording from its start"),
        "the failover is reported: {stderr}"
    );
    let text = std::fs::read_to_string(&out).expect("output");
    let lines: Vec<serde_json::Value> = text
        .lines()
        .map(|l| serde_json::from_str(l).expect("whole JSON lines"))
        .collect();
    assert_eq!(lines[0]["kind"], "header");
    assert_eq!(
        lines[0]["engine_at"].as_str(),
        Some(second.url.as_str()),
        "the file is the second server's run"
    );
    let mut seqs: Vec<u64> = lines[1..]
        .iter()
        .filter_map(|l| l["seq"].as_u64())
        .collect();
    assert_eq!(seqs.len() as u64, frames, "one line per frame");
    seqs.sort_unstable();
    seqs.dedup();
    assert_eq!(
        seqs,
        (0..frames).collect::<Vec<_>>(),
        "every frame exactly once"
    );
}
