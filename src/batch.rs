//! Batch pricing: payoff files and folders → one row per file.
//!
//! Runs the pricing service ([`crate::pricing::price_file_to`]) over many files in
//! parallel; each file's simulation is itself parallel over path blocks, and rayon shares
//! the cores between both levels. A file that fails gives an error row and the others are
//! still priced. Rows come back in input order (folders walked in sorted order) whatever
//! the thread count, and each simulation is deterministic, so a batch gives the same bits
//! on 1 thread or many.

use std::collections::HashSet;
use std::fs;
use std::io;
use std::path::{Path, PathBuf};

use rayon::prelude::*;

use crate::diagnostic::Diagnostic;
use crate::pricing::{one_line, price_file_to, Failure, Priced, Target};
use crate::sim::Settings;
use crate::typing::Override;

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

/// Prices every file in parallel; rows come back in input order.
pub fn price_all(
    files: Vec<Result<PathBuf, Failure>>,
    request: &Request,
    progress: &(dyn Fn(&str) + Sync),
) -> Vec<Row> {
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
            progress(&row.file);
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
