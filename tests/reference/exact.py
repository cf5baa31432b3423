"""Reference cases for framewise's exact preprocessing, written by make_fixtures.py.

Every expected value comes from a library call outside framewise, named beside it:
- resize recipes: cv2.resize (INTER_LINEAR, INTER_AREA on uint8; INTER_LINEAR on float32 with IPP off and,
  for the report, on), PIL.Image.resize (BILINEAR, BICUBIC);
- colour: cv2.cvtColor (COLOR_YUV2RGB_NV12 / _I420 / _YUYV / _UYVY) and the ITU-R BT.601 / BT.709
  equations evaluated in float64 with NumPy;
- files: cv2.imdecode(IMREAD_COLOR) and PIL.Image.open(...).convert("RGB");
- probabilities: onnxruntime (CPUExecutionProvider) on tensors made by those calls, softmax in float64.

Inputs are seeded synthetic pictures with natural statistics (illumination gradients, sharp-edged shapes in
saturated colours, stripes near the sampling rate, sensor noise): no patient data. Decision support only, not
a diagnosis: framewise outputs are probabilities that can be wrong and must be confirmed by a qualified
clinician; check local regulations before any clinical use.
"""
import io
import os
import sys

import cv2
import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper
from PIL import Image

RECIPES = ["opencv-linear", "opencv-area", "pillow-bilinear", "pillow-bicubic", "float-bilinear"]
SATURATED = np.array([[255, 0, 0], [0, 255, 0], [0, 0, 255], [255, 255, 255], [0, 0, 0], [255, 255, 0],
                      [0, 255, 255], [255, 0, 255]], dtype=np.float64)


def natural_picture(rng, h, w):
    """H x W x 3 uint8 with the statistics that catch a biased or mis-rounded pipeline: a smooth illumination
    gradient, sharp-edged rectangles and discs in saturated colours, fine stripes (periods of 2 to 5 pixels),
    Gaussian sensor noise and a little salt and pepper."""
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64)
    fx, fy = xx / max(w - 1, 1), yy / max(h - 1, 1)
    img = np.stack([30 + 190 * fx, 40 + 170 * fy, 220 - 160 * (fx + fy) / 2], axis=-1)
    for _ in range(max(2, (h * w) // 20000 + 3)):
        colour = SATURATED[rng.integers(len(SATURATED))]
        x0, y0 = rng.integers(0, w), rng.integers(0, h)
        if rng.random() < 0.5:
            x1, y1 = x0 + rng.integers(1, max(2, w // 3)), y0 + rng.integers(1, max(2, h // 3))
            img[y0:y1, x0:x1] = colour
        else:
            r = rng.uniform(1, max(1.5, min(h, w) / 5))
            img[(xx - x0) ** 2 + (yy - y0) ** 2 <= r * r] = colour
    band = (yy > h * 0.6) & (yy < h * 0.8)
    period = rng.uniform(2, 5)
    stripes = 127 + 127 * np.sin(2 * np.pi * xx / period)
    img[band] = np.stack([stripes] * 3, axis=-1)[band]
    img += rng.normal(0, 6, img.shape)
    salt = rng.random((h, w)) < 0.005
    img[salt] = rng.choice([0.0, 255.0], size=(int(salt.sum()), 1))
    return np.clip(np.rint(img), 0, 255).astype(np.uint8)


# The reference pipeline itself (the recipes' library calls, the rules' geometry, normalisation) is the one
# framewise ships for writing self-test cases, so that the tests and the users' cases are made the same way.
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "models-demo", "scripts"))
from make_self_test import centre_crop_box, letterbox_place, reference_picture, tensor_of  # noqa: E402
from make_self_test import library_resize as _library_resize  # noqa: E402


def library_resize(rgb, tw, th, recipe, use_ipp=False):
    """The library call each recipe is named after; `use_ipp` runs float-bilinear's cv2.resize with IPP on
    (OpenCV's default, which takes another arithmetic), for the report."""
    if recipe == "float-bilinear" and use_ipp:
        out = cv2.resize(np.ascontiguousarray(rgb).astype(np.float32), (tw, th), interpolation=cv2.INTER_LINEAR)
        return out.reshape(th, tw, 3)
    return _library_resize(rgb, tw, th, recipe)


def softmax(x):
    x = x.astype(np.float64)
    e = np.exp(x - x.max(axis=-1, keepdims=True))
    return e / e.sum(axis=-1, keepdims=True)


def session(path):
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    return ort.InferenceSession(path, sess_options=opts, providers=["CPUExecutionProvider"])


# ---------------------------------------------------------------------------------------------------------
# Resize grid: every recipe against its library over shrink, enlarge, whole and fractional factors, odd sizes,
# one-pixel and extreme aspect ratios.

GRID_SOURCES = [(1, 1), (1, 9), (9, 1), (2, 3), (5, 5), (7, 3), (17, 13), (64, 48), (97, 61), (200, 150),
                (333, 250), (640, 480), (1000, 3), (3, 1000), (1920, 1080)]
GRID_TARGETS = [(1, 1), (3, 2), (5, 5), (16, 9), (32, 32), (64, 48), (96, 96), (160, 128), (224, 224),
                (299, 299), (48, 192), (320, 240)]
RULE_CASES = [((640, 480), (224, 224)), ((333, 250), (64, 48)), ((97, 61), (96, 96)), ((1920, 1080), (224, 224)),
              ((48, 200), (72, 56))]


def resize_cases(w, rng):
    """Whole-picture resizes (recipe alone) and resizes under each rule (through the manifest)."""
    sources = {}
    grid = []
    for sw, sh in GRID_SOURCES:
        src = natural_picture(rng, sh, sw)
        sources[(sw, sh)] = (src, w.bin(src, "grid_src"))
        for tw, th in GRID_TARGETS:
            case = {"width": sw, "height": sh, "target": [tw, th], "source": sources[(sw, sh)][1], "expected": {}}
            for recipe in RECIPES:
                out = library_resize(src, tw, th, recipe)
                case["expected"][recipe] = w.bin(out, f"grid_{recipe}")
            # OpenCV's default for float32 goes through IPP (measured for the report only).
            case["float_ipp"] = w.bin(library_resize(src, tw, th, "float-bilinear", use_ipp=True), "grid_ipp")
            grid.append(case)
    rules = []
    for (sw, sh), (tw, th) in RULE_CASES:
        src = natural_picture(rng, sh, sw)
        name = w.bin(src, "rule_src")
        for recipe in RECIPES:
            for rule in ("stretch", "centre_crop", "letterbox"):
                spec = {"width": tw, "height": th, "interpolation": recipe, "resize": rule, "letterbox_fill": 114}
                picture = reference_picture(src, spec).astype(np.float32)
                rules.append({"width": sw, "height": sh, "source": name, "spec": spec,
                              "expected": w.bin(picture, "rule_expected")})
    return {"grid": grid, "rules": rules}


# ---------------------------------------------------------------------------------------------------------
# YUV: cv2.cvtColor for BT.601 limited range, the ITU-R equations for the rest.

KR_KB = {"bt601": (0.299, 0.114), "bt709": (0.2126, 0.0722)}  # ITU-R BT.601 and BT.709 luma coefficients


def itu_rgb(y, u, v, matrix, full):
    """ITU-R BT.601 / BT.709 YCbCr to R'G'B' on the 0..255 scale, float64, not rounded nor clipped."""
    kr, kb = KR_KB[matrix]
    kg = 1 - kr - kb
    y, u, v = (a.astype(np.float64) for a in (y, u, v))
    if full:
        yn, un, vn = y / 255, (u - 128) / 255, (v - 128) / 255
    else:
        yn, un, vn = (y - 16) / 219, (u - 128) / 224, (v - 128) / 224
    r = yn + 2 * (1 - kr) * vn
    b = yn + 2 * (1 - kb) * un
    g = (yn - kr * r - kb * b) / kg
    return np.stack([r, g, b], axis=-1) * 255


def bt601_limited_encode(rgb, sx, sy):
    """R'G'B' to BT.601 limited-range Y, Cb, Cr planes (ITU-R BT.601 equations, rounded), chroma averaged over
    sx x sy blocks (the sizes must divide)."""
    p = rgb.astype(np.float64)
    y = 16 + (65.481 * p[..., 0] + 128.553 * p[..., 1] + 24.966 * p[..., 2]) / 255
    h, w = rgb.shape[:2]
    m = p.reshape(h // sy, sy, w // sx, sx, 3).mean(axis=(1, 3))
    cb = 128 + (-37.797 * m[..., 0] - 74.203 * m[..., 1] + 112.0 * m[..., 2]) / 255
    cr = 128 + (112.0 * m[..., 0] - 93.786 * m[..., 1] - 18.214 * m[..., 2]) / 255
    q = lambda a: np.clip(np.rint(a), 0, 255).astype(np.uint8)
    return q(y), q(cb), q(cr)


def yuv_layouts(y, u420, v420, u422, v422):
    """The raw bytes of every layout, and the planes each pixel's chroma comes from (nearest sample)."""
    h, w = y.shape
    up = lambda c, sy: np.repeat(np.repeat(c, 2, axis=1)[:, :w], sy, axis=0)[:h]
    nv12 = np.concatenate([y.ravel(), np.stack([u420, v420], -1).ravel()])
    i420 = np.concatenate([y.ravel(), u420.ravel(), v420.ravel()])
    yuyv = np.stack([y[:, 0::2], u422, y[:, 1::2], v422], -1).ravel()
    uyvy = np.stack([u422, y[:, 0::2], v422, y[:, 1::2]], -1).ravel()
    i422 = np.concatenate([y.ravel(), u422.ravel(), v422.ravel()])
    c420 = (up(u420, 2), up(v420, 2))
    c422 = (up(u422, 1), up(v422, 1))
    i444 = np.concatenate([y.ravel(), c420[0].ravel(), c420[1].ravel()])
    return {
        "nv12": (nv12, cv2.COLOR_YUV2RGB_NV12, c420, (h * 3 // 2, w)),
        "i420": (i420, cv2.COLOR_YUV2RGB_I420, c420, (h * 3 // 2, w)),
        "yuyv": (yuyv, cv2.COLOR_YUV2RGB_YUYV, c422, (h, w, 2)),
        "uyvy": (uyvy, cv2.COLOR_YUV2RGB_UYVY, c422, (h, w, 2)),
        # No cvtColor code takes planar 4:2:2 or 4:4:4: their OpenCV reference is the packed 4:2:2 or the
        # 4:2:0 conversion of the same samples.
        "i422": (i422, cv2.COLOR_YUV2RGB_YUYV, c422, None),
        "i444": (i444, cv2.COLOR_YUV2RGB_I420, c420, None),
    }


def yuv_cases(w, rng):
    out = []
    for (fw, fh) in [(2, 2), (6, 4), (64, 48), (130, 66), (322, 242)]:
        for content in ("natural", "uniform"):
            if content == "natural":
                rgb = natural_picture(rng, fh, fw)
                y, u420, v420 = bt601_limited_encode(rgb, 2, 2)
                _, u422, v422 = bt601_limited_encode(rgb, 2, 1)
            else:
                # Every code value, out-of-range ones included (limited range clips them).
                y = rng.integers(0, 256, (fh, fw), dtype=np.uint8)
                u420, v420 = (rng.integers(0, 256, (fh // 2, fw // 2), dtype=np.uint8) for _ in range(2))
                u422, v422 = (rng.integers(0, 256, (fh, fw // 2), dtype=np.uint8) for _ in range(2))
            layouts = yuv_layouts(y, u420, v420, u422, v422)
            # The equations' values, once per chroma layout (4:2:0 for NV12, I420 and I444 made from it; 4:2:2).
            itu = {}
            for kind, chroma in (("420", layouts["i420"][2]), ("422", layouts["i422"][2])):
                for matrix in ("bt601", "bt709"):
                    for rng_name, full in (("limited", False), ("full", True)):
                        exact = itu_rgb(y, chroma[0], chroma[1], matrix, full).astype(np.float32)
                        itu[(kind, f"{matrix}_{rng_name}")] = w.bin(exact, "yuv_itu")
            for fmt, (data, code, chroma, shape) in layouts.items():
                src = {"i422": layouts["yuyv"], "i444": layouts["i420"]}.get(fmt, (data, code, chroma, shape))
                opencv = cv2.cvtColor(src[0].reshape(src[3]), code)
                kind = "422" if fmt in ("yuyv", "uyvy", "i422") else "420"
                case = {"format": fmt, "width": fw, "height": fh, "content": content,
                        "frame": w.bin(data, f"yuv_{fmt}"), "opencv": w.bin(opencv, "yuv_opencv"),
                        "itu": {key: file for (k, key), file in itu.items() if k == kind}}
                out.append(case)
    return out


# ---------------------------------------------------------------------------------------------------------
# PNG and JPEG files as OpenCV and Pillow decode them.

def decode_cases(w, rng):
    out = []

    def add(kind, data, note):
        ref = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_COLOR)
        assert ref is not None, note
        ref = cv2.cvtColor(ref, cv2.COLOR_BGR2RGB)
        pil = np.asarray(Image.open(io.BytesIO(data)).convert("RGB"))
        out.append({"format": kind, "note": note, "file": w.bin(np.frombuffer(data, np.uint8), f"file_{kind}"),
                    "width": int(ref.shape[1]), "height": int(ref.shape[0]),
                    "opencv": w.bin(ref, "file_opencv"), "pillow_equals_opencv": bool(np.array_equal(pil, ref))})

    sampling = {"444": cv2.IMWRITE_JPEG_SAMPLING_FACTOR_444, "422": cv2.IMWRITE_JPEG_SAMPLING_FACTOR_422,
                "420": cv2.IMWRITE_JPEG_SAMPLING_FACTOR_420}
    for (fw, fh) in [(320, 240), (333, 177), (17, 9), (1, 1)]:
        bgr = natural_picture(rng, fh, fw)[..., ::-1]
        for q in (50, 75, 90, 95):
            for sub, flag in sampling.items():
                ok, enc = cv2.imencode(".jpg", bgr, [cv2.IMWRITE_JPEG_QUALITY, q, cv2.IMWRITE_JPEG_SAMPLING_FACTOR, flag])
                assert ok
                add("jpeg", enc.tobytes(), f"{fw}x{fh} q{q} {sub}")
        ok, enc = cv2.imencode(".jpg", bgr, [cv2.IMWRITE_JPEG_QUALITY, 85, cv2.IMWRITE_JPEG_PROGRESSIVE, 1])
        add("jpeg", enc.tobytes(), f"{fw}x{fh} progressive")
        ok, enc = cv2.imencode(".jpg", bgr, [cv2.IMWRITE_JPEG_QUALITY, 85, cv2.IMWRITE_JPEG_RST_INTERVAL, 2])
        add("jpeg", enc.tobytes(), f"{fw}x{fh} restart markers")
        ok, enc = cv2.imencode(".jpg", cv2.cvtColor(bgr, cv2.COLOR_BGR2GRAY), [cv2.IMWRITE_JPEG_QUALITY, 90])
        add("jpeg", enc.tobytes(), f"{fw}x{fh} greyscale")
        # Pillow's own encoder (its subsampling and tables), as a researcher's files may come from it.
        buf = io.BytesIO()
        Image.fromarray(np.ascontiguousarray(bgr[..., ::-1])).save(buf, "JPEG", quality=88)
        add("jpeg", buf.getvalue(), f"{fw}x{fh} written by Pillow")
        # PNG: every colour type and depth an RGB read meets.
        rgb = np.ascontiguousarray(bgr[..., ::-1])
        for note, img in [("rgb8", bgr), ("grey8", cv2.cvtColor(bgr, cv2.COLOR_BGR2GRAY)),
                          ("rgba8", np.dstack([bgr, rng.integers(0, 256, (fh, fw, 1), dtype=np.uint8)])),
                          ("rgb16", rng.integers(0, 65536, (fh, fw, 3), dtype=np.uint16)),
                          ("grey16", rng.integers(0, 65536, (fh, fw), dtype=np.uint16))]:
            ok, enc = cv2.imencode(".png", img)
            add("png", enc.tobytes(), f"{fw}x{fh} {note}")
        for note, mode in [("palette", "P"), ("one bit", "1"), ("grey and alpha", "LA")]:
            buf = io.BytesIO()
            Image.fromarray(rgb).convert(mode).save(buf, "PNG")
            add("png", buf.getvalue(), f"{fw}x{fh} {note}")
        # EXIF orientation (1 to 8), in a JPEG APP1 segment and a PNG eXIf chunk, as cameras write it.
        if (fw, fh) == (17, 9):
            for orientation in range(1, 9):
                exif = Image.Exif()
                exif[0x0112] = orientation
                for kind, fmt in (("jpeg", "JPEG"), ("png", "PNG")):
                    buf = io.BytesIO()
                    Image.fromarray(rgb).save(buf, fmt, exif=exif, **({"quality": 90} if fmt == "JPEG" else {}))
                    add(kind, buf.getvalue(), f"{fw}x{fh} orientation {orientation}")
    return out


# ---------------------------------------------------------------------------------------------------------
# Models: two small classifiers that are not saturated on natural pictures, and the input shapes exporters write.

OPSET = 17


def make_model(nodes, inputs, outputs, inits, name):
    graph = helper.make_graph(nodes, name, inputs, outputs, [numpy_helper.from_array(v, k) for k, v in inits.items()])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)], producer_name="framewise-fixtures")
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model


def conv_stack(rng, x, cin, names):
    """Two stride-2 convolutions with ReLU (the second followed by BatchNormalization, as some exports keep it)."""
    k1 = (rng.normal(0, 1, (8, cin, 3, 3)) / np.sqrt(cin * 9)).astype(np.float32)
    k2 = (rng.normal(0, 1, (8, 8, 3, 3)) / np.sqrt(72)).astype(np.float32)
    inits = {f"{names}.w1": k1, f"{names}.b1": rng.normal(0, 0.1, 8).astype(np.float32),
             f"{names}.w2": k2, f"{names}.b2": rng.normal(0, 0.1, 8).astype(np.float32),
             f"{names}.bn.scale": rng.uniform(0.5, 1.5, 8).astype(np.float32),
             f"{names}.bn.bias": rng.normal(0, 0.1, 8).astype(np.float32),
             f"{names}.bn.mean": rng.normal(0, 0.1, 8).astype(np.float32),
             f"{names}.bn.var": rng.uniform(0.5, 1.5, 8).astype(np.float32)}
    conv = dict(kernel_shape=[3, 3], strides=[2, 2], pads=[1, 1, 1, 1])
    nodes = [helper.make_node("Conv", [x, f"{names}.w1", f"{names}.b1"], ["c1"], name=f"{names}/Conv_1", **conv),
             helper.make_node("Relu", ["c1"], ["r1"], name=f"{names}/Relu_1"),
             helper.make_node("Conv", ["r1", f"{names}.w2", f"{names}.b2"], ["c2"], name=f"{names}/Conv_2", **conv),
             helper.make_node("BatchNormalization", ["c2", f"{names}.bn.scale", f"{names}.bn.bias", f"{names}.bn.mean",
                                                     f"{names}.bn.var"], ["n2"], name=f"{names}/BatchNormalization"),
             helper.make_node("Relu", ["n2"], ["features"], name=f"{names}/Relu_2")]
    return nodes, inits


def parity_nhwc(rng, gemm_scale):
    """NHWC, 64 x 48 (non-square), 5 classes; the batch as tf2onnx names unknown dimensions."""
    h, w = 48, 64
    nodes = [helper.make_node("Transpose", ["image"], ["nchw"], perm=[0, 3, 1, 2], name="to_nchw")]
    more, inits = conv_stack(rng, "nchw", 3, "backbone")
    nodes += more
    n = 8 * (h // 4) * (w // 4)
    inits["head.w"] = (rng.normal(0, 1, (5, n)) * gemm_scale / np.sqrt(n)).astype(np.float32)
    inits["head.b"] = rng.normal(0, 0.2, 5).astype(np.float32)
    nodes += [helper.make_node("Flatten", ["features"], ["flat"], axis=1),
              helper.make_node("Gemm", ["flat", "head.w", "head.b"], ["scores"], transB=1)]
    return make_model(nodes, [helper.make_tensor_value_info("image", TensorProto.FLOAT, ["unk__612", h, w, 3])],
                      [helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["unk__613", 5])], inits, "parity_nhwc")


def flatten_by_shape(x, out):
    """Flatten as PyTorch's exporter writes x.view(x.size(0), -1): Shape, Gather, Unsqueeze, Concat, Reshape."""
    return [helper.make_node("Shape", [x], [f"{out}.shape"]),
            helper.make_node("Gather", [f"{out}.shape", "const.zero"], [f"{out}.batch"], axis=0),
            helper.make_node("Unsqueeze", [f"{out}.batch", "const.axes0"], [f"{out}.batch1"]),
            helper.make_node("Concat", [f"{out}.batch1", "const.minus_one"], [f"{out}.dims"], axis=0),
            helper.make_node("Reshape", [x, f"{out}.dims"], [out])]


SHAPE_CONSTANTS = {"const.zero": np.array(0, np.int64), "const.axes0": np.array([0], np.int64),
                   "const.minus_one": np.array([-1], np.int64)}


def parity_nchw(rng, gemm_scale, dims=("batch_size", 3, "height", "width")):
    """NCHW, 72 x 56, 3 classes; dynamic axes and a Shape-fed Reshape, as PyTorch's exporter writes them."""
    h, w = 56, 72
    nodes, inits = conv_stack(rng, "input.1", 3, "features")
    nodes += flatten_by_shape("features", "flat")
    inits.update(SHAPE_CONSTANTS)
    n = 8 * (h // 4) * (w // 4)
    inits["classifier.weight"] = (rng.normal(0, 1, (3, n)) * gemm_scale / np.sqrt(n)).astype(np.float32)
    inits["classifier.bias"] = rng.normal(0, 0.2, 3).astype(np.float32)
    nodes.append(helper.make_node("Gemm", ["flat", "classifier.weight", "classifier.bias"], ["logits"], transB=1,
                                  name="/classifier/Gemm"))
    inp = helper.make_tensor_value_info("input.1", TensorProto.FLOAT, list(dims))
    return make_model(nodes, [inp], [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["batch_size", 3])],
                      inits, "parity_nchw")


def calibrated(build, seed, spec, pictures, path):
    """Builds the model with a head scaled so that its logits spread about 1.2 on the pictures: far from
    saturation, so that a small change of the input shows in the probabilities."""
    scale = 1.0
    for _ in range(3):
        model = build(np.random.default_rng(seed), scale)
        onnx.save(model, path)
        sess = session(path)
        name = sess.get_inputs()[0].name
        logits = np.concatenate([sess.run(None, {name: tensor_of(reference_picture(p, spec), spec)})[0]
                                 for p in pictures])
        spread = float(logits.std(axis=1).mean())
        scale *= 1.2 / max(spread, 1e-6)
    return path


def package(dirname, model_file, name, classes, spec, output):
    os.makedirs(dirname, exist_ok=True)
    lines = [
        "# framewise model manifest (a reference fixture). Decision support only, not a diagnosis.",
        f'name = "{name}"', 'version = "1"', f'file = "{model_file}"',
        "classes = [" + ", ".join(f'"{c}"' for c in classes) + "]",
        'intended_use = "Reference fixture for framewise tests; random weights; not a medical model."',
        "", "[input]",
        f'tensor = "{spec["tensor"]}"', f'layout = "{spec["layout"]}"', f'width = {spec["width"]}',
        f'height = {spec["height"]}', f'colour_order = "{spec["colour_order"]}"', f'scale = {spec["scale"]!r}',
        f'mean = {list(spec["mean"])}', f'std = {list(spec["std"])}', f'resize = "{spec["resize"]}"',
        f'interpolation = "{spec["interpolation"]}"', f'letterbox_fill = {spec.get("letterbox_fill", 0)}',
        "", "[output]", f'tensor = "{output}"', 'kind = "logits"', "",
    ]
    with open(os.path.join(dirname, "manifest.toml"), "w") as f:
        f.write("\n".join(lines))


PARITY = {
    "nhwc": {"tensor": "image", "layout": "nhwc", "width": 64, "height": 48, "colour_order": "rgb",
             "scale": 1 / 255, "mean": [0.485, 0.456, 0.406], "std": [0.229, 0.224, 0.225], "output": "scores",
             "classes": ["a", "b", "c", "d", "e"]},
    "nchw": {"tensor": "input.1", "layout": "nchw", "width": 72, "height": 56, "colour_order": "bgr",
             "scale": 1.0, "mean": [103.53, 116.28, 123.675], "std": [57.375, 57.12, 58.395], "output": "logits",
             "classes": ["x", "y", "z"]},
}
# The rule each model runs each recipe under, so that every recipe meets two rules across the two models.
RULES = {"nhwc": ["centre_crop", "stretch", "letterbox", "centre_crop", "letterbox"],
         "nchw": ["letterbox", "centre_crop", "stretch", "letterbox", "stretch"]}


def raw_frames(rgb):
    """A natural RGB picture in every raw layout a session takes, with the RGB a validation pipeline decodes
    from it (cv2.imdecode / cv2.cvtColor), and each layout's stride."""
    h, w = rgb.shape[:2]
    bgr = np.ascontiguousarray(rgb[..., ::-1])
    frames = {"rgb8": (rgb, rgb), "bgr8": (bgr, rgb),
              "rgba8": (np.dstack([rgb, np.full((h, w, 1), 200, np.uint8)]), rgb)}
    ok, png = cv2.imencode(".png", bgr)
    frames["png"] = (png, rgb)
    ok, jpg = cv2.imencode(".jpg", bgr, [cv2.IMWRITE_JPEG_QUALITY, 90])
    frames["jpeg"] = (jpg, cv2.cvtColor(cv2.imdecode(jpg, cv2.IMREAD_COLOR), cv2.COLOR_BGR2RGB))
    if h % 2 == 0 and w % 2 == 0:
        i420 = cv2.cvtColor(rgb, cv2.COLOR_RGB2YUV_I420)  # OpenCV's own BT.601 limited encoder
        y = i420[:h]
        u = i420[h:h + h // 4].reshape(h // 2, w // 2)
        v = i420[h + h // 4:].reshape(h // 2, w // 2)
        _, u422, v422 = bt601_limited_encode(rgb, 2, 1)
        for fmt, (data, code, _, shape) in yuv_layouts(y, u, v, u422, v422).items():
            src = {"i422": "yuyv", "i444": "i420"}.get(fmt)
            ref_data, ref_code, _, ref_shape = yuv_layouts(y, u, v, u422, v422)[src] if src else (data, code, None, shape)
            frames[fmt] = (data, cv2.cvtColor(ref_data.reshape(ref_shape), ref_code))
    return frames


def parity_cases(w, rng, out_dir):
    pictures = [natural_picture(rng, 480, 640) for _ in range(2)]
    odd = natural_picture(rng, 241, 321)
    models = {}
    for key, p in PARITY.items():
        spec = {**p, "resize": "stretch", "interpolation": "opencv-linear"}
        path = os.path.join(out_dir, f"parity-{key}", f"parity-{key}.onnx")
        os.makedirs(os.path.dirname(path), exist_ok=True)
        build = parity_nhwc if key == "nhwc" else parity_nchw
        calibrated(build, 100 + len(models), spec, pictures, path)
        package(os.path.dirname(path), os.path.basename(path), f"parity-{key}", p["classes"], spec, p["output"])
        models[key] = (session(path), spec)
    frames = raw_frames(pictures[0])
    frame_files = {fmt: (w.bin(np.frombuffer(np.ascontiguousarray(d).tobytes(), np.uint8), f"parity_{fmt}"), ref)
                   for fmt, (d, ref) in frames.items()}
    odd_frames = {fmt: raw_frames(odd)[fmt] for fmt in ("png", "rgb8")}
    odd_files = {fmt: (w.bin(np.frombuffer(np.ascontiguousarray(d).tobytes(), np.uint8), f"parity_odd_{fmt}"), ref)
                 for fmt, (d, ref) in odd_frames.items()}
    region = {"x": 33, "y": 21, "width": 571, "height": 437}
    cases = []
    bias_rng = np.random.default_rng(9)
    for key, (sess, base) in models.items():
        name = sess.get_inputs()[0].name
        for recipe, rule in zip(RECIPES, RULES[key]):
            spec = {**base, "interpolation": recipe, "resize": rule, "letterbox_fill": 114}
            runs = [(fmt, f, ref, None, 640, 480) for fmt, (f, ref) in frame_files.items()]
            runs += [(fmt, f, ref, region, 640, 480) for fmt, (f, ref) in frame_files.items()
                     if fmt in ("rgb8", "nv12", "jpeg", "uyvy")]
            runs += [(fmt, f, ref, None, 321, 241) for fmt, (f, ref) in odd_files.items()]
            for fmt, file, ref, reg, fw, fh in runs:
                rgb = ref if reg is None else ref[reg["y"]:reg["y"] + reg["height"], reg["x"]:reg["x"] + reg["width"]]
                picture = reference_picture(rgb, spec)
                probs = softmax(sess.run(None, {name: tensor_of(picture, spec)})[0])[0]
                # What a picture one grey level too bright on a quarter of its values (the bias of an earlier
                # resize) does to the probabilities: the check must be able to see it.
                bump = (bias_rng.random(picture.shape) < 0.25).astype(np.float64)
                biased = softmax(sess.run(None, {name: tensor_of(np.clip(picture + bump, 0, 255), spec)})[0])[0]
                cases.append({"model": f"parity-{key}", "spec": {k: spec[k] for k in ("interpolation", "resize", "letterbox_fill")},
                              "format": fmt, "frame": file, "width": fw, "height": fh, "region": reg,
                              "probs": probs.tolist(), "bias_effect": float(np.abs(biased - probs).max())})
    return cases


def bt601_full_encode(rgb):
    """R'G'B' to full-range BT.601 Y, Cb, Cr (ITU-R BT.601 equations on the 0..255 scale, as JPEG/JFIF uses
    them), chroma averaged over 2x2 blocks, rounded."""
    p = rgb.astype(np.float64)
    y = 0.299 * p[..., 0] + 0.587 * p[..., 1] + 0.114 * p[..., 2]
    h, w = rgb.shape[:2]
    m = p.reshape(h // 2, 2, w // 2, 2, 3).mean(axis=(1, 3))
    my = 0.299 * m[..., 0] + 0.587 * m[..., 1] + 0.114 * m[..., 2]
    cb = 128 + (m[..., 2] - my) / 1.772
    cr = 128 + (m[..., 0] - my) / 1.402
    q = lambda a: np.clip(np.rint(a), 0, 255).astype(np.uint8)
    return q(y), q(cb), q(cr)


def y4m_parity(w, rng, out_dir):
    """A 4:2:0 Y4M file whose header states full range (XCOLORRANGE=FULL, as ffmpeg writes it), replayed
    offline on the NHWC parity model: the reference decodes with the ITU-R BT.601 full-range equations rounded
    to nearest, resizes with cv2.resize INTER_LINEAR and runs onnxruntime."""
    key, (fw, fh) = "nhwc", (320, 240)
    spec = {**PARITY[key], "resize": "stretch", "interpolation": "opencv-linear"}
    sess = session(os.path.join(out_dir, f"parity-{key}", f"parity-{key}.onnx"))
    data = bytearray(f"YUV4MPEG2 W{fw} H{fh} F25:1 Ip A1:1 C420jpeg XCOLORRANGE=FULL\n".encode())
    probs = []
    for _ in range(3):
        y, cb, cr = bt601_full_encode(natural_picture(rng, fh, fw))
        data += b"FRAME\n" + y.tobytes() + cb.tobytes() + cr.tobytes()
        up = lambda c: np.repeat(np.repeat(c, 2, axis=0), 2, axis=1)
        rgb = np.clip(np.rint(itu_rgb(y, up(cb), up(cr), "bt601", True)), 0, 255).astype(np.uint8)
        x = tensor_of(reference_picture(rgb, spec), spec)
        probs.append(softmax(sess.run(None, {spec["tensor"]: x})[0])[0].tolist())
    name = "parity_full_range.y4m"
    with open(os.path.join(w.out, name), "wb") as f:
        f.write(data)
    return {"file": name, "model": f"parity-{key}", "probs": probs}


def exported_models(w, rng, out_dir):
    """The parity NCHW network with the input dimensions real exporters write: -1, 0, names, nothing at all,
    dimensions with neither value nor name; and graph inputs that repeat the initializers (older exporters).
    All variants hold the same graph and weights, so one set of inputs and onnxruntime's probabilities (on the
    variant with concrete dimensions) serves them all."""
    spec = {**PARITY["nchw"], "resize": "stretch", "interpolation": "opencv-linear"}
    base = parity_nchw(np.random.default_rng(7), 3.0, dims=[1, 3, 56, 72])
    d = os.path.join(out_dir, "exported-concrete")
    os.makedirs(d, exist_ok=True)
    onnx.save(base, os.path.join(d, "model.onnx"))
    sess = session(os.path.join(d, "model.onnx"))
    runs = []
    for _ in range(3):
        x = tensor_of(reference_picture(natural_picture(rng, 56, 72), spec), spec)
        runs.append({"input": w.bin(x, "exported_input"), "probs": softmax(sess.run(None, {"input.1": x})[0])[0].tolist()})
    variants = {
        "minus-one": [-1, 3, -1, -1], "zero": [0, 3, 0, 0], "named": ["N", 3, "H", "W"],
        "fixed-batch-free-size": [1, 3, "h", "w"], "no-shape": None, "unknown-dims": [None] * 4,
        "initializers-as-inputs": ["batch", 3, 56, 72],
    }
    out = []
    for key, dims in variants.items():
        model = onnx.ModelProto()
        model.CopyFrom(base)
        inp = model.graph.input[0].type.tensor_type
        if dims is None:
            inp.ClearField("shape")
        else:
            for dim, value in zip(inp.shape.dim, dims):
                dim.Clear()
                if isinstance(value, int):
                    dim.dim_value = value
                elif isinstance(value, str):
                    dim.dim_param = value
        if key == "initializers-as-inputs":
            # Initializers listed again among the graph's inputs (IR version 3 exports did this).
            model.graph.input.extend([helper.make_tensor_value_info(i.name, i.data_type, list(i.dims))
                                      for i in model.graph.initializer])
        d = os.path.join(out_dir, f"exported-{key}")
        os.makedirs(d, exist_ok=True)
        onnx.save(model, os.path.join(d, "model.onnx"))
        package(d, "model.onnx", f"exported-{key}", PARITY["nchw"]["classes"], spec, "logits")
        out.append({"name": key, "dir": d, "dims": [str(v) for v in dims] if dims else None, "cases": runs})
    return out


def cases(w, rng, out_dir):
    return {
        "resize": resize_cases(w, rng),
        "yuv": yuv_cases(w, rng),
        "decode": decode_cases(w, rng),
        "parity": parity_cases(w, rng, out_dir),
        "y4m_parity": y4m_parity(w, rng, out_dir),
        "exported": exported_models(w, rng, out_dir),
        "versions": {"opencv": cv2.__version__, "pillow": Image.__version__, "onnxruntime": ort.__version__,
                     "numpy": np.__version__, "ipp": bool(cv2.ipp.useIPP())},
    }
