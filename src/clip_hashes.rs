//! Content hashes of clip files, remembered in the run folder between runs.
//!
//! Every stage's key covers the sha256 of every clip and sidecar, so every
//! `run`, every cluster part and every merge needs all of them. Reading every
//! clip again each time costs as much I/O as a good part of decoding, and on a
//! cluster N parts and the merges would each read the whole clip set from the
//! shared filesystem. So the hashes are kept in `RUN/clip-hashes.json` beside
//! each file's size, modification time, change time and inode; a file whose
//! metadata still match is not read again (the quick check build tools and
//! version control systems make: common practice, no source). The change time
//! cannot be set back by a program, so rewriting a clip and restoring its
//! modification time is still noticed.
//!
//! A file is only remembered when its metadata did not change while it was
//! read and it was last changed at least [`SETTLED_S`] seconds before: a file
//! written again within the same clock tick could otherwise keep matching
//! metadata with new content. Such a file is simply read again next time.

use std::collections::BTreeMap;
use std::io;
use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{SystemTime, UNIX_EPOCH};

use serde::{Deserialize, Serialize};

use crate::store::{read_json, write_json_atomic};
use crate::util;

/// The file in the run folder that holds the remembered hashes.
pub const FILE_NAME: &str = "clip-hashes.json";

/// Seconds a file must have been left alone before its hash is remembered.
pub const SETTLED_S: f64 = 2.0;

/// What identifies one version of a file without reading it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
struct Stamp {
    bytes: u64,
    /// Modification time, seconds and nanoseconds since the Unix epoch.
    modified: (i64, i64),
    /// Status change time (set by the filesystem on every write or rename).
    changed: (i64, i64),
    inode: u64,
}

impl Stamp {
    fn of(path: &Path) -> io::Result<Stamp> {
        let m = std::fs::metadata(path)?;
        Ok(Stamp {
            bytes: m.size(),
            modified: (m.mtime(), m.mtime_nsec()),
            changed: (m.ctime(), m.ctime_nsec()),
            inode: m.ino(),
        })
    }

    /// Seconds since the file's last modification or status change.
    fn age_s(&self, now: SystemTime) -> f64 {
        let now = now
            .duration_since(UNIX_EPOCH)
            .map_or(0.0, |d| d.as_secs_f64());
        let latest = self.modified.max(self.changed);
        now - (latest.0 as f64 + latest.1 as f64 * 1e-9)
    }
}

#[derive(Debug, Clone, Serialize, Deserialize)]
struct Remembered {
    stamp: Stamp,
    sha256: String,
}

#[derive(Debug, Default, Serialize, Deserialize)]
struct HashFile {
    /// Absolute or spec-relative clip path -> its hash and stamp.
    files: BTreeMap<PathBuf, Remembered>,
}

/// The remembered hashes of one run folder, and those found in this process.
#[derive(Debug)]
pub struct ClipHashes {
    path: PathBuf,
    known: BTreeMap<PathBuf, Remembered>,
    /// Every file asked about in this process, with its current hash.
    used: Mutex<BTreeMap<PathBuf, Remembered>>,
    /// Files that had to be read.
    read: AtomicU64,
}

impl ClipHashes {
    /// Loads the hashes remembered in `run_dir`; a missing or unreadable file
    /// means nothing is remembered (every clip is read).
    pub fn open(run_dir: &Path) -> ClipHashes {
        let path = run_dir.join(FILE_NAME);
        let known = read_json::<HashFile>(&path)
            .map(|f| f.files)
            .unwrap_or_default();
        ClipHashes {
            path,
            known,
            used: Mutex::new(BTreeMap::new()),
            read: AtomicU64::new(0),
        }
    }

    /// The sha256 of the local file `path`: the remembered one when the
    /// file's metadata still match, otherwise read and hashed.
    pub fn sha256(&self, path: &Path) -> io::Result<String> {
        self.sha256_at(path, SystemTime::now)
    }

    /// [`Self::sha256`] with the clock that decides whether a file is settled.
    fn sha256_at(&self, path: &Path, now: impl Fn() -> SystemTime) -> io::Result<String> {
        let before = Stamp::of(path)?;
        if let Some(r) = self.known.get(path).filter(|r| r.stamp == before) {
            self.used
                .lock()
                .expect("hash table lock")
                .insert(path.to_path_buf(), r.clone());
            return Ok(r.sha256.clone());
        }
        let sha256 = util::sha256_file(path)?;
        self.read.fetch_add(1, Ordering::Relaxed);
        let after = Stamp::of(path)?;
        if after == before && after.age_s(now()) >= SETTLED_S {
            self.used.lock().expect("hash table lock").insert(
                path.to_path_buf(),
                Remembered {
                    stamp: after,
                    sha256: sha256.clone(),
                },
            );
        }
        Ok(sha256)
    }

    /// How many files were read (not found remembered) so far.
    pub fn files_read(&self) -> u64 {
        self.read.load(Ordering::Relaxed)
    }

    /// Writes the hashes of the files asked about in this process (atomically),
    /// when any differ from those remembered; files no longer asked about are
    /// forgotten.
    pub fn save(&self) -> io::Result<()> {
        let used = self.used.lock().expect("hash table lock");
        let same = used.len() == self.known.len()
            && used
                .iter()
                .all(|(p, r)| self.known.get(p).is_some_and(|k| k.stamp == r.stamp));
        if same {
            return Ok(());
        }
        write_json_atomic(
            &self.path,
            &HashFile {
                files: used.clone(),
            },
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_remembered_hash_is_used_until_the_file_changes() {
        let dir = tempfile::tempdir().unwrap();
        let clip = dir.path().join("a.mp4");
        std::fs::write(&clip, b"first").unwrap();
        // sha256("first"), from Python: hashlib.sha256(b"first").hexdigest()
        let first = "a7937b64b8caa58f03721bb6bacf5c78cb235febe0e70b1b84cd99541461a08e";
        let run = dir.path().join("run");

        // Just written: hashed but not remembered (the change time is now).
        let hashes = ClipHashes::open(&run);
        assert_eq!(hashes.sha256(&clip).unwrap(), first);
        hashes.save().unwrap();
        assert!(!run.join(FILE_NAME).exists());

        // Remembered (with a made-up hash, to tell the two paths apart).
        let stamp = Stamp::of(&clip).unwrap();
        let mut file = HashFile::default();
        file.files.insert(
            clip.clone(),
            Remembered {
                stamp,
                sha256: "remembered".into(),
            },
        );
        write_json_atomic(&run.join(FILE_NAME), &file).unwrap();
        let hashes = ClipHashes::open(&run);
        assert_eq!(hashes.sha256(&clip).unwrap(), "remembered");
        assert_eq!(hashes.files_read(), 0);

        // Rewritten with the same size and the old modification time restored:
        // the change time differs, so the file is read again.
        let modified = std::fs::metadata(&clip).unwrap().modified().unwrap();
        std::thread::sleep(std::time::Duration::from_millis(20));
        std::fs::write(&clip, b"again").unwrap();
        std::fs::File::options()
            .write(true)
            .open(&clip)
            .unwrap()
            .set_modified(modified)
            .unwrap();
        let hashes = ClipHashes::open(&run);
        // sha256("again"), from Python: hashlib.sha256(b"again").hexdigest()
        assert_eq!(
            hashes.sha256(&clip).unwrap(),
            "b4c9e14061c2fd453b36700e3b0da008db2189c711ac629f0f583089164e267d"
        );
        assert_eq!(hashes.files_read(), 1);
    }

    #[test]
    fn a_settled_file_is_remembered_and_a_vanished_one_forgotten() {
        let dir = tempfile::tempdir().unwrap();
        let run = dir.path().join("run");
        let a = dir.path().join("a.mp4");
        let b = dir.path().join("b.mp4");
        std::fs::write(&a, b"first").unwrap();
        std::fs::write(&b, b"first").unwrap();
        // A clock a minute ahead: both files look settled.
        let later = || SystemTime::now() + std::time::Duration::from_secs(60);
        let hashes = ClipHashes::open(&run);
        hashes.sha256_at(&a, later).unwrap();
        hashes.sha256_at(&b, later).unwrap();
        assert_eq!(hashes.files_read(), 2);
        hashes.save().unwrap();

        let hashes = ClipHashes::open(&run);
        assert_eq!(
            hashes.sha256(&a).unwrap(),
            "a7937b64b8caa58f03721bb6bacf5c78cb235febe0e70b1b84cd99541461a08e"
        );
        assert_eq!(hashes.files_read(), 0, "a is remembered");
        hashes.save().unwrap();
        let saved: HashFile = read_json(&run.join(FILE_NAME)).unwrap();
        assert_eq!(saved.files.keys().collect::<Vec<_>>(), [&a], "b forgotten");
    }
}
