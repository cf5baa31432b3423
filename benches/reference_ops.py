#!/usr/bin/env python3
"""Where Python onnxruntime (the reference runtime) spends an inference, node by node: runs one model one frame
at a time with onnxruntime's own profiler (SessionOptions.enable_profiling; its JSON trace has one event of
category "Node" per kernel run, with the node's name and its duration in microseconds) and prints, as one JSON
line, the mean microseconds per frame of every node of the optimised graph, with its operator, and the kind
of layer (depthwise convolution, pointwise convolution...) each node of the ONNX graph belongs to.

Used by `framewise-benchmarks ops`, which sets the figures beside tract's time for the same nodes.

Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
confirmed by a qualified clinician; check local regulations before any clinical use.
"""
import argparse
import json
import os
import tempfile

import numpy as np
import onnx
import onnxruntime as ort
from onnx import helper, numpy_helper


def layer_kinds(path):
    """The kind of layer each node (and each node's output tensor) of the ONNX graph belongs to. A BatchNormalization or an activation that
    follows a convolution belongs to that convolution's kind: both runtimes fold them into it."""
    model = onnx.load(path)
    shapes = {t.name: numpy_helper.to_array(t).shape for t in model.graph.initializer}
    kind_of_output, kinds = {}, {}
    for node in model.graph.node:
        attrs = {a.name: helper.get_attribute_value(a) for a in node.attribute}
        if node.op_type == "Conv":
            w = shapes.get(node.input[1])
            k = "x".join(str(d) for d in w[2:]) if w is not None else "?"
            group = attrs.get("group", 1)
            if group > 1 and w is not None and w[1] == 1:
                kind = f"depthwise {k} convolution"
            elif k == "1x1":
                kind = "pointwise 1x1 convolution"
            else:
                kind = f"full {k} convolution"
        elif node.op_type in ("BatchNormalization", "Clip", "Relu") and node.input[0] in kind_of_output:
            kind = kind_of_output[node.input[0]]
        elif node.op_type == "Add" and any("convolution" in kind_of_output.get(i, "") for i in node.input):
            # A residual add after a convolution: both runtimes fuse it into that convolution's output.
            kind = next(kind_of_output[i] for i in reversed(node.input) if "convolution" in kind_of_output.get(i, ""))
        elif node.op_type == "Add":
            kind = "residual add"
        elif node.op_type in ("GlobalAveragePool", "Flatten", "Gemm"):
            kind = "pooling and classifier"
        else:
            kind = node.op_type
        kinds[node.name] = kind
        for out in node.output:
            kind_of_output[out] = kind
    # Optimised graphs name their nodes after ONNX node names or after the tensors they make.
    return {**kind_of_output, **kinds}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--model", required=True)
    ap.add_argument("--frames", type=int, default=100)
    ap.add_argument("--warmup", type=int, default=20)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as scratch:
        options = ort.SessionOptions()
        # The settings of reference_inference.py and of framewise's engine: one thread, sequential.
        options.intra_op_num_threads = 1
        options.inter_op_num_threads = 1
        options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        options.enable_profiling = True
        options.profile_file_prefix = os.path.join(scratch, "ops")
        session = ort.InferenceSession(args.model, options, providers=["CPUExecutionProvider"])
        inp = session.get_inputs()[0]
        shape = [d if isinstance(d, int) else 1 for d in inp.shape]
        x = np.random.default_rng(3).random(shape, dtype=np.float32)
        for _ in range(args.warmup):
            session.run(None, {inp.name: x})
        for _ in range(args.frames):
            session.run(None, {inp.name: x})
        path = session.end_profiling()
        with open(path) as f:
            events = json.load(f)
    # Only the timed frames count: the trace is read from the first timed run's start on.
    first_timed = None
    runs = [e for e in events if e.get("cat") == "Session" and e.get("name") == "model_run"]
    if len(runs) >= args.frames:
        first_timed = runs[-args.frames]["ts"]
    nodes = {}
    for e in events:
        if e.get("cat") != "Node" or not e.get("name", "").endswith("_kernel_time"):
            continue
        if first_timed is not None and e["ts"] < first_timed:
            continue
        name = e["name"][: -len("_kernel_time")]
        node = nodes.setdefault(name, {"op": e.get("args", {}).get("op_name", ""), "us": 0.0})
        node["us"] += e["dur"]
    for node in nodes.values():
        node["us"] /= args.frames
    print(json.dumps({"engine": f"python onnxruntime {ort.__version__}", "frames": args.frames,
                      "nodes": nodes, "layer_kinds": layer_kinds(args.model)}))


if __name__ == "__main__":
    main()
