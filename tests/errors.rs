//! Bad input: every file under `tests/bad/` must be refused with exit status 2 and exactly
//! the diagnostic in the `.stderr` file beside it. Payoff files are priced as they are
//! (a first line `# args: ...` adds arguments); market files under `tests/bad/markets/`
//! are used to price `tests/bad/markets/call.payoff`, which is good.
//!
//! To update the expected messages after a deliberate wording change, run with
//! `PATHFOLD_BLESS=1` and review the diff.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::Command;

fn run(args: &[String]) -> (String, String, Option<i32>) {
    let out = Command::new(env!("CARGO_BIN_EXE_pathfold")).args(args).output().expect("the binary runs");
    (
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
        out.status.code(),
    )
}

fn files(dir: &str, ext: &str) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = fs::read_dir(dir)
        .expect("fixture folder exists")
        .map(|e| e.expect("readable entry").path())
        .filter(|p| p.extension().is_some_and(|e| e == ext))
        .collect();
    v.sort();
    v
}

fn expect_refusal(case: &Path, args: Vec<String>, failures: &mut Vec<String>) {
    let (stdout, stderr, code) = run(&args);
    let expected_file = case.with_extension("stderr");
    if std::env::var_os("PATHFOLD_BLESS").is_some() {
        fs::write(&expected_file, &stderr).expect("writable fixture");
    }
    let expected =
        fs::read_to_string(&expected_file).unwrap_or_else(|_| format!("(missing {})", expected_file.display()));
    if code != Some(2) {
        failures.push(format!("{}: exit status {code:?}, expected 2", case.display()));
    }
    if !stdout.is_empty() {
        failures.push(format!("{}: wrote to stdout on bad input:\n{stdout}", case.display()));
    }
    if stderr != expected {
        failures.push(format!("{}: stderr differs\n--- expected\n{expected}--- got\n{stderr}", case.display()));
    }
}

#[test]
fn bad_payoff_files_are_refused_with_their_message() {
    let mut failures = Vec::new();
    let cases = files("tests/bad", "payoff");
    assert!(cases.len() >= 10, "the bad-payoff folder holds its cases");
    for case in cases {
        let text = fs::read_to_string(&case).expect("readable");
        let mut args = vec!["price".to_string(), case.display().to_string(), "--paths".into(), "2000".into()];
        if let Some(extra) = text.lines().next().and_then(|l| l.strip_prefix("# args:")) {
            args.extend(extra.split_whitespace().map(str::to_string));
        }
        expect_refusal(&case, args, &mut failures);
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

#[test]
fn bad_market_files_are_refused_with_their_message() {
    let mut failures = Vec::new();
    let cases = files("tests/bad/markets", "toml");
    assert!(cases.len() >= 5, "the bad-market folder holds its cases");
    for case in cases {
        let args = vec![
            "price".to_string(),
            "tests/bad/markets/call.payoff".into(),
            "--market".into(),
            case.display().to_string(),
            "--paths".into(),
            "2000".into(),
        ];
        expect_refusal(&case, args, &mut failures);
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

#[test]
fn a_missing_market_file_is_named() {
    let (_, stderr, code) = run(&[
        "price".into(),
        "tests/bad/markets/call.payoff".into(),
        "--market".into(),
        "tests/bad/markets/no_such_file.toml".into(),
    ]);
    assert_eq!(code, Some(2));
    assert!(stderr.starts_with("tests/bad/markets/no_such_file.toml: "), "{stderr}");
}

#[test]
fn a_payoff_without_a_market_says_how_to_give_one() {
    let (_, stderr, code) = run(&["price".into(), "tests/bad/markets/call.payoff".into()]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("no market data"), "{stderr}");
    assert!(stderr.contains("--market FILE"), "{stderr}");
}

#[test]
fn likely_slips_are_warned_about_but_priced() {
    let (stdout, stderr, code) =
        run(&["price".into(), "tests/warn/no_percent.payoff".into(), "--paths".into(), "2000".into()]);
    assert_eq!(code, Some(0), "{stderr}");
    assert!(stdout.contains("price"), "{stdout}");
    assert_eq!(
        stderr,
        "tests/warn/no_percent.payoff:9:8: warning: a performance is compared with 70, that is 7000% of the initial level\n   9 |     if worst < barrier {\n     |        ^^^^^^^^^^^^^^^\n  fix: if you meant 70 percent, write `70%` (here or where the parameter is given)\n"
    );
    let (_, stderr, code) = run(&[
        "price".into(),
        "payoffs/digital.payoff".into(),
        "--paths".into(),
        "2000".into(),
        "--set".into(),
        "payout=15".into(),
    ]);
    assert_eq!(code, Some(0));
    assert!(stderr.contains("warning: `--set payout=15` sets `payout` to 15, that is 1500%"), "{stderr}");
}
