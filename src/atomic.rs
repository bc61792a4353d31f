//! Atomic file output: write to a temporary name beside the target, then rename, so a crash or
//! an error never leaves a half-written file that looks whole, and an existing file of that name
//! stays intact until the new one is complete.

use std::io::Write;
use std::path::{Path, PathBuf};

/// Write `bytes` to `path` atomically (temp file in the same directory + rename).
pub fn write_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let tmp = temp_name(path);
    let result = (|| {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

/// The temporary sibling of `path` used while it is being written.
pub fn temp_name(path: &Path) -> PathBuf {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    path.with_file_name(format!(".{name}.part-{}", std::process::id()))
}
