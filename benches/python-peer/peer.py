#!/usr/bin/env python3
"""A plain Python frame-analysis server speaking the framewise wire contract: a benchmark baseline.

It is what a frame classifier behind gRPC looks like when written directly with grpcio, onnxruntime, OpenCV
and NumPy, without framewise: one thread per session, and per frame decode the pixels, preprocess them as the
model package's manifest says, run the model, apply softmax if the model gives logits, and answer. Raw
probabilities only: no temporal filter (smoothed equals raw), no quality gate, no dwell or hysteresis. It
exists so that `framewise bench` has a baseline to compare framewise against; it is not part of the product.

Decision support only, not a diagnosis: the outputs are probabilities that can be wrong and must be confirmed
by a qualified clinician; check local regulations before any clinical use.

Usage:
    python peer.py --listen 127.0.0.1:50061 --model models-demo/package [--intra-threads 1] [--workers 10]

Prints "listening on HOST:PORT" on stdout once it serves (port 0 picks a free port).
"""
import argparse
import collections
import hashlib
import os
import signal
import sys
import tempfile
import threading
import time
import tomllib
from concurrent import futures

import cv2
import grpc
import numpy as np
import onnxruntime as ort
from grpc_health.v1 import health, health_pb2, health_pb2_grpc
from grpc_tools import protoc

CAUTION = (
    "Decision support only, not a diagnosis: these outputs are probabilities that can be wrong and must be "
    "confirmed by a qualified clinician; check local regulations before any clinical use. "
    "(Python benchmark baseline, not the framewise product.)"
)

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
SERVICE_NAME = "framewise.v1.FrameAnalysis"
MAX_MESSAGE_BYTES = 36 * 1024 * 1024  # a 4K UHD RGBA frame plus headroom, as the framewise server allows
MAX_SIDE = 8192
DEFAULT_ENTER = 0.6


def generate_stubs(out_dir):
    """Compiles the framewise .proto into Python modules in out_dir and imports them."""
    proto_dir = os.path.join(ROOT, "proto", "proto")
    rc = protoc.main(["protoc", f"-I{proto_dir}", f"--python_out={out_dir}", f"--grpc_python_out={out_dir}",
                      os.path.join(proto_dir, "framewise", "v1", "framewise.proto")])
    if rc != 0:
        sys.exit(f"protoc failed with {rc}")
    sys.path.insert(0, out_dir)
    from framewise.v1 import framewise_pb2, framewise_pb2_grpc
    return framewise_pb2, framewise_pb2_grpc


class Model:
    """A model package: manifest.toml beside its .onnx file."""

    def __init__(self, package_dir, intra_threads):
        with open(os.path.join(package_dir, "manifest.toml"), "rb") as f:
            self.manifest = tomllib.load(f)
        m = self.manifest
        self.name, self.version, self.classes = m["name"], m["version"], list(m["classes"])
        self.inp, self.out = m["input"], m["output"]
        onnx_path = os.path.join(package_dir, m["file"])
        with open(onnx_path, "rb") as f:
            self.sha256 = hashlib.sha256(f.read()).hexdigest()
        options = ort.SessionOptions()
        options.intra_op_num_threads = intra_threads
        options.inter_op_num_threads = 1
        self.session = ort.InferenceSession(onnx_path, sess_options=options, providers=["CPUExecutionProvider"])
        self.output_name = self.out.get("tensor") or self.session.get_outputs()[0].name
        self.size = (int(self.inp["width"]), int(self.inp["height"]))
        self.scale = float(self.inp["scale"])
        self.mean = np.array(self.inp["mean"], dtype=np.float32)
        self.std = np.array(self.inp["std"], dtype=np.float32)
        # The peer resizes with OpenCV only (framewise's opencv-* recipes; others approximated by INTER_LINEAR).
        self.interpolation = {"opencv-area": cv2.INTER_AREA}.get(self.inp["interpolation"], cv2.INTER_LINEAR)
        # Warm up once so the first frame does not pay for it.
        self.infer(np.zeros((self.size[1], self.size[0], 3), np.uint8))

    def preprocess(self, rgb):
        """Packed RGB (H, W, 3) to the model's input tensor, as the manifest says."""
        tw, th = self.size
        h, w = rgb.shape[:2]
        rule = self.inp["resize"]
        if rule == "centre_crop":
            # The largest centred rectangle with the input's aspect ratio (size rounded, offset rounded down).
            if w * th > h * tw:
                cw, ch = min(max((h * tw + th // 2) // th, 1), w), h
            else:
                cw, ch = w, min(max((w * th + tw // 2) // tw, 1), h)
            x0, y0 = (w - cw) // 2, (h - ch) // 2
            picture = cv2.resize(rgb[y0:y0 + ch, x0:x0 + cw], (tw, th), interpolation=self.interpolation)
        elif rule == "letterbox":
            if w * th > h * tw:
                pw, ph = tw, min(max((h * tw + w // 2) // w, 1), th)
            else:
                pw, ph = min(max((w * th + h // 2) // h, 1), tw), th
            fill = int(self.inp.get("letterbox_fill", 0))
            picture = np.full((th, tw, 3), fill, np.uint8)
            x0, y0 = (tw - pw) // 2, (th - ph) // 2
            picture[y0:y0 + ph, x0:x0 + pw] = cv2.resize(rgb, (pw, ph), interpolation=self.interpolation)
        else:  # stretch
            picture = cv2.resize(rgb, (tw, th), interpolation=self.interpolation)
        if self.inp["colour_order"] == "bgr":
            picture = picture[:, :, ::-1]
        x = (picture.astype(np.float32) * self.scale - self.mean) / self.std
        if self.inp["layout"] == "nchw":
            x = x.transpose(2, 0, 1)
        return np.ascontiguousarray(x[np.newaxis], dtype=np.float32)

    def infer(self, rgb):
        """Returns (probabilities, preprocess seconds, inference seconds)."""
        t0 = time.perf_counter()
        x = self.preprocess(rgb)
        t1 = time.perf_counter()
        scores = self.session.run([self.output_name], {self.inp["tensor"]: x})[0].reshape(-1).astype(np.float64)
        if self.out["kind"] == "logits":
            e = np.exp(scores - scores.max())
            scores = e / e.sum()
        t2 = time.perf_counter()
        return scores, t1 - t0, t2 - t1


class BadFrame(Exception):
    """A frame that cannot be read; answered as a FrameError, the session goes on."""

    def __init__(self, kind, message):
        super().__init__(message)
        self.kind = kind


def plane(buf, offset, rows, row_bytes, stride):
    """rows x row_bytes bytes of a plane that starts at offset with the given stride (last row may be short)."""
    need = offset + stride * (rows - 1) + row_bytes
    if len(buf) < need:
        raise BadFrame("bad_length", f"buffer is {len(buf)} bytes, expected at least {need}")
    end = min(len(buf), offset + stride * rows)
    a = np.frombuffer(buf, np.uint8, count=end - offset, offset=offset)
    if a.size < stride * rows:
        a = np.concatenate([a, np.zeros(stride * rows - a.size, np.uint8)])
    return a.reshape(rows, stride)[:, :row_bytes]


def yuv_to_rgb_numpy(y, u, v, matrix_709, full_range):
    """YUV planes already at full resolution to RGB with the ITU-R equations (for non-default matrix/range)."""
    y, u, v = (p.astype(np.float32) for p in (y, u, v))
    if full_range:
        u, v = u - 128.0, v - 128.0
    else:
        y, u, v = (y - 16.0) * 255.0 / 219.0, (u - 128.0) * 255.0 / 224.0, (v - 128.0) * 255.0 / 224.0
    kr, kb = (0.2126, 0.0722) if matrix_709 else (0.299, 0.114)
    kg = 1.0 - kr - kb
    r = y + 2.0 * (1.0 - kr) * v
    b = y + 2.0 * (1.0 - kb) * u
    g = (y - kr * r - kb * b) / kg
    return np.clip(np.rint(np.dstack([r, g, b])), 0, 255).astype(np.uint8)


def decode(pb, frame, default_format, matrix_709, full_range):
    """A wire Frame to packed RGB (H, W, 3)."""
    fmt = frame.format or default_format
    data, w, h = frame.data, frame.width, frame.height
    if fmt in (pb.PIXEL_FORMAT_PNG, pb.PIXEL_FORMAT_JPEG):
        bgr = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_COLOR)
        if bgr is None:
            raise BadFrame("decode_failed", "the encoded frame could not be decoded")
        return cv2.cvtColor(bgr, cv2.COLOR_BGR2RGB)
    if fmt == pb.PIXEL_FORMAT_UNSPECIFIED:
        raise BadFrame("bad_format", "the frame has no format and the session has no default format")
    if w == 0 or h == 0 or w > MAX_SIDE or h > MAX_SIDE:
        raise BadFrame("bad_size", f"frame size {w}x{h} is outside 1..{MAX_SIDE}")
    bpp = {pb.PIXEL_FORMAT_RGB8: 3, pb.PIXEL_FORMAT_BGR8: 3, pb.PIXEL_FORMAT_RGBA8: 4, pb.PIXEL_FORMAT_BGRA8: 4,
           pb.PIXEL_FORMAT_GRAY8: 1, pb.PIXEL_FORMAT_NV12: 1, pb.PIXEL_FORMAT_I420: 1,
           pb.PIXEL_FORMAT_YUYV: 2}.get(fmt)
    if bpp is None:
        raise BadFrame("bad_format", f"pixel format {fmt} is not supported")
    row = w * bpp
    stride = frame.stride or row
    if stride < row:
        raise BadFrame("bad_stride", f"stride {stride} is shorter than one row of {row} bytes")
    yuv = fmt in (pb.PIXEL_FORMAT_NV12, pb.PIXEL_FORMAT_I420, pb.PIXEL_FORMAT_YUYV)
    if yuv and (w % 2 or (fmt != pb.PIXEL_FORMAT_YUYV and h % 2)):
        raise BadFrame("odd_dimension", f"{w}x{h}: this YUV format needs even dimensions")
    opencv_yuv = not matrix_709 and not full_range  # OpenCV's YUV conversions are BT.601 limited range
    if fmt == pb.PIXEL_FORMAT_RGB8:
        return plane(data, 0, h, row, stride).reshape(h, w, 3)
    if fmt == pb.PIXEL_FORMAT_BGR8:
        return cv2.cvtColor(plane(data, 0, h, row, stride).reshape(h, w, 3), cv2.COLOR_BGR2RGB)
    if fmt == pb.PIXEL_FORMAT_RGBA8:
        return cv2.cvtColor(plane(data, 0, h, row, stride).reshape(h, w, 4), cv2.COLOR_RGBA2RGB)
    if fmt == pb.PIXEL_FORMAT_BGRA8:
        return cv2.cvtColor(plane(data, 0, h, row, stride).reshape(h, w, 4), cv2.COLOR_BGRA2RGB)
    if fmt == pb.PIXEL_FORMAT_GRAY8:
        return cv2.cvtColor(np.ascontiguousarray(plane(data, 0, h, row, stride)), cv2.COLOR_GRAY2RGB)
    if fmt == pb.PIXEL_FORMAT_NV12:
        y = plane(data, 0, h, w, stride)
        uv = plane(data, stride * h, h // 2, w, stride)
        if opencv_yuv:
            return cv2.cvtColor(np.ascontiguousarray(np.vstack([y, uv])), cv2.COLOR_YUV2RGB_NV12)
        uv = uv.reshape(h // 2, w // 2, 2).repeat(2, axis=0).repeat(2, axis=1)
        return yuv_to_rgb_numpy(y, uv[:, :, 0], uv[:, :, 1], matrix_709, full_range)
    if fmt == pb.PIXEL_FORMAT_I420:
        if stride % 2:
            raise BadFrame("bad_stride", f"i420 stride {stride} must be even")
        c = stride // 2
        y = plane(data, 0, h, w, stride)
        u = plane(data, stride * h, h // 2, w // 2, c)
        v = plane(data, stride * h + c * (h // 2), h // 2, w // 2, c)
        if opencv_yuv:
            packed = np.concatenate([y.reshape(-1), u.reshape(-1), v.reshape(-1)]).reshape(h * 3 // 2, w)
            return cv2.cvtColor(packed, cv2.COLOR_YUV2RGB_I420)
        up = lambda p: p.repeat(2, axis=0).repeat(2, axis=1)  # noqa: E731
        return yuv_to_rgb_numpy(y, up(u), up(v), matrix_709, full_range)
    # YUYV
    packed = plane(data, 0, h, row, stride).reshape(h, w, 2)
    if opencv_yuv:
        return cv2.cvtColor(np.ascontiguousarray(packed), cv2.COLOR_YUV2RGB_YUYV)
    quad = packed.reshape(h, w // 2, 4)
    u = quad[:, :, 1].repeat(2, axis=1)
    v = quad[:, :, 3].repeat(2, axis=1)
    return yuv_to_rgb_numpy(packed[:, :, 0], u, v, matrix_709, full_range)


class Stats:
    """Server-wide counters and the latest per-stage timings, for ReadStatistics."""

    STAGES = ("queue", "preprocess", "inference", "filter", "total")

    def __init__(self):
        self.lock = threading.Lock()
        self.started = time.monotonic()
        self.counts = collections.Counter()
        self.timings = {s: collections.deque(maxlen=100_000) for s in self.STAGES}

    def bump(self, key, n=1):
        with self.lock:
            self.counts[key] += n

    def record(self, timings):
        with self.lock:
            for stage, us in zip(self.STAGES, timings):
                self.timings[stage].append(us)


def percentiles(pb, samples_by_stage):
    out = []
    for stage, samples in samples_by_stage.items():
        if not samples:
            continue
        a = np.asarray(samples, dtype=np.float64)
        p50, p90, p99, p999 = np.percentile(a, [50, 90, 99, 99.9])
        out.append(pb.StagePercentiles(stage=stage, count=a.size, p50_us=int(p50), p90_us=int(p90),
                                       p99_us=int(p99), p999_us=int(p999), max_us=int(a.max())))
    return out


def make_servicer(pb, rpc, model, stats):
    identity = pb.ModelIdentity(name=model.name, version=model.version, sha256=model.sha256,
                                engine=f"onnxruntime {ort.__version__} cpu")
    inp = model.inp
    recipe = pb.InputRecipe(tensor=inp["tensor"], layout=inp["layout"], width=int(inp["width"]),
                            height=int(inp["height"]), colour_order=inp["colour_order"], resize=inp["resize"],
                            interpolation=inp["interpolation"], scale=float(inp["scale"]),
                            mean=[float(v) for v in inp["mean"]], std=[float(v) for v in inp["std"]],
                            output=model.out["kind"])
    description = pb.ModelCard(identity=identity, classes=model.classes, input=recipe,
                                      intended_use=model.manifest.get("intended_use", ""),
                                      model_caution=model.manifest.get("caution", ""), caution=CAUTION,
                                      is_default=True)
    next_id = iter(range(1, 1 << 62))
    id_lock = threading.Lock()

    class FrameAnalysis(rpc.FrameAnalysisServicer):
        def RunSession(self, request_iterator, context):
            first = next(request_iterator, None)
            if first is None or first.WhichOneof("item") != "opening":
                context.abort(grpc.StatusCode.INVALID_ARGUMENT,
                              "session input: the first message must be a SessionOpening")
            opening = first.opening
            if opening.model not in ("", model.name):
                context.abort(grpc.StatusCode.NOT_FOUND,
                              f"session opening field `model`: no model named `{opening.model}`; "
                              f"this server has ['{model.name}']")
            region = opening.region if opening.HasField("region") else None
            enter = opening.decision.enter if opening.HasField("decision") else DEFAULT_ENTER
            matrix_709 = opening.yuv_matrix == pb.YUV_MATRIX_BT709
            full_range = opening.yuv_range == pb.YUV_RANGE_FULL
            with id_lock:
                session_id = f"p{next(next_id):06d}"
            # The settings in force: whatever was asked, this peer does no smoothing and no quality gate, and
            # answers every frame in order.
            settings = pb.SessionOpening(
                model=model.name, default_format=opening.default_format,
                yuv_matrix=pb.YUV_MATRIX_BT709 if matrix_709 else pb.YUV_MATRIX_BT601,
                yuv_range=pb.YUV_RANGE_FULL if full_range else pb.YUV_RANGE_LIMITED,
                filter=pb.FilterSettings(pass_through=pb.PassThrough()),
                decision=pb.DecisionSettings(enter=enter, exit=enter, dwell_ms=0.0),
                quality=pb.QualitySettings(min_focus=0.0, max_clipped=1.0),
                policy=pb.FRAME_POLICY_EVERY_FRAME, deadline_ms=opening.deadline_ms,
                source_label=opening.source_label)
            if region is not None:
                settings.region.CopyFrom(region)
            yield pb.SessionOutput(accepted=pb.SessionAccepted(
                session_id=session_id, model=identity, classes=model.classes, input=recipe, settings=settings,
                caution=CAUTION, model_caution=model.manifest.get("caution", ""),
                intended_use=model.manifest.get("intended_use", "")))
            stats.bump("sessions_total")
            stats.bump("sessions_open")
            started = time.perf_counter()
            tally = collections.Counter()
            timings = {s: [] for s in Stats.STAGES}
            try:
                for message in request_iterator:
                    arrival = time.perf_counter()
                    if message.WhichOneof("item") != "frame":
                        context.abort(grpc.StatusCode.INVALID_ARGUMENT,
                                      "session input: every message after the opening must be a Frame")
                    frame = message.frame
                    tally["frames"] += 1
                    stats.bump("frames")
                    capture = frame.capture_time_us or int((arrival - started) * 1e6)
                    answer = pb.Answer(seq=frame.seq, capture_time_us=capture, model=identity, caution=CAUTION)
                    try:
                        t0 = time.perf_counter()
                        rgb = decode(pb, frame, opening.default_format, matrix_709, full_range)
                        if region is not None:
                            fh, fw = rgb.shape[:2]
                            if (region.width == 0 or region.height == 0 or region.x + region.width > fw
                                    or region.y + region.height > fh):
                                raise BadFrame("region_outside", f"region does not fit inside the {fw}x{fh} frame")
                            rgb = rgb[region.y:region.y + region.height, region.x:region.x + region.width]
                        t_decode = time.perf_counter() - t0
                        probs, t_pre, t_inf = model.infer(rgb)
                    except BadFrame as e:
                        answer.error.kind, answer.error.message = e.kind, str(e)
                    except Exception as e:  # keep the session alive; the frame gets an error answer
                        answer.error.kind, answer.error.message = "internal", f"{type(e).__name__}: {e}"
                    if answer.WhichOneof("outcome") == "error":
                        tally["errors"] += 1
                        stats.bump("errors")
                        yield pb.SessionOutput(answer=answer)
                        continue
                    raw = [float(p) for p in probs]
                    top = int(np.argmax(probs))
                    called = raw[top] >= enter
                    total_us = int((time.perf_counter() - arrival) * 1e6)
                    stage_us = (int((t0 - arrival) * 1e6), int((t_decode + t_pre) * 1e6), int(t_inf * 1e6), 0,
                                total_us)
                    missed = opening.deadline_ms > 0 and total_us > opening.deadline_ms * 1000
                    answer.result.CopyFrom(pb.FrameResult(
                        raw=raw, smoothed=raw,
                        decision=pb.Decision(determined=called, class_index=top if called else 0,
                                             class_name=model.classes[top] if called else "",
                                             confidence=raw[top] if called else 0.0),
                        timings=pb.StageTimings(queue_us=stage_us[0], preprocess_us=stage_us[1],
                                                inference_us=stage_us[2], filter_us=0, total_us=stage_us[4]),
                        deadline_missed=missed))
                    tally["results"] += 1
                    tally["deadline_missed"] += missed
                    stats.bump("results")
                    stats.bump("deadline_missed", int(missed))
                    for stage, us in zip(Stats.STAGES, stage_us):
                        timings[stage].append(us)
                    stats.record(stage_us)
                    yield pb.SessionOutput(answer=answer)
                yield pb.SessionOutput(summary=pb.SessionSummary(
                    session_id=session_id, frames=tally["frames"], results=tally["results"], skipped=0,
                    errors=tally["errors"], deadline_missed=tally["deadline_missed"],
                    stages=percentiles(pb, timings), caution=CAUTION))
            finally:
                stats.bump("sessions_open", -1)

        def ListModelCards(self, request, context):
            return pb.ModelCards(models=[description], caution=CAUTION)

        def GetModelCard(self, request, context):
            if request.name not in ("", model.name):
                context.abort(grpc.StatusCode.NOT_FOUND, f"no model named `{request.name}`")
            return description

        def ReadStatistics(self, request, context):
            with stats.lock:
                c = dict(stats.counts)
                samples = {s: list(d) for s, d in stats.timings.items()}
            return pb.ServerStatistics(
                sessions_open=c.get("sessions_open", 0), sessions_total=c.get("sessions_total", 0),
                frames=c.get("frames", 0), results=c.get("results", 0), skipped=0, errors=c.get("errors", 0),
                deadline_missed=c.get("deadline_missed", 0), stages=percentiles(pb, samples),
                uptime_s=time.monotonic() - stats.started, caution=CAUTION)

    return FrameAnalysis()


def main():
    ap = argparse.ArgumentParser(description="Python baseline frame-analysis server for framewise bench. "
                                 + CAUTION)
    ap.add_argument("--listen", default="127.0.0.1:50061", help="HOST:PORT (port 0 picks a free one)")
    ap.add_argument("--model", required=True, help="model package directory (manifest.toml and its .onnx)")
    ap.add_argument("--intra-threads", type=int, default=1, help="onnxruntime intra-op threads (default 1)")
    ap.add_argument("--workers", type=int, default=10,
                    help="gRPC thread pool size; each open session holds one thread (default 10)")
    args = ap.parse_args()
    if args.intra_threads < 1 or args.workers < 1:
        sys.exit("--intra-threads and --workers must be at least 1")
    host = args.listen.rsplit(":", 1)[0].strip("[]")
    if host not in ("127.0.0.1", "localhost", "::1"):
        print(f"warning: plaintext, no token, on {args.listen}; this baseline is meant for loopback only",
              file=sys.stderr)

    stub_dir = tempfile.TemporaryDirectory(prefix="framewise-peer-")
    pb, rpc = generate_stubs(stub_dir.name)
    model = Model(args.model, args.intra_threads)
    stats = Stats()

    server = grpc.server(futures.ThreadPoolExecutor(max_workers=args.workers),
                         options=[("grpc.max_receive_message_length", MAX_MESSAGE_BYTES),
                                  ("grpc.max_send_message_length", MAX_MESSAGE_BYTES)])
    rpc.add_FrameAnalysisServicer_to_server(make_servicer(pb, rpc, model, stats), server)
    health_servicer = health.HealthServicer()
    health_pb2_grpc.add_HealthServicer_to_server(health_servicer, server)
    port = server.add_insecure_port(args.listen)
    if port == 0:
        sys.exit(f"could not listen on {args.listen}")
    server.start()
    for name in ("", SERVICE_NAME):
        health_servicer.set(name, health_pb2.HealthCheckResponse.SERVING)

    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    signal.signal(signal.SIGINT, lambda *_: stop.set())
    print(f"listening on {host}:{port}", flush=True)
    print(f"model {model.name} {model.version}, onnxruntime {ort.__version__} CPUExecutionProvider, "
          f"intra-op threads {args.intra_threads}, gRPC workers {args.workers}. {CAUTION}",
          file=sys.stderr, flush=True)
    stop.wait()
    for name in ("", SERVICE_NAME):
        health_servicer.set(name, health_pb2.HealthCheckResponse.NOT_SERVING)
    server.stop(grace=5).wait()
    stub_dir.cleanup()


if __name__ == "__main__":
    main()
