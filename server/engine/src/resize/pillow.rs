//! Pillow's `Image.resize` arithmetic (`libImaging/Resample.c`, Pillow 13.0) for 8-bit RGB.
//!
//! Per axis, `precompute_coeffs`: the filter's support is widened by the factor when shrinking (so
//! shrinking antialiases), output `i` is centred at `(i + 0.5) * scale`, its window is
//! `[(int)(centre - support + 0.5), (int)(centre + support + 0.5))` cut to the picture, and its weights,
//! `filter((j - centre + 0.5) / filterscale)` in `double` normalised to sum to one, become 22-bit fixed
//! point (`(int)(w * 2^22 ± 0.5)`). Each pass starts from `2^21`, sums `pixel * weight` in `int` and keeps
//! the top bits clamped to 0..255, so the picture is rounded to 8 bits between the two passes. The
//! horizontal pass runs first unless the height shrinks by more than twice as many pixels as the width
//! (Pillow 13.0's order: earlier versions always ran it first, which differs only for such pictures).

use super::{CHANNELS, Source};

/// The filters of the two recipes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Filter {
    /// Triangle, support 1.
    Bilinear,
    /// Cubic convolution with a = -0.5, support 2.
    Bicubic,
}

impl Filter {
    fn support(self) -> f64 {
        match self {
            Self::Bilinear => 1.0,
            Self::Bicubic => 2.0,
        }
    }

    fn weight(self, x: f64) -> f64 {
        let x = x.abs();
        match self {
            Self::Bilinear => {
                if x < 1.0 {
                    1.0 - x
                } else {
                    0.0
                }
            }
            Self::Bicubic => {
                const A: f64 = -0.5;
                if x < 1.0 {
                    ((A + 2.0) * x - (A + 3.0)) * x * x + 1.0
                } else if x < 2.0 {
                    (((x - 5.0) * x + 8.0) * x - 4.0) * A
                } else {
                    0.0
                }
            }
        }
    }
}

/// Fractional bits of the fixed-point weights (`PRECISION_BITS`).
const PRECISION_BITS: u32 = 32 - 8 - 2;

/// The weights of one axis: per output, the first source sample and its weights.
#[derive(Debug, Clone, Default, PartialEq)]
struct Coefficients {
    /// Per output: first source sample, number of samples.
    bounds: Vec<(usize, usize)>,
    /// Weights, `ksize` per output (unused ones zero).
    weights: Vec<i32>,
    ksize: usize,
}

impl Coefficients {
    /// `precompute_coeffs` and `normalize_coeffs_8bpc` for `src` samples to `dst` over the whole axis.
    fn new(filter: Filter, src: usize, dst: usize) -> Self {
        // The box is the whole axis: in0 = 0, in1 = src (both exact in `float`, as Pillow passes them).
        let scale = src as f32 as f64 / dst as f64;
        let filterscale = scale.max(1.0);
        let support = filter.support() * filterscale;
        let ksize = support.ceil() as usize * 2 + 1;
        let inv_filterscale = 1.0 / filterscale;
        let mut bounds = Vec::with_capacity(dst);
        let mut weights = vec![0i32; dst * ksize];
        let mut k = vec![0f64; ksize];
        for (xx, out) in weights.chunks_exact_mut(ksize).enumerate() {
            let centre = (xx as f64 + 0.5) * scale;
            let xmin = ((centre - support + 0.5) as i64).max(0);
            let xmax = ((centre + support + 0.5) as i64).min(src as i64) - xmin;
            let (xmin, xmax) = (xmin as usize, xmax.max(0) as usize);
            let mut ww = 0.0;
            for (x, slot) in k.iter_mut().enumerate().take(xmax) {
                let w = filter.weight(((x + xmin) as f64 - centre + 0.5) * inv_filterscale);
                *slot = w;
                ww += w;
            }
            for (x, slot) in out.iter_mut().enumerate().take(xmax) {
                let w = if ww != 0.0 { k[x] / ww } else { k[x] };
                let fixed = w * f64::from(1u32 << PRECISION_BITS);
                *slot = if w < 0.0 {
                    (fixed - 0.5) as i32
                } else {
                    (fixed + 0.5) as i32
                };
            }
            bounds.push((xmin, xmax));
        }
        Self {
            bounds,
            weights,
            ksize,
        }
    }

    fn of(&self, i: usize) -> (usize, &[i32]) {
        let (first, n) = self.bounds[i];
        (first, &self.weights[i * self.ksize..i * self.ksize + n])
    }
}

/// `clip8`: the top bits of a sum, clamped to 0..255.
fn clip8(sum: i32) -> u8 {
    (sum >> PRECISION_BITS).clamp(0, 255) as u8
}

const HALF: i32 = 1 << (PRECISION_BITS - 1);

/// Weights of the last sizes seen, and the picture between the passes.
#[derive(Debug, Default)]
pub(super) struct State {
    key: Option<(Filter, usize, usize, usize, usize)>,
    across: Coefficients,
    down: Coefficients,
    between: Vec<u8>,
}

impl State {
    pub(super) fn resize(
        &mut self,
        filter: Filter,
        src: &Source<'_>,
        w: usize,
        h: usize,
        out: &mut [u8],
    ) {
        let (sw, sh) = (src.width, src.height);
        let key = (filter, sw, w, sh, h);
        if self.key != Some(key) {
            self.across = Coefficients::new(filter, sw, w);
            self.down = Coefficients::new(filter, sh, h);
            self.key = Some(key);
        }
        let (across, down, between) = (&self.across, &self.down, &mut self.between);
        let need_across = w != sw;
        let need_down = h != sh;
        // Pillow 13.0: the vertical pass first when the height loses more than twice as many pixels as
        // the width (differences signed, as in its `int` arithmetic).
        let (lost_h, lost_w) = (sh as i64 - h as i64, sw as i64 - w as i64);
        let across_first = !(lost_h > 0 && lost_h > lost_w * 2);
        match (need_across, need_down) {
            (false, false) => {
                for r in 0..h {
                    out[r * w * CHANNELS..(r + 1) * w * CHANNELS].copy_from_slice(src.row(r));
                }
            }
            (true, false) => {
                for r in 0..h {
                    horizontal(
                        src.row(r),
                        across,
                        &mut out[r * w * CHANNELS..(r + 1) * w * CHANNELS],
                    );
                }
            }
            (false, true) => vertical(|r| src.row(r), sw, down, 0, out),
            (true, true) if across_first => {
                // Only the rows the vertical pass reads are resized horizontally.
                let first = down.bounds.first().map_or(0, |b| b.0);
                let last = down.bounds.last().map_or(0, |b| b.0 + b.1);
                let row_len = w * CHANNELS;
                between.resize((last - first) * row_len, 0);
                for (i, dst) in between.chunks_exact_mut(row_len).enumerate() {
                    horizontal(src.row(first + i), across, dst);
                }
                let between = &*between;
                vertical(
                    |r| &between[r * row_len..(r + 1) * row_len],
                    w,
                    down,
                    first,
                    out,
                );
            }
            (true, true) => {
                let row_len = sw * CHANNELS;
                between.resize(h * row_len, 0);
                vertical(|r| src.row(r), sw, down, 0, between);
                for r in 0..h {
                    horizontal(
                        &between[r * row_len..(r + 1) * row_len],
                        across,
                        &mut out[r * w * CHANNELS..(r + 1) * w * CHANNELS],
                    );
                }
            }
        }
    }
}

/// `ImagingResampleHorizontal_8bpc` for one row.
fn horizontal(row: &[u8], across: &Coefficients, out: &mut [u8]) {
    for (xx, px) in out.chunks_exact_mut(CHANNELS).enumerate() {
        let (first, k) = across.of(xx);
        let mut ss = [HALF; CHANNELS];
        for (x, &kx) in k.iter().enumerate() {
            let s = &row[(first + x) * CHANNELS..(first + x + 1) * CHANNELS];
            for c in 0..CHANNELS {
                ss[c] += i32::from(s[c]) * kx;
            }
        }
        for c in 0..CHANNELS {
            px[c] = clip8(ss[c]);
        }
    }
}

/// `ImagingResampleVertical_8bpc`: rows `row(first - offset ..)` of `width` pixels, weighted per output row.
fn vertical<'a>(
    row: impl Fn(usize) -> &'a [u8],
    width: usize,
    down: &Coefficients,
    offset: usize,
    out: &mut [u8],
) {
    let row_len = width * CHANNELS;
    let mut ss = vec![0i32; row_len];
    for (yy, dst) in out.chunks_exact_mut(row_len).enumerate() {
        let (first, k) = down.of(yy);
        ss.fill(HALF);
        for (y, &ky) in k.iter().enumerate() {
            add_weighted(&mut ss, row(first + y - offset), ky);
        }
        for (o, &s) in dst.iter_mut().zip(&ss) {
            *o = clip8(s);
        }
    }
}

crate::vector::with_avx2! {
/// `acc += row * weight`, per value.
fn add_weighted / add_weighted_plain(acc: &mut [i32], row: &[u8], weight: i32) {
    for (a, &v) in acc.iter_mut().zip(row) {
        *a += i32::from(v) * weight;
    }
}
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Worked example of Pillow's antialiasing (its formulas, by hand): shrinking 4 samples to 2 with the
    /// triangle filter widens the support to 2, so output 0 (centre 1.0) reads the window [0, 3) with
    /// weights 0.75, 0.75, 0.25 before normalising, 0.4286, 0.4286, 0.1429 after.
    #[test]
    fn shrinking_widens_the_filter() {
        let c = Coefficients::new(Filter::Bilinear, 4, 2);
        let (first, k) = c.of(0);
        assert_eq!(first, 0);
        let scale = f64::from(1u32 << PRECISION_BITS);
        let got: Vec<f64> = k.iter().map(|&v| f64::from(v) / scale).collect();
        for (g, want) in got.iter().zip([0.75 / 1.75, 0.75 / 1.75, 0.25 / 1.75]) {
            assert!((g - want).abs() < 1e-6, "{got:?}");
        }
    }

    #[test]
    fn both_copies_of_the_weighted_sum_agree() {
        let row = crate::vector::noise(3, 777);
        let (mut a, mut b) = (vec![5i32; 777], vec![5i32; 777]);
        add_weighted(&mut a, &row, -12345);
        add_weighted_plain(&mut b, &row, -12345);
        assert_eq!(a, b);
    }
}
