//! Frame quality: a focus measure (variance of the Laplacian) and an exposure measure (share of clipped
//! dark and bright pixels), on the luma of the frame at the model's input size.

use crate::filter::SettingsError;
use crate::vector::with_avx2;

/// Luma at or below this is clipped dark.
pub const DARK_LEVEL: u8 = 5;
/// Luma at or above this is clipped bright.
pub const BRIGHT_LEVEL: u8 = 250;

/// Thresholds that make a frame unusable.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct QualitySpec {
    /// Minimum focus (variance of the Laplacian); 0 turns the check off.
    pub min_focus: f64,
    /// Maximum share of clipped pixels (dark plus bright); 1 turns the check off.
    pub max_clipped: f64,
}

impl Default for QualitySpec {
    /// Checks off: every frame is usable unless a session asks otherwise.
    fn default() -> Self {
        Self {
            min_focus: 0.0,
            max_clipped: 1.0,
        }
    }
}

impl QualitySpec {
    /// Checks the thresholds.
    pub fn validate(&self) -> Result<(), SettingsError> {
        if !(self.min_focus.is_finite() && self.min_focus >= 0.0) {
            let problem = format!("is {}; it must be 0 or more", self.min_focus);
            return Err(SettingsError {
                field: "quality.min_focus",
                problem,
            });
        }
        if !(0.0..=1.0).contains(&self.max_clipped) {
            let problem = format!("is {}; it must be within 0..=1", self.max_clipped);
            return Err(SettingsError {
                field: "quality.max_clipped",
                problem,
            });
        }
        Ok(())
    }

    /// Applies the thresholds to measures.
    pub fn judge(&self, m: &QualityMeasures) -> QualityVerdict {
        let blurred = self.min_focus > 0.0 && m.focus < self.min_focus;
        let badly_exposed =
            self.max_clipped < 1.0 && m.dark_share + m.bright_share > self.max_clipped;
        QualityVerdict {
            blurred,
            badly_exposed,
            usable: !blurred && !badly_exposed,
        }
    }
}

/// The measures of one frame.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct QualityMeasures {
    /// Variance of the Laplacian of the luma.
    pub focus: f64,
    /// Share of luma pixels at or below [`DARK_LEVEL`].
    pub dark_share: f64,
    /// Share of luma pixels at or above [`BRIGHT_LEVEL`].
    pub bright_share: f64,
}

/// What the thresholds made of the measures.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct QualityVerdict {
    /// Focus below the minimum.
    pub blurred: bool,
    /// Clipped share above the maximum.
    pub badly_exposed: bool,
    /// Neither: the frame may update the temporal filter.
    pub usable: bool,
}

with_avx2! {
/// Measures focus and exposure of a `width` x `height` luma image.
pub fn measure / measure_plain(luma: &[u8], width: usize, height: usize) -> QualityMeasures {
    let n = luma.len().min(width * height);
    if n == 0 {
        return QualityMeasures::default();
    }
    // One pass, counted in u32 lanes per chunk (vectorises; no chunk can overflow), totalled in usize.
    let (mut dark, mut bright) = (0usize, 0usize);
    for chunk in luma[..n].chunks(1 << 16) {
        let (mut d, mut b) = (0u32, 0u32);
        for &v in chunk {
            d += u32::from(v <= DARK_LEVEL);
            b += u32::from(v >= BRIGHT_LEVEL);
        }
        dark += d as usize;
        bright += b as usize;
    }
    QualityMeasures {
        focus: laplacian_variance(&luma[..n], width, height),
        dark_share: dark as f64 / n as f64,
        bright_share: bright as f64 / n as f64,
    }
}
}

/// Reflect-101 border (OpenCV's BORDER_REFLECT_101): index -1 maps to 1, index n maps to n - 2 (a side of 1
/// maps to itself).
fn reflect_101(i: isize, n: usize) -> usize {
    if n == 1 {
        0
    } else if i < 0 {
        (-i) as usize
    } else if i as usize >= n {
        2 * (n - 1) - i as usize
    } else {
        i as usize
    }
}

with_avx2! {
/// Variance of the Laplacian (Pech-Pacheco et al., "Diatom autofocusing in brightfield microscopy", 2000):
/// the 4-neighbour kernel [0 1 0; 1 -4 1; 0 1 0] with reflected borders (as OpenCV's `Laplacian` with
/// ksize 1 and its default BORDER_REFLECT_101), then the population variance of the response.
pub fn laplacian_variance / laplacian_variance_plain(luma: &[u8], width: usize, height: usize) -> f64 {
    if width == 0 || height == 0 || luma.len() < width * height {
        return 0.0;
    }
    let reflect = reflect_101;
    // Integer responses (|v| <= 1020) summed exactly in i64; the same sums in f64 would be exact too, so the
    // result does not depend on the order of summation.
    let mut sum: i64 = 0;
    let mut sum_sq: i64 = 0;
    for y in 0..height {
        let up = &luma[reflect(y as isize - 1, height) * width..][..width];
        let row = &luma[y * width..][..width];
        let down = &luma[reflect(y as isize + 1, height) * width..][..width];
        let edge = |x: usize, left: usize, right: usize| {
            i64::from(row[left]) + i64::from(row[right]) + i64::from(up[x]) + i64::from(down[x])
                - 4 * i64::from(row[x])
        };
        let v = edge(0, reflect(-1, width), reflect(1, width));
        sum += v;
        sum_sq += v * v;
        if width > 1 {
            // The interior in i32 lanes (|v| <= 1020, v * v <= 1_040_400), in chunks of 2048 so that the
            // i32 sums cannot overflow (2048 * 1_040_400 < 2^31), each chunk's sums added into i64.
            // Equal-length slices indexed together, so that it vectorises.
            let n = width - 2;
            let (l, m, r) = (&row[..n], &row[1..=n], &row[2..n + 2]);
            let (u, d) = (&up[1..=n], &down[1..=n]);
            for start in (0..n).step_by(2048) {
                let end = (start + 2048).min(n);
                let (l, m, r, u, d) = (
                    &l[start..end],
                    &m[start..end],
                    &r[start..end],
                    &u[start..end],
                    &d[start..end],
                );
                let (mut chunk_sum, mut chunk_sq) = (0i32, 0i32);
                #[allow(clippy::needless_range_loop)]
                for i in 0..l.len() {
                    let v = i32::from(l[i]) + i32::from(r[i]) + i32::from(u[i]) + i32::from(d[i])
                        - 4 * i32::from(m[i]);
                    chunk_sum += v;
                    chunk_sq += v * v;
                }
                sum += i64::from(chunk_sum);
                sum_sq += i64::from(chunk_sq);
            }
            let v = edge(width - 1, width - 2, reflect(width as isize, width));
            sum += v;
            sum_sq += v * v;
        }
    }
    let (sum, sum_sq) = (sum as f64, sum_sq as f64);
    let n = (width * height) as f64;
    let mean = sum / n;
    (sum_sq / n - mean * mean).max(0.0)
}
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The AVX2 copy and the baseline copy of the measures give the same bits (see `vector`).
    #[test]
    fn same_bits_with_and_without_avx2() {
        for (i, (w, h)) in [
            (1usize, 1usize),
            (2, 3),
            (97, 61),
            (224, 224),
            (2051, 5),
            (4099, 2),
        ]
        .into_iter()
        .enumerate()
        {
            let mut luma = crate::vector::noise(i as u64 + 7, w * h);
            // Saturated stretches, so the dark and bright counts are not near zero.
            for v in luma.iter_mut().step_by(5) {
                *v = if *v > 127 { 255 } else { 0 };
            }
            let (a, b) = (measure(&luma, w, h), measure_plain(&luma, w, h));
            assert_eq!(a.focus.to_bits(), b.focus.to_bits(), "{w}x{h} focus");
            assert_eq!(
                a.dark_share.to_bits(),
                b.dark_share.to_bits(),
                "{w}x{h} dark"
            );
            assert_eq!(
                a.bright_share.to_bits(),
                b.bright_share.to_bits(),
                "{w}x{h}"
            );
            let (a, b) = (
                laplacian_variance(&luma, w, h),
                laplacian_variance_plain(&luma, w, h),
            );
            assert_eq!(a.to_bits(), b.to_bits(), "{w}x{h} Laplacian");
            // And both equal the plain definition written out below.
            assert_eq!(a.to_bits(), plain_laplacian_variance(&luma, w, h).to_bits());
        }
    }

    /// The Laplacian's variance written plainly (every response in i64 with reflected indices, then the
    /// population variance), to check the chunked, vectorised version on awkward widths.
    fn plain_laplacian_variance(luma: &[u8], w: usize, h: usize) -> f64 {
        let at = |x: isize, y: isize| i64::from(luma[reflect_101(y, h) * w + reflect_101(x, w)]);
        let (mut sum, mut sq) = (0i64, 0i64);
        for y in 0..h as isize {
            for x in 0..w as isize {
                let v = at(x - 1, y) + at(x + 1, y) + at(x, y - 1) + at(x, y + 1) - 4 * at(x, y);
                sum += v;
                sq += v * v;
            }
        }
        let n = (w * h) as f64;
        let mean = sum as f64 / n;
        (sq as f64 / n - mean * mean).max(0.0)
    }

    #[test]
    fn chunked_laplacian_equals_the_plain_one() {
        let mut state = 0x2545_f491_4f6c_dd1du64;
        for (w, h) in [
            (1, 1),
            (1, 5),
            (2, 3),
            (3, 2),
            (224, 224),
            (2049, 3),
            (2050, 2),
            (5000, 4),
        ] {
            let luma: Vec<u8> = (0..w * h)
                .map(|_| {
                    state ^= state << 13;
                    state ^= state >> 7;
                    state ^= state << 17;
                    // Many extremes, to reach the largest responses.
                    match state % 4 {
                        0 => 0,
                        1 => 255,
                        _ => (state >> 8) as u8,
                    }
                })
                .collect();
            assert_eq!(
                laplacian_variance(&luma, w, h),
                plain_laplacian_variance(&luma, w, h),
                "{w}x{h}"
            );
        }
    }

    #[test]
    fn flat_image_has_no_focus_and_a_checkerboard_has_a_lot() {
        assert_eq!(laplacian_variance(&[100; 16], 4, 4), 0.0);
        // A one-pixel checkerboard of 0/255: every response is +-4*255 (worked by hand), mean 0.
        let board: Vec<u8> = (0..16)
            .map(|i| if (i % 4 + i / 4) % 2 == 0 { 0 } else { 255 })
            .collect();
        assert_eq!(laplacian_variance(&board, 4, 4), (4.0f64 * 255.0).powi(2));
    }

    #[test]
    fn exposure_counts_clipped_pixels_and_thresholds_judge() {
        let m = measure(&[0, 5, 6, 128, 249, 250, 255, 100], 8, 1);
        assert_eq!(m.dark_share, 2.0 / 8.0);
        assert_eq!(m.bright_share, 2.0 / 8.0);
        let spec = QualitySpec {
            min_focus: 0.0,
            max_clipped: 0.4,
        };
        assert!(spec.judge(&m).badly_exposed);
        assert!(QualitySpec::default().judge(&m).usable);
        assert!(
            QualitySpec {
                min_focus: -1.0,
                max_clipped: 1.0
            }
            .validate()
            .is_err()
        );
        assert!(
            QualitySpec {
                min_focus: 0.0,
                max_clipped: 1.5
            }
            .validate()
            .is_err()
        );
    }
}
