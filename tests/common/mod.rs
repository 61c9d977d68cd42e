//! Helpers shared by the integration tests: run the real binary, read its JSON.
#![allow(dead_code, unreachable_pub)]

use std::path::{Path, PathBuf};
use std::process::Command;

use pathfold::date::Date;

/// Runs `pathfold` with `args` from the repository root; returns its whole output.
pub fn output(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_pathfold"))
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("the binary runs")
}

/// Runs `pathfold` with `args`; returns stdout, stderr and the exit status.
pub fn run(args: &[&str]) -> (String, String, Option<i32>) {
    let out = Command::new(env!("CARGO_BIN_EXE_pathfold")).args(args).output().expect("the binary runs");
    (
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
        out.status.code(),
    )
}

/// Prices `file` with `--format json` and extra `args`; panics with stderr on failure.
pub fn price(file: &str, args: &[&str]) -> serde_json::Value {
    let mut all = vec!["price", file, "--format", "json"];
    all.extend_from_slice(args);
    let (stdout, stderr, code) = run(&all);
    assert_eq!(code, Some(0), "pricing {file} failed:\n{stderr}");
    serde_json::from_str(&stdout).unwrap_or_else(|e| panic!("{file}: not JSON ({e}):\n{stdout}"))
}

/// Price and standard error of a JSON result.
pub fn price_se(v: &serde_json::Value) -> (f64, f64) {
    (v["price"].as_f64().expect("price"), v["std_error"].as_f64().expect("std_error"))
}

/// ACT/365 years from the demo valuation date 2026-12-01 to `date`.
pub fn years(date: &str) -> f64 {
    Date::parse("2026-12-01").unwrap().years_until(Date::parse(date).expect("a test date"))
}

/// Asserts `|mc − reference| ≤ k·se`, naming the reference on failure. A price its
/// control variates reproduce exactly (a standard error at the level of rounding) is held
/// to the closed forms' own accuracy instead: 1e-9 of the reference.
pub fn assert_within(what: &str, mc: f64, se: f64, reference: f64, k: f64) {
    let z = (mc - reference) / se;
    let exact = (mc - reference).abs() <= 1e-9 * reference.abs().max(1.0);
    assert!(
        z.abs() <= k || exact,
        "{what}: Monte Carlo {mc:.4} ± {se:.4} vs reference {reference:.4}: z = {z:.2}, allowed {k}"
    );
}

/// The demo market (payoffs/market.toml), for references.
pub const RATE: f64 = 0.038;
pub struct Asset {
    pub vol: f64,
    pub q: f64,
}
pub const ZPHX: Asset = Asset { vol: 0.18, q: 0.019 };
pub const QMEN: Asset = Asset { vol: 0.32, q: 0.031 };
pub const OSMP: Asset = Asset { vol: 0.26, q: 0.012 };
pub const VNTL: Asset = Asset { vol: 0.29, q: 0.0 };

/// A file in its own temporary folder, removed with the folder when dropped. `tag` must
/// be unique within a test binary (tests run in parallel in one process).
pub struct Scratch {
    dir: PathBuf,
    file: PathBuf,
}

impl Scratch {
    /// An empty folder; the `Scratch` stands for the folder itself.
    pub fn dir(tag: &str) -> Scratch {
        let dir = std::env::temp_dir().join(format!("pathfold-{tag}-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("a writable temporary folder");
        Scratch { file: dir.clone(), dir }
    }

    /// A folder holding one file `name` with `text`; the `Scratch` stands for the file.
    pub fn file(tag: &str, name: &str, text: &str) -> Scratch {
        let mut s = Scratch::dir(tag);
        s.file = s.dir.join(name);
        std::fs::write(&s.file, text).expect("a writable temporary file");
        s
    }

    /// A path inside the folder.
    pub fn join(&self, name: &str) -> PathBuf {
        self.dir.join(name)
    }
}

impl std::ops::Deref for Scratch {
    type Target = Path;
    fn deref(&self) -> &Path {
        &self.file
    }
}

impl AsRef<Path> for Scratch {
    fn as_ref(&self) -> &Path {
        &self.file
    }
}

impl Drop for Scratch {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.dir);
    }
}

/// Where a test's market comes from: a file of the repository, or a text written beside
/// the payoff.
pub enum MarketArg<'a> {
    File(&'a str),
    Text(&'a str),
}

/// Prices a payoff written from `body` (after a header: product `tag`, USD, notional
/// 100, `underlyings`), in a scratch folder of its own, with `--format json --seed seed`
/// and `extra`; the run must succeed.
pub fn price_body(
    tag: &str,
    underlyings: &str,
    body: &str,
    market: MarketArg<'_>,
    seed: &str,
    extra: &[&str],
) -> serde_json::Value {
    let text = format!("product \"{tag}\"\ncurrency USD\nnotional 100\nunderlyings {underlyings}\n{body}");
    let file = Scratch::file(&format!("body-{tag}"), "product.payoff", &text);
    let market = match market {
        MarketArg::File(path) => path.to_string(),
        MarketArg::Text(toml) => {
            let path = file.join("market.toml");
            std::fs::write(&path, toml).expect("a writable temporary file");
            path.to_str().expect("a UTF-8 temporary path").to_string()
        }
    };
    let mut args = vec!["price", file.to_str().unwrap(), "--market", &market, "--format", "json", "--seed", seed];
    args.extend_from_slice(extra);
    let (stdout, stderr, code) = run(&args);
    assert_eq!(code, Some(0), "{stderr}");
    serde_json::from_str(&stdout).unwrap()
}

/// The names of the control variates a JSON result used.
pub fn controls(v: &serde_json::Value) -> Vec<String> {
    v["controls"].as_array().expect("controls").iter().map(|c| c.as_str().unwrap().to_string()).collect()
}
