//! Frames as they arrive (raw pixels with a stride, or PNG/JPEG files), their validation, and their
//! conversion to packed RGB over a region of interest.
//!
//! Every size, stride and length is checked before any pixel is read; a bad frame gives a [`FrameError`]
//! that says what was expected.

use std::fmt;

use crate::vector::with_avx2;
use yuvutils_rs as yuv;

/// Pixel layouts a frame may arrive in.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum PixelFormat {
    /// Packed 8-bit red, green, blue.
    Rgb8,
    /// Packed 8-bit blue, green, red.
    Bgr8,
    /// Packed 8-bit red, green, blue, alpha (alpha ignored).
    Rgba8,
    /// Packed 8-bit blue, green, red, alpha (alpha ignored).
    Bgra8,
    /// 8-bit grey.
    Gray8,
    /// 4:2:0: a Y plane, then one interleaved U,V plane, both with the frame's stride.
    Nv12,
    /// 4:2:0: Y plane, U plane, V plane; chroma planes use half the stride.
    I420,
    /// 4:2:2 packed Y0 U Y1 V.
    Yuyv,
    /// A PNG file.
    Png,
    /// A JPEG file.
    Jpeg,
}

impl PixelFormat {
    /// Every format, in wire order.
    pub const ALL: [PixelFormat; 10] = [
        Self::Rgb8,
        Self::Bgr8,
        Self::Rgba8,
        Self::Bgra8,
        Self::Gray8,
        Self::Nv12,
        Self::I420,
        Self::Yuyv,
        Self::Png,
        Self::Jpeg,
    ];

    /// Short lower-case name, as used on the command line and in files.
    pub fn name(self) -> &'static str {
        match self {
            Self::Rgb8 => "rgb8",
            Self::Bgr8 => "bgr8",
            Self::Rgba8 => "rgba8",
            Self::Bgra8 => "bgra8",
            Self::Gray8 => "gray8",
            Self::Nv12 => "nv12",
            Self::I420 => "i420",
            Self::Yuyv => "yuyv",
            Self::Png => "png",
            Self::Jpeg => "jpeg",
        }
    }

    /// Parses [`PixelFormat::name`].
    pub fn from_name(name: &str) -> Option<Self> {
        Self::ALL
            .into_iter()
            .find(|f| f.name().eq_ignore_ascii_case(name))
    }

    /// True for encoded files (PNG, JPEG), whose size is read from the file.
    pub fn is_encoded(self) -> bool {
        matches!(self, Self::Png | Self::Jpeg)
    }

    /// True for YUV formats, which need a matrix and a range.
    pub fn is_yuv(self) -> bool {
        matches!(self, Self::Nv12 | Self::I420 | Self::Yuyv)
    }

    /// Bytes of one row of the first plane for a frame `width` pixels wide (raw formats only).
    fn row_bytes(self, width: u64) -> u64 {
        match self {
            Self::Rgb8 | Self::Bgr8 => width * 3,
            Self::Rgba8 | Self::Bgra8 => width * 4,
            Self::Gray8 | Self::Nv12 | Self::I420 => width,
            Self::Yuyv => width * 2,
            Self::Png | Self::Jpeg => 0,
        }
    }

    /// Horizontal and vertical chroma subsampling steps (1 for none).
    fn chroma_steps(self) -> (u32, u32) {
        match self {
            Self::Nv12 | Self::I420 => (2, 2),
            Self::Yuyv => (2, 1),
            _ => (1, 1),
        }
    }
}

impl fmt::Display for PixelFormat {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// The YUV to RGB matrix.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum YuvMatrix {
    /// ITU-R BT.601.
    #[default]
    Bt601,
    /// ITU-R BT.709.
    Bt709,
}

/// The code range of YUV samples.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum YuvRange {
    /// Y 16..235, U and V 16..240 (ITU-R BT.601 / BT.709 "limited" range).
    #[default]
    Limited,
    /// 0..255.
    Full,
}

/// How YUV frames are to be read.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct YuvSpec {
    /// Matrix.
    pub matrix: YuvMatrix,
    /// Range.
    pub range: YuvRange,
}

/// A rectangle of the frame, in pixels.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Region {
    /// Left edge.
    pub x: u32,
    /// Top edge.
    pub y: u32,
    /// Width.
    pub width: u32,
    /// Height.
    pub height: u32,
}

impl Region {
    /// The whole of a `width` x `height` frame.
    pub fn whole(width: u32, height: u32) -> Self {
        Self {
            x: 0,
            y: 0,
            width,
            height,
        }
    }

    fn fits(&self, width: u32, height: u32) -> bool {
        self.width > 0
            && self.height > 0
            && u64::from(self.x) + u64::from(self.width) <= u64::from(width)
            && u64::from(self.y) + u64::from(self.height) <= u64::from(height)
    }
}

impl fmt::Display for Region {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}x{}+{}+{}", self.width, self.height, self.x, self.y)
    }
}

/// Limits every frame is held to before any pixel is read.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FrameLimits {
    /// Largest accepted width in pixels.
    pub max_width: u32,
    /// Largest accepted height in pixels.
    pub max_height: u32,
}

/// Default frame limits: 8192 x 8192 pixels, twice 4K UHD in each direction.
pub const DEFAULT_FRAME_LIMITS: FrameLimits = FrameLimits {
    max_width: 8192,
    max_height: 8192,
};

impl Default for FrameLimits {
    fn default() -> Self {
        DEFAULT_FRAME_LIMITS
    }
}

/// Why a frame cannot be read. Each message says what was expected.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum FrameError {
    /// Width or height is zero.
    #[error("{format} frame has size {width}x{height}; width and height must be at least 1")]
    EmptySize {
        format: PixelFormat,
        width: u32,
        height: u32,
    },
    /// Width or height exceeds the limits.
    #[error(
        "{format} frame is {width}x{height}, larger than the limit of {max_width}x{max_height}"
    )]
    TooLarge {
        format: PixelFormat,
        width: u32,
        height: u32,
        max_width: u32,
        max_height: u32,
    },
    /// A chroma-subsampled format with an odd dimension.
    #[error("{format} frame is {width}x{height}; {format} needs an even {which}")]
    OddDimension {
        format: PixelFormat,
        width: u32,
        height: u32,
        which: &'static str,
    },
    /// The stride is shorter than a row.
    #[error(
        "{format} stride is {stride} bytes, shorter than one row of {row} bytes for width {width}"
    )]
    StrideTooShort {
        format: PixelFormat,
        stride: u64,
        row: u64,
        width: u32,
    },
    /// I420's chroma stride would not be whole.
    #[error(
        "i420 stride is {stride} bytes; it must be even so that the chroma planes have half of it"
    )]
    OddStride { stride: u64 },
    /// The buffer length does not fit the size and stride.
    #[error(
        "{format} buffer is {got} bytes, expected {expected} for {width}x{height} with stride {stride}"
    )]
    BadLength {
        format: PixelFormat,
        got: u64,
        expected: u64,
        width: u32,
        height: u32,
        stride: u64,
    },
    /// An encoded frame is empty or cannot be decoded.
    #[error("{format} frame could not be decoded: {reason}")]
    DecodeFailed { format: PixelFormat, reason: String },
    /// The region of interest does not fit inside the frame.
    #[error("region of interest {region} does not fit inside the {width}x{height} frame")]
    RegionOutside {
        region: Region,
        width: u32,
        height: u32,
    },
    /// The colour converter refused the frame (should not happen after validation).
    #[error("{format} colour conversion failed: {reason}")]
    ConversionFailed { format: PixelFormat, reason: String },
}

impl FrameError {
    /// A short machine-readable kind, stable across versions.
    pub fn kind(&self) -> &'static str {
        match self {
            Self::EmptySize { .. } => "empty_size",
            Self::TooLarge { .. } => "too_large",
            Self::OddDimension { .. } => "odd_dimension",
            Self::StrideTooShort { .. } | Self::OddStride { .. } => "bad_stride",
            Self::BadLength { .. } => "bad_length",
            Self::DecodeFailed { .. } => "decode_failed",
            Self::RegionOutside { .. } => "region_outside",
            Self::ConversionFailed { .. } => "conversion_failed",
        }
    }
}

/// A frame as received: borrowed bytes and what the sender says they are.
#[derive(Debug, Clone, Copy)]
pub struct FrameRef<'a> {
    /// Pixel format.
    pub format: PixelFormat,
    /// Width in pixels (ignored for PNG and JPEG).
    pub width: u32,
    /// Height in pixels (ignored for PNG and JPEG).
    pub height: u32,
    /// Bytes from one row to the next in the first plane; 0 for tightly packed rows.
    pub stride: u32,
    /// The bytes.
    pub data: &'a [u8],
}

/// A validated raw frame: its geometry is known to fit its buffer.
#[derive(Debug, Clone, Copy)]
struct Checked<'a> {
    format: PixelFormat,
    width: u32,
    height: u32,
    stride: usize,
    data: &'a [u8],
}

/// Packed RGB8 pixels.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct RgbImage {
    /// Width in pixels.
    pub width: u32,
    /// Height in pixels.
    pub height: u32,
    /// `width * height * 3` bytes, red first.
    pub data: Vec<u8>,
}

/// Packed RGB8 pixels, borrowed: an [`RgbImage`]'s, or a received RGB8 frame's own bytes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RgbView<'a> {
    /// Width in pixels.
    pub width: u32,
    /// Height in pixels.
    pub height: u32,
    /// `width * height * 3` bytes, red first.
    pub data: &'a [u8],
}

impl RgbImage {
    /// The pixels, borrowed.
    pub fn view(&self) -> RgbView<'_> {
        RgbView {
            width: self.width,
            height: self.height,
            data: &self.data,
        }
    }

    fn reset(&mut self, width: u32, height: u32) {
        self.width = width;
        self.height = height;
        // Every converter writes every byte of the picture, so a buffer that already has the length is not
        // cleared: clearing a 1920x1080 picture wrote 6 MB per frame for nothing.
        self.data.resize(width as usize * height as usize * 3, 0);
    }
}

/// Reusable buffers for [`to_rgb`], kept per session so that steady streams allocate nothing.
#[derive(Debug, Default)]
pub struct DecodeScratch {
    aligned: RgbImage,
    decoded: Vec<u8>,
    planes: YuvPlanes,
}

impl<'a> FrameRef<'a> {
    /// Checks size, stride and length against the format and the limits, without reading any pixel.
    fn check(&self, limits: &FrameLimits) -> Result<Checked<'a>, FrameError> {
        let (format, width, height) = (self.format, self.width, self.height);
        check_size(format, width, height, limits)?;
        let (sx, sy) = format.chroma_steps();
        if sx == 2 && width % 2 != 0 {
            return Err(FrameError::OddDimension {
                format,
                width,
                height,
                which: "width",
            });
        }
        if sy == 2 && height % 2 != 0 {
            return Err(FrameError::OddDimension {
                format,
                width,
                height,
                which: "height",
            });
        }
        let row = format.row_bytes(u64::from(width));
        let stride = if self.stride == 0 {
            row
        } else {
            u64::from(self.stride)
        };
        if stride < row {
            return Err(FrameError::StrideTooShort {
                format,
                stride,
                row,
                width,
            });
        }
        if format == PixelFormat::I420 && stride % 2 != 0 {
            return Err(FrameError::OddStride { stride });
        }
        let h = u64::from(height);
        // Bytes of the whole frame with every row padded to the stride, and the least the sender may send
        // (the last row unpadded).
        let (full, least) = match format {
            PixelFormat::Nv12 => (
                stride * h + stride * (h / 2),
                stride * h + stride * (h / 2 - 1) + row,
            ),
            PixelFormat::I420 => {
                let c = stride / 2;
                (
                    stride * h + 2 * c * (h / 2),
                    stride * h + c * (h / 2) + c * (h / 2 - 1) + row / 2,
                )
            }
            _ => (stride * h, stride * (h - 1) + row),
        };
        let got = self.data.len() as u64;
        if got < least || got > full {
            return Err(FrameError::BadLength {
                format,
                got,
                expected: full,
                width,
                height,
                stride,
            });
        }
        Ok(Checked {
            format,
            width,
            height,
            stride: stride as usize,
            data: self.data,
        })
    }
}

fn check_size(
    format: PixelFormat,
    width: u32,
    height: u32,
    limits: &FrameLimits,
) -> Result<(), FrameError> {
    if width == 0 || height == 0 {
        return Err(FrameError::EmptySize {
            format,
            width,
            height,
        });
    }
    if width > limits.max_width || height > limits.max_height {
        return Err(FrameError::TooLarge {
            format,
            width,
            height,
            max_width: limits.max_width,
            max_height: limits.max_height,
        });
    }
    Ok(())
}

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

/// What the PNG decoder may allocate besides the pixel buffer: metadata chunks as read, an inflated ICC
/// profile (framewise uses neither) and a few rows of 16-bit RGBA. An honest file needs a few times its own
/// size at most; an inflation bomb is cut off here (the decoder then skips the profile).
fn png_side_budget(file_len: usize, limits: &FrameLimits) -> u64 {
    let rows = 4 * 8 * u64::from(limits.max_width);
    8 * file_len as u64 + rows + (1 << 20)
}

/// Decodes a PNG or JPEG file to packed RGB8, refusing images beyond the limits before decoding pixels.
///
/// A decoder that panics on a malformed file (one JPEG decoder's SIMD transform unwraps a slice that a
/// broken header made too short) refuses that frame like any other decoding error.
fn decode_file(
    format: PixelFormat,
    data: &[u8],
    limits: &FrameLimits,
    out: &mut Vec<u8>,
) -> Result<(u32, u32), FrameError> {
    let decode = std::panic::AssertUnwindSafe(|| decode_file_unguarded(format, data, limits, out));
    std::panic::catch_unwind(decode).unwrap_or_else(|payload| {
        let what = crate::panic_text(payload.as_ref());
        Err(FrameError::DecodeFailed {
            format,
            reason: format!("the decoder failed on this file ({what})"),
        })
    })
}

fn decode_file_unguarded(
    format: PixelFormat,
    data: &[u8],
    limits: &FrameLimits,
    out: &mut Vec<u8>,
) -> Result<(u32, u32), FrameError> {
    use image::ImageDecoder;
    let fail = |reason: String| FrameError::DecodeFailed { format, reason };
    if data.is_empty() {
        return Err(fail("the file is empty".into()));
    }
    if format == PixelFormat::Png
        && let Some((width, height)) = png_declared_size(data)
    {
        check_size(format, width, height, limits)?;
    }
    let cursor = std::io::Cursor::new(data);
    let mut decoder: Box<dyn ImageDecoder> = match format {
        PixelFormat::Png => {
            // The PNG decoder reads every chunk before the pixels, inflating an ICC profile whole: give it
            // a budget so that a small file cannot make it allocate gigabytes. The pixel buffer is not
            // counted here; the limits below bound it.
            let mut header_limits = image::Limits::no_limits();
            header_limits.max_alloc = Some(png_side_budget(data.len(), limits));
            Box::new(
                image::codecs::png::PngDecoder::with_limits(cursor, header_limits)
                    .map_err(|e| fail(e.to_string()))?,
            )
        }
        _ => Box::new(
            image::codecs::jpeg::JpegDecoder::new(cursor).map_err(|e| fail(e.to_string()))?,
        ),
    };
    let (width, height) = decoder.dimensions();
    check_size(format, width, height, limits)?;
    let mut image_limits = image::Limits::default();
    image_limits.max_image_width = Some(limits.max_width);
    image_limits.max_image_height = Some(limits.max_height);
    decoder
        .set_limits(image_limits)
        .map_err(|e| fail(e.to_string()))?;
    let image = image::DynamicImage::from_decoder(decoder).map_err(|e| fail(e.to_string()))?;
    let rgb = image.into_rgb8();
    out.clear();
    out.extend_from_slice(rgb.as_raw());
    Ok((width, height))
}

/// Converts the region of interest of `frame` to packed RGB8 in `out`.
///
/// `region` of `None` means the whole frame. PNG and JPEG are decoded first. For chroma-subsampled formats
/// the region is widened to whole chroma samples, converted, and cut back to the exact region, so any
/// region gives the pixels a full-frame conversion would.
pub fn to_rgb(
    frame: &FrameRef<'_>,
    region: Option<Region>,
    yuv_spec: YuvSpec,
    limits: &FrameLimits,
    scratch: &mut DecodeScratch,
    out: &mut RgbImage,
) -> Result<(), FrameError> {
    to_rgb_rows(frame, region, yuv_spec, limits, scratch, out, None)
}

/// As [`to_rgb`], but when `rows` is given (one flag per row of the region) only the flagged rows need to
/// be right: a raw frame then converts just those rows and leaves the others as they were in `out`. The
/// resize reads two rows per output row when it shrinks with bilinear interpolation
/// ([`crate::preprocess::rows_read`]), so a 1920x1080 frame for a 224x224 input converts 448 of its 1080
/// rows. PNG and JPEG (decoded whole), a region widened to whole chroma samples, and a `rows` of the wrong
/// length convert every row.
pub fn to_rgb_rows(
    frame: &FrameRef<'_>,
    region: Option<Region>,
    yuv_spec: YuvSpec,
    limits: &FrameLimits,
    scratch: &mut DecodeScratch,
    out: &mut RgbImage,
    rows: Option<&[bool]>,
) -> Result<(), FrameError> {
    if frame.format.is_encoded() {
        let DecodeScratch {
            decoded,
            aligned,
            planes,
        } = scratch;
        let (width, height) = decode_file(frame.format, frame.data, limits, decoded)?;
        let region = checked_region(region, width, height)?;
        let packed = Checked {
            format: PixelFormat::Rgb8,
            width,
            height,
            stride: width as usize * 3,
            data: decoded,
        };
        return convert_region(&packed, region, yuv_spec, aligned, planes, out, None);
    }
    let checked = frame.check(limits)?;
    let region = checked_region(region, checked.width, checked.height)?;
    convert_region(
        &checked,
        region,
        yuv_spec,
        &mut scratch.aligned,
        &mut scratch.planes,
        out,
        rows,
    )
}

/// A tightly packed RGB8 frame taken whole is already what [`to_rgb`] would make: its own bytes, checked as
/// `to_rgb` checks them, with no copy. `Ok(None)` for every other frame (another format, rows padded to a
/// stride, a region of interest smaller than the frame), which goes through `to_rgb`.
pub fn packed_rgb_view<'a>(
    frame: &FrameRef<'a>,
    region: Option<Region>,
    limits: &FrameLimits,
) -> Result<Option<RgbView<'a>>, FrameError> {
    if frame.format != PixelFormat::Rgb8 {
        return Ok(None);
    }
    let checked = frame.check(limits)?;
    let region = checked_region(region, checked.width, checked.height)?;
    let row = checked.width as usize * 3;
    let len = row * checked.height as usize;
    if region != Region::whole(checked.width, checked.height)
        || checked.stride != row
        || checked.data.len() < len
    {
        return Ok(None);
    }
    Ok(Some(RgbView {
        width: checked.width,
        height: checked.height,
        data: &checked.data[..len],
    }))
}

/// The frame's region as packed RGB8: read in place when [`packed_rgb_view`] can, else converted by
/// [`to_rgb`] into `out`.
pub fn read_rgb<'a>(
    frame: &FrameRef<'a>,
    region: Option<Region>,
    yuv_spec: YuvSpec,
    limits: &FrameLimits,
    scratch: &mut DecodeScratch,
    out: &'a mut RgbImage,
) -> Result<RgbView<'a>, FrameError> {
    read_rgb_rows(frame, region, yuv_spec, limits, scratch, out, None)
}

/// As [`read_rgb`], converting only the flagged rows where [`to_rgb_rows`] can.
pub fn read_rgb_rows<'a>(
    frame: &FrameRef<'a>,
    region: Option<Region>,
    yuv_spec: YuvSpec,
    limits: &FrameLimits,
    scratch: &mut DecodeScratch,
    out: &'a mut RgbImage,
    rows: Option<&[bool]>,
) -> Result<RgbView<'a>, FrameError> {
    if let Some(view) = packed_rgb_view(frame, region, limits)? {
        return Ok(view);
    }
    to_rgb_rows(frame, region, yuv_spec, limits, scratch, out, rows)?;
    Ok(out.view())
}

fn checked_region(region: Option<Region>, width: u32, height: u32) -> Result<Region, FrameError> {
    let region = region.unwrap_or(Region::whole(width, height));
    if !region.fits(width, height) {
        return Err(FrameError::RegionOutside {
            region,
            width,
            height,
        });
    }
    Ok(region)
}

fn convert_region(
    frame: &Checked<'_>,
    region: Region,
    yuv_spec: YuvSpec,
    aligned: &mut RgbImage,
    planes: &mut YuvPlanes,
    out: &mut RgbImage,
    rows: Option<&[bool]>,
) -> Result<(), FrameError> {
    let (sx, sy) = frame.format.chroma_steps();
    if sx == 1 && sy == 1 {
        out.reset(region.width, region.height);
        convert_packed(frame, region, out, rows);
        return Ok(());
    }
    // Widen to whole chroma samples.
    let x0 = region.x - region.x % sx;
    let y0 = region.y - region.y % sy;
    let x1 = (region.x + region.width).next_multiple_of(sx);
    let y1 = (region.y + region.height).next_multiple_of(sy);
    let wide = Region {
        x: x0,
        y: y0,
        width: x1 - x0,
        height: y1 - y0,
    };
    if wide == region {
        out.reset(region.width, region.height);
        return convert_yuv(frame, region, yuv_spec, planes, out, rows);
    }
    aligned.reset(wide.width, wide.height);
    convert_yuv(frame, wide, yuv_spec, planes, aligned, None)?;
    out.reset(region.width, region.height);
    let (dx, dy) = ((region.x - x0) as usize, (region.y - y0) as usize);
    let src_row = wide.width as usize * 3;
    let dst_row = region.width as usize * 3;
    for (row, dst) in out.data.chunks_exact_mut(dst_row).enumerate() {
        let start = (row + dy) * src_row + dx * 3;
        dst.copy_from_slice(&aligned.data[start..start + dst_row]);
    }
    Ok(())
}

with_avx2! {
/// RGB, BGR, RGBA, BGRA and grey to packed RGB: every row, or only the flagged ones.
fn convert_packed / convert_packed_plain(frame: &Checked<'_>, region: Region, out: &mut RgbImage, rows: Option<&[bool]>) {
    let rows = rows.filter(|r| r.len() == region.height as usize);
    let bpp = match frame.format {
        PixelFormat::Rgb8 | PixelFormat::Bgr8 => 3,
        PixelFormat::Rgba8 | PixelFormat::Bgra8 => 4,
        _ => 1,
    };
    let w = region.width as usize;
    for (row, dst) in out.data.chunks_exact_mut(w * 3).enumerate() {
        if rows.is_some_and(|r| !r[row]) {
            continue;
        }
        let start = (region.y as usize + row) * frame.stride + region.x as usize * bpp;
        let src = &frame.data[start..start + w * bpp];
        match frame.format {
            PixelFormat::Rgb8 => dst.copy_from_slice(src),
            PixelFormat::Bgr8 => {
                for (d, s) in dst.chunks_exact_mut(3).zip(src.chunks_exact(3)) {
                    d.copy_from_slice(&[s[2], s[1], s[0]]);
                }
            }
            PixelFormat::Rgba8 => {
                // Written as the three values (not a sub-slice copy) so that it vectorises.
                for (d, s) in dst.chunks_exact_mut(3).zip(src.chunks_exact(4)) {
                    d.copy_from_slice(&[s[0], s[1], s[2]]);
                }
            }
            PixelFormat::Bgra8 => {
                for (d, s) in dst.chunks_exact_mut(3).zip(src.chunks_exact(4)) {
                    d.copy_from_slice(&[s[2], s[1], s[0]]);
                }
            }
            _ => {
                for (d, &s) in dst.chunks_exact_mut(3).zip(src) {
                    d.copy_from_slice(&[s, s, s]);
                }
            }
        }
    }
}
}

/// Encodes packed RGB8 into another format with tightly packed rows: for synthetic frames in tests, benchmarks
/// and demos (not on the analysis path). YUV uses BT.601 limited range with 2x2 (4:2:0) or 2x1 (4:2:2) chroma
/// averaging; width and height must be even for YUV. PNG and JPEG (quality 90) use the `image` encoders.
pub fn encode_from_rgb(
    rgb: &[u8],
    width: u32,
    height: u32,
    format: PixelFormat,
) -> Result<Vec<u8>, FrameError> {
    let (w, h) = (width as usize, height as usize);
    if rgb.len() != w * h * 3 || w == 0 || h == 0 {
        let expected = (w * h * 3) as u64;
        return Err(FrameError::BadLength {
            format: PixelFormat::Rgb8,
            got: rgb.len() as u64,
            expected,
            width,
            height,
            stride: w as u64 * 3,
        });
    }
    let (sx, sy) = format.chroma_steps();
    if (sx == 2 && w % 2 != 0) || (sy == 2 && h % 2 != 0) {
        return Err(FrameError::OddDimension {
            format,
            width,
            height,
            which: if w % 2 != 0 { "width" } else { "height" },
        });
    }
    let px = |x: usize, y: usize| -> [f64; 3] {
        let i = (y * w + x) * 3;
        [
            f64::from(rgb[i]),
            f64::from(rgb[i + 1]),
            f64::from(rgb[i + 2]),
        ]
    };
    // ITU-R BT.601, 8-bit limited range.
    let luma = |p: [f64; 3]| {
        (16.0 + (65.481 * p[0] + 128.553 * p[1] + 24.966 * p[2]) / 255.0)
            .round()
            .clamp(0.0, 255.0) as u8
    };
    let cb = |p: [f64; 3]| {
        (128.0 + (-37.797 * p[0] - 74.203 * p[1] + 112.0 * p[2]) / 255.0)
            .round()
            .clamp(0.0, 255.0) as u8
    };
    let cr = |p: [f64; 3]| {
        (128.0 + (112.0 * p[0] - 93.786 * p[1] - 18.214 * p[2]) / 255.0)
            .round()
            .clamp(0.0, 255.0) as u8
    };
    let mean = |pts: &[[f64; 3]]| {
        let n = pts.len() as f64;
        [0, 1, 2].map(|c| pts.iter().map(|p| p[c]).sum::<f64>() / n)
    };
    let fail = |reason: String| FrameError::DecodeFailed { format, reason };
    Ok(match format {
        PixelFormat::Rgb8 => rgb.to_vec(),
        PixelFormat::Bgr8 => rgb
            .chunks_exact(3)
            .flat_map(|p| [p[2], p[1], p[0]])
            .collect(),
        PixelFormat::Rgba8 => rgb
            .chunks_exact(3)
            .flat_map(|p| [p[0], p[1], p[2], 255])
            .collect(),
        PixelFormat::Bgra8 => rgb
            .chunks_exact(3)
            .flat_map(|p| [p[2], p[1], p[0], 255])
            .collect(),
        PixelFormat::Gray8 => {
            let mut out = Vec::new();
            crate::preprocess::luma_of(rgb, &mut out);
            out
        }
        PixelFormat::Nv12 | PixelFormat::I420 => {
            let mut y_plane: Vec<u8> = (0..w * h).map(|i| luma(px(i % w, i / w))).collect();
            let (mut u, mut v) = (Vec::with_capacity(w * h / 4), Vec::with_capacity(w * h / 4));
            for cy in 0..h / 2 {
                for cx in 0..w / 2 {
                    let m = mean(&[
                        px(2 * cx, 2 * cy),
                        px(2 * cx + 1, 2 * cy),
                        px(2 * cx, 2 * cy + 1),
                        px(2 * cx + 1, 2 * cy + 1),
                    ]);
                    u.push(cb(m));
                    v.push(cr(m));
                }
            }
            if format == PixelFormat::Nv12 {
                y_plane.extend(u.iter().zip(&v).flat_map(|(a, b)| [*a, *b]));
            } else {
                y_plane.extend(u);
                y_plane.extend(v);
            }
            y_plane
        }
        PixelFormat::Yuyv => {
            let mut out = Vec::with_capacity(w * h * 2);
            for y in 0..h {
                for cx in 0..w / 2 {
                    let (a, b) = (px(2 * cx, y), px(2 * cx + 1, y));
                    let m = mean(&[a, b]);
                    out.extend_from_slice(&[luma(a), cb(m), luma(b), cr(m)]);
                }
            }
            out
        }
        PixelFormat::Png | PixelFormat::Jpeg => {
            use image::ImageEncoder;
            let mut out = Vec::new();
            let result = if format == PixelFormat::Png {
                image::codecs::png::PngEncoder::new(&mut out).write_image(
                    rgb,
                    width,
                    height,
                    image::ExtendedColorType::Rgb8,
                )
            } else {
                image::codecs::jpeg::JpegEncoder::new_with_quality(&mut out, 90).write_image(
                    rgb,
                    width,
                    height,
                    image::ExtendedColorType::Rgb8,
                )
            };
            result.map_err(|e| fail(e.to_string()))?;
            out
        }
    })
}

/// Planar 8-bit 4:4:4 YUV (Y plane, U plane, V plane, each `width * height` bytes) to packed RGB8.
pub fn yuv444_planar_to_rgb(
    planes: &[u8],
    width: u32,
    height: u32,
    spec: YuvSpec,
) -> Result<Vec<u8>, FrameError> {
    let format = PixelFormat::Rgb8;
    check_size(
        format,
        width,
        height,
        &FrameLimits {
            max_width: u32::MAX,
            max_height: u32::MAX,
        },
    )?;
    let n = width as u64 * height as u64;
    if planes.len() as u64 != 3 * n {
        return Err(FrameError::BadLength {
            format,
            got: planes.len() as u64,
            expected: 3 * n,
            width,
            height,
            stride: u64::from(width),
        });
    }
    let n = n as usize;
    let image = yuv::YuvPlanarImage {
        y_plane: &planes[..n],
        y_stride: width,
        u_plane: &planes[n..2 * n],
        u_stride: width,
        v_plane: &planes[2 * n..],
        v_stride: width,
        width,
        height,
    };
    let mut out = vec![0u8; 3 * n];
    let (range, matrix) = yuv_params(spec);
    yuv::yuv444_to_rgb(&image, &mut out, width * 3, range, matrix).map_err(|e| {
        FrameError::ConversionFailed {
            format,
            reason: e.to_string(),
        }
    })?;
    Ok(out)
}

fn yuv_params(spec: YuvSpec) -> (yuv::YuvRange, yuv::YuvStandardMatrix) {
    let range = match spec.range {
        YuvRange::Limited => yuv::YuvRange::Limited,
        YuvRange::Full => yuv::YuvRange::Full,
    };
    let matrix = match spec.matrix {
        YuvMatrix::Bt601 => yuv::YuvStandardMatrix::Bt601,
        YuvMatrix::Bt709 => yuv::YuvStandardMatrix::Bt709,
    };
    (range, matrix)
}

/// NV12, I420 and YUYV over a region aligned to whole chroma samples, to packed RGB (SIMD, yuvutils-rs).
fn convert_yuv(
    frame: &Checked<'_>,
    region: Region,
    spec: YuvSpec,
    planes: &mut YuvPlanes,
    out: &mut RgbImage,
    rows: Option<&[bool]>,
) -> Result<(), FrameError> {
    let (range, matrix) = yuv_params(spec);
    let rows = rows.filter(|r| r.len() == region.height as usize);
    let (x, y) = (region.x as usize, region.y as usize);
    let (w, h) = (region.width as usize, region.height as usize);
    let stride = frame.stride;
    let frame_h = frame.height as usize;
    let rgb_stride = region.width * 3;
    let fail = |e: yuv::YuvError| FrameError::ConversionFailed {
        format: frame.format,
        reason: e.to_string(),
    };
    // yuvutils-rs wants each plane as an exact, tightly packed slice for some layouts and walks rows in
    // pairs for others, so the region's rows are copied into packed planes (less than a third of the
    // conversion's cost) unless the frame already is exactly that.
    let whole = region == Region::whole(frame.width, frame.height);
    match frame.format {
        PixelFormat::Nv12 => {
            let (y_plane, uv_plane) = frame.data.split_at(stride * frame_h);
            let (luma, chroma): (&[u8], &[u8]) =
                if whole && stride == w && uv_plane.len() == w * h / 2 {
                    (y_plane, uv_plane)
                } else {
                    repack(y_plane, stride, x, y, w, h, &mut planes.y);
                    repack(uv_plane, stride, x, y / 2, w, h / 2, &mut planes.u);
                    (&planes.y, &planes.u)
                };
            for (a, b) in row_runs(rows, h) {
                // Rows a..b (a even, or a run of one row) use chroma rows a/2 onwards.
                let image = yuv::YuvBiPlanarImage {
                    y_plane: &luma[a * w..b * w],
                    y_stride: w as u32,
                    uv_plane: &chroma[a / 2 * w..(b - a).div_ceil(2) * w + a / 2 * w],
                    uv_stride: w as u32,
                    width: region.width,
                    height: (b - a) as u32,
                };
                yuv::yuv_nv12_to_rgb(
                    &image,
                    &mut out.data[a * rgb_stride as usize..b * rgb_stride as usize],
                    rgb_stride,
                    range,
                    matrix,
                    yuv::YuvConversionMode::Balanced,
                )
                .map_err(fail)?;
            }
            Ok(())
        }
        PixelFormat::I420 => {
            let c = stride / 2;
            let (y_plane, rest) = frame.data.split_at(stride * frame_h);
            let (u_plane, v_plane) = rest.split_at((c * (frame_h / 2)).min(rest.len()));
            repack(y_plane, stride, x, y, w, h, &mut planes.y);
            repack(u_plane, c, x / 2, y / 2, w / 2, h / 2, &mut planes.u);
            repack(v_plane, c, x / 2, y / 2, w / 2, h / 2, &mut planes.v);
            let c = w / 2;
            for (a, b) in row_runs(rows, h) {
                let chroma = a / 2 * c..(b - a).div_ceil(2) * c + a / 2 * c;
                let image = yuv::YuvPlanarImage {
                    y_plane: &planes.y[a * w..b * w],
                    y_stride: w as u32,
                    u_plane: &planes.u[chroma.clone()],
                    u_stride: c as u32,
                    v_plane: &planes.v[chroma],
                    v_stride: c as u32,
                    width: region.width,
                    height: (b - a) as u32,
                };
                let out = &mut out.data[a * rgb_stride as usize..b * rgb_stride as usize];
                yuv::yuv420_to_rgb(&image, out, rgb_stride, range, matrix).map_err(fail)?;
            }
            Ok(())
        }
        _ => {
            let packed: &[u8] = if whole && stride == 2 * w && frame.data.len() == 2 * w * h {
                frame.data
            } else {
                repack(frame.data, stride, 2 * x, y, 2 * w, h, &mut planes.y);
                &planes.y
            };
            // 4:2:2 has chroma on every row, so runs may start on any row.
            for (a, b) in row_runs(rows, h) {
                let image = yuv::YuvPackedImage {
                    yuy: &packed[a * 2 * w..b * 2 * w],
                    yuy_stride: 2 * w as u32,
                    width: region.width,
                    height: (b - a) as u32,
                };
                let out = &mut out.data[a * rgb_stride as usize..b * rgb_stride as usize];
                yuv::yuyv422_to_rgb(&image, out, rgb_stride, range, matrix).map_err(fail)?;
            }
            Ok(())
        }
    }
}

/// The runs of rows to convert, as half-open ranges: all `height` rows at once without `rows`, else the
/// flagged ones. A 4:2:0 converter pairs the first row it is given with the next under one chroma row, so a
/// run that starts on an odd row is cut after that row.
fn row_runs(rows: Option<&[bool]>, height: usize) -> impl Iterator<Item = (usize, usize)> {
    // Without flags, one run of every row; an iterator, so that a steady stream allocates nothing here.
    let mut whole = rows.is_none().then_some((0, height));
    let mut y = 0;
    std::iter::from_fn(move || {
        let Some(rows) = rows else {
            return whole.take();
        };
        while y < height && !rows[y] {
            y += 1;
        }
        if y == height {
            return None;
        }
        let start = y;
        y += 1;
        if start % 2 == 0 {
            while y < height && rows[y] {
                y += 1;
            }
        }
        Some((start, y))
    })
}

/// Copies `rows` rows of `row_bytes` bytes, starting at byte `x` of row `y` of a plane with `stride`, into
/// `out` tightly packed. The caller has checked that the plane holds them.
fn repack(
    plane: &[u8],
    stride: usize,
    x: usize,
    y: usize,
    row_bytes: usize,
    rows: usize,
    out: &mut Vec<u8>,
) {
    out.clear();
    for r in 0..rows {
        let start = (y + r) * stride + x;
        out.extend_from_slice(&plane[start..start + row_bytes]);
    }
}

/// Packed planes of a region, reused per session.
#[derive(Debug, Default)]
struct YuvPlanes {
    y: Vec<u8>,
    u: Vec<u8>,
    v: Vec<u8>,
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The AVX2 copy and the baseline copy of the packed conversions give the same bytes (see `vector`),
    /// over a region with a padded stride, every row or every other one.
    #[test]
    fn same_bits_with_and_without_avx2() {
        let (w, h, stride) = (67u32, 9u32, 67 * 4 + 5);
        let data = crate::vector::noise(11, stride * h as usize);
        let region = Region {
            x: 3,
            y: 1,
            width: 61,
            height: 7,
        };
        let every_other: Vec<bool> = (0..region.height).map(|r| r % 2 == 0).collect();
        for format in [
            PixelFormat::Rgb8,
            PixelFormat::Bgr8,
            PixelFormat::Rgba8,
            PixelFormat::Bgra8,
            PixelFormat::Gray8,
        ] {
            let checked = FrameRef {
                format,
                width: w,
                height: h,
                stride: stride as u32,
                data: &data,
            }
            .check(&FrameLimits::default())
            .expect("a valid frame");
            for rows in [None, Some(&every_other[..])] {
                let (mut a, mut b) = (RgbImage::default(), RgbImage::default());
                a.reset(region.width, region.height);
                b.reset(region.width, region.height);
                a.data.fill(1);
                b.data.fill(1);
                convert_packed(&checked, region, &mut a, rows);
                convert_packed_plain(&checked, region, &mut b, rows);
                assert_eq!(a, b, "{format} rows {:?}", rows.map(|r| r.len()));
            }
        }
    }

    #[test]
    fn a_whole_packed_rgb_frame_is_read_in_place_and_equals_its_conversion() {
        let (w, h) = (5u32, 3u32);
        let data: Vec<u8> = (0..w * h * 3).map(|i| (i * 7 % 251) as u8).collect();
        let frame = |format, stride, data| FrameRef {
            format,
            width: w,
            height: h,
            stride,
            data,
        };
        let limits = &DEFAULT_FRAME_LIMITS;
        let tight = frame(PixelFormat::Rgb8, 0, &data[..]);
        let view = packed_rgb_view(&tight, None, limits)
            .expect("valid")
            .expect("read in place");
        let converted = convert(tight, None, YuvSpec::default()).expect("converts");
        assert_eq!(view, converted.view(), "the same pixels as a conversion");
        assert_eq!(view.data.as_ptr(), data.as_ptr(), "no copy");
        // The whole frame named as a region is still the whole frame.
        assert!(matches!(
            packed_rgb_view(&tight, Some(Region::whole(w, h)), limits),
            Ok(Some(_))
        ));
        // Anything else is converted: a smaller region, padded rows, another format.
        let small = Region {
            x: 1,
            y: 0,
            width: 2,
            height: 2,
        };
        assert!(matches!(
            packed_rgb_view(&tight, Some(small), limits),
            Ok(None)
        ));
        let padded: Vec<u8> = data
            .chunks(15)
            .flat_map(|row| row.iter().copied().chain([0u8; 3]))
            .collect();
        let strided = frame(PixelFormat::Rgb8, 18, &padded[..]);
        assert!(matches!(packed_rgb_view(&strided, None, limits), Ok(None)));
        let bgr = frame(PixelFormat::Bgr8, 0, &data[..]);
        assert!(matches!(packed_rgb_view(&bgr, None, limits), Ok(None)));
        // Bad frames are refused as the conversion refuses them.
        let short = frame(PixelFormat::Rgb8, 0, &data[..data.len() - 1]);
        assert_eq!(
            packed_rgb_view(&short, None, limits).err(),
            convert(short, None, YuvSpec::default()).err()
        );
        let outside = Region {
            x: 4,
            y: 0,
            width: 2,
            height: 1,
        };
        assert_eq!(
            packed_rgb_view(&tight, Some(outside), limits).err(),
            convert(tight, Some(outside), YuvSpec::default()).err()
        );
    }

    fn convert(
        frame: FrameRef<'_>,
        region: Option<Region>,
        spec: YuvSpec,
    ) -> Result<RgbImage, FrameError> {
        let mut out = RgbImage::default();
        to_rgb(
            &frame,
            region,
            spec,
            &DEFAULT_FRAME_LIMITS,
            &mut DecodeScratch::default(),
            &mut out,
        )?;
        Ok(out)
    }

    fn nv12_flat(w: u32, h: u32, y: u8, u: u8, v: u8) -> Vec<u8> {
        let mut data = vec![y; (w * h) as usize];
        for _ in 0..(w * h / 4) {
            data.extend_from_slice(&[u, v]);
        }
        data
    }

    #[test]
    fn limited_range_white_and_black_follow_bt601_and_bt709() {
        // ITU-R BT.601 / BT.709: in limited range, Y=235 with U=V=128 is nominal white, Y=16 is black.
        for matrix in [YuvMatrix::Bt601, YuvMatrix::Bt709] {
            let spec = YuvSpec {
                matrix,
                range: YuvRange::Limited,
            };
            let white = nv12_flat(4, 2, 235, 128, 128);
            let frame = FrameRef {
                format: PixelFormat::Nv12,
                width: 4,
                height: 2,
                stride: 0,
                data: &white,
            };
            let rgb = convert(frame, None, spec).expect("white converts");
            assert!(
                rgb.data.iter().all(|&v| v == 255),
                "{matrix:?} white: {:?}",
                &rgb.data[..3]
            );
            let black = nv12_flat(4, 2, 16, 128, 128);
            let frame = FrameRef {
                format: PixelFormat::Nv12,
                width: 4,
                height: 2,
                stride: 0,
                data: &black,
            };
            let rgb = convert(frame, None, spec).expect("black converts");
            assert!(
                rgb.data.iter().all(|&v| v == 0),
                "{matrix:?} black: {:?}",
                &rgb.data[..3]
            );
        }
    }

    #[test]
    fn bt601_limited_red_matches_the_standard() {
        // ITU-R BT.601, 8-bit limited range: R'=1, G'=B'=0 encodes as Y=81, Cb=90, Cr=240 (rounded).
        let spec = YuvSpec {
            matrix: YuvMatrix::Bt601,
            range: YuvRange::Limited,
        };
        let red = nv12_flat(2, 2, 81, 90, 240);
        let frame = FrameRef {
            format: PixelFormat::Nv12,
            width: 2,
            height: 2,
            stride: 0,
            data: &red,
        };
        let rgb = convert(frame, None, spec).expect("red converts");
        let px = &rgb.data[..3];
        assert!(px[0] >= 253 && px[1] <= 2 && px[2] <= 2, "got {px:?}");
    }

    #[test]
    fn bt709_limited_green_matches_the_standard() {
        // ITU-R BT.709, 8-bit limited range: G'=1 encodes as Y=173, Cb=42, Cr=26 (rounded).
        let spec = YuvSpec {
            matrix: YuvMatrix::Bt709,
            range: YuvRange::Limited,
        };
        let green = nv12_flat(2, 2, 173, 42, 26);
        let frame = FrameRef {
            format: PixelFormat::Nv12,
            width: 2,
            height: 2,
            stride: 0,
            data: &green,
        };
        let rgb = convert(frame, None, spec).expect("green converts");
        let px = &rgb.data[..3];
        assert!(px[0] <= 2 && px[1] >= 253 && px[2] <= 2, "got {px:?}");
    }

    #[test]
    fn stride_and_region_select_the_right_pixels() {
        // 3x2 BGRA frame with 2 bytes of padding per row; region is the middle column.
        let data: Vec<u8> = vec![
            1, 2, 3, 0, 4, 5, 6, 0, 7, 8, 9, 0, 99, 99, //
            10, 11, 12, 0, 13, 14, 15, 0, 16, 17, 18, 0, 99, 99,
        ];
        let frame = FrameRef {
            format: PixelFormat::Bgra8,
            width: 3,
            height: 2,
            stride: 14,
            data: &data,
        };
        let region = Region {
            x: 1,
            y: 0,
            width: 1,
            height: 2,
        };
        let rgb = convert(frame, Some(region), YuvSpec::default()).expect("converts");
        assert_eq!(rgb.data, vec![6, 5, 4, 15, 14, 13]);
    }

    #[test]
    fn odd_region_of_nv12_equals_the_cut_of_the_whole() {
        let (w, h) = (8u32, 6u32);
        let mut data: Vec<u8> = (0..(w * h) as usize)
            .map(|i| (16 + i * 4 % 200) as u8)
            .collect();
        data.extend((0..(w * h / 2) as usize).map(|i| (60 + i * 7 % 120) as u8));
        let frame = FrameRef {
            format: PixelFormat::Nv12,
            width: w,
            height: h,
            stride: 0,
            data: &data,
        };
        let whole = convert(frame, None, YuvSpec::default()).expect("whole");
        let region = Region {
            x: 1,
            y: 3,
            width: 5,
            height: 2,
        };
        let part = convert(frame, Some(region), YuvSpec::default()).expect("part");
        for row in 0..2usize {
            let src = ((3 + row) * w as usize + 1) * 3;
            assert_eq!(
                &part.data[row * 15..row * 15 + 15],
                &whole.data[src..src + 15],
                "row {row}"
            );
        }
    }

    #[test]
    fn bad_geometry_is_refused_with_what_was_expected() {
        let data = vec![0u8; 1920 * 1080 * 3 / 2 - 1];
        let frame = FrameRef {
            format: PixelFormat::Nv12,
            width: 1920,
            height: 1080,
            stride: 0,
            data: &data,
        };
        let err = convert(frame, None, YuvSpec::default()).expect_err("short buffer");
        assert_eq!(err.kind(), "bad_length");
        assert_eq!(
            err.to_string(),
            "nv12 buffer is 3110399 bytes, expected 3110400 for 1920x1080 with stride 1920"
        );

        let frame = FrameRef {
            format: PixelFormat::I420,
            width: 5,
            height: 4,
            stride: 0,
            data: &[0; 30],
        };
        assert_eq!(
            convert(frame, None, YuvSpec::default())
                .expect_err("odd")
                .kind(),
            "odd_dimension"
        );

        let frame = FrameRef {
            format: PixelFormat::Rgb8,
            width: 4,
            height: 1,
            stride: 11,
            data: &[0; 12],
        };
        assert_eq!(
            convert(frame, None, YuvSpec::default())
                .expect_err("stride")
                .kind(),
            "bad_stride"
        );

        let frame = FrameRef {
            format: PixelFormat::Gray8,
            width: 0,
            height: 1,
            stride: 0,
            data: &[],
        };
        assert_eq!(
            convert(frame, None, YuvSpec::default())
                .expect_err("empty")
                .kind(),
            "empty_size"
        );

        let frame = FrameRef {
            format: PixelFormat::Gray8,
            width: 100_000,
            height: 1,
            stride: 0,
            data: &[],
        };
        assert_eq!(
            convert(frame, None, YuvSpec::default())
                .expect_err("huge")
                .kind(),
            "too_large"
        );

        let frame = FrameRef {
            format: PixelFormat::Gray8,
            width: 2,
            height: 2,
            stride: 0,
            data: &[0; 4],
        };
        let region = Region {
            x: 1,
            y: 1,
            width: 2,
            height: 1,
        };
        assert_eq!(
            convert(frame, Some(region), YuvSpec::default())
                .expect_err("roi")
                .kind(),
            "region_outside"
        );

        let frame = FrameRef {
            format: PixelFormat::Png,
            width: 0,
            height: 0,
            stride: 0,
            data: b"\x89PNG\r\n\x1a\nbroken",
        };
        assert_eq!(
            convert(frame, None, YuvSpec::default())
                .expect_err("png")
                .kind(),
            "decode_failed"
        );
        let frame = FrameRef {
            format: PixelFormat::Jpeg,
            width: 0,
            height: 0,
            stride: 0,
            data: &[0xFF, 0xD8, 0xFF],
        };
        assert_eq!(
            convert(frame, None, YuvSpec::default())
                .expect_err("jpeg")
                .kind(),
            "decode_failed"
        );
    }

    #[test]
    fn encoded_frames_convert_back_close_to_the_original() {
        let (w, h) = (6u32, 4u32);
        let rgb: Vec<u8> = (0..w * h * 3).map(|i| (i * 37 % 200 + 20) as u8).collect();
        let flat: Vec<u8> = (0..w * h).flat_map(|_| [120u8, 60, 200]).collect();
        for format in PixelFormat::ALL {
            let source = if format.is_yuv() || format == PixelFormat::Jpeg {
                &flat
            } else {
                &rgb
            };
            let data = encode_from_rgb(source, w, h, format).expect("encodes");
            let frame = FrameRef {
                format,
                width: w,
                height: h,
                stride: 0,
                data: &data,
            };
            let back = convert(frame, None, YuvSpec::default()).expect("converts back");
            let limit = match format {
                PixelFormat::Gray8 => 255,
                f if f.is_yuv() || f == PixelFormat::Jpeg => 3,
                _ => 0,
            };
            let max = back
                .data
                .iter()
                .zip(source)
                .map(|(a, b)| a.abs_diff(*b))
                .max()
                .unwrap_or(0);
            assert!(max <= limit, "{format}: round trip differs by {max}");
        }
    }

    #[test]
    fn random_bytes_and_sizes_never_panic() {
        // Property: whatever the sender claims, conversion returns a frame or an error, never a panic.
        let mut state = 0x5EED_u64;
        let mut next = move || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state
        };
        let limits = FrameLimits {
            max_width: 64,
            max_height: 64,
        };
        let mut scratch = DecodeScratch::default();
        let mut out = RgbImage::default();
        for _ in 0..20_000 {
            let format = PixelFormat::ALL[(next() % 10) as usize];
            let (w, h) = ((next() % 70) as u32, (next() % 70) as u32);
            let stride = if next() % 3 == 0 {
                0
            } else {
                (next() % 300) as u32
            };
            let len = (next() % 15_000) as usize;
            let mut data: Vec<u8> = (0..len).map(|_| next() as u8).collect();
            if format == PixelFormat::Png && next() % 2 == 0 {
                data.splice(0..0, b"\x89PNG\r\n\x1a\n".iter().copied());
            }
            let region = (next() % 4 == 0).then(|| Region {
                x: (next() % 40) as u32,
                y: (next() % 40) as u32,
                width: (next() % 40) as u32,
                height: (next() % 40) as u32,
            });
            let frame = FrameRef {
                format,
                width: w,
                height: h,
                stride,
                data: &data,
            };
            let spec = YuvSpec {
                matrix: YuvMatrix::Bt709,
                range: YuvRange::Full,
            };
            if to_rgb(&frame, region, spec, &limits, &mut scratch, &mut out).is_ok() {
                assert_eq!(out.data.len(), out.width as usize * out.height as usize * 3);
            }
        }
    }

    #[test]
    fn last_row_without_padding_is_accepted() {
        let data = vec![7u8; 10 * 2 + 4];
        let frame = FrameRef {
            format: PixelFormat::Gray8,
            width: 4,
            height: 3,
            stride: 10,
            data: &data,
        };
        let rgb = convert(frame, None, YuvSpec::default()).expect("accepted");
        assert_eq!(rgb.data.len(), 4 * 3 * 3);
    }
}
