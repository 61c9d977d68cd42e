//! Batch pricing through the real binary: a folder of good payoffs with broken files
//! mixed in, CSV and JSON output, error-bounded runs, atomic output and determinism.

mod common;

use std::path::Path;
use std::process::Output;

use common::output as pathfold;

use pathfold::closed_form::{black_scholes, OptionKind};
use pathfold::output::CAUTION;

fn stdout(o: &Output) -> String {
    String::from_utf8(o.stdout.clone()).expect("UTF-8 stdout")
}

fn stderr(o: &Output) -> String {
    String::from_utf8(o.stderr.clone()).expect("UTF-8 stderr")
}

/// Reads CSV text into (header, rows of field maps).
fn read_csv(text: &str) -> Vec<std::collections::HashMap<String, String>> {
    let mut r = csv::Reader::from_reader(text.as_bytes());
    let headers = r.headers().expect("a header row").clone();
    r.records()
        .map(|rec| {
            let rec = rec.expect("a well-formed CSV row");
            headers.iter().zip(rec.iter()).map(|(h, v)| (h.to_string(), v.to_string())).collect()
        })
        .collect()
}

/// Every `.payoff` file under `payoffs/`, as the batch walks them: sorted by path.
fn demo_payoffs() -> Vec<String> {
    fn walk(dir: &Path, out: &mut Vec<String>) {
        let mut entries: Vec<_> = std::fs::read_dir(dir).unwrap().map(|e| e.unwrap().path()).collect();
        entries.sort();
        for p in entries {
            if p.is_dir() {
                walk(&p, out);
            } else if p.extension().is_some_and(|x| x == "payoff") {
                let root = Path::new(env!("CARGO_MANIFEST_DIR"));
                out.push(p.strip_prefix(root).unwrap().to_string_lossy().into_owned());
            }
        }
    }
    let mut v = Vec::new();
    walk(&Path::new(env!("CARGO_MANIFEST_DIR")).join("payoffs"), &mut v);
    v
}

const BROKEN: [&str; 3] = [
    "tests/batch/broken/no_market.payoff",
    "tests/batch/broken/syntax_error.payoff",
    "tests/batch/broken/unknown_name.payoff",
];

/// The demo market's one-year at-the-money ZPHX call by Black–Scholes–Merton (our
/// closed form, checked against Hull's worked example and Haug's tables in
/// src/closed_form/vanilla.rs): spot 4250, vol 18%, dividend yield 1.9%, USD 3.8%, T = 1
/// (2026-12-01 to 2027-12-01, ACT/365), per 1,000,000 notional.
fn demo_call_reference() -> f64 {
    1_000_000.0 * black_scholes(OptionKind::Call, 1.0, 1.0, 1.0, 0.038, 0.038 - 0.019, 0.18)
}

#[test]
fn a_batch_prices_every_good_file_and_reports_every_broken_one() {
    let o = pathfold(&["price", "payoffs", "tests/batch/broken", "--paths", "20000", "--format", "csv"]);
    assert_eq!(o.status.code(), Some(2), "a failed row makes the exit status 2; stderr: {}", stderr(&o));
    let rows = read_csv(&stdout(&o));
    let good = demo_payoffs();
    assert_eq!(rows.len(), good.len() + BROKEN.len());
    for (row, file) in
        rows.iter().zip(good.iter().chain(BROKEN.iter().map(|s| s.to_string()).collect::<Vec<_>>().iter()))
    {
        assert_eq!(&row["file"], file);
        assert_eq!(row["caution"], CAUTION);
        assert_eq!(row["pathfold_version"], env!("CARGO_PKG_VERSION"));
    }
    for row in &rows[..good.len()] {
        assert_eq!(row["status"], "ok", "{}: {}", row["file"], row["error"]);
        let price: f64 = row["price"].parse().unwrap();
        let se: f64 = row["std_error"].parse().unwrap();
        assert!(price.is_finite() && se.is_finite() && se >= 0.0, "{row:?}");
        assert_eq!(row["paths"], "20000");
        assert_eq!(row["seed"], "1");
        assert_eq!(row["payoff_sha256"].len(), 64);
        assert_eq!(row["market_sha256"].len(), 64);
    }
    for (row, file) in rows[good.len()..].iter().zip(BROKEN) {
        assert_eq!(row["status"], "error");
        assert_eq!(row["price"], "");
        assert!(stderr(&o).contains(file), "the full diagnostic of {file} goes to stderr");
    }
    assert!(rows[good.len()].iter().any(|(_, v)| v.contains("no_such_market.toml")));
    assert!(rows[good.len() + 1]["error"].starts_with("tests/batch/broken/syntax_error.payoff:8:37: "));
    assert_eq!(
        rows[good.len() + 2]["error"],
        "tests/batch/broken/unknown_name.payoff:12:37: unknown name `strik` (fix: did you mean `strike`?)"
    );
    // One good row checked against its closed form, within 4 standard errors.
    let call = rows.iter().find(|r| r["file"] == "payoffs/european_call.payoff").unwrap();
    let (price, se): (f64, f64) = (call["price"].parse().unwrap(), call["std_error"].parse().unwrap());
    let reference = demo_call_reference();
    assert!((price - reference).abs() <= 4.0 * se, "call {price} ± {se} against Black–Scholes {reference}");
}

#[test]
fn the_table_and_json_carry_every_row_and_the_caution() {
    let o = pathfold(&["price", "payoffs", "tests/batch/broken", "--paths", "2000"]);
    assert_eq!(o.status.code(), Some(2));
    let out = stdout(&o);
    assert!(out.contains("ZPHX one-year at-the-money call"));
    assert!(out.lines().any(|l| l.starts_with("tests/batch/broken/unknown_name.payoff ")
        && l.ends_with(
            "error: tests/batch/broken/unknown_name.payoff:12:37: unknown name `strik` (fix: did you mean `strike`?)"
        )));
    assert!(out.contains(&format!("{} files: {} priced, 3 failed", demo_payoffs().len() + 3, demo_payoffs().len())));
    assert!(out.trim_end().ends_with(CAUTION));

    let o = pathfold(&["price", "payoffs", "tests/batch/broken", "--paths", "2000", "--format", "json"]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("valid JSON");
    assert_eq!(v["caution"], CAUTION);
    let results = v["results"].as_array().unwrap();
    assert_eq!(results.len(), demo_payoffs().len() + 3);
    assert_eq!(results.iter().filter(|r| r["status"] == "error").count(), 3);
    let ok = results.iter().find(|r| r["status"] == "ok").unwrap();
    for key in ["pathfold_version", "seed", "paths", "antithetic", "control_variates", "payoff_sha256", "market_sha256"]
    {
        assert!(!ok["reproduce"][key].is_null(), "reproduce.{key}");
    }
}

#[test]
fn csv_round_trips_against_json() {
    let args = ["price", "payoffs/digital.payoff", "payoffs/up_and_out_call.payoff", "--paths", "4000"];
    let csv = pathfold(&[&args[..], &["--format", "csv"]].concat());
    let json = pathfold(&[&args[..], &["--format", "json"]].concat());
    assert_eq!(csv.status.code(), Some(0));
    let rows = read_csv(&stdout(&csv));
    let v: serde_json::Value = serde_json::from_slice(&json.stdout).unwrap();
    let results = v["results"].as_array().unwrap();
    assert_eq!(rows.len(), 2);
    for (row, r) in rows.iter().zip(results) {
        assert_eq!(row["file"], r["file"].as_str().unwrap());
        assert_eq!(row["product"], r["product"].as_str().unwrap());
        // Shortest round-trip decimal on both sides: the same bits.
        assert_eq!(row["price"].parse::<f64>().unwrap(), r["price"].as_f64().unwrap());
        assert_eq!(row["std_error"].parse::<f64>().unwrap(), r["std_error"].as_f64().unwrap());
        assert_eq!(row["payoff_sha256"], r["reproduce"]["payoff_sha256"].as_str().unwrap());
    }
}

#[test]
fn a_single_file_as_csv_is_one_row() {
    let o = pathfold(&["price", "payoffs/european_call.payoff", "--paths", "2000", "--format", "csv"]);
    assert_eq!(o.status.code(), Some(0));
    let rows = read_csv(&stdout(&o));
    assert_eq!(rows.len(), 1);
    assert_eq!(rows[0]["product"], "ZPHX one-year at-the-money call");
}

#[test]
fn a_batch_gives_the_same_bits_on_one_thread_or_two() {
    let run = |threads: &str| {
        let o = pathfold(&["price", "payoffs", "--paths", "3000", "--format", "csv", "--threads", threads]);
        assert_eq!(o.status.code(), Some(0));
        read_csv(&stdout(&o))
            .into_iter()
            .map(|mut r| {
                r.remove("seconds");
                r
            })
            .collect::<Vec<_>>()
    };
    assert_eq!(run("1"), run("2"));
}

#[test]
fn target_se_meets_its_target_and_equals_a_fixed_run() {
    // Without control variates, so the estimate is plain (antithetic) Monte Carlo.
    let base = ["price", "payoffs/european_call.payoff", "--no-control", "--format", "json", "--seed", "5"];
    let o = pathfold(&[&base[..], &["--paths", "2048", "--target-se", "0.05%"]].concat());
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let se = v["std_error"].as_f64().unwrap();
    assert_eq!(v["target"]["met"], true);
    assert_eq!(v["target"]["std_error"].as_f64().unwrap(), 500.0);
    assert!(se <= 500.0, "standard error {se} above the 500 USD target");
    let paths = v["paths"].as_u64().unwrap();
    assert!(paths > 2048, "the target needs more than the first 2048 paths");
    // The same seed at the final path count gives the same bits.
    let fixed = pathfold(&[&base[..], &["--paths", &paths.to_string()]].concat());
    let w: serde_json::Value = serde_json::from_slice(&fixed.stdout).unwrap();
    assert_eq!(w["price"].as_f64(), v["price"].as_f64());
    assert_eq!(w["std_error"].as_f64(), v["std_error"].as_f64());
    // And the price is right: Black–Scholes–Merton, within 4 standard errors.
    let price = v["price"].as_f64().unwrap();
    let reference = demo_call_reference();
    assert!((price - reference).abs() <= 4.0 * se, "{price} ± {se} against {reference}");
}

#[test]
fn an_unreachable_target_says_so() {
    let o = pathfold(&[
        "price",
        "payoffs/european_call.payoff",
        "--no-control",
        "--paths",
        "1000",
        "--target-se",
        "1",
        "--max-paths",
        "4096",
    ]);
    assert_eq!(o.status.code(), Some(0));
    let out = stdout(&o);
    assert!(out.contains("error target      1.00 USD: NOT met (at most 4,096 paths)"), "{out}");
    assert!(out.contains("4,096 in antithetic pairs"), "{out}");
}

#[test]
fn a_bad_target_is_refused() {
    let o = pathfold(&["price", "payoffs/european_call.payoff", "--target-se", "3 percent"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).starts_with("--target-se 3 percent: give a positive amount"), "{}", stderr(&o));
}

fn scratch(name: &str) -> common::Scratch {
    common::Scratch::dir(&format!("batch-{name}"))
}

#[test]
fn output_goes_to_the_file_whole() {
    let dir = scratch("output");
    let target = dir.join("prices.csv");
    std::fs::write(&target, "old contents\n").unwrap();
    let o = pathfold(&[
        "price",
        "payoffs",
        "tests/batch/broken",
        "--paths",
        "2000",
        "--format",
        "csv",
        "--output",
        target.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(o.stdout.is_empty());
    let rows = read_csv(&std::fs::read_to_string(&target).unwrap());
    assert_eq!(rows.len(), demo_payoffs().len() + 3);
    let left: Vec<_> = std::fs::read_dir(&dir).unwrap().map(|e| e.unwrap().file_name()).collect();
    assert_eq!(left, vec![std::ffi::OsString::from("prices.csv")], "no temporary file is left behind");
}

#[test]
fn a_missing_input_is_a_row_not_a_stop() {
    let o = pathfold(&["price", "payoffs/digital.payoff", "tests/batch/nowhere.payoff", "--paths", "2000"]);
    assert_eq!(o.status.code(), Some(2));
    let out = stdout(&o);
    assert!(out.contains("QMEN six-month digital"));
    assert!(out.contains("tests/batch/nowhere.payoff  error: tests/batch/nowhere.payoff: no such file or folder (fix: check the path)"), "{out}");
}

/// Issue 8's reproducers, every bad payoff under `tests/bad/`, priced as one folder: the
/// batch finishes and gives exactly one row per file, whatever each file contains. The
/// files that need their `# args:` line price or fail on their own; the others are errors.
#[test]
fn a_batch_of_every_bad_file_gives_one_row_per_file() {
    fn walk(dir: &Path, out: &mut Vec<String>) {
        for e in std::fs::read_dir(dir).expect("readable fixture folder") {
            let p = e.expect("entry").path();
            if p.is_dir() {
                walk(&p, out);
            } else if p.extension().is_some_and(|x| x == "payoff") {
                out.push(p.display().to_string());
            }
        }
    }
    let mut files = Vec::new();
    walk(Path::new("tests/bad"), &mut files);
    files.sort();
    assert!(files.len() > 30, "the reproducers are there: {}", files.len());
    let o = pathfold(&["price", "tests/bad", "--paths", "512", "--format", "json"]);
    assert_eq!(o.status.code(), Some(2), "a batch with failed rows exits 2:\n{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("valid JSON, however bad the files");
    let rows = v["results"].as_array().expect("the rows");
    let mut got: Vec<String> = rows.iter().map(|r| r["file"].as_str().expect("a file").to_string()).collect();
    got.sort();
    assert_eq!(got, files, "one row per file, no more, no fewer");
    let errors = rows.iter().filter(|r| r["status"] == "error").count();
    assert!(errors * 10 >= files.len() * 8, "most reproducers are refused: {errors} of {}", files.len());
}
