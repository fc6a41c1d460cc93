//! Files out: every output is written to a temporary file beside its target
//! and renamed into place only when complete, so a failure never leaves a
//! partial file behind. `-` means standard output.

use crate::error::{Error, Result};
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

/// Is this path the "write to standard output" marker?
pub fn is_stdout(path: &Path) -> bool {
    path.as_os_str() == "-"
}

/// Write `path` atomically with `body`; on any error the temporary file is
/// removed and `path` is left as it was.
pub fn write_atomic<F>(path: &Path, body: F) -> Result<()>
where
    F: FnOnce(&mut dyn Write) -> Result<()>,
{
    if is_stdout(path) {
        let stdout = std::io::stdout();
        let mut w = BufWriter::new(stdout.lock());
        body(&mut w)?;
        return w.flush().map_err(|source| Error::Io { path: path.into(), source });
    }
    write_atomic_via(path, |tmp| {
        let io = |source| Error::Io { path: path.to_path_buf(), source };
        let mut w = BufWriter::new(std::fs::File::create(tmp).map_err(io)?);
        body(&mut w)?;
        w.flush().map_err(io)
    })
}

/// Write `path` atomically through a writer that wants a path of its own:
/// `body` writes the temporary file it is given, which is then synced and
/// renamed into place (removed on any error).
pub fn write_atomic_via<F>(path: &Path, body: F) -> Result<()>
where
    F: FnOnce(&Path) -> Result<()>,
{
    let tmp = temp_path(path);
    let io = |source| Error::Io { path: path.to_path_buf(), source };
    let result = (|| {
        body(&tmp)?;
        std::fs::File::open(&tmp).and_then(|f| f.sync_all()).map_err(io)?;
        std::fs::rename(&tmp, path).map_err(io)
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

/// Fail early, before hours of work, when `path` cannot be written because
/// its directory does not exist.
pub fn check_directory(path: &Path) -> Result<()> {
    if is_stdout(path) {
        return Ok(());
    }
    match path.parent() {
        Some(dir) if !dir.as_os_str().is_empty() && !dir.is_dir() => Err(Error::Invalid(format!(
            "{}: cannot write here: directory {} does not exist",
            path.display(),
            dir.display()
        ))),
        _ => Ok(()),
    }
}

fn temp_path(path: &Path) -> PathBuf {
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    path.with_file_name(format!(".{name}.{}.tmp", std::process::id()))
}
