//! What is known about the number of events over the raster, checked once against the raster.
//!
//! Every form is a likelihood over the true total N: the weight w(m) = P(observation | N = m).
//! An exact total is w = [m = total]; a range is w = 1 on [min, max]; a detected count under
//! imperfect detection is w(m) = Binomial(detected; m, detection); the general form lists the
//! weights. An `Evidence` can only be built valid for its raster: its support (the totals with
//! positive weight that the raster can produce) is never empty, so the normaliser and everything
//! after it trust it.
//!
//! This module owns the weights and what the normaliser needs of them: their logarithms on a
//! window of totals with a bound on the rounding each carries, and an upper bound of the tilted
//! weight outside that window. It does no convolution and knows nothing of the tree.

use super::error::{EngineError, ImpossibleTotal};
use super::model::Raster;
use super::rounding::UNIT_ROUNDOFF;

/// Most weights the general likelihood form may list: a bound on the memory and time the
/// normaliser spends scanning them (8 MB of values).
pub const MAX_LIKELIHOOD_VALUES: usize = 1 << 20;

#[derive(Clone, Debug, PartialEq)]
pub struct Evidence {
    form: Form,
    /// Totals with positive weight that the raster can produce: [lo, hi], never empty.
    support: (u64, u64),
    /// Cells with p = 1 and cells with p > 0 of the raster it was checked against.
    certain: u64,
    possible: u64,
}

/// The forms of evidence, as the analyst stated them.
#[derive(Clone, Debug, PartialEq)]
pub enum Form {
    /// Exactly this many events happened over the valid cells.
    Total(u64),
    /// The true total lies in [min, max].
    Range { min: u64, max: u64 },
    /// `detected` events were found, each event being found independently with probability
    /// `detection`.
    Detected { detected: u64, detection: f64 },
    /// P(observation | N = offset + i) = values[i]; zero outside.
    Likelihood { offset: u64, values: Vec<f64> },
}

fn invalid(message: String) -> EngineError {
    EngineError::InvalidEvidence(message)
}

fn impossible(message: String) -> EngineError {
    EngineError::ImpossibleEvidence(message)
}

impl Evidence {
    /// An exact observed total over all valid cells of `raster`.
    ///
    /// Occurs as `ImpossibleTotal` when the total is below the number of cells with p = 1 or
    /// above the number with p > 0.
    pub fn exact_total(total: u64, raster: &Raster) -> Result<Evidence, EngineError> {
        let (certain, possible) = bounds(raster);
        if total < certain || total > possible {
            return Err(EngineError::ImpossibleTotal(ImpossibleTotal {
                total,
                certain,
                possible,
            }));
        }
        Ok(Evidence {
            form: Form::Total(total),
            support: (total, total),
            certain,
            possible,
        })
    }

    /// The true total lies in [min, max].
    ///
    /// Occurs as `InvalidEvidence` when min > max, as `ImpossibleEvidence` when the range
    /// misses every total the raster can produce.
    pub fn range(min: u64, max: u64, raster: &Raster) -> Result<Evidence, EngineError> {
        if min > max {
            return Err(invalid(format!(
                "the range's min {min} is above its max {max}: give min <= max"
            )));
        }
        let (certain, possible) = bounds(raster);
        let support = (min.max(certain), max.min(possible));
        if support.0 > support.1 {
            return Err(impossible(format!(
                "the range [{min}, {max}] is impossible: the raster makes between {certain} and {possible} events possible ({certain} cells have p = 1, {possible} have p > 0)"
            )));
        }
        Ok(Evidence {
            form: Form::Range { min, max },
            support,
            certain,
            possible,
        })
    }

    /// `detected` events were found, each found independently with probability `detection`.
    ///
    /// Occurs as `InvalidEvidence` when the detection rate is not in (0, 1], as
    /// `ImpossibleEvidence` when more events were detected than the raster can produce.
    pub fn detected(
        detected: u64,
        detection: f64,
        raster: &Raster,
    ) -> Result<Evidence, EngineError> {
        if !(detection > 0.0 && detection <= 1.0) {
            return Err(invalid(format!(
                "detection rate {detection} must lie in (0, 1]: the share of events a survey finds, e.g. 0.85"
            )));
        }
        let (certain, possible) = bounds(raster);
        if detected > possible {
            return Err(impossible(format!(
                "{detected} detected events are impossible: only {possible} cells have p > 0, so at most {possible} events can happen"
            )));
        }
        let support = if detection == 1.0 {
            (detected, detected)
        } else {
            (detected.max(certain), possible)
        };
        if support.0 > support.1 || support.0 < certain {
            return Err(impossible(format!(
                "{detected} detected events at detection 1 are impossible: {certain} cells have p = 1, so at least {certain} events happened and all would be found"
            )));
        }
        Ok(Evidence {
            form: Form::Detected {
                detected,
                detection,
            },
            support,
            certain,
            possible,
        })
    }

    /// P(observation | N = offset + i) = values[i].
    ///
    /// Occurs as `InvalidEvidence` for a negative or non-finite value or more than
    /// `MAX_LIKELIHOOD_VALUES` values, as `ImpossibleEvidence` for weights that are zero on
    /// every total the raster can produce.
    pub fn likelihood(
        offset: u64,
        values: Vec<f64>,
        raster: &Raster,
    ) -> Result<Evidence, EngineError> {
        if values.len() > MAX_LIKELIHOOD_VALUES {
            return Err(invalid(format!(
                "the likelihood lists {} values: at most {MAX_LIKELIHOOD_VALUES} are accepted",
                values.len()
            )));
        }
        if let Some((i, v)) = values
            .iter()
            .enumerate()
            .find(|(_, v)| !(v.is_finite() && **v >= 0.0))
        {
            return Err(invalid(format!(
                "likelihood value {i} is {v}: each value is P(observation | total = offset + index) and must be finite and >= 0"
            )));
        }
        if offset.checked_add(values.len() as u64).is_none() {
            return Err(invalid(format!(
                "likelihood offset {offset} is too large: offset + number of values must fit in 64 bits"
            )));
        }
        let (certain, possible) = bounds(raster);
        let positive =
            |m: u64| m >= offset && values.get((m - offset) as usize).is_some_and(|&v| v > 0.0);
        let lo = (certain.max(offset)..=possible.min(offset + values.len() as u64))
            .find(|&m| positive(m));
        let Some(lo) = lo else {
            return Err(impossible(format!(
                "the likelihood is zero on every total the raster can produce ({certain} to {possible}): give a positive value for at least one of them"
            )));
        };
        let hi = (lo..=possible.min(offset + values.len() as u64))
            .rev()
            .find(|&m| positive(m))
            .unwrap_or(lo);
        Ok(Evidence {
            form: Form::Likelihood { offset, values },
            support: (lo, hi),
            certain,
            possible,
        })
    }

    pub fn form(&self) -> &Form {
        &self.form
    }

    /// The exact observed total, when that is the form.
    pub fn total(&self) -> Option<u64> {
        match self.form {
            Form::Total(m) => Some(m),
            _ => None,
        }
    }

    /// The one total the evidence allows, when it allows one only (an exact total, a range of
    /// width zero, detection 1, a likelihood with one positive weight in the raster's reach).
    pub fn single(&self) -> Option<u64> {
        (self.support.0 == self.support.1).then_some(self.support.0)
    }

    /// Totals with positive weight that the raster can produce, [lo, hi].
    pub fn support(&self) -> (u64, u64) {
        self.support
    }

    /// A short canonical text naming the evidence, for cache keys.
    pub fn key(&self) -> String {
        match &self.form {
            Form::Total(m) => format!("total:{m}"),
            Form::Range { min, max } => format!("range:{min}:{max}"),
            Form::Detected {
                detected,
                detection,
            } => format!("detected:{detected}:{:016x}", detection.to_bits()),
            Form::Likelihood { offset, values } => {
                use sha2::{Digest, Sha256};
                let mut h = Sha256::new();
                for v in values {
                    h.update(v.to_bits().to_le_bytes());
                }
                let d = h.finalize();
                let hex: String = d.iter().take(16).map(|b| format!("{b:02x}")).collect();
                format!("likelihood:{offset}:{}:{hex}", values.len())
            }
        }
    }

    /// A first guess at where the posterior of the total sits, from a normal approximation of
    /// the prior (mean, sd) and of the weights; the normaliser refines it.
    pub(crate) fn centre_guess(&self, prior_mean: f64, prior_sd: f64) -> f64 {
        let (lo, hi) = (self.support.0 as f64, self.support.1 as f64);
        let combine = |mean: f64, var: f64| {
            let v0 = (prior_sd * prior_sd).max(1e-300);
            let var = var.max(1e-300);
            (prior_mean / v0 + mean / var) / (1.0 / v0 + 1.0 / var)
        };
        let guess = match &self.form {
            Form::Total(m) => *m as f64,
            Form::Range { .. } => prior_mean,
            Form::Detected {
                detected,
                detection,
            } => {
                let d = *detected as f64;
                combine(
                    d / detection,
                    d * (1.0 - detection) / (detection * detection),
                )
            }
            Form::Likelihood { offset, values } => {
                let s: f64 = values.iter().sum();
                let mean: f64 = values
                    .iter()
                    .enumerate()
                    .map(|(i, v)| v * (*offset as f64 + i as f64))
                    .sum::<f64>()
                    / s;
                let var: f64 = values
                    .iter()
                    .enumerate()
                    .map(|(i, v)| v * (*offset as f64 + i as f64 - mean).powi(2))
                    .sum::<f64>()
                    / s;
                combine(mean, var)
            }
        };
        guess.clamp(lo, hi)
    }

    /// ln w(m) - `log_base(a, b)` for m in [a, b] (a subset of the support; minus infinity
    /// where the weight is zero), with a bound on the absolute error of each computed value.
    /// Weights are relative to a total in the window, so nothing outside it adds error.
    pub(crate) fn log_weights(&self, a: u64, b: u64) -> (Vec<f64>, Vec<f64>) {
        let u = UNIT_ROUNDOFF;
        let n = (b - a + 1) as usize;
        match &self.form {
            Form::Total(_) | Form::Range { .. } => (vec![0.0; n], vec![0.0; n]),
            Form::Likelihood { offset, values } => {
                let base = self.log_base(a, b);
                let mut x = Vec::with_capacity(n);
                let mut e = Vec::with_capacity(n);
                for m in a..=b {
                    let v = values[(m - offset) as usize];
                    if v == 0.0 {
                        x.push(f64::NEG_INFINITY);
                        e.push(0.0);
                        continue;
                    }
                    let l = v.ln() - base;
                    // ln within an ulp of each result (common practice for libm), one subtraction.
                    x.push(l);
                    e.push(2.0 * u * (v.ln().abs() + base.abs()) + u * l.abs());
                }
                (x, e)
            }
            Form::Detected {
                detected,
                detection,
            } => {
                let mut x = Vec::with_capacity(n);
                let mut e = Vec::with_capacity(n);
                let (mut acc, mut err) = (0.0f64, 0.0f64);
                x.push(0.0);
                e.push(0.0);
                for m in a..b {
                    let (step, step_err) = detection_step(m, *detected, *detection);
                    acc += step;
                    err += step_err + u * acc.abs();
                    x.push(acc);
                    e.push(err);
                }
                (x, e)
            }
        }
    }

    /// An upper bound on max over support totals m outside [a, b] of
    /// ln w(m) - `log_base(a, b)` - lt (m - a) (the tilted log-weight, on the same footing as
    /// `log_weights`); minus infinity when the support lies inside the window.
    pub(crate) fn sup_outside(&self, a: u64, b: u64, lt: f64) -> f64 {
        let (lo, hi) = self.support;
        let slack = 1e-9;
        let tilted = |m: u64, lw: f64| lw - lt * (m as f64 - a as f64);
        match &self.form {
            Form::Total(_) => f64::NEG_INFINITY,
            Form::Range { .. } => {
                // Linear in m: the largest value on each outside piece is at one of its ends.
                let mut best = f64::NEG_INFINITY;
                for m in [lo, a.saturating_sub(1), b + 1, hi] {
                    if m >= lo && m <= hi && (m < a || m > b) {
                        best = best.max(tilted(m, 0.0));
                    }
                }
                best + slack * best.abs().max(1.0)
            }
            Form::Likelihood { offset, values } => {
                let base = self.log_base(a, b);
                let mut best = f64::NEG_INFINITY;
                for m in (lo..a).chain(b + 1..=hi) {
                    let v = values[(m - offset) as usize];
                    if v > 0.0 {
                        best = best.max(tilted(m, v.ln() - base));
                    }
                }
                best + slack * best.abs().max(1.0)
            }
            Form::Detected {
                detected,
                detection,
            } => {
                // ln w(m) - lt m is concave in m: on each outside piece, walk from the window
                // towards the far end while the tilted weight still grows.
                let mut best = f64::NEG_INFINITY;
                if b < hi {
                    let (mut acc, mut m) = (0.0f64, a);
                    while m < b {
                        acc += detection_step(m, *detected, *detection).0;
                        m += 1;
                    }
                    loop {
                        let next = acc + detection_step(m, *detected, *detection).0;
                        if m + 1 > hi {
                            break;
                        }
                        let grows = tilted(m + 1, next) > tilted(m, acc);
                        acc = next;
                        m += 1;
                        best = best.max(tilted(m, acc));
                        if !grows {
                            break;
                        }
                    }
                }
                if a > lo {
                    let (mut acc, mut m) = (0.0f64, a);
                    loop {
                        if m == lo {
                            break;
                        }
                        let prev = acc - detection_step(m - 1, *detected, *detection).0;
                        let grows = tilted(m - 1, prev) > tilted(m, acc) || m == a;
                        acc = prev;
                        m -= 1;
                        best = best.max(tilted(m, acc));
                        if !grows {
                            break;
                        }
                    }
                }
                best + slack * best.abs().max(1.0)
            }
        }
    }

    /// The absolute ln weight that `log_weights(a, b)` and `sup_outside(a, b, _)` are relative
    /// to: ln w(a), or for the general form ln of the first positive weight in [a, b].
    pub(crate) fn log_base(&self, a: u64, b: u64) -> f64 {
        match &self.form {
            Form::Total(_) | Form::Range { .. } => 0.0,
            Form::Likelihood { offset, values } => (a..=b)
                .map(|m| values[(m - offset) as usize])
                .find(|&v| v > 0.0)
                .map_or(0.0, f64::ln),
            Form::Detected {
                detected,
                detection,
            } => {
                // ln C(a, d) + d ln(p) + (a - d) ln(1 - p).
                let d = *detected;
                let ln_choose: f64 = (1..=d.min(a - d))
                    .map(|i| ((a - d.min(a - d) + i) as f64 / i as f64).ln())
                    .sum();
                let tail = if a > d {
                    (a - d) as f64 * (-detection).ln_1p()
                } else {
                    0.0
                };
                ln_choose + d as f64 * detection.ln() + tail
            }
        }
    }

    /// The cells with p = 1 and with p > 0 of the raster this evidence was checked against.
    pub(crate) fn reach(&self) -> (u64, u64) {
        (self.certain, self.possible)
    }
}

/// ln w(m + 1) - ln w(m) for the detection likelihood w(m) = C(m, d) p^d (1 - p)^(m - d),
/// m >= d, and a bound on its absolute error: ln((m + 1) / (m + 1 - d)) + ln(1 - p).
fn detection_step(m: u64, d: u64, p: f64) -> (f64, f64) {
    let u = UNIT_ROUNDOFF;
    let ratio = d as f64 / (m + 1 - d) as f64;
    let a = ratio.ln_1p();
    let b = (-p).ln_1p();
    let s = a + b;
    // ln_1p within an ulp (common practice for libm), the division one rounding, the sum one.
    (s, 3.0 * u * a.abs() + 2.0 * u * b.abs() + u * s.abs())
}

fn bounds(raster: &Raster) -> (u64, u64) {
    let s = raster.stats();
    (s.certain, s.certain + s.free)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn raster() -> Raster {
        // Two certain cells, one impossible (p = 0), two free: totals 2 ..= 4 can happen.
        Raster::new(
            5,
            1,
            vec![Some(1.0), Some(1.0), Some(0.0), Some(0.5), Some(0.2)],
        )
        .unwrap()
    }

    #[test]
    fn totals_outside_the_raster_s_range_are_refused() {
        let r = raster();
        for m in [0, 1, 5] {
            assert!(matches!(
                Evidence::exact_total(m, &r),
                Err(EngineError::ImpossibleTotal(ImpossibleTotal {
                    certain: 2,
                    possible: 4,
                    ..
                }))
            ));
        }
        for m in 2..=4 {
            assert_eq!(Evidence::exact_total(m, &r).unwrap().total(), Some(m));
        }
    }

    #[test]
    fn every_form_is_cut_to_what_the_raster_can_produce() {
        let r = raster();
        assert_eq!(Evidence::range(0, 3, &r).unwrap().support(), (2, 3));
        assert_eq!(Evidence::range(3, 3, &r).unwrap().single(), Some(3));
        assert!(Evidence::range(5, 9, &r).is_err());
        assert!(Evidence::range(3, 2, &r).is_err());
        assert_eq!(Evidence::detected(1, 0.5, &r).unwrap().support(), (2, 4));
        assert_eq!(Evidence::detected(3, 1.0, &r).unwrap().single(), Some(3));
        assert!(Evidence::detected(5, 0.5, &r).is_err());
        assert!(Evidence::detected(1, 1.0, &r).is_err());
        for bad in [0.0, -0.1, 1.5, f64::NAN] {
            assert!(Evidence::detected(1, bad, &r).is_err(), "{bad}");
        }
        let l = Evidence::likelihood(1, vec![0.3, 0.0, 0.2, 0.0, 0.7], &r).unwrap();
        assert_eq!(l.support(), (3, 3));
        assert!(Evidence::likelihood(0, vec![1.0, 1.0, 0.0, 0.0, 0.0], &r).is_err());
        assert!(Evidence::likelihood(0, vec![-1.0], &r).is_err());
        assert!(Evidence::likelihood(u64::MAX, vec![1.0], &r).is_err());
    }

    #[test]
    fn detection_weights_follow_the_binomial_pmf() {
        let r = Raster::from_probabilities(40, 1, vec![0.5; 40]).unwrap();
        let e = Evidence::detected(7, 0.3, &r).unwrap();
        let (x, err) = e.log_weights(9, 30);
        // reference: statrs::distribution::Binomial pmf, ln Binomial(7; m, 0.3)
        use statrs::distribution::{Binomial, Discrete};
        let at = |m: u64| Binomial::new(0.3, m).unwrap().ln_pmf(7);
        for (i, (&v, &e)) in x.iter().zip(&err).enumerate() {
            let m = 9 + i as u64;
            let want = at(m) - at(9);
            assert!((v - want).abs() <= 1e-12, "m {m}: {v} vs {want}");
            assert!(e < 1e-13, "m {m}: error bound {e}");
        }
        assert!((e.log_base(12, 20) - at(12)).abs() < 1e-12);
        // The tilted weight outside [9, 30] peaks next to the window for a flat tilt: its
        // bound is at least every outside value.
        for lt in [0.0, -0.5, 1.0] {
            let sup = e.sup_outside(9, 30, lt);
            for m in (7..9).chain(31..=40) {
                let v = at(m) - at(9) - lt * (m as f64 - 9.0);
                assert!(v <= sup, "lt {lt}, m {m}: {v} above {sup}");
            }
        }
    }
}
