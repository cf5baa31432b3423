#!/usr/bin/env python3
"""framewise: trains the toy demo model "phantom-zones" and exports it as ONNX with its manifest.

The demo model is a tiny CNN, trained here in pure numpy (hand-written forward and backward passes, im2col
convolutions, Adam) on synthetic frames of an invented bench-top phantom (a printed drum with four zone
textures) written by the `framewise-synth` binary. It exists to exercise the framewise pipeline. It is a
toy, not a medical model, and must never be used on patients.

    python models-demo/scripts/train_demo_model.py                # writes models-demo/package/*
    python models-demo/scripts/train_demo_model.py --work /tmp/fw-train --reuse-data

Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
confirmed by a qualified clinician; check local regulations before any clinical use.

Dependencies: numpy, onnx, opencv (cv2); onnxruntime for the self-check only.
Reproducibility: every random draw comes from seeded generators, so the same seeds give the same model.
Bytes are identical where numpy permits: the BLAS thread count is pinned to 2 (override with
OPENBLAS_NUM_THREADS), but the BLAS library may still pick different kernels on different CPUs, which can
change the last bits of float32 sums. The model also depends on the framewise-synth version that wrote the
frames: retrain after changing the generator.
"""

from __future__ import annotations

import argparse
import csv
import math
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# The BLAS thread count changes the float32 summation order (1 and 2 threads give different weights):
# pin it before numpy loads, so that the same seeds give the same bytes on any machine with the same kernels.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "2")

import cv2
import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

CAUTION = (
    "Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must "
    "be confirmed by a qualified clinician; check local regulations before any clinical use."
)

REPO = Path(__file__).resolve().parents[2]
MODEL_NAME = "phantom-zones"
MODEL_FILE = "phantom-zones.onnx"
CLASSES = ["plain", "dotted", "striped", "grid"]  # the model's output order, as framewise-synth labels them
FRAME_W, FRAME_H = 640, 480
SIZE = 96  # network input width and height
SCALE = 1.0 / 255.0
MEAN = [0.5, 0.5, 0.5]
STD = [0.25, 0.25, 0.25]
OPSET = 17
IR_VERSION = 8  # onnxruntime 1.32 reads IR versions up to 11; 8 is the IR version that opset 17 shipped with

# Architecture: four 3x3 convolutions, stride 2, padding 1, each followed by ReLU (96 -> 48 -> 24 -> 12 -> 6;
# the fourth widens the receptive field to 31 input pixels, enough for the coarsest textures); then global
# average pooling and one fully connected layer to the class logits (no softmax in the graph).
CONV_CHANNELS = [(3, 12), (12, 24), (24, 32), (32, 32)]


# ----------------------------------------------------------------------------------------------------------
# data


def start_synth(synth: Path, args: list[str], out: Path, reuse: bool):
    """Starts framewise-synth writing a recording into `out`: (process, its stderr file), or None when
    reusing a complete one."""
    if reuse and (out / "labels.csv").is_file():
        return None
    if out.exists():
        shutil.rmtree(out)
    cmd = [str(synth), *args, "--out", str(out), "--width", str(FRAME_W), "--height", str(FRAME_H)]
    print("$ " + " ".join(cmd), flush=True)
    err = tempfile.TemporaryFile()
    return subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err), err


def read_labels(folder: Path) -> list[tuple[str, int]]:
    """Reads labels.csv: comment lines start with '#', then the header file,timestamp_ms,label."""
    with open(folder / "labels.csv", newline="", encoding="utf-8") as f:
        lines = [line for line in f if not line.startswith("#")]
    rows = []
    for row in csv.DictReader(lines):
        if row["label"] not in CLASSES:
            raise SystemExit(f"{folder}/labels.csv: unknown label {row['label']!r}")
        rows.append((row["file"], CLASSES.index(row["label"])))
    if not rows:
        raise SystemExit(f"{folder}/labels.csv has no rows")
    return rows


def round_half_away(x: float) -> int:
    """Rounds half away from zero (as Rust's f64::round), not half to even (as Python's round)."""
    return int(math.floor(abs(x) + 0.5)) * (1 if x >= 0 else -1)


def centre_crop_box(w: int, h: int, tw: int, th: int) -> tuple[int, int, int, int]:
    """The largest centred crop with the target aspect ratio: (x0, y0, width, height)."""
    if w * th > h * tw:
        cw = round_half_away(h * tw / th)
        return (w - cw) // 2, 0, cw, h
    ch = round_half_away(w * th / tw)
    return 0, (h - ch) // 2, w, ch


def load_pixels(path: Path) -> np.ndarray:
    """The manifest's resize step: PNG -> RGB -> centre crop -> SIZE x SIZE (INTER_AREA), uint8 HWC."""
    bgr = cv2.imread(str(path), cv2.IMREAD_COLOR)
    if bgr is None:
        raise SystemExit(f"cannot read {path}")
    rgb = cv2.cvtColor(bgr, cv2.COLOR_BGR2RGB)
    h, w = rgb.shape[:2]
    x0, y0, cw, ch = centre_crop_box(w, h, SIZE, SIZE)
    crop = np.ascontiguousarray(rgb[y0:y0 + ch, x0:x0 + cw])
    return cv2.resize(crop, (SIZE, SIZE), interpolation=cv2.INTER_AREA)


def load_folder(folder: Path) -> tuple[np.ndarray, np.ndarray]:
    rows = read_labels(folder)
    pixels = np.stack([load_pixels(folder / name) for name, _ in rows])
    labels = np.array([label for _, label in rows], dtype=np.int64)
    return pixels, labels


def normalise(pixels: np.ndarray) -> np.ndarray:
    """The manifest's value step, in float32: (pixel * (1/255) - mean[c]) / std[c]. NHWC in, NHWC out."""
    x = pixels.astype(np.float32) * np.float32(SCALE)
    return (x - np.array(MEAN, np.float32)) / np.array(STD, np.float32)


# ----------------------------------------------------------------------------------------------------------
# the network in numpy (activations NHWC inside; weights kept in ONNX layout)


def im2col(x: np.ndarray) -> np.ndarray:
    """3x3, stride 2, padding 1: NHWC (N,H,W,C) -> (N,Ho,Wo,C*9), columns ordered (c, kh, kw) as ONNX Conv."""
    n, h, w, c = x.shape
    ho, wo = (h - 1) // 2 + 1, (w - 1) // 2 + 1
    xp = np.pad(x, ((0, 0), (1, 1), (1, 1), (0, 0)))
    taps = [xp[:, kh:kh + 2 * ho:2, kw:kw + 2 * wo:2, :] for kh in range(3) for kw in range(3)]
    return np.stack(taps, axis=-1).reshape(n, ho, wo, c * 9)


def col2im(dcols: np.ndarray, shape: tuple[int, int, int, int]) -> np.ndarray:
    """Adjoint of im2col."""
    n, h, w, c = shape
    _, ho, wo, _ = dcols.shape
    d = dcols.reshape(n, ho, wo, c, 9)
    dxp = np.zeros((n, h + 2, w + 2, c), dtype=dcols.dtype)
    for kh in range(3):
        for kw in range(3):
            dxp[:, kh:kh + 2 * ho:2, kw:kw + 2 * wo:2, :] += d[..., kh * 3 + kw]
    return dxp[:, 1:-1, 1:-1, :]


def init_params(rng: np.random.Generator) -> dict[str, np.ndarray]:
    params = {}
    for i, (cin, cout) in enumerate(CONV_CHANNELS):
        # He-normal initialisation before a ReLU (He et al., ICCV 2015): std = sqrt(2 / fan_in)
        params[f"conv{i}.weight"] = (rng.standard_normal((cout, cin, 3, 3)) * np.sqrt(2.0 / (cin * 9))).astype(
            np.float32)
        params[f"conv{i}.bias"] = np.zeros(cout, np.float32)
    feat = CONV_CHANNELS[-1][1]
    params["fc.weight"] = (rng.standard_normal((len(CLASSES), feat)) * np.sqrt(1.0 / feat)).astype(np.float32)
    params["fc.bias"] = np.zeros(len(CLASSES), np.float32)
    return params


def forward(params: dict[str, np.ndarray], x: np.ndarray, keep: bool = False):
    """Logits for NHWC input; with keep=True also the cache for backward."""
    cache = []
    a = x
    for i, (cin, cout) in enumerate(CONV_CHANNELS):
        cols = im2col(a)
        z = cols @ params[f"conv{i}.weight"].reshape(cout, cin * 9).T + params[f"conv{i}.bias"]
        if keep:
            cache.append((a.shape, cols, z))
        a = np.maximum(z, 0.0)
    pooled = a.mean(axis=(1, 2))
    logits = pooled @ params["fc.weight"].T + params["fc.bias"]
    if keep:
        return logits, (cache, a.shape, pooled)
    return logits


def backward(params, cache, dlogits: np.ndarray) -> dict[str, np.ndarray]:
    convs, last_shape, pooled = cache
    grads = {"fc.weight": dlogits.T @ pooled, "fc.bias": dlogits.sum(axis=0)}
    n, ho, wo, c = last_shape
    da = np.broadcast_to((dlogits @ params["fc.weight"])[:, None, None, :] / np.float32(ho * wo), last_shape)
    for i in reversed(range(len(CONV_CHANNELS))):
        cin, cout = CONV_CHANNELS[i]
        in_shape, cols, z = convs[i]
        dz = (da * (z > 0)).reshape(-1, cout)
        grads[f"conv{i}.weight"] = (dz.T @ cols.reshape(-1, cin * 9)).reshape(cout, cin, 3, 3)
        grads[f"conv{i}.bias"] = dz.sum(axis=0)
        if i > 0:
            w = params[f"conv{i}.weight"].reshape(cout, cin * 9)
            da = col2im((dz @ w).reshape(*z.shape[:3], cin * 9), in_shape)
    return grads


def softmax_xent(logits: np.ndarray, labels: np.ndarray) -> tuple[float, np.ndarray]:
    shifted = logits - logits.max(axis=1, keepdims=True)
    p = np.exp(shifted)
    p /= p.sum(axis=1, keepdims=True)
    n = len(labels)
    loss = float(-np.log(p[np.arange(n), labels] + 1e-12).mean())
    p[np.arange(n), labels] -= 1.0
    return loss, (p / n).astype(np.float32)


PERMUTATIONS = np.array([[0, 1, 2], [0, 2, 1], [1, 0, 2], [1, 2, 0], [2, 0, 1], [2, 1, 0]])


def augment(x: np.ndarray, codes: np.ndarray, perms: np.ndarray) -> np.ndarray:
    """Augmentation per sample (uint8 NHWC): one of the 8 flips/transpositions of the square input and one
    of the 6 orders of the colour channels (the zone classes depend on the texture only, not on its
    orientation or its ink colour; mean and std are equal for all channels, so this commutes with the
    normalisation)."""
    out = np.empty_like(x)
    for i, code in enumerate(codes):
        img = x[i][:, :, PERMUTATIONS[perms[i]]]
        if code & 1:
            img = img[:, ::-1]
        if code & 2:
            img = img[::-1, :]
        if code & 4:
            img = img.transpose(1, 0, 2)
        out[i] = img
    return out


def predict(params, pixels: np.ndarray, batch: int = 256) -> np.ndarray:
    return np.concatenate([forward(params, normalise(pixels[i:i + batch])) for i in range(0, len(pixels), batch)])


def train(params, pixels, labels, *, epochs: int, batch: int, lr: float, seed: int, log_every: int = 1):
    """Adam (Kingma & Ba, ICLR 2015; default betas 0.9/0.999, eps 1e-8) with a cosine learning-rate decay
    and a short linear warm-up (common practice)."""
    rng = np.random.default_rng(seed)
    m = {k: np.zeros_like(v) for k, v in params.items()}
    v = {k: np.zeros_like(v) for k, v in params.items()}
    b1, b2, eps = 0.9, 0.999, 1e-8
    steps_per_epoch = len(pixels) // batch
    total = epochs * steps_per_epoch
    warmup = steps_per_epoch
    step = 0
    for epoch in range(epochs):
        order = rng.permutation(len(pixels))
        codes = rng.integers(0, 8, len(pixels))
        perms = rng.integers(0, len(PERMUTATIONS), len(pixels))
        contrast = rng.uniform(0.4, 1.2, len(pixels)).astype(np.float32)
        losses, correct = [], 0
        t0 = time.perf_counter()
        for s in range(steps_per_epoch):
            idx = order[s * batch:(s + 1) * batch]
            x = normalise(augment(pixels[idx], codes[idx], perms[idx]))
            # contrast augmentation: scale each image about its own mean (faint prints must still count)
            centre = x.mean(axis=(1, 2), keepdims=True)
            x = centre + contrast[idx][:, None, None, None] * (x - centre)
            y = labels[idx]
            logits, cache = forward(params, x, keep=True)
            loss, dlogits = softmax_xent(logits, y)
            losses.append(loss)
            correct += int((logits.argmax(axis=1) == y).sum())
            grads = backward(params, cache, dlogits)
            step += 1
            rate = lr * min(1.0, step / warmup) * 0.5 * (1.0 + math.cos(math.pi * step / total))
            for k in params:
                g = grads[k].astype(np.float32)
                m[k] = b1 * m[k] + (1 - b1) * g
                v[k] = b2 * v[k] + (1 - b2) * g * g
                mhat = m[k] / (1 - b1 ** step)
                vhat = v[k] / (1 - b2 ** step)
                params[k] = (params[k] - rate * mhat / (np.sqrt(vhat) + eps)).astype(np.float32)
        if (epoch + 1) % log_every == 0 or epoch + 1 == epochs:
            print(f"epoch {epoch + 1:3d}/{epochs}: loss {np.mean(losses):.4f}, "
                  f"train accuracy {correct / (steps_per_epoch * batch):.3f}, {time.perf_counter() - t0:.1f} s",
                  flush=True)
    return params


# ----------------------------------------------------------------------------------------------------------
# export and checks


def to_onnx(params: dict[str, np.ndarray], summary: str) -> onnx.ModelProto:
    nodes, inits = [], []
    x = "frames"
    for i, _ in enumerate(CONV_CHANNELS):
        for suffix in ("weight", "bias"):
            inits.append(numpy_helper.from_array(params[f"conv{i}.{suffix}"], f"conv{i}.{suffix}"))
        nodes.append(helper.make_node(
            "Conv", [x, f"conv{i}.weight", f"conv{i}.bias"], [f"conv{i}.out"], name=f"conv{i}",
            kernel_shape=[3, 3], strides=[2, 2], pads=[1, 1, 1, 1], dilations=[1, 1], group=1))
        nodes.append(helper.make_node("Relu", [f"conv{i}.out"], [f"relu{i}.out"], name=f"relu{i}"))
        x = f"relu{i}.out"
    nodes.append(helper.make_node("GlobalAveragePool", [x], ["pooled"], name="pool"))
    nodes.append(helper.make_node("Flatten", ["pooled"], ["features"], name="flatten", axis=1))
    for suffix in ("weight", "bias"):
        inits.append(numpy_helper.from_array(params[f"fc.{suffix}"], f"fc.{suffix}"))
    nodes.append(helper.make_node("Gemm", ["features", "fc.weight", "fc.bias"], ["logits"], name="fc",
                                  alpha=1.0, beta=1.0, transB=1))
    graph = helper.make_graph(
        nodes, "framewise_phantom_zones",
        [helper.make_tensor_value_info("frames", TensorProto.FLOAT, ["batch", 3, SIZE, SIZE])],
        [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["batch", len(CLASSES)])],
        initializer=inits)
    model = helper.make_model(
        graph, opset_imports=[helper.make_opsetid("", OPSET)], producer_name="framewise",
        producer_version="1.0.0",
        doc_string=(f"framewise toy demo model {MODEL_NAME}: classes {', '.join(CLASSES)} of an invented "
                    f"bench-top phantom; not a medical model, never use on patients. {summary} {CAUTION}"))
    model.ir_version = IR_VERSION
    model.model_version = 1
    return model


def verify(model_path: Path, params, pixels: np.ndarray, tol: float = 1e-4) -> float:
    """numpy forward vs onnx.reference vs onnxruntime (CPU) on the same inputs; fails loudly."""
    from onnx.reference import ReferenceEvaluator
    import onnxruntime as ort  # self-check only

    onnx.checker.check_model(str(model_path), full_check=True)
    nhwc = normalise(pixels)
    nchw = np.ascontiguousarray(nhwc.transpose(0, 3, 1, 2))
    ours = forward(params, nhwc)
    ref = ReferenceEvaluator(str(model_path)).run(None, {"frames": nchw})[0]
    session = ort.InferenceSession(str(model_path), providers=["CPUExecutionProvider"])
    rt = session.run(["logits"], {"frames": nchw})[0]
    worst = max(float(np.max(np.abs(ours - ref))), float(np.max(np.abs(ours - rt))),
                float(np.max(np.abs(ref - rt))))
    if not (np.all(np.isfinite(rt)) and worst <= tol):
        raise SystemExit(f"VERIFY FAILED: max abs logit difference {worst:.3g} > {tol} "
                         "(numpy vs onnx.reference vs onnxruntime)")
    return worst


def manifest_text(trained: str) -> str:
    return f"""# framewise model manifest. {CAUTION}
name = "{MODEL_NAME}"
version = "1.0.0"
file = "{MODEL_FILE}"
classes = [{", ".join(f'"{c}"' for c in CLASSES)}]
intended_use = "Toy demo model for exercising the framewise pipeline: classifies the zone texture (plain, dotted, striped, grid) of an invented bench-top phantom, a printed drum seen through a simulated camera, trained on synthetic frames only. Not a medical model."
caution = "This is a toy trained on synthetic phantom frames: never use it on patients or for any clinical decision. {CAUTION}"
trained = "{trained}"

[input]
tensor = "frames"
layout = "nchw"
width = {SIZE}
height = {SIZE}
colour_order = "rgb"
scale = {SCALE!r}
mean = [{", ".join(repr(v) for v in MEAN)}]
std = [{", ".join(repr(v) for v in STD)}]
resize = "centre_crop"
interpolation = "opencv-area"
letterbox_fill = 0

[output]
tensor = "logits"
kind = "logits"
"""


def report(title: str, pred: np.ndarray, labels: np.ndarray) -> float:
    acc = float((pred == labels).mean())
    print(f"\n{title}: accuracy {acc:.4f} ({int((pred == labels).sum())}/{len(labels)})")
    k = len(CLASSES)
    conf = np.zeros((k, k), dtype=np.int64)
    np.add.at(conf, (labels, pred), 1)
    width = max(len(c) for c in CLASSES) + 2
    print("  true \\ predicted".ljust(width + 8) + "".join(c.rjust(width) for c in CLASSES) + "   class accuracy")
    for i, c in enumerate(CLASSES):
        total = conf[i].sum()
        recall = conf[i, i] / total if total else float("nan")
        print(f"  {c}".ljust(width + 8) + "".join(str(v).rjust(width) for v in conf[i]) + f"   {recall:.3f}")
    return acc


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--synth", type=Path, default=REPO / "target/release/framewise-synth",
                        help="path of the framewise-synth binary")
    parser.add_argument("--work", type=Path, default=None,
                        help="folder for the synthetic recordings (default: a temporary folder, removed after)")
    parser.add_argument("--reuse-data", action="store_true",
                        help="reuse recordings already complete in --work instead of writing them again")
    parser.add_argument("--out", type=Path, default=REPO / "models-demo/package", help="output folder")
    parser.add_argument("--seed", type=int, default=11,
                        help="base seed: of the first training recording, of the weights and of the batch order")
    parser.add_argument("--train-drums", type=int, default=30,
                        help="training recordings, each of its own seeded drum: seeds seed, seed+100, ...")
    parser.add_argument("--train-count", type=int, default=100, help="views per training recording")
    parser.add_argument("--val-seed", type=int, default=12)
    parser.add_argument("--val-count", type=int, default=600)
    parser.add_argument("--sweep-seed", type=int, default=13)
    parser.add_argument("--sweep-seconds", type=float, default=20.0)
    parser.add_argument("--epochs", type=int, default=30)
    parser.add_argument("--batch", type=int, default=50)
    parser.add_argument("--lr", type=float, default=3e-3)
    parser.add_argument("--jobs", type=int, default=2, help="framewise-synth processes at a time")
    parser.add_argument("--min-accuracy", type=float, default=0.95,
                        help="fail if the validation accuracy on views is below this")
    args = parser.parse_args()

    start = time.perf_counter()
    cv2.setNumThreads(1)  # resizing is deterministic either way; one thread keeps the 2-core budget for BLAS
    if not args.synth.is_file():
        raise SystemExit(f"{args.synth} not found: build it with `cargo build --release -p framewise-models-demo`")
    temp = None
    if args.work is None:
        temp = tempfile.TemporaryDirectory(prefix="framewise-train-")
        work = Path(temp.name)
    else:
        work = args.work
        work.mkdir(parents=True, exist_ok=True)

    # Each recording is a drum of its own (seeded zone colours, texture periods and angles): several
    # training drums keep the model from learning one drum's zones by heart.
    train_seeds = [args.seed + 100 * i for i in range(args.train_drums)]
    sets = {f"train-s{seed}": ["views", "--count", str(args.train_count), "--seed", str(seed)]
            for seed in train_seeds}
    sets["val"] = ["views", "--count", str(args.val_count), "--seed", str(args.val_seed)]
    sets["sweep"] = ["sweep", "--seconds", str(args.sweep_seconds), "--fps", "30", "--seed", str(args.sweep_seed)]
    data: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    t0 = time.perf_counter()
    try:
        # the generator is single-threaded: run `--jobs` at a time and read each recording as it completes
        pending = list(sets.items())
        running: dict[str, tuple] = {}
        while pending or running:
            while pending and len(running) < max(1, args.jobs):
                name, synth_args = pending.pop(0)
                proc = start_synth(args.synth, synth_args, work / name, args.reuse_data)
                if proc is None:
                    data[name] = load_folder(work / name)
                else:
                    running[name] = proc
            for name, (proc, err_file) in list(running.items()):
                if proc.poll() is None:
                    continue
                err_file.seek(0)
                err = err_file.read().decode("utf-8", "replace")
                err_file.close()
                del running[name]
                if proc.returncode != 0:
                    raise SystemExit(f"framewise-synth failed for {name}: {err.strip()[-500:]}")
                data[name] = load_folder(work / name)
            time.sleep(0.2)
    finally:
        for proc, _ in running.values():
            if proc.poll() is None:
                proc.kill()
                proc.wait()
        if temp is not None:
            temp.cleanup()
    data_s = time.perf_counter() - t0
    train_px = np.concatenate([data[f"train-s{seed}"][0] for seed in train_seeds])
    train_y = np.concatenate([data[f"train-s{seed}"][1] for seed in train_seeds])
    val_px, val_y = data["val"]
    sweep_px, sweep_y = data["sweep"]
    if len(train_seeds) == 1:
        seeds_text = f"seed {train_seeds[0]}"
    elif len(train_seeds) <= 3:
        seeds_text = f"seeds {', '.join(str(s) for s in train_seeds)}"
    else:
        seeds_text = f"seeds {train_seeds[0]}, {train_seeds[1]}, ..., {train_seeds[-1]}"
    print(f"data: {len(train_y)} training views ({len(train_seeds)} drums x {args.train_count}, {seeds_text}), "
          f"{len(val_y)} validation views (seed {args.val_seed}), {len(sweep_y)} sweep frames "
          f"(seed {args.sweep_seed}); generated and read in {data_s:.1f} s", flush=True)

    t0 = time.perf_counter()
    params = init_params(np.random.default_rng(args.seed))
    params = train(params, train_px, train_y, epochs=args.epochs, batch=args.batch, lr=args.lr, seed=args.seed)
    train_s = time.perf_counter() - t0

    val_acc = report(f"validation views (seed {args.val_seed})", predict(params, val_px).argmax(axis=1), val_y)
    sweep_acc = report(f"validation sweep, {args.sweep_seconds:g} s (seed {args.sweep_seed}), frame by frame",
                       predict(params, sweep_px).argmax(axis=1), sweep_y)

    trained = (f"models-demo/scripts/train_demo_model.py, {seeds_text}, {len(train_y)} synthetic views; "
               f"validation accuracy {val_acc:.3f} on {len(val_y)} views, {sweep_acc:.3f} on a "
               f"{args.sweep_seconds:g} s sweep")
    if val_acc < args.min_accuracy:
        print(f"FAILED: validation accuracy {val_acc:.4f} is below {args.min_accuracy}; nothing written",
              file=sys.stderr)
        print(CAUTION)
        return 1
    args.out.mkdir(parents=True, exist_ok=True)
    model_path = args.out / MODEL_FILE
    staged = args.out / (MODEL_FILE + ".tmp")  # verified before it replaces the packaged model
    staged.write_bytes(to_onnx(params, trained).SerializeToString())
    try:
        worst = verify(staged, params, val_px[:32])
    except BaseException:
        staged.unlink(missing_ok=True)
        raise
    staged.replace(model_path)
    (args.out / "manifest.toml").write_text(manifest_text(trained), encoding="utf-8")

    print(f"\nverified: numpy vs onnx.reference vs onnxruntime on 32 validation inputs, max abs logit "
          f"difference {worst:.2e} (limit 1e-4)")
    print(f"wrote {model_path} ({model_path.stat().st_size} bytes) and {args.out / 'manifest.toml'}")
    print(f"training time {train_s:.1f} s ({args.epochs} epochs); total {time.perf_counter() - start:.1f} s")
    print("The demo model is a toy trained on synthetic phantom frames, not a medical model; never use it on "
          "patients.")
    print(CAUTION)
    return 0


if __name__ == "__main__":
    sys.exit(main())
