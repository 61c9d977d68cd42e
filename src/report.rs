//! Stage 5: results → text for people (a table) or for machines (JSON).
//!
//! The engine returns numbers; this is the one place that formats them. Every report ends
//! with the caution line.

use std::io::{self, Write};

use serde_json::json;

use crate::sim::Estimate;
use crate::validate::Outcome;

/// The line every report ends with.
pub const CAUTION: &str = "Caution: a model value under stated assumptions (risk-neutral GBM, flat rates and volatilities), not a quote; independent validation and your firm's model-risk policy come first.";

/// Everything a single-file report shows.
#[derive(Clone, Debug)]
pub struct Priced {
    pub file: String,
    pub market_file: String,
    pub product: String,
    pub currency: String,
    pub notional: f64,
    pub params: Vec<(String, f64)>,
    /// Each parameter's value as written (`2.25%`, `true`), for people.
    pub params_written: Vec<String>,
    pub estimate: Estimate,
    /// What it takes to reproduce the number exactly.
    pub record: Record,
    /// Rendered warnings about the payoff (allowed, but probably not meant).
    pub warnings: String,
}

/// The reproducibility record of one result: with the same files (checked by hash), the
/// same version and these settings, pathfold gives the same bits.
#[derive(Clone, Debug, PartialEq)]
pub struct Record {
    pub version: &'static str,
    /// SHA-256 of the payoff file's bytes, hex.
    pub payoff_sha256: String,
    /// SHA-256 of the market file's bytes, hex.
    pub market_sha256: String,
    /// Whether control variates were asked for (the estimate lists those used).
    pub control_variates: bool,
    /// The `--set` overrides, as given.
    pub overrides: Vec<String>,
    /// The error target of an error-bounded run, if any.
    pub target: Option<TargetOutcome>,
}

/// How an error-bounded run (`--target-se`) ended.
#[derive(Clone, Debug, PartialEq)]
pub struct TargetOutcome {
    /// The target standard error, in currency.
    pub std_error: f64,
    /// The largest path count allowed.
    pub max_paths: u64,
    pub met: bool,
}

impl Priced {
    pub fn percent_of_notional(&self) -> f64 {
        100.0 * self.estimate.price / self.notional
    }

    /// The 95% confidence interval under the normal approximation.
    pub fn interval(&self) -> (f64, f64) {
        let half = 1.959_963_984_540_054 * self.estimate.std_error;
        (self.estimate.price - half, self.estimate.price + half)
    }
}

/// Output formats.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum Format {
    Table,
    Json,
    Csv,
}

/// Writes the report of one priced file.
pub fn write_one(out: &mut dyn Write, p: &Priced, format: Format) -> io::Result<()> {
    match format {
        Format::Table => write_table(out, p),
        Format::Csv => crate::batch::write_rows(out, &[crate::batch::Row::priced(p.clone())], Format::Csv),
        Format::Json => {
            serde_json::to_writer_pretty(&mut *out, &to_json(p))?;
            writeln!(out)
        }
    }
}

/// The JSON object of one priced file.
pub fn to_json(p: &Priced) -> serde_json::Value {
    let e = &p.estimate;
    let (lo, hi) = p.interval();
    let params: serde_json::Map<String, serde_json::Value> =
        p.params.iter().map(|(n, v)| (n.clone(), json!(v))).collect();
    json!({
        "file": p.file,
        "market_file": p.market_file,
        "product": p.product,
        "currency": p.currency,
        "notional": p.notional,
        "parameters": params,
        "price": e.price,
        "percent_of_notional": p.percent_of_notional(),
        "std_error": e.std_error,
        "interval_95": [lo, hi],
        "paths": e.paths,
        "seed": e.seed,
        "antithetic": e.antithetic,
        "controls": e.controls,
        "variance_reduction": e.variance_reduction,
        "elapsed_seconds": e.elapsed.as_secs_f64(),
        "target": target_json(&p.record),
        "reproduce": record_json(p),
        "profile": e.profile.iter().map(|r| json!({
            "date": r.label,
            "years": r.time,
            "end_probability": r.end_probability,
            "expected_pv": r.expected_pv,
        })).collect::<Vec<_>>(),
        "caution": CAUTION,
    })
}

/// The target of an error-bounded run, or null.
pub fn target_json(r: &Record) -> serde_json::Value {
    match &r.target {
        Some(t) => json!({ "std_error": t.std_error, "max_paths": t.max_paths, "met": t.met }),
        None => serde_json::Value::Null,
    }
}

/// The reproducibility record as JSON.
pub fn record_json(p: &Priced) -> serde_json::Value {
    let (e, r) = (&p.estimate, &p.record);
    json!({
        "pathfold_version": r.version,
        "seed": e.seed,
        "paths": e.paths,
        "antithetic": e.antithetic,
        "control_variates": r.control_variates,
        "overrides": r.overrides,
        "payoff_sha256": r.payoff_sha256,
        "market_file": p.market_file,
        "market_sha256": r.market_sha256,
    })
}

fn write_table(out: &mut dyn Write, p: &Priced) -> io::Result<()> {
    let e = &p.estimate;
    let (lo, hi) = p.interval();
    let ccy = &p.currency;
    // The price and its interval carry as many decimals as the standard error needs.
    let d = decimals(e.std_error);
    let title = if p.product.is_empty() { p.file.as_str() } else { p.product.as_str() };
    writeln!(out, "{title}")?;
    writeln!(out, "  file              {}", p.file)?;
    writeln!(out, "  market            {}", p.market_file)?;
    writeln!(out, "  notional          {} {ccy}", group(p.notional, 2))?;
    if !p.params.is_empty() {
        let list: Vec<String> = p
            .params
            .iter()
            .zip(&p.params_written)
            .map(|((n, _), w)| format!("{n} = {}", w.split_whitespace().collect::<Vec<_>>().join(" ")))
            .collect();
        writeln!(out, "  parameters        {}", list.join(", "))?;
    }
    writeln!(out)?;
    let se_percent = 100.0 * e.std_error / p.notional;
    let dp = decimals(se_percent).max(4);
    writeln!(out, "  price             {} {ccy}   ({:.dp$}% of notional)", group(e.price, d), p.percent_of_notional())?;
    writeln!(out, "  standard error    {} {ccy}   ({se_percent:.dp$}% of notional)", group(e.std_error, d))?;
    writeln!(out, "  95% interval      {} to {} {ccy}", group(lo, d), group(hi, d))?;
    let pairs = if e.antithetic { " in antithetic pairs" } else { "" };
    writeln!(out, "  paths             {}{pairs}, seed {}", group(e.paths as f64, 0), e.seed)?;
    let controls = if e.controls.is_empty() { "none".to_string() } else { e.controls.join(", ") };
    writeln!(out, "  control variates  {controls}")?;
    match e.variance_reduction {
        Some(v) => writeln!(out, "  variance cut      {v:.1} times (against plain Monte Carlo on as many paths)")?,
        None => writeln!(out, "  variance cut      not measurable (no variance left)")?,
    }
    if let Some(t) = &p.record.target {
        let verdict = if t.met { "met" } else { "NOT met" };
        writeln!(
            out,
            "  error target      {} {ccy}: {verdict} (at most {} paths)",
            group(t.std_error, decimals(t.std_error)),
            group(t.max_paths as f64, 0)
        )?;
    }
    writeln!(out, "  time              {:.2} s", e.elapsed.as_secs_f64())?;
    writeln!(
        out,
        "  reproduce         pathfold {}, payoff sha256 {}",
        p.record.version,
        short_hash(&p.record.payoff_sha256)
    )?;
    writeln!(out, "                    market sha256 {}", short_hash(&p.record.market_sha256))?;
    writeln!(out)?;
    writeln!(out, "  {:<12} {:>14} {:>22}", "date", "ends here", format!("expected PV paid ({ccy})"))?;
    // Dates on which nothing is paid and nothing ends (most fixings of a daily schedule)
    // would drown the few that matter; JSON keeps them all.
    let quiet = |r: &&crate::sim::ProfileRow| r.expected_pv == 0.0 && r.end_probability.unwrap_or(0.0) == 0.0;
    for r in e.profile.iter().filter(|r| !quiet(r)) {
        let ends = r.end_probability.map_or("-".to_string(), |x| format!("{:.2}%", 100.0 * x));
        writeln!(out, "  {:<12} {:>14} {:>22}", r.label, ends, group(r.expected_pv, 2))?;
    }
    let hidden = e.profile.iter().filter(quiet).count();
    if hidden > 0 {
        writeln!(out, "  ({hidden} other dates: nothing paid, never ends there)")?;
    }
    writeln!(out, "  (plain averages over the paths: they add up to the price before control variates)")?;
    if e.variance_reduction.is_some_and(|v| v < 1.0) {
        writeln!(out)?;
        writeln!(
            out,
            "  note: variance reduction made this estimate noisier; antithetic pairs can raise the variance of a payoff that is not monotone in the levels: compare with --no-antithetic"
        )?;
    }
    writeln!(out)?;
    writeln!(out, "{CAUTION}")
}

/// Writes the outcome of `pathfold check`: one row per case.
pub fn write_checks(out: &mut dyn Write, outcomes: &[Outcome], format: Format) -> io::Result<()> {
    let passed = outcomes.iter().filter(|o| o.passed()).count();
    match format {
        Format::Csv => {
            let mut w = csv::Writer::from_writer(out);
            w.write_record([
                "file",
                "closed_form",
                "reference",
                "price",
                "std_error",
                "z",
                "passed",
                "error",
                "caution",
            ])?;
            for o in outcomes {
                let p = o.result.as_ref().ok();
                let num = |x: Option<f64>| x.map(|x| x.to_string()).unwrap_or_default();
                w.write_record([
                    o.case.file.clone(),
                    o.case.reference.name().to_string(),
                    o.reference_value.to_string(),
                    num(p.map(|p| p.estimate.price)),
                    num(p.map(|p| p.estimate.std_error)),
                    num(o.z().filter(|z| z.is_finite())),
                    o.passed().to_string(),
                    o.result.as_ref().err().map(crate::batch::one_line).unwrap_or_default(),
                    CAUTION.to_string(),
                ])?;
            }
            w.flush()
        }
        Format::Json => {
            let cases: Vec<serde_json::Value> = outcomes
                .iter()
                .map(|o| {
                    let p = o.result.as_ref().ok();
                    json!({
                        "file": o.case.file,
                        "reference": o.case.reference.name(),
                        "closed_form": o.reference_value,
                        "price": p.map(|p| p.estimate.price),
                        "std_error": p.map(|p| p.estimate.std_error),
                        "approximation": o.case.approximation,
                        "z": o.z().filter(|z| z.is_finite()),
                        "passed": o.passed(),
                        "error": o.result.as_ref().err().map(|f| f.render()),
                    })
                })
                .collect();
            let paths =
                outcomes.iter().find_map(|o| o.result.as_ref().ok()).map(|p| (p.estimate.paths, p.estimate.seed));
            let v = json!({
                "cases": cases,
                "passed": passed,
                "failed": outcomes.len() - passed,
                "max_abs_z": crate::validate::MAX_Z,
                "paths": paths.map(|p| p.0),
                "seed": paths.map(|p| p.1),
                "caution": CAUTION,
            });
            serde_json::to_writer_pretty(&mut *out, &v)?;
            writeln!(out)
        }
        Format::Table => {
            writeln!(
                out,
                "{:<30} {:<28} {:>12} {:>12} {:>10} {:>8} {:>7}  result",
                "case", "closed form", "reference", "Monte Carlo", "std error", "budget", "z"
            )?;
            for o in outcomes {
                let name = o.case.file.trim_end_matches(".payoff");
                match &o.result {
                    Ok(p) => {
                        let z = o.z().unwrap_or(f64::NAN);
                        let verdict = if o.passed() { "pass" } else { "FAIL" };
                        writeln!(
                            out,
                            "{:<30} {:<28} {:>12.4} {:>12.4} {:>10.4} {:>8} {:>7.2}  {}",
                            name,
                            o.case.reference.name(),
                            o.reference_value,
                            p.estimate.price,
                            p.estimate.std_error,
                            if o.case.approximation > 0.0 {
                                format!("{:.4}", o.case.approximation * o.reference_value.abs())
                            } else {
                                "-".to_string()
                            },
                            z,
                            verdict
                        )?;
                    }
                    Err(_) => writeln!(
                        out,
                        "{:<30} {:<28} {:>12.4} {:>12} {:>10} {:>8} {:>7}  FAIL (not priced, see above)",
                        name,
                        o.case.reference.name(),
                        o.reference_value,
                        "-",
                        "-",
                        "-",
                        "-"
                    )?,
                }
            }
            writeln!(out)?;
            writeln!(
                out,
                "{passed} of {} cases within {} errors of their closed form; z divides the difference by the standard error and, for BGK-corrected references, their error budget in quadrature.",
                outcomes.len(),
                crate::validate::MAX_Z
            )?;
            writeln!(out, "{CAUTION}")
        }
    }
}

/// Decimals that show a standard error with at least two significant digits, and never
/// fewer than two (cents): 763.53 → 2, 0.0034 → 4, 0.05 → 3. Prices and intervals are
/// shown with the decimals of their standard error.
pub fn decimals(std_error: f64) -> usize {
    if !(std_error.is_finite() && std_error > 0.0) {
        return 2;
    }
    // 12 decimals is far below any amount that matters, and keeps a tiny error printable.
    (1 - std_error.log10().floor() as i64).clamp(2, 12) as usize
}

/// `1234567.891` → `1,234,567.89`.
pub fn group(x: f64, decimals: usize) -> String {
    if !x.is_finite() {
        return x.to_string();
    }
    let s = format!("{:.*}", decimals, x.abs());
    let (int, frac) = s.split_once('.').map_or((s.as_str(), None), |(i, f)| (i, Some(f)));
    let mut grouped = String::new();
    for (i, c) in int.chars().enumerate() {
        if i > 0 && (int.len() - i) % 3 == 0 {
            grouped.push(',');
        }
        grouped.push(c);
    }
    let sign = if x < 0.0 && s.chars().any(|c| c.is_ascii_digit() && c != '0') { "-" } else { "" };
    match frac {
        Some(f) => format!("{sign}{grouped}.{f}"),
        None => format!("{sign}{grouped}"),
    }
}

/// The first 16 hex digits: enough to tell files apart at a glance (JSON and CSV carry all 64).
fn short_hash(h: &str) -> &str {
    &h[..h.len().min(16)]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn groups_thousands() {
        assert_eq!(group(1_234_567.891, 2), "1,234,567.89");
        assert_eq!(group(-999.5, 0), "-1,000");
        assert_eq!(group(12.0, 2), "12.00");
        assert_eq!(group(-0.001, 2), "0.00");
    }

    #[test]
    fn shows_two_significant_digits_of_the_standard_error() {
        assert_eq!(decimals(763.53), 2);
        assert_eq!(decimals(1.0), 2);
        assert_eq!(decimals(0.1), 2);
        assert_eq!(decimals(0.099), 3);
        assert_eq!(decimals(0.05), 3);
        assert_eq!(decimals(0.0034), 4);
        assert_eq!(decimals(0.0), 2);
        assert_eq!(decimals(f64::NAN), 2);
        assert_eq!(decimals(1e-30), 12);
        assert_eq!(group(0.0034, decimals(0.0034)), "0.0034");
    }
}
