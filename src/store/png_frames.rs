//! The PNG frame store: one file per clip holding each decoded frame as PNG
//! bytes, written by the label stage (a map stage, partitioned on a cluster)
//! so that the shard stage, one job over the whole run, only copies bytes
//! into its `image` column instead of encoding every frame itself.
//!
//! Layout (all integers little-endian): `b"ACTPNGFR"` magic, format version
//! `u32`, frame count `u32`, byte offset of the index `u64`, zero padding to
//! 32 bytes; then the PNG files one after another; then the index, `count + 1`
//! `u64` offsets (frame `i` is bytes `index[i]..index[i + 1]` of the file).
//! Frames are encoded a chunk at a time and streamed out, so memory does not
//! grow with the clip's length; the file is written under a temporary name,
//! synced and renamed into place.

use std::fs;
use std::io::{self, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use rayon::prelude::*;

use super::atomic::AtomicFile;
use super::frames::{FrameReader, FrameStoreError};

const MAGIC: &[u8; 8] = b"ACTPNGFR";
const FORMAT_VERSION: u32 = 1;
const HEADER_BYTES: u64 = 32;
/// Frames encoded in parallel before they are written out.
const CHUNK_FRAMES: usize = 64;

/// Errors reading or writing a PNG frame store.
#[derive(Debug, thiserror::Error)]
pub enum PngStoreError {
    /// An I/O error on the named file.
    #[error("PNG frame store {path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: io::Error,
    },
    /// The file is not a PNG frame store or is damaged.
    #[error("PNG frame store {path}: {reason}")]
    Corrupt {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        reason: String,
    },
    /// Reading the source frames failed.
    #[error(transparent)]
    Frames(#[from] FrameStoreError),
    /// A frame could not be encoded.
    #[error("{path}: encoding frame {frame} as PNG: {message}")]
    Encode {
        /// The source frame store.
        path: PathBuf,
        /// Frame index.
        frame: usize,
        /// The encoder's message.
        message: String,
    },
}

fn io_err(path: &Path) -> impl FnOnce(io::Error) -> PngStoreError + '_ {
    move |source| PngStoreError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// Encodes every frame of `frames` as PNG (the encoder of
/// [`crate::export::encode_png`]) into a new PNG frame store at `path`, on
/// the current rayon pool; returns the number of frames.
pub fn write_png_frames(frames: &FrameReader, path: &Path) -> Result<usize, PngStoreError> {
    let mut file = AtomicFile::create(path).map_err(io_err(path))?;
    file.write_all(&[0u8; HEADER_BYTES as usize])
        .map_err(io_err(path))?;
    let (width, height) = (frames.width(), frames.height());
    let mut index = Vec::with_capacity(frames.len() + 1);
    let mut at = HEADER_BYTES;
    index.push(at);
    for start in (0..frames.len()).step_by(CHUNK_FRAMES) {
        let end = (start + CHUNK_FRAMES).min(frames.len());
        let pngs: Vec<Vec<u8>> = (start..end)
            .into_par_iter()
            .map_init(Vec::new, |rgb, i| {
                rgb.resize(frames.frame_bytes(), 0);
                frames.read_into(i, rgb)?;
                crate::export::encode_png(rgb, width, height).map_err(|e| PngStoreError::Encode {
                    path: frames.path().to_path_buf(),
                    frame: i,
                    message: e.to_string(),
                })
            })
            .collect::<Result<_, _>>()?;
        for png in &pngs {
            file.write_all(png).map_err(io_err(path))?;
            at += png.len() as u64;
            index.push(at);
        }
    }
    frames.release();
    for offset in &index {
        file.write_all(&offset.to_le_bytes())
            .map_err(io_err(path))?;
    }
    let mut head = [0u8; HEADER_BYTES as usize];
    head[..8].copy_from_slice(MAGIC);
    head[8..12].copy_from_slice(&FORMAT_VERSION.to_le_bytes());
    head[12..16].copy_from_slice(&(frames.len() as u32).to_le_bytes());
    head[16..24].copy_from_slice(&at.to_le_bytes());
    file.writer()
        .seek(SeekFrom::Start(0))
        .map_err(io_err(path))?;
    file.write_all(&head).map_err(io_err(path))?;
    file.commit().map_err(io_err(path))?;
    Ok(frames.len())
}

/// Reads frames' PNG bytes from a PNG frame store with positioned reads.
#[derive(Debug)]
pub struct PngFrameReader {
    file: fs::File,
    path: PathBuf,
    index: Vec<u64>,
}

impl PngFrameReader {
    /// Opens a PNG frame store and checks its header and index against the
    /// file's size.
    pub fn open(path: &Path) -> Result<Self, PngStoreError> {
        let mut file = fs::File::open(path).map_err(io_err(path))?;
        let corrupt = |reason: String| PngStoreError::Corrupt {
            path: path.to_path_buf(),
            reason,
        };
        let size = file.metadata().map_err(io_err(path))?.len();
        let mut head = [0u8; HEADER_BYTES as usize];
        if size < HEADER_BYTES {
            return Err(corrupt("shorter than its header".into()));
        }
        io::Read::read_exact(&mut file, &mut head).map_err(io_err(path))?;
        if &head[..8] != MAGIC {
            return Err(corrupt("not a PNG frame store (bad magic)".into()));
        }
        let version = u32::from_le_bytes(head[8..12].try_into().unwrap());
        if version != FORMAT_VERSION {
            return Err(corrupt(format!(
                "format version {version}, this build reads {FORMAT_VERSION}"
            )));
        }
        let count = u32::from_le_bytes(head[12..16].try_into().unwrap()) as u64;
        let index_at = u64::from_le_bytes(head[16..24].try_into().unwrap());
        if index_at < HEADER_BYTES || index_at + (count + 1) * 8 != size {
            return Err(corrupt(format!(
                "file has {size} bytes, header promises {count} frames with the index at {index_at}"
            )));
        }
        let mut raw = vec![0u8; (count as usize + 1) * 8];
        read_exact_at(&file, &mut raw, index_at).map_err(io_err(path))?;
        let index: Vec<u64> = raw
            .chunks_exact(8)
            .map(|b| u64::from_le_bytes(b.try_into().unwrap()))
            .collect();
        let ordered = index.windows(2).all(|w| w[0] <= w[1]);
        if index[0] != HEADER_BYTES || index[count as usize] != index_at || !ordered {
            return Err(corrupt("the frame index does not fit the file".into()));
        }
        Ok(Self {
            file,
            path: path.to_path_buf(),
            index,
        })
    }

    /// Number of frames.
    pub fn len(&self) -> usize {
        self.index.len() - 1
    }

    /// The file this reader reads.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Whether the store has no frames.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Bytes of frame `i`'s PNG.
    pub fn png_len(&self, i: usize) -> usize {
        (self.index[i + 1] - self.index[i]) as usize
    }

    /// Reads frame `i`'s PNG bytes into `out` (`png_len(i)` bytes long).
    pub fn read_into(&self, i: usize, out: &mut [u8]) -> Result<(), PngStoreError> {
        if i >= self.len() || out.len() != self.png_len(i) {
            return Err(PngStoreError::Corrupt {
                path: self.path.clone(),
                reason: format!("frame {i} of {} asked for {} bytes", self.len(), out.len()),
            });
        }
        read_exact_at(&self.file, out, self.index[i]).map_err(io_err(&self.path))
    }
}

#[cfg(unix)]
fn read_exact_at(file: &fs::File, buf: &mut [u8], offset: u64) -> io::Result<()> {
    std::os::unix::fs::FileExt::read_exact_at(file, buf, offset)
}

#[cfg(not(unix))]
fn read_exact_at(file: &fs::File, buf: &mut [u8], offset: u64) -> io::Result<()> {
    let mut f = file.try_clone()?;
    f.seek(SeekFrom::Start(offset))?;
    io::Read::read_exact(&mut f, buf)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::FrameWriter;

    fn frames(dir: &Path, n: usize) -> FrameReader {
        let path = dir.join("c.frames");
        let mut w = FrameWriter::create(&path, 5, 3).unwrap();
        for k in 0..n {
            let rgb: Vec<u8> = (0..45).map(|i| (i * 7 + k * 31) as u8).collect();
            w.push(&rgb).unwrap();
        }
        w.finish().unwrap();
        FrameReader::open(&path).unwrap()
    }

    #[test]
    fn every_frame_reads_back_as_the_encoder_wrote_it() {
        let dir = tempfile::tempdir().unwrap();
        // More frames than one chunk, so the chunks join up.
        let n = CHUNK_FRAMES + 3;
        let src = frames(dir.path(), n);
        let path = dir.path().join("c.png-frames");
        assert_eq!(write_png_frames(&src, &path).unwrap(), n);
        let r = PngFrameReader::open(&path).unwrap();
        assert_eq!(r.len(), n);
        let mut rgb = vec![0u8; 45];
        for i in [0, 1, CHUNK_FRAMES, n - 1] {
            src.read_into(i, &mut rgb).unwrap();
            let mut png = vec![0u8; r.png_len(i)];
            r.read_into(i, &mut png).unwrap();
            assert_eq!(png, crate::export::encode_png(&rgb, 5, 3).unwrap());
        }
        assert!(r.read_into(n, &mut []).is_err());
    }

    #[test]
    fn a_truncated_store_is_refused_with_its_path() {
        let dir = tempfile::tempdir().unwrap();
        let src = frames(dir.path(), 4);
        let path = dir.path().join("c.png-frames");
        write_png_frames(&src, &path).unwrap();
        let bytes = fs::read(&path).unwrap();
        fs::write(&path, &bytes[..bytes.len() - 1]).unwrap();
        let err = PngFrameReader::open(&path).unwrap_err().to_string();
        assert!(
            err.contains("c.png-frames") && err.contains("index"),
            "{err}"
        );
        fs::write(&path, b"not a store at all, but long enough").unwrap();
        let err = PngFrameReader::open(&path).unwrap_err().to_string();
        assert!(err.contains("bad magic"), "{err}");
    }
}
