//! Frames as they arrive (raw pixels with a stride, or PNG/JPEG files), their validation, and their
//! conversion to packed RGB over a region of interest: [`read_rgb`] is the one way in.
//!
//! Every size, stride and length is checked before any pixel is read; a bad frame gives a [`FrameError`]
//! that says what was expected. [`decode`] reads PNG and JPEG files as OpenCV and Pillow do; [`yuv`]
//! converts YUV as OpenCV does (BT.601 limited range) or as the ITU-R equations say (the others).

mod decode;
mod yuv;

use std::fmt;

use crate::vector::with_avx2;

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
    /// 4:2:0: Y plane, U plane, V plane; chroma planes of `ceil(w / 2)` x `ceil(h / 2)` samples with
    /// `ceil(stride / 2)` bytes per row.
    I420,
    /// 4:2:2 packed Y0 U Y1 V.
    Yuyv,
    /// 4:2:2 packed U Y0 V Y1.
    Uyvy,
    /// 4:2:2 planar: Y plane, U plane, V plane; chroma planes of `ceil(w / 2)` x `h` samples with
    /// `ceil(stride / 2)` bytes per row.
    I422,
    /// 4:4:4 planar: Y, U and V planes of `w` x `h` samples, all with the stride.
    I444,
    /// A PNG file.
    Png,
    /// A JPEG file.
    Jpeg,
}

impl PixelFormat {
    /// Every format, in wire order.
    pub const ALL: [PixelFormat; 13] = [
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
        Self::Uyvy,
        Self::I422,
        Self::I444,
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
            Self::Uyvy => "uyvy",
            Self::I422 => "i422",
            Self::I444 => "i444",
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
        matches!(
            self,
            Self::Nv12 | Self::I420 | Self::Yuyv | Self::Uyvy | Self::I422 | Self::I444
        )
    }

    /// Bytes of one row of the first plane for a frame `width` pixels wide (raw formats only).
    fn row_bytes(self, width: u64) -> u64 {
        match self {
            Self::Rgb8 | Self::Bgr8 => width * 3,
            Self::Rgba8 | Self::Bgra8 => width * 4,
            Self::Gray8 | Self::Nv12 | Self::I420 | Self::I422 | Self::I444 => width,
            Self::Yuyv | Self::Uyvy => width * 2,
            Self::Png | Self::Jpeg => 0,
        }
    }

    /// Horizontal and vertical chroma subsampling steps (1 for none).
    fn chroma_steps(self) -> (u32, u32) {
        match self {
            Self::Nv12 | Self::I420 => (2, 2),
            Self::Yuyv | Self::Uyvy | Self::I422 => (2, 1),
            _ => (1, 1),
        }
    }

    /// The dimensions that must be even: NV12 pairs chroma bytes with the stride of its luma rows, and
    /// packed 4:2:2 holds two pixels per group. The planar layouts take any size.
    fn needs_even(self) -> (bool, bool) {
        match self {
            Self::Nv12 => (true, true),
            Self::Yuyv | Self::Uyvy => (true, false),
            _ => (false, false),
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
}

impl FrameError {
    /// A short machine-readable kind, stable across versions.
    pub fn kind(&self) -> &'static str {
        match self {
            Self::EmptySize { .. } => "empty_size",
            Self::TooLarge { .. } => "too_large",
            Self::OddDimension { .. } => "odd_dimension",
            Self::StrideTooShort { .. } => "bad_stride",
            Self::BadLength { .. } => "bad_length",
            Self::DecodeFailed { .. } => "decode_failed",
            Self::RegionOutside { .. } => "region_outside",
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
pub(crate) struct Checked<'a> {
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
        // Every converter writes every byte it is asked for (every row, or the rows a resize reads), so a
        // buffer that already has the length is not cleared: clearing a 1920x1080 picture wrote 6 MB per
        // frame for nothing.
        self.data.resize(width as usize * height as usize * 3, 0);
    }
}

/// Reusable buffers for [`read_rgb`], kept per session so that steady streams allocate nothing.
#[derive(Debug, Default)]
pub struct DecodeScratch {
    decoded: Vec<u8>,
    yuv: yuv::RowBuffers,
}

/// The rows of a region that a resize reads ([`crate::preprocess::rows_read`]), one flag each; a raw frame
/// converts only those and leaves the other rows of the output as they were. `None` (or a mask of the wrong
/// length) means all. (Columns are not skipped: the vectorised row loops convert a whole row faster than the
/// scattered pairs of columns a linear resize reads.)
#[derive(Debug, Clone, Copy, Default)]
pub struct Needed<'a> {
    /// One flag per row of the region.
    pub rows: Option<&'a [bool]>,
}

impl<'a> Needed<'a> {
    /// Every row.
    pub const ALL: Needed<'static> = Needed { rows: None };

    /// The rows a mask flags (`None` for all).
    pub fn rows(rows: Option<&'a [bool]>) -> Self {
        Self { rows }
    }
}

impl<'a> FrameRef<'a> {
    /// Checks size, stride and length against the format and the limits, without reading any pixel.
    fn check(&self, limits: &FrameLimits) -> Result<Checked<'a>, FrameError> {
        let (format, width, height) = (self.format, self.width, self.height);
        check_size(format, width, height, limits)?;
        let (even_w, even_h) = format.needs_even();
        if even_w && width % 2 != 0 {
            return Err(FrameError::OddDimension {
                format,
                width,
                height,
                which: "width",
            });
        }
        if even_h && height % 2 != 0 {
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
        let h = u64::from(height);
        // Bytes of the whole frame with every row padded to the stride, and the least the sender may send
        // (the last row unpadded).
        let (full, least) = match format {
            PixelFormat::Nv12 => (
                stride * h + stride * (h / 2),
                stride * h + stride * (h / 2 - 1) + row,
            ),
            PixelFormat::I420 | PixelFormat::I422 | PixelFormat::I444 => {
                // Chroma planes: rows of `c` bytes holding `cw` samples, `ch` rows each.
                let (sx, sy) = format.chroma_steps();
                let c = stride.div_ceil(u64::from(sx));
                let cw = u64::from(width).div_ceil(u64::from(sx));
                let ch = h.div_ceil(u64::from(sy));
                (
                    stride * h + 2 * c * ch,
                    stride * h + c * ch + c * (ch - 1) + cw,
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

/// The frame's region of interest as packed RGB8: a tightly packed RGB8 frame taken whole is read where it
/// lies (no copy); every other frame is decoded or converted into `out`, only the rows `needed` flags for a
/// raw frame (PNG and JPEG are decoded whole).
///
/// `region` of `None` means the whole frame. Any region gives the pixels a conversion of the whole frame
/// would (a YUV region takes the chroma samples covering it, wherever it starts).
pub fn read_rgb<'a>(
    frame: &FrameRef<'a>,
    region: Option<Region>,
    yuv_spec: YuvSpec,
    limits: &FrameLimits,
    scratch: &mut DecodeScratch,
    out: &'a mut RgbImage,
    needed: &Needed<'_>,
) -> Result<RgbView<'a>, FrameError> {
    if frame.format.is_encoded() {
        let (width, height) =
            decode::decode_file(frame.format, frame.data, limits, &mut scratch.decoded)?;
        let region = checked_region(region, width, height)?;
        let packed = Checked {
            format: PixelFormat::Rgb8,
            width,
            height,
            stride: width as usize * 3,
            data: &scratch.decoded,
        };
        out.reset(region.width, region.height);
        convert_packed(&packed, region, out, &Needed::ALL);
        return Ok(out.view());
    }
    let checked = frame.check(limits)?;
    let region = checked_region(region, checked.width, checked.height)?;
    if let Some(view) = in_place(&checked, region) {
        return Ok(view);
    }
    out.reset(region.width, region.height);
    if checked.format.is_yuv() {
        yuv::convert(
            &checked,
            region,
            yuv_spec,
            out,
            needed.rows,
            &mut scratch.yuv,
        );
    } else {
        convert_packed(&checked, region, out, needed);
    }
    Ok(out.view())
}

/// As [`read_rgb`], every pixel converted into `out` (a tightly packed RGB8 frame is copied).
pub fn to_rgb(
    frame: &FrameRef<'_>,
    region: Option<Region>,
    yuv_spec: YuvSpec,
    limits: &FrameLimits,
    scratch: &mut DecodeScratch,
    out: &mut RgbImage,
) -> Result<(), FrameError> {
    if !frame.format.is_encoded() {
        let checked = frame.check(limits)?;
        let whole = checked_region(region, checked.width, checked.height)?;
        if let Some(view) = in_place(&checked, whole) {
            out.reset(view.width, view.height);
            out.data.copy_from_slice(view.data);
            return Ok(());
        }
    }
    read_rgb(frame, region, yuv_spec, limits, scratch, out, &Needed::ALL).map(|_| ())
}

/// A tightly packed RGB8 frame taken whole is already packed RGB: its own bytes.
fn in_place<'a>(checked: &Checked<'a>, region: Region) -> Option<RgbView<'a>> {
    let row = checked.width as usize * 3;
    let whole = region == Region::whole(checked.width, checked.height);
    if checked.format != PixelFormat::Rgb8 || !whole || checked.stride != row {
        return None;
    }
    let data = checked.data.get(..row * checked.height as usize)?;
    Some(RgbView {
        width: checked.width,
        height: checked.height,
        data,
    })
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

with_avx2! {
/// RGB, BGR, RGBA, BGRA and grey to packed RGB: every row, or only the needed ones.
fn convert_packed / convert_packed_plain(frame: &Checked<'_>, region: Region, out: &mut RgbImage, needed: &Needed<'_>) {
    let rows = needed.rows.filter(|r| r.len() == region.height as usize);
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
/// and demos (not on the analysis path). YUV uses BT.601 limited range with the chroma averaged over each
/// sample's pixels (2x2 for 4:2:0, 2x1 for 4:2:2; a last odd row or column averages what it has); NV12 and
/// packed 4:2:2 need the even sizes they need on the wire. PNG and JPEG (quality 90) use the `image`
/// encoders.
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
    let (even_w, even_h) = format.needs_even();
    if (even_w && w % 2 != 0) || (even_h && h % 2 != 0) {
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
        PixelFormat::Nv12 | PixelFormat::I420 | PixelFormat::I422 | PixelFormat::I444 => {
            let (sx, sy) = format.chroma_steps();
            let (sx, sy) = (sx as usize, sy as usize);
            let mut y_plane: Vec<u8> = (0..w * h).map(|i| luma(px(i % w, i / w))).collect();
            let (cw, ch) = (w.div_ceil(sx), h.div_ceil(sy));
            let (mut u, mut v) = (Vec::with_capacity(cw * ch), Vec::with_capacity(cw * ch));
            for cy in 0..ch {
                for cx in 0..cw {
                    let block: Vec<[f64; 3]> = (cy * sy..((cy + 1) * sy).min(h))
                        .flat_map(|y| (cx * sx..((cx + 1) * sx).min(w)).map(move |x| (x, y)))
                        .map(|(x, y)| px(x, y))
                        .collect();
                    let m = mean(&block);
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
        PixelFormat::Yuyv | PixelFormat::Uyvy => {
            let mut out = Vec::with_capacity(w * h * 2);
            for y in 0..h {
                for cx in 0..w / 2 {
                    let (a, b) = (px(2 * cx, y), px(2 * cx + 1, y));
                    let m = mean(&[a, b]);
                    if format == PixelFormat::Yuyv {
                        out.extend_from_slice(&[luma(a), cb(m), luma(b), cr(m)]);
                    } else {
                        out.extend_from_slice(&[cb(m), luma(a), cr(m), luma(b)]);
                    }
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
                let needed = Needed { rows };
                convert_packed(&checked, region, &mut a, &needed);
                convert_packed_plain(&checked, region, &mut b, &needed);
                assert_eq!(a, b, "{format} {needed:?}");
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
        let read = |frame: &FrameRef<'_>, region| {
            let mut out = RgbImage::default();
            let mut scratch = DecodeScratch::default();
            read_rgb(
                frame,
                region,
                YuvSpec::default(),
                limits,
                &mut scratch,
                &mut out,
                &Needed::ALL,
            )
            .map(|v| (v.data.as_ptr() as usize, v.data.to_vec()))
        };
        let tight = frame(PixelFormat::Rgb8, 0, &data[..]);
        let (at, pixels) = read(&tight, None).expect("valid");
        let converted = convert(tight, None, YuvSpec::default()).expect("converts");
        assert_eq!(pixels, converted.data, "the same pixels as a conversion");
        assert_eq!(at, data.as_ptr() as usize, "no copy");
        // The whole frame named as a region is still the whole frame.
        let (at, _) = read(&tight, Some(Region::whole(w, h))).expect("valid");
        assert_eq!(at, data.as_ptr() as usize);
        // Anything else is converted: a smaller region, padded rows, another format.
        let small = Region {
            x: 1,
            y: 0,
            width: 2,
            height: 2,
        };
        let (at, pixels) = read(&tight, Some(small)).expect("valid");
        assert_ne!(at, data.as_ptr() as usize);
        assert_eq!(pixels, [&data[3..9], &data[18..24]].concat());
        let padded: Vec<u8> = data
            .chunks(15)
            .flat_map(|row| row.iter().copied().chain([0u8; 3]))
            .collect();
        let strided = frame(PixelFormat::Rgb8, 18, &padded[..]);
        let (at, pixels) = read(&strided, None).expect("valid");
        assert!(at < padded.as_ptr() as usize || at >= padded.as_ptr() as usize + padded.len());
        assert_eq!(pixels, data);
        // Bad frames are refused.
        let short = frame(PixelFormat::Rgb8, 0, &data[..data.len() - 1]);
        assert_eq!(read(&short, None).expect_err("short").kind(), "bad_length");
        let outside = Region {
            x: 4,
            y: 0,
            width: 2,
            height: 1,
        };
        assert_eq!(
            read(&tight, Some(outside)).expect_err("outside").kind(),
            "region_outside"
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
            format: PixelFormat::Nv12,
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
            let format = PixelFormat::ALL[(next() % PixelFormat::ALL.len() as u64) as usize];
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

    /// The same samples laid out as NV12 or I420, as YUYV, UYVY or I422, and as I444 with each chroma
    /// sample repeated over the pixels it covers, give the same pixels, in every matrix and range.
    #[test]
    fn every_yuv_layout_of_the_same_samples_gives_the_same_pixels() {
        let (w, h) = (10usize, 6usize);
        let mut noise = crate::vector::Noise::new(77);
        let y = noise.bytes(w * h);
        let (u420, v420) = (noise.bytes(w * h / 4), noise.bytes(w * h / 4));
        let (u422, v422) = (noise.bytes(w * h / 2), noise.bytes(w * h / 2));
        let nv12 = [
            y.clone(),
            u420.iter().zip(&v420).flat_map(|(a, b)| [*a, *b]).collect(),
        ]
        .concat();
        let i420 = [y.clone(), u420.clone(), v420.clone()].concat();
        let i422 = [y.clone(), u422.clone(), v422.clone()].concat();
        let pack = |order: [usize; 4]| -> Vec<u8> {
            (0..h)
                .flat_map(|r| (0..w / 2).map(move |c| (r, c)))
                .flat_map(|(r, c)| {
                    let group = [
                        y[r * w + 2 * c],
                        u422[r * w / 2 + c],
                        y[r * w + 2 * c + 1],
                        v422[r * w / 2 + c],
                    ];
                    order.map(|i| group[i])
                })
                .collect()
        };
        let (yuyv, uyvy) = (pack([0, 1, 2, 3]), pack([1, 0, 3, 2]));
        let spread = |u: &[u8], sy: usize| -> Vec<u8> {
            (0..w * h)
                .map(|i| u[(i / w / sy) * (w / 2) + (i % w) / 2])
                .collect()
        };
        let i444_420 = [y.clone(), spread(&u420, 2), spread(&v420, 2)].concat();
        let i444_422 = [y.clone(), spread(&u422, 1), spread(&v422, 1)].concat();
        for matrix in [YuvMatrix::Bt601, YuvMatrix::Bt709] {
            for range in [YuvRange::Limited, YuvRange::Full] {
                let spec = YuvSpec { matrix, range };
                let frame = |format, data: &[u8]| -> Vec<u8> {
                    let f = FrameRef {
                        format,
                        width: w as u32,
                        height: h as u32,
                        stride: 0,
                        data,
                    };
                    convert(f, None, spec).expect("converts").data
                };
                let a = frame(PixelFormat::I420, &i420);
                assert_eq!(a, frame(PixelFormat::Nv12, &nv12), "{spec:?}");
                assert_eq!(a, frame(PixelFormat::I444, &i444_420), "{spec:?}");
                let b = frame(PixelFormat::I422, &i422);
                assert_eq!(b, frame(PixelFormat::Yuyv, &yuyv), "{spec:?}");
                assert_eq!(b, frame(PixelFormat::Uyvy, &uyvy), "{spec:?}");
                assert_eq!(b, frame(PixelFormat::I444, &i444_422), "{spec:?}");
            }
        }
    }

    /// An odd-sized I420 frame (planes of ceil(w/2) x ceil(h/2) chroma samples, as Y4M lays them out) gives
    /// the pixels of the even frame one column and row larger with the same chroma, cut to its size.
    #[test]
    fn odd_sized_i420_is_the_cut_of_the_even_frame() {
        let (w, h) = (7usize, 5usize);
        let mut noise = crate::vector::Noise::new(5);
        let (cw, ch) = (4usize, 3usize);
        let (u, v) = (noise.bytes(cw * ch), noise.bytes(cw * ch));
        let big_y = noise.bytes((w + 1) * (h + 1));
        let small_y: Vec<u8> = (0..h)
            .flat_map(|r| big_y[r * (w + 1)..r * (w + 1) + w].to_vec())
            .collect();
        let big = [big_y, u.clone(), v.clone()].concat();
        let small = [small_y, u, v].concat();
        let rgb = |data: &[u8], w: usize, h: usize| {
            let f = FrameRef {
                format: PixelFormat::I420,
                width: w as u32,
                height: h as u32,
                stride: 0,
                data,
            };
            convert(f, None, YuvSpec::default()).expect("converts").data
        };
        let big = rgb(&big, w + 1, h + 1);
        let cut: Vec<u8> = (0..h)
            .flat_map(|r| big[r * (w + 1) * 3..(r * (w + 1) + w) * 3].to_vec())
            .collect();
        assert_eq!(rgb(&small, w, h), cut);
    }

    /// Converting only the needed rows writes exactly those, with the values a whole conversion gives, and
    /// leaves the rest as it was, for every raw format.
    #[test]
    fn only_the_needed_pixels_are_written() {
        let (w, h) = (12u32, 8u32);
        let region = Region {
            x: 1,
            y: 1,
            width: 9,
            height: 6,
        };
        let rows: Vec<bool> = (0..region.height).map(|r| r % 3 != 1).collect();
        let needed = Needed { rows: Some(&rows) };
        let mut noise = crate::vector::Noise::new(21);
        for format in PixelFormat::ALL.into_iter().filter(|f| !f.is_encoded()) {
            let rgb = noise.bytes((w * h * 3) as usize);
            let data = encode_from_rgb(&rgb, w, h, format).expect("encodes");
            let frame = FrameRef {
                format,
                width: w,
                height: h,
                stride: 0,
                data: &data,
            };
            let whole = convert(frame, Some(region), YuvSpec::default()).expect("converts");
            let mut part = RgbImage {
                width: region.width,
                height: region.height,
                data: vec![0xA5; whole.data.len()],
            };
            let mut scratch = DecodeScratch::default();
            let view = read_rgb(
                &frame,
                Some(region),
                YuvSpec::default(),
                &DEFAULT_FRAME_LIMITS,
                &mut scratch,
                &mut part,
                &needed,
            )
            .expect("converts")
            .data
            .to_vec();
            for (r, &row_needed) in rows.iter().enumerate() {
                for c in 0..region.width as usize {
                    let i = (r * region.width as usize + c) * 3;
                    if row_needed {
                        assert_eq!(view[i..i + 3], whole.data[i..i + 3], "{format} ({c}, {r})");
                    } else {
                        assert_eq!(view[i..i + 3], [0xA5; 3], "{format} ({c}, {r}) was written");
                    }
                }
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
