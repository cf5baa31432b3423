//! The manifest's recipe from packed RGB to the model's input tensor: crop for the resize rule, resize with
//! the stated interpolation, normalise, and lay out as NCHW or NHWC.
//!
//! Bilinear resizing uses fast_image_resize (SIMD), whose interpolating bilinear filter follows OpenCV's
//! INTER_LINEAR within one grey level. Area shrinking computes OpenCV's INTER_AREA weights (each output pixel
//! the coverage-weighted mean of its source area) in a separable pass of our own, because the box
//! convolution of fast_image_resize parts from INTER_AREA at fractional factors; area enlarging (rare for a
//! classifier) uses the box convolution.

use fast_image_resize as fir;

use crate::frame::{RgbImage, RgbView};
use crate::manifest::{ColourOrder, InputSpec, Interpolation, Layout, ResizeRule};
use crate::vector::with_avx2;

/// Where the resized picture sits inside the model's input (the whole input except for letterbox).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Placement {
    /// Left offset in the input.
    pub x: u32,
    /// Top offset in the input.
    pub y: u32,
    /// Width of the picture.
    pub width: u32,
    /// Height of the picture.
    pub height: u32,
}

/// The source rectangle (within the region of interest) and where it lands in the model's input.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ResizePlan {
    /// Source crop: x, y, width, height.
    pub crop: (u32, u32, u32, u32),
    /// Destination placement.
    pub place: Placement,
}

/// Computes the crop and placement for a `width` x `height` region under the manifest's resize rule.
///
/// Centre crop: the largest centred rectangle with the input's aspect ratio, its size rounded to whole
/// pixels and its offset rounded down. Letterbox: scale by min(W/w, H/h), round the scaled size to whole
/// pixels (at least 1), centre it with the offset rounded down.
pub fn plan_resize(spec: &InputSpec, width: u32, height: u32) -> ResizePlan {
    let (tw, th) = (u64::from(spec.width), u64::from(spec.height));
    let (w, h) = (u64::from(width), u64::from(height));
    let whole = Placement {
        x: 0,
        y: 0,
        width: spec.width,
        height: spec.height,
    };
    match spec.resize {
        ResizeRule::Stretch => ResizePlan {
            crop: (0, 0, width, height),
            place: whole,
        },
        ResizeRule::CentreCrop => {
            let (cw, ch) = if w * th > h * tw {
                (((h * tw + th / 2) / th).clamp(1, w), h)
            } else {
                (w, ((w * th + tw / 2) / tw).clamp(1, h))
            };
            let crop = (
                ((w - cw) / 2) as u32,
                ((h - ch) / 2) as u32,
                cw as u32,
                ch as u32,
            );
            ResizePlan { crop, place: whole }
        }
        ResizeRule::Letterbox => {
            let (pw, ph) = if w * th > h * tw {
                (tw, ((h * tw + w / 2) / w).clamp(1, th))
            } else {
                (((w * th + h / 2) / h).clamp(1, tw), th)
            };
            let place = Placement {
                x: ((tw - pw) / 2) as u32,
                y: ((th - ph) / 2) as u32,
                width: pw as u32,
                height: ph as u32,
            };
            ResizePlan {
                crop: (0, 0, width, height),
                place,
            }
        }
    }
}

/// Per-session resizing state and buffers.
#[derive(Default)]
pub struct Preprocessor {
    resizer: fir::Resizer,
    resized: Vec<u8>,
    luma: Vec<u8>,
    area_x: Vec<(usize, usize, f32)>,
    area_y: Vec<(usize, usize, f32)>,
    area_rows: Vec<f32>,
}

impl std::fmt::Debug for Preprocessor {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Preprocessor").finish_non_exhaustive()
    }
}

/// The prepared input of one frame.
#[derive(Debug, Clone, Copy)]
pub struct Prepared<'a> {
    /// The resized RGB picture (placement size), before normalisation.
    pub picture: &'a [u8],
    /// Its luma (BT.601 weights, fixed point as OpenCV), for the quality measures.
    pub luma: &'a [u8],
    /// Width and height of `picture`.
    pub size: (u32, u32),
}

impl Preprocessor {
    /// A preprocessor with empty buffers.
    pub fn new() -> Self {
        Self::default()
    }

    /// Resizes `rgb` as the manifest says and writes the normalised tensor into `tensor` (resized to the
    /// model's input length). Returns the resized picture and its luma.
    pub fn prepare<'a>(
        &'a mut self,
        spec: &InputSpec,
        rgb: &'a RgbImage,
        tensor: &mut Vec<f32>,
    ) -> Prepared<'a> {
        self.prepare_view(spec, rgb.view(), tensor)
    }

    /// As [`Preprocessor::prepare`], from borrowed pixels.
    pub fn prepare_view<'a>(
        &'a mut self,
        spec: &InputSpec,
        rgb: RgbView<'a>,
        tensor: &mut Vec<f32>,
    ) -> Prepared<'a> {
        let plan = plan_resize(spec, rgb.width, rgb.height);
        let (pw, ph) = (plan.place.width, plan.place.height);
        // A picture that already has the placement's size and is taken whole is read where it lies (the
        // copy that resizing would make is the identity).
        let whole = plan.crop == (0, 0, pw, ph) && (rgb.width, rgb.height) == (pw, ph);
        let picture: &'a [u8] = match rgb.data.get(..pw as usize * ph as usize * 3) {
            Some(data) if whole => data,
            _ => {
                self.resize(spec, &rgb, &plan);
                &self.resized
            }
        };
        normalise(spec, &plan.place, picture, tensor);
        luma_of(picture, &mut self.luma);
        Prepared {
            picture,
            luma: &self.luma,
            size: (pw, ph),
        }
    }

    fn resize(&mut self, spec: &InputSpec, rgb: &RgbView<'_>, plan: &ResizePlan) {
        let (pw, ph) = (plan.place.width, plan.place.height);
        // Every path below writes every value, so a buffer of the right length is not cleared first.
        self.resized.resize(pw as usize * ph as usize * 3, 0);
        let (cx, cy, cw, ch) = plan.crop;
        if (cw, ch) == (pw, ph) {
            // Same size: copy the crop.
            let row = cw as usize * 3;
            for (r, dst) in self.resized.chunks_exact_mut(row).enumerate() {
                let start = ((cy as usize + r) * rgb.width as usize + cx as usize) * 3;
                dst.copy_from_slice(&rgb.data[start..start + row]);
            }
            return;
        }
        if spec.interpolation == Interpolation::Area && cw >= pw && ch >= ph {
            let (src_w, dst_w) = (cw as usize, pw as usize);
            let (src_h, dst_h) = (ch as usize, ph as usize);
            area_weights(src_w, dst_w, &mut self.area_x);
            area_weights(src_h, dst_h, &mut self.area_y);
            // Vertical pass over the crop's rows (contiguous, vectorises well), then horizontal.
            let row = src_w * 3;
            self.area_rows.clear();
            self.area_rows.resize(dst_h * row, 0.0);
            for &(sy, dy, wgt) in &self.area_y {
                let start = ((cy as usize + sy) * rgb.width as usize + cx as usize) * 3;
                let src = &rgb.data[start..start + row];
                let acc = &mut self.area_rows[dy * row..(dy + 1) * row];
                for (a, &v) in acc.iter_mut().zip(src) {
                    *a += wgt * f32::from(v);
                }
            }
            let mut sums = vec![0f32; dst_w * 3];
            for dy in 0..dst_h {
                sums.fill(0.0);
                let acc = &self.area_rows[dy * row..(dy + 1) * row];
                for &(sx, dx, wgt) in &self.area_x {
                    for c in 0..3 {
                        sums[dx * 3 + c] += wgt * acc[sx * 3 + c];
                    }
                }
                let out = &mut self.resized[dy * dst_w * 3..(dy + 1) * dst_w * 3];
                for (o, v) in out.iter_mut().zip(&sums) {
                    *o = v.round_ties_even().clamp(0.0, 255.0) as u8;
                }
            }
            return;
        }
        let algorithm = match spec.interpolation {
            Interpolation::Bilinear => fir::ResizeAlg::Interpolation(fir::FilterType::Bilinear),
            Interpolation::Area => fir::ResizeAlg::Convolution(fir::FilterType::Box),
        };
        let options = fir::ResizeOptions::new().resize_alg(algorithm).crop(
            f64::from(cx),
            f64::from(cy),
            f64::from(cw),
            f64::from(ch),
        );
        let src = fir::images::ImageRef::new(rgb.width, rgb.height, rgb.data, fir::PixelType::U8x3);
        let dst =
            fir::images::Image::from_slice_u8(pw, ph, &mut self.resized, fir::PixelType::U8x3);
        match (src, dst) {
            (Ok(src), Ok(mut dst)) => {
                if self.resizer.resize(&src, &mut dst, &options).is_err() {
                    self.resized.fill(0);
                }
            }
            _ => self.resized.fill(0),
        }
    }
}

/// Flags, in `mask` (one per row of a `width` x `height` picture), the rows the manifest's resize reads with
/// a weight other than zero, and says whether that is fewer than all rows. Only bilinear interpolation
/// reads so few: fast_image_resize's interpolating bilinear filter gives source row `y` the weight
/// `1 - |y - c|` for output row `i`, with `c = top + (i + 0.5) * scale - 0.5` (its
/// `precompute_coefficients`, support 1), so only rows within 1 of `c` count. The test below holds
/// the resize's output from a picture with only these rows right to the one from the whole picture.
pub fn rows_read(spec: &InputSpec, width: u32, height: u32, mask: &mut Vec<bool>) -> bool {
    mask.clear();
    if spec.interpolation != Interpolation::Bilinear || height == 0 {
        return false;
    }
    let plan = plan_resize(spec, width, height);
    let (_, top, _, crop_h) = plan.crop;
    let out_h = plan.place.height;
    mask.resize(height as usize, false);
    let scale = f64::from(crop_h) / f64::from(out_h);
    for i in 0..out_h {
        let c = f64::from(top) + (f64::from(i) + 0.5) * scale - 0.5;
        // Rows within 1 of c, bounds included (a row at exactly 1 has weight 0 and is flagged anyway).
        let first = (c - 1.0).ceil().max(0.0) as usize;
        let last = ((c + 1.0).floor().max(0.0) as usize).min(height as usize - 1);
        for flag in &mut mask[first.min(last)..=last] {
            *flag = true;
        }
    }
    mask.iter().any(|read| !read)
}

/// Area weights for shrinking `src` samples to `dst` (`src >= dst`): for each output sample, the share of each
/// source sample its interval covers, as OpenCV's INTER_AREA computes them (`computeResizeAreaTab`), as
/// (source index, output index, weight) in output order.
fn area_weights(src: usize, dst: usize, out: &mut Vec<(usize, usize, f32)>) {
    out.clear();
    let scale = src as f64 / dst as f64;
    for dx in 0..dst {
        let fsx1 = dx as f64 * scale;
        let fsx2 = fsx1 + scale;
        let cell = scale.min(src as f64 - fsx1);
        let mut sx2 = fsx2.floor() as usize;
        sx2 = sx2.min(src - 1);
        let sx1 = (fsx1.ceil() as usize).min(sx2);
        if sx1 as f64 - fsx1 > 1e-3 {
            out.push((sx1 - 1, dx, ((sx1 as f64 - fsx1) / cell) as f32));
        }
        for sx in sx1..sx2 {
            out.push((sx, dx, (1.0 / cell) as f32));
        }
        if fsx2 - sx2 as f64 > 1e-3 {
            out.push((
                sx2,
                dx,
                ((fsx2 - sx2 as f64).min(1.0).min(cell) / cell) as f32,
            ));
        }
    }
}

with_avx2! {
/// Writes `(v * scale - mean[c]) / std[c]` into the tensor in the manifest's layout and channel order,
/// with the letterbox fill around the placed picture.
fn normalise / normalise_plain(spec: &InputSpec, place: &Placement, picture: &[u8], tensor: &mut Vec<f32>) {
    let (tw, th) = (spec.width as usize, spec.height as usize);
    // Every value is written below (fill, then picture), so the buffer is not cleared first.
    tensor.resize(3 * tw * th, 0.0);
    // Per channel (in the model's order): the source channel in RGB, and a lookup table for 0..=255.
    let source = match spec.colour_order {
        ColourOrder::Rgb => [0usize, 1, 2],
        ColourOrder::Bgr => [2usize, 1, 0],
    };
    let mut tables = [[0f32; 256]; 3];
    for (c, table) in tables.iter_mut().enumerate() {
        for (v, slot) in table.iter_mut().enumerate() {
            *slot = ((v as f64 * spec.scale - spec.mean[c]) / spec.std[c]) as f32;
        }
    }
    let (px, py, pw, ph) = (
        place.x as usize,
        place.y as usize,
        place.width as usize,
        place.height as usize,
    );
    // The letterbox fill first (only where the picture does not cover the tensor), then the picture row by
    // row: a table lookup per value, with no per-value bounds test.
    let covered = px == 0 && py == 0 && pw == tw && ph == th;
    let fill = spec.letterbox_fill as usize;
    match spec.layout {
        Layout::Nchw => {
            let (p0, rest) = tensor.split_at_mut(tw * th);
            let (p1, p2) = rest.split_at_mut(tw * th);
            if !covered {
                for (plane, table) in [&mut *p0, &mut *p1, &mut *p2].into_iter().zip(&tables) {
                    plane.fill(table[fill]);
                }
            }
            // One pass over the picture, each pixel read once and written to the three planes.
            let [t0, t1, t2] = &tables;
            let [s0, s1, s2] = source;
            for y in 0..ph {
                let src = &picture[y * pw * 3..(y + 1) * pw * 3];
                let at = (py + y) * tw + px;
                let (d0, d1, d2) = (
                    &mut p0[at..at + pw],
                    &mut p1[at..at + pw],
                    &mut p2[at..at + pw],
                );
                for (((p, a), b), c) in src.chunks_exact(3).zip(d0).zip(d1).zip(d2) {
                    *a = t0[p[s0] as usize];
                    *b = t1[p[s1] as usize];
                    *c = t2[p[s2] as usize];
                }
            }
        }
        Layout::Nhwc => {
            if !covered {
                for px3 in tensor.chunks_exact_mut(3) {
                    for c in 0..3 {
                        px3[c] = tables[c][fill];
                    }
                }
            }
            for y in 0..ph {
                let src = &picture[y * pw * 3..(y + 1) * pw * 3];
                let start = ((py + y) * tw + px) * 3;
                let dst = &mut tensor[start..start + pw * 3];
                for (d, p) in dst.chunks_exact_mut(3).zip(src.chunks_exact(3)) {
                    for c in 0..3 {
                        d[c] = tables[c][p[source[c]] as usize];
                    }
                }
            }
        }
    }
}
}

with_avx2! {
/// Luma of packed RGB with the BT.601 weights 0.299, 0.587, 0.114 in 15-bit fixed point, as OpenCV 5's
/// `cv2.cvtColor(..., COLOR_RGB2GRAY)` computes them: `(9798 R + 19235 G + 3735 B + 16384) >> 15`.
pub fn luma_of / luma_of_plain(rgb: &[u8], out: &mut Vec<u8>) {
    out.clear();
    out.extend(rgb.chunks_exact(3).map(|p| {
        ((9798 * u32::from(p[0]) + 19235 * u32::from(p[1]) + 3735 * u32::from(p[2]) + 16384) >> 15)
            as u8
    }));
}
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(rule: ResizeRule, w: u32, h: u32) -> InputSpec {
        InputSpec {
            tensor: "x".into(),
            layout: Layout::Nchw,
            width: w,
            height: h,
            colour_order: ColourOrder::Rgb,
            scale: 1.0 / 255.0,
            mean: [0.0; 3],
            std: [1.0; 3],
            resize: rule,
            interpolation: Interpolation::Bilinear,
            letterbox_fill: 0,
        }
    }

    #[test]
    fn centre_crop_takes_the_largest_centred_square() {
        let plan = plan_resize(&spec(ResizeRule::CentreCrop, 96, 96), 640, 480);
        assert_eq!(plan.crop, (80, 0, 480, 480));
        let plan = plan_resize(&spec(ResizeRule::CentreCrop, 96, 96), 480, 641);
        assert_eq!(plan.crop, (0, 80, 480, 480));
    }

    #[test]
    fn letterbox_fits_and_centres() {
        let plan = plan_resize(&spec(ResizeRule::Letterbox, 224, 224), 1920, 1080);
        assert_eq!(
            plan.place,
            Placement {
                x: 0,
                y: 49,
                width: 224,
                height: 126
            }
        );
        let plan = plan_resize(&spec(ResizeRule::Letterbox, 224, 224), 1, 1000);
        assert_eq!(plan.place.width, 1);
    }

    #[test]
    fn normalise_writes_layout_order_and_fill() {
        let mut s = spec(ResizeRule::Letterbox, 2, 1);
        s.letterbox_fill = 255;
        s.colour_order = ColourOrder::Bgr;
        let place = Placement {
            x: 1,
            y: 0,
            width: 1,
            height: 1,
        };
        let mut t = Vec::new();
        normalise(&s, &place, &[0, 51, 102], &mut t);
        // NCHW with B first: [B(fill), B(pic)], [G(fill), G(pic)], [R(fill), R(pic)]
        assert_eq!(t, vec![1.0, 0.4, 1.0, 0.2, 1.0, 0.0]);
        s.layout = Layout::Nhwc;
        normalise(&s, &place, &[0, 51, 102], &mut t);
        assert_eq!(t, vec![1.0, 1.0, 1.0, 0.4, 0.2, 0.0]);
    }

    /// The AVX2 copy and the baseline copy of normalisation and luma give the same bits (see `vector`), in
    /// both layouts and colour orders, covered and letterboxed.
    #[test]
    fn same_bits_with_and_without_avx2() {
        for (i, (tw, th, pw, ph, x, y)) in [
            (224u32, 224u32, 224u32, 224u32, 0u32, 0u32),
            (96, 96, 96, 60, 0, 18),
            (31, 17, 20, 17, 5, 0),
        ]
        .into_iter()
        .enumerate()
        {
            let picture = crate::vector::noise(i as u64 + 3, (pw * ph * 3) as usize);
            let place = Placement {
                x,
                y,
                width: pw,
                height: ph,
            };
            for layout in [Layout::Nchw, Layout::Nhwc] {
                for order in [ColourOrder::Rgb, ColourOrder::Bgr] {
                    let mut s = spec(ResizeRule::Letterbox, tw, th);
                    s.layout = layout;
                    s.colour_order = order;
                    s.mean = [0.485, 0.456, 0.406];
                    s.std = [0.229, 0.224, 0.225];
                    s.letterbox_fill = 114;
                    let (mut a, mut b) = (vec![7.0f32; 5], Vec::new());
                    normalise(&s, &place, &picture, &mut a);
                    normalise_plain(&s, &place, &picture, &mut b);
                    let bits = |t: &[f32]| t.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
                    assert_eq!(bits(&a), bits(&b), "{tw}x{th} {layout:?} {order:?}");
                }
            }
            let (mut a, mut b) = (Vec::new(), Vec::new());
            luma_of(&picture, &mut a);
            luma_of_plain(&picture, &mut b);
            assert_eq!(a, b);
        }
    }

    /// Converting only the rows `rows_read` flags gives the resize exactly the output of the whole
    /// conversion, whatever the rows left out hold (here a fixed garbage value, as after another frame).
    #[test]
    fn converting_only_the_rows_read_changes_nothing() {
        use crate::frame::{self, DecodeScratch, FrameRef, PixelFormat, Region};
        let mut noise = crate::vector::Noise::new(0x2545_f491_4f6c_dd1d);
        let mut specs = vec![
            spec(ResizeRule::Stretch, 224, 224),
            spec(ResizeRule::CentreCrop, 96, 96),
            spec(ResizeRule::Letterbox, 224, 224),
            spec(ResizeRule::Stretch, 300, 200),
        ];
        let mut area = spec(ResizeRule::Stretch, 224, 224);
        area.interpolation = Interpolation::Area;
        specs.push(area);
        let mut sparse_seen = 0;
        for (w, h) in [
            (1920u32, 1080u32),
            (640, 480),
            (322, 242),
            (226, 224),
            (100, 60),
        ] {
            for format in [
                PixelFormat::Nv12,
                PixelFormat::I420,
                PixelFormat::Yuyv,
                PixelFormat::Rgb8,
                PixelFormat::Bgr8,
                PixelFormat::Rgba8,
                PixelFormat::Bgra8,
                PixelFormat::Gray8,
            ] {
                let pixels = w as usize * h as usize;
                let data = noise.bytes(match format {
                    PixelFormat::Nv12 | PixelFormat::I420 => pixels * 3 / 2,
                    PixelFormat::Yuyv => pixels * 2,
                    PixelFormat::Rgb8 | PixelFormat::Bgr8 => pixels * 3,
                    PixelFormat::Rgba8 | PixelFormat::Bgra8 => pixels * 4,
                    _ => pixels,
                });
                let frame = FrameRef {
                    format,
                    width: w,
                    height: h,
                    stride: 0,
                    data: &data,
                };
                let regions = [
                    None,
                    Some(Region {
                        x: 2,
                        y: 4,
                        width: w / 2,
                        height: h / 2,
                    }),
                    Some(Region {
                        x: 3,
                        y: 5,
                        width: w / 2 + 1,
                        height: h / 2 + 1,
                    }),
                ];
                for s in &specs {
                    for region in regions {
                        let size = region.map_or((w, h), |r| (r.width, r.height));
                        let mut mask = Vec::new();
                        let sparse = rows_read(s, size.0, size.1, &mut mask);
                        let limits = &frame::DEFAULT_FRAME_LIMITS;
                        let mut scratch = DecodeScratch::default();
                        let mut whole = RgbImage::default();
                        frame::to_rgb(
                            &frame,
                            region,
                            Default::default(),
                            limits,
                            &mut scratch,
                            &mut whole,
                        )
                        .expect("converts");
                        let mut part = RgbImage {
                            width: size.0,
                            height: size.1,
                            data: vec![0xA5; whole.data.len()],
                        };
                        let rows = sparse.then_some(mask.as_slice());
                        frame::to_rgb_rows(
                            &frame,
                            region,
                            Default::default(),
                            limits,
                            &mut scratch,
                            &mut part,
                            rows,
                        )
                        .expect("converts");
                        // Regions not on whole chroma samples are converted whole.
                        if sparse && whole.data != part.data {
                            sparse_seen += 1;
                        }
                        let (mut a, mut b) = (Vec::new(), Vec::new());
                        Preprocessor::new().prepare(s, &whole, &mut a);
                        Preprocessor::new().prepare(s, &part, &mut b);
                        assert!(
                            a == b,
                            "{format} {w}x{h} {region:?} {:?} {}x{}: the resize read a row left out",
                            s.resize,
                            s.width,
                            s.height
                        );
                    }
                }
            }
        }
        // 1920x1080 to 224x224 reads 448 of 1080 rows.
        let mut mask = Vec::new();
        assert!(rows_read(
            &spec(ResizeRule::Stretch, 224, 224),
            1920,
            1080,
            &mut mask
        ));
        assert_eq!(mask.iter().filter(|r| **r).count(), 448);
        assert!(sparse_seen > 60, "only {sparse_seen} cases left rows out");
    }

    #[test]
    fn luma_uses_the_bt601_weights() {
        let mut out = Vec::new();
        luma_of(&[255, 255, 255, 255, 0, 0, 0, 255, 0, 0, 0, 255], &mut out);
        // 0.299 R + 0.587 G + 0.114 B (ITU-R BT.601 luma weights)
        assert_eq!(out, vec![255, 76, 150, 29]);
    }
}
