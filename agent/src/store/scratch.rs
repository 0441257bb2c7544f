//! For unit tests: a scratch folder for a database, unique in the process
//! and removed when dropped. (The end-to-end tests have their own, in
//! tests/util.rs.)

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU32, Ordering};

/// A folder under the system's temporary folder, removed when dropped.
pub struct ScratchDir(PathBuf);

impl ScratchDir {
    /// A new, empty folder named after `label`, this process and a counter.
    pub fn new(label: &str) -> Self {
        static NEXT: AtomicU32 = AtomicU32::new(0);
        let dir = std::env::temp_dir().join(format!(
            "leaktally-{label}-{}-{}",
            std::process::id(),
            NEXT.fetch_add(1, Ordering::Relaxed)
        ));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).expect("creating a scratch folder");
        Self(dir)
    }

    pub fn path(&self) -> &Path {
        &self.0
    }

    /// `leaktally.db` in the folder.
    pub fn db(&self) -> PathBuf {
        self.0.join("leaktally.db")
    }
}

impl Drop for ScratchDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}
