//! Limits and the reading of payoff text, through the real binary: nesting deeper than the
//! documented limit is refused with its place (never a stack overflow, also on the worker
//! threads of a folder batch), text that is not UTF-8 names its line and column, a
//! byte-order mark and CR line ends are read, and `--set` slips are caught. The deep inputs
//! are generated here rather than kept as files.

mod common;

use common::{run, Scratch};

const HEAD: &str = "product \"deep\"\ncurrency USD\nnotional 1_000_000\nunderlyings ZPHX\n";

/// A payoff paying `amount` in one year, with the demo market copied beside it.
fn payoff(body: &str) -> String {
    format!("{HEAD}market \"market.toml\"\nat 1y {{\n    pay {body}\n}}\n")
}

fn folder(tag: &str, files: &[(&str, String)]) -> Scratch {
    let dir = Scratch::dir(tag);
    std::fs::copy("payoffs/market.toml", dir.join("market.toml")).expect("the demo market");
    for (name, text) in files {
        std::fs::write(dir.join(name), text).expect("a writable scratch file");
    }
    dir
}

fn price(path: &std::path::Path, extra: &[&str]) -> (String, String, Option<i32>) {
    let mut args = vec!["price", path.to_str().expect("a UTF-8 path"), "--paths", "400"];
    args.extend_from_slice(extra);
    if !extra.contains(&"--format") {
        args.extend_from_slice(&["--format", "csv"]);
    }
    run(&args)
}

/// Nested just under the limit, by every kind of nesting (and by their mixtures).
fn just_under() -> Vec<(&'static str, String)> {
    let chain = |n: usize| vec!["level(ZPHX)"; n].join(" + ");
    vec![
        ("parens.payoff", payoff(&format!("{}perf(ZPHX){}", "(".repeat(197), ")".repeat(197)))),
        ("negations.payoff", payoff(&format!("notional * {}perf(ZPHX)", "- ".repeat(198)))),
        (
            "else_if.payoff",
            format!(
                "{HEAD}market \"market.toml\"\nat 1y {{\n    if level(ZPHX) > 1000 {{ pay 1 }}{}\n}}\n",
                (0..197).map(|i| format!(" else if level(ZPHX) > {i} {{ pay {i} }}")).collect::<String>()
            ),
        ),
        (
            "if_values.payoff",
            payoff(&format!(
                "{}0",
                (0..197).map(|i| format!("if level(ZPHX) > {i} then {i} else ")).collect::<String>()
            )),
        ),
        ("sum.payoff", payoff(&format!("notional * ({})", chain(999)))),
        ("mixed.payoff", payoff(&format!("{}{}{}", "(1 + ".repeat(190), chain(809), ")".repeat(190)))),
    ]
}

#[test]
fn nesting_just_under_the_limit_prices_alone_and_in_a_batch() {
    let files = just_under();
    let dir = folder("front-under", &files);
    for (name, _) in &files {
        let (_, stderr, code) = price(&dir.join(name), &[]);
        assert_eq!(code, Some(0), "{name}: {stderr}");
    }
    // A batch runs on worker threads, whose stacks are smaller than the main thread's.
    let (stdout, stderr, code) = price(&dir, &[]);
    assert_eq!(code, Some(0), "{stderr}");
    assert_eq!(stdout.lines().count(), files.len() + 1, "one row per file:\n{stdout}");
}

#[test]
fn nesting_over_the_limit_is_refused_with_its_place() {
    let chain = |n: usize| vec!["level(ZPHX)"; n].join(" + ");
    let cases = [
        (
            "parens.payoff",
            payoff(&format!("{}perf(ZPHX){}", "(".repeat(7_000), ")".repeat(7_000))),
            "nested more than 200",
        ),
        ("negations.payoff", payoff(&format!("{}perf(ZPHX)", "- ".repeat(5_000))), "nested more than 200"),
        (
            "nots.payoff",
            format!("{HEAD}market \"market.toml\"\nat 1y {{\n    if {}true {{ pay 1 }}\n}}\n", "not ".repeat(5_000)),
            "nested more than 200",
        ),
        (
            "else_if.payoff",
            format!(
                "{HEAD}market \"market.toml\"\nat 1y {{\n    if level(ZPHX) > 1e9 {{ pay 1 }}{}\n}}\n",
                (0..10_000).map(|i| format!(" else if level(ZPHX) > {i} {{ pay {i} }}")).collect::<String>()
            ),
            "nested more than 200",
        ),
        ("sum.payoff", payoff(&chain(5_000)), "more than 1000 operations"),
    ];
    let files: Vec<(&str, String)> = cases.iter().map(|(n, t, _)| (*n, t.clone())).collect();
    let dir = folder("front-over", &files);
    for (name, _, message) in &cases {
        let (_, stderr, code) = price(&dir.join(name), &[]);
        assert_eq!(code, Some(2), "{name}: {stderr}");
        let first = stderr.lines().next().unwrap_or_default();
        assert!(first.contains(&format!("{name}:7:")) && first.contains(message), "{name}: {first}");
    }
    // In a batch each bad file costs only its own row, and no thread runs out of stack.
    let (stdout, stderr, code) = price(&dir, &[]);
    assert_eq!(code, Some(2), "{stderr}");
    assert_eq!(stdout.lines().count(), cases.len() + 1, "one row per file:\n{stdout}");
}

#[test]
fn text_that_is_not_utf8_names_the_line_and_column() {
    let dir = folder("front-utf8", &[]);
    let file = dir.join("latin1.payoff");
    let mut bytes = payoff("notional").into_bytes();
    bytes.extend_from_slice(b"# caf\xe9\n");
    std::fs::write(&file, bytes).unwrap();
    let (_, stderr, code) = price(&file, &[]);
    assert_eq!(code, Some(2));
    assert!(stderr.starts_with(&format!("{}:9:6: byte 0xE9 here is not UTF-8 text", file.display())), "{stderr}");
    assert!(stderr.contains("fix: save the file as UTF-8"), "{stderr}");
}

#[test]
fn a_byte_order_mark_and_any_line_ends_price_the_same() {
    let plain = payoff("notional * max(perf(ZPHX) - 1, 0)  # a call");
    let files = [
        ("plain.payoff", plain.clone()),
        ("bom.payoff", format!("\u{feff}{plain}")),
        ("crlf.payoff", plain.replace('\n', "\r\n")),
        ("cr.payoff", plain.replace('\n', "\r")),
    ];
    let dir = folder("front-line-ends", &files);
    let prices: Vec<String> = files
        .iter()
        .map(|(name, _)| {
            let (stdout, stderr, code) = price(&dir.join(name), &["--format", "json"]);
            assert_eq!(code, Some(0), "{name}: {stderr}");
            let v: serde_json::Value = serde_json::from_str(&stdout).expect("JSON");
            v["price"].to_string()
        })
        .collect();
    assert!(prices.iter().all(|p| *p == prices[0]), "{prices:?}");
}

#[test]
fn a_place_on_a_cr_line_is_counted_right() {
    let text = format!("{HEAD}market \"market.toml\"\rat 1y {{\r    pay notional * strik\r}}\r");
    let dir = folder("front-cr-place", &[("cr.payoff", text)]);
    let (_, stderr, code) = price(&dir.join("cr.payoff"), &[]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("cr.payoff:7:20: unknown name `strik`"), "{stderr}");
}

#[test]
fn a_set_value_with_a_line_break_is_refused() {
    let (_, stderr, code) = run(&["price", "payoffs/european_call.payoff", "--set", "strike=1\n0"]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("holds a line break"), "{stderr}");
}

#[test]
fn a_bare_number_that_looks_like_a_missing_percent_is_warned_about() {
    let text = format!("{HEAD}market \"market.toml\"\nparam coupon = 0.80%\nat 1y {{\n    pay notional * coupon\n}}\n");
    let dir = folder("front-slip", &[("coupon.payoff", text)]);
    let file = dir.join("coupon.payoff");
    let (_, stderr, code) = price(&file, &["--set", "coupon=0.8"]);
    assert_eq!(code, Some(0), "{stderr}");
    assert!(stderr.contains("warning: `--set coupon=0.8` sets `coupon` to 0.8, that is 80%"), "{stderr}");
    assert!(stderr.contains("write `--set coupon=0.8%`"), "{stderr}");
    // A value of the default's own order of magnitude is no slip.
    let (_, stderr, code) = price(&file, &["--set", "coupon=0.009"]);
    assert_eq!(code, Some(0), "{stderr}");
    assert!(!stderr.contains("warning"), "{stderr}");
}

#[test]
fn the_same_warning_at_many_places_is_shown_once_with_a_count() {
    let conditions: String = (0..900).map(|_| " + (if perf(ZPHX) > 90 then 1 else 0)").collect();
    let text = payoff(&format!("notional * (0{conditions})"));
    let dir = folder("front-warnings", &[("many.payoff", text)]);
    let (_, stderr, code) = price(&dir.join("many.payoff"), &[]);
    assert_eq!(code, Some(0), "{stderr}");
    assert_eq!(stderr.matches("warning:").count(), 1, "{stderr}");
    assert!(stderr.contains("(and at 899 more places)"), "{stderr}");
    assert!(stderr.len() < 2_000, "the warning stays short: {} bytes", stderr.len());
}
