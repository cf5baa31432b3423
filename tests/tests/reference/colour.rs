//! YUV to RGB: BT.601 limited range against OpenCV's `cv2.cvtColor`, value by value (zero differences); BT.709
//! and full range against the ITU-R equations in float64 (at most 0.5 + 4e-4 levels, the fixed-point
//! coefficients' rounding, and a mean signed difference under 0.05 per channel). Natural pictures and every
//! code value (out-of-range ones included). Fixtures: `tests/reference/exact.py`.

use framewise_engine::frame::{self, DecodeScratch, RgbImage};
use framewise_engine::{FrameRef, PixelFormat, YuvMatrix, YuvRange, YuvSpec};
use framewise_tests::{Diff, index, read_bytes, read_f32};

/// The largest distance from the exact value that rounding to nearest with 20-bit coefficients allows:
/// 0.5 for the rounding, plus 2^-21 per coefficient times at most 255 per term, over three terms (common
/// practice for fixed-point error bounds, derived in `frame/yuv.rs`).
const ITU_MAX: f64 = 0.5 + 4e-4;
/// The mean signed difference allowed per channel against the equations.
const ITU_BIAS: f64 = 0.05;

/// The same frame with every plane's rows padded to a stride `pad` bytes longer than the first plane's row
/// (planar chroma rows to `ceil(stride / 2)` for 4:2:x, as the wire contract lays them out), padding 0xA5.
fn padded(format: PixelFormat, w: usize, h: usize, tight: &[u8], pad: usize) -> (Vec<u8>, usize) {
    let (cw, ch) = (w.div_ceil(2), h.div_ceil(2));
    let row = match format {
        PixelFormat::Yuyv | PixelFormat::Uyvy => 2 * w,
        _ => w,
    };
    let s = row + pad;
    // (rows, row bytes, stride) per plane.
    let planes = match format {
        PixelFormat::Nv12 => vec![(h, w, s), (h / 2, w, s)],
        PixelFormat::I420 => vec![(h, w, s), (ch, cw, s.div_ceil(2)), (ch, cw, s.div_ceil(2))],
        PixelFormat::I422 => vec![(h, w, s), (h, cw, s.div_ceil(2)), (h, cw, s.div_ceil(2))],
        PixelFormat::I444 => vec![(h, w, s), (h, w, s), (h, w, s)],
        _ => vec![(h, row, s)],
    };
    let (mut out, mut at) = (Vec::new(), 0);
    for (rows, bytes, stride) in planes {
        for _ in 0..rows {
            out.extend_from_slice(&tight[at..at + bytes]);
            out.resize(out.len() + stride - bytes, 0xA5);
            at += bytes;
        }
    }
    (out, s)
}

fn convert(frame: &FrameRef<'_>, spec: YuvSpec) -> RgbImage {
    let mut out = RgbImage::default();
    frame::to_rgb(
        frame,
        None,
        spec,
        &Default::default(),
        &mut DecodeScratch::default(),
        &mut out,
    )
    .expect("the frame converts");
    out
}

#[test]
fn yuv_equals_opencv_and_the_itu_equations() {
    let cases = index()["exact"]["yuv"].as_array().expect("yuv").clone();
    assert!(cases.len() >= 60, "{} cases", cases.len());
    let mut failures = Vec::new();
    let mut opencv = Diff::default();
    let mut itu: std::collections::BTreeMap<String, [Diff; 3]> = Default::default();
    for case in &cases {
        let format =
            PixelFormat::from_name(case["format"].as_str().expect("format")).expect("known");
        let data = read_bytes(case["frame"].as_str().expect("frame"));
        let frame = FrameRef {
            format,
            width: case["width"].as_u64().expect("w") as u32,
            height: case["height"].as_u64().expect("h") as u32,
            stride: 0,
            data: &data,
        };
        let label = format!(
            "{format} {}x{} {}",
            frame.width,
            frame.height,
            case["content"].as_str().unwrap_or("")
        );
        let ours = convert(&frame, YuvSpec::default());
        // Reference: cv2.cvtColor(COLOR_YUV2RGB_NV12 / _I420 / _YUYV / _UYVY); planar 4:2:2 and 4:4:4 against
        // the packed 4:2:2 and the 4:2:0 conversion of the same samples.
        let reference = read_bytes(case["opencv"].as_str().expect("opencv"));
        let diff = Diff::bytes(&ours.data, &reference);
        if diff.differing > 0 {
            failures.push(format!(
                "{label} BT.601 limited against cv2.cvtColor: {diff}"
            ));
        }
        opencv.add(&diff);
        // The same samples with padded rows (odd and even padding): the same reference.
        for pad in [6, 7] {
            let (w, h) = (frame.width as usize, frame.height as usize);
            let (data, stride) = padded(format, w, h, &data, pad);
            let strided = FrameRef {
                stride: stride as u32,
                data: &data,
                ..frame
            };
            let diff = Diff::bytes(&convert(&strided, YuvSpec::default()).data, &reference);
            if diff.differing > 0 {
                failures.push(format!(
                    "{label} with a stride of {stride} against cv2.cvtColor: {diff}"
                ));
            }
            opencv.add(&diff);
        }
        for (key, file) in case["itu"].as_object().expect("itu") {
            let (matrix, range) = match key.as_str() {
                "bt601_limited" => (YuvMatrix::Bt601, YuvRange::Limited),
                "bt601_full" => (YuvMatrix::Bt601, YuvRange::Full),
                "bt709_limited" => (YuvMatrix::Bt709, YuvRange::Limited),
                _ => (YuvMatrix::Bt709, YuvRange::Full),
            };
            let ours = convert(&frame, YuvSpec { matrix, range });
            // Reference: the ITU-R BT.601 / BT.709 equations in float64 (NumPy), clipped to 0..255 as every
            // 8-bit result is.
            let exact = read_f32(file.as_str().expect("file"));
            let channels = itu.entry(key.clone()).or_default();
            for (c, channel) in channels.iter_mut().enumerate() {
                let d = Diff::of(
                    ours.data.iter().skip(c).step_by(3).map(|&v| f64::from(v)),
                    exact
                        .iter()
                        .skip(c)
                        .step_by(3)
                        .map(|&v| f64::from(v).clamp(0.0, 255.0)),
                );
                if key != "bt601_limited" && d.max_abs > ITU_MAX {
                    failures.push(format!(
                        "{label} {key} channel {c} against the ITU-R equations: {d}"
                    ));
                }
                channel.add(&d);
            }
        }
    }
    eprintln!("YUV, BT.601 limited against cv2.cvtColor: {opencv}");
    for (key, channels) in &itu {
        for (c, d) in channels.iter().enumerate() {
            eprintln!(
                "YUV, {key} against the ITU-R equations, channel {}: {d}",
                ["R", "G", "B"][c]
            );
            if key != "bt601_limited" && d.mean().abs() >= ITU_BIAS {
                failures.push(format!(
                    "{key} channel {c}: mean signed difference {:+.4}",
                    d.mean()
                ));
            }
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}
