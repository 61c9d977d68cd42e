//! Closed-form prices: the reference prices that the Monte Carlo engine uses
//! as control variates, and the references of the validation set.
//!
//! Every formula here is written under risk-neutral geometric Brownian motion
//! with a generalised cost of carry `b` (for a stock paying a continuous
//! dividend yield `q`, `b = r - q`; for a future, `b = 0`). Times are in
//! years, rates are continuously compounded, volatilities are annual.
//!
//! The functions take plain `f64` and return `f64`. Their preconditions
//! (positive spot, strike, volatility and barrier; non-negative time) are
//! checked with `debug_assert!` only: release builds never panic, and inputs
//! outside the preconditions give a meaningless number (possibly NaN) rather
//! than an error. Callers that take user input must validate it first.
//!
//! Because the engine trusts these numbers, each formula is tested against
//! printed values from the literature where they reproduce (source named
//! beside each check; remembered values that did not reproduce are recorded
//! in comments with what we computed), and against identities and
//! independent numerical routes (quadratures over a density, first-passage
//! integrals, exact Monte Carlo of discrete monitoring).

mod asian;
mod barrier;
mod lookback;
mod normal;
mod tree;
mod two_asset;
mod vanilla;

#[cfg(test)]
mod test_support;

pub use asian::{geometric_asian_continuous, geometric_asian_discrete, geometric_average_forward};
pub use barrier::{
    barrier_hit_probability, bgk_shifted_barrier, lookback_discrete_shift, standard_barrier,
    standard_barrier_with_rebate, RebateTiming, BGK_BETA,
};
pub use lookback::{fixed_lookback, floating_lookback};
pub use normal::{bivariate_norm_cdf, legendre_20, norm_cdf, norm_pdf, normal_orthant, trivariate_norm_cdf};
pub use tree::{bermudan_binomial, binomial};
pub use two_asset::{margrabe, two_asset_extreme};
pub use vanilla::{asset_or_nothing, black_scholes, black_scholes_greeks, cash_or_nothing, forward_start, Greeks};

/// Call or put.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum OptionKind {
    Call,
    Put,
}

impl OptionKind {
    /// +1 for a call, -1 for a put: the sign that turns a call formula into
    /// the matching put formula in the usual "phi" notation.
    pub(crate) fn sign(self) -> f64 {
        match self {
            OptionKind::Call => 1.0,
            OptionKind::Put => -1.0,
        }
    }
}

/// The four single-barrier types.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum BarrierKind {
    DownAndIn,
    UpAndIn,
    DownAndOut,
    UpAndOut,
}

impl BarrierKind {
    /// True for barriers below the spot.
    pub fn is_down(self) -> bool {
        matches!(self, BarrierKind::DownAndIn | BarrierKind::DownAndOut)
    }

    /// True for knock-in barriers.
    pub fn is_in(self) -> bool {
        matches!(self, BarrierKind::DownAndIn | BarrierKind::UpAndIn)
    }
}

/// Which extreme of two assets an option is written on.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Extreme {
    Min,
    Max,
}
