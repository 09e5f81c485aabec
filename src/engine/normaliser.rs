//! The normaliser: everything about the raster's total given the evidence, computed once per
//! (raster, evidence) and shared by every zone request on them.
//!
//! It holds the tilt, certified bounds on the denominator of every conditional pmf, and the
//! total check reported to users: is the evidence plausible under the raster at all, and what
//! does it say about the true total?
//!
//! One exact total m: the denominator is P~(free total = m - certain), the tilt centred there.
//! Evidence allowing several totals (a range, detection, a likelihood): the tilt no longer
//! cancels across totals, so each total j of the free cells is weighed in log space by
//! E(j) = w(j + certain) t^(-j) / const, the tilt re-centred on the posterior of the total until
//! it settles. The weights become a slack count (`slack`) that the tree pass convolves into its
//! outside law, so every zone's law is the exact mixture over totals with no change to the
//! pass. Z, its bracket and the total's posterior come from the same weights.

use super::certify::{certify, Sum};
use super::control::Control;
use super::error::EngineError;
use super::evidence::{Evidence, Form};
use super::law::{Law, FFT_MIN_LEN};
use super::model::{Raster, MIN_TOLERANCE};
use super::rounding::{gamma, UNIT_ROUNDOFF};
use super::sets::{trims_for, Cells};
use super::summary::summarise;
use super::tilt::{self, Tilt};

/// Tail probability below which the observed total is called implausible.
pub const IMPLAUSIBLE_TAIL: f64 = 1e-6;

/// Share of the tightest tolerance the normaliser's own truncation may use: its error then
/// stays three orders below any request's budget.
const NORMALISER_SHARE: f64 = 1e-3;

/// How the evidence sits against the raster's prior, and what it says about the true total.
#[derive(Clone, Debug, PartialEq)]
pub struct TotalCheck {
    /// The evidence's form: `total`, `range`, `detected` or `likelihood`.
    pub evidence: &'static str,
    /// The observed count: the exact total, or the detected count; `None` for a range or a
    /// likelihood.
    pub observed: Option<u64>,
    /// Prior mean and sd of the total: sum p and sqrt(sum p(1-p)).
    pub prior_mean: f64,
    pub prior_sd: f64,
    /// The central `prior_level` interval of the prior total.
    pub prior_interval: (u64, u64),
    pub prior_level: f64,
    /// How far the observation is from the prior, in prior sd; `None` when the sd is zero.
    /// For a range or a likelihood, from the nearest end of the totals it allows (0 inside).
    pub z_score: Option<f64>,
    /// Tail probabilities of the observation under the prior: P(total <= observed) and
    /// P(total >= observed) for an exact total; P(total <= max) and P(total >= min) for a range
    /// or a likelihood (over the totals it allows); for a detected count, the same tails of
    /// the detected count (the raster thinned by the detection rate).
    pub p_at_most: f64,
    pub p_at_least: f64,
    /// ln P(observation) under the prior.
    pub log_likelihood: f64,
    /// Set when either tail is below `IMPLAUSIBLE_TAIL`.
    pub warning: Option<String>,
    /// The posterior of the true total; `None` for an exact total (it is that total).
    pub posterior: Option<TotalPosterior>,
}

/// The posterior law of the true total given the evidence.
#[derive(Clone, Debug, PartialEq)]
pub struct TotalPosterior {
    /// Total of `pmf[0]`.
    pub offset: u64,
    pub pmf: Vec<f64>,
    /// Certified bound on the L1 distance from the exact pmf.
    pub error_bound: f64,
}

/// Where the free cells' total must land, and how the conditional law degenerates, if it does.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) enum Regime {
    /// The general case, computed in the tilted world.
    Tilted(Tilt),
    /// The one total allowed is 0 free events: every free cell is empty.
    AllEmpty,
    /// The one total allowed makes every free cell hold an event.
    AllFull,
}

#[derive(Clone, Debug)]
pub struct Normaliser {
    pub(crate) regime: Regime,
    /// The count the free cells and the evidence's slack together make up (see `slack`).
    pub(crate) target: u64,
    /// Certified bounds on the tilted normalising constant Z (for an exact total,
    /// P~(free total = target); otherwise sum over totals of weight x P~).
    pub(crate) z_lo: f64,
    pub(crate) z_hi: f64,
    /// For evidence allowing several totals: the tilted weights E(j) of the free totals j,
    /// stored reversed as a law of a slack count s = target - j, so that conditioning on
    /// "free total + slack = target" weighs each total j by E(j). Convolved into the outside
    /// law at the root of every tree pass; `None` for one exact total.
    pub(crate) slack: Option<Law>,
    /// L1 bound on what the computed weights' rounding moves any normalised mixture by (added
    /// to every certificate by `certify`); zero for one exact total.
    pub(crate) weights_error: f64,
    pub check: TotalCheck,
    law_len: usize,
}

/// The prior's central 99% interval is reported at this level.
pub(crate) const PRIOR_LEVEL: f64 = 0.99;
/// Re-centring steps of the tilt on the posterior mean of the total (each one law build); the
/// results never depend on the tilt, only the windows' widths do.
const MAX_RECENTRE: usize = 8;

/// What the exact-total computation leaves.
struct Exact {
    regime: Regime,
    target: u64,
    z_lo: f64,
    z_hi: f64,
    law_len: usize,
    /// The prior's central interval, when the tilted law's window holds the prior.
    prior: Option<(u64, u64)>,
    /// P(total <= m), P(total >= m), ln P(total = m) under the prior.
    p_at_most: f64,
    p_at_least: f64,
    log_eq: f64,
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
        let prior_mean = stats.sum_p;
        let prior_sd = stats.sum_var.sqrt();
        let (lo, hi) = evidence.support();
        if let Some(m) = evidence.single() {
            let e = exact(raster, m, control)?;
            let prior_interval = match e.prior {
                Some(p) => p,
                None => prior_interval(raster, control)?,
            };
            let observed = match evidence.form() {
                Form::Total(m) => Some(*m),
                Form::Detected { detected, .. } => Some(*detected),
                _ => None,
            };
            let (z_score, p_at_most, p_at_least, log_likelihood) = match evidence.form() {
                Form::Total(_) => (
                    (prior_sd > 0.0).then(|| (m as f64 - prior_mean) / prior_sd),
                    e.p_at_most,
                    e.p_at_least,
                    e.log_eq,
                ),
                _ => plausibility(
                    raster,
                    evidence,
                    e.log_eq + evidence.log_base(m, m),
                    control,
                )?,
            };
            let posterior = evidence.total().is_none().then(|| TotalPosterior {
                offset: m,
                pmf: vec![1.0],
                error_bound: 0.0,
            });
            let check = total_check(
                evidence,
                observed,
                (prior_mean, prior_sd, prior_interval),
                z_score,
                (p_at_most, p_at_least),
                log_likelihood,
                posterior,
            );
            return Ok(Normaliser {
                regime: e.regime,
                target: e.target,
                z_lo: e.z_lo,
                z_hi: e.z_hi,
                slack: None,
                weights_error: 0.0,
                check,
                law_len: e.law_len,
            });
        }

        // Several totals: tilt near the posterior of the total, weigh each total in log space.
        let values = raster.values();
        let certain = stats.certain;
        let free = stats.free;
        let free_mean = prior_mean - certain as f64;
        let mut centre = evidence.centre_guess(prior_mean, prior_sd);
        let mut attempt = 0;
        let (tilt, law, window) = loop {
            attempt += 1;
            control.check()?;
            let target = (centre - certain as f64).clamp(0.5, free as f64 - 0.5);
            let tilt = tilt::solve(values, free, free_mean, target);
            let eps = NORMALISER_SHARE * MIN_TOLERANCE * 0.25
                / tilt.var.sqrt().max(1.0)
                / trims_for(values.len()) as f64;
            let law = Cells {
                values,
                t: tilt.t,
                eps,
                fft_min: FFT_MIN_LEN,
            }
            .law_of_span(0, values.len());
            let (wa, wb) = (lo.max(certain + law.lo), hi.min(certain + law.hi()));
            if wa > wb {
                // The support lies beyond this law's reach: move the centre onto it.
                centre = if hi < certain + law.lo { hi } else { lo } as f64;
                if attempt < MAX_RECENTRE {
                    continue;
                }
                return Err(out_of_reach(evidence));
            }
            let mean = posterior_mean(evidence, &law, &tilt, certain, (wa, wb));
            if !mean.is_finite() {
                return Err(out_of_reach(evidence));
            }
            let settled = (mean - centre).abs() <= 0.5 * tilt.var.sqrt() + 0.5;
            if settled || attempt >= MAX_RECENTRE {
                break (tilt, law, (wa, wb));
            }
            centre = mean;
        };
        control.check()?;
        let prior_interval = match prior_from(&law, &tilt, certain) {
            Some(p) => p,
            None => prior_interval(raster, control)?,
        };
        let weighed = weigh(evidence, &law, &tilt, certain, window);
        if weighed.z.is_nan() || weighed.z <= 0.0 {
            return Err(out_of_reach(evidence));
        }
        let z_lo = (weighed.z - law.abs_err).max(0.0) * (1.0 - weighed.gamma);
        let z_hi = ((weighed.z + law.abs_err) * (1.0 + weighed.gamma) + weighed.unseen)
            * (1.0 + 2.0 * UNIT_ROUNDOFF);
        let log_z = weighed.z.ln() + weighed.log_scale + tilt.log_c;
        let (z_score, p_at_most, p_at_least, log_likelihood) =
            plausibility(raster, evidence, log_z, control)?;
        let mut normaliser = Normaliser {
            regime: Regime::Tilted(tilt),
            target: weighed.slack.hi_total - certain,
            z_lo,
            z_hi,
            slack: Some(weighed.slack.law),
            weights_error: weighed.weights_error,
            check: total_check(
                evidence,
                match evidence.form() {
                    Form::Detected { detected, .. } => Some(*detected),
                    _ => None,
                },
                (prior_mean, prior_sd, prior_interval),
                z_score,
                (p_at_most, p_at_least),
                log_likelihood,
                None,
            ),
            law_len: law.len(),
        };
        let certificate = certify(
            &normaliser,
            &Sum {
                s: weighed.z,
                rounding: law.rounding + 1,
                len: weighed.posterior.len(),
                fft: law.abs_err,
                dropped: weighed.unseen,
            },
        );
        let (offset, pmf) = trimmed_pmf(weighed.offset, weighed.posterior, weighed.z);
        normaliser.check.posterior = Some(TotalPosterior {
            offset,
            pmf,
            error_bound: certificate.bound,
        });
        Ok(normaliser)
    }

    /// Bytes held (for cache accounting).
    pub fn heap_bytes(&self) -> usize {
        std::mem::size_of::<Normaliser>()
            + self.law_len * 8
            + self.slack.as_ref().map_or(0, |s| s.len() * 8)
            + self.check.posterior.as_ref().map_or(0, |p| p.pmf.len() * 8)
            + self.check.warning.as_ref().map_or(0, |w| w.len())
    }
}

/// The evidence's totals carry no prior mass that f64 can represent.
fn out_of_reach(evidence: &Evidence) -> EngineError {
    let (lo, hi) = evidence.support();
    EngineError::ImpossibleEvidence(format!(
        "the evidence allows totals {lo} to {hi} only, where this raster's prior probability is too small to compute (below 1e-300): check that the raster is calibrated and the evidence is stated as intended"
    ))
}

/// The normaliser's pieces for one exact total m.
fn exact(raster: &Raster, total: u64, control: &Control) -> Result<Exact, EngineError> {
    let stats = *raster.stats();
    control.check()?;
    let target = total - stats.certain;
    let free_mean = stats.sum_p - stats.certain as f64;
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
        return Ok(Exact {
            regime: if all_empty {
                Regime::AllEmpty
            } else {
                Regime::AllFull
            },
            target,
            z_lo: 1.0,
            z_hi: 1.0,
            law_len: 1,
            prior: None,
            p_at_most,
            p_at_least,
            log_eq: log_p,
        });
    }

    let tilt = tilt::solve(values, stats.free, free_mean, target as f64);
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
    Ok(Exact {
        regime: Regime::Tilted(tilt),
        target,
        z_lo,
        z_hi,
        law_len: law.len(),
        prior: prior_from(&law, &tilt, stats.certain),
        p_at_most,
        p_at_least,
        log_eq,
    })
}

/// Prior mass the tilted law's window may miss for the prior interval to be read off it: below
/// this no quantile at 0.5% or 99.5% can move but on a tie within it.
const PRIOR_COVER: f64 = 1e-9;

/// The central `PRIOR_LEVEL` interval of the prior total read off the tilted law of the free
/// total (P(total = j) = P~(j) e^(log_c - theta j)), when its window holds all but
/// `PRIOR_COVER` of the prior's mass; `None` otherwise (the total sits far in the prior's tail).
fn prior_from(law: &Law, tilt: &Tilt, certain: u64) -> Option<(u64, u64)> {
    let pmf: Vec<f64> = law
        .values
        .iter()
        .enumerate()
        .map(|(i, &v)| {
            if v > 0.0 {
                (v.ln() + tilt.log_c - tilt.theta * (law.lo + i as u64) as f64).exp()
            } else {
                0.0
            }
        })
        .collect();
    let mass: f64 = pmf.iter().sum();
    if mass.is_nan() || (1.0 - mass).abs() > PRIOR_COVER {
        return None;
    }
    let s = summarise(certain + law.lo, &pmf, PRIOR_LEVEL, &[]);
    Some((s.interval.lower, s.interval.upper))
}

/// The central `PRIOR_LEVEL` interval of the prior total, from its untilted law.
pub(crate) fn prior_interval(
    raster: &Raster,
    control: &Control,
) -> Result<(u64, u64), EngineError> {
    let stats = raster.stats();
    if stats.free == 0 {
        return Ok((stats.certain, stats.certain));
    }
    control.check()?;
    let values = raster.values();
    let law = Cells {
        values,
        t: 1.0,
        eps: 1e-3 * (1.0 - PRIOR_LEVEL) / trims_for(values.len()) as f64,
        fft_min: FFT_MIN_LEN,
    }
    .law_of_span(0, values.len());
    let s = summarise(stats.certain + law.lo, &law.values, PRIOR_LEVEL, &[]);
    Ok((s.interval.lower, s.interval.upper))
}

/// z score, P(at most), P(at least) and ln P(observation) for evidence other than one exact
/// total (`log_likelihood` as computed by the caller).
fn plausibility(
    raster: &Raster,
    evidence: &Evidence,
    log_likelihood: f64,
    control: &Control,
) -> Result<(Option<f64>, f64, f64, f64), EngineError> {
    let stats = raster.stats();
    let (mean, sd) = (stats.sum_p, stats.sum_var.sqrt());
    let (lo, hi) = evidence.support();
    match evidence.form() {
        Form::Detected {
            detected,
            detection,
        } => {
            // The detected count is itself a sum of independent cells, each an event found
            // with probability p x detection.
            let thinned: Vec<f64> = raster.values().iter().map(|&p| p * detection).collect();
            let thinned = Raster::from_probabilities(raster.width(), raster.height(), thinned)?;
            let t = thinned.stats();
            let e = exact(&thinned, *detected, control)?;
            let tsd = t.sum_var.sqrt();
            let z = (tsd > 0.0).then(|| (*detected as f64 - t.sum_p) / tsd);
            Ok((z, e.p_at_most, e.p_at_least, log_likelihood))
        }
        _ => {
            let (certain, possible) = evidence.reach();
            let p_at_least = if lo <= certain {
                1.0
            } else {
                exact(raster, lo, control)?.p_at_least
            };
            let p_at_most = if hi >= possible {
                1.0
            } else {
                exact(raster, hi, control)?.p_at_most
            };
            let z = (sd > 0.0).then(|| {
                if mean < lo as f64 {
                    (lo as f64 - mean) / sd
                } else if mean > hi as f64 {
                    (hi as f64 - mean) / sd
                } else {
                    0.0
                }
            });
            Ok((z, p_at_most, p_at_least, log_likelihood))
        }
    }
}

/// The tilted weights of the totals in `window` and what the normaliser and the tree need of
/// them.
struct Weighed {
    slack: Slack,
    /// Computed Z = sum over the window of E(j) P~(j).
    z: f64,
    /// The posterior numerators E(j) P~(j) of totals offset, offset + 1, ...
    offset: u64,
    posterior: Vec<f64>,
    /// Bound on what Z misses beyond the computed sum: weights outside the window, or trimmed,
    /// meeting the law's dropped mass.
    unseen: f64,
    /// Relative error bound of the computed sum (the law's roundings and the sum's).
    gamma: f64,
    /// What the computed weights' own errors can move a normalised mixture by, in L1.
    weights_error: f64,
    /// ln of the factor taking computed weights back to w(m) e^{-theta j}: ln P(observation) =
    /// ln z + log_scale + log_c.
    log_scale: f64,
}

struct Slack {
    law: Law,
    /// The largest total kept: slack count 0 stands for it.
    hi_total: u64,
}

/// ln w(m) - lt (m - a) on the window, with the error bound of each value.
fn tilted_log_weights(evidence: &Evidence, lt: f64, window: (u64, u64)) -> (Vec<f64>, Vec<f64>) {
    let (a, b) = window;
    let (x, err) = evidence.log_weights(a, b);
    let u = UNIT_ROUNDOFF;
    let y: Vec<f64> = x
        .iter()
        .enumerate()
        .map(|(i, &x)| x - lt * i as f64)
        .collect();
    let e = err
        .iter()
        .zip(&y)
        .enumerate()
        .map(|(i, (&e, &y))| {
            // lt within an ulp of ln t, the product and the difference one rounding each.
            e + 2.0 * u * (lt * i as f64).abs() + u * y.abs()
        })
        .collect();
    (y, e)
}

/// The posterior mean of the total from the law around the current tilt (for re-centring).
fn posterior_mean(
    evidence: &Evidence,
    law: &Law,
    tilt: &Tilt,
    certain: u64,
    window: (u64, u64),
) -> f64 {
    let lt = tilt.t.ln();
    let (y, _) = tilted_log_weights(evidence, lt, window);
    let top = y.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let (mut s, mut sm) = (0.0, 0.0);
    for (i, &y) in y.iter().enumerate() {
        let m = window.0 + i as u64;
        let v = (y - top).exp() * law.at(m - certain);
        s += v;
        sm += v * m as f64;
    }
    sm / s
}

fn weigh(evidence: &Evidence, law: &Law, tilt: &Tilt, certain: u64, window: (u64, u64)) -> Weighed {
    let u = UNIT_ROUNDOFF;
    let lt = tilt.t.ln();
    let (a, b) = window;
    let (y, err) = tilted_log_weights(evidence, lt, window);
    let top = y.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let raw: Vec<f64> = y.iter().map(|&y| (y - top).exp()).collect();
    let total: f64 = raw.iter().sum();
    // E(j) = raw / total sums to 1 (within rounding): a sub-probability law, as the kernels'
    // mass arguments require.
    let mut weights = Law {
        lo: a,
        values: raw.iter().map(|&r| r / total).collect(),
        dropped: 0.0,
        rounding: 0,
        abs_err: 0.0,
    };
    // Weights too small to matter are trimmed with the law's own budget scale.
    let before = (weights.lo, weights.hi());
    weights.trim(law.dropped.max(f64::MIN_POSITIVE) * 1e-3);
    let trimmed_mass = weights.dropped;
    let (ka, kb) = (weights.lo, weights.hi());
    debug_assert!(ka >= before.0 && kb <= before.1);
    // Relative error of each kept weight against w(m) t^(-j) / const: its log's error, the
    // shift, exp and the division (three roundings).
    let delta: Vec<f64> = (ka..=kb)
        .map(|m| {
            let i = (m - a) as usize;
            if raw[i] == 0.0 {
                0.0
            } else {
                err[i] + u * (y[i] - top).abs() + 3.0 * u
            }
        })
        .collect();
    let sup_out = evidence.sup_outside(a, b, lt);
    let sup_weight = if sup_out == f64::NEG_INFINITY {
        0.0
    } else {
        (sup_out - top).exp() / total
    };
    let posterior: Vec<f64> = (ka..=kb)
        .map(|m| weights.at(m) * law.at(m - certain))
        .collect();
    let z: f64 = posterior.iter().sum();
    let max_law = law.values.iter().cloned().fold(0.0, f64::max);
    let unseen = law.dropped * sup_weight.max(1.0) + trimmed_mass * max_law * (1.0 + 1e-9);
    let len = posterior.len() as u64;
    // The computed weights are taken as the exact input of the pass; what they differ from the
    // true weights by moves any normalised mixture by at most 2 sum_j pi_j delta_j in L1
    // (pi the posterior of the total), with slack for pi being computed.
    let weights_error = 2.0
        * posterior
            .iter()
            .zip(&delta)
            .map(|(p, d)| p * d)
            .sum::<f64>()
        / z
        * (1.0 + 1e-6);
    let gamma_sum = gamma(law.rounding + len + 2);
    // Slack orientation: slack s = kb - j.
    let slack = Law {
        lo: 0,
        values: weights.values.iter().rev().cloned().collect(),
        dropped: trimmed_mass,
        rounding: 0,
        abs_err: 0.0,
    };
    let log_scale = evidence.log_base(a, b) + top + total.ln() - lt * (a - certain) as f64;
    Weighed {
        slack: Slack {
            law: slack,
            hi_total: kb,
        },
        z,
        offset: ka,
        posterior,
        unseen,
        gamma: gamma_sum,
        weights_error,
        log_scale,
    }
}

/// Trims exact zeros from both ends and divides by the sum.
fn trimmed_pmf(offset: u64, g: Vec<f64>, s: f64) -> (u64, Vec<f64>) {
    if s <= 0.0 {
        return (offset, vec![1.0]);
    }
    let first = g.iter().position(|&x| x > 0.0).unwrap_or(0);
    let last = g.iter().rposition(|&x| x > 0.0).unwrap_or(0);
    (
        offset + first as u64,
        g[first..=last].iter().map(|&x| x / s).collect(),
    )
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
    evidence: &Evidence,
    observed: Option<u64>,
    prior: (f64, f64, (u64, u64)),
    z_score: Option<f64>,
    (p_at_most, p_at_least): (f64, f64),
    log_likelihood: f64,
    posterior: Option<TotalPosterior>,
) -> TotalCheck {
    let (prior_mean, prior_sd, prior_interval) = prior;
    let low = p_at_most.min(p_at_least);
    let stated = match evidence.form() {
        Form::Total(m) => format!("observed {m}"),
        Form::Range { min, max } => format!("range {min} to {max}"),
        Form::Detected {
            detected,
            detection,
        } => format!("{detected} detected at detection rate {detection}"),
        Form::Likelihood { .. } => {
            let (lo, hi) = evidence.support();
            format!("likelihood over totals {lo} to {hi}")
        }
    };
    let warning = (low < IMPLAUSIBLE_TAIL).then(|| {
        format!(
            "the observed total is implausible under this raster: it may be miscalibrated ({stated}, prior mean {prior_mean:.1}, sd {prior_sd:.1}, tail probability {low:.2e})"
        )
    });
    TotalCheck {
        evidence: match evidence.form() {
            Form::Total(_) => "total",
            Form::Range { .. } => "range",
            Form::Detected { .. } => "detected",
            Form::Likelihood { .. } => "likelihood",
        },
        observed,
        prior_mean,
        prior_sd,
        prior_interval,
        prior_level: PRIOR_LEVEL,
        z_score,
        p_at_most,
        p_at_least,
        log_likelihood,
        warning,
        posterior,
    }
}
