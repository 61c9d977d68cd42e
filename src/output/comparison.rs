//! A comparison with an external price list (`pathfold compare`) → table, CSV or JSON.

use std::io::{self, Write};

use serde_json::json;

use super::priced::to_json;
use super::{decimals, group, Format, CAUTION};
use crate::comparison::{Line, Tolerance, Verdict};

/// The CSV columns of a comparison, in order; the caution rides in the last column.
pub const CSV_COLUMNS: [&str; 22] = [
    "list_line",
    "key",
    "file",
    "product",
    "external_price",
    "price",
    "std_error",
    "difference",
    "z",
    "relative_difference",
    "tolerance",
    "verdict",
    "message",
    "paths",
    "seed",
    "antithetic",
    "control_variates",
    "pathfold_version",
    "payoff_sha256",
    "market_file",
    "market_sha256",
    "caution",
];

fn opt(x: Option<f64>) -> String {
    x.map(|x| x.to_string()).unwrap_or_default()
}

/// Writes the comparison.
pub fn write(out: &mut dyn Write, lines: &[Line], format: Format) -> io::Result<()> {
    match format {
        Format::Table => write_table(out, lines),
        Format::Csv => {
            let mut w = csv::Writer::from_writer(out);
            w.write_record(CSV_COLUMNS)?;
            for l in lines {
                let p = l.priced.as_ref();
                w.write_record([
                    l.list_line.map(|n| n.to_string()).unwrap_or_default(),
                    l.key.clone(),
                    p.map(|p| p.file.clone()).unwrap_or_default(),
                    p.map(|p| p.product.clone()).unwrap_or_default(),
                    opt(l.external),
                    opt(p.map(|p| p.estimate.price)),
                    opt(p.map(|p| p.estimate.std_error)),
                    opt(l.difference()),
                    opt(l.z()),
                    opt(l.relative()),
                    l.tolerance.map(Tolerance::text).unwrap_or_default(),
                    l.verdict.word().into(),
                    l.message.clone(),
                    p.map(|p| p.estimate.paths.to_string()).unwrap_or_default(),
                    p.map(|p| p.estimate.seed.to_string()).unwrap_or_default(),
                    p.map(|p| p.estimate.antithetic.to_string()).unwrap_or_default(),
                    p.map(|p| p.record.control_variates.to_string()).unwrap_or_default(),
                    env!("CARGO_PKG_VERSION").into(),
                    p.map(|p| p.record.payoff_sha256.clone()).unwrap_or_default(),
                    p.map(|p| p.market_file.clone()).unwrap_or_default(),
                    p.map(|p| p.record.market_sha256.clone()).unwrap_or_default(),
                    CAUTION.into(),
                ])?;
            }
            w.flush()
        }
        Format::Json => {
            let items: Vec<serde_json::Value> = lines
                .iter()
                .map(|l| {
                    json!({
                        "list_line": l.list_line,
                        "key": l.key,
                        "external_price": l.external,
                        "tolerance": l.tolerance.map(Tolerance::text),
                        "price": l.priced.as_ref().map(|p| p.estimate.price),
                        "std_error": l.priced.as_ref().map(|p| p.estimate.std_error),
                        "difference": l.difference(),
                        "z": l.z().filter(|z| z.is_finite()),
                        "relative_difference": l.relative(),
                        "verdict": l.verdict.word(),
                        "message": l.message,
                        "result": l.priced.as_ref().map(|p| {
                            let mut v = to_json(p);
                            if let Some(m) = v.as_object_mut() { m.remove("caution"); }
                            v
                        }),
                    })
                })
                .collect();
            let count = |v: Verdict| lines.iter().filter(|l| l.verdict == v).count();
            let value = json!({
                "pathfold_version": env!("CARGO_PKG_VERSION"),
                "summary": {
                    "agree": count(Verdict::Agree),
                    "disagree": count(Verdict::Disagree),
                    "missing": count(Verdict::Missing),
                    "error": count(Verdict::Error),
                },
                "comparisons": items,
                "caution": CAUTION,
            });
            serde_json::to_writer_pretty(&mut *out, &value)?;
            writeln!(out)
        }
    }
}

fn write_table(out: &mut dyn Write, lines: &[Line]) -> io::Result<()> {
    let width = lines.iter().map(|l| l.key.chars().count()).max().unwrap_or(7).max(7);
    let cell = |x: Option<f64>, d: usize| x.map_or("-".to_string(), |x| group(x, d));
    writeln!(
        out,
        "{:<width$} {:>14} {:>14} {:>10} {:>12} {:>8} {:>9}  verdict",
        "product", "external", "pathfold", "std error", "difference", "z", "relative"
    )?;
    for l in lines {
        let z = l.z().map_or("-".to_string(), |z| format!("{z:.2}"));
        let rel = l.relative().map_or("-".to_string(), |r| format!("{:.3}%", 100.0 * r));
        let note = if l.message.is_empty() { String::new() } else { format!("  ({})", l.message) };
        let d = l.priced.as_ref().map_or(2, |p| decimals(p.estimate.std_error));
        writeln!(
            out,
            "{:<width$} {:>14} {:>14} {:>10} {:>12} {:>8} {:>9}  {}{note}",
            l.key,
            cell(l.external, d),
            cell(l.priced.as_ref().map(|p| p.estimate.price), d),
            cell(l.priced.as_ref().map(|p| p.estimate.std_error), d),
            cell(l.difference(), d),
            z,
            rel,
            l.verdict.word(),
        )?;
    }
    let count = |v: Verdict| lines.iter().filter(|l| l.verdict == v).count();
    writeln!(out)?;
    writeln!(
        out,
        "{} agree, {} disagree, {} missing, {} error",
        count(Verdict::Agree),
        count(Verdict::Disagree),
        count(Verdict::Missing),
        count(Verdict::Error)
    )?;
    writeln!(out, "{CAUTION}")
}
