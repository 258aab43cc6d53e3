//! Atomic file writes: every file a stage produces is written under a temporary
//! name in the same folder and renamed into place, so a reader never sees a
//! half-written file under its final name.

use std::fs;
use std::io::{self, Write};
use std::path::{Path, PathBuf};

/// The temporary name used while `path` is being written.
pub fn temp_path(path: &Path) -> PathBuf {
    let mut name = path
        .file_name()
        .map(|n| n.to_os_string())
        .unwrap_or_default();
    name.push(format!(".{}.tmp", std::process::id()));
    path.with_file_name(name)
}

/// Writes `bytes` to `path` atomically (temporary file, fsync, rename).
pub fn write_atomic(path: &Path, bytes: &[u8]) -> io::Result<()> {
    if let Some(parent) = path.parent() {
        fs::create_dir_all(parent)?;
    }
    let tmp = temp_path(path);
    let result = (|| {
        let mut file = fs::File::create(&tmp)?;
        file.write_all(bytes)?;
        file.sync_all()?;
        fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    result
}

/// A file being written under a temporary name; `commit` renames it into place,
/// dropping it without `commit` removes the temporary file.
pub struct AtomicFile {
    file: Option<io::BufWriter<fs::File>>,
    tmp: PathBuf,
    path: PathBuf,
}

impl AtomicFile {
    /// Creates the temporary file for `path` (and its parent folders).
    pub fn create(path: &Path) -> io::Result<Self> {
        if let Some(parent) = path.parent() {
            fs::create_dir_all(parent)?;
        }
        let tmp = temp_path(path);
        let file = fs::File::create(&tmp)?;
        Ok(Self {
            file: Some(io::BufWriter::with_capacity(1 << 20, file)),
            tmp,
            path: path.to_path_buf(),
        })
    }

    /// The underlying buffered writer.
    pub fn writer(&mut self) -> &mut io::BufWriter<fs::File> {
        self.file.as_mut().expect("file is open until commit")
    }

    /// Flushes, syncs and renames the file to its final name.
    pub fn commit(mut self) -> io::Result<()> {
        let writer = self.file.take().expect("file is open until commit");
        let file = writer.into_inner().map_err(|e| e.into_error())?;
        file.sync_all()?;
        drop(file);
        fs::rename(&self.tmp, &self.path)
    }
}

impl Write for AtomicFile {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        self.writer().write(buf)
    }
    fn flush(&mut self) -> io::Result<()> {
        self.writer().flush()
    }
}

impl io::Seek for AtomicFile {
    fn seek(&mut self, pos: io::SeekFrom) -> io::Result<u64> {
        self.writer().seek(pos)
    }
}

impl Drop for AtomicFile {
    fn drop(&mut self) {
        if self.file.take().is_some() {
            let _ = fs::remove_file(&self.tmp);
        }
    }
}

/// Writes `value` as pretty JSON to `path` atomically.
pub fn write_json_atomic<T: serde::Serialize>(path: &Path, value: &T) -> io::Result<()> {
    let mut bytes = serde_json::to_vec_pretty(value).map_err(io::Error::other)?;
    bytes.push(b'\n');
    write_atomic(path, &bytes)
}

/// Reads JSON from `path`.
pub fn read_json<T: serde::de::DeserializeOwned>(path: &Path) -> io::Result<T> {
    let bytes = fs::read(path)?;
    serde_json::from_slice(&bytes).map_err(|e| io::Error::new(io::ErrorKind::InvalidData, e))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dropped_atomic_file_leaves_nothing() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.bin");
        {
            let mut f = AtomicFile::create(&path).unwrap();
            f.write_all(b"half").unwrap();
        }
        assert!(!path.exists());
        assert_eq!(fs::read_dir(dir.path()).unwrap().count(), 0);
    }

    #[test]
    fn committed_atomic_file_appears() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("sub/a.bin");
        let mut f = AtomicFile::create(&path).unwrap();
        f.write_all(b"whole").unwrap();
        f.commit().unwrap();
        assert_eq!(fs::read(&path).unwrap(), b"whole");
    }
}
