#!/usr/bin/env python3
"""Saturation: the highest total frame rate at which `framewise bench` still sees a p99 end-to-end latency under
100 ms (and every frame answered, and the scheduled rate achieved), for 1, 4 and 16 sessions, on:

- framewise-server with the ONNX Runtime engine,
- framewise-server with tract,
- the plain Python peer (benches/python-peer/peer.py: grpcio + onnxruntime + OpenCV), the baseline,

all on the MobileNetV2-shaped benchmark network with 224x224 RGB frames, and as a share of the bare engine's
throughput on the same cores (`framewise-benchmarks throughput`). Prints a Markdown table and writes JSON.

Run from the repository root after `cargo build --release --workspace` and `bash tests/run-all` (which makes
the benchmark network under target/reference-fixtures):

    .venv/bin/python benches/saturation.py [--seconds 8] [--json target/bench/saturation.json]

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
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wait_ready(port, proc)
    return proc, f"http://127.0.0.1:{port}"


def bench(url, sessions, fps, seconds, out):
    cmd = [os.path.join(RELEASE, "framewise"), "bench", "--server", url, "--sessions", str(sessions),
           "--fps", f"{fps:.3f}", "--seconds", str(seconds), "--width", str(SIZE[0]), "--height", str(SIZE[1]),
           "--format", FORMAT, "--json", out]
    subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=False)
    with open(out) as f:
        return json.load(f)


def holds(r, total_fps):
    return (r["failed"] == 0 and r["end_to_end_ms"]["p99"] <= P99_LIMIT_MS
            and r["achieved_fps"] >= 0.97 * total_fps)


def saturate(kind, sessions, seconds, hi_total, scratch):
    """Bisection on the total rate; returns (best total fps that held, its report)."""
    proc, url = start(kind, sessions)
    try:
        lo, hi, best = 0.0, hi_total, None
        for step in range(6):
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
                          "--workers", str(os.cpu_count() or 2), "--seconds", "6"],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])["frames_per_second"]


def main():
    global MODEL, SIZE, FORMAT
    ap = argparse.ArgumentParser()
    ap.add_argument("--seconds", type=float, default=8.0)
    ap.add_argument("--sessions", default="1,4,16")
    ap.add_argument("--json", default=os.path.join(ROOT, "target", "bench", "saturation.json"))
    ap.add_argument("--model", default=MODEL, help="model package (default: the benchmark network)")
    ap.add_argument("--frame", default="224x224", help="frame size WxH")
    ap.add_argument("--format", default="rgb8", help="pixel format of the frames")
    ap.add_argument("--servers", default="framewise onnxruntime,python peer,framewise tract")
    args = ap.parse_args()
    MODEL = os.path.abspath(args.model)
    SIZE = tuple(int(v) for v in args.frame.split("x"))
    FORMAT = args.format
    scratch = os.path.dirname(args.json)
    os.makedirs(scratch, exist_ok=True)
    bare_fps = {"onnxruntime": bare("onnxruntime"), "tract": bare("tract")}
    print(f"bare throughput on {os.cpu_count()} cores: {bare_fps}", file=sys.stderr)
    rows = []
    engines = {"framewise onnxruntime": "onnxruntime", "python peer": "onnxruntime", "framewise tract": "tract"}
    for kind in args.servers.split(","):
        engine = engines[kind]
        for sessions in [int(s) for s in args.sessions.split(",")]:
            found = saturate(kind, sessions, args.seconds, bare_fps[engine] * 1.1, scratch)
            total, r = found if found else (0.0, None)
            rows.append({"server": kind, "sessions": sessions, "max_total_fps": total,
                         "bare_engine_fps": bare_fps[engine], "share_of_bare": total / bare_fps[engine],
                         "p50_ms": r["end_to_end_ms"]["p50"] if r else None,
                         "p99_ms": r["end_to_end_ms"]["p99"] if r else None})
    print("| server | sessions | highest total fps with p99 < 100 ms | p50 ms | p99 ms | bare engine fps | share of bare |")
    print("|---|---|---|---|---|---|---|")
    for row in rows:
        p50 = f"{row['p50_ms']:.1f}" if row["p50_ms"] is not None else "-"
        p99 = f"{row['p99_ms']:.1f}" if row["p99_ms"] is not None else "-"
        print(f"| {row['server']} | {row['sessions']} | {row['max_total_fps']:.1f} | {p50} | {p99} |"
              f" {row['bare_engine_fps']:.1f} | {row['share_of_bare']:.2f} |")
    with open(args.json, "w") as f:
        json.dump({"caution": "Decision support only, not a diagnosis.", "p99_limit_ms": P99_LIMIT_MS,
                   "rows": rows}, f, indent=2)


if __name__ == "__main__":
    main()
