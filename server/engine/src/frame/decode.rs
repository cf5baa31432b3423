//! PNG and JPEG files to packed RGB8, as OpenCV's `cv2.imdecode(..., cv2.IMREAD_COLOR)` (converted to RGB)
//! and Pillow's `Image.open(...).convert("RGB")` read them.
//!
//! - JPEG: libjpeg-turbo's decoder (through `mozjpeg-sys`, built from its C source), with the settings
//!   OpenCV and Pillow use: the accurate integer inverse DCT (`JDCT_ISLOW`) and fancy (triangle) chroma
//!   upsampling. Both libraries bundle libjpeg-turbo, so the pixels are theirs, bit for bit. Data errors
//!   that libjpeg only warns about (extraneous bytes, a premature end) decode as libjpeg decodes them, as
//!   in OpenCV; fatal ones refuse the frame.
//! - PNG: the `png` decoder; palette, grey and alpha as libpng expands and strips them for an RGB read,
//!   16-bit samples to their high byte (`png_set_strip_16`, what OpenCV does).
//! - Both turned upright as their EXIF orientation says (a JPEG APP1 segment, a PNG eXIf chunk), as OpenCV's
//!   `imdecode` and `imread` do. Pillow's `Image.open` does not (`ImageOps.exif_transpose` does); it also
//!   clips 16-bit greyscale PNGs instead of keeping the high byte. On every other file the two agree.
//!
//! Sizes are checked against the limits from the header, before any pixel is decoded, and again after a
//! turn.

use super::{FrameError, FrameLimits, PixelFormat, check_size};

/// The size a PNG file states in its IHDR chunk, which must come first (ISO/IEC 15948, 5.6), read before
/// any decoder runs; `None` when the file does not start that way (the decoder then refuses it).
fn png_declared_size(data: &[u8]) -> Option<(u32, u32)> {
    let ihdr = data.get(..24)?;
    if &ihdr[..8] != b"\x89PNG\r\n\x1a\n" || &ihdr[12..16] != b"IHDR" {
        return None;
    }
    let be = |b: &[u8]| u32::from_be_bytes([b[0], b[1], b[2], b[3]]);
    Some((be(&ihdr[16..20]), be(&ihdr[20..24])))
}

/// The segments of a JPEG file before its first scan, as (marker, payload) pairs (ITU-T T.81 B.1); ends at
/// the first scan, the end of the image, or anything malformed.
fn jpeg_segments(data: &[u8]) -> impl Iterator<Item = (u8, &[u8])> {
    let mut i = if data.starts_with(&[0xFF, 0xD8]) {
        2
    } else {
        data.len()
    };
    std::iter::from_fn(move || {
        loop {
            // Fill bytes (any number of 0xFF) may precede a marker (T.81 B.1.1.2).
            while data.get(i) == Some(&0xFF) && data.get(i + 1) == Some(&0xFF) {
                i += 1;
            }
            if data.get(i) != Some(&0xFF) {
                return None;
            }
            let marker = *data.get(i + 1)?;
            i += 2;
            match marker {
                // Markers without a segment.
                0x01 | 0xD0..=0xD8 => continue,
                // The end of the image or the first scan.
                0xD9 | 0xDA => return None,
                _ => {}
            }
            let len = usize::from(u16::from_be_bytes([*data.get(i)?, *data.get(i + 1)?]));
            let payload = data.get(i + 2..i + len.max(2))?;
            i += len.max(2);
            return Some((marker, payload));
        }
    })
}

/// The size a JPEG file's frame header (SOFn, ITU-T T.81 B.2.2) states, read before libjpeg runs, so that an
/// image beyond the limits is refused as too large (naming the limits) whatever libjpeg's own limit says;
/// `None` when no frame header comes before the first scan (libjpeg then refuses the file).
fn jpeg_declared_size(data: &[u8]) -> Option<(u32, u32)> {
    // SOF0..SOF15, without DHT (C4), JPG (C8) and DAC (CC): P, then Y (lines), then X (samples per line).
    let (_, sof) = jpeg_segments(data)
        .find(|(m, _)| matches!(m, 0xC0..=0xCF) && !matches!(m, 0xC4 | 0xC8 | 0xCC))?;
    let be = |i: usize| {
        Some(u32::from(u16::from_be_bytes([
            *sof.get(i)?,
            *sof.get(i + 1)?,
        ])))
    };
    Some((be(3)?, be(1)?))
}

/// The EXIF orientation (TIFF tag 0x0112, 1 to 8) of a TIFF-structured EXIF block: a JPEG APP1 segment's
/// after its `Exif\0\0`, or a PNG eXIf chunk (EXIF 2.3, 4.6.2; TIFF 6.0, section 2).
fn tiff_orientation(tiff: &[u8]) -> Option<u16> {
    let little = match tiff.get(..2)? {
        b"II" => true,
        b"MM" => false,
        _ => return None,
    };
    let u16_at = |i: usize| {
        let b = tiff.get(i..i + 2)?;
        Some(if little {
            u16::from_le_bytes([b[0], b[1]])
        } else {
            u16::from_be_bytes([b[0], b[1]])
        })
    };
    let u32_at = |i: usize| {
        let b = tiff.get(i..i + 4)?;
        let b = [b[0], b[1], b[2], b[3]];
        Some(if little {
            u32::from_le_bytes(b)
        } else {
            u32::from_be_bytes(b)
        })
    };
    if u16_at(2)? != 42 {
        return None;
    }
    let ifd = usize::try_from(u32_at(4)?).ok()?;
    let entries = usize::from(u16_at(ifd)?);
    (0..entries)
        .map(|e| ifd + 2 + 12 * e)
        .take_while(|&at| at + 12 <= tiff.len())
        .find(|&at| u16_at(at) == Some(0x0112))
        .and_then(|at| u16_at(at + 8))
        .filter(|o| (1..=8).contains(o))
}

/// The orientation an EXIF block in a JPEG file states (its first APP1 segment that is EXIF).
fn jpeg_orientation(data: &[u8]) -> Option<u16> {
    jpeg_segments(data)
        .find(|(m, p)| *m == 0xE1 && p.starts_with(b"Exif\0\0"))
        .and_then(|(_, p)| tiff_orientation(&p[6..]))
}

/// Turns decoded RGB pixels upright as their EXIF orientation says, as OpenCV's `imdecode` does unless told
/// `IMREAD_IGNORE_ORIENTATION` (its `ExifTransform`): 2 mirrors left-right, 3 turns half round, 4 mirrors
/// top-bottom, 5 transposes, 6 turns a quarter clockwise, 7 transposes across the other diagonal, 8 turns a
/// quarter anticlockwise. Returns the new size.
fn orient(rgb: &mut Vec<u8>, width: u32, height: u32, orientation: u16) -> (u32, u32) {
    // (transpose, then mirror left-right, then mirror top-bottom), as OpenCV composes them.
    let (transpose, flip_x, flip_y) = match orientation {
        2 => (false, true, false),
        3 => (false, true, true),
        4 => (false, false, true),
        5 => (true, false, false),
        6 => (true, true, false),
        7 => (true, true, true),
        8 => (true, false, true),
        _ => return (width, height),
    };
    let (w, h) = (width as usize, height as usize);
    let (ow, oh) = if transpose { (h, w) } else { (w, h) };
    let mut out = vec![0u8; rgb.len()];
    for y in 0..oh {
        for x in 0..ow {
            let (tx, ty) = (
                if flip_x { ow - 1 - x } else { x },
                if flip_y { oh - 1 - y } else { y },
            );
            let (sx, sy) = if transpose { (ty, tx) } else { (tx, ty) };
            let (d, s) = ((y * ow + x) * 3, (sy * w + sx) * 3);
            out[d..d + 3].copy_from_slice(&rgb[s..s + 3]);
        }
    }
    *rgb = out;
    (ow as u32, oh as u32)
}

/// What the PNG decoder may allocate besides the pixel buffer: metadata chunks as read, an inflated ICC
/// profile (framewise uses neither) and a few rows of 16-bit RGBA. An honest file needs a few times its own
/// size at most; an inflation bomb is cut off here (the decoder then skips the profile).
fn png_side_budget(file_len: usize, limits: &FrameLimits) -> u64 {
    let rows = 4 * 8 * u64::from(limits.max_width);
    8 * file_len as u64 + rows + (1 << 20)
}

/// Decodes a PNG or JPEG file to packed RGB8 in `out`, refusing images beyond the limits before decoding
/// pixels. Returns the size.
///
/// A decoder that fails by unwinding (libjpeg's fatal errors end that way, and a Rust decoder that indexes
/// past a slice a broken header made too short panics) refuses the frame like any other decoding error.
pub(super) fn decode_file(
    format: PixelFormat,
    data: &[u8],
    limits: &FrameLimits,
    out: &mut Vec<u8>,
) -> Result<(u32, u32), FrameError> {
    let decode = std::panic::AssertUnwindSafe(|| match format {
        PixelFormat::Jpeg => decode_jpeg(data, limits, out),
        _ => decode_png(data, limits, out),
    });
    std::panic::catch_unwind(decode).unwrap_or_else(|payload| {
        let what = crate::panic_text(payload.as_ref());
        Err(FrameError::DecodeFailed {
            format,
            reason: format!("the decoder failed on this file ({what})"),
        })
    })
}

fn decode_jpeg(
    data: &[u8],
    limits: &FrameLimits,
    out: &mut Vec<u8>,
) -> Result<(u32, u32), FrameError> {
    let fail = |reason: String| FrameError::DecodeFailed {
        format: PixelFormat::Jpeg,
        reason,
    };
    if data.is_empty() {
        return Err(fail("the file is empty".into()));
    }
    if let Some((width, height)) = jpeg_declared_size(data) {
        check_size(PixelFormat::Jpeg, width, height, limits)?;
    }
    let mut jpeg = mozjpeg::Decompress::new_mem(data).map_err(|e| fail(e.to_string()))?;
    let (width, height) = jpeg.size();
    let size = (
        u32::try_from(width).unwrap_or(u32::MAX),
        u32::try_from(height).unwrap_or(u32::MAX),
    );
    check_size(PixelFormat::Jpeg, size.0, size.1, limits)?;
    use mozjpeg::ColorSpace as C;
    if matches!(jpeg.color_space(), C::JCS_CMYK | C::JCS_YCCK) {
        return Err(fail(
            "the file is CMYK; framewise reads greyscale and YCbCr/RGB JPEGs (save it as RGB)"
                .into(),
        ));
    }
    jpeg.dct_method(mozjpeg::DctMethod::IntegerSlow);
    jpeg.do_fancy_upsampling(true);
    let mut started = jpeg.rgb().map_err(|e| fail(e.to_string()))?;
    out.clear();
    out.resize(width * height * 3, 0);
    started
        .read_scanlines_into(&mut out[..])
        .map_err(|e| fail(e.to_string()))?;
    started.finish().map_err(|e| fail(e.to_string()))?;
    upright(PixelFormat::Jpeg, out, size, jpeg_orientation(data), limits)
}

/// The decoded pixels turned upright ([`orient`]), their size checked again (a turn swaps the sides).
fn upright(
    format: PixelFormat,
    out: &mut Vec<u8>,
    (width, height): (u32, u32),
    orientation: Option<u16>,
    limits: &FrameLimits,
) -> Result<(u32, u32), FrameError> {
    let size = match orientation {
        Some(o) => orient(out, width, height, o),
        None => (width, height),
    };
    check_size(format, size.0, size.1, limits)?;
    Ok(size)
}

fn decode_png(
    data: &[u8],
    limits: &FrameLimits,
    out: &mut Vec<u8>,
) -> Result<(u32, u32), FrameError> {
    use image::ImageDecoder;
    let format = PixelFormat::Png;
    let fail = |reason: String| FrameError::DecodeFailed { format, reason };
    if data.is_empty() {
        return Err(fail("the file is empty".into()));
    }
    if let Some((width, height)) = png_declared_size(data) {
        check_size(format, width, height, limits)?;
    }
    // The PNG decoder reads every chunk before the pixels, inflating an ICC profile whole: give it a budget
    // so that a small file cannot make it allocate gigabytes. The pixel buffer is not counted here; the
    // limits below bound it.
    let mut header_limits = image::Limits::no_limits();
    header_limits.max_alloc = Some(png_side_budget(data.len(), limits));
    let mut decoder =
        image::codecs::png::PngDecoder::with_limits(std::io::Cursor::new(data), header_limits)
            .map_err(|e| fail(e.to_string()))?;
    let (width, height) = decoder.dimensions();
    check_size(format, width, height, limits)?;
    let mut image_limits = image::Limits::default();
    image_limits.max_image_width = Some(limits.max_width);
    image_limits.max_image_height = Some(limits.max_height);
    decoder
        .set_limits(image_limits)
        .map_err(|e| fail(e.to_string()))?;
    let orientation = decoder
        .exif_metadata()
        .ok()
        .flatten()
        .and_then(|tiff| tiff_orientation(&tiff));
    let image = image::DynamicImage::from_decoder(decoder).map_err(|e| fail(e.to_string()))?;
    out.clear();
    use image::DynamicImage as D;
    match image {
        // 16-bit samples keep their high byte, as libpng's strip_16 does for OpenCV's 8-bit read (the
        // `image` crate's own conversion rounds instead).
        D::ImageRgb16(_) | D::ImageRgba16(_) | D::ImageLuma16(_) | D::ImageLumaA16(_) => {
            let wide = image.into_rgb16();
            out.extend(wide.as_raw().iter().map(|v| (v >> 8) as u8));
        }
        other => out.extend_from_slice(other.into_rgb8().as_raw()),
    }
    upright(format, out, (width, height), orientation, limits)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Worked example, by hand from the EXIF definitions of the eight orientations (what the stored rows
    /// and columns are, seen upright): a 3x2 picture with pixels a b c / d e f.
    #[test]
    fn the_eight_orientations_turn_a_picture_upright() {
        let px = |v: u8| [v, v, v];
        let picture: Vec<u8> = [1, 2, 3, 4, 5, 6].into_iter().flat_map(px).collect();
        for (orientation, size, upright) in [
            (1, (3, 2), vec![1, 2, 3, 4, 5, 6]),
            (2, (3, 2), vec![3, 2, 1, 6, 5, 4]),
            (3, (3, 2), vec![6, 5, 4, 3, 2, 1]),
            (4, (3, 2), vec![4, 5, 6, 1, 2, 3]),
            (5, (2, 3), vec![1, 4, 2, 5, 3, 6]),
            (6, (2, 3), vec![4, 1, 5, 2, 6, 3]),
            (7, (2, 3), vec![6, 3, 5, 2, 4, 1]),
            (8, (2, 3), vec![3, 6, 2, 5, 1, 4]),
        ] {
            let mut rgb = picture.clone();
            assert_eq!(
                orient(&mut rgb, 3, 2, orientation),
                size,
                "orientation {orientation}"
            );
            let want: Vec<u8> = upright.into_iter().flat_map(px).collect();
            assert_eq!(rgb, want, "orientation {orientation}");
        }
    }

    #[test]
    fn malformed_exif_and_jpeg_headers_are_ignored_not_trusted() {
        for tiff in [
            &b""[..],
            b"II",
            b"II*\0\xff\xff\xff\xff",
            b"MM\0*\0\0\0\x08\xff\xff",
            b"XX*\0",
        ] {
            assert_eq!(tiff_orientation(tiff), None, "{tiff:?}");
        }
        // Orientation 6, big-endian, one entry.
        let tiff = b"MM\0*\0\0\0\x08\0\x01\x01\x12\0\x03\0\0\0\x01\0\x06\0\0";
        assert_eq!(tiff_orientation(tiff), Some(6));
        for jpeg in [
            &b""[..],
            b"\xff\xd8",
            b"\xff\xd8\xff\xc0\0",
            b"\xff\xd8\xff\xc0\0\x11\x08",
            b"\xff\xd8\xff\xda",
        ] {
            assert_eq!(jpeg_declared_size(jpeg), None, "{jpeg:?}");
            assert_eq!(jpeg_orientation(jpeg), None, "{jpeg:?}");
        }
        // A frame header stating 8 lines of 16 samples.
        let sof = b"\xff\xd8\xff\xe0\0\x04ab\xff\xc0\0\x0b\x08\0\x08\0\x10\x01\x01\x11\0";
        assert_eq!(jpeg_declared_size(sof), Some((16, 8)));
    }
}
