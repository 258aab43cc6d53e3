//! The frame store: one file per decoded clip holding its frames as raw RGB
//! (8 bits per channel, row-major, no padding) after a fixed 64-byte header.
//! Readers memory-map the file, so any frame of any clip can be read without
//! decoding again and without loading a clip set into memory.
//!
//! Layout: `b"ACTFRAME"` magic, format version `u32`, width `u32`, height
//! `u32`, frame count `u32` (all little-endian), zero padding to 64 bytes,
//! then `frames * width * height * 3` bytes.

use std::fs;
use std::io::{self, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use super::atomic::AtomicFile;

const MAGIC: &[u8; 8] = b"ACTFRAME";
const FORMAT_VERSION: u32 = 1;
/// Size of the header that precedes the frames.
pub const HEADER_BYTES: usize = 64;

/// Errors reading or writing a frame store file.
#[derive(Debug, thiserror::Error)]
pub enum FrameStoreError {
    /// An I/O error on the named file.
    #[error("frame store {path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: io::Error,
    },
    /// The file is not a frame store or is damaged.
    #[error("frame store {path}: {reason}")]
    Corrupt {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        reason: String,
    },
    /// A frame of the wrong size was written.
    #[error("frame store {path}: frame has {got} bytes, expected {expected}")]
    FrameSize {
        /// The file.
        path: PathBuf,
        /// Bytes given.
        got: usize,
        /// Bytes expected.
        expected: usize,
    },
}

fn io_err(path: &Path) -> impl FnOnce(io::Error) -> FrameStoreError + '_ {
    move |source| FrameStoreError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// Streams frames into a new frame store file under a temporary name; the
/// file appears under its final name only on [`FrameWriter::finish`].
pub struct FrameWriter {
    file: AtomicFile,
    path: PathBuf,
    width: u32,
    height: u32,
    frames: u32,
}

impl FrameWriter {
    /// Starts a frame store for frames of `width` x `height` RGB pixels.
    pub fn create(path: &Path, width: u32, height: u32) -> Result<Self, FrameStoreError> {
        let mut file = AtomicFile::create(path).map_err(io_err(path))?;
        file.write_all(&header(width, height, 0))
            .map_err(io_err(path))?;
        Ok(Self {
            file,
            path: path.to_path_buf(),
            width,
            height,
            frames: 0,
        })
    }

    /// Bytes in one frame.
    pub fn frame_bytes(&self) -> usize {
        self.width as usize * self.height as usize * 3
    }

    /// Appends one frame (`width * height * 3` bytes of RGB).
    pub fn push(&mut self, rgb: &[u8]) -> Result<(), FrameStoreError> {
        if rgb.len() != self.frame_bytes() {
            return Err(FrameStoreError::FrameSize {
                path: self.path.clone(),
                got: rgb.len(),
                expected: self.frame_bytes(),
            });
        }
        self.file.write_all(rgb).map_err(io_err(&self.path))?;
        self.frames += 1;
        Ok(())
    }

    /// Frames written so far.
    pub fn len(&self) -> u32 {
        self.frames
    }

    /// Whether no frame has been written.
    pub fn is_empty(&self) -> bool {
        self.frames == 0
    }

    /// Writes the final header and renames the file into place.
    pub fn finish(mut self) -> Result<u32, FrameStoreError> {
        let path = self.path.clone();
        let head = header(self.width, self.height, self.frames);
        self.file.seek(SeekFrom::Start(0)).map_err(io_err(&path))?;
        self.file.write_all(&head).map_err(io_err(&path))?;
        let frames = self.frames;
        self.file.commit().map_err(io_err(&path))?;
        Ok(frames)
    }
}

fn header(width: u32, height: u32, frames: u32) -> [u8; HEADER_BYTES] {
    let mut h = [0u8; HEADER_BYTES];
    h[..8].copy_from_slice(MAGIC);
    h[8..12].copy_from_slice(&FORMAT_VERSION.to_le_bytes());
    h[12..16].copy_from_slice(&width.to_le_bytes());
    h[16..20].copy_from_slice(&height.to_le_bytes());
    h[20..24].copy_from_slice(&frames.to_le_bytes());
    h
}

/// A memory-mapped, read-only view of one clip's frames.
pub struct FrameReader {
    map: memmap2::Mmap,
    file: fs::File,
    path: PathBuf,
    width: u32,
    height: u32,
    frames: u32,
}

impl FrameReader {
    /// Opens and validates a frame store file.
    pub fn open(path: &Path) -> Result<Self, FrameStoreError> {
        let file = fs::File::open(path).map_err(io_err(path))?;
        // SAFETY: frame store files are only ever created under a temporary name
        // and renamed into place, never modified afterwards.
        let map = unsafe { memmap2::Mmap::map(&file) }.map_err(io_err(path))?;
        let corrupt = |reason: String| FrameStoreError::Corrupt {
            path: path.to_path_buf(),
            reason,
        };
        if map.len() < HEADER_BYTES || &map[..8] != MAGIC {
            return Err(corrupt("not a frame store file (bad magic)".into()));
        }
        let word = |i: usize| u32::from_le_bytes(map[i..i + 4].try_into().unwrap());
        let version = word(8);
        if version != FORMAT_VERSION {
            return Err(corrupt(format!(
                "format version {version}, this build reads {FORMAT_VERSION}"
            )));
        }
        let (width, height, frames) = (word(12), word(16), word(20));
        let expected = HEADER_BYTES + frames as usize * width as usize * height as usize * 3;
        if map.len() != expected {
            return Err(corrupt(format!(
                "file has {} bytes, header promises {expected}",
                map.len()
            )));
        }
        let reader = Self {
            map,
            file,
            path: path.to_path_buf(),
            width,
            height,
            frames,
        };
        // Reading the header faulted in the pages around it; a run that opens
        // many clips should not keep them all mapped.
        reader.release();
        Ok(reader)
    }

    /// Frame width in pixels.
    pub fn width(&self) -> u32 {
        self.width
    }
    /// Frame height in pixels.
    pub fn height(&self) -> u32 {
        self.height
    }
    /// Number of frames.
    pub fn len(&self) -> usize {
        self.frames as usize
    }
    /// Whether the clip has no frames.
    pub fn is_empty(&self) -> bool {
        self.frames == 0
    }
    /// The file this reader maps.
    pub fn path(&self) -> &Path {
        &self.path
    }
    /// Bytes in one frame.
    pub fn frame_bytes(&self) -> usize {
        self.width as usize * self.height as usize * 3
    }

    /// Drops this process's mappings of the pages read so far (`madvise`
    /// `MADV_DONTNEED`), so they stop counting towards the resident set
    /// size; later reads fault them in again from the page cache. The kernel
    /// maps pages around every faulting one (fault-around, 64 KiB by default),
    /// so random reads over many clips would otherwise grow the resident set
    /// towards the size of all frame files (measured by `bench/fit_memory.sh`).
    /// A no-op where `madvise` is not available.
    pub fn release(&self) {
        #[cfg(unix)]
        // SAFETY: the mapping is read-only and backed by a file that is never
        // modified after its atomic rename (see `open`); for such a mapping
        // MADV_DONTNEED only drops page-table entries, and the next access
        // reads the same bytes from the file again. No `&mut` to it exists.
        unsafe {
            let _ = self
                .map
                .unchecked_advise(memmap2::UncheckedAdvice::DontNeed);
        }
    }

    /// Copies frame `index` into `out` (`frame_bytes()` bytes) with a
    /// positioned read (`pread`) instead of through the mapping, so random
    /// access over many clips adds nothing to the resident set size: the
    /// bytes pass through the kernel's page cache, which is not the process's
    /// memory. Training samples frames this way. Panics when out of range.
    pub fn read_into(&self, index: usize, out: &mut [u8]) -> Result<(), FrameStoreError> {
        assert!(
            index < self.len() && out.len() == self.frame_bytes(),
            "frame {index} of {} ({} frames, {} bytes) into a {}-byte buffer",
            self.path.display(),
            self.len(),
            self.frame_bytes(),
            out.len()
        );
        let start = HEADER_BYTES + index * self.frame_bytes();
        #[cfg(unix)]
        {
            use std::os::unix::fs::FileExt as _;
            self.file
                .read_exact_at(out, start as u64)
                .map_err(io_err(&self.path))
        }
        #[cfg(not(unix))]
        {
            out.copy_from_slice(&self.map[start..start + out.len()]);
            Ok(())
        }
    }

    /// Frame `index` as RGB bytes; panics when out of range.
    pub fn frame(&self, index: usize) -> &[u8] {
        assert!(
            index < self.len(),
            "frame {index} out of range for {} ({} frames)",
            self.path.display(),
            self.len()
        );
        let n = self.frame_bytes();
        let start = HEADER_BYTES + index * n;
        &self.map[start..start + n]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn round_trip() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("c.frames");
        let mut w = FrameWriter::create(&path, 2, 3).unwrap();
        let a: Vec<u8> = (0..18).collect();
        let b: Vec<u8> = (100..118).collect();
        w.push(&a).unwrap();
        assert!(!path.exists(), "file must not appear before finish");
        w.push(&b).unwrap();
        assert!(w.push(&[0u8; 5]).is_err());
        assert_eq!(w.finish().unwrap(), 2);
        let r = FrameReader::open(&path).unwrap();
        assert_eq!((r.width(), r.height(), r.len()), (2, 3, 2));
        assert_eq!(r.frame(0), &a[..]);
        assert_eq!(r.frame(1), &b[..]);
        // Positioned reads give the same bytes as the mapping.
        let mut out = vec![0u8; 18];
        r.read_into(1, &mut out).unwrap();
        assert_eq!(out, b);
        r.read_into(0, &mut out).unwrap();
        assert_eq!(out, a);
    }

    #[test]
    fn truncated_file_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("c.frames");
        let mut w = FrameWriter::create(&path, 2, 2).unwrap();
        w.push(&[1u8; 12]).unwrap();
        w.finish().unwrap();
        let bytes = fs::read(&path).unwrap();
        fs::write(&path, &bytes[..bytes.len() - 1]).unwrap();
        let err = FrameReader::open(&path).err().unwrap().to_string();
        assert!(err.contains("header promises"), "{err}");
    }
}
