//! Comparison: an external price list (CSV) against pathfold's prices, row by row.
//!
//! Reads the list, matches each row to a priced payoff (by file path, file name, file
//! stem or product name), and gives a verdict per row: `agree`, `disagree` (more than
//! `--max-z` standard errors apart and outside the row's tolerance), `missing` (a row
//! with no payoff, or a payoff with no row) or `error` (the payoff could not be priced,
//! the row could not be read, or it matches several payoffs).

use std::collections::HashSet;

use std::path::Path;

use crate::batch::Row;
use crate::diagnostic::Diagnostic;
use crate::files::read_regular_bytes;
use crate::pricing::Priced;

/// How far apart the prices may be regardless of the standard error.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Tolerance {
    /// In currency.
    Amount(f64),
    /// In percent of the external price.
    Percent(f64),
}

impl Tolerance {
    fn parse(text: &str) -> Option<Tolerance> {
        let t = text.trim();
        let (n, pct) = t.strip_suffix('%').map_or((t, false), |n| (n.trim(), true));
        let x: f64 = n.parse().ok().filter(|x: &f64| x.is_finite() && *x >= 0.0)?;
        Some(if pct { Tolerance::Percent(x) } else { Tolerance::Amount(x) })
    }

    fn amount(self, external: f64) -> f64 {
        match self {
            Tolerance::Amount(x) => x,
            Tolerance::Percent(p) => p / 100.0 * external.abs(),
        }
    }

    pub fn text(self) -> String {
        match self {
            Tolerance::Amount(x) => x.to_string(),
            Tolerance::Percent(p) => format!("{p}%"),
        }
    }
}

/// One row of the price list.
#[derive(Clone, Debug, PartialEq)]
pub struct Quote {
    /// Line in the CSV file (the header is line 1).
    pub line: u64,
    pub file: Option<String>,
    pub product: Option<String>,
    pub price: f64,
    pub tolerance: Option<Tolerance>,
    /// Half a unit of the last digit the price is written to (`36989.19`: 0.005): the
    /// quote is known only to that, whatever our standard error.
    pub rounding: f64,
}

/// Half a unit of the last digit written in a decimal number (`12.50` → 0.005, `37000`
/// → 0.5, `3.7e4` → 500); 0 for a text that is not a plain decimal.
pub fn quoted_rounding(text: &str) -> f64 {
    let t = text.trim().trim_start_matches(['+', '-']).replace('_', "");
    let (mantissa, exponent) = match t.split_once(['e', 'E']) {
        Some((m, e)) => match e.parse::<i32>() {
            Ok(e) => (m.to_string(), e),
            Err(_) => return 0.0,
        },
        None => (t, 0),
    };
    let decimals = match mantissa.split_once('.') {
        Some((_, frac)) => frac.len() as i32,
        None => 0,
    };
    if mantissa.is_empty() || !mantissa.chars().all(|c| c.is_ascii_digit() || c == '.') {
        return 0.0;
    }
    0.5 * 10f64.powi(exponent - decimals)
}

impl Quote {
    fn key(&self) -> String {
        self.file.clone().or_else(|| self.product.clone()).unwrap_or_default()
    }
}

/// A row of the list that could not be read: its line, key (if any) and the problem.
#[derive(Clone, Debug, PartialEq)]
pub struct BadQuote {
    pub line: u64,
    pub key: String,
    pub message: String,
}

/// Reads a price list. A list that cannot be read at all, or lacks the needed columns, is
/// an error; a bad row becomes a [`BadQuote`] and the rest are still compared.
pub fn read_list(path: &Path) -> Result<Vec<Result<Quote, BadQuote>>, Diagnostic> {
    let bytes = read_regular_bytes(path)
        .map_err(|e| Diagnostic::new(format!("cannot read the price list: {e}")).in_file(path))?;
    let mut reader = csv::ReaderBuilder::new().trim(csv::Trim::All).flexible(true).from_reader(&bytes[..]);
    let headers = reader
        .headers()
        .map_err(|e| Diagnostic::new(format!("cannot read the header row of the price list: {e}")).in_file(path))?
        .clone();
    let column = |name: &str| headers.iter().position(|h| h.eq_ignore_ascii_case(name));
    let (file_col, product_col, price_col, tol_col) =
        (column("file"), column("product"), column("price"), column("tolerance"));
    let layout_fix = "the first line must name the columns, e.g. `file,price,tolerance` or `product,price`";
    if price_col.is_none() || (file_col.is_none() && product_col.is_none()) {
        return Err(Diagnostic::new(format!(
            "the price list needs a `price` column and a `file` or `product` column; its header is `{}`",
            headers.iter().collect::<Vec<_>>().join(",")
        ))
        .with_fix(layout_fix)
        .in_file(path));
    }
    let mut out = Vec::new();
    for (i, record) in reader.records().enumerate() {
        let line = record.as_ref().ok().and_then(|r| r.position()).map_or(i as u64 + 2, |p| p.line());
        let record = match record {
            Ok(r) => r,
            Err(e) => {
                out.push(Err(BadQuote { line, key: String::new(), message: format!("unreadable row: {e}") }));
                continue;
            }
        };
        let get = |c: Option<usize>| c.and_then(|c| record.get(c)).filter(|s| !s.is_empty()).map(str::to_string);
        let (file, product) = (get(file_col), get(product_col));
        if record.iter().all(str::is_empty) {
            continue;
        }
        let key = file.clone().or_else(|| product.clone()).unwrap_or_default();
        let bad = |message: String| BadQuote {
            line,
            key: key.clone(),
            message: format!("{}:{line}: {message}", path.display()),
        };
        if file.is_none() && product.is_none() {
            out.push(Err(bad("the row names neither a file nor a product (fix: fill in one of them)".into())));
            continue;
        }
        let separator_fix = "fix: write plain decimals such as `79321.93`, or put the price in double quotes";
        // An unquoted `170,506.83` is two fields: with every column present the row is too
        // long; without a tolerance value it would read as price 170, tolerance 506.83.
        if record.len() > headers.len() {
            let example = price_col
                .and_then(|c| split_number(record.get(c)?, record.get(c + 1)?))
                .map_or("such as `1,250.00`".to_string(), |n| format!("(`{n}`)"));
            out.push(Err(bad(format!(
                "the row has {} fields but the header names {} columns; a price written with a thousands separator {example} splits into two fields ({separator_fix})",
                record.len(),
                headers.len()
            ))));
            continue;
        }
        let price_text = get(price_col).unwrap_or_default();
        if let Some(tolerance_text) = get(tol_col).filter(|_| tol_col == price_col.map(|c| c + 1)) {
            if let Some(n) = split_number(&price_text, &tolerance_text) {
                out.push(Err(bad(format!(
                    "the price `{price_text}` and the tolerance `{tolerance_text}` read as one number with a thousands separator, `{n}` ({separator_fix}; for a price of {price_text} with a tolerance of {tolerance_text} write the price as `{price_text}.0`)"
                ))));
                continue;
            }
        }
        let price = match price_text.replace('_', "").parse::<f64>() {
            Ok(p) if p.is_finite() => p,
            _ => {
                out.push(Err(bad(format!(
                    "the price `{price_text}` is not a number (fix: write a plain decimal such as `79321.93`, no currency or thousands separators)"
                ))));
                continue;
            }
        };
        let tolerance = match get(tol_col) {
            None => None,
            Some(t) => match Tolerance::parse(&t) {
                Some(t) => Some(t),
                None => {
                    out.push(Err(bad(format!(
                        "the tolerance `{t}` is neither an amount nor a percentage (fix: write e.g. `50` or `0.5%`, or leave it empty)"
                    ))));
                    continue;
                }
            },
        };
        let rounding = quoted_rounding(&price_text);
        out.push(Ok(Quote { line, file, product, price, tolerance, rounding }));
    }
    Ok(out)
}

/// `170` and `506.83` → `170,506.83`: two fields that are one number whose thousands
/// separator was taken for a field separator (1 to 3 digits, then 3 digits and maybe a
/// decimal part).
fn split_number(head: &str, tail: &str) -> Option<String> {
    let digits = head.strip_prefix('-').unwrap_or(head);
    let head_ok = (1..=3).contains(&digits.len()) && digits.bytes().all(|b| b.is_ascii_digit());
    let (int, frac) = tail.split_once('.').unwrap_or((tail, ""));
    let tail_ok = int.len() == 3 && int.bytes().all(|b| b.is_ascii_digit()) && frac.bytes().all(|b| b.is_ascii_digit());
    (head_ok && tail_ok).then(|| format!("{head},{tail}"))
}

/// The verdict on one line of the comparison.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Verdict {
    Agree,
    Disagree,
    Missing,
    Error,
}

impl Verdict {
    pub fn word(self) -> &'static str {
        match self {
            Verdict::Agree => "agree",
            Verdict::Disagree => "disagree",
            Verdict::Missing => "missing",
            Verdict::Error => "error",
        }
    }
}

/// One line of the comparison.
#[derive(Clone, Debug)]
pub struct Line {
    /// The price-list line, when the line comes from the list.
    pub list_line: Option<u64>,
    /// The file or product name the list gave, or the payoff file for a payoff not listed.
    pub key: String,
    pub external: Option<f64>,
    pub tolerance: Option<Tolerance>,
    pub priced: Option<Priced>,
    pub verdict: Verdict,
    pub message: String,
}

impl Line {
    pub fn difference(&self) -> Option<f64> {
        Some(self.priced.as_ref()?.estimate.price - self.external?)
    }

    /// The difference in standard errors.
    pub fn z(&self) -> Option<f64> {
        let d = self.difference()?;
        let se = self.priced.as_ref()?.estimate.std_error;
        Some(if d == 0.0 { 0.0 } else { d / se })
    }

    /// The difference relative to the external price.
    pub fn relative(&self) -> Option<f64> {
        let ext = self.external?;
        (ext != 0.0).then(|| self.difference().map(|d| d / ext.abs())).flatten()
    }
}

fn matches(quote: &Quote, row: &Row) -> bool {
    if let Some(key) = &quote.file {
        let key = key.replace('\\', "/");
        let file = row.file.replace('\\', "/");
        let path = Path::new(&file);
        let name = path.file_name().and_then(|n| n.to_str());
        let stem = path.file_stem().and_then(|n| n.to_str());
        let rel = key.trim_start_matches("./");
        return file == key
            || file.ends_with(&format!("/{rel}"))
            || name == Some(key.as_str())
            || stem == Some(key.as_str());
    }
    match (&quote.product, &row.outcome) {
        (Some(product), Ok(p)) => p.product.trim() == product.trim(),
        _ => false,
    }
}

/// Compares the list with the priced rows. List lines come first, in list order, then
/// the payoffs the list does not name.
pub fn compare(list: &[Result<Quote, BadQuote>], rows: &[Row], max_z: f64) -> Vec<Line> {
    let mut used: HashSet<usize> = HashSet::new();
    let mut lines = Vec::new();
    for entry in list {
        let quote = match entry {
            Ok(q) => q,
            Err(bad) => {
                lines.push(Line {
                    list_line: Some(bad.line),
                    key: bad.key.clone(),
                    external: None,
                    tolerance: None,
                    priced: None,
                    verdict: Verdict::Error,
                    message: bad.message.clone(),
                });
                continue;
            }
        };
        let hits: Vec<usize> = rows.iter().enumerate().filter(|(_, r)| matches(quote, r)).map(|(i, _)| i).collect();
        used.extend(&hits);
        let mut line = Line {
            list_line: Some(quote.line),
            key: quote.key(),
            external: Some(quote.price),
            tolerance: quote.tolerance,
            priced: None,
            verdict: Verdict::Missing,
            message: String::new(),
        };
        match hits.as_slice() {
            [] => line.message = "no payoff file matches this row".into(),
            [i] => match &rows[*i].outcome {
                Ok(p) => {
                    line.priced = Some(p.clone());
                    let diff = p.estimate.price - quote.price;
                    let z = line.z().unwrap_or(f64::NAN);
                    let within = quote.tolerance.is_some_and(|t| diff.abs() <= t.amount(quote.price));
                    // A NaN z (no standard error) cannot vouch for agreement.
                    let close = z.abs() <= max_z;
                    // A quote rounded to cents differs from an exact price by up to half a
                    // cent: when our error is smaller than that (a payoff its control
                    // variates price exactly), the rounding is what the two can differ by.
                    let rounded = diff.abs() <= quote.rounding + max_z * p.estimate.std_error;
                    line.verdict = if close || within || rounded { Verdict::Agree } else { Verdict::Disagree };
                    line.message = match (close, within, rounded) {
                        (true, _, _) => String::new(),
                        (false, true, _) => format!("|z| above {max_z} but within the tolerance"),
                        (false, false, true) => {
                            format!("|z| above {max_z} but within the quote's rounding (±{})", quote.rounding)
                        }
                        (false, false, false) => format!("|z| above {max_z} and outside the tolerance"),
                    };
                }
                Err(_) => {
                    line.verdict = Verdict::Error;
                    line.message = rows[*i].error_message().unwrap_or_default();
                }
            },
            many => {
                line.verdict = Verdict::Error;
                let names: Vec<&str> = many.iter().map(|&i| rows[i].file.as_str()).collect();
                line.message =
                    format!("matches several payoff files: {} (fix: give the relative path)", names.join(", "));
            }
        }
        lines.push(line);
    }
    for (i, row) in rows.iter().enumerate() {
        if used.contains(&i) {
            continue;
        }
        let (priced, verdict, message) = match &row.outcome {
            Ok(p) => (Some(p.clone()), Verdict::Missing, "not in the price list".to_string()),
            Err(_) => (None, Verdict::Error, row.error_message().unwrap_or_default()),
        };
        lines.push(Line {
            list_line: None,
            key: row.file.clone(),
            external: None,
            tolerance: None,
            priced,
            verdict,
            message,
        });
    }
    lines
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_quote_is_known_to_half_its_last_digit() {
        let cases = [
            ("36989.19", 0.005),
            ("12.50", 0.005),
            ("-7.5", 0.05),
            ("37000", 0.5),
            ("1_250.0", 0.05),
            ("3.7e4", 500.0),
            ("2.25E-1", 0.0005),
            ("abc", 0.0),
            ("", 0.0),
            ("1.2.3e", 0.0),
        ];
        for (text, half) in cases {
            let got = quoted_rounding(text);
            assert!((got - half).abs() <= 1e-12 * half, "{text}: {got} vs {half}");
        }
    }
}
