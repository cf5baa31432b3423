#!/usr/bin/env python3
"""Saturation: the highest total frame rate at which `framewise bench` still sees a p99 end-to-end latency under
100 ms (and every frame answered, and the scheduled rate achieved), for 1, 4 and 16 sessions, on:

- framewise-server with the ONNX Runtime engine,
- framewise-server with tract,
- the plain Python peer (benches/python-peer/peer.py: grpcio + onnxruntime + OpenCV), the baseline,

all on the MobileNetV2-shaped benchmark network with 224x224 RGB frames, and as a share of the bare engine's
throughput on the same cores (`framewise-benchmarks throughput`, measured just before and just after each
server's runs). Prints a Markdown table and writes JSON.

Run from the repository root after `cargo build --release --workspace` and `bash tests/run-all` (which makes
the benchmark network under target/reference-fixtures):

    .venv/bin/python benches/saturation.py [--seconds 8] [--json target/bench/saturation.json]

With --pin the server and the bare engine run on one CPU with one worker and the load generator on the other,
so that the share of bare is measured without the two competing for a core.

Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
confirmed by a qualified clinician; check local regulations before any clinical use.
"""
import argparse
import glob
import json
import os
import socket
import subprocess
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
RELEASE = os.path.join(ROOT, "target", "release")
MODEL = os.path.join(ROOT, "target", "reference-fixtures", "bench-model")
SIZE = (224, 224)
FORMAT = "rgb8"
P99_LIMIT_MS = 100.0


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def onnxruntime_library():
    import onnxruntime
    capi = os.path.join(os.path.dirname(onnxruntime.__file__), "capi")
    return sorted(glob.glob(os.path.join(capi, "libonnxruntime.so*")))[-1]


def wait_ready(port, proc, timeout=60.0):
    end = time.time() + timeout
    while time.time() < end:
        if proc.poll() is not None:
            sys.exit(f"server exited with {proc.returncode}")
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.5):
                time.sleep(0.5)  # listening; give model loading and warm-up a moment
                return
        except OSError:
            time.sleep(0.1)
    sys.exit("server did not start")


# --pin: the server (and the bare engine) on CPU 1 with one worker, the load generator on CPU 0, so that
# the two do not share a core; None: everything shares every core.
PIN = None


def pinned(cpu):
    """A preexec_fn that keeps the child on one CPU (None: no pinning)."""
    if PIN is None:
        return None
    return lambda: os.sched_setaffinity(0, {cpu})


def start(kind, sessions):
    port = free_port()
    if kind == "python peer":
        cmd = [sys.executable, os.path.join(ROOT, "benches", "python-peer", "peer.py"),
               "--listen", f"127.0.0.1:{port}", "--model", MODEL, "--intra-threads", "1",
               "--workers", str(sessions + 4)]
    else:
        engine = "onnxruntime" if kind == "framewise onnxruntime" else "tract"
        cmd = [os.path.join(RELEASE, "framewise-server"), "--listen", f"127.0.0.1:{port}",
               "--model", MODEL, "--no-demo-model", "--engine", engine, "--max-sessions", "64"]
        if engine == "onnxruntime":
            cmd += ["--onnxruntime-library", onnxruntime_library()]
        if PIN is not None:
            cmd += ["--workers", "1"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            preexec_fn=pinned(PIN and PIN[1]))
    wait_ready(port, proc)
    return proc, f"http://127.0.0.1:{port}"


def bench(url, sessions, fps, seconds, out):
    cmd = [os.path.join(RELEASE, "framewise"), "bench", "--server", url, "--sessions", str(sessions),
           "--fps", f"{fps:.3f}", "--seconds", str(seconds), "--width", str(SIZE[0]), "--height", str(SIZE[1]),
           "--format", FORMAT, "--json", out]
    subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=False,
                   preexec_fn=pinned(PIN and PIN[0]))
    with open(out) as f:
        return json.load(f)


def holds(r, total_fps):
    return (r["failed"] == 0 and r["end_to_end_ms"]["p99"] <= P99_LIMIT_MS
            and r["achieved_fps"] >= 0.97 * total_fps)


def saturate(kind, sessions, seconds, hi_total, scratch, steps):
    """Bisection on the total rate; returns (best total fps that held, its report)."""
    proc, url = start(kind, sessions)
    try:
        lo, hi, best = 0.0, hi_total, None
        for step in range(steps):
            total = hi_total * 0.6 if step == 0 else (lo + hi) / 2
            r = bench(url, sessions, total / sessions, seconds, os.path.join(scratch, "run.json"))
            ok = holds(r, total)
            print(f"  {kind:24s} {sessions:2d} sessions {total:7.1f} fps: p99 {r['end_to_end_ms']['p99']:8.1f} ms,"
                  f" achieved {r['achieved_fps']:6.1f}, failed {r['failed']} -> {'holds' if ok else 'no'}",
                  file=sys.stderr, flush=True)
            if ok:
                lo, best = total, (total, r)
            else:
                hi = total
        return best
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()


def bare(kind):
    out = subprocess.run([os.path.join(RELEASE, "framewise-benchmarks"), "throughput", "--engine", kind,
                          "--model", MODEL,
                          "--workers", "1" if PIN else str(os.cpu_count() or 2), "--seconds", "6"],
                         capture_output=True, text=True, check=True, preexec_fn=pinned(PIN and PIN[1]))
    return json.loads(out.stdout.strip().splitlines()[-1])["frames_per_second"]


def main():
    global MODEL, SIZE, FORMAT, PIN
    ap = argparse.ArgumentParser()
    ap.add_argument("--seconds", type=float, default=8.0)
    ap.add_argument("--sessions", default="1,4,16")
    ap.add_argument("--json", default=os.path.join(ROOT, "target", "bench", "saturation.json"))
    ap.add_argument("--model", default=MODEL, help="model package (default: the benchmark network)")
    ap.add_argument("--frame", default="224x224", help="frame size WxH")
    ap.add_argument("--format", default="rgb8", help="pixel format of the frames")
    ap.add_argument("--servers", default="framewise onnxruntime,python peer,framewise tract")
    ap.add_argument("--steps", type=int, default=6, help="bisection steps per session count")
    ap.add_argument("--pin", action="store_true",
                    help="server and bare engine on CPU 1 with one worker, load generator on CPU 0")
    args = ap.parse_args()
    if args.pin:
        if len(os.sched_getaffinity(0)) < 2:
            sys.exit("--pin needs two CPUs")
        PIN = sorted(os.sched_getaffinity(0))[:2]
    MODEL = os.path.abspath(args.model)
    SIZE = tuple(int(v) for v in args.frame.split("x"))
    FORMAT = args.format
    scratch = os.path.dirname(args.json)
    os.makedirs(scratch, exist_ok=True)
    where = f"CPU {PIN[1]} (load generator on CPU {PIN[0]})" if PIN else f"{os.cpu_count()} cores"
    rows = []
    engines = {"framewise onnxruntime": "onnxruntime", "python peer": "onnxruntime", "framewise tract": "tract"}
    for kind in args.servers.split(","):
        engine = engines[kind]
        for sessions in [int(s) for s in args.sessions.split(",")]:
            # The bare engine just before and just after, averaged: a shared machine's speed drifts over
            # minutes, so the share is taken against the bare rate of the same minutes.
            before = bare(engine)
            found = saturate(kind, sessions, args.seconds, before * 1.1, scratch, args.steps)
            after = bare(engine)
            bare_fps = (before + after) / 2
            print(f"  bare {engine} on {where}: {before:.1f} before, {after:.1f} after", file=sys.stderr)
            total, r = found if found else (0.0, None)
            rows.append({"server": kind, "sessions": sessions, "max_total_fps": total,
                         "bare_engine_fps": bare_fps, "bare_before_fps": before, "bare_after_fps": after,
                         "share_of_bare": total / bare_fps,
                         "p50_ms": r["end_to_end_ms"]["p50"] if r else None,
                         "p99_ms": r["end_to_end_ms"]["p99"] if r else None})
    print("| server | sessions | highest total fps with p99 < 100 ms | p50 ms | p99 ms |"
          " bare engine fps (before / after) | share of bare |")
    print("|---|---|---|---|---|---|---|")
    for row in rows:
        p50 = f"{row['p50_ms']:.1f}" if row["p50_ms"] is not None else "-"
        p99 = f"{row['p99_ms']:.1f}" if row["p99_ms"] is not None else "-"
        print(f"| {row['server']} | {row['sessions']} | {row['max_total_fps']:.1f} | {p50} | {p99} |"
              f" {row['bare_engine_fps']:.1f} ({row['bare_before_fps']:.1f} / {row['bare_after_fps']:.1f}) |"
              f" {row['share_of_bare']:.2f} |")
    with open(args.json, "w") as f:
        json.dump({"caution": "Decision support only, not a diagnosis.", "p99_limit_ms": P99_LIMIT_MS,
                   "pinned": PIN, "rows": rows}, f, indent=2)


if __name__ == "__main__":
    main()
