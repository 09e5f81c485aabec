//! The normaliser: everything about the raster's total given the observed count, computed once
//! per (raster, total) and shared by every zone request on them.
//!
//! It holds the tilt, the tilted law of the free total around the observed count, certified
//! bounds on P~(total = m) (the denominator of every conditional pmf) and the total check
//! reported to users: is the observed total plausible under the raster at all?

use super::control::Control;
use super::error::EngineError;
use super::evidence::Evidence;
use super::law::{Law, FFT_MIN_LEN};
use super::model::{Raster, MIN_TOLERANCE};
use super::rounding::{gamma, UNIT_ROUNDOFF};
use super::sets::{trims_for, Cells};
use super::tilt::{self, Tilt};

/// Tail probability below which the observed total is called implausible.
pub const IMPLAUSIBLE_TAIL: f64 = 1e-6;

/// Share of the tightest tolerance the normaliser's own truncation may use: its error then
/// stays three orders below any request's budget.
const NORMALISER_SHARE: f64 = 1e-3;

/// How the observed total sits against the raster's prior.
#[derive(Clone, Debug, PartialEq)]
pub struct TotalCheck {
    pub observed: u64,
    /// Prior mean and sd of the total: sum p and sqrt(sum p(1-p)).
    pub prior_mean: f64,
    pub prior_sd: f64,
    /// (observed - mean) / sd; `None` when the sd is zero.
    pub z_score: Option<f64>,
    /// P(total <= observed) and P(total >= observed) under the prior.
    pub p_at_most: f64,
    pub p_at_least: f64,
    /// ln P(total = observed) under the prior.
    pub log_p_equal: f64,
    /// Set when either tail is below `IMPLAUSIBLE_TAIL`.
    pub warning: Option<String>,
}

/// Where the free cells' total must land, and how the conditional law degenerates, if it does.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) enum Regime {
    /// 0 < target < free: the general case, computed in the tilted world.
    Tilted(Tilt),
    /// target = 0: every free cell is empty.
    AllEmpty,
    /// target = free: every free cell holds an event.
    AllFull,
}

#[derive(Clone, Debug)]
pub struct Normaliser {
    pub(crate) regime: Regime,
    /// Observed total m and the part the free cells must make up, m - (cells with p = 1).
    pub(crate) total: u64,
    pub(crate) target: u64,
    /// Certified bounds on the tilted P~(free total = target).
    pub(crate) z_lo: f64,
    pub(crate) z_hi: f64,
    pub check: TotalCheck,
    law_len: usize,
}

impl Normaliser {
    /// Computes the normaliser of `raster` for observed total `total`, checking the total.
    ///
    /// Occurs as `ImpossibleTotal` when the total is below the number of cells with p = 1 or
    /// above the number with p > 0; as `Cancelled` when `control` asks.
    pub fn new(raster: &Raster, total: u64, control: &Control) -> Result<Normaliser, EngineError> {
        Normaliser::of(raster, &Evidence::exact_total(total, raster)?, control)
    }

    /// Computes the normaliser of `raster` for evidence already checked against it.
    ///
    /// Occurs as `Cancelled` when `control` asks.
    pub fn of(
        raster: &Raster,
        evidence: &Evidence,
        control: &Control,
    ) -> Result<Normaliser, EngineError> {
        let stats = *raster.stats();
        let total = evidence.total();
        control.check()?;
        let target = total - stats.certain;
        let prior_mean = stats.sum_p;
        let prior_sd = stats.sum_var.sqrt();
        let z_score = (prior_sd > 0.0).then(|| (total as f64 - prior_mean) / prior_sd);
        let free_mean = prior_mean - stats.certain as f64;
        let values = raster.values();

        if target == 0 || target == stats.free {
            let all_empty = target == 0;
            // ln P(every free cell empty) or ln P(every free cell full).
            let log_p: f64 = values
                .iter()
                .filter(|p| tilt::is_free(**p))
                .map(|&p| if all_empty { (-p).ln_1p() } else { p.ln() })
                .sum();
            let p_eq = log_p.exp();
            let (p_at_most, p_at_least) = match (all_empty, stats.free == 0) {
                (_, true) => (1.0, 1.0),
                (true, false) => (p_eq, 1.0),
                (false, false) => (1.0, p_eq),
            };
            let check = total_check(
                total, prior_mean, prior_sd, z_score, p_at_most, p_at_least, log_p,
            );
            return Ok(Normaliser {
                regime: if all_empty {
                    Regime::AllEmpty
                } else {
                    Regime::AllFull
                },
                total,
                target,
                z_lo: 1.0,
                z_hi: 1.0,
                check,
                law_len: 1,
            });
        }

        let tilt = tilt::solve(values, stats.free, free_mean, target);
        control.check()?;
        let z_estimate = 0.25 / tilt.var.sqrt().max(1.0);
        let eps = NORMALISER_SHARE * MIN_TOLERANCE * z_estimate / trims_for(values.len()) as f64;
        let law = Cells {
            values,
            t: tilt.t,
            eps,
            fft_min: FFT_MIN_LEN,
        }
        .law_of_span(0, values.len());
        control.check()?;
        let z = law.at(target);
        let g = gamma(law.rounding);
        let z_lo = (z - law.abs_err).max(0.0) * (1.0 - g);
        let z_hi = ((z + law.abs_err) * (1.0 + g) + law.dropped) * (1.0 + 2.0 * UNIT_ROUNDOFF);

        let log_eq = z.ln() + tilt.log_c - tilt.theta * target as f64;
        let p_eq = log_eq.exp();
        let (p_at_most, p_at_least) = tails(&law, &tilt, target, free_mean, log_eq, p_eq);
        let check = total_check(
            total, prior_mean, prior_sd, z_score, p_at_most, p_at_least, log_eq,
        );
        Ok(Normaliser {
            regime: Regime::Tilted(tilt),
            total,
            target,
            z_lo,
            z_hi,
            check,
            law_len: law.len(),
        })
    }

    /// Bytes held (for cache accounting).
    pub fn heap_bytes(&self) -> usize {
        std::mem::size_of::<Normaliser>()
            + self.law_len * 8
            + self.check.warning.as_ref().map_or(0, |w| w.len())
    }

    pub fn total(&self) -> u64 {
        self.total
    }
}

/// P(total <= m) and P(total >= m) under the prior, from the tilted law around the target.
/// The tail away from the prior mean is summed directly (its weights e^{-theta (j - m)} decay),
/// the other is its complement.
fn tails(
    law: &Law,
    tilt: &Tilt,
    target: u64,
    free_mean: f64,
    log_eq: f64,
    p_eq: f64,
) -> (f64, f64) {
    let theta = tilt.theta;
    let upper_small = target as f64 >= free_mean;
    let mut s = 0.0;
    let ks: Box<dyn Iterator<Item = u64>> = if upper_small {
        Box::new((target..=law.hi()).rev())
    } else {
        Box::new(law.lo..=target)
    };
    let z = law.at(target);
    for k in ks {
        let d = k as f64 - target as f64;
        s += law.at(k) / z * (-theta * d).exp();
    }
    let small = (log_eq + s.ln()).exp().min(1.0);
    let large = (1.0 - small + p_eq).clamp(0.0, 1.0);
    if upper_small {
        (large, small)
    } else {
        (small, large)
    }
}

fn total_check(
    observed: u64,
    prior_mean: f64,
    prior_sd: f64,
    z_score: Option<f64>,
    p_at_most: f64,
    p_at_least: f64,
    log_p_equal: f64,
) -> TotalCheck {
    let low = p_at_most.min(p_at_least);
    let warning = (low < IMPLAUSIBLE_TAIL).then(|| {
        format!(
            "the observed total is implausible under this raster: it may be miscalibrated (observed {observed}, prior mean {prior_mean:.1}, sd {prior_sd:.1}, tail probability {low:.2e})"
        )
    });
    TotalCheck {
        observed,
        prior_mean,
        prior_sd,
        z_score,
        p_at_most,
        p_at_least,
        log_p_equal,
        warning,
    }
}
