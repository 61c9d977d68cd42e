//! Output writers: results → text for people (a table) or for machines (CSV, JSON).
//!
//! The engine returns numbers; this is the one place that formats them, from plain
//! records defined below it (a priced file, a batch row, a validation outcome, a
//! comparison line). Every report ends with the caution line.

pub mod atomic;
pub mod checks;
pub mod comparison;
pub mod ladder;
pub mod priced;
pub mod risk;
pub mod rows;
pub mod solve;

use std::io::{self, Write};

use crate::batch::Row;
use crate::pricing::Priced;

/// Writes the report of one priced file: the full table, one JSON object, or a CSV of one
/// row with the batch's columns.
pub fn write_one(out: &mut dyn Write, p: &Priced, format: Format) -> io::Result<()> {
    match format {
        Format::Table => priced::write_table(out, p),
        Format::Csv => rows::write_rows(out, &[Row::priced(p.clone())], Format::Csv),
        Format::Json => {
            serde_json::to_writer_pretty(&mut *out, &priced::to_json(p))?;
            writeln!(out)
        }
    }
}

/// The line every report ends with.
pub use crate::pricing::CAUTION;

/// Output formats.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum Format {
    Table,
    Json,
    Csv,
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
