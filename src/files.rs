//! Reading input files. Only regular files are read: a named pipe would block forever and
//! a device would never end, so both are refused before anything is opened.

use std::io;
use std::path::Path;

/// Reads a text file, refusing anything that is not a regular file before opening it:
/// a named pipe would block forever, a device would never end.
pub fn read_regular_file(path: &Path) -> io::Result<String> {
    String::from_utf8(read_regular_bytes(path)?)
        .map_err(|_| io::Error::new(io::ErrorKind::InvalidData, "stream did not contain valid UTF-8"))
}

/// [`read_regular_file`] without the UTF-8 check.
pub fn read_regular_bytes(path: &Path) -> io::Result<Vec<u8>> {
    let meta = std::fs::metadata(path)?;
    if !meta.is_file() {
        let what = if meta.is_dir() { "a folder" } else { "not a regular file (a pipe, socket or device)" };
        return Err(io::Error::new(io::ErrorKind::InvalidInput, format!("it is {what}")));
    }
    std::fs::read(path)
}
