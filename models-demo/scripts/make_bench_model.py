#!/usr/bin/env python3
"""framewise: writes a MobileNetV2-shaped benchmark network with seeded random weights.

The network exists for speed work only (latency, throughput, thread settings of the framewise engine):
its weights are random, so its outputs are meaningless. Speed does not depend on the weight values.

    python models-demo/scripts/make_bench_model.py --out /tmp/bench-model --seed 7

writes DIR/mobilenetv2-bench.onnx and DIR/manifest.toml, then checks the model with onnx.checker and
onnxruntime (CPU) and checks that the same seed gives byte-identical ONNX bytes.

Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
confirmed by a qualified clinician; check local regulations before any clinical use.

Dependencies: numpy and onnx (plus onnxruntime for the self-check only).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

CAUTION = (
    "Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must "
    "be confirmed by a qualified clinician; check local regulations before any clinical use."
)

MODEL_NAME = "bench-mobilenetv2"
MODEL_FILE = "mobilenetv2-bench.onnx"
CLASSES = ["class_a", "class_b", "class_c", "class_d"]
SIZE = 224
OPSET = 17
IR_VERSION = 8  # onnxruntime 1.32 reads IR versions up to 11; 8 is the IR version that opset 17 shipped with
# Common ImageNet channel statistics (RGB); common practice for MobileNetV2-sized inputs.
MEAN = [0.485, 0.456, 0.406]
STD = [0.229, 0.224, 0.225]

# MobileNetV2 layer table: Sandler et al., "MobileNetV2: Inverted Residuals and Linear Bottlenecks",
# CVPR 2018, Table 2. Stem: conv 3x3 stride 2 to 32 channels. Bottleneck rows (expansion t, output
# channels c, repeats n, stride of the first repeat s). Head: conv 1x1 to 1280 channels, then pooling.
STEM_CHANNELS = 32
BOTTLENECKS = [
    (1, 16, 1, 1),
    (6, 24, 2, 2),
    (6, 32, 3, 2),
    (6, 64, 4, 2),
    (6, 96, 3, 1),
    (6, 160, 3, 2),
    (6, 320, 1, 1),
]
HEAD_CHANNELS = 1280
BN_EPSILON = 1e-5  # the BatchNormalization default in ONNX


class GraphBuilder:
    """Collects nodes and initializers; every random draw comes from one seeded generator in build order."""

    def __init__(self, seed: int) -> None:
        self.rng = np.random.default_rng(seed)
        self.nodes: list[onnx.NodeProto] = []
        self.initializers: list[onnx.TensorProto] = []
        self.counter = 0

    def name(self, prefix: str) -> str:
        self.counter += 1
        return f"{prefix}_{self.counter}"

    def const(self, name: str, array: np.ndarray) -> str:
        self.initializers.append(numpy_helper.from_array(np.ascontiguousarray(array), name))
        return name

    def conv_bn(self, x: str, cin: int, cout: int, kernel: int, stride: int, groups: int, act: bool,
                gain: float) -> str:
        """Conv (no bias) + BatchNormalization (+ Clip(0, 6), i.e. ReLU6), as an exported MobileNetV2 has them."""
        base = self.name("conv")
        fan_in = (cin // groups) * kernel * kernel
        # He-normal initialisation (He et al., ICCV 2015): std = sqrt(gain / fan_in), gain 2 before a ReLU.
        w = self.rng.standard_normal((cout, cin // groups, kernel, kernel)) * np.sqrt(gain / fan_in)
        self.const(f"{base}.weight", w.astype(np.float32))
        conv_out = f"{base}.out"
        pad = kernel // 2
        self.nodes.append(helper.make_node(
            "Conv", [x, f"{base}.weight"], [conv_out], name=base,
            kernel_shape=[kernel, kernel], strides=[stride, stride], pads=[pad, pad, pad, pad],
            group=groups, dilations=[1, 1]))
        # Seeded BatchNormalization statistics close to identity (variance positive), so that activations
        # neither explode nor vanish through the 52 convolutions.
        scale = self.rng.uniform(0.8, 1.2, cout)
        bias = self.rng.normal(0.0, 0.1, cout) + (0.1 if act else 0.0)
        mean = self.rng.normal(0.0, 0.1, cout)
        var = self.rng.uniform(0.8, 1.2, cout)
        for suffix, value in (("scale", scale), ("bias", bias), ("mean", mean), ("var", var)):
            self.const(f"{base}.bn.{suffix}", value.astype(np.float32))
        bn_out = f"{base}.bn.out"
        self.nodes.append(helper.make_node(
            "BatchNormalization",
            [conv_out, f"{base}.bn.scale", f"{base}.bn.bias", f"{base}.bn.mean", f"{base}.bn.var"],
            [bn_out], name=f"{base}.bn", epsilon=BN_EPSILON))
        if not act:
            return bn_out
        out = f"{base}.relu6"
        self.nodes.append(helper.make_node("Clip", [bn_out, "relu6.min", "relu6.max"], [out], name=out))
        return out


def build_model(seed: int) -> onnx.ModelProto:
    b = GraphBuilder(seed)
    b.const("relu6.min", np.array(0.0, dtype=np.float32))
    b.const("relu6.max", np.array(6.0, dtype=np.float32))

    x = b.conv_bn("frames", 3, STEM_CHANNELS, 3, 2, 1, True, 2.0)
    cin = STEM_CHANNELS
    for t, c, n, s in BOTTLENECKS:
        for i in range(n):
            stride = s if i == 0 else 1
            hidden = cin * t
            h = x
            if t != 1:
                h = b.conv_bn(h, cin, hidden, 1, 1, 1, True, 2.0)  # expansion 1x1
            h = b.conv_bn(h, hidden, hidden, 3, stride, hidden, True, 2.0)  # depthwise 3x3
            # linear bottleneck (no activation); smaller gain on residual blocks keeps the sum bounded
            h = b.conv_bn(h, hidden, c, 1, 1, 1, False, 1.0 if stride == 1 and cin == c else 2.0)
            if stride == 1 and cin == c:
                out = b.name("add")
                b.nodes.append(helper.make_node("Add", [x, h], [out], name=out))
                h = out
            x = h
            cin = c
    x = b.conv_bn(x, cin, HEAD_CHANNELS, 1, 1, 1, True, 2.0)
    b.nodes.append(helper.make_node("GlobalAveragePool", [x], ["pooled"], name="pool"))
    b.nodes.append(helper.make_node("Flatten", ["pooled"], ["features"], name="flatten", axis=1))
    w = b.rng.standard_normal((len(CLASSES), HEAD_CHANNELS)) * np.sqrt(1.0 / HEAD_CHANNELS)
    b.const("classifier.weight", w.astype(np.float32))
    b.const("classifier.bias", np.zeros(len(CLASSES), dtype=np.float32))
    b.nodes.append(helper.make_node(
        "Gemm", ["features", "classifier.weight", "classifier.bias"], ["logits"], name="classifier",
        alpha=1.0, beta=1.0, transB=1))

    graph = helper.make_graph(
        b.nodes, "framewise_bench_mobilenetv2",
        [helper.make_tensor_value_info("frames", TensorProto.FLOAT, ["batch", 3, SIZE, SIZE])],
        [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["batch", len(CLASSES)])],
        initializer=b.initializers)
    model = helper.make_model(
        graph, opset_imports=[helper.make_opsetid("", OPSET)], producer_name="framewise",
        producer_version="1.0.0",
        doc_string=("framewise benchmark network, MobileNetV2-shaped, random weights (seed "
                    f"{seed}): meaningless outputs, for speed work only. {CAUTION}"))
    model.ir_version = IR_VERSION
    model.model_version = 1
    return model


def manifest_text(seed: int) -> str:
    return f"""# framewise model manifest. {CAUTION}
name = "{MODEL_NAME}"
version = "1.0.0"
file = "{MODEL_FILE}"
classes = [{", ".join(f'"{c}"' for c in CLASSES)}]
intended_use = "Benchmark network for framewise speed work only (latency, throughput, thread settings): MobileNetV2-shaped with random weights, its outputs are meaningless. Not a medical model."
caution = "Random weights: the outputs mean nothing. Never use this network on patients or for any decision. {CAUTION}"
trained = "not trained: models-demo/scripts/make_bench_model.py, seed {seed}, random weights"

[input]
tensor = "frames"
layout = "nchw"
width = {SIZE}
height = {SIZE}
colour_order = "rgb"
scale = {1.0 / 255.0!r}
# Common ImageNet channel statistics (common practice).
mean = [{", ".join(repr(v) for v in MEAN)}]
std = [{", ".join(repr(v) for v in STD)}]
resize = "stretch"
interpolation = "opencv-linear"
letterbox_fill = 0

[output]
tensor = "logits"
kind = "logits"
"""


def self_check(path: Path, seed: int) -> None:
    onnx.checker.check_model(str(path), full_check=True)
    data = path.read_bytes()
    again = build_model(seed).SerializeToString()
    if again != data:
        raise SystemExit("self-check failed: rebuilding with the same seed gave different ONNX bytes")
    import onnxruntime as ort  # self-check only

    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    rng = np.random.default_rng(seed + 1000)
    # inputs as the engine would feed them: pixels in 0..1 normalised by the manifest's statistics
    pixels = rng.uniform(0.0, 1.0, (4, 3, SIZE, SIZE)).astype(np.float32)
    frames = ((pixels - np.array(MEAN, np.float32)[:, None, None]) / np.array(STD, np.float32)[:, None, None])
    logits = session.run(["logits"], {"frames": frames.astype(np.float32)})[0]
    if logits.shape != (4, len(CLASSES)):
        raise SystemExit(f"self-check failed: logits shape {logits.shape}")
    if not np.all(np.isfinite(logits)):
        raise SystemExit("self-check failed: logits are not finite")
    spread = float(np.max(np.abs(logits - logits[0:1])))
    if spread <= 1e-6 or float(np.std(logits)) <= 1e-6:
        raise SystemExit("self-check failed: logits do not differ across inputs")
    print(f"onnxruntime: 4 random inputs, logits finite, range [{logits.min():.3f}, {logits.max():.3f}], "
          f"max difference across inputs {spread:.3f}")
    print("determinism: rebuilding with the same seed gave byte-identical ONNX")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, required=True, help="output folder")
    parser.add_argument("--seed", type=int, default=7, help="weight seed (default 7)")
    parser.add_argument("--no-check", action="store_true", help="skip the onnxruntime self-check")
    args = parser.parse_args()

    start = time.perf_counter()
    args.out.mkdir(parents=True, exist_ok=True)
    model = build_model(args.seed)
    path = args.out / MODEL_FILE
    path.write_bytes(model.SerializeToString())
    (args.out / "manifest.toml").write_text(manifest_text(args.seed), encoding="utf-8")
    params = sum(int(np.prod(t.dims)) for t in model.graph.initializer)
    convs = sum(1 for n in model.graph.node if n.op_type == "Conv")
    print(f"framewise bench model: {path} ({path.stat().st_size / 1e6:.1f} MB, {convs} Conv nodes, "
          f"{params:,} parameters, random weights, seed {args.seed})")
    if not args.no_check:
        self_check(path, args.seed)
    print(f"written {path} and {args.out / 'manifest.toml'} in {time.perf_counter() - start:.1f} s")
    print(CAUTION)
    return 0


if __name__ == "__main__":
    sys.exit(main())
