//! Writing a command's outputs (`--out`, `--plot`, `--junit`): `-` is stdout, anything else a
//! file. Owns the rules that keep a user's files safe:
//!
//! - Every output path is checked before any input is read ([`Outputs::add`]): an empty path, a
//!   folder, a device, FIFO or socket, a missing folder, a symbolic link to nothing, a path that
//!   is one of the inputs (same device and inode) or another output all fail at once.
//! - A symbolic link is written through: its target file is replaced and the link stays.
//! - Only regular files are replaced. An existing file keeps its permission bits (and its owner,
//!   where the process may set it); a new file gets the usual `0666 & !umask`.
//! - All or none ([`Outputs::write`]): every output is first written and synced to a temporary
//!   file beside its target, and only when all of them are complete are they renamed into place.
//!   A failure before the renames removes every temporary file and leaves existing files as they
//!   were.
//! - SIGINT, SIGTERM and SIGHUP remove the temporary files before the process ends
//!   ([`install_signal_cleanup`]); the renames run under the same lock, so a signal never leaves
//!   half of the outputs renamed.

use crate::error::{Error, Result};
use std::fs::{Metadata, Permissions};
use std::io::Write;
use std::os::unix::fs::{FileTypeExt, MetadataExt, PermissionsExt};
use std::path::{Path, PathBuf};
use std::sync::{Mutex, MutexGuard};

/// Paths of the temporary files not yet renamed, for the signal handler to remove.
static PENDING: Mutex<Vec<PathBuf>> = Mutex::new(Vec::new());

fn pending() -> MutexGuard<'static, Vec<PathBuf>> {
    // A panic while holding the lock leaves a usable list: recover it.
    PENDING.lock().unwrap_or_else(|e| e.into_inner())
}

/// Installs a handler thread for SIGINT, SIGTERM and SIGHUP that removes pending temporary
/// files and then ends the process as the signal's default action would (so the parent sees
/// "killed by signal"). Call once, at the start of the program.
pub fn install_signal_cleanup() -> Result<()> {
    use signal_hook::consts::{SIGHUP, SIGINT, SIGTERM};
    let mut signals = signal_hook::iterator::Signals::new([SIGINT, SIGTERM, SIGHUP])
        .map_err(|e| Error::io("<signal handler>", e))?;
    std::thread::Builder::new()
        .name("signal-cleanup".into())
        .spawn(move || {
            if let Some(signal) = signals.forever().next() {
                let mut list = pending();
                for path in list.drain(..) {
                    let _ = std::fs::remove_file(path);
                }
                // Ends the process; the lock is never released, so no rename starts after it.
                let _ = signal_hook::low_level::emulate_default_handler(signal);
                std::process::exit(128 + signal);
            }
        })
        .map_err(|e| Error::io("<signal handler>", e))?;
    Ok(())
}

/// One output: the option that named it, the path as given, and where it goes.
#[derive(Debug)]
struct Target {
    option: String,
    given: String,
    dest: Dest,
}

#[derive(Debug)]
enum Dest {
    Stdout,
    File {
        /// The file that is replaced: the given path, or a symbolic link's final target.
        path: PathBuf,
        /// The mode and owner of the file there now; None when there is none yet.
        keep: Option<Kept>,
        /// The canonical path (existing folder + file name): two outputs may not share it.
        key: PathBuf,
        /// Device and inode of an existing file, compared with the inputs'.
        id: Option<(u64, u64)>,
    },
}

/// What a replaced file keeps: its permission bits and, where the process may set it, its owner.
#[derive(Debug, Clone)]
struct Kept {
    mode: Permissions,
    owner: (u32, u32),
}

/// A handle to one output of an [`Outputs`] set.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Slot(usize);

/// The outputs of one command, checked before any reading and written all or none.
#[derive(Debug, Default)]
pub struct Outputs {
    inputs: Vec<(String, (u64, u64))>,
    targets: Vec<Target>,
}

impl Outputs {
    /// An empty set that refuses to write over any of `inputs` (paths; `-` and paths that do
    /// not exist are ignored here, the reader reports those).
    pub fn new(inputs: &[&str]) -> Outputs {
        let inputs = inputs
            .iter()
            .filter(|p| **p != "-" && !p.is_empty())
            .filter_map(|p| std::fs::metadata(p).ok().map(|m| (p.to_string(), id(&m))))
            .collect();
        Outputs {
            inputs,
            targets: Vec::new(),
        }
    }

    /// Checks the output `path` named by `option` (for messages, e.g. `--out`) and adds it.
    pub fn add(&mut self, option: &str, path: &str) -> Result<Slot> {
        let dest = check(option, path)?;
        self.refuse_collisions(option, path, &dest)?;
        self.targets.push(Target {
            option: option.to_string(),
            given: path.to_string(),
            dest,
        });
        Ok(Slot(self.targets.len() - 1))
    }

    fn refuse_collisions(&self, option: &str, path: &str, dest: &Dest) -> Result<()> {
        let clash = |other: &str, what: &str| {
            Err(Error::usage(format!(
                "{option} {path}: that is {other}; {what}"
            )))
        };
        match dest {
            Dest::Stdout => {
                if let Some(t) = self.targets.iter().find(|t| matches!(t.dest, Dest::Stdout)) {
                    return clash(
                        &format!("stdout, where {} already goes", t.option),
                        "give one of them a file",
                    );
                }
            }
            Dest::File { key, id: file, .. } => {
                if let Some((input, _)) = self.inputs.iter().find(|(_, i)| Some(*i) == *file) {
                    return clash(
                        &format!("the input {input}"),
                        "gradaudit does not write over its input; choose another file",
                    );
                }
                for t in &self.targets {
                    if matches!(&t.dest, Dest::File { key: k, .. } if k == key) {
                        return clash(
                            &format!("the file {} already goes to", t.option),
                            "give each output its own file",
                        );
                    }
                }
            }
        }
        Ok(())
    }

    /// Writes every output: `texts` pairs each slot with its text (a slot left out is not
    /// written). Files are staged to temporary files first and renamed only when all are
    /// complete; a failure before that leaves every existing file untouched.
    pub fn write(&self, texts: Vec<(Slot, String)>) -> Result<()> {
        let bytes = texts.into_iter().map(|(s, t)| (s, t.into_bytes()));
        self.write_bytes(bytes.collect())
    }

    /// [`Outputs::write`] for binary outputs (shard files).
    pub fn write_bytes(&self, texts: Vec<(Slot, Vec<u8>)>) -> Result<()> {
        let mut staged = Vec::new();
        let mut stdout = None;
        for (slot, text) in &texts {
            let target = &self.targets[slot.0];
            match &target.dest {
                Dest::Stdout => stdout = Some(text),
                Dest::File { path, keep, .. } => {
                    staged.push(stage(target, path, keep.as_ref(), text)?);
                }
            }
        }
        test_pause("staged");
        if let Some(text) = stdout {
            write_stdout(text)?;
        }
        rename_all(staged)
    }
}

/// Device and inode: the identity of a file, whatever the path that reached it.
fn id(m: &Metadata) -> (u64, u64) {
    (m.dev(), m.ino())
}

/// The early check of one output path.
fn check(option: &str, path: &str) -> Result<Dest> {
    let refuse = |why: String| Err(Error::usage(format!("{option} {path}: {why}")));
    if path.is_empty() {
        return Err(Error::usage(format!(
            "{option}: the path is empty; give a file name (or - for stdout)"
        )));
    }
    if path == "-" {
        return Ok(Dest::Stdout);
    }
    if path.ends_with('/') {
        return refuse("names a folder; give a file name".into());
    }
    let (file, meta) = match std::fs::symlink_metadata(path) {
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return new_file(option, path),
        Err(e) => return refuse(format!("cannot be used ({e})")),
        Ok(m) if m.file_type().is_symlink() => match std::fs::canonicalize(path) {
            Ok(target) => {
                let meta = std::fs::metadata(&target).map_err(|e| Error::io(path, e))?;
                (target, meta)
            }
            Err(_) => {
                return refuse(
                    "is a symbolic link that does not lead to an existing file; gradaudit \
                     writes through a link only to an existing regular file"
                        .into(),
                );
            }
        },
        Ok(m) => (PathBuf::from(path), m),
    };
    let kind = meta.file_type();
    if kind.is_dir() {
        return refuse("is a folder; give a file name".into());
    }
    if !kind.is_file() {
        let what = if kind.is_char_device() || kind.is_block_device() {
            "a device"
        } else if kind.is_fifo() {
            "a FIFO"
        } else {
            "a socket"
        };
        return refuse(format!(
            "is {what}, not a regular file; gradaudit replaces only regular files (use \
             {option} - for stdout)"
        ));
    }
    probe_folder(option, path, &file)?;
    Ok(Dest::File {
        key: std::fs::canonicalize(&file).map_err(|e| Error::io(path, e))?,
        keep: Some(Kept {
            mode: meta.permissions(),
            owner: (meta.uid(), meta.gid()),
        }),
        id: Some(id(&meta)),
        path: file,
    })
}

/// The check of an output path where no file exists yet: its folder must exist and take files.
fn new_file(option: &str, path: &str) -> Result<Dest> {
    let file = PathBuf::from(path);
    let dir = folder(&file);
    let name = file.file_name().ok_or_else(|| {
        Error::usage(format!("{option} {path}: names a folder; give a file name"))
    })?;
    let canonical = std::fs::canonicalize(dir).map_err(|e| {
        Error::usage(format!(
            "{option} {path}: the folder {} cannot be used ({})",
            dir.display(),
            e
        ))
    })?;
    probe_folder(option, path, &file)?;
    Ok(Dest::File {
        key: canonical.join(name),
        keep: None,
        id: None,
        path: file,
    })
}

/// Creates (and removes) a temporary file where the output's temporary file will go.
fn probe_folder(option: &str, path: &str, file: &Path) -> Result<()> {
    let dir = folder(file);
    // Under the signal lock: a signal waits until the probe file is gone again.
    let _lock = pending();
    tempfile::Builder::new()
        .prefix(".gradaudit-")
        .tempfile_in(dir)
        .map(drop)
        .map_err(|e| {
            Error::usage(format!(
                "{option} {path}: cannot create files in the folder {} ({})",
                dir.display(),
                e
            ))
        })
}

fn folder(path: &Path) -> &Path {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    }
}

fn failed(target: &Target, e: std::io::Error) -> Error {
    Error::usage(format!(
        "{} {}: could not write the output ({e}); no output was replaced",
        target.option, target.given
    ))
}

/// A complete temporary file waiting for its rename; dropping it removes the file and its
/// entry in the signal list.
struct Staged<'a> {
    target: &'a Target,
    tmp: Option<tempfile::NamedTempFile>,
}

impl Drop for Staged<'_> {
    fn drop(&mut self) {
        if let Some(tmp) = self.tmp.take() {
            unregister(&mut pending(), tmp.path());
        }
    }
}

/// Writes `text` to a synced temporary file beside `path`, registered for signal cleanup.
fn stage<'a>(
    target: &'a Target,
    path: &Path,
    keep: Option<&Kept>,
    text: &[u8],
) -> Result<Staged<'a>> {
    let mut builder = tempfile::Builder::new();
    builder.prefix(".gradaudit-").suffix(".tmp");
    if keep.is_none() {
        // open(2) applies the umask to this mode, as for any new file.
        builder.permissions(Permissions::from_mode(0o666));
    }
    let tmp = {
        // Created and registered under the lock, so a signal cannot fall in between.
        let mut list = pending();
        let tmp = builder
            .tempfile_in(folder(path))
            .map_err(|e| failed(target, e))?;
        list.push(tmp.path().to_path_buf());
        tmp
    };
    let staged = Staged {
        target,
        tmp: Some(tmp),
    };
    let file = staged.tmp.as_ref().expect("just created").as_file();
    let mut writer = file;
    writer
        .write_all(text)
        .and_then(|_| match keep {
            // Set after the write so the file is never more open than the one it replaces.
            Some(k) => {
                // Only root may give a file away; others get the file as their own, as with
                // any editor that saves through a rename. chown comes first: it clears set-id bits.
                let _ = std::os::unix::fs::fchown(file, Some(k.owner.0), Some(k.owner.1));
                file.set_permissions(k.mode.clone())
            }
            None => Ok(()),
        })
        .and_then(|_| file.sync_all())
        .map_err(|e| failed(target, e))?;
    Ok(staged)
}

fn unregister(list: &mut Vec<PathBuf>, path: &Path) {
    list.retain(|p| p != path);
}

/// Renames every staged file onto its target, under the signal lock.
fn rename_all(mut staged: Vec<Staged>) -> Result<()> {
    // Take every file out of its guard first: the guards' drop takes the lock held below.
    let files: Vec<(&Target, tempfile::NamedTempFile)> = staged
        .iter_mut()
        .map(|s| (s.target, s.tmp.take().expect("staged once")))
        .collect();
    drop(staged);
    let mut list = pending();
    let mut done: Vec<&str> = Vec::new();
    let mut files = files.into_iter();
    while let Some((target, tmp)) = files.next() {
        let temp_path = tmp.path().to_path_buf();
        let Dest::File { path, .. } = &target.dest else {
            unreachable!("only files are staged");
        };
        let renamed = tmp.persist(path);
        unregister(&mut list, &temp_path);
        if let Err(e) = renamed {
            // The temporary files left (and the one in `e`) are removed when they drop.
            for (_, rest) in files.by_ref() {
                unregister(&mut list, rest.path());
            }
            let already = if done.is_empty() {
                "no output was replaced".to_string()
            } else {
                format!("already replaced: {}", done.join(", "))
            };
            return Err(Error::usage(format!(
                "{} {}: could not rename the output into place ({}); {already}",
                target.option, target.given, e.error
            )));
        }
        done.push(&target.given);
    }
    Ok(())
}

fn write_stdout(text: &[u8]) -> Result<()> {
    let mut out = std::io::stdout().lock();
    match out.write_all(text).and_then(|_| out.flush()) {
        // A closed pipe (`| head`) is not an error of ours.
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(()),
        other => other.map_err(|e| Error::io("<stdout>", e)),
    }
}

/// Writes `text` to stdout (`-`) or, through the same checks and staging, to one file.
pub fn write(path: &str, text: &str) -> Result<()> {
    let mut outputs = Outputs::new(&[]);
    let slot = outputs.add("output", path)?;
    outputs.write(vec![(slot, text.to_string())])
}

/// A hidden hook for the tests: with `GRADAUDIT_TEST_PAUSE=STAGE:FILE`, reaching STAGE
/// (`checked`: outputs checked, no input read yet; `staged`: every temporary file written and
/// synced, nothing renamed) creates FILE holding the process id, then waits until FILE is
/// removed (at most two minutes). Lets a test act at an exact moment instead of guessing a delay.
#[doc(hidden)]
pub fn test_pause(stage: &str) {
    let Ok(spec) = std::env::var("GRADAUDIT_TEST_PAUSE") else {
        return;
    };
    let Some((at, file)) = spec.split_once(':') else {
        return;
    };
    if at != stage || std::fs::write(file, std::process::id().to_string()).is_err() {
        return;
    }
    let start = std::time::Instant::now();
    while Path::new(file).exists() && start.elapsed() < std::time::Duration::from_secs(120) {
        std::thread::sleep(std::time::Duration::from_millis(10));
    }
}
