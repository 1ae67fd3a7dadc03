//! Atomic output: write to a temporary file in the target's folder, fsync, rename into place.
//!
//! A reader never sees a half-written output, and a failed or interrupted write leaves the
//! previous file (if any) untouched. The temporary file is named `.<name>.tmp-<pid>-<n>` in
//! the same folder (so the rename stays on one file system) and is removed on any error.

use std::fs::{File, OpenOptions};
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

use crate::IoError;

static COUNTER: AtomicU64 = AtomicU64::new(0);

/// The temporary sibling of `path` used while writing: `.<name>.tmp-<pid>-<n>`.
fn temp_path(path: &Path) -> PathBuf {
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_else(|| "out".into());
    let n = COUNTER.fetch_add(1, Ordering::Relaxed);
    let tmp = format!(".{name}.tmp-{}-{n}", std::process::id());
    match path.parent() {
        Some(dir) if !dir.as_os_str().is_empty() => dir.join(tmp),
        _ => PathBuf::from(tmp),
    }
}

/// Writes `path` atomically: `fill` writes the content into a buffered temporary file in the
/// same folder, which is then flushed, fsynced and renamed onto `path`.
///
/// On any error (from `fill`, flush, fsync or rename) the temporary file is removed and
/// `path` is left as it was.
pub fn write_atomic<F>(path: &Path, fill: F) -> Result<(), IoError>
where
    F: FnOnce(&mut dyn Write) -> std::io::Result<()>,
{
    let mut file = AtomicFile::create(path)?;
    fill(&mut file).map_err(|e| IoError::os(path, "cannot write", e))?;
    file.finish()
}

/// An output file being written atomically, for writers that cannot take one closure (several
/// outputs filled side by side): it writes into a buffered temporary file in the target's
/// folder; [`AtomicFile::finish`] flushes, fsyncs and renames it onto the target. Dropped
/// without `finish` (an error on the way), it removes the temporary file and leaves the
/// target as it was.
pub struct AtomicFile {
    path: PathBuf,
    tmp: PathBuf,
    w: Option<BufWriter<File>>,
}

impl AtomicFile {
    /// Creates the temporary file beside `path`.
    pub fn create(path: &Path) -> Result<AtomicFile, IoError> {
        let tmp = temp_path(path);
        let file = OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&tmp)
            .map_err(|e| IoError::os(path, "cannot create a temporary file beside it", e))?;
        Ok(AtomicFile { path: path.to_path_buf(), tmp, w: Some(BufWriter::with_capacity(1 << 20, file)) })
    }

    /// The target path.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Flushes, fsyncs and renames the temporary file onto the target.
    pub fn finish(mut self) -> Result<(), IoError> {
        let path = self.path.clone();
        let w = self.w.take().expect("finish is called once");
        let file = w.into_inner().map_err(|e| IoError::os(&path, "cannot write", e.into_error()))?;
        file.sync_all().map_err(|e| IoError::os(&path, "cannot sync", e))?;
        drop(file);
        std::fs::rename(&self.tmp, &path)
            .map_err(|e| IoError::os(&path, "cannot rename the temporary file into place", e))?;
        // Renamed: nothing left for `drop` to remove.
        self.tmp = PathBuf::new();
        // Make the rename itself durable where the platform allows it (best effort).
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            if let Ok(d) = File::open(dir) {
                let _ = d.sync_all();
            }
        }
        Ok(())
    }
}

impl Write for AtomicFile {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.w.as_mut().expect("not finished").write(buf)
    }

    fn write_all(&mut self, buf: &[u8]) -> std::io::Result<()> {
        self.w.as_mut().expect("not finished").write_all(buf)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.w.as_mut().expect("not finished").flush()
    }
}

impl Drop for AtomicFile {
    fn drop(&mut self) {
        if !self.tmp.as_os_str().is_empty() {
            drop(self.w.take());
            let _ = std::fs::remove_file(&self.tmp);
        }
    }
}

/// Writes `bytes` to `path` atomically (see [`write_atomic`]).
pub fn write_bytes_atomic(path: &Path, bytes: &[u8]) -> Result<(), IoError> {
    write_atomic(path, |w| w.write_all(bytes))
}

/// The canonical form of a path that may not exist yet: its folder canonicalised, plus its name.
fn canonical_maybe_new(p: &Path) -> Option<PathBuf> {
    if let Ok(c) = p.canonicalize() {
        return Some(c);
    }
    let name = p.file_name()?;
    let dir = match p.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.canonicalize().ok()?,
        _ => std::env::current_dir().ok()?.canonicalize().ok()?,
    };
    Some(dir.join(name))
}

/// Fails with [`IoError::OutputIsInput`] when `out` names the same file as one of `inputs`
/// (compared as canonical paths, so `./a.nii` and `a.nii`, or a symlink and its target, match).
pub fn ensure_not_input<P: AsRef<Path>>(out: &Path, inputs: &[P]) -> Result<(), IoError> {
    let Some(o) = canonical_maybe_new(out) else { return Ok(()) };
    for inp in inputs {
        if canonical_maybe_new(inp.as_ref()).is_some_and(|i| i == o) {
            return Err(IoError::OutputIsInput { path: out.to_path_buf() });
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn failed_write_leaves_nothing_and_keeps_old_file() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("a.bin");
        write_bytes_atomic(&p, b"old").unwrap();
        let r = write_atomic(&p, |w| {
            w.write_all(b"partial")?;
            Err(std::io::Error::other("boom"))
        });
        assert!(matches!(r, Err(IoError::Os { .. })));
        assert_eq!(std::fs::read(&p).unwrap(), b"old");
        let names: Vec<_> = std::fs::read_dir(dir.path()).unwrap().map(|e| e.unwrap().file_name()).collect();
        assert_eq!(names, vec![std::ffi::OsString::from("a.bin")], "temporary file left behind");
    }

    #[test]
    fn output_equal_to_input_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let a = dir.path().join("a.nii");
        std::fs::write(&a, b"x").unwrap();
        let dotted = dir.path().join(".").join("a.nii");
        assert!(matches!(ensure_not_input(&dotted, &[&a]), Err(IoError::OutputIsInput { .. })));
        assert!(ensure_not_input(&dir.path().join("b.nii"), &[&a]).is_ok());
    }
}
