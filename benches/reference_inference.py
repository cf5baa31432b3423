#!/usr/bin/env python3
"""Times Python onnxruntime (CPUExecutionProvider) on one model, one frame at a time: the reference that
framewise's engines are compared with in BENCHMARKS.md.

Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
confirmed by a qualified clinician; check local regulations before any clinical use.
"""
import argparse
import json
import time

import numpy as np
import onnxruntime as ort


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--model", required=True)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--frames", type=int, default=300)
    ap.add_argument("--warmup", type=int, default=20)
    args = ap.parse_args()
    options = ort.SessionOptions()
    options.intra_op_num_threads = args.threads
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    session = ort.InferenceSession(args.model, options, providers=["CPUExecutionProvider"])
    inp = session.get_inputs()[0]
    shape = [d if isinstance(d, int) else 1 for d in inp.shape]
    rng = np.random.default_rng(3)
    frames = [rng.random(shape, dtype=np.float32) for _ in range(8)]
    for i in range(args.warmup):
        session.run(None, {inp.name: frames[i % len(frames)]})
    times = []
    for i in range(args.frames):
        x = frames[i % len(frames)]
        t = time.perf_counter()
        session.run(None, {inp.name: x})
        times.append((time.perf_counter() - t) * 1000.0)
    times.sort()
    print(json.dumps({
        "engine": f"python onnxruntime {ort.__version__}",
        "frames": len(times),
        "median_ms": times[len(times) // 2],
        "p99_ms": times[min(len(times) - 1, int(np.ceil(0.99 * len(times))) - 1)],
    }))


if __name__ == "__main__":
    main()
