#!/usr/bin/env python3
"""framewise: writes a model package's self-test cases from the validation pipeline: OpenCV or Pillow to read
and resize each image as the manifest's recipe names, onnxruntime to run the model, a float64 softmax.

    python make_self_test.py PACKAGE_DIR IMAGE [IMAGE ...] [--tolerance 1e-4] [--decoder opencv|pillow]

It copies the images into PACKAGE_DIR/self-test/, writes PACKAGE_DIR/self-test/cases.toml, and prints the line
to add to the manifest (self_test = "self-test/cases.toml"). framewise runs these cases when it loads the
package and refuses the model when its probabilities differ by more than the tolerance: the numbers a
clinician sees are then shown, on the serving host, to be the ones the model was validated with.

Use the decoder the model was validated with: `--decoder opencv` (cv2.imread) or `--decoder pillow`
(Image.open(...).convert("RGB")). framewise decodes as OpenCV does; Pillow agrees on every 8-bit PNG and
JPEG except two cases: it clips 16-bit greyscale PNGs (OpenCV keeps the high byte), and Image.open does not
turn a picture as its EXIF orientation says (OpenCV does; ImageOps.exif_transpose would). Cases from such
files fail the self-test when written with --decoder pillow, as they should: framewise would not give the
pipeline's numbers on them.

Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
confirmed by a qualified clinician; check local regulations before any clinical use.

Dependencies: numpy, opencv-python(-headless), pillow, onnxruntime.
"""
import argparse
import os
import shutil
import sys
import tomllib

import cv2
import numpy as np
import onnxruntime as ort
from PIL import Image

CAUTION = ("Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and "
           "must be confirmed by a qualified clinician; check local regulations before any clinical use.")


def library_resize(rgb, tw, th, recipe):
    """The library call each framewise recipe reproduces (uint8 out; float32 for float-bilinear)."""
    if recipe == "opencv-linear":
        return cv2.resize(rgb, (tw, th), interpolation=cv2.INTER_LINEAR)
    if recipe == "opencv-area":
        return cv2.resize(rgb, (tw, th), interpolation=cv2.INTER_AREA)
    if recipe in ("pillow-bilinear", "pillow-bicubic"):
        f = Image.Resampling.BILINEAR if recipe == "pillow-bilinear" else Image.Resampling.BICUBIC
        return np.asarray(Image.fromarray(np.ascontiguousarray(rgb)).resize((tw, th), f))
    if recipe == "float-bilinear":
        # OpenCV's own float path: its IPP build takes another one, which framewise does not reproduce.
        before = cv2.ipp.useIPP()
        cv2.ipp.setUseIPP(False)
        try:
            out = cv2.resize(np.ascontiguousarray(rgb).astype(np.float32), (tw, th), interpolation=cv2.INTER_LINEAR)
        finally:
            cv2.ipp.setUseIPP(before)
        return out.reshape(th, tw, 3)
    raise SystemExit(f"make_self_test: the manifest's interpolation `{recipe}` is not a framewise recipe")


def centre_crop_box(w, h, tw, th):
    """framewise's centre crop: the largest centred rectangle of the input's aspect ratio, its size rounded half
    up, its offset rounded down."""
    if w * th > h * tw:
        cw = min(max((h * tw + th // 2) // th, 1), w)
        return ((w - cw) // 2, 0, cw, h)
    ch = min(max((w * th + tw // 2) // tw, 1), h)
    return (0, (h - ch) // 2, w, ch)


def letterbox_place(w, h, tw, th):
    """framewise's letterbox: scale by min(tw / w, th / h), the size rounded half up (at least 1), centred with
    the offset rounded down."""
    if w * th > h * tw:
        pw, ph = tw, min(max((h * tw + w // 2) // w, 1), th)
    else:
        pw, ph = min(max((w * th + h // 2) // h, 1), tw), th
    return ((tw - pw) // 2, (th - ph) // 2, pw, ph)


def reference_picture(rgb, spec):
    """The manifest's resize rule and recipe: float64 H x W x 3."""
    tw, th = spec["width"], spec["height"]
    h, w = rgb.shape[:2]
    recipe, rule = spec["interpolation"], spec["resize"]
    if rule == "centre_crop":
        x, y, cw, ch = centre_crop_box(w, h, tw, th)
        rgb = rgb[y:y + ch, x:x + cw]
    if rule == "letterbox":
        x, y, pw, ph = letterbox_place(w, h, tw, th)
        canvas = np.full((th, tw, 3), float(spec.get("letterbox_fill", 0)))
        canvas[y:y + ph, x:x + pw] = library_resize(rgb, pw, ph, recipe).astype(np.float64)
        return canvas
    return library_resize(rgb, tw, th, recipe).astype(np.float64)


def tensor_of(picture, spec):
    """(v * scale - mean) / std in float64, rounded to float32 once, in the manifest's layout and order."""
    x = picture * spec["scale"]
    if spec["colour_order"] == "bgr":
        x = x[..., ::-1]
    x = ((x - np.array(spec["mean"])) / np.array(spec["std"])).astype(np.float32)
    if spec["layout"] == "nchw":
        x = x.transpose(2, 0, 1)
    return np.ascontiguousarray(x[None])


def read_rgb(path, decoder):
    if decoder == "pillow":
        # What a Pillow pipeline reads: no EXIF turn (framewise turns as OpenCV does; see the module's doc).
        return np.asarray(Image.open(path).convert("RGB"))
    bgr = cv2.imread(path, cv2.IMREAD_COLOR)
    if bgr is None:
        raise SystemExit(f"make_self_test: cannot read {path}")
    return cv2.cvtColor(bgr, cv2.COLOR_BGR2RGB)


def probabilities(session, manifest, picture):
    spec = manifest["input"]
    name = spec["tensor"]
    outputs = session.run([manifest["output"].get("tensor") or session.get_outputs()[0].name],
                          {name: tensor_of(picture, spec)})
    scores = outputs[0].reshape(-1).astype(np.float64)
    if manifest["output"]["kind"] == "logits":
        e = np.exp(scores - scores.max())
        return e / e.sum()
    return scores


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("package", help="the model package folder (manifest.toml and the .onnx file)")
    ap.add_argument("images", nargs="+", help="PNG or JPEG images, the validation pipeline's own inputs")
    ap.add_argument("--tolerance", type=float, default=1e-4,
                    help="largest |probability - expected| accepted (default 1e-4)")
    ap.add_argument("--decoder", choices=["opencv", "pillow"], default="opencv")
    ap.add_argument("--folder", default="self-test", help="subfolder of the package for the cases")
    args = ap.parse_args()
    with open(os.path.join(args.package, "manifest.toml"), "rb") as f:
        manifest = tomllib.load(f)
    options = ort.SessionOptions()
    options.intra_op_num_threads = 1
    session = ort.InferenceSession(os.path.join(args.package, manifest["file"]), sess_options=options,
                                   providers=["CPUExecutionProvider"])
    out_dir = os.path.join(args.package, args.folder)
    os.makedirs(out_dir, exist_ok=True)
    library = "OpenCV " + cv2.__version__ if args.decoder == "opencv" else "Pillow " + Image.__version__
    recipe = manifest["input"]["interpolation"]
    lines = [f"# framewise self-test cases for {manifest['name']} {manifest['version']}. {CAUTION}",
             f'made_by = "make_self_test.py: {library} decode, the {recipe} library resize, onnxruntime {ort.__version__}"',
             f"tolerance = {args.tolerance!r}", ""]
    for path in args.images:
        name = os.path.basename(path)
        if os.path.abspath(path) != os.path.abspath(os.path.join(out_dir, name)):
            shutil.copyfile(path, os.path.join(out_dir, name))
        p = probabilities(session, manifest, reference_picture(read_rgb(path, args.decoder), manifest["input"]))
        top = manifest["classes"][int(np.argmax(p))]
        lines += ["[[case]]", f'image = "{name}"', "probabilities = [" + ", ".join(repr(float(v)) for v in p) + "]",
                  f"# arg-max: {top}", ""]
        print(f"{name}: {top} {p.max():.4f}", file=sys.stderr)
    with open(os.path.join(out_dir, "cases.toml"), "w") as f:
        f.write("\n".join(lines))
    print(f'add to {os.path.join(args.package, "manifest.toml")}: self_test = "{args.folder}/cases.toml"')


if __name__ == "__main__":
    main()
