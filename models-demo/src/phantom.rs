//! The invented demo scenario: a camera sweeping over a printed drum with textured zones (a bench-top
//! phantom for checking a scope integration), rendered by a seeded generator with per-frame labels.
//!
//! Nothing here resembles patient data: the frames are printed textures seen through a simulated camera
//! with vignetting, sensor noise, motion blur and glare bursts.

use crate::rng::SplitMix64;

/// The phantom's zone classes, in the demo model's output order.
pub const CLASSES: [&str; 4] = ["plain", "dotted", "striped", "grid"];

/// One view of the drum: everything needed to render a frame deterministically.
#[derive(Debug, Clone)]
pub struct View {
    /// Drum coordinate under the frame's centre, along the sweep, in drum units (one zone is 1.0 long).
    pub position: f64,
    /// Drum coordinate across the sweep.
    pub across: f64,
    /// Camera roll in radians.
    pub roll: f64,
    /// Drum units per frame width.
    pub field: f64,
    /// Motion blur length along the sweep, in drum units (0 for none).
    pub blur: f64,
    /// Glare burst: centre (fractions of width and height), radius (fraction of width), strength.
    pub glare: Option<(f64, f64, f64, f64)>,
    /// Illumination gain.
    pub gain: f64,
    /// Seed of the sensor noise.
    pub noise_seed: u64,
    /// Sensor noise standard deviation, in grey levels.
    pub noise: f64,
}

/// The printed drum: a cycle of zones, each with its texture class, ink colour, paper colour and scale.
#[derive(Debug, Clone)]
pub struct Drum {
    zones: Vec<Zone>,
}

#[derive(Debug, Clone)]
struct Zone {
    class: usize,
    ink: [f64; 3],
    paper: [f64; 3],
    period: f64,
    /// Sine and cosine of the print's angle.
    rot: (f64, f64),
}

impl Drum {
    /// A drum of `zones` zones whose classes follow `order` (indices into [`CLASSES`]), with seeded colours
    /// and texture scales.
    pub fn new(order: &[usize], rng: &mut SplitMix64) -> Self {
        let zones = order
            .iter()
            .map(|&class| Zone::random(class % CLASSES.len(), rng))
            .collect();
        Self { zones }
    }

    /// A drum whose zones are drawn at random, balanced over the classes.
    pub fn random(zones: usize, rng: &mut SplitMix64) -> Self {
        let mut order: Vec<usize> = (0..zones).map(|i| i % CLASSES.len()).collect();
        rng.shuffle(&mut order);
        // Neighbouring zones of one class would be one long zone: swap them apart where possible.
        for i in 1..order.len() {
            if order[i] == order[i - 1]
                && let Some(j) = (i + 1..order.len()).find(|&j| order[j] != order[i - 1])
            {
                order.swap(i, j);
            }
        }
        Self::new(&order, rng)
    }

    /// Number of zones in one turn of the drum.
    pub fn zones(&self) -> usize {
        self.zones.len()
    }

    /// The class of the zone at drum coordinate `position`.
    pub fn class_at(&self, position: f64) -> usize {
        self.zone_at(position).class
    }

    fn zone_at(&self, position: f64) -> &Zone {
        let n = self.zones.len() as f64;
        let wrapped = position.rem_euclid(n);
        let index = (wrapped.floor() as usize).min(self.zones.len() - 1);
        &self.zones[index]
    }

    /// Reflectance (0..1 per channel) of the print at drum coordinates (u along, v across).
    fn reflectance(&self, u: f64, v: f64) -> [f64; 3] {
        let zone = self.zone_at(u);
        let ink = zone.ink_share(u, v);
        let mut out: [f64; 3] =
            std::array::from_fn(|c| zone.paper[c] * (1.0 - ink) + zone.ink[c] * ink);
        // A thin dark seam between zones, as printed sheets leave.
        let frac = u.rem_euclid(1.0);
        if !(0.004..=0.996).contains(&frac) {
            for value in &mut out {
                *value *= 0.35;
            }
        }
        out
    }

    /// Renders one view into packed RGB8 of `width` x `height`.
    pub fn render(&self, view: &View, width: u32, height: u32) -> Vec<u8> {
        let (w, h) = (width as usize, height as usize);
        let mut out = vec![0u8; w * h * 3];
        let scale = view.field / width as f64;
        let (sin, cos) = view.roll.sin_cos();
        let blur_taps = if view.blur > 0.0 {
            ((view.blur / scale / 2.0).ceil() as usize).clamp(2, 12)
        } else {
            1
        };
        let mut noise = SplitMix64::new(view.noise_seed);
        let (cx, cy) = (w as f64 / 2.0, h as f64 / 2.0);
        for y in 0..h {
            for x in 0..w {
                let dx = (x as f64 + 0.5 - cx) * scale;
                let dy = (y as f64 + 0.5 - cy) * scale;
                let u0 = view.position + dx * cos - dy * sin;
                let v0 = view.across + dx * sin + dy * cos;
                let mut acc = [0.0f64; 3];
                for tap in 0..blur_taps {
                    let offset = if blur_taps > 1 {
                        view.blur * (tap as f64 / (blur_taps - 1) as f64 - 0.5)
                    } else {
                        0.0
                    };
                    let r = self.reflectance(u0 + offset, v0);
                    for c in 0..3 {
                        acc[c] += r[c];
                    }
                }
                // Vignetting: a scope's light falls off towards the edge of the field.
                let rx = (x as f64 - cx) / cx;
                let ry = (y as f64 - cy) / cy;
                let vignette = 1.0 - 0.35 * (rx * rx + ry * ry).min(2.0) / 2.0;
                let mut glare = 0.0;
                if let Some((gx, gy, gr, gs)) = view.glare {
                    let ddx = x as f64 / w as f64 - gx;
                    let ddy = (y as f64 / h as f64 - gy) * h as f64 / w as f64;
                    let d2 = (ddx * ddx + ddy * ddy) / (2.0 * gr * gr);
                    if d2 < 12.0 {
                        glare = gs * (-d2).exp();
                    }
                }
                let px = (y * w + x) * 3;
                for c in 0..3 {
                    let level = acc[c] / blur_taps as f64 * 255.0 * view.gain * vignette
                        + glare * 255.0
                        + f64::from(noise.gaussian_fast()) * view.noise;
                    out[px + c] = level.round().clamp(0.0, 255.0) as u8;
                }
            }
        }
        out
    }
}

impl Zone {
    fn random(class: usize, rng: &mut SplitMix64) -> Self {
        let paper_level = rng.range(0.70, 0.95);
        let tint = [
            rng.range(0.9, 1.0),
            rng.range(0.85, 1.0),
            rng.range(0.8, 1.0),
        ];
        let ink_level = rng.range(0.08, 0.30);
        let ink_hue = [
            rng.range(0.5, 1.0),
            rng.range(0.3, 1.0),
            rng.range(0.3, 1.0),
        ];
        Self {
            class,
            paper: [
                paper_level * tint[0],
                paper_level * tint[1],
                paper_level * tint[2],
            ],
            ink: [
                ink_level * ink_hue[0] + 0.05,
                ink_level * ink_hue[1],
                ink_level * ink_hue[2],
            ],
            period: rng.range(0.045, 0.09),
            rot: rng.range(-0.6, 0.6).sin_cos(),
        }
    }

    /// Share of ink (0..1) at drum coordinates, with soft edges so that the print is not aliased.
    fn ink_share(&self, u: f64, v: f64) -> f64 {
        let (sin, cos) = self.rot;
        let a = (u * cos - v * sin) / self.period;
        let b = (u * sin + v * cos) / self.period;
        let soft = |d: f64, edge: f64| ((edge - d) / 0.06).clamp(-0.5, 0.5) + 0.5;
        match self.class {
            // plain: a faint low-frequency mottle only
            0 => 0.08 * (0.5 + 0.5 * (u * 3.1).sin() * (v * 2.3).cos()),
            // dotted: discs on a square lattice
            1 => {
                let fa = a - a.round();
                let fb = b - b.round();
                soft((fa * fa + fb * fb).sqrt(), 0.28)
            }
            // striped: parallel bars
            2 => soft((a - a.round()).abs(), 0.22),
            // grid: thin lines both ways
            _ => {
                let la = soft((a - a.round()).abs(), 0.09);
                let lb = soft((b - b.round()).abs(), 0.09);
                la.max(lb)
            }
        }
    }
}

/// A random single view for training sets: any zone, any pose, and nuisances at random.
pub fn random_view(drum: &Drum, rng: &mut SplitMix64) -> View {
    let zone = rng.below(drum.zones() as u64) as f64;
    View {
        // keep the frame centre well inside the zone so that the label is unambiguous
        position: zone + rng.range(0.3, 0.7),
        across: rng.range(-5.0, 5.0),
        roll: rng.range(-0.5, 0.5),
        field: rng.range(0.35, 0.6),
        blur: if rng.chance(0.3) {
            rng.range(0.004, 0.03)
        } else {
            0.0
        },
        glare: rng.chance(0.2).then(|| {
            (
                rng.range(0.2, 0.8),
                rng.range(0.2, 0.8),
                rng.range(0.05, 0.15),
                rng.range(0.3, 1.0),
            )
        }),
        gain: rng.range(0.7, 1.15),
        noise_seed: rng.next_u64(),
        noise: rng.range(1.0, 5.0),
    }
}

/// One frame of a sweep recording.
#[derive(Debug, Clone)]
pub struct SweepFrame {
    /// Capture time in milliseconds from the start.
    pub timestamp_ms: f64,
    /// The class under the frame's centre.
    pub label: usize,
    /// How to render it.
    pub view: View,
}

/// A camera sweep over the drum at `fps` for `seconds`: dwells on zones, moves between them with motion
/// blur, glare bursts now and then, timestamp jitter and a few dropped frames (as capture cards do).
pub fn sweep(drum: &Drum, seconds: f64, fps: f64, rng: &mut SplitMix64) -> Vec<SweepFrame> {
    let interval = 1000.0 / fps;
    let total = (seconds * fps).round() as usize;
    // Plan: dwell 1.5..4 s on a zone, then move to the next at a steady speed over 0.4..0.9 s.
    let mut plan: Vec<(f64, f64)> = Vec::new(); // (time ms, drum position) knots
    let mut t = 0.0;
    let mut pos = 0.5;
    plan.push((t, pos));
    while t < seconds * 1000.0 + 5000.0 {
        let dwell = rng.range(1500.0, 4000.0);
        let wander = rng.range(-0.12, 0.12);
        t += dwell;
        plan.push((t, pos + wander));
        let step = if rng.chance(0.15) { 2.0 } else { 1.0 };
        t += rng.range(400.0, 900.0) * step;
        pos += step;
        plan.push((t, pos + rng.range(-0.1, 0.1)));
    }
    let position_at = |time: f64| -> (f64, f64) {
        let k = plan
            .iter()
            .position(|&(pt, _)| pt > time)
            .unwrap_or(plan.len() - 1)
            .max(1);
        let (t0, p0) = plan[k - 1];
        let (t1, p1) = plan[k];
        let f = if t1 > t0 {
            ((time - t0) / (t1 - t0)).clamp(0.0, 1.0)
        } else {
            1.0
        };
        // smoothstep easing, and its slope for the blur
        let e = f * f * (3.0 - 2.0 * f);
        let slope = if t1 > t0 {
            6.0 * f * (1.0 - f) * (p1 - p0) / (t1 - t0)
        } else {
            0.0
        };
        (p0 + (p1 - p0) * e, slope)
    };
    let mut glare_until = -1.0;
    let mut glare = None;
    let mut shake_until = -1.0;
    let mut shake = 0.0;
    let mut dip_until = -1.0;
    let mut dip = 1.0;
    let mut frames = Vec::with_capacity(total);
    let mut across = rng.range(-2.0, 2.0);
    let mut roll = rng.range(-0.2, 0.2);
    for i in 0..total {
        // about 1 in 150 frames is dropped by the capture path
        if i > 0 && rng.chance(1.0 / 150.0) {
            continue;
        }
        let time = i as f64 * interval + rng.range(-1.5, 1.5).max(-(i as f64) * interval);
        let (position, speed) = position_at(time);
        across += rng.range(-0.002, 0.002);
        roll = (roll + rng.range(-0.003, 0.003)).clamp(-0.4, 0.4);
        // Nuisances of a hand-held scope, in bursts: glare from the light source, camera shake, and
        // exposure dips. They make single frames unreliable, which is what the temporal filter is for.
        if time > glare_until && rng.chance(0.02) {
            glare_until = time + rng.range(100.0, 500.0);
            glare = Some((
                rng.range(0.25, 0.75),
                rng.range(0.25, 0.75),
                rng.range(0.12, 0.35),
                rng.range(0.8, 1.6),
            ));
        }
        if time > shake_until && rng.chance(0.015) {
            shake_until = time + rng.range(80.0, 300.0);
            shake = rng.range(0.03, 0.09);
        }
        if time > dip_until && rng.chance(0.01) {
            dip_until = time + rng.range(100.0, 400.0);
            dip = rng.range(0.25, 0.5);
        }
        let view = View {
            position,
            across,
            roll,
            field: 0.45,
            // the shutter is open for about half the frame interval
            blur: (speed * interval * 0.5).abs() + if time <= shake_until { shake } else { 0.0 },
            glare: if time <= glare_until { glare } else { None },
            gain: if time <= dip_until { 0.95 * dip } else { 0.95 },
            noise_seed: rng.next_u64(),
            noise: 2.5,
        };
        frames.push(SweepFrame {
            timestamp_ms: time.max(0.0),
            label: drum.class_at(position),
            view,
        });
    }
    frames
}
