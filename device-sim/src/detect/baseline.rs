//! The guarded personal baseline of one signal (module docs of [`super`], "Baseline").

use std::collections::VecDeque;

use crate::prospective::{Predictor, Result};

/// A day scored but not yet released into the baseline.
#[derive(Debug, Clone, Copy)]
struct Pending {
    day: i64,
    z_obs: f64,
    /// Residual against the guarded forecast, in predictive SDs (before the personal scale).
    raw: f64,
    protect: bool,
}

/// The guarded forecast of one signal with its personal scale.
///
/// The predictor only ever sees days at least `guard + 1` days older than the day being
/// scored, and never a protected day (unless a lasting change is accepted, see
/// [`GuardedBaseline::protect_last`]).
#[derive(Debug)]
pub struct GuardedBaseline<P> {
    predictor: P,
    guard: i64,
    pending: VecDeque<Pending>,
    /// Pseudo-days of the personal-scale prior (variance 1 in predictive units).
    scale_prior_days: f64,
    clip: f64,
    sum_sq: f64,
    n_scale: f64,
    /// Consecutive protected days (for the lasting-change rule).
    protected_run: usize,
    max_protected_run: usize,
    n_released: usize,
}

/// What the baseline says about one observed day.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BaselineDay {
    /// Guarded forecast mean (standardised units).
    pub mean: f64,
    /// Guarded forecast SD times the personal scale (standardised units).
    pub sd: f64,
    /// `(z_obs − mean) / sd`.
    pub residual: f64,
}

impl<P: Predictor> GuardedBaseline<P> {
    /// A baseline around `predictor` with a guard of `guard` days, `scale_prior_days`
    /// pseudo-days for the personal scale, residuals clipped at `±clip` in the scale's
    /// estimate, and at most `max_protected_run` consecutive protected days before a change
    /// is accepted as lasting.
    pub fn new(
        predictor: P,
        guard: usize,
        scale_prior_days: f64,
        clip: f64,
        max_protected_run: usize,
    ) -> GuardedBaseline<P> {
        GuardedBaseline {
            predictor,
            guard: guard as i64,
            pending: VecDeque::new(),
            scale_prior_days,
            clip,
            sum_sq: 0.0,
            n_scale: 0.0,
            protected_run: 0,
            max_protected_run: max_protected_run.max(1),
            n_released: 0,
        }
    }

    /// Days released into the predictor so far.
    pub fn n_released(&self) -> usize {
        self.n_released
    }

    /// Personal scale: `√((ν₀ + Σ min(r², c²)) / (ν₀ + n))` over released days.
    pub fn personal_scale(&self) -> f64 {
        ((self.scale_prior_days + self.sum_sq) / (self.scale_prior_days + self.n_scale)).sqrt()
    }

    /// Releases every pending day older than `day − guard` (conditioning on the unprotected
    /// ones), then scores an observation `z_obs` on `day` against the guarded forecast and
    /// queues it (unprotected until [`GuardedBaseline::protect_last`] says otherwise).
    ///
    /// # Errors
    /// The predictor's errors (days out of order, non-finite values).
    pub fn score(&mut self, day: i64, z_obs: f64) -> Result<BaselineDay> {
        while let Some(p) = self.pending.front().copied() {
            if p.day > day - self.guard - 1 {
                break;
            }
            self.pending.pop_front();
            if !p.protect {
                self.predictor.update(p.day, p.z_obs)?;
                let r = p.raw.clamp(-self.clip, self.clip);
                self.sum_sq += r * r;
                self.n_scale += 1.0;
                self.n_released += 1;
            }
        }
        let pred = self.predictor.predict(day)?;
        let raw = (z_obs - pred.mean) / pred.var_obs.sqrt();
        let scale = self.personal_scale();
        self.pending.push_back(Pending {
            day,
            z_obs,
            raw,
            protect: false,
        });
        Ok(BaselineDay {
            mean: pred.mean,
            sd: pred.var_obs.sqrt() * scale,
            residual: raw / scale,
        })
    }

    /// Marks the day just scored as protected: it will not enter the baseline. After
    /// `max_protected_run` consecutive protected days the change is taken to be lasting and
    /// the waiting days are released after all ("re-baselining").
    pub fn protect_last(&mut self, protect: bool) {
        if protect {
            self.protected_run += 1;
            if let Some(last) = self.pending.back_mut() {
                last.protect = true;
            }
            if self.protected_run >= self.max_protected_run {
                for p in &mut self.pending {
                    p.protect = false;
                }
                self.protected_run = 0;
            }
        } else {
            self.protected_run = 0;
        }
    }
}
