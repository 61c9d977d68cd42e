//! Numerical helpers shared by the closed-form tests: the independent
//! routes that the formulas are checked against.

/// Composite Simpson's rule for `f` on `[lo, hi]` with `intervals` panels
/// (rounded up to an even number).
pub(crate) fn simpson(f: impl Fn(f64) -> f64, lo: f64, hi: f64, intervals: usize) -> f64 {
    let n = intervals + intervals % 2;
    let h = (hi - lo) / n as f64;
    let mut sum = f(lo) + f(hi);
    for i in 1..n {
        let w = if i % 2 == 1 { 4.0 } else { 2.0 };
        sum += w * f(lo + h * i as f64);
    }
    sum * h / 3.0
}

/// Undiscounted Black price `E[(X - k)^+]` for a lognormal `X` with mean
/// `forward` and log-standard-deviation `stdev`: the conditional price used
/// when integrating over one asset's density. Written out here, not taken
/// from the formulas under test.
pub(crate) fn lognormal_call(forward: f64, k: f64, stdev: f64) -> f64 {
    use super::norm_cdf;
    if k <= 0.0 {
        return forward - k;
    }
    let d1 = ((forward / k).ln() + 0.5 * stdev * stdev) / stdev;
    forward * norm_cdf(d1) - k * norm_cdf(d1 - stdev)
}

/// Undiscounted Black put `E[(k - X)^+]`.
pub(crate) fn lognormal_put(forward: f64, k: f64, stdev: f64) -> f64 {
    lognormal_call(forward, k, stdev) - forward + k
}
