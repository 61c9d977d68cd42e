//! Work split into parts run as separate processes (`price --part K/N`), combined again
//! (`merge`, or CSV concatenation for a library). The reference for every figure here is
//! the single run of the same payoff with the same paths and seed: a merge must give its
//! bits exactly, so results are compared as text (JSON and CSV print the shortest digits
//! that read back to the same double, so equal text is equal bits).

mod common;

use std::path::{Path, PathBuf};

use common::Scratch;

const AUTOCALL: &str = "payoffs/worst_of_autocall.payoff";

/// Runs pathfold from the repository root; panics with stderr unless it exits 0.
fn ok(args: &[&str]) -> String {
    let out = common::output(args);
    assert_eq!(out.status.code(), Some(0), "pathfold {args:?} failed:\n{}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8(out.stdout).expect("UTF-8")
}

/// Runs pathfold from the repository root; returns stderr and the exit status.
fn fails(args: &[&str]) -> (String, Option<i32>) {
    let out = common::output(args);
    (String::from_utf8_lossy(&out.stderr).into_owned(), out.status.code())
}

/// A JSON report without the one field that is not part of the result: the time taken.
fn without_time(json: &str) -> serde_json::Value {
    let mut v: serde_json::Value = serde_json::from_str(json).expect("JSON");
    v.as_object_mut().expect("an object").remove("elapsed_seconds");
    v
}

/// Runs the N parts of `file` with `options`, each as its own process, into `dir`;
/// returns the part files, in part order.
fn run_parts(dir: &Scratch, file: &str, n: u64, options: &[&str]) -> Vec<PathBuf> {
    (1..=n)
        .map(|k| {
            let out = dir.join(&format!("part-{k:02}.json"));
            let part = format!("{k}/{n}");
            // Parts run on different thread counts: the bits do not depend on it.
            let threads = if k % 2 == 0 { "1" } else { "2" };
            let mut args =
                vec!["price", file, "--part", &part, "--threads", threads, "--output", out.to_str().unwrap()];
            args.extend_from_slice(options);
            ok(&args);
            out
        })
        .collect()
}

fn merge_json(parts: &[PathBuf]) -> String {
    let mut args = vec!["merge", "--format", "json"];
    args.extend(parts.iter().map(|p| p.to_str().unwrap()));
    ok(&args)
}

#[test]
fn sixteen_parts_of_the_demo_autocall_merge_to_the_single_runs_bits() {
    let dir = Scratch::dir("parts-sixteen");
    let options = ["--paths", "40000", "--seed", "7"];
    let parts = run_parts(&dir, AUTOCALL, 16, &options);
    let merged = merge_json(&parts);
    let single = ok(&["price", AUTOCALL, "--format", "json", "--paths", "40000", "--seed", "7"]);
    assert_eq!(without_time(&merged), without_time(&single), "reference: the single run's bits");
    // The parts may be given in any order.
    let mut reversed = parts.clone();
    reversed.reverse();
    assert_eq!(without_time(&merge_json(&reversed)), without_time(&single));
    // The table and CSV of the merge are those of the single run too (but for the time).
    let strip_time =
        |text: &str| text.lines().filter(|l| !l.trim_start().starts_with("time ")).collect::<Vec<_>>().join("\n");
    let mut table = vec!["merge"];
    table.extend(parts.iter().map(|p| p.to_str().unwrap()));
    let single_table = ok(&["price", AUTOCALL, "--paths", "40000", "--seed", "7"]);
    assert_eq!(strip_time(&ok(&table)), strip_time(&single_table));
}

#[test]
fn parts_without_antithetics_or_controls_and_an_uneven_last_block_merge_exactly() {
    // 5,001 paths without antithetic pairs: 20 blocks, the last of 137 paths; with a
    // parameter override and no control variates.
    let dir = Scratch::dir("parts-uneven");
    let options = ["--paths", "5001", "--no-antithetic", "--no-control", "--set", "coupon=3%"];
    let parts = run_parts(&dir, AUTOCALL, 3, &options);
    let mut single = vec!["price", AUTOCALL, "--format", "json"];
    single.extend_from_slice(&options);
    assert_eq!(without_time(&merge_json(&parts)), without_time(&ok(&single)), "reference: the single run's bits");
    // Each block in exactly one part: as many parts as blocks works too.
    let dir = Scratch::dir("parts-one-block-each");
    let parts = run_parts(&dir, AUTOCALL, 20, &options);
    assert_eq!(without_time(&merge_json(&parts)), without_time(&ok(&single)));
}

/// The four parts of a run of the demo autocall, for the refusal tests.
fn four_parts(tag: &str) -> (Scratch, Vec<PathBuf>) {
    let dir = Scratch::dir(tag);
    let parts = run_parts(&dir, AUTOCALL, 4, &["--paths", "4096"]);
    (dir, parts)
}

fn merge_fails(parts: &[&Path]) -> String {
    let mut args = vec!["merge"];
    args.extend(parts.iter().map(|p| p.to_str().unwrap()));
    let (stderr, code) = fails(&args);
    assert_eq!(code, Some(2), "merge {parts:?} should be refused:\n{stderr}");
    stderr
}

#[test]
fn parts_that_do_not_make_one_run_are_refused_naming_the_culprit() {
    let (dir, p) = four_parts("parts-refused");
    let [a, b, c, d] = [&p[0], &p[1], &p[2], &p[3]].map(PathBuf::as_path);
    // Missing, repeated.
    let e = merge_fails(&[a, b, d]);
    assert!(e.contains("missing part 3/4"), "{e}");
    let e = merge_fails(&[a, b, c, d, c]);
    assert!(e.contains("both part 3/4") && e.contains("the same file given twice"), "{e}");
    let copy = dir.join("copy.json");
    std::fs::copy(c, &copy).unwrap();
    let e = merge_fails(&[a, b, c, d, &copy]);
    assert!(e.contains("both part 3/4") && e.contains("copy.json"), "{e}");
    // Writing the result over one of the parts would destroy it.
    let (e, code) = fails(&[
        "merge",
        a.to_str().unwrap(),
        b.to_str().unwrap(),
        c.to_str().unwrap(),
        d.to_str().unwrap(),
        "--output",
        b.to_str().unwrap(),
    ]);
    assert_eq!(code, Some(2));
    assert!(e.contains("is the input"), "{e}");
    assert!(std::fs::read_to_string(b).unwrap().contains("pathfold partial result"));
    // Another seed, paths, override, payoff, split: the odd part is named with what differs.
    let other = |name: &str, file: &str, options: &[&str]| {
        let out = dir.join(name);
        let mut args = vec!["price", file, "--output", out.to_str().unwrap()];
        args.extend_from_slice(options);
        ok(&args);
        out
    };
    let seed = other("seed.json", AUTOCALL, &["--paths", "4096", "--part", "2/4", "--seed", "2"]);
    let e = merge_fails(&[a, &seed, c, d]);
    assert!(e.contains("seed.json (part 2/4) does not belong") && e.contains("its seed is 2, not 1"), "{e}");
    let paths = other("paths.json", AUTOCALL, &["--paths", "4098", "--part", "2/4"]);
    let e = merge_fails(&[a, &paths, c, d]);
    assert!(e.contains("paths.json") && e.contains("its paths is 4098, not 4096"), "{e}");
    let set = other("set.json", AUTOCALL, &["--paths", "4096", "--part", "2/4", "--set", "coupon=3%"]);
    let e = merge_fails(&[a, &set, c, d]);
    assert!(e.contains("set.json") && e.contains("overrides (--set) is [coupon=3%], not []"), "{e}");
    let payoff = other("payoff.json", "payoffs/european_call.payoff", &["--paths", "4096", "--part", "2/4"]);
    let e = merge_fails(&[a, &payoff, c, d]);
    assert!(e.contains("payoff.json") && e.contains("payoff (SHA-256)"), "{e}");
    let split = other("split.json", AUTOCALL, &["--paths", "4096", "--part", "2/3"]);
    let e = merge_fails(&[a, &split, c, d]);
    assert!(e.contains("split.json") && e.contains("number of parts is 3, not 4"), "{e}");
    // Not a partial result at all, or a damaged one.
    let junk = dir.join("junk.json");
    std::fs::write(&junk, "{\"price\": 1}").unwrap();
    assert!(merge_fails(&[&junk]).contains("junk.json: not a partial result"));
    let damaged = dir.join("damaged.json");
    let text =
        std::fs::read_to_string(b).unwrap().replacen("\"statistics\": [\n    \"", "\"statistics\": [\n    \"zz", 1);
    std::fs::write(&damaged, text).unwrap();
    let e = merge_fails(&[a, &damaged, c, d]);
    assert!(e.contains("damaged.json: block 4:") && e.contains("damaged"), "{e}");
    let version = dir.join("version.json");
    let text = std::fs::read_to_string(b).unwrap().replacen("\"format_version\": 1", "\"format_version\": 2", 1);
    std::fs::write(&version, text).unwrap();
    assert!(merge_fails(&[a, &version, c, d]).contains("format version 2; this pathfold"));
}

#[test]
fn a_payoff_or_market_changed_after_the_parts_ran_is_refused() {
    let dir = Scratch::dir("parts-changed");
    let payoff = dir.join("autocall.payoff");
    let market = dir.join("market.toml");
    std::fs::copy(AUTOCALL, &payoff).unwrap();
    std::fs::copy("payoffs/market.toml", &market).unwrap();
    let parts = run_parts(&dir, payoff.to_str().unwrap(), 2, &["--paths", "2048"]);
    let refs: Vec<&Path> = parts.iter().map(PathBuf::as_path).collect();
    let mut market_text = std::fs::read_to_string(&market).unwrap();
    market_text.push_str("\n# edited\n");
    std::fs::write(&market, market_text).unwrap();
    let e = merge_fails(&refs);
    assert!(e.contains("market.toml: this market file has changed since the parts ran"), "{e}");
    std::fs::copy("payoffs/market.toml", &market).unwrap();
    let mut payoff_text = std::fs::read_to_string(&payoff).unwrap();
    payoff_text.push_str("\n\n");
    std::fs::write(&payoff, payoff_text).unwrap();
    let e = merge_fails(&refs);
    assert!(e.contains("autocall.payoff: this payoff file has changed since the parts ran"), "{e}");
}

#[test]
fn part_options_that_cannot_work_are_refused() {
    for (args, says) in [
        (vec!["--part", "1/2", "--target-se", "100"], "--target-se cannot be split with --part"),
        (vec!["--part", "0/2"], "give the part as K/N"),
        (vec!["--part", "3/2"], "give the part as K/N"),
        (vec!["--part", "1/2", "--paths", "256"], "1 block of 256 paths, too few for 2 parts"),
        (vec!["--part", "1/2", "--format", "json"], "always writes a partial result"),
    ] {
        let mut all = vec!["price", AUTOCALL];
        all.extend_from_slice(&args);
        let (e, code) = fails(&all);
        assert_eq!(code, Some(2), "{args:?}: {e}");
        assert!(e.contains(says), "{args:?}: {e}");
    }
    let (e, code) = fails(&["price", "payoffs", "--part", "1/2"]);
    assert_eq!(code, Some(2));
    assert!(e.contains("needs --format csv"), "{e}");
}

#[test]
fn a_library_split_in_three_gives_the_single_batchs_rows() {
    // The demo library plus a file that fails, so an error row travels with its part.
    let inputs = ["payoffs", "tests/bad/engine_division_by_zero.payoff"];
    let common_args = ["--paths", "2000", "--format", "csv"];
    let mut single = vec!["price"];
    single.extend_from_slice(&inputs);
    single.extend_from_slice(&common_args);
    let (whole, whole_code) = {
        let (out, _, code) = run_in_repo(&single);
        (out, code)
    };
    assert_eq!(whole_code, Some(2), "the batch holds a failing file");
    let mut joined = String::new();
    for k in 1..=3 {
        let part = format!("{k}/3");
        let mut args = single.clone();
        args.extend_from_slice(&["--part", &part]);
        let (out, _, code) = run_in_repo(&args);
        assert_eq!(code, Some(if k == 3 { 2 } else { 0 }), "part {k}: the failing file is in the last share");
        assert_eq!(out.starts_with("file,"), k == 1, "only part 1 writes the header");
        joined.push_str(&out);
    }
    let rows = |text: &str| -> Vec<Vec<String>> {
        let mut r = csv::ReaderBuilder::new().has_headers(false).from_reader(text.as_bytes());
        let recs: Vec<Vec<String>> = r.records().map(|x| x.unwrap().iter().map(String::from).collect()).collect();
        let seconds = recs[0].iter().position(|h| h == "seconds").expect("a seconds column");
        recs.into_iter()
            .map(|mut r| {
                r.remove(seconds);
                r
            })
            .collect()
    };
    assert!(rows(&whole).len() > 40);
    assert_eq!(rows(&joined), rows(&whole), "reference: the single batch's rows (but for the time taken)");
}

/// Runs pathfold from the repository root: stdout, stderr, status.
fn run_in_repo(args: &[&str]) -> (String, String, Option<i32>) {
    let out = common::output(args);
    (
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
        out.status.code(),
    )
}

#[test]
fn a_run_that_fails_fails_the_same_way_when_merged() {
    // A payment that is not a finite number on some paths, and a condition on a value
    // that is not a number: the merge reports what the single run reports.
    for (tag, file) in [
        ("parts-bad", "tests/bad/engine_division_by_zero.payoff"),
        ("parts-bad-condition", "tests/bad/engine_condition_ends_paths.payoff"),
    ] {
        let dir = Scratch::dir(tag);
        let parts = run_parts(&dir, file, 2, &["--paths", "2048"]);
        let single = run_in_repo(&["price", file, "--paths", "2048"]);
        let mut args = vec!["merge"];
        args.extend(parts.iter().map(|p| p.to_str().unwrap()));
        let (merged, code) = fails(&args);
        assert_eq!(code, single.2, "{file}");
        assert_eq!(merged, single.1, "{file}: reference: the single run's error");
    }
}

/// A run of more blocks than are in flight at once (256) reuses the first chunk's block
/// results and workspaces for every later chunk; the blocks simulated one by one into fresh
/// results and replayed in order must give the same estimate bit for bit (the reference:
/// the single run, as for every merge here). With pairs and controls, and without either
/// and an uneven last block.
#[test]
fn reused_block_storage_gives_the_bits_of_fresh_blocks() {
    use pathfold::sim::partial::{blocks_run, simulate_blocks, Replay};
    use pathfold::sim::{simulate, Settings};
    let compiled = pathfold::pricing::compile_file(Path::new(AUTOCALL), None, &[]).expect("the demo autocall compiles");
    let program = &compiled.program;
    let plain = Settings { paths: 600 * 256 + 37, antithetic: false, control_variates: false, ..Settings::default() };
    for settings in [Settings { paths: 520 * 256, seed: 11, ..Settings::default() }, plain] {
        let single = simulate(program, &settings).expect("the single run prices");
        let mut replay = Replay::new(program, &settings);
        for block in &simulate_blocks(program, &settings, 0..blocks_run(&settings)) {
            replay.add(block);
        }
        let mut replayed = replay.finish(std::time::Instant::now()).expect("the replay prices");
        replayed.elapsed = single.elapsed;
        assert_eq!(replayed, single, "paths {}, antithetic {}", settings.paths, settings.antithetic);
    }
}
