//! Dataset bytes as files: one file per dataset, `<data dir>/datasets/<id>.csv`, owner-only
//! (0600 in a 0700 folder). They live outside sled so that deleting a dataset can erase its
//! bytes: sled's log keeps removed values on disk until it reuses the segment.
//!
//! A file arrives crash-safely: written (or an upload's staged file moved) under a temporary
//! name `<id>.<random>.tmp` in the same folder, synced, renamed to its place, and the folder
//! synced. [`super::Store`] holds [`Files::lock`] while it places a file and stores its record,
//! and while it deletes a record and then its file, so a record never outlives its file and
//! two changes of one id never cross. What a crash leaves (temporary files, files without a
//! record) is removed by [`Files::tidy`] at open.

use std::fs::File;
use std::io::Write as _;
use std::os::unix::fs::{DirBuilderExt as _, OpenOptionsExt as _, PermissionsExt as _};
use std::path::{Path, PathBuf};
use std::sync::Mutex;

use super::StoreError;

/// The folder inside the store directory that holds the dataset files.
pub const DATASETS_DIR: &str = "datasets";

const FILE_SUFFIX: &str = ".csv";
const TEMP_SUFFIX: &str = ".tmp";

/// The dataset folder of one store (shared by its clones).
pub(super) struct Files {
    dir: PathBuf,
    /// Serialises placing a file with storing its record, and deleting a record with its file.
    pub lock: Mutex<()>,
    /// A temporary store's own directory, removed with the last handle.
    remove_on_drop: Option<PathBuf>,
}

/// A dataset's bytes synced under a temporary name in the dataset folder, not yet in place.
/// Removed on drop unless placed.
pub(super) struct Ready {
    path: Option<PathBuf>,
}

impl Drop for Ready {
    fn drop(&mut self) {
        if let Some(p) = self.path.take() {
            let _ = std::fs::remove_file(p);
        }
    }
}

fn io(what: &str, path: &Path, e: std::io::Error) -> StoreError {
    StoreError::Io(format!("{what} {}: {e}", path.display()))
}

/// Syncs a folder, so a rename or removal in it survives a crash.
fn sync_dir(dir: &Path) -> Result<(), StoreError> {
    File::open(dir).and_then(|d| d.sync_all()).map_err(|e| io("syncing the folder", dir, e))
}

/// Only plain names become file names (ids are `ds_` + hex; a store test may use others).
fn plain(id: &str) -> bool {
    !id.is_empty() && id.bytes().all(|b| b.is_ascii_alphanumeric() || b == b'_' || b == b'-')
}

impl Files {
    /// The dataset folder under `root`, created owner-only when missing. `temporary`: remove
    /// `root` with the last handle.
    pub fn open(root: &Path, temporary: bool) -> Result<Files, StoreError> {
        let dir = root.join(DATASETS_DIR);
        std::fs::DirBuilder::new().recursive(true).mode(0o700).create(&dir).map_err(|e| io("creating", &dir, e))?;
        std::fs::set_permissions(&dir, std::fs::Permissions::from_mode(0o700)).map_err(|e| io("securing", &dir, e))?;
        Ok(Files { dir, lock: Mutex::new(()), remove_on_drop: temporary.then(|| root.to_path_buf()) })
    }

    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Where the bytes of dataset `id` are kept.
    pub fn path(&self, id: &str) -> Result<PathBuf, StoreError> {
        if !plain(id) {
            return Err(StoreError::Corrupt(format!("dataset id {id:?} cannot name a file")));
        }
        Ok(self.dir.join(format!("{id}{FILE_SUFFIX}")))
    }

    fn temp_path(&self, id: &str) -> Result<PathBuf, StoreError> {
        self.path(id)?;
        Ok(self.dir.join(format!("{id}.{}{TEMP_SUFFIX}", uuid::Uuid::now_v7().simple())))
    }

    /// Writes a dataset's bytes with `fill` into a new temporary file and syncs it.
    pub fn write(&self, id: &str, fill: impl FnOnce(&mut File) -> std::io::Result<()>) -> Result<Ready, StoreError> {
        let path = self.temp_path(id)?;
        let mut file = std::fs::OpenOptions::new().write(true).create_new(true).mode(0o600).open(&path).map_err(|e| io("creating", &path, e))?;
        let ready = Ready { path: Some(path.clone()) };
        fill(&mut file).and_then(|()| file.flush()).and_then(|()| file.sync_all()).map_err(|e| io("writing", &path, e))?;
        Ok(ready)
    }

    /// Takes over a finished file elsewhere in the store directory (an upload's staged file):
    /// moved when it can be, copied otherwise; synced either way.
    pub fn adopt(&self, id: &str, from: &Path) -> Result<Ready, StoreError> {
        let path = self.temp_path(id)?;
        match std::fs::rename(from, &path) {
            Ok(()) => {
                let ready = Ready { path: Some(path.clone()) };
                std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o600)).map_err(|e| io("securing", &path, e))?;
                File::open(&path).and_then(|f| f.sync_all()).map_err(|e| io("syncing", &path, e))?;
                Ok(ready)
            }
            Err(_) => {
                let mut source = File::open(from).map_err(|e| io("opening", from, e))?;
                self.write(id, |f| std::io::copy(&mut source, f).map(|_| ()))
            }
        }
    }

    /// Renames a ready file to its place (replacing a file of the same id) and syncs the folder.
    pub fn place(&self, id: &str, mut ready: Ready) -> Result<(), StoreError> {
        let to = self.path(id)?;
        let from = ready.path.take().expect("a ready file is placed once");
        if let Err(e) = std::fs::rename(&from, &to) {
            let _ = std::fs::remove_file(&from);
            return Err(io("placing", &to, e));
        }
        sync_dir(&self.dir)
    }

    /// Opens the file of dataset `id`; a missing file is a named error.
    pub fn open_file(&self, id: &str) -> Result<File, StoreError> {
        let path = self.path(id)?;
        File::open(&path).map_err(|e| match e.kind() {
            std::io::ErrorKind::NotFound => StoreError::Corrupt(format!("the bytes of dataset {id} are missing: {} does not exist", path.display())),
            _ => io("opening", &path, e),
        })
    }

    /// Removes the file of dataset `id` (gone already is fine) and syncs the folder.
    pub fn remove(&self, id: &str) -> Result<(), StoreError> {
        let path = self.path(id)?;
        match std::fs::remove_file(&path) {
            Ok(()) => sync_dir(&self.dir),
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(()),
            Err(e) => Err(io("removing", &path, e)),
        }
    }

    /// Removes temporary files and the dataset files `keep` does not keep (by id); returns
    /// how many files were removed. For open, before any other handle exists.
    pub fn tidy(&self, keep: impl Fn(&str) -> Result<bool, StoreError>) -> Result<usize, StoreError> {
        let mut removed = 0;
        for entry in std::fs::read_dir(&self.dir).map_err(|e| io("listing", &self.dir, e))? {
            let entry = entry.map_err(|e| io("listing", &self.dir, e))?;
            let name = entry.file_name();
            let Some(name) = name.to_str() else { continue };
            let orphan = if name.ends_with(TEMP_SUFFIX) {
                true
            } else if let Some(id) = name.strip_suffix(FILE_SUFFIX) {
                !keep(id)?
            } else {
                false
            };
            if orphan {
                std::fs::remove_file(entry.path()).map_err(|e| io("removing", &entry.path(), e))?;
                removed += 1;
            }
        }
        if removed > 0 {
            sync_dir(&self.dir)?;
        }
        Ok(removed)
    }
}

impl Drop for Files {
    fn drop(&mut self) {
        if let Some(root) = self.remove_on_drop.take() {
            let _ = std::fs::remove_dir_all(root);
        }
    }
}
