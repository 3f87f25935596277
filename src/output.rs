//! Writing reports: `-` is stdout; a path is written through a temporary file in the same
//! folder and renamed into place, so a reader never sees half a report.

use crate::error::{Error, Result};
use std::io::Write;
use std::path::Path;

/// Checks early that `path` can be written (its folder exists and accepts files), so a bad
/// path fails before the expensive work.
pub fn check_writable(path: &str) -> Result<()> {
    if path == "-" {
        return Ok(());
    }
    let dir = folder(path);
    tempfile::NamedTempFile::new_in(dir)
        .map(drop)
        .map_err(|e| Error::io(path, e))
}

fn folder(path: &str) -> &Path {
    match Path::new(path).parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    }
}

/// Writes `text` to `path` atomically (or to stdout for `-`).
pub fn write(path: &str, text: &str) -> Result<()> {
    if path == "-" {
        let mut out = std::io::stdout().lock();
        return match out.write_all(text.as_bytes()).and_then(|_| out.flush()) {
            // A closed pipe (`| head`) is not an error of ours.
            Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(()),
            other => other.map_err(|e| Error::io("<stdout>", e)),
        };
    }
    let failed = |e: std::io::Error| {
        Error::usage(format!(
            "{path}: could not write the report ({}); an existing file there is left as it was",
            e.kind()
        ))
    };
    let mut tmp = tempfile::NamedTempFile::new_in(folder(path)).map_err(failed)?;
    tmp.write_all(text.as_bytes())
        .and_then(|_| tmp.as_file().sync_all())
        .map_err(failed)?;
    // On any error the temporary file is removed when `tmp` (or the error holding it) drops.
    tmp.persist(path).map_err(|e| failed(e.error))?;
    Ok(())
}
