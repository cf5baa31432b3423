//! YUV to packed RGB, over any region of interest, converting only the rows a resize reads.
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

use super::{Checked, PixelFormat, Region, RgbImage, YuvMatrix, YuvRange, YuvSpec};

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

    /// One pixel (the reference for [`to_rgb_row`], which computes the same per pixel).
    #[cfg(test)]
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

/// One row's samples, spread to one per pixel, reused from frame to frame.
#[derive(Debug, Default)]
pub(super) struct RowBuffers {
    y: Vec<u8>,
    u: Vec<u8>,
    v: Vec<u8>,
}

/// Converts the rows of `region` of a checked YUV frame that `rows` flags (all without it) into `out`
/// (already sized to the region); the other rows keep what `out` held. Each row's samples are first spread to
/// one per pixel, then converted in one loop that the compiler vectorises.
pub(super) fn convert(
    frame: &Checked<'_>,
    region: Region,
    spec: YuvSpec,
    out: &mut RgbImage,
    rows: Option<&[bool]>,
    buf: &mut RowBuffers,
) {
    let k = Coefficients::new(spec);
    let s = frame.stride;
    let h = frame.height as usize;
    let data = frame.data;
    let w = region.width as usize;
    let (x0, y0) = (region.x as usize, region.y as usize);
    let rows = rows.filter(|r| r.len() == region.height as usize);
    for plane in [&mut buf.y, &mut buf.u, &mut buf.v] {
        plane.resize(w, 0);
    }
    for (r, dst) in out.data.chunks_exact_mut(w * 3).enumerate() {
        if rows.is_some_and(|rows| !rows[r]) {
            continue;
        }
        let fy = y0 + r;
        let luma: &[u8] = match frame.format {
            PixelFormat::I420 | PixelFormat::I422 | PixelFormat::I444 => {
                let (sx, sy) = frame.format.chroma_steps();
                let (sx, sy) = (sx as usize, sy as usize);
                let c = if sx == 1 { s } else { s.div_ceil(2) };
                let ch = h.div_ceil(sy);
                let u = &data[s * h + (fy / sy) * c..];
                let v = &data[s * h + c * ch + (fy / sy) * c..];
                if sx == 1 {
                    buf.u.copy_from_slice(&u[x0..x0 + w]);
                    buf.v.copy_from_slice(&v[x0..x0 + w]);
                } else {
                    spread(&mut buf.u, &u[x0 / 2..], x0 % 2 == 1);
                    spread(&mut buf.v, &v[x0 / 2..], x0 % 2 == 1);
                }
                &data[fy * s + x0..fy * s + x0 + w]
            }
            PixelFormat::Nv12 => {
                // Whole pairs of pixels from an even column take one U,V pair each; an odd first pixel and a
                // last lone one take theirs alone.
                let uv = &data[s * h + (fy / 2) * s..];
                let odd = x0 % 2;
                if odd == 1 {
                    (buf.u[0], buf.v[0]) = (uv[x0 - 1], uv[x0]);
                }
                let pairs = (w - odd) / 2;
                spread_uv(&uv[x0 + odd..], &mut buf.u[odd..], &mut buf.v[odd..]);
                if (w - odd) % 2 == 1 {
                    let at = x0 + odd + 2 * pairs;
                    (buf.u[w - 1], buf.v[w - 1]) = (uv[at], uv[at + 1]);
                }
                &data[fy * s + x0..fy * s + x0 + w]
            }
            PixelFormat::Yuyv | PixelFormat::Uyvy => {
                // Byte offsets of Y (even pixel), U, Y (odd pixel), V in each 4-byte group.
                let [y_even, u, y_odd, v] = if frame.format == PixelFormat::Yuyv {
                    [0, 1, 2, 3]
                } else {
                    [1, 0, 3, 2]
                };
                let line = &data[fy * s..];
                let pixel = |x: usize| {
                    let g = (x & !1) * 2;
                    let y = if x & 1 == 0 { y_even } else { y_odd };
                    (line[g + y], line[g + u], line[g + v])
                };
                // Whole groups (two pixels) from an even column; an odd first pixel and a last lone one alone.
                let odd = x0 % 2;
                if odd == 1 {
                    (buf.y[0], buf.u[0], buf.v[0]) = pixel(x0);
                }
                let groups = &line[(x0 + odd) * 2..];
                let (py, pu, pv) = (&mut buf.y[odd..], &mut buf.u[odd..], &mut buf.v[odd..]);
                if frame.format == PixelFormat::Yuyv {
                    unpack_yuyv(groups, py, pu, pv);
                } else {
                    unpack_uyvy(groups, py, pu, pv);
                }
                if (w - odd) % 2 == 1 {
                    (buf.y[w - 1], buf.u[w - 1], buf.v[w - 1]) = pixel(x0 + w - 1);
                }
                &buf.y
            }
            _ => continue,
        };
        to_rgb_row(&k, luma, &buf.u, &buf.v, dst);
    }
}

/// Spreads 4:2:x chroma samples to one per pixel: each sample covers two pixels; `odd_start` when the first
/// pixel is the second of its sample's two.
fn spread(out: &mut [u8], samples: &[u8], odd_start: bool) {
    let (first, rest) = if odd_start {
        out.split_at_mut(1)
    } else {
        out.split_at_mut(0)
    };
    if let Some(f) = first.first_mut() {
        *f = samples[0];
    }
    let samples = &samples[usize::from(odd_start)..];
    let n = rest.len() / 2;
    spread_pairs(rest, samples);
    if rest.len() % 2 == 1 {
        rest[2 * n] = samples[n];
    }
}

crate::vector::with_avx2! {
/// Each sample to two pixels, for whole pairs of pixels.
fn spread_pairs / spread_pairs_plain(out: &mut [u8], samples: &[u8]) {
    for (pair, &c) in out.chunks_exact_mut(2).zip(samples) {
        pair.copy_from_slice(&[c, c]);
    }
}
}

crate::vector::with_avx2! {
/// NV12's interleaved U,V pairs to one U and one V per pixel, for whole pairs of pixels.
fn spread_uv / spread_uv_plain(uv: &[u8], us: &mut [u8], vs: &mut [u8]) {
    for ((u, v), c) in us.chunks_exact_mut(2).zip(vs.chunks_exact_mut(2)).zip(uv.chunks_exact(2)) {
        u.copy_from_slice(&[c[0], c[0]]);
        v.copy_from_slice(&[c[1], c[1]]);
    }
}
}

crate::vector::with_avx2! {
/// Packed Y0 U Y1 V groups to per-pixel Y, U and V, for whole groups.
fn unpack_yuyv / unpack_yuyv_plain(groups: &[u8], ys: &mut [u8], us: &mut [u8], vs: &mut [u8]) {
    let outs = ys.chunks_exact_mut(2).zip(us.chunks_exact_mut(2)).zip(vs.chunks_exact_mut(2));
    for (((y, u), v), q) in outs.zip(groups.chunks_exact(4)) {
        y.copy_from_slice(&[q[0], q[2]]);
        u.copy_from_slice(&[q[1], q[1]]);
        v.copy_from_slice(&[q[3], q[3]]);
    }
}
}

crate::vector::with_avx2! {
/// Packed U Y0 V Y1 groups to per-pixel Y, U and V, for whole groups.
fn unpack_uyvy / unpack_uyvy_plain(groups: &[u8], ys: &mut [u8], us: &mut [u8], vs: &mut [u8]) {
    let outs = ys.chunks_exact_mut(2).zip(us.chunks_exact_mut(2)).zip(vs.chunks_exact_mut(2));
    for (((y, u), v), q) in outs.zip(groups.chunks_exact(4)) {
        y.copy_from_slice(&[q[1], q[3]]);
        u.copy_from_slice(&[q[0], q[0]]);
        v.copy_from_slice(&[q[2], q[2]]);
    }
}
}

crate::vector::with_avx2! {
/// One row of per-pixel Y, U and V samples to packed RGB, each pixel as [`Coefficients::rgb`] computes it.
fn to_rgb_row / to_rgb_row_plain(k: &Coefficients, ys: &[u8], us: &[u8], vs: &[u8], out: &mut [u8]) {
    // Luma below the offset is taken as the offset only where the coefficients say so (OpenCV's BT.601
    // limited); elsewhere the floor is below any luma and changes nothing.
    let floor = if k.clamp_luma { 0 } else { -256 };
    for (((o, &y), &u), &v) in out.chunks_exact_mut(3).zip(ys).zip(us).zip(vs) {
        let luma = (i32::from(y) - k.y_offset).max(floor) * k.y + (1 << (SHIFT - 1));
        let (u, v) = (i32::from(u) - 128, i32::from(v) - 128);
        let r = ((luma + k.r_v * v) >> SHIFT).clamp(0, 255);
        let g = ((luma + k.g_u * u + k.g_v * v) >> SHIFT).clamp(0, 255);
        let b = ((luma + k.b_u * u) >> SHIFT).clamp(0, 255);
        o.copy_from_slice(&[r as u8, g as u8, b as u8]);
    }
}
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The row loop gives each pixel what the one-pixel formula gives, in both copies (see `vector`), for
    /// every matrix and range and every code value of Y, U and V.
    #[test]
    fn the_row_loop_is_the_pixel_formula_in_both_copies() {
        let ys: Vec<u8> = (0..=255u8).collect();
        for (u, v) in [(0u8, 255u8), (128, 128), (255, 0), (16, 240), (90, 240)] {
            let (us, vs) = (vec![u; 256], vec![v; 256]);
            for matrix in [YuvMatrix::Bt601, YuvMatrix::Bt709] {
                for range in [YuvRange::Limited, YuvRange::Full] {
                    let k = Coefficients::new(YuvSpec { matrix, range });
                    let (mut a, mut b) = (vec![0u8; 768], vec![0u8; 768]);
                    to_rgb_row(&k, &ys, &us, &vs, &mut a);
                    to_rgb_row_plain(&k, &ys, &us, &vs, &mut b);
                    let want: Vec<u8> = ys.iter().flat_map(|&y| k.rgb(y, u, v)).collect();
                    assert_eq!(a, want, "{matrix:?} {range:?} u={u} v={v}");
                    assert_eq!(b, want);
                }
            }
        }
    }

    #[test]
    fn the_gathers_have_both_copies_alike() {
        let bytes = crate::vector::noise(8, 1000);
        type Unpack = fn(&[u8], &mut [u8], &mut [u8], &mut [u8]);
        let run = |f: Unpack| {
            let (mut y, mut u, mut v) = (vec![0u8; 499], vec![0u8; 499], vec![0u8; 499]);
            f(&bytes, &mut y, &mut u, &mut v);
            (y, u, v)
        };
        assert_eq!(run(unpack_yuyv), run(unpack_yuyv_plain));
        assert_eq!(run(unpack_uyvy), run(unpack_uyvy_plain));
        let (y, u, v) = run(unpack_uyvy);
        assert_eq!(
            (y[..4].to_vec(), u[..2].to_vec(), v[..2].to_vec()),
            (
                vec![bytes[1], bytes[3], bytes[5], bytes[7]],
                vec![bytes[0]; 2],
                vec![bytes[2]; 2]
            )
        );
        let (mut a, mut b, mut c, mut d) = (
            vec![0u8; 301],
            vec![0u8; 301],
            vec![0u8; 301],
            vec![0u8; 301],
        );
        spread_uv(&bytes, &mut a, &mut b);
        spread_uv_plain(&bytes, &mut c, &mut d);
        assert_eq!((a, b), (c, d));
    }

    #[test]
    fn spreading_covers_each_pixel_with_its_sample() {
        let samples = [10u8, 20, 30, 40];
        for (odd, n, want) in [
            (false, 7, vec![10u8, 10, 20, 20, 30, 30, 40]),
            (true, 6, vec![10, 20, 20, 30, 30, 40]),
            (true, 1, vec![10]),
            (false, 1, vec![10]),
        ] {
            let mut out = vec![0u8; n];
            spread(&mut out, &samples, odd);
            assert_eq!(out, want, "odd {odd} n {n}");
        }
    }

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
