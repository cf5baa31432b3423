//! PNG and JPEG files against `cv2.imdecode(..., IMREAD_COLOR)` (and Pillow, which agrees with it on every
//! 8-bit file), value by value: zero differences over JPEG qualities 50 to 95, 4:4:4, 4:2:2 and 4:2:0
//! subsampling, progressive and restart-marker files, greyscale, files Pillow wrote, odd and one-pixel sizes,
//! and every PNG colour type and depth. Fixtures: `tests/reference/exact.py`.

use framewise_engine::frame::{self, DecodeScratch, RgbImage};
use framewise_engine::{FrameRef, PixelFormat, YuvSpec};
use framewise_tests::{Diff, index, read_bytes};

#[test]
fn png_and_jpeg_decode_as_opencv_and_pillow_decode_them() {
    let cases = index()["exact"]["decode"]
        .as_array()
        .expect("decode")
        .clone();
    assert!(cases.len() >= 90, "{} cases", cases.len());
    let (mut jpeg, mut png) = (Diff::default(), Diff::default());
    let mut failures = Vec::new();
    let mut pillow_differs = Vec::new();
    for case in &cases {
        let format =
            PixelFormat::from_name(case["format"].as_str().expect("format")).expect("known");
        let note = case["note"].as_str().unwrap_or("");
        let data = read_bytes(case["file"].as_str().expect("file"));
        let frame = FrameRef {
            format,
            width: 0,
            height: 0,
            stride: 0,
            data: &data,
        };
        let mut out = RgbImage::default();
        let result = frame::to_rgb(
            &frame,
            None,
            YuvSpec::default(),
            &Default::default(),
            &mut DecodeScratch::default(),
            &mut out,
        );
        if let Err(e) = result {
            failures.push(format!("{format} {note}: refused: {e}"));
            continue;
        }
        let size = (
            case["width"].as_u64().expect("w") as u32,
            case["height"].as_u64().expect("h") as u32,
        );
        assert_eq!((out.width, out.height), size, "{format} {note}");
        // Reference: cv2.imdecode(IMREAD_COLOR) then COLOR_BGR2RGB (OpenCV 5.0, its libjpeg-turbo and
        // libpng).
        let diff = Diff::bytes(
            &out.data,
            &read_bytes(case["opencv"].as_str().expect("opencv")),
        );
        if diff.differing > 0 {
            failures.push(format!("{format} {note}: {diff}"));
        }
        if case["pillow_equals_opencv"] != true {
            pillow_differs.push(note.to_string());
        }
        if format == PixelFormat::Jpeg {
            &mut jpeg
        } else {
            &mut png
        }
        .add(&diff);
    }
    eprintln!("JPEG against cv2.imdecode: {jpeg}");
    eprintln!("PNG against cv2.imdecode: {png}");
    // Pillow's convert("RGB") clips 16-bit greyscale instead of keeping the high byte, and Image.open does
    // not turn a picture as its EXIF orientation says: it parts from OpenCV there, and framewise follows
    // OpenCV.
    eprintln!("files where Pillow's RGB parts from OpenCV's: {pillow_differs:?}");
    assert!(
        pillow_differs.iter().all(|n| n.ends_with("grey16")
            || (n.contains("orientation") && !n.ends_with("orientation 1"))),
        "Pillow parts from OpenCV on more than 16-bit grey and EXIF turns: {pillow_differs:?}"
    );
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}
