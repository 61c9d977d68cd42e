//! Writing an output file whole or not at all: written beside the target, then renamed;
//! removed again if the process is interrupted.

use std::fs;
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::sync::Mutex;

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
