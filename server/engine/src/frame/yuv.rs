//! YUV to packed RGB, over any region of interest, converting only the rows and columns a resize reads.
//!
//! - BT.601 limited range is OpenCV's `cv2.cvtColor` (`COLOR_YUV2RGB_NV12`, `_I420`, `_YUYV`, `_UYVY`), bit
//!   for bit: its fixed-point coefficients with 20 fractional bits (`ITUR_BT_601_CY = 1220542`, ...),
//!   luma below 16 taken as 16, `(y + c + 2^19) >> 20` clamped to 0..255.
//! - BT.709, and full range of either matrix, follow the ITU-R BT.601 / BT.709 equations
//!   (`R = Y + 2 (1 - Kr) V`, `B = Y + 2 (1 - Kb) U`, `G = (Y - Kr R - Kb B) / Kg`, with the limited range
//!   scaled by 255/219 and 255/224), with the same 20-bit fixed point, rounded to nearest: at most
//!   0.5 + 4e-4 levels from the exact values (the coefficients' rounding, at most 2^-21 each, times 255).
//!
//! Chroma is taken from the sample that covers each pixel (no interpolation), as OpenCV does: 4:2:0 and
//! 4:2:2 samples cover 2x2 and 2x1 pixels. Odd widths and heights keep a last chroma sample for the last
//! column or row (planes of `ceil(w / 2)` samples), as Y4M and ffmpeg lay them out.

use super::{Checked, Needed, PixelFormat, Region, RgbImage, YuvMatrix, YuvRange, YuvSpec};

/// Fractional bits of the fixed-point coefficients.
const SHIFT: u32 = 20;

/// Fixed-point YUV to RGB coefficients.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Coefficients {
    /// Subtracted from luma (16 in limited range).
    y_offset: i32,
    /// Luma below the offset is taken as the offset (OpenCV's BT.601 limited only).
    clamp_luma: bool,
    y: i32,
    r_v: i32,
    g_u: i32,
    g_v: i32,
    b_u: i32,
}

/// OpenCV's BT.601 limited-range coefficients (`color_yuv.simd.hpp`).
const OPENCV_BT601: Coefficients = Coefficients {
    y_offset: 16,
    clamp_luma: true,
    y: 1_220_542,
    r_v: 1_673_527,
    g_u: -409_993,
    g_v: -852_492,
    b_u: 2_116_026,
};

impl Coefficients {
    pub(crate) fn new(spec: YuvSpec) -> Self {
        // ITU-R BT.601 and BT.709 luma coefficients.
        let (kr, kb) = match spec.matrix {
            YuvMatrix::Bt601 => (0.299, 0.114),
            YuvMatrix::Bt709 => (0.2126, 0.0722),
        };
        if (spec.matrix, spec.range) == (YuvMatrix::Bt601, YuvRange::Limited) {
            return OPENCV_BT601;
        }
        let kg = 1.0 - kr - kb;
        let (y_scale, c_scale, y_offset) = match spec.range {
            YuvRange::Limited => (255.0 / 219.0, 255.0 / 224.0, 16),
            YuvRange::Full => (1.0, 1.0, 0),
        };
        let fixed = |c: f64| (c * f64::from(1u32 << SHIFT)).round() as i32;
        Self {
            y_offset,
            clamp_luma: false,
            y: fixed(y_scale),
            r_v: fixed(c_scale * 2.0 * (1.0 - kr)),
            g_u: fixed(-c_scale * 2.0 * (1.0 - kb) * kb / kg),
            g_v: fixed(-c_scale * 2.0 * (1.0 - kr) * kr / kg),
            b_u: fixed(c_scale * 2.0 * (1.0 - kb)),
        }
    }

    /// One pixel.
    #[inline(always)]
    fn rgb(&self, y: u8, u: u8, v: u8) -> [u8; 3] {
        let mut luma = i32::from(y) - self.y_offset;
        if self.clamp_luma {
            luma = luma.max(0);
        }
        let y = luma * self.y + (1 << (SHIFT - 1));
        let (u, v) = (i32::from(u) - 128, i32::from(v) - 128);
        let clamp = |x: i32| (x >> SHIFT).clamp(0, 255) as u8;
        [
            clamp(y + self.r_v * v),
            clamp(y + self.g_u * u + self.g_v * v),
            clamp(y + self.b_u * u),
        ]
    }
}

/// Converts the `needed` rows and columns of `region` of a checked YUV frame into `out` (already sized to
/// the region). Columns and rows not needed keep what `out` held.
pub(super) fn convert(
    frame: &Checked<'_>,
    region: Region,
    spec: YuvSpec,
    out: &mut RgbImage,
    needed: &Needed<'_>,
) {
    let k = Coefficients::new(spec);
    let s = frame.stride;
    let (w, h) = (frame.width as usize, frame.height as usize);
    let data = frame.data;
    let row_len = region.width as usize * 3;
    let (x0, y0) = (region.x as usize, region.y as usize);
    let cols = needed.cols.filter(|c| c.len() == region.width as usize);
    let rows = needed.rows.filter(|r| r.len() == region.height as usize);
    for (r, dst) in out.data.chunks_exact_mut(row_len).enumerate() {
        if rows.is_some_and(|rows| !rows[r]) {
            continue;
        }
        let fy = y0 + r;
        // Each layout's (Y, U, V) of frame column `fx` on this row.
        match frame.format {
            PixelFormat::I420 | PixelFormat::I422 | PixelFormat::I444 => {
                let (sx, sy) = frame.format.chroma_steps();
                let (sx, sy) = (sx as usize, sy as usize);
                let c = if sx == 1 { s } else { s.div_ceil(2) };
                let ch = h.div_ceil(sy);
                let luma = &data[fy * s..];
                let u = &data[s * h + (fy / sy) * c..];
                let v = &data[s * h + c * ch + (fy / sy) * c..];
                if sx == 1 {
                    row(dst, x0, cols, &k, |fx| (luma[fx], u[fx], v[fx]));
                } else {
                    row(dst, x0, cols, &k, |fx| (luma[fx], u[fx / 2], v[fx / 2]));
                }
            }
            PixelFormat::Nv12 => {
                let luma = &data[fy * s..];
                let uv = &data[s * h + (fy / 2) * s..];
                row(dst, x0, cols, &k, |fx| (luma[fx], uv[fx & !1], uv[fx | 1]));
            }
            PixelFormat::Yuyv | PixelFormat::Uyvy => {
                // Byte offsets of Y (even pixel), U, Y (odd pixel), V in each 4-byte group.
                let [y_even, u, y_odd, v] = if frame.format == PixelFormat::Yuyv {
                    [0, 1, 2, 3]
                } else {
                    [1, 0, 3, 2]
                };
                let line = &data[fy * s..fy * s + 2 * w];
                row(dst, x0, cols, &k, |fx| {
                    let g = (fx & !1) * 2;
                    let y = if fx & 1 == 0 { y_even } else { y_odd };
                    (line[g + y], line[g + u], line[g + v])
                });
            }
            _ => {}
        }
    }
}

/// Writes pixels `x` of one output row (frame column `x0 + x`), every one or the flagged ones.
#[inline(always)]
fn row(
    dst: &mut [u8],
    x0: usize,
    cols: Option<&[bool]>,
    k: &Coefficients,
    yuv: impl Fn(usize) -> (u8, u8, u8),
) {
    let pixels = dst.len() / 3;
    let mut put = |x: usize| {
        let (y, u, v) = yuv(x0 + x);
        dst[x * 3..x * 3 + 3].copy_from_slice(&k.rgb(y, u, v));
    };
    match cols {
        None => (0..pixels).for_each(&mut put),
        Some(cols) => cols
            .iter()
            .enumerate()
            .filter(|(_, needed)| **needed)
            .for_each(|(x, _)| put(x)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Worked examples from the standards: limited-range Y=235, U=V=128 is nominal white and Y=16 black, in
    /// both matrices; full range Y=255 is white.
    #[test]
    fn white_and_black_are_exact() {
        for matrix in [YuvMatrix::Bt601, YuvMatrix::Bt709] {
            let limited = Coefficients::new(YuvSpec {
                matrix,
                range: YuvRange::Limited,
            });
            assert_eq!(limited.rgb(235, 128, 128), [255, 255, 255], "{matrix:?}");
            assert_eq!(limited.rgb(16, 128, 128), [0, 0, 0], "{matrix:?}");
            let full = Coefficients::new(YuvSpec {
                matrix,
                range: YuvRange::Full,
            });
            assert_eq!(full.rgb(255, 128, 128), [255, 255, 255]);
            assert_eq!(full.rgb(0, 128, 128), [0, 0, 0]);
        }
    }
}
