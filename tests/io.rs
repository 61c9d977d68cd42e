//! Files and outputs through the real binary: folders with links, pipes and unreadable
//! files; `--threads` bounds; `--output` that would destroy an input, replace a link or a
//! device, cannot be written, or is interrupted by a signal.

mod common;

use std::os::unix::fs::symlink;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::{Duration, Instant};

use common::Scratch;

const BIN: &str = env!("CARGO_BIN_EXE_pathfold");

/// Waits for a child at most `limit`; kills it and fails the test if it runs longer.
fn finish(mut child: Child, limit: Duration, what: &str) -> Output {
    let start = Instant::now();
    while child.try_wait().expect("the child can be waited on").is_none() {
        if start.elapsed() > limit {
            let _ = child.kill();
            let _ = child.wait();
            panic!("{what}: still running after {limit:?}");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    child.wait_with_output().expect("the output of the child")
}

/// Runs pathfold from the repository root, failing the test after a minute.
fn run(args: &[&str]) -> (String, String, Option<i32>) {
    let child = Command::new(BIN)
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("the binary runs");
    let o = finish(child, Duration::from_secs(60), &args.join(" "));
    (String::from_utf8_lossy(&o.stdout).into_owned(), String::from_utf8_lossy(&o.stderr).into_owned(), o.status.code())
}

fn read_csv(text: &str) -> Vec<std::collections::HashMap<String, String>> {
    let mut r = csv::Reader::from_reader(text.as_bytes());
    let headers = r.headers().expect("a header row").clone();
    r.records()
        .map(|rec| headers.iter().zip(rec.unwrap().iter()).map(|(h, v)| (h.into(), v.into())).collect())
        .collect()
}

fn copy_demo(dir: &Path, name: &str) -> PathBuf {
    let to = dir.join(name);
    std::fs::copy(Path::new(env!("CARGO_MANIFEST_DIR")).join("payoffs/european_call.payoff"), &to).unwrap();
    to
}

fn mkfifo(path: &Path) {
    let status = Command::new("mkfifo").arg(path).status().expect("mkfifo runs");
    assert!(status.success());
}

/// A folder of mixed bad inputs: a pipe, a link to the folder itself, a link back up from
/// a subfolder, two links to one good file, a dangling link, a pair of links to each
/// other, an unreadable file, a file that is not UTF-8, an empty file and a syntax error.
/// The batch must finish and give exactly one row per distinct file, in sorted order.
#[test]
fn a_folder_of_bad_inputs_gives_one_row_per_file_and_finishes() {
    let dir = Scratch::dir("io-mixed");
    std::fs::copy(Path::new(env!("CARGO_MANIFEST_DIR")).join("payoffs/market.toml"), dir.join("market.toml")).unwrap();
    copy_demo(&dir, "a_good.payoff");
    symlink(dir.join("a_good.payoff"), dir.join("b_alias.payoff")).unwrap();
    symlink("a_good.payoff", dir.join("c_alias.payoff")).unwrap();
    mkfifo(&dir.join("d_pipe.payoff"));
    symlink(".", dir.join("e_self")).unwrap();
    std::fs::create_dir(dir.join("f_sub")).unwrap();
    symlink("..", dir.join("f_sub/up")).unwrap();
    copy_demo(&dir.join("f_sub"), "inner.payoff");
    std::fs::copy(dir.join("market.toml"), dir.join("f_sub/market.toml")).unwrap();
    symlink("nowhere.payoff", dir.join("g_dangling.payoff")).unwrap();
    symlink("h_loop2.payoff", dir.join("h_loop1.payoff")).unwrap();
    symlink("h_loop1.payoff", dir.join("h_loop2.payoff")).unwrap();
    let locked = copy_demo(&dir, "i_locked.payoff");
    std::fs::write(&locked, b"product \"locked\"\ncurrency USD\nnotional 1\n").unwrap();
    std::fs::set_permissions(&locked, std::os::unix::fs::PermissionsExt::from_mode(0o000)).unwrap();
    std::fs::write(dir.join("j_latin1.payoff"), b"product \"caf\xe9\"\n").unwrap();
    std::fs::write(dir.join("k_empty.payoff"), b"").unwrap();
    std::fs::write(dir.join("l_syntax.payoff"), b"product \"x\"\npay ((\n").unwrap();

    let d = dir.to_str().unwrap();
    let (stdout, stderr, code) = run(&["price", d, "--paths", "2000", "--format", "csv"]);
    assert_eq!(code, Some(2), "{stderr}");
    let rows = read_csv(&stdout);
    let names: Vec<String> = rows.iter().map(|r| r["file"].strip_prefix(d).unwrap().to_string()).collect();
    assert_eq!(
        names,
        [
            "/a_good.payoff",
            "/d_pipe.payoff",
            "/f_sub/inner.payoff",
            "/g_dangling.payoff",
            "/h_loop1.payoff",
            "/h_loop2.payoff",
            "/i_locked.payoff",
            "/j_latin1.payoff",
            "/k_empty.payoff",
            "/l_syntax.payoff",
        ],
        "{stdout}"
    );
    let status = |name: &str| rows.iter().find(|r| r["file"].ends_with(name)).unwrap()["status"].clone();
    assert_eq!(status("a_good.payoff"), "ok");
    assert_eq!(status("inner.payoff"), "ok");
    for bad in ["d_pipe", "g_dangling", "h_loop1", "h_loop2", "i_locked", "j_latin1", "k_empty", "l_syntax"] {
        assert_eq!(status(&format!("{bad}.payoff")), "error", "{bad}");
    }
    let pipe = rows.iter().find(|r| r["file"].ends_with("d_pipe.payoff")).unwrap();
    assert!(pipe["error"].contains("not a regular file (a named pipe)"), "{pipe:?}");

    // Named directly, the pipe is an error too, and the other file is still priced.
    let pipe = dir.join("d_pipe.payoff");
    let good = dir.join("a_good.payoff");
    let (stdout, _, code) =
        run(&["price", pipe.to_str().unwrap(), good.to_str().unwrap(), "--paths", "2000", "--format", "csv"]);
    assert_eq!(code, Some(2));
    let rows = read_csv(&stdout);
    assert_eq!(rows.len(), 2);
    assert_eq!((rows[0]["status"].as_str(), rows[1]["status"].as_str()), ("error", "ok"));

    // A pipe as the market file is refused, not waited on.
    let (_, stderr, code) = run(&["price", good.to_str().unwrap(), "--market", pipe.to_str().unwrap()]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("cannot read the market file: it is not a regular file"), "{stderr}");
}

#[test]
fn the_same_file_named_twice_is_priced_once() {
    let (stdout, _, code) = run(&[
        "price",
        "payoffs/digital.payoff",
        "payoffs/../payoffs/digital.payoff",
        "--paths",
        "2000",
        "--format",
        "csv",
    ]);
    assert_eq!(code, Some(0));
    assert_eq!(read_csv(&stdout).len(), 1);
}

#[test]
fn threads_are_bounded() {
    for bad in ["0", "100000"] {
        let (stdout, stderr, code) = run(&["price", "payoffs/digital.payoff", "--threads", bad]);
        assert_eq!(code, Some(2), "--threads {bad}");
        assert!(stdout.is_empty());
        assert!(stderr.starts_with(&format!("--threads must be between 1 and 1024 (got {bad})")), "{stderr}");
    }
    let (_, stderr, code) = run(&["price", "payoffs/digital.payoff", "--threads", "1024", "--paths", "2000"]);
    assert_eq!(code, Some(0), "{stderr}");
}

fn price_to(output: &Path, extra: &[&str]) -> (String, String, Option<i32>) {
    let mut args = vec!["price", "payoffs/digital.payoff", "--paths", "2000", "--output", output.to_str().unwrap()];
    args.extend_from_slice(extra);
    run(&args)
}

#[test]
fn output_never_overwrites_an_input() {
    let dir = Scratch::dir("io-inputs");
    let payoff = copy_demo(&dir, "call.payoff");
    std::fs::copy(Path::new(env!("CARGO_MANIFEST_DIR")).join("payoffs/market.toml"), dir.join("market.toml")).unwrap();
    let before = std::fs::read(&payoff).unwrap();
    let market_before = std::fs::read(dir.join("market.toml")).unwrap();
    let p = payoff.to_str().unwrap();

    let (stdout, stderr, code) = run(&["price", p, "--output", p]);
    assert_eq!(code, Some(2));
    assert!(stdout.is_empty());
    assert!(
        stderr.starts_with(&format!("--output {p} is the input {p}; writing the report there would destroy it")),
        "{stderr}"
    );

    // A hard link to the payoff is the payoff.
    let hard = dir.join("hard.csv");
    std::fs::hard_link(&payoff, &hard).unwrap();
    let (_, stderr, code) = run(&["price", p, "--output", hard.to_str().unwrap()]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("is the input"), "{stderr}");

    // The market file given with --market, and the one the payoff names.
    let m = dir.join("market.toml");
    let (_, stderr, code) = run(&["price", p, "--market", m.to_str().unwrap(), "--output", m.to_str().unwrap()]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("is the input"), "{stderr}");
    let (stdout, stderr, code) = run(&["price", p, "--paths", "2000", "--output", m.to_str().unwrap()]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("is the market file of"), "{stderr}");
    assert!(stdout.contains("ZPHX one-year at-the-money call"), "the report is not lost: {stdout}");

    // The price list of a comparison.
    let list = dir.join("list.csv");
    std::fs::write(&list, "file,price\ncall.payoff,79000\n").unwrap();
    let l = list.to_str().unwrap();
    let (_, stderr, code) = run(&["compare", l, dir.to_str().unwrap(), "--output", l]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("is the input"), "{stderr}");

    assert_eq!(std::fs::read(&payoff).unwrap(), before);
    assert_eq!(std::fs::read(dir.join("market.toml")).unwrap(), market_before);
    assert_eq!(std::fs::read_to_string(&list).unwrap(), "file,price\ncall.payoff,79000\n");
}

#[test]
fn output_refuses_links_folders_and_devices() {
    let dir = Scratch::dir("io-special");
    let real = dir.join("real.txt");
    std::fs::write(&real, "keep me\n").unwrap();
    let link = dir.join("link.txt");
    symlink(&real, &link).unwrap();
    let (_, stderr, code) = price_to(&link, &[]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("it exists and is a symbolic link"), "{stderr}");
    assert!(std::fs::symlink_metadata(&link).unwrap().file_type().is_symlink());
    assert_eq!(std::fs::read_to_string(&real).unwrap(), "keep me\n");

    let (_, stderr, code) = price_to(&dir, &[]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("it exists and is a folder"), "{stderr}");

    let (_, stderr, code) = price_to(Path::new("/dev/null"), &[]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("it exists and is not a regular file"), "{stderr}");
    let fifo = dir.join("pipe");
    mkfifo(&fifo);
    let (_, stderr, code) = price_to(&fifo, &[]);
    assert_eq!(code, Some(2));
    assert!(stderr.contains("it exists and is not a regular file"), "{stderr}");
}

#[test]
fn an_unwritable_output_is_a_bad_option_found_before_pricing() {
    let (stdout, stderr, code) = price_to(Path::new("/nonexistent-folder/prices.csv"), &[]);
    assert_eq!(code, Some(2));
    assert!(stdout.is_empty());
    assert!(
        stderr.starts_with("--output /nonexistent-folder/prices.csv: the folder /nonexistent-folder cannot be used"),
        "{stderr}"
    );
    // /proc refuses new files even to root.
    let (_, stderr, code) = price_to(Path::new("/proc/prices.csv"), &[]);
    assert_eq!(code, Some(2));
    assert!(stderr.starts_with("--output /proc/prices.csv: cannot write in the folder /proc"), "{stderr}");
}

/// A run killed by SIGINT or SIGTERM while it writes `--output` leaves no temporary file.
/// The report is made large (many rows through a long path) so the signal lands while the
/// run is busy; wherever it lands, nothing but the old file may remain.
#[test]
fn a_signal_leaves_no_temporary_file() {
    for signal in ["INT", "TERM"] {
        let dir = Scratch::dir(&format!("io-signal-{signal}"));
        let target = dir.join("prices.csv");
        std::fs::write(&target, "old\n").unwrap();
        let child = Command::new(BIN)
            .args(["price", "payoffs", "--paths", "400000", "--output", target.to_str().unwrap(), "--threads", "1"])
            .current_dir(env!("CARGO_MANIFEST_DIR"))
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        std::thread::sleep(Duration::from_millis(500));
        let status = Command::new("kill").args([&format!("-{signal}"), &child.id().to_string()]).status().unwrap();
        assert!(status.success());
        let o = finish(child, Duration::from_secs(60), "the interrupted run");
        assert_eq!(o.status.code(), Some(130), "{}", String::from_utf8_lossy(&o.stderr));
        let left: Vec<_> = std::fs::read_dir(&*dir).unwrap().map(|e| e.unwrap().file_name()).collect();
        assert_eq!(left, vec![std::ffi::OsString::from("prices.csv")], "SIG{signal}");
        assert_eq!(std::fs::read_to_string(&target).unwrap(), "old\n");
    }
}

/// The handler removes the temporary file of a write in progress: a signal sent while the
/// report is being written (stalled on a full pipe is not possible with a file, so the
/// temporary file is watched for) leaves none behind.
#[test]
fn a_signal_during_the_write_removes_the_temporary_file() {
    let dir = Scratch::dir("io-signal-write");
    let target = dir.join("prices.json");
    let child = Command::new(BIN)
        .args(["price", "payoffs", "--paths", "2000", "--format", "json", "--output", target.to_str().unwrap()])
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .env("PATHFOLD_TEST_PAUSE_WRITE", "1")
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let start = Instant::now();
    let tmp = dir.join(&format!(".prices.json.{}.tmp", child.id()));
    while !tmp.exists() && start.elapsed() < Duration::from_secs(60) {
        std::thread::sleep(Duration::from_millis(5));
    }
    assert!(tmp.exists(), "the temporary file appears while writing");
    Command::new("kill").args(["-TERM", &child.id().to_string()]).status().unwrap();
    let o = finish(child, Duration::from_secs(60), "the interrupted write");
    assert_eq!(o.status.code(), Some(130));
    assert!(!tmp.exists(), "the temporary file is removed");
    assert!(!target.exists(), "no half-written report");
}
