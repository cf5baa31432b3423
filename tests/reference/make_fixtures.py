#!/usr/bin/env python3
"""Writes the reference fixtures framewise's Rust tests compare against.

Every expected value here comes from a tool outside framewise: onnxruntime (the reference ONNX runtime),
OpenCV (cv2.cvtColor, cv2.resize, cv2.Laplacian, cv2.imencode/imdecode), Pillow (Image.resize, Image.open),
SciPy (signal.lfilter), scikit-learn and NumPy implementations of the ITU-R BT.601 / BT.709 equations. The
exact-preprocessing cases (resize recipes, YUV, files, whole-path parity, exported model shapes) are in
exact.py. Inputs are seeded synthetic arrays (no patient data).

Layout of --out:
  index.json                 what every case is, and where its files are
  bench-model/               the MobileNetV2-shaped benchmark model (made by models-demo/scripts/make_bench_model.py)
  *.bin                      raw little-endian arrays (uint8 frames, float32 tensors)

Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
confirmed by a qualified clinician; check local regulations before any clinical use.
"""
import argparse
import json
import os
import subprocess
import sys
import tomllib

import cv2
import numpy as np

import exact
import onnx
import onnxruntime as ort
from scipy.signal import lfilter
from sklearn.calibration import calibration_curve
from sklearn.metrics import confusion_matrix, roc_auc_score

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def session(path):
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    return ort.InferenceSession(path, sess_options=opts, providers=["CPUExecutionProvider"])


def softmax(x):
    x = x.astype(np.float64)
    e = np.exp(x - x.max(axis=-1, keepdims=True))
    return e / e.sum(axis=-1, keepdims=True)


class Writer:
    def __init__(self, out):
        self.out = out
        self.n = 0

    def bin(self, array, stem):
        self.n += 1
        name = f"{stem}_{self.n:04d}.bin"
        np.ascontiguousarray(array).tofile(os.path.join(self.out, name))
        return name


def read_manifest(package_dir):
    with open(os.path.join(package_dir, "manifest.toml"), "rb") as f:
        return tomllib.load(f)


def smooth_field(rng, h, w, channels, low=0, high=255):
    """A smooth random image with some texture: sums of random sinusoids plus noise."""
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64)
    out = np.zeros((h, w, channels))
    for c in range(channels):
        acc = np.zeros((h, w))
        for _ in range(4):
            fx, fy = rng.uniform(0.005, 0.12, 2)
            phase = rng.uniform(0, 2 * np.pi)
            acc += np.sin(xx * fx * 2 * np.pi + yy * fy * 2 * np.pi + phase)
        acc = (acc - acc.min()) / max(np.ptp(acc), 1e-9)
        out[..., c] = low + (high - low) * acc
    out += rng.normal(0, 4, out.shape)
    return np.clip(np.rint(out), low, high).astype(np.uint8)


# ---------------------------------------------------------------------------------------------------------

def inference_cases(w, name, package_dir, onnx_file, count, seed):
    manifest = read_manifest(package_dir)
    spec = manifest["input"]
    sess = session(os.path.join(package_dir, onnx_file))
    rng = np.random.default_rng(seed)
    shape = [1, 3, spec["height"], spec["width"]] if spec["layout"] == "nchw" else [1, spec["height"], spec["width"], 3]
    cases = []
    for i in range(count):
        # Half plausible normalised images, half wide random values.
        if i % 2 == 0:
            img = smooth_field(rng, spec["height"], spec["width"], 3)
            x = exact.tensor_of(img.astype(np.float64), spec)
        else:
            x = rng.normal(0, 1.5, shape).astype(np.float32)
        logits = sess.run(None, {spec["tensor"]: x})[0]
        probs = softmax(logits)[0] if manifest["output"]["kind"] == "logits" else logits[0].astype(np.float64)
        cases.append({"input": w.bin(x, f"{name}_input"), "shape": list(x.shape), "probs": probs.tolist()})
    return {"model_dir": package_dir, "cases": cases}


def focus_cases(w, seed):
    """Variance of the Laplacian as OpenCV computes it: cv2.Laplacian(ksize=1, CV_64F).var()."""
    rng = np.random.default_rng(seed)
    out = []
    for (fw, fh) in [(96, 96), (224, 224), (33, 17), (1, 5)]:
        gray = smooth_field(rng, fh, fw, 1)[..., 0]
        blurred = cv2.GaussianBlur(gray, (0, 0), 2.0)
        for img in (gray, blurred):
            lap = cv2.Laplacian(img, cv2.CV_64F, ksize=1)
            out.append({"width": fw, "height": fh, "luma": w.bin(img, "luma"), "variance": float(lap.var())})
    # Luma of RGB as cv2.cvtColor(COLOR_RGB2GRAY) gives it.
    rgb = smooth_field(rng, 50, 70, 3)
    luma = {"rgb": w.bin(rgb, "luma_rgb"), "gray": w.bin(cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY), "luma_gray"), "len": 50 * 70}
    return out, luma


def exponential_cases(seed):
    """SciPy lfilter for s[n] = alpha x[n] + (1 - alpha) s[n-1], s[0] = x[0], on fixed-interval input."""
    rng = np.random.default_rng(seed)
    out = []
    for tau_ms, dt_ms in [(100.0, 33.333), (300.0, 40.0), (50.0, 100.0)]:
        alpha = 1 - np.exp(-dt_ms / tau_ms)
        x = rng.dirichlet(np.ones(3), size=60)
        zi = (1 - alpha) * x[0:1, :]  # initial state so that s[0] = x[0]
        s, _ = lfilter([alpha], [1, -(1 - alpha)], x, axis=0, zi=zi)
        out.append({"tau_ms": tau_ms, "dt_ms": dt_ms, "input": x.tolist(), "expected": s.tolist()})
    return out


def metrics_cases(seed):
    """scikit-learn on random predictions: roc_auc_score per class (one-vs-rest), confusion_matrix of the arg-max,
    and the expected calibration error from calibration_curve's uniform bins (10) weighted by bin counts."""
    rng = np.random.default_rng(seed)
    out = []
    for n, k in [(400, 4), (250, 3), (60, 2)]:
        labels = rng.integers(0, k, n)
        logits = rng.normal(0, 1, (n, k))
        logits[np.arange(n), labels] += rng.uniform(0, 2.5)
        probs = softmax(logits).astype(np.float32)
        # A few ties and exact bin edges, which decide how ranks and bins are counted.
        probs[:5] = np.float32(1.0 / k)
        pred = probs.argmax(axis=1)
        auc = [float(roc_auc_score(labels == c, probs[:, c])) for c in range(k)]
        cm = confusion_matrix(labels, pred, labels=list(range(k)))
        conf = probs.max(axis=1).astype(np.float64)
        correct = (pred == labels).astype(int)
        prob_true, prob_pred = calibration_curve(correct, conf, n_bins=10, strategy="uniform")
        bins = np.linspace(0.0, 1.0, 11)
        counts = np.bincount(np.searchsorted(bins[1:-1], conf), minlength=10)
        counts = counts[counts > 0]
        ece = float(np.sum(counts / n * np.abs(prob_true - prob_pred)))
        out.append({"k": k, "labels": labels.tolist(), "probs": probs.astype(float).tolist(), "roc_auc": auc,
                    "confusion": cm.tolist(), "ece": ece, "accuracy": float(correct.mean())})
    return out


def percentile_cases(seed):
    """NumPy percentiles (inverted CDF, the nearest-rank definition) of random latencies in microseconds."""
    rng = np.random.default_rng(seed)
    x = np.rint(rng.lognormal(np.log(4000), 0.6, 20000)).astype(np.int64)
    qs = [50, 90, 99, 99.9, 100]
    xs = np.sort(x)
    ranks = [min(max(int(np.ceil(q / 100 * len(x))), 1), len(x)) for q in qs]
    # The samples one rank below and above, for libraries that round the rank differently.
    around = [[int(xs[max(r - 2, 0)]), int(xs[min(r, len(x) - 1)])] for r in ranks]
    return {"samples": x.tolist(), "q": qs, "around": around,
            "expected": [float(np.percentile(x, q, method="inverted_cdf")) for q in qs]}


def y4m_cases(w, seed):
    """Y4M files written plane by plane with NumPy, for each chroma layout, and one truncated file."""
    rng = np.random.default_rng(seed)
    out = []
    clips = [("420jpeg", 64, 48, ""), ("422", 64, 48, ""), ("444", 64, 48, ""),
             ("420jpeg", 65, 47, " XCOLORRANGE=FULL"), ("422", 33, 9, " XCOLORRANGE=LIMITED")]
    for chroma, width, height, extra in clips:
        cw, ch = {"420jpeg": (2, 2), "422": (2, 1), "444": (1, 1)}[chroma]
        frames = 3
        planes = []
        data = bytearray(f"YUV4MPEG2 W{width} H{height} F25:1 Ip A1:1 C{chroma}{extra}\n".encode())
        for _ in range(frames):
            # Chroma planes of ceil(w / 2) x ceil(h / 2) samples for odd sizes, as ffmpeg writes them.
            y = rng.integers(16, 236, (height, width), dtype=np.uint8)
            u = rng.integers(16, 241, (-(-height // ch), -(-width // cw)), dtype=np.uint8)
            v = rng.integers(16, 241, (-(-height // ch), -(-width // cw)), dtype=np.uint8)
            data += b"FRAME\n" + y.tobytes() + u.tobytes() + v.tobytes()
            planes.append(w.bin(np.concatenate([y.ravel(), u.ravel(), v.ravel()]), f"y4m_{chroma}_planes"))
        name = f"clip_{chroma}_{width}x{height}.y4m"
        with open(os.path.join(w.out, name), "wb") as f:
            f.write(data)
        stated = {" XCOLORRANGE=FULL": "full", " XCOLORRANGE=LIMITED": "limited"}.get(extra)
        out.append({"file": name, "chroma": chroma, "width": width, "height": height, "frames": frames,
                    "interval_ms": 40.0, "planes": planes, "range": stated})
    truncated = bytes(data[: len(data) - 100])
    with open(os.path.join(w.out, "clip_truncated.y4m"), "wb") as f:
        f.write(truncated)
    return {"clips": out, "truncated": {"file": "clip_truncated.y4m", "whole_frames": 2}}


# Operators an image classifier exported to ONNX commonly uses (common practice; the list is ours).
CLASSIFIER_OPS = ["Conv", "Relu", "Clip", "MaxPool", "AveragePool", "GlobalAveragePool", "BatchNormalization",
                  "Gemm", "MatMul", "Add", "Mul", "Softmax", "Flatten", "Reshape", "Transpose", "Concat", "Sigmoid",
                  "Resize"]


def operator_cases(w):
    """The onnx package's own node test cases (onnx.backend.test.case) for CLASSIFIER_OPS, generated here.
    Every graph input but the first is turned into an initializer holding the case's value, as in an exported
    model; the first input and the expected outputs are written beside the model."""
    from onnx import helper, numpy_helper
    from onnx.backend.test.case.node import collect_testcases
    out = []
    # collect_testcases imports its modules once, so collect every case once and pick by the node's operator.
    every = collect_testcases(None)
    for op in CLASSIFIER_OPS:
        picked = [c for c in every if c.model is not None and [n.op_type for n in c.model.graph.node] == [op]]
        for case in picked:
            for k, (inputs, outputs) in enumerate(case.data_sets or []):
                model = onnx.ModelProto()
                model.CopyFrom(case.model)
                graph = model.graph
                names = [i.name for i in graph.input]
                if not names or len(inputs) != len(names):
                    continue
                first = np.asarray(inputs[0])
                for name, value in zip(names[1:], inputs[1:]):
                    if value is None:
                        continue
                    graph.initializer.append(numpy_helper.from_array(np.asarray(value), name))
                keep = [i for i in graph.input if i.name == names[0]]
                del graph.input[:]
                graph.input.extend(keep)
                if first.dtype.kind not in "fiub":
                    continue
                path = w.bin(np.frombuffer(model.SerializeToString(), dtype=np.uint8), f"op_{case.name}_model")
                outs = [np.asarray(o) for o in outputs]
                out.append({
                    "op": op, "name": f"{case.name}_{k}", "model": path,
                    "input": w.bin(first, "op_input"), "input_dtype": str(first.dtype), "input_shape": list(first.shape),
                    "outputs": [{"file": w.bin(o.astype(np.float64), "op_output"), "shape": list(o.shape),
                                 "dtype": str(o.dtype)} for o in outs],
                    "rtol": float(getattr(case, "rtol", 1e-3) or 1e-3), "atol": float(getattr(case, "atol", 1e-7) or 1e-7),
                })
    return out


def unrunnable_model(w):
    """A graph with an operator no engine knows (custom domain), to check that loading refuses it."""
    from onnx import TensorProto, helper
    node = helper.make_node("FrobnicateZones", ["frames"], ["logits"], name="mystery_node", domain="org.example")
    graph = helper.make_graph([node], "unrunnable",
                              [helper.make_tensor_value_info("frames", TensorProto.FLOAT, ["batch", 3, 8, 8])],
                              [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["batch", 2])])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17), helper.make_opsetid("org.example", 1)])
    model.ir_version = 8
    return w.bin(np.frombuffer(model.SerializeToString(), dtype=np.uint8), "unrunnable_model")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--demo-dir", default=os.path.join(ROOT, "models-demo", "package"))
    ap.add_argument("--seed", type=int, default=2024)
    args = ap.parse_args()
    os.makedirs(args.out, exist_ok=True)
    bench_dir = os.path.join(args.out, "bench-model")
    script = os.path.join(ROOT, "models-demo", "scripts", "make_bench_model.py")
    manifest = os.path.join(bench_dir, "manifest.toml")
    if not os.path.exists(manifest) or os.path.getmtime(manifest) < os.path.getmtime(script):
        subprocess.run([sys.executable, os.path.join(ROOT, "models-demo", "scripts", "make_bench_model.py"),
                        "--out", bench_dir, "--seed", "7"], check=True)
    w = Writer(args.out)
    demo = read_manifest(args.demo_dir)
    bench = read_manifest(bench_dir)
    focus, luma = focus_cases(w, args.seed + 4)
    index = {
        "caution": "Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong "
                   "and must be confirmed by a qualified clinician; check local regulations before any clinical use.",
        "versions": {"onnxruntime": ort.__version__, "opencv": cv2.__version__, "numpy": np.__version__},
        "inference": {
            "demo": inference_cases(w, "demo", args.demo_dir, demo["file"], 24, args.seed),
            "bench": inference_cases(w, "bench", bench_dir, bench["file"], 20, args.seed + 1),
        },
        "exact": exact.cases(w, np.random.default_rng(args.seed + 2), args.out),
        "focus": focus,
        "luma": luma,
        "exponential": exponential_cases(args.seed + 5),
        "metrics": metrics_cases(args.seed + 6),
        "percentiles": percentile_cases(args.seed + 7),
        "y4m": y4m_cases(w, args.seed + 8),
        "operators": operator_cases(w),
        "unrunnable_model": unrunnable_model(w),
    }
    tmp = os.path.join(args.out, "index.json.tmp")
    with open(tmp, "w") as f:
        json.dump(index, f)
    os.replace(tmp, os.path.join(args.out, "index.json"))
    print(f"reference fixtures written to {args.out} ({w.n} arrays)")


if __name__ == "__main__":
    main()
