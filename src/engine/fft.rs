//! FFT convolution of two non-negative vectors, with a bound on its absolute error.
//!
//! Both inputs go into one complex FFT (a + i b); the spectrum of a * b is
//! (X_k^2 - conj(X_{N-k})^2) / 4i, so a convolution costs two complex FFTs of the padded length.
//! FFT results are accurate only to about u log2(N) times the inputs' 2-norms, absolutely: tail
//! values far below that are noise. The executor therefore uses it only for wide laws, and the
//! returned bound travels with the law into every zone's `error_bound`.
//!
//! Error bound: with eta = u + gamma_4 (sqrt 2 + u) per butterfly level (Higham, Accuracy and
//! Stability of Numerical Algorithms, 2nd ed., Theorem 24.2), forward and inverse transforms and
//! the spectral product give ||computed - exact||_2 <= (3 log2(N) eta + 9u) ||(a, b)||_2 for
//! inputs of mass <= 1; we charge 4 log2(N) eta + 16u for the twiddle factors and slack.

use std::cell::RefCell;

use rustfft::num_complex::Complex;
use rustfft::FftPlanner;

use super::rounding::{gamma, UNIT_ROUNDOFF};

thread_local! {
    static PLANNER: RefCell<FftPlanner<f64>> = RefCell::new(FftPlanner::new());
}

/// Full convolution of `a` and `b` and a bound on the absolute error of every entry. Values
/// below the noise bound (negative ones included) are returned as zero.
pub(crate) fn convolve(a: &[f64], b: &[f64]) -> (Vec<f64>, f64) {
    let n_out = a.len() + b.len() - 1;
    let n = n_out.next_power_of_two();
    let (forward, inverse) = PLANNER.with(|p| {
        let mut p = p.borrow_mut();
        (p.plan_fft_forward(n), p.plan_fft_inverse(n))
    });
    let mut x: Vec<Complex<f64>> = (0..n)
        .map(|i| {
            Complex::new(
                a.get(i).copied().unwrap_or(0.0),
                b.get(i).copied().unwrap_or(0.0),
            )
        })
        .collect();
    forward.process(&mut x);
    let quarter = Complex::new(0.0, -0.25);
    let y: Vec<Complex<f64>> = (0..n)
        .map(|k| {
            let xk = x[k];
            let xm = x[(n - k) % n].conj();
            (xk * xk - xm * xm) * quarter
        })
        .collect();
    let mut y = y;
    inverse.process(&mut y);
    let scale = 1.0 / n as f64;
    let norm2 = (a.iter().chain(b).map(|v| v * v).sum::<f64>()).sqrt();
    let levels = n.trailing_zeros().max(1) as f64;
    let eta = UNIT_ROUNDOFF + gamma(4) * (std::f64::consts::SQRT_2 + UNIT_ROUNDOFF);
    let bound = (4.0 * levels * eta + 16.0 * UNIT_ROUNDOFF) * norm2 * (1.0 + 1e-6);
    // Values within the bound of zero are indistinguishable from it: zeroing them keeps every
    // entry within twice the bound of the truth and lets trimming drop the noise floor for free.
    let out = y[..n_out]
        .iter()
        .map(|c| c.re * scale)
        .map(|v| if v <= bound { 0.0 } else { v })
        .collect();
    (out, 2.0 * bound)
}
