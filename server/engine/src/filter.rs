//! Temporal filters over per-class probabilities, driven by capture timestamps, and the decision with
//! hysteresis on top.
//!
//! Every filter takes the time since the previous frame from the timestamps, so dropped and irregular
//! frames are handled. A timestamp earlier than the previous one (a clock reset) restarts the filter.

use std::collections::VecDeque;

/// The forward filter's default step: one frame at 30 frames per second.
pub const DEFAULT_STEP_MS: f64 = 1000.0 / 30.0;

/// Floor on a scaled likelihood (probability divided by prior), so that one overconfident frame (a
/// classifier's softmax on a glare-washed frame can give the true class 1e-6) cannot all but rule a class
/// out: a single frame can then shift the odds between two classes by at most (1 / prior) / floor. The value
/// is ours (common practice is to bound emission probabilities; no published value), tuned with
/// `framewise score --sweep` on the demo recording.
pub const LIKELIHOOD_FLOOR: f64 = 0.02;

/// Which temporal filter, with its parameters.
#[derive(Debug, Clone, PartialEq)]
pub enum FilterSpec {
    /// No smoothing.
    PassThrough,
    /// `s <- s + alpha (p - s)`, `alpha = 1 - exp(-dt / tau)`.
    Exponential {
        /// Time constant in milliseconds.
        tau_ms: f64,
    },
    /// Mean over the frames within the window.
    Window {
        /// At most this many frames; 0 for no frame limit.
        frames: u32,
        /// Frames within this many milliseconds of the newest; 0 for no time limit.
        span_ms: f64,
    },
    /// Forward filter of a hidden Markov model over the classes.
    Forward {
        /// Per-class probability of staying in the class over one step (one value for all, or one per class).
        stay: Vec<f64>,
        /// Class priors; empty for uniform.
        priors: Vec<f64>,
        /// The step in milliseconds.
        step_ms: f64,
    },
}

impl Default for FilterSpec {
    /// An exponential filter with a 300 ms time constant (common practice for display smoothing; tune it with
    /// `framewise score --sweep`).
    fn default() -> Self {
        Self::Exponential { tau_ms: 300.0 }
    }
}

/// A filter or decision setting that cannot be used; names the setting.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("setting `{field}` {problem}")]
pub struct SettingsError {
    /// The setting.
    pub field: &'static str,
    /// What is wrong with it.
    pub problem: String,
}

fn bad<T>(field: &'static str, problem: String) -> Result<T, SettingsError> {
    Err(SettingsError { field, problem })
}

impl FilterSpec {
    /// Short name.
    pub fn name(&self) -> &'static str {
        match self {
            Self::PassThrough => "pass_through",
            Self::Exponential { .. } => "exponential",
            Self::Window { .. } => "window",
            Self::Forward { .. } => "forward",
        }
    }

    /// Checks the parameters for a model with `classes` classes.
    pub fn validate(&self, classes: usize) -> Result<(), SettingsError> {
        match self {
            Self::PassThrough => Ok(()),
            Self::Exponential { tau_ms } => {
                if !(tau_ms.is_finite() && *tau_ms > 0.0) {
                    return bad(
                        "exponential.tau_ms",
                        format!("is {tau_ms}; it must be a positive number of milliseconds"),
                    );
                }
                Ok(())
            }
            Self::Window { frames, span_ms } => {
                if !(span_ms.is_finite() && *span_ms >= 0.0) {
                    return bad(
                        "window.span_ms",
                        format!("is {span_ms}; it must be 0 or more"),
                    );
                }
                if *frames == 0 && *span_ms == 0.0 {
                    return bad(
                        "window",
                        "sets neither `frames` nor `span_ms`; set at least one".into(),
                    );
                }
                Ok(())
            }
            Self::Forward {
                stay,
                priors,
                step_ms,
            } => {
                if stay.len() != 1 && stay.len() != classes {
                    return bad(
                        "forward.stay",
                        format!(
                            "has {} values; give 1 or one per class ({classes})",
                            stay.len()
                        ),
                    );
                }
                if let Some(s) = stay.iter().find(|s| !(**s > 0.0 && **s <= 1.0)) {
                    return bad("forward.stay", format!("holds {s}; each must be in (0, 1]"));
                }
                if !priors.is_empty() {
                    if priors.len() != classes {
                        return bad(
                            "forward.priors",
                            format!(
                                "has {} values; the model has {classes} classes",
                                priors.len()
                            ),
                        );
                    }
                    if let Some(p) = priors.iter().find(|p| !(**p > 0.0 && **p <= 1.0)) {
                        return bad(
                            "forward.priors",
                            format!("holds {p}; each must be in (0, 1]"),
                        );
                    }
                    let sum: f64 = priors.iter().sum();
                    if (sum - 1.0).abs() > 1e-6 {
                        return bad("forward.priors", format!("sums to {sum}; it must sum to 1"));
                    }
                }
                if !(step_ms.is_finite() && *step_ms > 0.0) {
                    return bad(
                        "forward.step_ms",
                        format!("is {step_ms}; it must be positive"),
                    );
                }
                Ok(())
            }
        }
    }

    /// Builds the filter's state (validate first).
    pub fn build(&self, classes: usize) -> Result<TemporalFilter, SettingsError> {
        self.validate(classes)?;
        let state = match self {
            Self::PassThrough => State::PassThrough,
            Self::Exponential { tau_ms } => State::Exponential {
                tau_ms: *tau_ms,
                s: Vec::new(),
            },
            Self::Window { frames, span_ms } => State::Window {
                frames: *frames as usize,
                span_ms: *span_ms,
                kept: VecDeque::new(),
            },
            Self::Forward {
                stay,
                priors,
                step_ms,
            } => {
                let stay = if stay.len() == 1 {
                    vec![stay[0]; classes]
                } else {
                    stay.clone()
                };
                let priors = if priors.is_empty() {
                    vec![1.0 / classes as f64; classes]
                } else {
                    priors.clone()
                };
                State::Forward {
                    stay,
                    belief: priors.clone(),
                    priors,
                    step_ms: *step_ms,
                    started: false,
                }
            }
        };
        Ok(TemporalFilter {
            state,
            last_t_ms: None,
            out: Vec::new(),
        })
    }
}

#[derive(Debug, Clone)]
enum State {
    PassThrough,
    Exponential {
        tau_ms: f64,
        s: Vec<f64>,
    },
    Window {
        frames: usize,
        span_ms: f64,
        kept: VecDeque<(f64, Vec<f64>)>,
    },
    Forward {
        stay: Vec<f64>,
        priors: Vec<f64>,
        belief: Vec<f64>,
        step_ms: f64,
        started: bool,
    },
}

/// A temporal filter's state for one stream.
#[derive(Debug, Clone)]
pub struct TemporalFilter {
    state: State,
    last_t_ms: Option<f64>,
    out: Vec<f32>,
}

impl TemporalFilter {
    /// The latest smoothed probabilities; empty before the first update.
    pub fn current(&self) -> &[f32] {
        &self.out
    }

    /// Folds in the probabilities of a frame captured at `t_ms` and returns the smoothed probabilities.
    pub fn update(&mut self, t_ms: f64, p: &[f32]) -> &[f32] {
        let dt = match self.last_t_ms {
            Some(last) if t_ms < last => {
                self.reset();
                None
            }
            Some(last) => Some(t_ms - last),
            None => None,
        };
        self.last_t_ms = Some(t_ms);
        let p: Vec<f64> = p.iter().map(|&v| f64::from(v)).collect();
        let smoothed: Vec<f64> = match &mut self.state {
            State::PassThrough => p,
            State::Exponential { tau_ms, s } => {
                match dt {
                    Some(dt) if s.len() == p.len() => {
                        let alpha = 1.0 - (-dt / *tau_ms).exp();
                        for (si, pi) in s.iter_mut().zip(&p) {
                            *si += alpha * (pi - *si);
                        }
                    }
                    _ => *s = p,
                }
                s.clone()
            }
            State::Window {
                frames,
                span_ms,
                kept,
            } => {
                kept.push_back((t_ms, p));
                while (*frames > 0 && kept.len() > *frames)
                    || (*span_ms > 0.0 && kept.front().is_some_and(|(t, _)| t_ms - t > *span_ms))
                {
                    kept.pop_front();
                }
                let k = kept.back().map_or(0, |(_, v)| v.len());
                let mut mean = vec![0.0; k];
                for (_, v) in kept.iter() {
                    for (m, x) in mean.iter_mut().zip(v) {
                        *m += x;
                    }
                }
                let n = kept.len().max(1) as f64;
                mean.iter().map(|m| m / n).collect()
            }
            State::Forward {
                stay,
                priors,
                belief,
                step_ms,
                started,
            } => {
                // Predict: a first frame takes one step from the priors, later frames dt / step steps.
                let steps = match dt {
                    Some(dt) if *started => dt / *step_ms,
                    _ => 1.0,
                };
                *started = true;
                let k = belief.len();
                let mut predicted = vec![0.0; k];
                if k == 1 {
                    predicted[0] = 1.0;
                } else {
                    for i in 0..k {
                        let keep = stay[i].powf(steps);
                        let leave = (1.0 - keep) / (k - 1) as f64;
                        for (j, slot) in predicted.iter_mut().enumerate() {
                            *slot += belief[i] * if i == j { keep } else { leave };
                        }
                    }
                }
                // Update with the scaled likelihood p / prior.
                let mut post: Vec<f64> = predicted
                    .iter()
                    .zip(p.iter().zip(priors.iter()))
                    .map(|(pr, (pj, prior))| pr * (pj / prior).max(LIKELIHOOD_FLOOR))
                    .collect();
                let sum: f64 = post.iter().sum();
                if sum > 0.0 && sum.is_finite() {
                    post.iter_mut().for_each(|v| *v /= sum);
                } else {
                    post = priors.clone();
                }
                *belief = post.clone();
                post
            }
        };
        self.out.clear();
        self.out.extend(smoothed.iter().map(|&v| v as f32));
        &self.out
    }

    fn reset(&mut self) {
        self.out.clear();
        match &mut self.state {
            State::PassThrough => {}
            State::Exponential { s, .. } => s.clear(),
            State::Window { kept, .. } => kept.clear(),
            State::Forward {
                priors,
                belief,
                started,
                ..
            } => {
                *belief = priors.clone();
                *started = false;
            }
        }
    }
}

/// When a class is called.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DecisionSpec {
    /// Smoothed probability needed to call a class.
    pub enter: f64,
    /// A called class is released below this.
    pub exit: f64,
    /// Time above `enter` before the call, in milliseconds.
    pub dwell_ms: f64,
}

impl Default for DecisionSpec {
    /// Enter 0.6, exit 0.4, dwell 500 ms (common practice: most false alerts of per-frame detectors last
    /// under half a second).
    fn default() -> Self {
        Self {
            enter: 0.6,
            exit: 0.4,
            dwell_ms: 500.0,
        }
    }
}

impl DecisionSpec {
    /// Checks the thresholds.
    pub fn validate(&self) -> Result<(), SettingsError> {
        if !(self.enter > 0.0 && self.enter <= 1.0) {
            return bad(
                "decision.enter",
                format!("is {}; it must be in (0, 1]", self.enter),
            );
        }
        if !(self.exit >= 0.0 && self.exit <= self.enter) {
            return bad(
                "decision.exit",
                format!(
                    "is {}; it must be in [0, enter = {}]",
                    self.exit, self.enter
                ),
            );
        }
        if !(self.dwell_ms.is_finite() && self.dwell_ms >= 0.0) {
            return bad(
                "decision.dwell_ms",
                format!("is {}; it must be 0 or more", self.dwell_ms),
            );
        }
        Ok(())
    }
}

/// A class call, or none.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Decision {
    /// No class is called.
    Undetermined,
    /// A class is called with its smoothed probability.
    Class { index: usize, confidence: f32 },
}

/// The decision's state for one stream.
#[derive(Debug, Clone)]
pub struct Decider {
    spec: DecisionSpec,
    held: Option<usize>,
    candidate: Option<(usize, f64)>,
}

impl Decider {
    /// A decider with validated thresholds.
    pub fn new(spec: DecisionSpec) -> Result<Self, SettingsError> {
        spec.validate()?;
        Ok(Self {
            spec,
            held: None,
            candidate: None,
        })
    }

    /// The decision now, without new evidence.
    pub fn current(&self, smoothed: &[f32]) -> Decision {
        match self.held {
            Some(index) => Decision::Class {
                index,
                confidence: smoothed.get(index).copied().unwrap_or(0.0),
            },
            None => Decision::Undetermined,
        }
    }

    /// Updates with smoothed probabilities at `t_ms`.
    pub fn update(&mut self, t_ms: f64, smoothed: &[f32]) -> Decision {
        if let Some(held) = self.held {
            let p = smoothed.get(held).map_or(0.0, |&v| f64::from(v));
            if p >= self.spec.exit {
                return self.current(smoothed);
            }
            self.held = None;
            self.candidate = None;
        }
        let best = crate::scoring::argmax(smoothed).map(|i| (i, f64::from(smoothed[i])));
        match best {
            Some((index, p)) if p >= self.spec.enter => {
                let since = match self.candidate {
                    Some((c, since)) if c == index && t_ms >= since => since,
                    _ => t_ms,
                };
                self.candidate = Some((index, since));
                if t_ms - since >= self.spec.dwell_ms {
                    self.held = Some(index);
                }
            }
            _ => self.candidate = None,
        }
        self.current(smoothed)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn forward_filter_reproduces_the_umbrella_world() {
        // Russell & Norvig, Artificial Intelligence: A Modern Approach, umbrella world (filtering example):
        // P(R0) = <0.5, 0.5>, P(stay) = 0.7, P(umbrella | rain) = 0.9, P(umbrella | no rain) = 0.2;
        // umbrella seen on days 1 and 2 gives P(rain) = 0.818 after day 1 and 0.883 after day 2.
        // The classifier's posterior under uniform priors is proportional to the likelihood: <0.9, 0.2> / 1.1.
        let spec = FilterSpec::Forward {
            stay: vec![0.7],
            priors: vec![0.5, 0.5],
            step_ms: 1000.0,
        };
        let mut f = spec.build(2).expect("valid");
        let obs = [0.9f32 / 1.1, 0.2 / 1.1];
        let day1 = f.update(0.0, &obs)[0];
        assert!((day1 - 0.818).abs() < 5e-4, "day 1: {day1}");
        let day2 = f.update(1000.0, &obs)[0];
        assert!((day2 - 0.883).abs() < 5e-4, "day 2: {day2}");
    }

    #[test]
    fn exponential_uses_time_and_restarts_on_a_clock_reset() {
        let mut f = FilterSpec::Exponential { tau_ms: 100.0 }
            .build(2)
            .expect("valid");
        assert_eq!(f.update(0.0, &[1.0, 0.0]), &[1.0, 0.0]);
        let s = f.update(100.0, &[0.0, 1.0])[0];
        // alpha = 1 - e^-1 after one time constant
        assert!((f64::from(s) - (-1.0f64).exp()).abs() < 1e-6);
        assert_eq!(f.update(50.0, &[0.0, 1.0]), &[0.0, 1.0]);
    }

    #[test]
    fn window_keeps_frames_and_time() {
        let mut f = FilterSpec::Window {
            frames: 2,
            span_ms: 0.0,
        }
        .build(1)
        .expect("valid");
        f.update(0.0, &[1.0]);
        f.update(10.0, &[0.0]);
        assert_eq!(f.update(20.0, &[0.0]), &[0.0]);
        let mut f = FilterSpec::Window {
            frames: 0,
            span_ms: 15.0,
        }
        .build(1)
        .expect("valid");
        f.update(0.0, &[1.0]);
        assert_eq!(f.update(10.0, &[0.0]), &[0.5]);
        assert_eq!(f.update(20.0, &[0.0]), &[0.0]);
    }

    #[test]
    fn bad_settings_name_the_field() {
        let err = FilterSpec::Exponential { tau_ms: 0.0 }
            .validate(2)
            .expect_err("tau 0");
        assert_eq!(err.field, "exponential.tau_ms");
        let err = FilterSpec::Forward {
            stay: vec![1.2],
            priors: vec![],
            step_ms: 33.0,
        }
        .validate(2)
        .expect_err("stay");
        assert_eq!(err.field, "forward.stay");
        let err = FilterSpec::Forward {
            stay: vec![0.9],
            priors: vec![0.3, 0.3],
            step_ms: 33.0,
        }
        .validate(2)
        .expect_err("priors");
        assert_eq!(err.field, "forward.priors");
        assert_eq!(
            DecisionSpec {
                enter: 0.5,
                exit: 0.6,
                dwell_ms: 0.0
            }
            .validate()
            .expect_err("exit")
            .field,
            "decision.exit"
        );
        assert!(
            FilterSpec::Window {
                frames: 0,
                span_ms: 0.0
            }
            .validate(2)
            .is_err()
        );
    }

    #[test]
    fn decision_needs_dwell_and_releases_below_exit() {
        let mut d = Decider::new(DecisionSpec {
            enter: 0.6,
            exit: 0.4,
            dwell_ms: 100.0,
        })
        .expect("valid");
        assert_eq!(d.update(0.0, &[0.7, 0.3]), Decision::Undetermined);
        assert_eq!(d.update(50.0, &[0.7, 0.3]), Decision::Undetermined);
        assert_eq!(
            d.update(100.0, &[0.7, 0.3]),
            Decision::Class {
                index: 0,
                confidence: 0.7
            }
        );
        // hysteresis: stays called between exit and enter
        assert_eq!(
            d.update(150.0, &[0.45, 0.55]),
            Decision::Class {
                index: 0,
                confidence: 0.45
            }
        );
        assert_eq!(d.update(200.0, &[0.3, 0.7]), Decision::Undetermined);
        assert_eq!(
            d.update(300.0, &[0.3, 0.7]),
            Decision::Class {
                index: 1,
                confidence: 0.7
            }
        );
    }
}
