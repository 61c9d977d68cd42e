//! A scenario ladder (`pathfold ladder`): rows as a table, CSV or JSON, and an SVG chart
//! of price against the first axis's shift, one line per value of the second axis, each
//! with a band of ±2 standard errors. The SVG is written by hand: a few lines, polygons
//! and labels, no plotting library.

use std::fmt::Write as _;
use std::io::{self, Write};

use serde_json::json;

use super::{decimals, group, Format, CAUTION};
use crate::ladder::Ladder;

fn axis_label(l: &Ladder, i: usize) -> String {
    let a = &l.axes[i];
    format!("{} shift ({})", a.shift.name(), a.shift.unit())
}

pub fn write_ladder(out: &mut dyn Write, l: &Ladder, format: Format) -> io::Result<()> {
    match format {
        Format::Json => {
            serde_json::to_writer_pretty(&mut *out, &to_json(l))?;
            writeln!(out)
        }
        Format::Csv => {
            let mut w = csv::Writer::from_writer(out);
            let mut header: Vec<String> = l.axes.iter().map(|a| format!("{}_shift", a.shift.name())).collect();
            header.extend(
                ["price", "std_error", "change", "change_std_error", "currency", "file", "caution"].map(String::from),
            );
            w.write_record(&header)?;
            for p in &l.points {
                let mut row: Vec<String> = p.shifts.iter().map(|x| x.to_string()).collect();
                row.extend([
                    p.price.to_string(),
                    p.std_error.to_string(),
                    p.change.to_string(),
                    p.change_std_error.to_string(),
                    l.currency.clone(),
                    l.file.clone(),
                    CAUTION.to_string(),
                ]);
                w.write_record(&row)?;
            }
            w.flush()
        }
        Format::Table => {
            writeln!(out, "{} ({})", l.product, l.file)?;
            let d = decimals(l.base_std_error);
            writeln!(
                out,
                "base price {} {} ± {}; every scenario on the same {} paths (seed {}){}",
                l.currency,
                group(l.base_price, d),
                group(l.base_std_error, d),
                l.paths,
                l.seed,
                match &l.only {
                    Some(n) => format!("; spot and volatility shifts on {n} only"),
                    None => "; shifts on every underlying".into(),
                }
            )?;
            writeln!(out)?;
            for i in 0..l.axes.len() {
                write!(out, " {:>24}", axis_label(l, i))?;
            }
            writeln!(out, "{:>20} {:>14} {:>18} {:>14}", "price", "std error", "change", "std error")?;
            for p in &l.points {
                for x in &p.shifts {
                    write!(out, " {x:>24}")?;
                }
                let d = decimals(p.std_error);
                writeln!(
                    out,
                    "{:>20} {:>14} {:>18} {:>14}",
                    group(p.price, d),
                    group(p.std_error, d),
                    group(p.change, d),
                    group(p.change_std_error, d)
                )?;
            }
            writeln!(out)?;
            writeln!(out, "{CAUTION}")
        }
    }
}

pub fn to_json(l: &Ladder) -> serde_json::Value {
    json!({
        "file": l.file,
        "product": l.product,
        "currency": l.currency,
        "axes": l.axes.iter().map(|a| json!({ "shift": a.shift.name(), "unit": a.shift.unit(), "values": a.values })).collect::<Vec<_>>(),
        "only": l.only,
        "base_price": l.base_price,
        "base_std_error": l.base_std_error,
        "paths": l.paths,
        "seed": l.seed,
        "control_variates": l.control_variates,
        "sampler": l.sampler.name(),
        "rows": l.points.iter().map(|p| json!({
            "shifts": p.shifts,
            "price": p.price,
            "std_error": p.std_error,
            "change": p.change,
            "change_std_error": p.change_std_error,
        })).collect::<Vec<_>>(),
        "caution": CAUTION,
    })
}

/// Colours of the lines, in order (repeated past the last).
const COLOURS: [&str; 6] = ["#1f5f8b", "#c0392b", "#2e8b57", "#8e44ad", "#d35400", "#555555"];

fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

/// A round step near `raw`: 1, 2 or 5 times a power of ten.
fn nice_step(raw: f64) -> f64 {
    if !(raw.is_finite() && raw > 0.0) {
        return 1.0;
    }
    let power = 10f64.powf(raw.log10().floor());
    let m = raw / power;
    let nice = if m <= 1.0 {
        1.0
    } else if m <= 2.0 {
        2.0
    } else if m <= 5.0 {
        5.0
    } else {
        10.0
    };
    nice * power
}

/// The chart as an SVG document.
pub fn chart_svg(l: &Ladder) -> String {
    let (w, h) = (820.0, 520.0);
    let (left, right, top, bottom) = (100.0, 190.0, 50.0, 90.0);
    let xs = &l.axes[0].values;
    let series: Vec<(Option<f64>, Vec<&crate::ladder::Point>)> = if l.axes.len() == 2 {
        l.axes[1].values.iter().map(|&v| (Some(v), l.points.iter().filter(|p| p.shifts[1] == v).collect())).collect()
    } else {
        vec![(None, l.points.iter().collect())]
    };
    let lo = l.points.iter().map(|p| p.price - 2.0 * p.std_error).fold(f64::INFINITY, f64::min);
    let hi = l.points.iter().map(|p| p.price + 2.0 * p.std_error).fold(f64::NEG_INFINITY, f64::max);
    let (lo, hi) = if hi > lo { (lo - 0.05 * (hi - lo), hi + 0.05 * (hi - lo)) } else { (lo - 1.0, hi + 1.0) };
    let (x0, x1) = (xs[0], *xs.last().unwrap_or(&xs[0]));
    let span = if x1 > x0 { x1 - x0 } else { 1.0 };
    let px = |x: f64| left + (x - x0) / span * (w - left - right);
    let py = |y: f64| top + (hi - y) / (hi - lo) * (h - top - bottom);
    let mut s = String::new();
    let _ = writeln!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}" font-family="sans-serif" font-size="12">"#
    );
    let _ = writeln!(s, r#"<rect width="{w}" height="{h}" fill="white"/>"#);
    let _ = writeln!(
        s,
        r#"<text x="{left}" y="24" font-size="15">{} — price against {}</text>"#,
        esc(&l.product),
        esc(&axis_label(l, 0))
    );
    // Axes and ticks.
    let (bx, by) = (h - bottom, w - right);
    let _ = writeln!(s, r#"<line x1="{left}" y1="{bx}" x2="{by}" y2="{bx}" stroke="black"/>"#);
    let _ = writeln!(s, r#"<line x1="{left}" y1="{top}" x2="{left}" y2="{bx}" stroke="black"/>"#);
    for &x in xs {
        let _ = writeln!(
            s,
            r#"<line x1="{0}" y1="{bx}" x2="{0}" y2="{1}" stroke="black"/><text x="{0}" y="{2}" text-anchor="middle">{3}</text>"#,
            px(x),
            bx + 5.0,
            bx + 20.0,
            x
        );
    }
    // Ticks at round numbers: a step of 1, 2 or 5 times a power of ten, about five of them.
    let step = nice_step((hi - lo) / 5.0);
    let d = if step >= 1.0 { 0 } else { (-step.log10().floor()) as usize };
    let mut tick = (lo / step).ceil() * step;
    while tick <= hi {
        let _ = writeln!(
            s,
            r##"<line x1="{left}" y1="{0}" x2="{by}" y2="{0}" stroke="#dddddd"/><text x="{1}" y="{2}" text-anchor="end">{3}</text>"##,
            py(tick),
            left - 6.0,
            py(tick) + 4.0,
            group(tick, d)
        );
        tick += step;
    }
    let _ = writeln!(
        s,
        r#"<text x="{}" y="{}" text-anchor="middle">{}</text>"#,
        (left + by) / 2.0,
        bx + 42.0,
        esc(&axis_label(l, 0))
    );
    let _ = writeln!(
        s,
        r#"<text x="20" y="{}" transform="rotate(-90 20 {})" text-anchor="middle">price ({}), band ±2 SE</text>"#,
        (top + bx) / 2.0,
        (top + bx) / 2.0,
        esc(&l.currency)
    );
    for (k, (value, points)) in series.iter().enumerate() {
        let colour = COLOURS[k % COLOURS.len()];
        let upper: Vec<String> =
            points.iter().map(|p| format!("{:.2},{:.2}", px(p.shifts[0]), py(p.price + 2.0 * p.std_error))).collect();
        let lower: Vec<String> = points
            .iter()
            .rev()
            .map(|p| format!("{:.2},{:.2}", px(p.shifts[0]), py(p.price - 2.0 * p.std_error)))
            .collect();
        let _ = writeln!(
            s,
            r#"<polygon class="band" points="{} {}" fill="{colour}" fill-opacity="0.18" stroke="none"/>"#,
            upper.join(" "),
            lower.join(" ")
        );
        let line: Vec<String> = points.iter().map(|p| format!("{:.2},{:.2}", px(p.shifts[0]), py(p.price))).collect();
        let _ = writeln!(
            s,
            r#"<polyline class="price" points="{}" fill="none" stroke="{colour}" stroke-width="2"/>"#,
            line.join(" ")
        );
        if let Some(v) = value {
            let y = top + 18.0 * k as f64;
            let _ = writeln!(
                s,
                r#"<line x1="{0}" y1="{y}" x2="{1}" y2="{y}" stroke="{colour}" stroke-width="2"/><text x="{2}" y="{3}">{4} {v} {5}</text>"#,
                by + 15.0,
                by + 40.0,
                by + 46.0,
                y + 4.0,
                l.axes[1].shift.name(),
                esc(l.axes[1].shift.unit())
            );
        }
    }
    // The caution, wrapped to the chart's width.
    let mut lines: Vec<String> = vec![String::new()];
    for word in CAUTION.split(' ') {
        let last = lines.last_mut().expect("one line at least");
        if !last.is_empty() && last.len() + 1 + word.len() > 130 {
            lines.push(word.to_string());
        } else {
            if !last.is_empty() {
                last.push(' ');
            }
            last.push_str(word);
        }
    }
    for (i, line) in lines.iter().enumerate() {
        let y = h - 12.0 - 13.0 * (lines.len() - 1 - i) as f64;
        let _ = writeln!(s, r#"<text x="10" y="{y}" font-size="10">{}</text>"#, esc(line));
    }
    s.push_str("</svg>\n");
    s
}
