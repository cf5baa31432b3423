//! OpenCV's `cv::resize` arithmetic (imgproc `resize.cpp`, OpenCV 5.0) for packed 8-bit RGB, and its
//! `float32` linear path.
//!
//! - `INTER_LINEAR`, 8-bit: each output sample maps to `f = (d + 0.5) * scale - 0.5` (in `f32`), whose
//!   weights `1 - frac(f)` and `frac(f)` become 11-bit fixed point (`saturate_cast<short>(w * 2048)`,
//!   rounded to nearest even). The horizontal pass sums exactly in `int`; the vertical pass is the
//!   vectorised one OpenCV runs, `((b0 * (S0 >> 4)) >> 16) + ((b1 * (S1 >> 4)) >> 16) + 2) >> 2`, which its
//!   scalar tail repeats. Horizontally a position left of the first sample or at or right of the last
//!   takes that sample whole; vertically the rows are clamped to the picture and the weights kept.
//! - `INTER_AREA` shrinking by whole factors on both axes: the integer sum of each block; 2x2 blocks as
//!   `(sum + 2) >> 2`, others as `sum * (1.f / area)` rounded to nearest even.
//! - `INTER_AREA` shrinking otherwise: each output's coverage of the source samples (`computeResizeAreaTab`,
//!   weights in `f32`), summed per source row horizontally, then over rows, in OpenCV's order, in `f32`.
//! - `INTER_AREA` enlarging (either axis): OpenCV's area-mode linear weights,
//!   `f = (d + 1) - (floor(d * scale) + 1) / scale` kept to its fraction, through the 8-bit linear passes.
//! - `INTER_LINEAR` on `float32`: the same mapping with `f32` weights, `S0 * w0 + S1 * w1` per pass.
//!
//! The same sizes taken whole are copied, as `cv::resize` does.

use super::{CHANNELS, Source};

/// One output sample of a linear pass: its two source samples and their weights.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Tap {
    first: usize,
    second: usize,
    /// The weights as `f32` (the float path).
    weights: [f32; 2],
    /// The weights in 11-bit fixed point (the 8-bit path).
    fixed: [i32; 2],
}

/// `INTER_RESIZE_COEF_SCALE`: weights in fixed point with 11 fractional bits.
const COEF_SCALE: f32 = 2048.0;

/// `saturate_cast<short>(float)`: rounded to nearest, ties to even (`cvRound`), then clamped.
fn to_short(v: f32) -> i32 {
    v.round_ties_even().clamp(-32768.0, 32767.0) as i32
}

/// The taps of a linear pass from `src` samples to `dst`. `horizontal` clamps positions outside the
/// samples to the edge sample with weight one, as OpenCV does across a row (down a column it clamps the
/// rows only). `area_mode` is `INTER_AREA`'s enlarging mapping.
fn linear_taps(src: usize, dst: usize, horizontal: bool, area_mode: bool) -> Vec<Tap> {
    let inv_scale = dst as f64 / src as f64;
    let scale = 1.0 / inv_scale;
    let last = src as i64 - 1;
    (0..dst)
        .map(|d| {
            let (mut s, mut f) = if area_mode {
                let s = (d as f64 * scale).floor() as i64;
                let f = ((d + 1) as f64 - (s + 1) as f64 * inv_scale) as f32;
                (s, if f <= 0.0 { 0.0 } else { f - f.floor() })
            } else {
                let f = ((d as f64 + 0.5) * scale - 0.5) as f32;
                let s = f.floor();
                (s as i64, f - s)
            };
            if horizontal {
                if s < 0 {
                    (s, f) = (0, 0.0);
                }
                if s >= last {
                    (s, f) = (last, 0.0);
                }
            }
            let weights = [1.0 - f, f];
            Tap {
                first: s.clamp(0, last) as usize,
                second: (s + 1).clamp(0, last) as usize,
                weights,
                fixed: weights.map(|w| to_short(w * COEF_SCALE)),
            }
        })
        .collect()
}

/// The two source samples each output of `INTER_LINEAR` reads along one axis, for [`super::rows_read`].
pub(super) fn linear_samples(
    src: usize,
    dst: usize,
    horizontal: bool,
) -> impl Iterator<Item = (usize, usize)> {
    linear_taps(src, dst, horizontal, false)
        .into_iter()
        .map(|t| (t.first, t.second))
}

/// Weights of the last sizes seen, by (source, destination, area mode).
#[derive(Debug, Default)]
struct TapCache {
    key: Option<(usize, usize, bool)>,
    taps: Vec<Tap>,
}

impl TapCache {
    fn get(&mut self, src: usize, dst: usize, horizontal: bool, area_mode: bool) -> &[Tap] {
        let key = (src, dst, area_mode);
        if self.key != Some(key) {
            self.taps = linear_taps(src, dst, horizontal, area_mode);
            self.key = Some(key);
        }
        &self.taps
    }
}

/// One entry of `computeResizeAreaTab`: source sample `src` adds `weight` of itself to output `dst`.
#[derive(Debug, Clone, Copy, PartialEq)]
struct AreaTap {
    dst: usize,
    src: usize,
    weight: f32,
}

/// OpenCV's `computeResizeAreaTab` for shrinking `src` samples to `dst` by `scale = src / dst`.
fn area_taps(src: usize, dst: usize, scale: f64) -> Vec<AreaTap> {
    let mut tab = Vec::with_capacity(src * 2);
    for d in 0..dst {
        let fsx1 = d as f64 * scale;
        let fsx2 = fsx1 + scale;
        let cell = scale.min(src as f64 - fsx1);
        let sx2 = (fsx2.floor() as usize).min(src - 1);
        let sx1 = (fsx1.ceil() as usize).min(sx2);
        if sx1 as f64 - fsx1 > 1e-3 {
            tab.push(AreaTap {
                dst: d,
                src: sx1 - 1,
                weight: ((sx1 as f64 - fsx1) / cell) as f32,
            });
        }
        for s in sx1..sx2 {
            tab.push(AreaTap {
                dst: d,
                src: s,
                weight: (1.0 / cell) as f32,
            });
        }
        if fsx2 - sx2 as f64 > 1e-3 {
            tab.push(AreaTap {
                dst: d,
                src: sx2,
                weight: ((fsx2 - sx2 as f64).min(1.0).min(cell) / cell) as f32,
            });
        }
    }
    tab
}

/// Buffers and weights kept from frame to frame.
#[derive(Debug, Default)]
pub(super) struct State {
    across: TapCache,
    down: TapCache,
    /// Horizontally resized rows (fixed point), two at a time, with the source row each holds.
    rows: [(Option<usize>, Vec<i32>); 2],
    /// The same for the float path.
    rows_f32: [(Option<usize>, Vec<f32>); 2],
    area_across: Vec<AreaTap>,
    area_down: Vec<AreaTap>,
    area_key: Option<(usize, usize, usize, usize)>,
    area_row: Vec<f32>,
    area_sum: Vec<f32>,
}

/// `cv::resize`'s scale from `src` to `dst` samples: `1 / (dst / src)` in `double`, as it computes it.
fn scale_of(src: usize, dst: usize) -> f64 {
    1.0 / (dst as f64 / src as f64)
}

/// True when `scale` is a whole number to within `DBL_EPSILON`, as `cv::resize`'s `is_area_fast` asks.
fn whole(scale: f64) -> Option<usize> {
    let rounded = scale.round();
    ((scale - rounded).abs() < f64::EPSILON).then_some(rounded as usize)
}

impl State {
    /// `INTER_LINEAR`, 8-bit.
    pub(super) fn linear(&mut self, src: &Source<'_>, w: usize, h: usize, out: &mut [u8]) {
        if (src.width, src.height) == (w, h) {
            return copy(src, out);
        }
        self.fixed_linear(src, w, h, false, out);
    }

    /// `INTER_AREA`, 8-bit.
    pub(super) fn area(&mut self, src: &Source<'_>, w: usize, h: usize, out: &mut [u8]) {
        if (src.width, src.height) == (w, h) {
            return copy(src, out);
        }
        let (scale_x, scale_y) = (scale_of(src.width, w), scale_of(src.height, h));
        if scale_x < 1.0 || scale_y < 1.0 {
            return self.fixed_linear(src, w, h, true, out);
        }
        match (whole(scale_x), whole(scale_y)) {
            (Some(fx), Some(fy)) => area_whole(src, w, h, fx, fy, out),
            _ => self.area_fractional(src, w, h, scale_x, scale_y, out),
        }
    }

    /// The 8-bit linear passes with the weights of `INTER_LINEAR`, or of `INTER_AREA` enlarging.
    fn fixed_linear(
        &mut self,
        src: &Source<'_>,
        w: usize,
        h: usize,
        area_mode: bool,
        out: &mut [u8],
    ) {
        let across = self.across.get(src.width, w, true, area_mode);
        let down = self.down.get(src.height, h, false, area_mode);
        let row_len = w * CHANNELS;
        for slot in &mut self.rows {
            slot.0 = None;
            slot.1.resize(row_len, 0);
        }
        for (dy, tap) in down.iter().enumerate() {
            let fill = |r: usize| move |out: &mut [i32]| horizontal_fixed(src.row(r), across, out);
            let a = row_slot(&mut self.rows, tap.first, fill(tap.first));
            let b = row_slot(&mut self.rows, tap.second, fill(tap.second));
            let (s0, s1) = (&self.rows[a].1, &self.rows[b].1);
            let [b0, b1] = tap.fixed;
            vertical_fixed(s0, s1, b0, b1, &mut out[dy * row_len..(dy + 1) * row_len]);
        }
    }

    /// `INTER_LINEAR` on `f32` values.
    pub(super) fn linear_f32(&mut self, src: &Source<'_>, w: usize, h: usize, out: &mut Vec<f32>) {
        let row_len = w * CHANNELS;
        out.resize(row_len * h, 0.0);
        if (src.width, src.height) == (w, h) {
            for r in 0..h {
                for (o, &v) in out[r * row_len..(r + 1) * row_len]
                    .iter_mut()
                    .zip(src.row(r))
                {
                    *o = f32::from(v);
                }
            }
            return;
        }
        let across = self.across.get(src.width, w, true, false);
        let down = self.down.get(src.height, h, false, false);
        for slot in &mut self.rows_f32 {
            slot.0 = None;
            slot.1.resize(row_len, 0.0);
        }
        for (dy, tap) in down.iter().enumerate() {
            let fill = |r: usize| move |out: &mut [f32]| horizontal_f32(src.row(r), across, out);
            let a = row_slot(&mut self.rows_f32, tap.first, fill(tap.first));
            let b = row_slot(&mut self.rows_f32, tap.second, fill(tap.second));
            let (s0, s1) = (&self.rows_f32[a].1, &self.rows_f32[b].1);
            let [b0, b1] = tap.weights;
            for ((o, &x), &y) in out[dy * row_len..(dy + 1) * row_len]
                .iter_mut()
                .zip(s0)
                .zip(s1)
            {
                *o = x * b0 + y * b1;
            }
        }
    }

    /// `INTER_AREA` shrinking by a factor that is not whole on at least one axis (`ResizeArea_Invoker`).
    fn area_fractional(
        &mut self,
        src: &Source<'_>,
        w: usize,
        h: usize,
        scale_x: f64,
        scale_y: f64,
        out: &mut [u8],
    ) {
        let key = (src.width, w, src.height, h);
        if self.area_key != Some(key) {
            self.area_across = area_taps(src.width, w, scale_x);
            self.area_down = area_taps(src.height, h, scale_y);
            self.area_key = Some(key);
        }
        let row_len = w * CHANNELS;
        let (buf, sum) = (&mut self.area_row, &mut self.area_sum);
        buf.resize(row_len, 0.0);
        sum.clear();
        sum.resize(row_len, 0.0);
        let Some(first) = self.area_down.first() else {
            return;
        };
        let mut prev = first.dst;
        for tap in &self.area_down {
            let row = src.row(tap.src);
            buf.fill(0.0);
            for t in &self.area_across {
                let (d, s) = (t.dst * CHANNELS, t.src * CHANNELS);
                for c in 0..CHANNELS {
                    buf[d + c] += f32::from(row[s + c]) * t.weight;
                }
            }
            let beta = tap.weight;
            if tap.dst != prev {
                store_rounded(sum, &mut out[prev * row_len..(prev + 1) * row_len]);
                for (s, &b) in sum.iter_mut().zip(buf.iter()) {
                    *s = beta * b;
                }
                prev = tap.dst;
            } else {
                for (s, &b) in sum.iter_mut().zip(buf.iter()) {
                    *s += beta * b;
                }
            }
        }
        store_rounded(sum, &mut out[prev * row_len..(prev + 1) * row_len]);
    }
}

/// The slot of `rows` holding source row `r`, resized horizontally by `fill` into the slot of the older row
/// when neither holds it. Rows are asked for in increasing order, so two slots do.
fn row_slot<T>(
    rows: &mut [(Option<usize>, Vec<T>); 2],
    r: usize,
    fill: impl FnOnce(&mut [T]),
) -> usize {
    if let Some(slot) = rows.iter().position(|(held, _)| *held == Some(r)) {
        return slot;
    }
    let slot = match (rows[0].0, rows[1].0) {
        (None, _) => 0,
        (_, None) => 1,
        (Some(a), Some(b)) => usize::from(a > b),
    };
    fill(&mut rows[slot].1);
    rows[slot].0 = Some(r);
    slot
}

/// `HResizeLinear` for `float32`: `S[first] * w0 + S[second] * w1`.
fn horizontal_f32(row: &[u8], taps: &[Tap], out: &mut [f32]) {
    for (d, t) in taps.iter().enumerate() {
        let (a, b) = (t.first * CHANNELS, t.second * CHANNELS);
        for c in 0..CHANNELS {
            out[d * CHANNELS + c] =
                f32::from(row[a + c]) * t.weights[0] + f32::from(row[b + c]) * t.weights[1];
        }
    }
}

/// `HResizeLinear` for 8-bit: `S[first] * w0 + S[second] * w1`, exact in `int`.
fn horizontal_fixed(row: &[u8], taps: &[Tap], out: &mut [i32]) {
    for (d, t) in taps.iter().enumerate() {
        let (a, b) = (t.first * CHANNELS, t.second * CHANNELS);
        let [w0, w1] = t.fixed;
        for c in 0..CHANNELS {
            out[d * CHANNELS + c] = i32::from(row[a + c]) * w0 + i32::from(row[b + c]) * w1;
        }
    }
}

crate::vector::with_avx2! {
/// `VResizeLinear` for 8-bit as OpenCV vectorises it (`VResizeLinearVec_32s8u`, repeated by its scalar tail).
fn vertical_fixed / vertical_fixed_plain(s0: &[i32], s1: &[i32], b0: i32, b1: i32, out: &mut [u8]) {
    for ((o, &x), &y) in out.iter_mut().zip(s0).zip(s1) {
        let v = (((b0 * (x >> 4)) >> 16) + ((b1 * (y >> 4)) >> 16) + 2) >> 2;
        *o = v.clamp(0, 255) as u8;
    }
}
}

/// `saturate_cast<uchar>(float)`: rounded to nearest even, clamped.
fn store_rounded(sum: &[f32], out: &mut [u8]) {
    for (o, &v) in out.iter_mut().zip(sum) {
        *o = v.round_ties_even().clamp(0.0, 255.0) as u8;
    }
}

/// `INTER_AREA` by whole factors `fx` x `fy` (`resizeAreaFast_`): every output a full block of the source.
fn area_whole(src: &Source<'_>, w: usize, h: usize, fx: usize, fy: usize, out: &mut [u8]) {
    let row_len = w * CHANNELS;
    let mut sums = vec![0u32; row_len];
    let scale = 1.0f32 / (fx * fy) as f32;
    for dy in 0..h {
        sums.fill(0);
        for r in 0..fy {
            let row = src.row(dy * fy + r);
            for (dx, sum) in sums.chunks_exact_mut(CHANNELS).enumerate() {
                let block = &row[dx * fx * CHANNELS..(dx + 1) * fx * CHANNELS];
                for px in block.chunks_exact(CHANNELS) {
                    for c in 0..CHANNELS {
                        sum[c] += u32::from(px[c]);
                    }
                }
            }
        }
        let dst = &mut out[dy * row_len..(dy + 1) * row_len];
        if (fx, fy) == (2, 2) {
            for (o, &s) in dst.iter_mut().zip(&sums) {
                *o = ((s + 2) >> 2) as u8;
            }
        } else {
            for (o, &s) in dst.iter_mut().zip(&sums) {
                *o = (s as f32 * scale).round_ties_even().clamp(0.0, 255.0) as u8;
            }
        }
    }
}

fn copy(src: &Source<'_>, out: &mut [u8]) {
    let row_len = src.width * CHANNELS;
    for (r, dst) in out.chunks_exact_mut(row_len).enumerate() {
        dst.copy_from_slice(src.row(r));
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Worked example, OpenCV's mapping (common practice, half-pixel centres): 200 samples to 160 puts output
    /// 0 at 0.125 (weights 0.875 and 0.125, 1792 and 256 in 11-bit fixed point) and output 1 at 1.375.
    #[test]
    fn linear_taps_follow_the_half_pixel_mapping() {
        let taps = linear_taps(200, 160, true, false);
        assert_eq!(
            (taps[0].first, taps[0].second, taps[0].fixed),
            (0, 1, [1792, 256])
        );
        assert_eq!(
            (taps[1].first, taps[1].second, taps[1].fixed),
            (1, 2, [1280, 768])
        );
        // Enlarging 2 to 4: output 0 lies left of sample 0 and takes it whole across a row; down a column
        // the weights stay (0.75 on the clamped row -1, 0.25 on row 0).
        let taps = linear_taps(2, 4, true, false);
        assert_eq!((taps[0].first, taps[0].fixed), (0, [2048, 0]));
        assert_eq!((taps[3].first, taps[3].fixed), (1, [2048, 0]));
        let taps = linear_taps(2, 4, false, false);
        assert_eq!(
            (taps[0].first, taps[0].second, taps[0].fixed),
            (0, 0, [512, 1536])
        );
    }

    /// Worked example of `computeResizeAreaTab`: 5 samples to 2 (scale 2.5) gives output 0 samples 0 and 1
    /// whole and half of sample 2, each over 2.5.
    #[test]
    fn area_taps_cover_each_output_cell() {
        let tab = area_taps(5, 2, 2.5);
        let first: Vec<(usize, f32)> = tab
            .iter()
            .filter(|t| t.dst == 0)
            .map(|t| (t.src, t.weight))
            .collect();
        assert_eq!(first, vec![(0, 0.4), (1, 0.4), (2, 0.2)]);
        let total: f32 = tab.iter().filter(|t| t.dst == 1).map(|t| t.weight).sum();
        assert!((total - 1.0).abs() < 1e-6);
    }

    #[test]
    fn the_vertical_pass_has_both_copies_alike() {
        let s0: Vec<i32> = (0..999).map(|i| (i * 523) % (255 * 2048)).collect();
        let s1: Vec<i32> = (0..999).map(|i| (i * 877) % (255 * 2048)).collect();
        let (mut a, mut b) = (vec![0u8; 999], vec![0u8; 999]);
        vertical_fixed(&s0, &s1, 1300, 748, &mut a);
        vertical_fixed_plain(&s0, &s1, 1300, 748, &mut b);
        assert_eq!(a, b);
    }
}
