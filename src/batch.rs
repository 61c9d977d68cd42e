//! Batch pricing: payoff files and folders → one row per file, as a table, CSV or JSON.
//!
//! Sits beside the driver's one-file pipeline ([`crate::driver::price_file_to`]) and runs
//! it over many files in parallel; each file's simulation is itself parallel over path
//! blocks, and rayon shares the cores between both levels. A file that fails gives an
//! error row and the others are still priced. Rows come back in input order (folders
//! walked in sorted order) whatever the thread count, and each simulation is
//! deterministic, so a batch gives the same bits on 1 thread or many.

use std::collections::HashSet;
use std::fs;
use std::io::{self, IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Mutex;

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use rayon::prelude::*;
use serde_json::json;
use sha2::{Digest, Sha256};

use crate::check::Override;
use crate::diagnostic::{locate, Diagnostic};
use crate::driver::{price_file_to, Failure};
use crate::report::{self, Format, Priced, CAUTION};
use crate::sim::Settings;

/// The default cap on paths of an error-bounded run.
pub const DEFAULT_MAX_PATHS: u64 = 20_000_000;

/// An error target for `--target-se`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Target {
    /// In the payoff's currency.
    Amount(f64),
    /// In percent of the payoff's notional (`0.01%` is 0.01 here).
    PercentOfNotional(f64),
}

impl Target {
    /// Parses `250` (currency) or `0.01%` (of notional).
    pub fn parse(text: &str) -> Result<Target, String> {
        let t = text.trim();
        let (number, percent) = match t.strip_suffix('%') {
            Some(n) => (n.trim(), true),
            None => (t, false),
        };
        match number.replace('_', "").parse::<f64>() {
            Ok(x) if x.is_finite() && x > 0.0 => {
                Ok(if percent { Target::PercentOfNotional(x) } else { Target::Amount(x) })
            }
            _ => Err("give a positive amount in the payoff's currency, e.g. `250`, or a percentage of notional, e.g. `0.01%`"
                .into()),
        }
    }

    /// The target in currency for a payoff of this notional.
    pub fn amount(self, notional: f64) -> f64 {
        match self {
            Target::Amount(x) => x,
            Target::PercentOfNotional(p) => p / 100.0 * notional.abs(),
        }
    }
}

/// What to price every file with.
#[derive(Clone, Debug)]
pub struct Request {
    pub market: Option<PathBuf>,
    pub overrides: Vec<Override>,
    pub settings: Settings,
    pub target: Option<Target>,
    pub max_paths: u64,
}

/// One file's result.
#[derive(Debug)]
pub struct Row {
    /// The file as given or found.
    pub file: String,
    pub outcome: Result<Priced, Failure>,
}

impl Row {
    pub fn priced(p: Priced) -> Row {
        Row { file: p.file.clone(), outcome: Ok(p) }
    }

    /// The error in one line, for a table cell or a CSV field; the full rendering with
    /// the caret goes to stderr.
    pub fn error_message(&self) -> Option<String> {
        self.outcome.as_ref().err().map(one_line)
    }
}

/// `file:line:col: message (fix: …)`, plus how many more problems the file has.
pub fn one_line(f: &Failure) -> String {
    let Some(d) = f.diagnostics.first() else {
        return "could not be priced (no diagnostic: please report this)".into();
    };
    let mut s = place(d, f.source.as_deref());
    s.push_str(&d.message);
    if let Some(fix) = &d.fix {
        s.push_str(&format!(" (fix: {fix})"));
    }
    if f.diagnostics.len() > 1 {
        s.push_str(&format!(" (and {} more)", f.diagnostics.len() - 1));
    }
    s
}

fn place(d: &Diagnostic, source: Option<&str>) -> String {
    match (&d.file, d.span, source) {
        (Some(file), Some(span), Some(src)) => {
            let (line, col, _) = locate(src, span.start);
            format!("{}:{line}:{col}: ", file.display())
        }
        (Some(file), _, _) => format!("{}: ", file.display()),
        (None, _, _) => String::new(),
    }
}

/// Expands the inputs into payoff files: a file stands for itself, a folder for every
/// `.payoff` file below it (sorted, so the order is the same everywhere). An input that
/// does not exist, a folder without payoff files, a folder that cannot be read, or a
/// `.payoff` that is not a regular file (a FIFO, a device, a broken link) becomes an error
/// row of its own; the rest are still priced.
///
/// Links are followed, but each file is priced once (by its canonical path, under the
/// first name it was found by) and each folder is walked once, so a link back up the tree
/// ends the walk instead of looping.
pub fn collect_files(inputs: &[PathBuf]) -> Vec<Result<PathBuf, Failure>> {
    let mut walk = Walk::default();
    for input in inputs {
        match fs::metadata(input) {
            Ok(m) if m.is_dir() => {
                if fs::canonicalize(input).is_ok_and(|c| walk.folders.contains(&c)) {
                    continue; // given twice, or inside a folder given before
                }
                let before = walk.found;
                walk.folder(input);
                if walk.found == before {
                    walk.out.push(Err(input_failure(
                        input,
                        "this folder holds no `.payoff` files",
                        "name the payoff files, or a folder that holds some",
                    )));
                }
            }
            Ok(m) => walk.file(input, &m),
            Err(e) if e.kind() == io::ErrorKind::NotFound && fs::symlink_metadata(input).is_err() => {
                walk.out.push(Err(input_failure(input, "no such file or folder", "check the path")))
            }
            Err(e) => walk.out.push(Err(unreadable(input, &e))),
        }
    }
    walk.out
}

/// The state of a walk over the inputs.
#[derive(Default)]
struct Walk {
    out: Vec<Result<PathBuf, Failure>>,
    /// Canonical paths of the files already taken, and of the folders already walked.
    files: HashSet<PathBuf>,
    folders: HashSet<PathBuf>,
    /// Payoff files met (taken, refused or seen before), to tell an empty folder.
    found: usize,
}

impl Walk {
    /// Takes a file (named directly, or found with a `.payoff` extension).
    fn file(&mut self, path: &Path, meta: &fs::Metadata) {
        self.found += 1;
        if !meta.is_file() {
            self.out.push(Err(input_failure(
                path,
                &format!("not a regular file ({})", kind_of(meta)),
                "give a plain payoff file; pathfold does not read pipes, sockets or devices",
            )));
            return;
        }
        match fs::canonicalize(path) {
            // Already taken under another name (a link, or the same file given twice).
            Ok(canonical) if self.files.contains(&canonical) => {}
            Ok(canonical) => {
                self.files.insert(canonical);
                self.out.push(Ok(path.to_path_buf()));
            }
            Err(e) => self.out.push(Err(unreadable(path, &e))),
        }
    }

    /// Walks a folder depth first, in sorted order, without recursion (a deep tree cannot
    /// exhaust the stack); a folder already walked, by any name, is skipped.
    fn folder(&mut self, root: &Path) {
        let mut stack: Vec<std::vec::IntoIter<PathBuf>> = Vec::new();
        if let Some(entries) = self.entries(root) {
            stack.push(entries);
        }
        while let Some(top) = stack.last_mut() {
            let Some(path) = top.next() else {
                stack.pop();
                continue;
            };
            let payoff = path.extension().is_some_and(|x| x == "payoff");
            match fs::metadata(&path) {
                Ok(m) if m.is_dir() => {
                    if let Some(entries) = self.entries(&path) {
                        stack.push(entries);
                    }
                }
                Ok(m) if payoff => self.file(&path, &m),
                Ok(_) => {}
                Err(e) if payoff => {
                    self.found += 1;
                    self.out.push(Err(unreadable(&path, &e)));
                }
                // A broken link or an unreadable entry without the extension is not ours.
                Err(_) => {}
            }
        }
    }

    /// The sorted entries of a folder not walked before; a folder that cannot be read
    /// becomes an error row.
    fn entries(&mut self, dir: &Path) -> Option<std::vec::IntoIter<PathBuf>> {
        let canonical = match fs::canonicalize(dir) {
            Ok(c) => c,
            Err(e) => {
                self.found += 1;
                self.out.push(Err(folder_failure(dir, &e)));
                return None;
            }
        };
        if !self.folders.insert(canonical) {
            return None;
        }
        let read: io::Result<Vec<PathBuf>> =
            fs::read_dir(dir).and_then(|entries| entries.map(|e| e.map(|e| e.path())).collect());
        match read {
            Ok(mut paths) => {
                paths.sort();
                Some(paths.into_iter())
            }
            Err(e) => {
                self.found += 1;
                self.out.push(Err(folder_failure(dir, &e)));
                None
            }
        }
    }
}

fn kind_of(meta: &fs::Metadata) -> &'static str {
    #[cfg(unix)]
    {
        use std::os::unix::fs::FileTypeExt;
        let t = meta.file_type();
        if t.is_fifo() {
            return "a named pipe";
        }
        if t.is_socket() {
            return "a socket";
        }
        if t.is_block_device() || t.is_char_device() {
            return "a device";
        }
    }
    let _ = meta;
    "not a file or folder"
}

fn unreadable(path: &Path, e: &io::Error) -> Failure {
    input_failure(path, &format!("cannot read this file: {e}"), "check the path, its links and its permissions")
}

fn folder_failure(path: &Path, e: &io::Error) -> Failure {
    input_failure(path, &format!("cannot read this folder: {e}"), "check the path and its permissions")
}

fn input_failure(path: &Path, message: &str, fix: &str) -> Failure {
    Failure { diagnostics: vec![Diagnostic::new(message).with_fix(fix).in_file(path)], source: None, internal: false }
}

/// A progress bar on stderr, drawn only when stderr is a terminal.
pub struct Progress(ProgressBar);

impl Progress {
    pub fn new(files: usize, wanted: bool) -> Progress {
        let target = if wanted && io::stderr().is_terminal() {
            ProgressDrawTarget::stderr()
        } else {
            ProgressDrawTarget::hidden()
        };
        let bar = ProgressBar::with_draw_target(Some(files as u64), target);
        if let Ok(style) = ProgressStyle::with_template("{bar:30} {pos}/{len} files  {elapsed}  {msg}") {
            bar.set_style(style);
        }
        Progress(bar)
    }

    fn tick(&self, file: &str) {
        self.0.set_message(file.to_string());
        self.0.inc(1);
    }

    pub fn done(&self) {
        self.0.finish_and_clear();
    }
}

/// Prices every file in parallel; rows come back in input order.
pub fn price_all(files: Vec<Result<PathBuf, Failure>>, request: &Request, progress: &Progress) -> Vec<Row> {
    files
        .into_par_iter()
        .map(|f| {
            let row = match f {
                Ok(path) => {
                    // A bug of ours on one file must not cost the rest of the batch.
                    let outcome = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                        price_file_to(
                            &path,
                            request.market.as_deref(),
                            &request.overrides,
                            &request.settings,
                            request.target.map(|t| (t, request.max_paths)),
                        )
                    }))
                    .unwrap_or_else(|panic| Err(internal_failure(&path, panic.as_ref())));
                    Row { file: path.display().to_string(), outcome }
                }
                Err(failure) => Row {
                    file: failure.diagnostics[0].file.as_ref().map(|p| p.display().to_string()).unwrap_or_default(),
                    outcome: Err(failure),
                },
            };
            progress.tick(&row.file);
            row
        })
        .collect()
}

/// The failure recorded when pricing a file panicked: our bug, not the user's input.
fn internal_failure(path: &Path, panic: &(dyn std::any::Any + Send)) -> Failure {
    let what = panic
        .downcast_ref::<&str>()
        .map(|s| (*s).to_string())
        .or_else(|| panic.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "unknown cause".to_string());
    Failure {
        diagnostics: vec![Diagnostic::new(format!("internal error while pricing: {what}"))
            .with_fix("this is a fault in pathfold, not in the file; please report it with the payoff and market files")
            .in_file(path)],
        source: None,
        internal: true,
    }
}

/// 0 if every row priced, 2 if any failed on its input, 1 if any failed on our side.
pub fn exit_status(rows: &[Row]) -> ExitCode {
    let internal = rows.iter().any(|r| r.outcome.as_ref().is_err_and(|f| f.internal));
    let failed = rows.iter().any(|r| r.outcome.is_err());
    ExitCode::from(if internal {
        1
    } else if failed {
        2
    } else {
        0
    })
}

/// Hex SHA-256 of some bytes.
pub fn sha256_hex(bytes: &[u8]) -> String {
    Sha256::digest(bytes).iter().map(|b| format!("{b:02x}")).collect()
}

/// The CSV columns of a batch, in order. The caution rides in the last column of every
/// row, so the file stays plain CSV that any reader takes.
pub const CSV_COLUMNS: [&str; 23] = [
    "file",
    "product",
    "currency",
    "price",
    "percent_of_notional",
    "std_error",
    "paths",
    "seed",
    "seconds",
    "status",
    "error",
    "target_std_error",
    "target_met",
    "antithetic",
    "control_variates",
    "controls_used",
    "overrides",
    "pathfold_version",
    "payoff_sha256",
    "market_file",
    "market_sha256",
    "notional",
    "caution",
];

/// Writes batch rows.
pub fn write_rows(out: &mut dyn Write, rows: &[Row], format: Format) -> io::Result<()> {
    match format {
        Format::Table => write_table(out, rows),
        Format::Csv => write_csv(out, rows),
        Format::Json => {
            let value = json!({
                "pathfold_version": env!("CARGO_PKG_VERSION"),
                "results": rows.iter().map(row_json).collect::<Vec<_>>(),
                "caution": CAUTION,
            });
            serde_json::to_writer_pretty(&mut *out, &value)?;
            writeln!(out)
        }
    }
}

fn row_json(row: &Row) -> serde_json::Value {
    match &row.outcome {
        Ok(p) => {
            let mut v = report::to_json(p);
            if let Some(map) = v.as_object_mut() {
                map.remove("caution");
                map.insert("status".into(), json!("ok"));
            }
            v
        }
        Err(_) => json!({ "file": row.file, "status": "error", "error": row.error_message() }),
    }
}

fn write_csv(out: &mut dyn Write, rows: &[Row]) -> io::Result<()> {
    let mut w = csv::Writer::from_writer(out);
    w.write_record(CSV_COLUMNS)?;
    for row in rows {
        let fields: Vec<String> = match &row.outcome {
            Ok(p) => {
                let (e, r) = (&p.estimate, &p.record);
                vec![
                    p.file.clone(),
                    p.product.clone(),
                    p.currency.clone(),
                    e.price.to_string(),
                    p.percent_of_notional().to_string(),
                    e.std_error.to_string(),
                    e.paths.to_string(),
                    e.seed.to_string(),
                    format!("{:.3}", e.elapsed.as_secs_f64()),
                    "ok".into(),
                    String::new(),
                    r.target.as_ref().map(|t| t.std_error.to_string()).unwrap_or_default(),
                    r.target.as_ref().map(|t| t.met.to_string()).unwrap_or_default(),
                    e.antithetic.to_string(),
                    r.control_variates.to_string(),
                    e.controls.join("; "),
                    r.overrides.join("; "),
                    r.version.into(),
                    r.payoff_sha256.clone(),
                    p.market_file.clone(),
                    r.market_sha256.clone(),
                    p.notional.to_string(),
                    CAUTION.into(),
                ]
            }
            Err(_) => {
                let mut f = vec![String::new(); CSV_COLUMNS.len()];
                f[0] = row.file.clone();
                f[9] = "error".into();
                f[10] = row.error_message().unwrap_or_default();
                f[17] = env!("CARGO_PKG_VERSION").into();
                f[22] = CAUTION.into();
                f
            }
        };
        w.write_record(&fields)?;
    }
    w.flush()
}

fn write_table(out: &mut dyn Write, rows: &[Row]) -> io::Result<()> {
    let width = rows.iter().map(|r| r.file.chars().count()).max().unwrap_or(4).max(4);
    writeln!(
        out,
        "{:<width$}  {:<36} {:>16} {:>10} {:>12} {:>11} {:>6}  status",
        "file", "product", "price", "% notional", "std error", "paths", "s"
    )?;
    for row in rows {
        match &row.outcome {
            Ok(p) => {
                let e = &p.estimate;
                let d = report::decimals(e.std_error);
                let mut status = "ok".to_string();
                if let Some(t) = &p.record.target {
                    if !t.met {
                        status = format!("ok, error target {} not met", report::group(t.std_error, d));
                    }
                }
                writeln!(
                    out,
                    "{:<width$}  {:<36} {:>16} {:>9.4}% {:>12} {:>11} {:>6.2}  {status}",
                    row.file,
                    clip(&p.product, 36),
                    format!("{} {}", report::group(e.price, d), p.currency),
                    p.percent_of_notional(),
                    report::group(e.std_error, d),
                    report::group(e.paths as f64, 0),
                    e.elapsed.as_secs_f64(),
                )?;
            }
            Err(_) => {
                writeln!(out, "{:<width$}  error: {}", row.file, row.error_message().unwrap_or_default())?;
            }
        }
    }
    let failed = rows.iter().filter(|r| r.outcome.is_err()).count();
    let seed = rows.iter().find_map(|r| r.outcome.as_ref().ok()).map(|p| p.estimate.seed);
    writeln!(out)?;
    write!(out, "{} files: {} priced, {failed} failed", rows.len(), rows.len() - failed)?;
    match seed {
        Some(s) => writeln!(out, "; seed {s}, pathfold {}", env!("CARGO_PKG_VERSION"))?,
        None => writeln!(out)?,
    }
    writeln!(out, "{CAUTION}")
}

fn clip(s: &str, n: usize) -> String {
    if s.chars().count() <= n {
        s.to_string()
    } else {
        let mut t: String = s.chars().take(n - 1).collect();
        t.push('…');
        t
    }
}

/// The temporary file being written, if any: removed by the signal handler.
static PENDING: Mutex<Option<PathBuf>> = Mutex::new(None);

/// The temporary file [`write_atomically`] writes `path` through.
fn temporary(path: &Path) -> io::Result<PathBuf> {
    let dir = path.parent().filter(|d| !d.as_os_str().is_empty()).unwrap_or(Path::new("."));
    let name = path.file_name().ok_or_else(|| io::Error::new(io::ErrorKind::InvalidInput, "not a file name"))?;
    Ok(dir.join(format!(".{}.{}.tmp", name.to_string_lossy(), std::process::id())))
}

/// Checks, before any pricing, that the file `path` can be written: creates its temporary
/// file and removes it again.
pub fn check_writable(path: &Path) -> io::Result<()> {
    let tmp = temporary(path)?;
    fs::OpenOptions::new().write(true).create_new(true).open(&tmp)?;
    fs::remove_file(&tmp)
}

/// On SIGINT or SIGTERM (and SIGHUP), removes the temporary file of a write in progress
/// and exits with status 130, so an interrupted run leaves neither half a report nor a
/// stray `.NAME.<pid>.tmp`. Installed once, only when there is an `--output`.
pub fn clean_up_on_signal() {
    let _ = ctrlc::set_handler(|| {
        // Taking the lock waits for a temporary file being created, and keeps another from
        // being created after this removal.
        let pending = PENDING.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(tmp) = pending.as_ref() {
            let _ = fs::remove_file(tmp);
        }
        eprintln!("interrupted: nothing written");
        std::process::exit(130);
    });
}

/// Writes a file whole or not at all: into a temporary file beside it, flushed to disk,
/// then renamed over the target, so a run killed half-way leaves the old file (or none).
pub fn write_atomically(path: &Path, write: impl FnOnce(&mut dyn Write) -> io::Result<()>) -> io::Result<()> {
    let tmp = temporary(path)?;
    let result = (|| {
        let file = {
            let mut pending = PENDING.lock().unwrap_or_else(|e| e.into_inner());
            let file = fs::File::create(&tmp)?;
            *pending = Some(tmp.clone());
            file
        };
        // Test hook: holds the write open so a test can signal the process mid-write.
        if std::env::var_os("PATHFOLD_TEST_PAUSE_WRITE").is_some() {
            std::thread::sleep(std::time::Duration::from_secs(30));
        }
        let mut buf = io::BufWriter::new(file);
        write(&mut buf)?;
        let file = buf.into_inner().map_err(|e| e.into_error())?;
        file.sync_all()?;
        fs::rename(&tmp, path)
    })();
    let mut pending = PENDING.lock().unwrap_or_else(|e| e.into_inner());
    if result.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    *pending = None;
    result
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_targets() {
        assert_eq!(Target::parse("250"), Ok(Target::Amount(250.0)));
        assert_eq!(Target::parse("0.01%"), Ok(Target::PercentOfNotional(0.01)));
        assert_eq!(Target::parse("0.01%").map(|t| t.amount(1_000_000.0)), Ok(100.0));
        assert!(Target::parse("-1").is_err());
        assert!(Target::parse("abc%").is_err());
        assert!(Target::parse("0").is_err());
    }

    #[test]
    fn hashes_as_hex() {
        // The SHA-256 of "abc" from FIPS 180-2, appendix B.1.
        assert_eq!(sha256_hex(b"abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
    }
}
