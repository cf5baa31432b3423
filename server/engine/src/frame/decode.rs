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
//!
//! Sizes are checked against the limits from the header, before any pixel is decoded.

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

/// The size a JPEG file's frame header (SOFn, ITU-T T.81 B.2.2) states, read before libjpeg runs, which
/// refuses sides over 65,500 itself but would allocate for anything below; `None` when no frame header
/// comes before the first scan (libjpeg then refuses the file).
fn jpeg_declared_size(data: &[u8]) -> Option<(u32, u32)> {
    if data.get(..2)? != [0xFF, 0xD8] {
        return None;
    }
    let mut i = 2;
    loop {
        // Fill bytes (any number of 0xFF) may precede a marker (T.81 B.1.1.2).
        while *data.get(i)? == 0xFF && *data.get(i + 1)? == 0xFF {
            i += 1;
        }
        if *data.get(i)? != 0xFF {
            return None;
        }
        let marker = *data.get(i + 1)?;
        i += 2;
        match marker {
            // Markers without a segment.
            0x01 | 0xD0..=0xD8 => continue,
            // The end of the image or a scan before any frame header.
            0xD9 | 0xDA => return None,
            _ => {}
        }
        let len = usize::from(u16::from_be_bytes([*data.get(i)?, *data.get(i + 1)?]));
        // SOF0..SOF15, without DHT (C4), JPG (C8) and DAC (CC): P, then Y (lines), then X (samples per line).
        if matches!(marker, 0xC0..=0xCF) && !matches!(marker, 0xC4 | 0xC8 | 0xCC) {
            let segment = data.get(i + 2..i + len.max(7))?;
            let be = |a: u8, b: u8| u32::from(u16::from_be_bytes([a, b]));
            return Some((be(segment[3], segment[4]), be(segment[1], segment[2])));
        }
        if len < 2 {
            return None;
        }
        i += len;
    }
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
    Ok((width, height))
}
