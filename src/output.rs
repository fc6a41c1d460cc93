//! Files out: every output is written to a temporary file beside its target
//! and renamed into place only when complete, so a failure never leaves a
//! partial file behind. `-` means standard output. Before a command starts,
//! [`check_files`] refuses outputs that would replace one of its inputs, each
//! other, or an existing file the user did not ask to replace.

use crate::error::{Error, Result};
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::Mutex;

/// Is this path the "write to standard output" marker?
pub fn is_stdout(path: &Path) -> bool {
    path.as_os_str() == "-"
}

/// A file a command reads, named by the flag (or argument) that gave it.
pub struct Input<'a> {
    pub flag: &'a str,
    pub path: &'a Path,
}

/// A file a command writes.
#[derive(Clone, Copy)]
pub struct Output<'a> {
    pub flag: &'a str,
    pub path: &'a Path,
    /// It may replace an existing file (`--force`, or a file of the run
    /// being resumed).
    pub replace: bool,
    /// The flag of an input this output may be: a checkpoint rewritten by
    /// the run that resumes from it.
    pub may_be: Option<&'a str>,
}

/// Refuse, before any work is done, an output that names one of the inputs
/// (same canonical path or same device and inode, so links count), two
/// outputs naming the same file, an output in a missing directory or on a
/// directory, and an existing file without permission to replace it.
pub fn check_files(inputs: &[Input], outputs: &[Output]) -> Result<()> {
    let outputs: Vec<&Output> = outputs.iter().filter(|o| !is_stdout(o.path)).collect();
    for (i, out) in outputs.iter().enumerate() {
        check_directory(out.path)?;
        let key = FileKey::of(out.path);
        for input in inputs.iter().filter(|inp| Some(inp.flag) != out.may_be) {
            if key.same(&FileKey::of(input.path)) {
                return Err(Error::Invalid(format!(
                    "{} {}: is the input {} ({}); refusing to write over an input",
                    out.flag,
                    out.path.display(),
                    input.flag,
                    input.path.display()
                )));
            }
        }
        if let Some(other) = outputs[..i].iter().find(|o| key.same(&FileKey::of(o.path))) {
            return Err(Error::Invalid(format!(
                "{} and {} both name {}; give each output its own file",
                other.flag,
                out.flag,
                out.path.display()
            )));
        }
        if out.path.is_dir() {
            return Err(Error::Invalid(format!("{} {}: is a directory", out.flag, out.path.display())));
        }
        if !out.replace && std::fs::symlink_metadata(out.path).is_ok() {
            return Err(Error::Invalid(format!(
                "{} {}: already exists; pass --force to replace it",
                out.flag,
                out.path.display()
            )));
        }
    }
    Ok(())
}

/// What identifies a file: its device and inode when it exists, and its
/// canonical path (the canonical directory plus the name when it does not).
#[derive(PartialEq)]
pub struct FileKey {
    inode: Option<(u64, u64)>,
    canonical: Option<PathBuf>,
}

impl FileKey {
    pub fn of(path: &Path) -> FileKey {
        let canonical = path.canonicalize().ok().or_else(|| {
            let dir = match path.parent() {
                Some(d) if !d.as_os_str().is_empty() => d,
                _ => Path::new("."),
            };
            Some(dir.canonicalize().ok()?.join(path.file_name()?))
        });
        FileKey { inode: inode(path), canonical }
    }

    /// Do the two keys name one file?
    pub fn same(&self, other: &FileKey) -> bool {
        matches!((self.inode, other.inode), (Some(a), Some(b)) if a == b)
            || matches!((&self.canonical, &other.canonical), (Some(a), Some(b)) if a == b)
    }

    /// The device and inode, if the file exists: a file renamed into place
    /// gets a new one, which tells a file the run wrote from one it found.
    pub fn inode(&self) -> Option<(u64, u64)> {
        self.inode
    }
}

#[cfg(unix)]
fn inode(path: &Path) -> Option<(u64, u64)> {
    use std::os::unix::fs::MetadataExt;
    std::fs::metadata(path).ok().map(|m| (m.dev(), m.ino()))
}

#[cfg(not(unix))]
fn inode(_path: &Path) -> Option<(u64, u64)> {
    None
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
    let staged = stage_with(path, body)?;
    staged.commit()
}

/// Write two files that belong together (a `.npy` and its sidecar): both
/// are written in full before either is renamed into place.
pub fn write_atomic_pair<F, G>(first: &Path, first_body: F, second: &Path, second_body: G) -> Result<()>
where
    F: FnOnce(&mut dyn Write) -> Result<()>,
    G: FnOnce(&mut dyn Write) -> Result<()>,
{
    let a = stage_with(first, first_body)?;
    let b = stage_with(second, second_body)?;
    b.commit()?;
    a.commit()
}

fn stage_with<F>(path: &Path, body: F) -> Result<Staged>
where
    F: FnOnce(&mut dyn Write) -> Result<()>,
{
    let staged = Staged::new(path);
    let io = |source| Error::Io { path: path.to_path_buf(), source };
    let mut w = BufWriter::new(std::fs::File::create(&staged.tmp).map_err(io)?);
    body(&mut w)?;
    w.flush().map_err(io)?;
    Ok(staged)
}

/// Write `path` atomically through a writer that wants a path of its own:
/// `body` writes the temporary file it is given, which is then synced and
/// renamed into place (removed on any error).
pub fn write_atomic_via<F>(path: &Path, body: F) -> Result<()>
where
    F: FnOnce(&Path) -> Result<()>,
{
    let staged = Staged::new(path);
    body(&staged.tmp)?;
    staged.commit()
}

/// A temporary file on its way to `target`: removed when dropped before
/// [`Staged::commit`], and listed meanwhile so that a panic or a second
/// signal, which end the process without unwinding, can remove it too.
struct Staged {
    tmp: PathBuf,
    target: PathBuf,
}

/// Temporary files being written now.
static IN_FLIGHT: Mutex<Vec<PathBuf>> = Mutex::new(Vec::new());

impl Staged {
    fn new(target: &Path) -> Staged {
        remove_stale_temporaries(target);
        let tmp = temp_path(target);
        if let Ok(mut list) = IN_FLIGHT.lock() {
            list.push(tmp.clone());
        }
        Staged { tmp, target: target.to_path_buf() }
    }

    /// Sync the temporary file and rename it into place.
    fn commit(self) -> Result<()> {
        let io = |source| Error::Io { path: self.target.clone(), source };
        std::fs::File::open(&self.tmp).and_then(|f| f.sync_all()).map_err(io)?;
        std::fs::rename(&self.tmp, &self.target).map_err(io)
    }
}

impl Drop for Staged {
    fn drop(&mut self) {
        // After a commit the temporary name no longer exists.
        let _ = std::fs::remove_file(&self.tmp);
        if let Ok(mut list) = IN_FLIGHT.lock() {
            list.retain(|p| p != &self.tmp);
        }
    }
}

/// Remove the temporary files being written now; for a process about to
/// end without unwinding (panic hook, second signal).
pub fn remove_temporaries() {
    // try_lock: the lock may be held by the thread that is ending.
    if let Ok(list) = IN_FLIGHT.try_lock() {
        for tmp in list.iter() {
            let _ = std::fs::remove_file(tmp);
        }
    }
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

/// `.NAME.PID.tmp` beside the target.
fn temp_path(path: &Path) -> PathBuf {
    path.with_file_name(format!("{}{}.tmp", temp_prefix(path), std::process::id()))
}

fn temp_prefix(path: &Path) -> String {
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    format!(".{name}.")
}

/// Remove temporary files of our naming pattern beside `target` whose
/// process is gone (killed before it could clean up).
fn remove_stale_temporaries(target: &Path) {
    let prefix = temp_prefix(target);
    let dir = match target.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    let Ok(entries) = std::fs::read_dir(dir) else { return };
    for entry in entries.flatten() {
        let name = entry.file_name().to_string_lossy().into_owned();
        let pid = name.strip_prefix(&prefix).and_then(|rest| rest.strip_suffix(".tmp"));
        if let Some(pid) = pid.and_then(|p| p.parse::<u32>().ok()) {
            if pid != std::process::id() && !process_alive(pid) {
                let _ = std::fs::remove_file(entry.path());
            }
        }
    }
}

/// Whether process `pid` exists; where that cannot be told, assume it does
/// (a stale file is then kept, never a live one removed).
fn process_alive(pid: u32) -> bool {
    if cfg!(target_os = "linux") {
        Path::new("/proc").join(pid.to_string()).exists()
    } else {
        true
    }
}

/// A line of progress or advice on standard error. A closed standard error
/// (`2>&1 | head`) is not a reason to stop the work, so write errors are
/// ignored where `eprintln!` would panic.
pub fn note(msg: impl std::fmt::Display) {
    let _ = writeln!(std::io::stderr(), "{msg}");
}

/// Text for standard output; a closed pipe comes back as a broken-pipe I/O
/// error, which the binary treats as a reader that stopped early.
pub fn print(text: impl std::fmt::Display) -> Result<()> {
    let mut out = std::io::stdout().lock();
    write!(out, "{text}").and_then(|_| out.flush()).map_err(|source| Error::Io { path: "-".into(), source })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Tests that write through temporary files hold this, since
    /// [`remove_temporaries`] removes every one in the process.
    static SERIAL: Mutex<()> = Mutex::new(());

    fn serial() -> std::sync::MutexGuard<'static, ()> {
        SERIAL.lock().unwrap_or_else(|e| e.into_inner())
    }

    #[test]
    fn an_output_naming_an_input_through_a_link_or_dots_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let data = dir.path().join("d.npy");
        std::fs::write(&data, b"x").unwrap();
        let link = dir.path().join("link.npy");
        std::fs::hard_link(&data, &link).unwrap();
        let dotted = dir.path().join(".").join("d.npy");
        for out in [&data, &link, &dotted] {
            let err = check_files(
                &[Input { flag: "DATA", path: &data }],
                &[Output { flag: "-o", path: out, replace: true, may_be: None }],
            )
            .unwrap_err()
            .to_string();
            assert!(err.contains("is the input DATA"), "{err}");
        }
        assert_eq!(std::fs::read(&data).unwrap(), b"x");
    }

    #[test]
    fn two_outputs_on_one_new_file_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        let a = dir.path().join("m.safetensors");
        let b = dir.path().join("sub").join("..").join("m.safetensors");
        std::fs::create_dir(dir.path().join("sub")).unwrap();
        let err = check_files(
            &[],
            &[
                Output { flag: "-o", path: &a, replace: false, may_be: None },
                Output { flag: "--log", path: &b, replace: false, may_be: None },
            ],
        )
        .unwrap_err()
        .to_string();
        assert!(err.contains("-o and --log both name"), "{err}");
    }

    #[test]
    fn stale_temporaries_of_dead_processes_are_removed_and_live_ones_kept() {
        let _serial = serial();
        let dir = tempfile::tempdir().unwrap();
        let target = dir.path().join("s.csv");
        // PIDs above the kernel's maximum (2^22) cannot be alive.
        let dead = dir.path().join(".s.csv.99999999.tmp");
        // PID 1 is alive in every PID namespace.
        let live = dir.path().join(".s.csv.1.tmp");
        let other = dir.path().join(".t.csv.99999999.tmp");
        for p in [&dead, &live, &other] {
            std::fs::write(p, b"partial").unwrap();
        }
        write_atomic(&target, |w| w.write_all(b"a\n").map_err(|source| Error::Io { path: target.clone(), source }))
            .unwrap();
        assert!(!dead.exists() && live.exists() && other.exists());
        assert_eq!(std::fs::read(&target).unwrap(), b"a\n");
    }

    /// What the panic hook and a second signal call before the process ends
    /// without unwinding.
    #[test]
    fn temporaries_in_flight_are_removed_on_request() {
        let _serial = serial();
        let dir = tempfile::tempdir().unwrap();
        let staged = Staged::new(&dir.path().join("m.safetensors"));
        std::fs::write(&staged.tmp, b"half").unwrap();
        remove_temporaries();
        assert!(!staged.tmp.exists());
        drop(staged);
        assert!(std::fs::read_dir(dir.path()).unwrap().next().is_none());
    }

    #[test]
    fn a_failed_pair_leaves_neither_file() {
        let _serial = serial();
        let dir = tempfile::tempdir().unwrap();
        let (a, b) = (dir.path().join("s.npy"), dir.path().join("s.json"));
        let fail = |_: &mut dyn Write| Err(Error::Invalid("stop".into()));
        let ok = |w: &mut dyn Write| w.write_all(b"{}").map_err(|source| Error::Io { path: "x".into(), source });
        assert!(write_atomic_pair(&a, ok, &b, fail).is_err());
        assert!(std::fs::read_dir(dir.path()).unwrap().next().is_none(), "something was left");
    }
}
