//! The output folder: one writer at a time (an exclusive lock on the folder), temporaries with unique names
//! created exclusively and never through a symbolic link, a clean-up that removes only this process's own
//! files, and a process-wide list of them so Ctrl-C can remove them too ([`interrupt_cleanup`]).

use std::fs::{self, File, OpenOptions};
use std::io::Write;
use std::os::unix::fs::OpenOptionsExt;
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::sync::atomic::{AtomicU64, Ordering};

use crate::error::{Error, Result};

/// Name of the marker file that says a folder is one of ours.
pub const MARKER: &str = ".convchain-output";

/// What Ctrl-C must undo: the temporaries not yet renamed into place and the folders this process created.
struct Pending {
    /// Set once the process is stopping: no new temporary may be created from then on.
    stopping: bool,
    temps: Vec<PathBuf>,
    created_dirs: Vec<PathBuf>,
}

static PENDING: Mutex<Pending> = Mutex::new(Pending {
    stopping: false,
    temps: Vec::new(),
    created_dirs: Vec::new(),
});

static COUNTER: AtomicU64 = AtomicU64::new(0);

fn pending() -> std::sync::MutexGuard<'static, Pending> {
    PENDING.lock().unwrap_or_else(|p| p.into_inner())
}

/// Remove every temporary file this process has not yet renamed into place, and every output folder it
/// created that holds nothing but its marker; from then on no temporary can be created. For the Ctrl-C handler
/// (it runs on its own thread, so taking the lock is safe). Returns how many temporaries were removed.
pub fn interrupt_cleanup() -> usize {
    let mut p = pending();
    p.stopping = true;
    let mut n = 0;
    for t in p.temps.drain(..) {
        if fs::remove_file(&t).is_ok() {
            n += 1;
        }
    }
    for d in p.created_dirs.drain(..) {
        remove_if_only_marker(&d);
    }
    n
}

/// Remove `dir` when it holds nothing but our marker (a folder this process created and wrote nothing into).
fn remove_if_only_marker(dir: &Path) {
    let only_marker = fs::read_dir(dir)
        .is_ok_and(|rd| rd.flatten().all(|e| e.file_name().to_str() == Some(MARKER)));
    if only_marker {
        let _ = fs::remove_file(dir.join(MARKER));
        let _ = fs::remove_dir(dir);
    }
}

/// Open a new file for writing: it must not exist (`O_EXCL`), and a symbolic link at its place is never
/// followed (`O_NOFOLLOW`).
fn create_exclusive(path: &Path) -> std::io::Result<File> {
    OpenOptions::new()
        .write(true)
        .create_new(true)
        .custom_flags(libc::O_NOFOLLOW | libc::O_CLOEXEC)
        .mode(0o644)
        .open(path)
}

/// Create the new file `path` for writing: exclusively (it must not exist) and never through a symbolic link.
pub fn create_new_file(path: &Path) -> Result<File> {
    create_exclusive(path).map_err(|e| Error::Write {
        path: path.to_path_buf(),
        source: e,
    })
}

/// A unique temporary path beside `path` (same folder, so a rename or link into place is atomic).
pub fn temp_beside(path: &Path) -> PathBuf {
    let n = COUNTER.fetch_add(1, Ordering::Relaxed);
    let name = path
        .file_name()
        .map_or_else(String::new, |n| n.to_string_lossy().to_string());
    path.with_file_name(format!(".{name}.{}-{n}.tmp", std::process::id()))
}

/// Write a new file `path` that must not exist yet (for `init` and `audio`, which write into the user's own
/// folder): `fill` writes a unique temporary created by [`create_new_file`], which is then linked into place
/// without replacing anything (a link fails when `path` exists) and removed.
pub fn write_new_file(path: &Path, fill: impl FnOnce(&Path) -> Result<()>) -> Result<()> {
    let tmp = temp_beside(path);
    let r = fill(&tmp).and_then(|()| {
        fs::hard_link(&tmp, path).map_err(|e| {
            if e.kind() == std::io::ErrorKind::AlreadyExists {
                Error::BadInput(format!(
                    "{} already exists; convchain does not overwrite files (choose another name)",
                    path.display()
                ))
            } else {
                Error::Write {
                    path: path.to_path_buf(),
                    source: e,
                }
            }
        })
    });
    let _ = fs::remove_file(&tmp);
    r
}

/// Open the folder itself (never through a link at its last component) and take the exclusive lock on it.
/// `Ok(None)` when another process holds the lock.
fn lock_dir(path: &Path) -> Result<Option<File>> {
    let f = OpenOptions::new()
        .read(true)
        .custom_flags(libc::O_DIRECTORY | libc::O_CLOEXEC)
        .open(path)
        .map_err(|e| Error::Write {
            path: path.to_path_buf(),
            source: e,
        })?;
    match f.try_lock() {
        Ok(()) => Ok(Some(f)),
        Err(fs::TryLockError::WouldBlock) => Ok(None),
        Err(fs::TryLockError::Error(e)) => Err(Error::Write {
            path: path.to_path_buf(),
            source: e,
        }),
    }
}

fn busy(path: &Path) -> Error {
    Error::BadInput(format!(
        "--out {}: another convchain process is writing into this folder right now; wait for it to finish or \
         choose another --out",
        path.display()
    ))
}

/// An output folder the tool may write into: it is new, empty, or was made by the tool (it holds the marker).
/// While it exists the process holds an exclusive lock on the folder, so a second writer is refused. Every
/// file goes in through a temporary file of its own and a rename, so a failed run leaves no partial file.
pub struct OutputDir {
    path: PathBuf,
    created: bool,
    /// The open folder holding the lock (released when dropped).
    _lock: File,
    /// Our temporaries not yet renamed: (final name, temporary path).
    temps: Mutex<Vec<(String, PathBuf)>>,
}

impl OutputDir {
    /// Check `path` without creating anything (so bad input can be reported before a folder appears): it is a
    /// folder (or absent), holds only convchain's files (or nothing), no entry is a symbolic link, and no other
    /// process is writing into it.
    pub fn check(path: &Path) -> Result<()> {
        let Ok(meta) = fs::metadata(path) else {
            return Ok(());
        };
        if !meta.is_dir() {
            return Err(Error::BadInput(format!(
                "--out {}: this is a file, not a folder; choose a folder",
                path.display()
            )));
        }
        let read = |e| Error::Read {
            path: path.to_path_buf(),
            source: e,
        };
        let marker = fs::symlink_metadata(path.join(MARKER));
        let ours = marker.as_ref().is_ok_and(|m| m.file_type().is_file());
        let mut empty = true;
        for e in fs::read_dir(path).map_err(read)? {
            let e = e.map_err(read)?;
            empty = false;
            if e.file_type().map_err(read)?.is_symlink() {
                return Err(Error::BadInput(format!(
                    "--out {}: the entry {} is a symbolic link; convchain never writes through links \
                     (remove the link or choose another folder)",
                    path.display(),
                    crate::text::clip(&e.file_name().to_string_lossy()),
                )));
            }
        }
        if !ours && !empty {
            return Err(Error::BadInput(format!(
                "--out {}: this folder holds files convchain did not make; choose a new or empty folder \
                 (convchain never overwrites files it did not write)",
                path.display()
            )));
        }
        if lock_dir(path)?.is_none() {
            return Err(busy(path));
        }
        Ok(())
    }

    /// Create (or reuse) the folder and lock it; call when the run starts.
    pub fn create(path: &Path) -> Result<OutputDir> {
        Self::check(path)?;
        let werr = |e| Error::Write {
            path: path.to_path_buf(),
            source: e,
        };
        if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
            fs::create_dir_all(parent).map_err(werr)?;
        }
        // create_dir (not _all) says whether this process made the folder, even if another one races it.
        let created = match fs::create_dir(path) {
            Ok(()) => true,
            Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => false,
            Err(e) => return Err(werr(e)),
        };
        let lock = match lock_dir(path)? {
            Some(l) => l,
            None => return Err(busy(path)),
        };
        // Under the lock, check again: another process may have written between the check and the lock.
        Self::check_locked(path)?;
        let marker = path.join(MARKER);
        match fs::symlink_metadata(&marker) {
            Ok(m) if m.file_type().is_file() => {}
            Ok(_) => {
                return Err(Error::BadInput(format!(
                    "--out {}: {MARKER} is not a plain file; choose another folder",
                    path.display()
                )));
            }
            Err(_) => {
                let mut f = create_exclusive(&marker).map_err(|e| Error::Write {
                    path: marker.clone(),
                    source: e,
                })?;
                f.write_all(b"This folder was written by convchain.\n")
                    .map_err(|e| Error::Write {
                        path: marker.clone(),
                        source: e,
                    })?;
            }
        }
        if created {
            pending().created_dirs.push(path.to_path_buf());
        }
        Ok(OutputDir {
            path: path.to_path_buf(),
            created,
            _lock: lock,
            temps: Mutex::new(Vec::new()),
        })
    }

    /// [`OutputDir::check`] without the lock test (we hold the lock).
    fn check_locked(path: &Path) -> Result<()> {
        let read = |e| Error::Read {
            path: path.to_path_buf(),
            source: e,
        };
        let mut foreign = false;
        for e in fs::read_dir(path).map_err(read)? {
            let e = e.map_err(read)?;
            if e.file_type().map_err(read)?.is_symlink() {
                return Err(Error::BadInput(format!(
                    "--out {}: the entry {} is a symbolic link; convchain never writes through links \
                     (remove the link or choose another folder)",
                    path.display(),
                    crate::text::clip(&e.file_name().to_string_lossy()),
                )));
            }
            foreign |= e.file_name().to_str() != Some(MARKER);
        }
        let ours = fs::symlink_metadata(path.join(MARKER)).is_ok_and(|m| m.file_type().is_file());
        if foreign && !ours {
            return Err(Error::BadInput(format!(
                "--out {}: this folder holds files convchain did not make; choose a new or empty folder \
                 (convchain never overwrites files it did not write)",
                path.display()
            )));
        }
        Ok(())
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Create a new temporary file for `name` (a unique name, created exclusively, never through a link) and
    /// return it with its path; [`OutputDir::commit`] renames it into place.
    pub fn create_temp(&self, name: &str) -> Result<(File, PathBuf)> {
        let n = COUNTER.fetch_add(1, Ordering::Relaxed);
        let tmp = self
            .path
            .join(format!(".{name}.{}-{n}.tmp", std::process::id()));
        let mut p = pending();
        if p.stopping {
            return Err(Error::Run("interrupted".into()));
        }
        let f = create_exclusive(&tmp).map_err(|e| Error::Write {
            path: tmp.clone(),
            source: e,
        })?;
        p.temps.push(tmp.clone());
        drop(p);
        self.temps
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .push((name.to_string(), tmp.clone()));
        Ok((f, tmp))
    }

    /// Rename the temporary file of `name` (the latest made by [`OutputDir::create_temp`]) into place. An entry
    /// `name` that is a symbolic link or not a plain file is refused, never replaced.
    pub fn commit(&self, name: &str) -> Result<PathBuf> {
        let dst = self.path.join(name);
        let tmp = {
            let mut t = self.temps.lock().unwrap_or_else(|p| p.into_inner());
            let i = t.iter().rposition(|(n, _)| n == name).ok_or_else(|| {
                Error::Run(format!("internal: no temporary file for {name} to commit"))
            })?;
            t.remove(i).1
        };
        if let Ok(m) = fs::symlink_metadata(&dst)
            && !m.file_type().is_file()
        {
            let _ = fs::remove_file(&tmp);
            pending().temps.retain(|t| t != &tmp);
            return Err(Error::BadInput(format!(
                "{}: this is not a plain file (a link or a folder); convchain never replaces it \
                 (remove it or choose another --out)",
                dst.display()
            )));
        }
        let mut p = pending();
        let r = fs::rename(&tmp, &dst);
        p.temps.retain(|t| t != &tmp);
        drop(p);
        r.map_err(|e| {
            let _ = fs::remove_file(&tmp);
            Error::Write {
                path: dst.clone(),
                source: e,
            }
        })?;
        Ok(dst)
    }

    /// Write a whole file atomically.
    pub fn write(&self, name: &str, bytes: &[u8]) -> Result<PathBuf> {
        let (mut f, tmp) = self.create_temp(name)?;
        f.write_all(bytes)
            .and_then(|_| f.sync_all())
            .map_err(|e| Error::Write {
                path: tmp.clone(),
                source: e,
            })?;
        drop(f);
        self.commit(name)
    }

    /// After a failure: remove this process's temporary files, and the folder itself if this run created it
    /// and it holds nothing else. Nothing else is touched.
    pub fn abandon(self) {
        let temps = std::mem::take(&mut *self.temps.lock().unwrap_or_else(|p| p.into_inner()));
        {
            let mut p = pending();
            for (_, t) in &temps {
                let _ = fs::remove_file(t);
                p.temps.retain(|x| x != t);
            }
        }
        if self.created {
            remove_if_only_marker(&self.path);
        }
    }
}

impl Drop for OutputDir {
    fn drop(&mut self) {
        let mut p = pending();
        if self.created {
            p.created_dirs.retain(|d| d != &self.path);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_folder_with_foreign_files_is_refused() {
        let d = tempfile::tempdir().unwrap();
        fs::write(d.path().join("notes.txt"), "mine").unwrap();
        assert!(OutputDir::check(d.path()).is_err());
        assert!(fs::read_to_string(d.path().join("notes.txt")).unwrap() == "mine");
    }

    #[test]
    fn our_own_folder_is_reused_and_files_replace_atomically() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        let o = OutputDir::create(&p).unwrap();
        o.write("a.txt", b"1").unwrap();
        drop(o);
        let o = OutputDir::create(&p).unwrap();
        o.write("a.txt", b"2").unwrap();
        assert_eq!(fs::read_to_string(p.join("a.txt")).unwrap(), "2");
        let names: Vec<_> = fs::read_dir(&p)
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names.len(), 2, "{names:?}");
    }

    #[test]
    fn abandoning_a_new_folder_leaves_nothing() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        let o = OutputDir::create(&p).unwrap();
        let (mut f, _) = o.create_temp("x.csv").unwrap();
        f.write_all(b"partial").unwrap();
        o.abandon();
        assert!(!p.exists());
    }

    #[test]
    fn a_second_writer_is_refused_while_the_first_holds_the_folder() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        let a = OutputDir::create(&p).unwrap();
        let e = OutputDir::create(&p).err().expect("second writer refused");
        assert!(e.to_string().contains("another convchain process"), "{e}");
        assert!(OutputDir::check(&p).is_err());
        drop(a);
        assert!(OutputDir::create(&p).is_ok());
    }

    #[test]
    fn abandon_removes_only_its_own_temporaries() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        drop(OutputDir::create(&p).unwrap());
        // A temporary of another (earlier) process is not ours to delete.
        fs::write(p.join(".report.json.1-0.tmp"), "other").unwrap();
        let o = OutputDir::create(&p).unwrap();
        let _ = o.create_temp("report.json").unwrap();
        o.abandon();
        assert!(p.join(".report.json.1-0.tmp").exists());
        assert!(p.join(MARKER).exists());
    }

    #[test]
    fn a_link_in_the_folder_is_refused_and_its_target_untouched() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        drop(OutputDir::create(&p).unwrap());
        let target = d.path().join("victim.txt");
        fs::write(&target, "keep").unwrap();
        std::os::unix::fs::symlink(&target, p.join("report.json")).unwrap();
        let e = OutputDir::create(&p).err().expect("refused");
        assert!(e.to_string().contains("symbolic link"), "{e}");
        assert_eq!(fs::read_to_string(&target).unwrap(), "keep");
    }
}
