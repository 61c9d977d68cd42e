//! One priced file → the full report (table) or one JSON object.

use std::io::{self, Write};

use serde_json::json;

use super::{decimals, group, short_hash, CAUTION};
use crate::pricing::{Inputs, Priced, Record};

/// The JSON object of one priced file.
pub fn to_json(p: &Priced) -> serde_json::Value {
    let e = &p.estimate;
    let (lo, hi) = p.interval();
    let params: serde_json::Map<String, serde_json::Value> =
        p.params.iter().map(|(n, v)| (n.clone(), json!(v))).collect();
    let mut out = json!({
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
        "ended": p.ended,
        "market_inputs": inputs_json(&p.inputs),
        "caution": CAUTION,
    });
    // Only a product with `may end` has the key, so other reports keep their shape.
    if let (Some(x), Some(map)) = (&e.exercise, out.as_object_mut()) {
        map.insert(
            "early_exercise".into(),
            json!({
                "party": x.party.word(),
                "dates": x.dates,
                "method": "least-squares regression (Longstaff-Schwartz), rule fitted on paths independent of the pricing paths",
                "fit_paths": x.fit_paths,
                "basis_functions": x.basis,
                "bias": x.bias(),
            }),
        );
    }
    out
}

/// The market inputs as JSON: rates, yields and volatilities to the horizon, as fractions.
pub fn inputs_json(i: &Inputs) -> serde_json::Value {
    json!({
        "valuation_date": i.valuation_date,
        "horizon": i.horizon,
        "horizon_years": i.years,
        "discount_rate": i.discount_rate,
        "underlyings": i.underlyings.iter().map(|u| json!({
            "name": u.name,
            "currency": u.currency,
            "spot": u.spot,
            "volatility": u.volatility,
            "dividend_yield": u.dividend_yield,
            "discrete_dividends": u.discrete_dividends,
            "rate": u.rate,
            "quanto": u.quanto.as_ref().map(|q| json!({
                "from": q.currency,
                "fx_volatility": q.fx_volatility,
                "fx_correlation": q.correlation,
            })),
            "correlations": u.correlations.iter().map(|(n, r)| (n.clone(), json!(r))).collect::<serde_json::Map<_, _>>(),
            "fixings": u.fixings.iter().map(|(d, x)| json!({ "date": d, "level": x })).collect::<Vec<_>>(),
        })).collect::<Vec<_>>(),
    })
}

/// The market inputs, a line or two per underlying.
fn write_inputs(out: &mut dyn Write, i: &Inputs, ccy: &str) -> io::Result<()> {
    let pct = |x: f64| format!("{:.2}%", 100.0 * x);
    writeln!(
        out,
        "  market inputs     valued {}, read to {} ({:.2}y); {ccy} discount rate {}",
        i.valuation_date,
        i.horizon,
        i.years,
        pct(i.discount_rate)
    )?;
    for u in &i.underlyings {
        let mut dividends = format!("dividend yield {}", pct(u.dividend_yield));
        if u.discrete_dividends > 0 {
            let s = if u.discrete_dividends == 1 { "" } else { "s" };
            dividends.push_str(&format!(" + {} discrete dividend{s}", u.discrete_dividends));
        }
        writeln!(
            out,
            "    {:<14}  spot {} {}, volatility {}, {dividends}, {} rate {}",
            u.name,
            group(u.spot, 2),
            u.currency,
            pct(u.volatility),
            u.currency,
            pct(u.rate)
        )?;
        if let Some(q) = &u.quanto {
            writeln!(
                out,
                "    {:<14}  quanto into {ccy}: {}/{ccy} volatility {}, correlation {}",
                "",
                q.currency,
                pct(q.fx_volatility),
                q.correlation
            )?;
        }
        if !u.fixings.is_empty() {
            let list: Vec<String> = u.fixings.iter().map(|(d, x)| format!("{d} {}", group(*x, 2))).collect();
            writeln!(out, "    {:<14}  fixings {}", "", list.join(", "))?;
        }
        if !u.correlations.is_empty() {
            let list: Vec<String> = u.correlations.iter().map(|(n, r)| format!("{n} {r}")).collect();
            writeln!(out, "    {:<14}  correlations {}", "", list.join(", "))?;
        }
    }
    Ok(())
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

/// The full report of one priced file, for people.
pub fn write_table(out: &mut dyn Write, p: &Priced) -> io::Result<()> {
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
    if let Some(date) = &p.ended {
        writeln!(out, "  ended             on {date}, before the valuation date: the price is what is left to pay")?;
    }
    writeln!(out)?;
    let se_percent = 100.0 * e.std_error / p.notional;
    let dp = decimals(se_percent).max(4);
    writeln!(out, "  price             {} {ccy}   ({:.dp$}% of notional)", group(e.price, d), p.percent_of_notional())?;
    writeln!(out, "  standard error    {} {ccy}   ({se_percent:.dp$}% of notional)", group(e.std_error, d))?;
    writeln!(out, "  95% interval      {} to {} {ccy}", group(lo, d), group(hi, d))?;
    let pairs = if e.antithetic { " in antithetic pairs" } else { "" };
    writeln!(out, "  paths             {}{pairs}, seed {}", group(e.paths as f64, 0), e.seed)?;
    if e.controls.is_empty() {
        writeln!(out, "  control variates  none")?;
    }
    // Many controls (a stopped hedge per underlying and weight) wrap under their label.
    for (i, line) in wrap_list(&e.controls, 70).iter().enumerate() {
        let label = if i == 0 { "control variates" } else { "" };
        writeln!(out, "  {label:<16}  {line}")?;
    }
    match e.variance_reduction {
        Some(v) => writeln!(out, "  variance cut      {v:.1} times (against plain Monte Carlo on as many paths)")?,
        None => writeln!(out, "  variance cut      not measurable (no variance left)")?,
    }
    if let Some(x) = &e.exercise {
        let dates = if x.dates == 1 { "1 date".to_string() } else { format!("{} dates", x.dates) };
        writeln!(
            out,
            "  early exercise    {} may end the product on {dates}; rule fitted by least squares on {} other paths",
            x.party.word(),
            group(x.fit_paths as f64, 0)
        )?;
        writeln!(
            out,
            "                    (at most {} basis functions): the price is biased {} by the rule's shortfall",
            x.basis,
            x.bias()
        )?;
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
    write_inputs(out, &p.inputs, ccy)?;
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
    if e.variance_reduction.is_some_and(|v| v < 1.0) && p.ended.is_none() {
        writeln!(out)?;
        writeln!(
            out,
            "  note: variance reduction made this estimate noisier; antithetic pairs can raise the variance of a payoff that is not monotone in the levels: compare with --no-antithetic"
        )?;
    }
    writeln!(out)?;
    writeln!(out, "{CAUTION}")
}

/// The items joined with `, ` into lines of at most `width` characters (an item longer
/// than that has a line of its own); a line that goes on ends with the comma.
fn wrap_list(items: &[String], width: usize) -> Vec<String> {
    let mut lines: Vec<String> = Vec::new();
    let mut line = String::new();
    for (i, item) in items.iter().enumerate() {
        let piece = if i + 1 < items.len() { format!("{item},") } else { item.clone() };
        if !line.is_empty() && line.chars().count() + 1 + piece.chars().count() > width {
            lines.push(std::mem::take(&mut line));
        }
        if !line.is_empty() {
            line.push(' ');
        }
        line.push_str(&piece);
    }
    if !line.is_empty() {
        lines.push(line);
    }
    lines
}

#[cfg(test)]
mod wrap_tests {
    use super::wrap_list;

    #[test]
    fn a_long_list_wraps_at_its_commas() {
        let items: Vec<String> = ["ZPHX forward", "ZPHX call", "QMEN forward", "QMEN call"].map(String::from).to_vec();
        assert_eq!(wrap_list(&items, 30), ["ZPHX forward, ZPHX call,", "QMEN forward, QMEN call"]);
        assert_eq!(wrap_list(&items, 200), ["ZPHX forward, ZPHX call, QMEN forward, QMEN call"]);
        assert_eq!(wrap_list(&items[..1], 5), ["ZPHX forward"]);
        assert!(wrap_list(&[], 10).is_empty());
    }
}
