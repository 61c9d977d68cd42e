//! Solving for a parameter: the value at which the price equals a target.
//!
//! Every trial prices on the same paths (same seed and block streams), with the control
//! variates of `price` unless they are turned off, so the price is a deterministic
//! function of the parameter and its root is well defined. The controls are the same in
//! every trial (the first trial's decision on the surprises holds for all), so a price
//! affine in the parameter stays affine: the regression's coefficients are affine in the
//! payoff. The search first checks whether the price is affine in the parameter (three
//! prices on a line, checked again at the solution) and then takes one step; otherwise
//! Brent's method on the bracket.

use std::path::Path;

use crate::diagnostic::{closest, Diagnostic};
use crate::pricing::{self, Failure, Loaded, Target};
use crate::sim::{simulate_sharing, Estimate, Sampler, Settings};
use crate::typing::{self, Override};

/// What was solved.
#[derive(Clone, Debug, PartialEq)]
pub struct Solved {
    pub file: String,
    pub product: String,
    pub currency: String,
    pub notional: f64,
    pub parameter: String,
    pub value: f64,
    /// The price SE at the solution over the slope of the price in the parameter.
    pub std_error: f64,
    pub price: f64,
    pub price_std_error: f64,
    pub target: f64,
    /// The slope of the price in the parameter at the solution (same paths).
    pub slope: f64,
    /// Pricings used, the slope's included.
    pub evaluations: usize,
    /// Whether the price was found affine in the parameter (one step).
    pub affine: bool,
    /// Whether the price at the value meets the target to the tolerance; false when the
    /// price jumps across the target on these paths (a barrier level, say): the value is
    /// then the trial nearest the jump.
    pub reached: bool,
    pub bracket: (f64, f64),
    pub paths: u64,
    pub seed: u64,
    /// Whether the trials used control variates.
    pub control_variates: bool,
    /// The control variates of the trial at the value (every trial has the same set; the
    /// regression may leave out a different few).
    pub controls: Vec<String>,
    pub sampler: Sampler,
    /// What the trials' estimates warned of, each once.
    pub warnings: Vec<String>,
}

/// Why a solve failed: bad input (exit 2), with the diagnostics to show.
pub type SolveError = Failure;

fn plain_error(message: String, fix: &str) -> Failure {
    Failure { diagnostics: vec![Diagnostic::new(message).with_fix(fix)], source: None, internal: false }
}

/// Parses `LO..HI`.
pub fn parse_between(text: &str) -> Result<(f64, f64), String> {
    let number = |s: &str| -> Option<f64> {
        let s = s.trim();
        match s.strip_suffix('%') {
            Some(p) => p.trim().parse::<f64>().ok().map(|x| x / 100.0),
            None => s.parse::<f64>().ok(),
        }
        .filter(|x| x.is_finite())
    };
    let (a, b) = text.split_once("..").ok_or_else(|| format!("--between {text}: write LO..HI, e.g. 1%..5%"))?;
    match (number(a), number(b)) {
        (Some(lo), Some(hi)) if lo < hi => Ok((lo, hi)),
        (Some(_), Some(_)) => Err(format!("--between {text}: LO must be below HI")),
        _ => Err(format!("--between {text}: write two numbers, LO..HI, e.g. 1%..5% or 0.01..0.05")),
    }
}

/// Solves `parameter` so that the price of `file` is `target`.
pub fn solve_file(
    file: &Path,
    market: Option<&Path>,
    overrides: &[Override],
    settings: &Settings,
    parameter: &str,
    target: Target,
    between: Option<(f64, f64)>,
) -> Result<Solved, Failure> {
    let loaded = pricing::load(file, market, overrides)?;
    let product = &loaded.product;
    let Some(index) = product.params.iter().position(|(n, _)| n == parameter) else {
        let names: Vec<&str> = product.params.iter().map(|(n, _)| n.as_str()).collect();
        let fix = match closest(parameter, names.iter().copied()) {
            Some(near) => format!("did you mean `{near}`?"),
            None if names.is_empty() => "the payoff declares no `param`".to_string(),
            None => format!("name one of its parameters: {}", names.join(", ")),
        };
        return Err(plain_error(format!("{}: the payoff has no parameter `{parameter}`", file.display()), &fix));
    };
    let written = product.params_written[index].text(&loaded.source).trim().to_string();
    if written == "true" || written == "false" {
        return Err(plain_error(
            format!("{}: `{parameter}` is a flag (true or false), so there is no value to solve for", file.display()),
            "solve for a numeric parameter",
        ));
    }
    let default = product.params[index].1;
    let target_amount = target.amount(product.notional);
    let (lo, hi) = between.unwrap_or(if default > 0.0 {
        (0.0, 4.0 * default)
    } else if default < 0.0 {
        (4.0 * default, 0.0)
    } else {
        (-1.0, 1.0)
    });
    let log: std::cell::RefCell<Vec<(f64, (f64, f64))>> = std::cell::RefCell::new(Vec::new());
    // Each trial's control variates, in the order of `log`.
    let used: std::cell::RefCell<Vec<Vec<String>>> = std::cell::RefCell::new(Vec::new());
    // What any trial's estimate warned of (a control left out, a fall back to the plain
    // estimate), each once.
    let warned: std::cell::RefCell<Vec<String>> = std::cell::RefCell::new(Vec::new());
    let mut surprises = None;
    let mut price_at = |x: f64| -> Result<(f64, f64), Failure> {
        let (estimate, kept) = price_sharing(&loaded, overrides, parameter, x, settings, surprises)?;
        surprises = Some(kept);
        let p = (estimate.price, estimate.std_error);
        log.borrow_mut().push((x, p));
        used.borrow_mut().push(estimate.controls);
        let mut warned = warned.borrow_mut();
        for w in estimate.warnings {
            if !warned.contains(&w.message) {
                warned.push(w.message);
            }
        }
        Ok(p)
    };
    let f = |p: (f64, f64)| p.0 - target_amount;
    let (plo, phi) = (price_at(lo)?, price_at(hi)?);
    let (flo, fhi) = (f(plo), f(phi));
    let scale = target_amount.abs().max(product.notional.abs()).max(1e-300);
    let tol = 1e-10 * scale;
    if flo.signum() == fhi.signum() && flo.abs() > tol && fhi.abs() > tol {
        return Err(plain_error(
            format!(
                "{}: no root of the price in `{parameter}` between {lo} and {hi}: the price there is {:.2} and {:.2}, the target {:.2}",
                file.display(),
                plo.0,
                phi.0,
                target_amount
            ),
            "widen or move the search with `--between LO..HI`, or check the target",
        ));
    }
    // Affine? The midpoint's price on the chord, then the one step checked.
    let mid = 0.5 * (lo + hi);
    let pmid = price_at(mid)?;
    let on_chord = (f(pmid) - 0.5 * (flo + fhi)).abs() <= tol;
    let mut found = None;
    let mut affine = false;
    if on_chord && fhi != flo {
        let x = lo - flo * (hi - lo) / (fhi - flo);
        let p = price_at(x)?;
        if f(p).abs() <= tol {
            found = Some((x, p));
            affine = true;
        }
    }
    if found.is_none() {
        brent(&mut price_at, &f, (lo, flo), (hi, fhi), tol)?;
    }
    // The slope on the same paths, by a central difference about the best trial.
    let best = |log: &[(f64, (f64, f64))]| {
        *log.iter().min_by(|x, y| f(x.1).abs().total_cmp(&f(y.1).abs())).expect("at least two pricings")
    };
    let (value, _) = found.unwrap_or_else(|| best(&log.borrow()));
    let h = 1e-4 * (hi - lo);
    let (up, down) = (price_at(value + h)?, price_at(value - h)?);
    let evaluations = log.borrow().len();
    let (value, at) = found.unwrap_or_else(|| best(&log.borrow()[..evaluations - 2]));
    let controls = log.borrow()[..evaluations - 2]
        .iter()
        .position(|&(x, _)| x.to_bits() == value.to_bits())
        .map(|i| used.borrow()[i].clone())
        .unwrap_or_default();
    let slope = (up.0 - down.0) / (2.0 * h);
    let std_error = if slope != 0.0 { at.1 / slope.abs() } else { f64::INFINITY };
    Ok(Solved {
        file: file.display().to_string(),
        product: product.name.clone(),
        currency: product.currency.clone(),
        notional: product.notional,
        parameter: parameter.to_string(),
        value,
        std_error,
        price: at.0,
        price_std_error: at.1,
        target: target_amount,
        slope,
        evaluations,
        affine,
        reached: f(at).abs() <= tol,
        bracket: (lo, hi),
        paths: settings.paths,
        seed: settings.seed,
        control_variates: settings.control_variates,
        controls,
        sampler: settings.sampler,
        warnings: warned.into_inner(),
    })
}

/// The estimate of the payoff with `parameter` set to `x`, on the settings' paths, the
/// surprises kept or dropped as `surprises` says when it is given ([`simulate_sharing`]);
/// with the decision taken.
fn price_sharing(
    loaded: &Loaded,
    overrides: &[Override],
    parameter: &str,
    x: f64,
    settings: &Settings,
    surprises: Option<bool>,
) -> Result<(Estimate, bool), Failure> {
    let mut all: Vec<Override> = overrides.iter().filter(|o| o.name != parameter).cloned().collect();
    all.push(Override { name: parameter.to_string(), value: format!("{x}") });
    let tree = crate::syntax::parse(&loaded.source).map_err(|d| loaded.failure(d))?;
    let product = typing::check(&tree, &all).map_err(|mut ds| loaded.failure(ds.remove(0)))?;
    let trial = Loaded { product, ..loaded.clone() };
    let program = trial.compile(&trial.market, &Default::default())?;
    simulate_sharing(&program, settings, surprises).map_err(|d| loaded.failure(d))
}

type Eval<'a> = dyn FnMut(f64) -> Result<(f64, f64), Failure> + 'a;

/// Brent's method (Brent, *Algorithms for Minimization without Derivatives*, ch. 4) on a
/// bracket whose ends have prices on opposite sides of the target. The trials are
/// recorded by `price_at`; the caller takes the best of them.
fn brent(
    price_at: &mut Eval,
    f: &dyn Fn((f64, f64)) -> f64,
    (mut a, mut fa): (f64, f64),
    (mut b, mut fb): (f64, f64),
    tol: f64,
) -> Result<(), Failure> {
    if fa.abs() < fb.abs() {
        std::mem::swap(&mut a, &mut b);
        std::mem::swap(&mut fa, &mut fb);
    }
    let (mut c, mut fc) = (a, fa);
    let mut d = b - a;
    let mut e = d;
    for _ in 0..200 {
        if fb.signum() == fc.signum() {
            c = a;
            fc = fa;
            d = b - a;
            e = d;
        }
        if fc.abs() < fb.abs() {
            a = b;
            b = c;
            c = a;
            fa = fb;
            fb = fc;
            fc = fa;
        }
        let xtol = 2.0 * f64::EPSILON * b.abs() + 1e-14 * (1.0 + b.abs());
        let m = 0.5 * (c - b);
        if fb.abs() <= tol || m.abs() <= xtol {
            break;
        }
        if e.abs() >= xtol && fa.abs() > fb.abs() {
            let s = fb / fa;
            let (mut p, mut q);
            if a == c {
                p = 2.0 * m * s;
                q = 1.0 - s;
            } else {
                let qa = fa / fc;
                let r = fb / fc;
                p = s * (2.0 * m * qa * (qa - r) - (b - a) * (r - 1.0));
                q = (qa - 1.0) * (r - 1.0) * (s - 1.0);
            }
            if p > 0.0 {
                q = -q;
            } else {
                p = -p;
            }
            if 2.0 * p < (3.0 * m * q - (xtol * q).abs()).min((e * q).abs()) {
                e = d;
                d = p / q;
            } else {
                d = m;
                e = d;
            }
        } else {
            d = m;
            e = d;
        }
        a = b;
        fa = fb;
        b += if d.abs() > xtol { d } else { xtol.copysign(m) };
        fb = f(price_at(b)?);
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_brackets() {
        assert_eq!(parse_between("1%..5%"), Ok((0.01, 0.05)));
        assert_eq!(parse_between("0.5..2"), Ok((0.5, 2.0)));
        assert!(parse_between("5%..1%").is_err());
        assert!(parse_between("1%-5%").is_err());
    }
}
