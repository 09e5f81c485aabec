//! Floating-point rounding, in one place: the unit roundoff, Higham's gamma, and what each
//! kernel charges. Every certified bound in the engine is built from these.
//!
//! A `Law` counts the roundings along the longest dependency chain of its values; a value after
//! k roundings is within a relative gamma(k) of its exact counterpart (Higham, Accuracy and
//! Stability of Numerical Algorithms, 2nd ed., Lemma 3.1 and 3.3).

/// Unit roundoff of f64 (round to nearest).
pub(crate) const UNIT_ROUNDOFF: f64 = f64::EPSILON / 2.0;

/// Higham's gamma_k = k u / (1 - k u), the relative error bound after k roundings.
/// Saturates at 1 when k u reaches 1/2 (the bound is then meaningless anyway).
pub(crate) fn gamma(k: u64) -> f64 {
    let ku = k as f64 * UNIT_ROUNDOFF;
    if ku >= 0.5 {
        1.0
    } else {
        ku / (1.0 - ku)
    }
}

/// Roundings charged for one Bernoulli cell: three for computing the tilted q and 1 - q from p,
/// two for the multiply-add that folds it in.
pub(crate) const ROUNDINGS_PER_CELL: u64 = 5;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gamma_is_monotone_and_saturates() {
        assert_eq!(gamma(0), 0.0);
        assert!(gamma(10) > 10.0 * UNIT_ROUNDOFF);
        assert_eq!(gamma(u64::MAX / 2), 1.0);
    }
}
