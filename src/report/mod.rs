//! Report writers: JSON, CSV, text tables, plots (PNG and SVG), WAV listening files and generated demo audio,
//! and the output folder they go into.

pub mod csv;
pub mod demo_audio;
pub mod document;
pub mod figures;
pub mod json;
pub mod plot;
pub mod table;
pub mod wav;

use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};

use crate::error::{Error, Result};

/// Name of the marker file that says a folder is one of ours.
pub const MARKER: &str = ".convchain-output";

/// An output folder the tool may write into: it is new, empty, or was made by the tool (it holds the marker).
/// Every file goes in through a temporary file and a rename, so a failed run leaves no partial file.
pub struct OutputDir {
    path: PathBuf,
    created: bool,
}

impl OutputDir {
    /// Check `path` without creating anything (so bad input can be reported before a folder appears).
    pub fn check(path: &Path) -> Result<()> {
        if path.exists() {
            if !path.is_dir() {
                return Err(Error::BadInput(format!(
                    "--out {}: this is a file, not a folder; choose a folder",
                    path.display()
                )));
            }
            let ours = path.join(MARKER).exists();
            let empty = fs::read_dir(path)
                .map_err(|e| Error::Read {
                    path: path.to_path_buf(),
                    source: e,
                })?
                .next()
                .is_none();
            if !ours && !empty {
                return Err(Error::BadInput(format!(
                    "--out {}: this folder holds files convchain did not make; choose a new or empty folder \
                     (convchain never overwrites files it did not write)",
                    path.display()
                )));
            }
        }
        Ok(())
    }

    /// Create (or reuse) the folder; call when the run starts.
    pub fn create(path: &Path) -> Result<OutputDir> {
        Self::check(path)?;
        let created = !path.exists();
        fs::create_dir_all(path).map_err(|e| Error::Write {
            path: path.to_path_buf(),
            source: e,
        })?;
        let marker = path.join(MARKER);
        if !marker.exists() {
            fs::write(&marker, b"This folder was written by convchain.\n").map_err(|e| {
                Error::Write {
                    path: marker.clone(),
                    source: e,
                }
            })?;
        }
        Ok(OutputDir {
            path: path.to_path_buf(),
            created,
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The temporary path a file is written to before [`OutputDir::commit`].
    pub fn temp_path(&self, name: &str) -> PathBuf {
        self.path.join(format!(".{name}.tmp"))
    }

    /// Rename the temporary file into place.
    pub fn commit(&self, name: &str) -> Result<PathBuf> {
        let dst = self.path.join(name);
        fs::rename(self.temp_path(name), &dst).map_err(|e| Error::Write {
            path: dst.clone(),
            source: e,
        })?;
        Ok(dst)
    }

    /// Write a whole file atomically.
    pub fn write(&self, name: &str, bytes: &[u8]) -> Result<PathBuf> {
        let tmp = self.temp_path(name);
        let mut f = fs::File::create(&tmp).map_err(|e| Error::Write {
            path: tmp.clone(),
            source: e,
        })?;
        f.write_all(bytes)
            .and_then(|_| f.sync_all())
            .map_err(|e| Error::Write {
                path: tmp.clone(),
                source: e,
            })?;
        self.commit(name)
    }

    /// After a failure: remove our temporary files, and the folder itself if this run created it and it holds
    /// nothing else.
    pub fn abandon(self) {
        if let Ok(rd) = fs::read_dir(&self.path) {
            for e in rd.flatten() {
                let name = e.file_name().to_string_lossy().to_string();
                if name.starts_with('.') && name.ends_with(".tmp") {
                    let _ = fs::remove_file(e.path());
                }
            }
        }
        if self.created {
            let _ = fs::remove_file(self.path.join(MARKER));
            let _ = fs::remove_dir(&self.path);
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
        let o = OutputDir::create(&p).unwrap();
        o.write("a.txt", b"2").unwrap();
        assert_eq!(fs::read_to_string(p.join("a.txt")).unwrap(), "2");
        assert!(!o.temp_path("a.txt").exists());
    }

    #[test]
    fn abandoning_a_new_folder_leaves_nothing() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("run");
        let o = OutputDir::create(&p).unwrap();
        fs::write(o.temp_path("x.csv"), "partial").unwrap();
        o.abandon();
        assert!(!p.exists());
    }
}
