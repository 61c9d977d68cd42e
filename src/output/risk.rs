//! Sensitivities of one payoff (`pathfold risk`): a table, CSV (one row per
//! sensitivity) or JSON (a list `sensitivities`).

use std::io::{self, Write};

use serde_json::json;

use super::{decimals, group, Format, CAUTION};
use crate::risk::{Risk, Subject};

fn subject_text(s: &Subject) -> String {
    match s {
        Subject::Whole => String::new(),
        Subject::Underlying(n) => n.clone(),
        Subject::Pair(a, b) => format!("{a}/{b}"),
    }
}

/// Writes the sensitivities in `format`.
pub fn write_risk(out: &mut dyn Write, r: &Risk, format: Format) -> io::Result<()> {
    match format {
        Format::Table => write_table(out, r),
        Format::Csv => write_csv(out, r),
        Format::Json => {
            serde_json::to_writer_pretty(&mut *out, &to_json(r))?;
            writeln!(out)
        }
    }
}

pub fn to_json(r: &Risk) -> serde_json::Value {
    let list: Vec<serde_json::Value> = r
        .sensitivities
        .iter()
        .map(|s| {
            let (underlying, pair) = match &s.subject {
                Subject::Whole => (json!(null), json!(null)),
                Subject::Underlying(n) => (json!(n), json!(null)),
                Subject::Pair(a, b) => (json!(null), json!([a, b])),
            };
            json!({
                "measure": s.measure,
                "underlying": underlying,
                "pair": pair,
                "value": s.value,
                "std_error": s.std_error,
                "bump": s.bump,
                "unit": s.unit,
            })
        })
        .collect();
    json!({
        "file": r.file,
        "market_file": r.market_file,
        "product": r.product,
        "currency": r.currency,
        "notional": r.notional,
        "price": r.price,
        "price_std_error": r.price_std_error,
        "paths": r.paths,
        "seed": r.seed,
        "control_variates": r.control_variates,
        "sampler": r.sampler.name(),
        "method": if r.control_variates {
            "central finite differences on common random numbers; standard errors from the paired differences path by path; each scenario with its control variates, coefficients fitted on a pilot of its own"
        } else {
            "central finite differences on common random numbers; standard errors from the paired differences path by path; plain Monte Carlo (no control variates)"
        },
        "sensitivities": list,
        "notes": r.notes,
        "caution": CAUTION,
    })
}

fn write_csv(out: &mut dyn Write, r: &Risk) -> io::Result<()> {
    let mut w = csv::Writer::from_writer(out);
    w.write_record([
        "file",
        "measure",
        "subject",
        "value",
        "std_error",
        "bump",
        "unit",
        "currency",
        "paths",
        "seed",
        "caution",
    ])?;
    for s in &r.sensitivities {
        w.write_record([
            r.file.clone(),
            s.measure.to_string(),
            subject_text(&s.subject),
            s.value.to_string(),
            s.std_error.to_string(),
            s.bump.clone(),
            s.unit.clone(),
            r.currency.clone(),
            r.paths.to_string(),
            r.seed.to_string(),
            CAUTION.to_string(),
        ])?;
    }
    w.flush()
}

fn write_table(out: &mut dyn Write, r: &Risk) -> io::Result<()> {
    writeln!(out, "{} ({})", r.product, r.file)?;
    let d = decimals(r.price_std_error);
    writeln!(
        out,
        "price {} {} ± {} ({}{}, {} paths, seed {})",
        r.currency,
        group(r.price, d),
        group(r.price_std_error, d),
        if r.control_variates { "control variates" } else { "plain Monte Carlo" },
        if r.sampler == crate::sim::Sampler::Sobol { ", Sobol points" } else { "" },
        r.paths,
        r.seed
    )?;
    writeln!(out, "Central finite differences on common random numbers; standard errors from the paired differences.")?;
    writeln!(out)?;
    writeln!(out, "{:<12} {:<12} {:>18} {:>14}  {:<34} unit", "measure", "of", "value", "std error", "bump")?;
    for s in &r.sensitivities {
        let d = decimals(s.std_error);
        writeln!(
            out,
            "{:<12} {:<12} {:>18} {:>14}  {:<34} {}",
            s.measure,
            subject_text(&s.subject),
            group(s.value, d),
            group(s.std_error, d),
            s.bump,
            s.unit
        )?;
    }
    for n in &r.notes {
        writeln!(out, "note: {n}")?;
    }
    writeln!(out)?;
    writeln!(out, "{CAUTION}")
}
