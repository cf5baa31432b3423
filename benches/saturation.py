#!/usr/bin/env python3
"""Saturation: the highest total frame rate at which `framewise bench` still sees a p99 end-to-end latency under
100 ms (and every frame answered, and the scheduled rate achieved), for 1, 4 and 16 sessions, on:

- framewise-server with the ONNX Runtime engine,
- framewise-server with tract,
- the plain Python peer (benches/python-peer/peer.py: grpcio + onnxruntime + OpenCV), the baseline,

all on the MobileNetV2-shaped benchmark network with 224x224 RGB frames, and as a share of the bare engine's
throughput on the same cores (`framewise-benchmarks throughput`, run for two seconds between the bisection
steps, so that the best step is compared with the bare rate just before and just after it). Prints a Markdown
table and writes JSON.

Run from the repository root after `cargo build --release --workspace` and `bash tests/run-all` (which makes
the benchmark network under target/reference-fixtures):

    .venv/bin/python benches/saturation.py [--seconds 8] [--json target/bench/saturation.json]

With --pin the server and the bare engine run on one CPU with one worker and the load generator on the other,
so that the share of bare is measured without the two competing for a core.

With --cpu-wake-latency-us N the script asks Linux that idle CPUs wake within N microseconds for the whole
run (its CPU latency QoS: /dev/cpu_dma_latency held open with the value written; Linux kernel documentation,
Documentation/power/pm_qos_interface.rst), the same request framewise-server's `cpu_wake_latency_us` makes.
Held by the script, it applies alike to every server, the peer and the bare engine.

The bare engine is also bisected under the same limit, one step after each of the server's: fed at a fixed
rate (`framewise-benchmarks throughput --rate`), frames taken in order, latency counted from each frame's due
time, the step held when p99 stays under 100 ms and 97 % of the rate is achieved. The last two columns set
the server's highest rate against that: what the server reaches of what the bare engine reaches under the
same rule on the same minutes, where the share of bare throughput also counts the headroom any queue needs to
keep p99 down on a host whose speed moves (--no-bare-open-loop skips it).

When both the ONNX Runtime engine and the peer are measured, each session count ends with equal-load runs:
both servers are fed the same total rate for --equal-runs rounds, alternating, so that their p50 and p99 are
compared on the same load (the ratio is of the median p99 over the rounds, so that one stall of the host in
one round does not decide it). The rates are --equal-loads fractions of the lower of the two servers' highest
rates (which both held): 1.0 is the slower server's limit, 0.8 a load both carry with room to spare.

Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
confirmed by a qualified clinician; check local regulations before any clinical use.
"""
import argparse
import glob
import json
import os
import socket
import struct
import subprocess
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
RELEASE = os.path.join(ROOT, "target", "release")
MODEL = os.path.join(ROOT, "target", "reference-fixtures", "bench-model")
SIZE = (224, 224)
FORMAT = "rgb8"
P99_LIMIT_MS = 100.0
# Seconds of bare engine between two bisection steps.
BARE_STEP_S = 2
# Whether the bare engine gets its own bisection under the same p99 limit (--no-bare-open-loop: not).
BARE_OPEN_LOOP = True


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


def cpu_seconds(pid):
    """CPU time (user + system, all threads) a process has used so far, from /proc/PID/stat."""
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    # After the command name: state is field 3, utime 14 and stime 15 (proc(5)).
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


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


def saturate(kind, sessions, seconds, scratch, steps, engine):
    """Bisection on the total rate; returns ((best total fps that held, its report, the bare engine's rate
    around that step) or None, the bare engine's highest rate under the same limit or None). The bare engine
    runs for BARE_STEP_S between steps (the server idles meanwhile), so each step is compared with the bare
    rate of the same minute: a shared machine drifts by a third within minutes."""
    proc, url = start(kind, sessions)
    try:
        bare_rates = [bare(engine, BARE_STEP_S)]
        hi_total = bare_rates[0] * 1.1
        lo, hi, best = 0.0, hi_total, None
        # The bare engine's own bisection under the same p99 limit, one step after each of the server's.
        bare_lo, bare_hi, bare_best = 0.0, hi_total, None
        for step in range(steps):
            total = hi_total * 0.6 if step == 0 else (lo + hi) / 2
            cpu_before = cpu_seconds(proc.pid)
            r = bench(url, sessions, total / sessions, seconds, os.path.join(scratch, "run.json"))
            # The server's CPU time per answered frame: what one frame costs it, whatever the queueing.
            r["server_cpu_ms_per_frame"] = (cpu_seconds(proc.pid) - cpu_before) * 1000 / max(r["results"], 1)
            bare_rates.append(bare(engine, BARE_STEP_S))
            ok = holds(r, total)
            around = (bare_rates[-2] + bare_rates[-1]) / 2
            print(f"  {kind:24s} {sessions:2d} sessions {total:7.1f} fps: p99 {r['end_to_end_ms']['p99']:8.1f} ms,"
                  f" achieved {r['achieved_fps']:6.1f}, failed {r['failed']}, bare around it {around:6.1f},"
                  f" server CPU {r['server_cpu_ms_per_frame']:.2f} ms per frame"
                  f" -> {'holds' if ok else 'no'}",
                  file=sys.stderr, flush=True)
            if ok:
                lo, best = total, (total, r, around)
            else:
                hi = total
            if BARE_OPEN_LOOP:
                rate = hi_total * 0.6 if step == 0 else (bare_lo + bare_hi) / 2
                b = bare_open_loop(engine, rate, seconds)
                b_ok = b["latency_p99_ms"] <= P99_LIMIT_MS and b["achieved_fps"] >= 0.97 * rate
                print(f"  {'bare engine, open loop':24s}             {rate:7.1f} fps: p99 {b['latency_p99_ms']:8.1f} ms,"
                      f" achieved {b['achieved_fps']:6.1f} -> {'holds' if b_ok else 'no'}", file=sys.stderr, flush=True)
                if b_ok:
                    bare_lo, bare_best = rate, rate
                else:
                    bare_hi = rate
        return best, bare_best
    finally:
        stop(proc)


def equal_load(sessions, total, seconds, scratch, runs):
    """framewise (ONNX Runtime engine) and the peer fed the same total rate, alternating, `runs` rounds each.
    Returns {kind: [(p50, p99, achieved, failed), ...]}."""
    out = {"framewise onnxruntime": [], "python peer": []}
    for _ in range(runs):
        for kind in out:
            proc, url = start(kind, sessions)
            try:
                r = bench(url, sessions, total / sessions, seconds, os.path.join(scratch, "equal.json"))
            finally:
                stop(proc)
            e = r["end_to_end_ms"]
            out[kind].append((e["p50"], e["p99"], r["achieved_fps"], r["failed"]))
            print(f"  equal load {sessions:2d} sessions {total:7.1f} fps: {kind:22s} p50 {e['p50']:6.1f} ms,"
                  f" p99 {e['p99']:6.1f} ms, achieved {r['achieved_fps']:6.1f}, failed {r['failed']}",
                  file=sys.stderr, flush=True)
    return out


def median(values):
    v = sorted(values)
    mid = len(v) // 2
    return v[mid] if len(v) % 2 else (v[mid - 1] + v[mid]) / 2


def stop(proc):
    proc.terminate()
    try:
        proc.wait(timeout=20)
    except subprocess.TimeoutExpired:
        proc.kill()


def bare_throughput(kind, seconds, *extra):
    """`framewise-benchmarks throughput` on the server's CPU and worker count; its JSON line."""
    out = subprocess.run([os.path.join(RELEASE, "framewise-benchmarks"), "throughput", "--engine", kind,
                          "--model", MODEL, "--workers", "1" if PIN else str(os.cpu_count() or 2),
                          "--seconds", str(seconds), *extra],
                         capture_output=True, text=True, check=True, preexec_fn=pinned(PIN and PIN[1]))
    return json.loads(out.stdout.strip().splitlines()[-1])


def bare_open_loop(kind, rate, seconds):
    """The bare engine fed at `rate` frames per second, latency counted from each frame's due time
    (`framewise-benchmarks throughput --rate`)."""
    return bare_throughput(kind, seconds, "--rate", f"{rate:.3f}")


def bare(kind, seconds):
    return bare_throughput(kind, seconds)["frames_per_second"]


def main():
    global MODEL, SIZE, FORMAT, PIN, BARE_OPEN_LOOP
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
    ap.add_argument("--cpu-wake-latency-us", type=int, default=None,
                    help="hold idle CPUs' wake-up time to this bound for the whole run (0: keep them polling)")
    ap.add_argument("--no-bare-open-loop", action="store_true",
                    help="skip the bare engine's own bisection under the same p99 limit")
    ap.add_argument("--equal-runs", type=int, default=3,
                    help="rounds of the equal-load comparison of framewise and the peer (0: none)")
    ap.add_argument("--equal-loads", default="1.0,0.8",
                    help="equal loads as fractions of the lower of the two servers' highest rates")
    args = ap.parse_args()
    wake_hold = None
    if args.cpu_wake_latency_us is not None:
        # Kept open until the script ends: closing the device withdraws the request.
        try:
            wake_hold = os.open("/dev/cpu_dma_latency", os.O_WRONLY)
        except OSError as e:
            sys.exit(f"--cpu-wake-latency-us: cannot open /dev/cpu_dma_latency ({e}); it needs root")
        os.write(wake_hold, struct.pack("i", args.cpu_wake_latency_us))
    BARE_OPEN_LOOP = not args.no_bare_open_loop
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
    print(f"server and bare engine on {where}", file=sys.stderr)
    rows = []
    engines = {"framewise onnxruntime": "onnxruntime", "python peer": "onnxruntime", "framewise tract": "tract"}
    servers = args.servers.split(",")
    compare = args.equal_runs > 0 and "framewise onnxruntime" in servers and "python peer" in servers
    equal_rows = []
    for sessions in [int(s) for s in args.sessions.split(",")]:
        for kind in servers:
            engine = engines[kind]
            found, bare_limit = saturate(kind, sessions, args.seconds, scratch, args.steps, engine)
            total, r, bare_fps = found if found else (0.0, None, 0.0)
            rows.append({"server": kind, "sessions": sessions, "max_total_fps": total,
                         "bare_engine_fps": bare_fps,
                         "share_of_bare": total / bare_fps if bare_fps else 0.0,
                         "p50_ms": r["end_to_end_ms"]["p50"] if r else None,
                         "p99_ms": r["end_to_end_ms"]["p99"] if r else None,
                         "server_cpu_ms_per_frame": r["server_cpu_ms_per_frame"] if r else None,
                         "bare_open_loop_fps": bare_limit})
        if compare:
            held = [row["max_total_fps"] for row in rows[-len(servers):]
                    if row["server"] in ("framewise onnxruntime", "python peer")]
            for fraction in [float(f) for f in args.equal_loads.split(",")]:
                common = min(held) * fraction
                if common > 0:
                    runs = equal_load(sessions, common, args.seconds, scratch, args.equal_runs)
                    equal_rows.append({"sessions": sessions, "fraction": fraction, "total_fps": common,
                                       "runs": runs})
    print("| server | sessions | highest total fps with p99 < 100 ms | p50 ms | p99 ms |"
          " bare engine fps around that step | share of bare | server CPU ms per frame |"
          " frames per CPU-second, share of bare | bare engine's highest fps with p99 < 100 ms |"
          " share of that |")
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    for row in rows:
        p50 = f"{row['p50_ms']:.1f}" if row["p50_ms"] is not None else "-"
        p99 = f"{row['p99_ms']:.1f}" if row["p99_ms"] is not None else "-"
        # With one worker the bare engine uses one CPU-second per second, so frames per CPU-second over the
        # bare rate is the share a server would reach if nothing but its own work slowed it.
        cpu = row["server_cpu_ms_per_frame"]
        cpu_ms = f"{cpu:.2f}" if cpu else "-"
        cpu_share = f"{1000 / cpu / row['bare_engine_fps']:.2f}" if cpu and row["bare_engine_fps"] and PIN else "-"
        limit = row["bare_open_loop_fps"]
        open_fps = f"{limit:.1f}" if limit else "-"
        open_share = f"{row['max_total_fps'] / limit:.2f}" if limit else "-"
        print(f"| {row['server']} | {row['sessions']} | {row['max_total_fps']:.1f} | {p50} | {p99} |"
              f" {row['bare_engine_fps']:.1f} |"
              f" {row['share_of_bare']:.2f} | {cpu_ms} | {cpu_share} |"
              f" {open_fps} | {open_share} |")
    if equal_rows:
        print()
        print("| sessions | load | total fps, both servers | framewise p50 ms | framewise p99 ms | peer p50 ms |"
              " peer p99 ms | median p99, framewise / peer |")
        print("|---|---|---|---|---|---|---|---|")
        for row in equal_rows:
            fw, peer = row["runs"]["framewise onnxruntime"], row["runs"]["python peer"]
            # A run marked * did not hold the load (a frame failed, or under 97 % of the rate was achieved).
            mark = lambda run: "" if run[3] == 0 and run[2] >= 0.97 * row["total_fps"] else "*"
            cell = lambda runs, i: " / ".join(f"{run[i]:.1f}{mark(run) if i == 1 else ''}" for run in runs)
            ratio = median([run[1] for run in fw]) / median([run[1] for run in peer])
            print(f"| {row['sessions']} | {row['fraction']:.2f} | {row['total_fps']:.1f} | {cell(fw, 0)} | {cell(fw, 1)} |"
                  f" {cell(peer, 0)} | {cell(peer, 1)} | {ratio:.2f} |")
    with open(args.json, "w") as f:
        json.dump({"caution": "Decision support only, not a diagnosis.", "p99_limit_ms": P99_LIMIT_MS,
                   "pinned": PIN, "cpu_wake_latency_us": args.cpu_wake_latency_us, "rows": rows,
                   "equal_load": equal_rows}, f, indent=2)


if __name__ == "__main__":
    main()
