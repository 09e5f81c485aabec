//! Certification: the error bound of a pmf g / sum g from what its computation dropped and how
//! many roundings it went through, and the trimming budget that keeps that bound within the
//! tolerance. The one place the certification rule is written.
//!
//! With g~ the numerators in exact arithmetic (every kernel only drops non-negative mass, so
//! g~ <= g + e where e is the FFT error, summing to at most `fft`),
//! ||g~/sum g~ - g/Z||_1 <= 2 (Z - sum g~ + 2 fft) / Z. The deficit Z - sum g~ is bounded two
//! ways, both rigorous: a posteriori by the normaliser's bracket on Z less the computed sum, and
//! a priori by the mass trimmed along the way (each trimmed unit meets a complementary law whose
//! values are at most 1). The smaller is used; the rounding term gamma(2k + len + 2) covers the
//! relative error of the values and of their normalisation. Under evidence allowing several
//! totals, the pass takes the computed weights of the totals as exact; their own error adds the
//! normaliser's `weights_error` (2 sum_j pi_j delta_j: a relative error delta_j in the weight of
//! total j moves a normalised mixture by at most that in L1).

use super::law::Law;
use super::model::Zone;
use super::normaliser::Normaliser;
use super::plan::Plan;
use super::rounding::{gamma, UNIT_ROUNDOFF};
use super::sets::trims_for;

/// Share of the tolerance all trims together may spend. The absolute contract alone would allow
/// about 1/4 of it; the relative one (1e-9 for reported values >= 1e-10) needs the dropped mass a
/// further 1e-19 / 1e-13 below, since a value 1e-10 of the peak can absorb all of it.
const TRIM_SHARE: f64 = 0.25e-6;
/// Trims charged per plan node: the private law, the fringe law and its convolution, and the two
/// outside laws of the children, with slack for the FFT path's extra restriction.
const TRIMS_PER_NODE: u64 = 8;
/// Relative slack on a running sum of dropped mass: its own rounding, n u for n terms, is far
/// below this for any law we hold.
const DROPPED_SLACK: f64 = 1e-9;
/// Roundings in evaluating the bound itself (a handful of products and sums).
const BOUND_ROUNDINGS: f64 = 8.0;
/// The L1 distance between two probability vectors is at most 2: no bound need say more.
pub(crate) const MAX_L1: f64 = 2.0;

/// The numerators g(k) = L(k) O(target - k) of one zone, with what their bound needs.
pub(crate) struct Numerators {
    pub lo: u64,
    pub g: Vec<f64>,
    /// Roundings behind each value.
    pub rounding: u64,
    /// Bound on the summed absolute error from FFT steps.
    pub fft: f64,
    /// Mass trimmed anywhere in the history of L and O.
    pub dropped: f64,
}

/// The numerators of a zone from its own law and its outside law (`None`: nothing outside can
/// reach the target, so every value is lost and the whole mass counts as dropped).
pub(crate) fn numerators(own: &Law, outside: Option<&Law>, target: u64) -> Numerators {
    let Some(o) = outside else {
        return Numerators {
            lo: own.lo,
            g: vec![0.0; own.len()],
            rounding: own.rounding,
            fft: 0.0,
            dropped: 1.0,
        };
    };
    let g = (0..own.len())
        .map(|i| {
            let k = own.lo + i as u64;
            if k > target {
                0.0
            } else {
                own.values[i] * o.at(target - k)
            }
        })
        .collect();
    // sum_k |L(k) dO| + |dL(k) O| <= E_O sum L + len E_L max O, with sum L, max O <= 1.
    let fft = o.abs_err + own.len() as f64 * own.abs_err;
    Numerators {
        lo: own.lo,
        g,
        rounding: own.rounding + o.rounding + 1,
        fft,
        dropped: own.dropped + o.dropped,
    }
}

/// What a computed sum s of `len` numerators, each after `rounding` roundings, certifies.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct Certificate {
    /// Certified upper bound on the L1 distance of the normalised pmf from the exact one.
    pub bound: f64,
    /// What the windows measurably lost beyond rounding noise (drives retries; not a bound).
    pub measured: f64,
}

/// The facts about one sum of numerators that the certificate needs.
pub(crate) struct Sum {
    /// The computed sum of the numerators.
    pub s: f64,
    /// Roundings behind each numerator.
    pub rounding: u64,
    /// How many numerators were summed.
    pub len: usize,
    /// Bound on their summed absolute FFT error.
    pub fft: f64,
    /// Mass trimmed in their history.
    pub dropped: f64,
}

/// Certifies a sum against the normaliser's bracket [z_lo, z_hi] on the exact Z.
pub(crate) fn certify(normaliser: &Normaliser, sum: &Sum) -> Certificate {
    let chain = sum.rounding + sum.len as u64;
    let lower_sum = sum.s * (1.0 - gamma(chain));
    let posterior_gap = (normaliser.z_hi - lower_sum).max(0.0);
    let gap = posterior_gap.min(sum.dropped * (1.0 + DROPPED_SLACK)) + 2.0 * sum.fft;
    let truncation = 2.0 * gap / normaliser.z_lo;
    let rounding = gamma(2 * sum.rounding + sum.len as u64 + 2);
    let z_mid = 0.5 * (normaliser.z_lo + normaliser.z_hi);
    let measured = (2.0 * (z_mid - sum.s) / z_mid - 4.0 * gamma(chain)).max(0.0);
    Certificate {
        bound: ((truncation + rounding + normaliser.weights_error)
            * (1.0 + BOUND_ROUNDINGS * UNIT_ROUNDOFF))
            .min(MAX_L1),
        measured,
    }
}

/// Mass each trim may drop so that all `trims` together stay within the tolerance's share.
pub(crate) fn budget(tolerance: f64, trims: u64) -> f64 {
    TRIM_SHARE * tolerance / trims.max(1) as f64
}

/// How many trims a pass over `plan` performs at most, `outside` being the free cells in no zone.
pub(crate) fn trims_of(plan: &Plan, zones: &[Zone], outside: usize) -> u64 {
    let zone_trims: u64 = zones.iter().map(|z| 2 * trims_for(z.len())).sum();
    zone_trims + TRIMS_PER_NODE * plan.nodes.len() as u64 + trims_for(outside)
}
