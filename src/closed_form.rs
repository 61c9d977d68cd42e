//! Placeholder closed forms until the full module lands.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum OptionKind {
    Call,
    Put,
}
pub fn norm_cdf(x: f64) -> f64 {
    0.5 * statrs::function::erf::erfc(-x / std::f64::consts::SQRT_2)
}
pub fn black_scholes(kind: OptionKind, s: f64, k: f64, t: f64, r: f64, b: f64, sigma: f64) -> f64 {
    let v = sigma * t.sqrt();
    let d1 = ((s / k).ln() + (b + 0.5 * sigma * sigma) * t) / v;
    let d2 = d1 - v;
    match kind {
        OptionKind::Call => s * ((b - r) * t).exp() * norm_cdf(d1) - k * (-r * t).exp() * norm_cdf(d2),
        OptionKind::Put => k * (-r * t).exp() * norm_cdf(-d2) - s * ((b - r) * t).exp() * norm_cdf(-d1),
    }
}
#[allow(clippy::too_many_arguments)]
pub fn geometric_asian_discrete(
    kind: OptionKind,
    s: f64,
    k: f64,
    times: &[f64],
    t_pay: f64,
    r: f64,
    b: f64,
    sigma: f64,
) -> f64 {
    let n = times.len() as f64;
    let mean = s.ln() + (b - 0.5 * sigma * sigma) * times.iter().sum::<f64>() / n;
    let mut var = 0.0;
    for &ti in times {
        for &tj in times {
            var += ti.min(tj);
        }
    }
    let var = sigma * sigma * var / (n * n);
    let df = (-r * t_pay).exp();
    let fwd = (mean + 0.5 * var).exp();
    if k <= 0.0 {
        return match kind {
            OptionKind::Call => df * (fwd - k),
            OptionKind::Put => 0.0,
        };
    }
    let sd = var.sqrt();
    let d2 = (mean - k.ln()) / sd;
    let d1 = d2 + sd;
    match kind {
        OptionKind::Call => df * (fwd * norm_cdf(d1) - k * norm_cdf(d2)),
        OptionKind::Put => df * (k * norm_cdf(-d2) - fwd * norm_cdf(-d1)),
    }
}
