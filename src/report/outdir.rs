//! The output folder: one writer at a time (an exclusive lock on the folder), temporaries with unique names
//! created exclusively and never through a symbolic link, a clean-up that removes only this process's own
//! files, and a process-wide list of them so Ctrl-C can remove them too ([`interrupt_cleanup`]).
//!
//! The marker file [`MARKER`] is also the folder's manifest ([`Manifest`]): the files convchain wrote there,
//! each with the command that wrote it, and the study the folder holds, if any. A finished run removes the
//! files the same command wrote in an earlier run and did not write again (so `run --no-plots` leaves no old
//! plot behind); a file not in the manifest is never touched. A study refuses a folder that holds another
//! study (or another command's outputs) unless told to replace it (`--force`).

use std::fs::{self, File, OpenOptions};
use std::io::Write;
use std::os::unix::fs::OpenOptionsExt;
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::sync::atomic::{AtomicU64, Ordering};

use serde::{Deserialize, Serialize};
use serde_json::Value;

use crate::error::{Error, Result};

/// Name of the marker file that says a folder is one of ours; it holds the folder's [`Manifest`].
pub const MARKER: &str = ".convchain-output";
/// Value of [`Manifest::format`] for this version of the marker.
pub const MANIFEST_FORMAT: &str = "convchain-output/2";

/// One file convchain wrote into the folder.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ManifestFile {
    /// The file's name in the folder (a plain name, no folder part).
    pub name: String,
    /// The command that wrote it (`run`, `static`, `sweep`, `montecarlo`, `limit`).
    pub by: String,
}

/// The study a folder holds: what it is, compared whole, and the same in words for messages.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ManifestStudy {
    /// The kind of study (`sweep`, `montecarlo`, `limit`).
    pub kind: String,
    /// Its definition: the options that shape it (not the scenario's text).
    pub definition: Value,
    /// The study in words.
    pub describe: String,
}

/// The marker's content: what convchain wrote into the folder. A marker of an older version (plain text) reads
/// as an empty manifest: its files are kept, never removed.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    pub format: String,
    pub note: String,
    #[serde(default)]
    pub study: Option<ManifestStudy>,
    #[serde(default)]
    pub files: Vec<ManifestFile>,
}

impl Default for Manifest {
    fn default() -> Self {
        Manifest {
            format: MANIFEST_FORMAT.into(),
            note: "This folder was written by convchain; these are the files it wrote here. The next convchain \
                   run into this folder may replace or remove them; it never touches any other file."
                .into(),
            study: None,
            files: Vec::new(),
        }
    }
}

impl Manifest {
    /// Read the marker of `dir` (an empty manifest when it is absent, of an older version or unreadable as
    /// one). Entries whose name is not a plain file name are dropped, so no entry can point outside the folder.
    pub fn read(dir: &Path) -> Manifest {
        let text = fs::symlink_metadata(dir.join(MARKER))
            .ok()
            .filter(|m| m.file_type().is_file())
            .and_then(|_| fs::read_to_string(dir.join(MARKER)).ok());
        let mut m = text
            .and_then(|t| serde_json::from_str::<Manifest>(&t).ok())
            .unwrap_or_default();
        m.files.retain(|f| plain_name(&f.name));
        m
    }

    fn to_bytes(&self) -> Vec<u8> {
        let mut v = serde_json::to_vec_pretty(self).unwrap_or_default();
        v.push(b'\n');
        v
    }
}

/// A name that stays inside the folder: not empty, no `/`, not `.` or `..`, not the marker itself.
fn plain_name(name: &str) -> bool {
    !name.is_empty()
        && !name.contains('/')
        && !name.contains('\0')
        && name != "."
        && name != ".."
        && name != MARKER
}

/// Who writes into a folder: the command, and the study it writes when it writes one.
#[derive(Debug, Clone)]
pub struct Producer {
    /// The command (`run`, `static`, `sweep`, `montecarlo`, `limit`); `merge` writes as the study it merges.
    pub by: String,
    /// The study, for the study commands.
    pub study: Option<ManifestStudy>,
    /// Replace whatever convchain wrote there before (another study, another command's outputs).
    pub force: bool,
}

impl Producer {
    /// A single run (`run`).
    pub fn run(force: bool) -> Producer {
        Producer {
            by: "run".into(),
            study: None,
            force,
        }
    }

    /// The static tests (`static`).
    pub fn static_tests(force: bool) -> Producer {
        Producer {
            by: "static".into(),
            study: None,
            force,
        }
    }

    /// A study of `kind` with its definition (compared whole with the study a folder holds) and its
    /// description in words.
    pub fn study(kind: &str, definition: Value, describe: String, force: bool) -> Producer {
        Producer {
            by: kind.into(),
            study: Some(ManifestStudy {
                kind: kind.into(),
                definition,
                describe,
            }),
            force,
        }
    }

    /// Why this producer may not write into a folder holding `m` without `--force`, or None when it may. `run`
    /// and `static` share a folder (they share its default name); a study shares a folder only with itself.
    fn conflict(&self, m: &Manifest) -> Option<String> {
        let others = |by: &str| m.files.iter().any(|f| f.by != by);
        let commands = |m: &Manifest| {
            let mut c: Vec<&str> = m.files.iter().map(|f| f.by.as_str()).collect();
            c.sort_unstable();
            c.dedup();
            c.iter()
                .map(|c| format!("`convchain {c}`"))
                .collect::<Vec<_>>()
                .join(" and ")
        };
        match (&m.study, &self.study) {
            // The same study: its kind and definition (not the words, which may change between versions).
            (Some(there), Some(mine))
                if there.kind == mine.kind && there.definition == mine.definition =>
            {
                None
            }
            (Some(there), _) => Some(format!("holds {}", there.describe)),
            (None, Some(_)) if others(&self.by) => {
                Some(format!("holds the outputs of {}", commands(m)))
            }
            (None, _) => None,
        }
    }

    /// The words for what this producer writes, for messages.
    fn describe(&self) -> String {
        match &self.study {
            Some(s) => s.describe.clone(),
            None => format!("the outputs of `convchain {}`", self.by),
        }
    }
}

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

/// Write `m` as the marker of `dir`: a unique temporary created exclusively, then a rename over the marker.
fn write_manifest(dir: &Path, m: &Manifest) -> Result<()> {
    let marker = dir.join(MARKER);
    let tmp = temp_beside(&marker);
    let r = create_exclusive(&tmp)
        .and_then(|mut f| f.write_all(&m.to_bytes()))
        .and_then(|()| fs::rename(&tmp, &marker));
    r.map_err(|e| {
        let _ = fs::remove_file(&tmp);
        Error::Write {
            path: marker,
            source: e,
        }
    })
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
    producer: Producer,
    /// The manifest as on disk: the earlier files and every file this run has put in place so far.
    manifest: Mutex<Manifest>,
    /// The names this run wrote.
    written: Mutex<Vec<String>>,
    /// The open folder holding the lock (released when dropped).
    _lock: File,
    /// Our temporaries not yet renamed: (final name, temporary path).
    temps: Mutex<Vec<(String, PathBuf)>>,
}

impl OutputDir {
    /// Check `path` without creating anything (so bad input can be reported before a folder appears): it is a
    /// folder (or absent), holds only convchain's files (or nothing), no entry is a symbolic link, and no other
    /// process is writing into it, and `producer` may write there (see [`Producer`]: a study does not replace
    /// another one unless forced).
    pub fn check(path: &Path, producer: &Producer) -> Result<()> {
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
        if ours {
            Self::check_producer(path, &Manifest::read(path), producer)?;
        }
        if lock_dir(path)?.is_none() {
            return Err(busy(path));
        }
        Ok(())
    }

    /// Refuse `producer` when the folder holds what it must not replace unless forced.
    fn check_producer(path: &Path, m: &Manifest, producer: &Producer) -> Result<()> {
        match producer.conflict(m) {
            Some(why) if !producer.force => Err(Error::BadInput(format!(
                "--out {}: this folder {why}; writing {} there would replace it. Choose another --out, or add \
                 --force to replace what convchain wrote there (files you put there yourself are kept)",
                path.display(),
                producer.describe()
            ))),
            _ => Ok(()),
        }
    }

    /// Create (or reuse) the folder and lock it; call when the run starts. [`OutputDir::finish`] ends a
    /// successful run; [`OutputDir::abandon`] a failed one.
    pub fn create(path: &Path, producer: &Producer) -> Result<OutputDir> {
        Self::check(path, producer)?;
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
        let mut manifest = match fs::symlink_metadata(&marker) {
            Ok(m) if m.file_type().is_file() => Manifest::read(path),
            Ok(_) => {
                return Err(Error::BadInput(format!(
                    "--out {}: {MARKER} is not a plain file; choose another folder",
                    path.display()
                )));
            }
            Err(_) => {
                // A new marker, created exclusively so nothing in its place is overwritten.
                let m = Manifest::default();
                let mut f = create_exclusive(&marker).map_err(|e| Error::Write {
                    path: marker.clone(),
                    source: e,
                })?;
                f.write_all(&m.to_bytes()).map_err(|e| Error::Write {
                    path: marker.clone(),
                    source: e,
                })?;
                m
            }
        };
        Self::check_producer(path, &manifest, producer)?;
        if created {
            pending().created_dirs.push(path.to_path_buf());
        }
        manifest.format = MANIFEST_FORMAT.into();
        manifest.note = Manifest::default().note;
        if producer.study.is_some() || producer.force {
            manifest.study = producer.study.clone();
        }
        let out = OutputDir {
            path: path.to_path_buf(),
            created,
            producer: producer.clone(),
            manifest: Mutex::new(Manifest::default()),
            written: Mutex::new(Vec::new()),
            _lock: lock,
            temps: Mutex::new(Vec::new()),
        };
        out.store_manifest(manifest)?;
        Ok(out)
    }

    /// Write `m` as the folder's marker (atomically: a temporary, then a rename) and keep it as the current one.
    fn store_manifest(&self, m: Manifest) -> Result<()> {
        let mut current = self.manifest.lock().unwrap_or_else(|p| p.into_inner());
        write_manifest(&self.path, &m)?;
        *current = m;
        Ok(())
    }

    /// Record `name` as written by this run, in the manifest on disk before the file appears, so every file
    /// convchain puts in the folder is listed even if the run stops right after.
    fn note_written(&self, name: &str) -> Result<()> {
        let mut w = self.written.lock().unwrap_or_else(|p| p.into_inner());
        if !w.iter().any(|n| n == name) {
            w.push(name.to_string());
        }
        drop(w);
        let mut current = self.manifest.lock().unwrap_or_else(|p| p.into_inner());
        let entry = ManifestFile {
            name: name.to_string(),
            by: self.producer.by.clone(),
        };
        if current.files.contains(&entry) {
            return Ok(());
        }
        let mut m = current.clone();
        m.files.retain(|f| f.name != name);
        m.files.push(entry);
        write_manifest(&self.path, &m)?;
        *current = m;
        Ok(())
    }

    /// End a successful run: remove the files convchain listed in the manifest that this run did not write
    /// again (those of the same command; every one when forced), each only if it is still a plain file, and
    /// leave the manifest listing what remains. Files not in the manifest are never touched. Returns the names
    /// removed.
    pub fn finish(self) -> Result<Vec<String>> {
        let written = std::mem::take(&mut *self.written.lock().unwrap_or_else(|p| p.into_inner()));
        let mut m = self
            .manifest
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .clone();
        let mut removed = Vec::new();
        let mut kept = Vec::new();
        for f in std::mem::take(&mut m.files) {
            let stale =
                !written.contains(&f.name) && (self.producer.force || f.by == self.producer.by);
            if !stale {
                kept.push(f);
                continue;
            }
            let p = self.path.join(&f.name);
            match fs::symlink_metadata(&p) {
                // Only a plain file is removed (a link is never followed nor removed; a folder is left alone).
                Ok(meta) if meta.file_type().is_file() => {
                    if fs::remove_file(&p).is_ok() {
                        removed.push(f.name);
                    } else {
                        kept.push(f);
                    }
                }
                Ok(_) => {}
                Err(_) => {}
            }
        }
        m.files = kept;
        self.store_manifest(m)?;
        Ok(removed)
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
        if let Err(e) = self.note_written(name) {
            let _ = fs::remove_file(&tmp);
            pending().temps.retain(|t| t != &tmp);
            return Err(e);
        }
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

    /// Write several whole files atomically, as [`OutputDir::write`] each: their temporaries are written and
    /// synced to disk side by side (one thread each: the syncs wait on the disk, not the processor, and the
    /// file system commits them together), then renamed into place one by one in the order given, so the
    /// manifest lists them in that order whatever the timing. On an error the files not yet renamed are left
    /// as temporaries for [`OutputDir::abandon`].
    pub fn write_many(&self, files: &[(String, &[u8])]) -> Result<()> {
        let mut temps = Vec::with_capacity(files.len());
        for (name, _) in files {
            temps.push(self.create_temp(name)?);
        }
        let written: Vec<Result<()>> = std::thread::scope(|scope| {
            let jobs: Vec<_> = temps
                .into_iter()
                .zip(files)
                .map(|((mut f, tmp), (_, bytes))| {
                    scope.spawn(move || {
                        f.write_all(bytes)
                            .and_then(|_| f.sync_all())
                            .map_err(|e| Error::Write {
                                path: tmp,
                                source: e,
                            })
                    })
                })
                .collect();
            jobs.into_iter()
                .map(|j| {
                    j.join().unwrap_or_else(|_| {
                        Err(Error::Run("a file writer's thread panicked".into()))
                    })
                })
                .collect()
        });
        for r in written {
            r?;
        }
        for (name, _) in files {
            self.commit(name)?;
        }
        Ok(())
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
        assert!(OutputDir::check(d.path(), &Producer::run(false)).is_err());
        assert!(fs::read_to_string(d.path().join("notes.txt")).unwrap() == "mine");
    }

    #[test]
    fn our_own_folder_is_reused_and_files_replace_atomically() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        let o = OutputDir::create(&p, &Producer::run(false)).unwrap();
        o.write("a.txt", b"1").unwrap();
        drop(o);
        let o = OutputDir::create(&p, &Producer::run(false)).unwrap();
        o.write("a.txt", b"2").unwrap();
        assert_eq!(fs::read_to_string(p.join("a.txt")).unwrap(), "2");
        let names: Vec<_> = fs::read_dir(&p)
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names.len(), 2, "{names:?}");
    }

    #[test]
    fn several_files_written_together_land_whole_and_listed_in_order() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("o");
        let out = OutputDir::create(&p, &Producer::run(false)).unwrap();
        let big = vec![7u8; 3 << 20];
        let files: Vec<(String, &[u8])> = vec![
            ("b.bin".into(), &big[..]),
            ("a.txt".into(), b"first"),
            ("c.txt".into(), b""),
        ];
        out.write_many(&files).unwrap();
        out.finish().unwrap();
        assert_eq!(fs::read(p.join("b.bin")).unwrap(), big);
        assert_eq!(fs::read(p.join("a.txt")).unwrap(), b"first");
        assert_eq!(fs::read(p.join("c.txt")).unwrap(), b"");
        let names: Vec<String> = Manifest::read(&p)
            .files
            .into_iter()
            .map(|f| f.name)
            .collect();
        assert_eq!(names, ["b.bin", "a.txt", "c.txt"]);
        // No temporary is left.
        let left: Vec<_> = fs::read_dir(&p)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
            .filter(|n| n.ends_with(".tmp"))
            .collect();
        assert!(left.is_empty(), "{left:?}");
    }

    #[test]
    fn abandoning_a_new_folder_leaves_nothing() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        let o = OutputDir::create(&p, &Producer::run(false)).unwrap();
        let (mut f, _) = o.create_temp("x.csv").unwrap();
        f.write_all(b"partial").unwrap();
        o.abandon();
        assert!(!p.exists());
    }

    #[test]
    fn a_second_writer_is_refused_while_the_first_holds_the_folder() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        let a = OutputDir::create(&p, &Producer::run(false)).unwrap();
        let e = OutputDir::create(&p, &Producer::run(false))
            .err()
            .expect("second writer refused");
        assert!(e.to_string().contains("another convchain process"), "{e}");
        assert!(OutputDir::check(&p, &Producer::run(false)).is_err());
        drop(a);
        assert!(OutputDir::create(&p, &Producer::run(false)).is_ok());
    }

    #[test]
    fn abandon_removes_only_its_own_temporaries() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        drop(OutputDir::create(&p, &Producer::run(false)).unwrap());
        // A temporary of another (earlier) process is not ours to delete.
        fs::write(p.join(".report.json.1-0.tmp"), "other").unwrap();
        let o = OutputDir::create(&p, &Producer::run(false)).unwrap();
        let _ = o.create_temp("report.json").unwrap();
        o.abandon();
        assert!(p.join(".report.json.1-0.tmp").exists());
        assert!(p.join(MARKER).exists());
    }

    #[test]
    fn a_link_in_the_folder_is_refused_and_its_target_untouched() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        drop(OutputDir::create(&p, &Producer::run(false)).unwrap());
        let target = d.path().join("victim.txt");
        fs::write(&target, "keep").unwrap();
        std::os::unix::fs::symlink(&target, p.join("report.json")).unwrap();
        let e = OutputDir::create(&p, &Producer::run(false))
            .err()
            .expect("refused");
        assert!(e.to_string().contains("symbolic link"), "{e}");
        assert_eq!(fs::read_to_string(&target).unwrap(), "keep");
    }

    #[test]
    fn finish_removes_only_listed_plain_files_of_the_same_command() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        let o = OutputDir::create(&p, &Producer::run(false)).unwrap();
        o.write("a.png", b"1").unwrap();
        o.write("report.json", b"1").unwrap();
        assert!(o.finish().unwrap().is_empty());
        let o = OutputDir::create(&p, &Producer::static_tests(false)).unwrap();
        o.write("static.json", b"1").unwrap();
        o.finish().unwrap();
        // A manifest entry naming a file outside the folder is dropped when read.
        let outside = d.path().join("victim.txt");
        fs::write(&outside, "keep").unwrap();
        let mut m = Manifest::read(&p);
        m.files.push(ManifestFile {
            name: "../victim.txt".into(),
            by: "run".into(),
        });
        write_manifest(&p, &m).unwrap();
        fs::write(p.join("notes.txt"), "mine").unwrap();
        let o = OutputDir::create(&p, &Producer::run(false)).unwrap();
        o.write("report.json", b"2").unwrap();
        assert_eq!(o.finish().unwrap(), vec!["a.png".to_string()]);
        let mut names: Vec<String> = fs::read_dir(&p)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
            .collect();
        names.sort();
        assert_eq!(names, [MARKER, "notes.txt", "report.json", "static.json"]);
        assert_eq!(fs::read_to_string(&outside).unwrap(), "keep");
    }

    #[test]
    fn an_older_plain_text_marker_reads_as_an_empty_manifest() {
        let d = tempfile::tempdir().unwrap();
        fs::write(
            d.path().join(MARKER),
            "This folder was written by convchain.\n",
        )
        .unwrap();
        fs::write(d.path().join("report.json"), "old").unwrap();
        assert_eq!(Manifest::read(d.path()), Manifest::default());
        let o = OutputDir::create(d.path(), &Producer::run(false)).unwrap();
        o.write("waveforms.csv", b"1").unwrap();
        o.finish().unwrap();
        assert!(d.path().join("report.json").exists());
    }

    #[test]
    fn a_study_refuses_another_study_unless_forced() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("s");
        let a = Producer::study(
            "sweep",
            serde_json::json!({"x": 1}),
            "study A".into(),
            false,
        );
        let b = Producer::study(
            "sweep",
            serde_json::json!({"x": 2}),
            "study B".into(),
            false,
        );
        let o = OutputDir::create(&p, &a).unwrap();
        o.write("sweep.csv", b"a").unwrap();
        o.write("sweep-a.png", b"a").unwrap();
        o.finish().unwrap();
        let e = OutputDir::check(&p, &b).unwrap_err();
        assert!(e.is_bad_input());
        assert!(
            e.to_string().contains("holds study A") && e.to_string().contains("study B"),
            "{e}"
        );
        assert!(OutputDir::check(&p, &Producer::run(false)).is_err());
        assert!(OutputDir::check(&p, &a).is_ok());
        let forced = Producer { force: true, ..b };
        let o = OutputDir::create(&p, &forced).unwrap();
        o.write("sweep.csv", b"b").unwrap();
        o.finish().unwrap();
        assert!(!p.join("sweep-a.png").exists());
        assert_eq!(Manifest::read(&p).study, forced.study);
    }
}
