//! Writing the shards: plan the row order (clip order, or a seeded shuffle
//! across all rows); on the worker pool, build one Arrow record batch per row
//! group (frames read with positioned reads and PNG-encoded in parallel) and
//! encode and compress its columns with parquet's column writers, a few row
//! groups at a time; on this thread, splice the finished column chunks into a
//! temporary file in row-group order while hashing the bytes, and close the
//! shard once it reaches the target size. The bytes are the same as
//! parquet's `ArrowWriter` writes. A finished shard replaces the file under
//! its final name only when the bytes differ.

use std::collections::BTreeMap;
use std::fs;
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::builder::{Float32Builder, ListBuilder};
use arrow_array::{
    ArrayRef, BinaryArray, BooleanArray, Float32Array, Float64Array, RecordBatch, StringArray,
    UInt16Array, UInt32Array,
};
use arrow_buffer::{Buffer, OffsetBuffer};
use parquet::arrow::ArrowWriter;
use parquet::arrow::arrow_writer::{ArrowColumnChunk, ArrowRowGroupWriterFactory, compute_leaves};
use parquet::basic::{Compression, ZstdLevel};
use parquet::file::properties::{EnabledStatistics, WriterProperties};
use parquet::file::writer::SerializedFileWriter;
use parquet::schema::types::ColumnPath;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use super::schema::{ColumnInfo, columns, schema};
use super::{ImageEncoding, ShardError, ShardOptions};
use crate::label::output::{CALIBRATION_FILE, CODES_FILE, decoded_clips, png_frames_path};
use crate::label::{CalibrationFigures, ClipLabels, Standardisation};
use crate::model::Rng;
use crate::store::manifest::MANIFEST_FILE;
use crate::store::png_frames::PngFrameReader;
use crate::store::{ClipRecord, FrameReader};

/// One shard file as the manifest records it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShardFile {
    /// File name inside `RUN/shard/`.
    pub file: String,
    /// Rows.
    pub rows: u64,
    /// Row groups.
    pub row_groups: u64,
    /// Size in bytes.
    pub bytes: u64,
    /// sha256 of the file, lowercase hex.
    pub sha256: String,
}

/// Image layout of the `image` column.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ImageInfo {
    /// `png` or `raw`.
    pub encoding: ImageEncoding,
    /// Width in pixels.
    pub width: u32,
    /// Height in pixels.
    pub height: u32,
    /// Channels (RGB).
    pub channels: u32,
}

/// Normalisation statistics a trainer may want.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Normalisation {
    /// Per-dimension mean and std of the recorded actions the model was fitted with.
    pub actions: Option<Standardisation>,
}

/// Confidence figures over all rows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct ConfidenceFigures {
    /// Rows with a confidence.
    pub rows: u64,
    /// Mean confidence over those rows (as float32 values averaged in float64).
    pub mean: f64,
}

/// The stage-specific part of `RUN/shard/manifest.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShardSummary {
    /// The columns.
    pub schema: Vec<ColumnInfo>,
    /// Rows in all shards.
    pub rows: u64,
    /// The shards in order.
    pub shards: Vec<ShardFile>,
    /// Rows per clip set.
    pub rows_per_set: BTreeMap<String, u64>,
    /// Clips.
    pub clips: u64,
    /// Action dimension names (order of the list columns).
    pub action_dims: Vec<String>,
    /// Frames per second of the decode grid.
    pub fps: f64,
    /// Image layout.
    pub image: ImageInfo,
    /// Normalisation statistics.
    pub normalisation: Normalisation,
    /// Confidence over all rows.
    pub confidence: ConfidenceFigures,
    /// The label stage's calibration figures.
    pub calibration: Option<CalibrationFigures>,
    /// Where the codes table is, relative to the run folder.
    pub codes_table: String,
    /// Where the calibration tables are, relative to the run folder.
    pub calibration_table: String,
    /// Compression, e.g. `zstd(3)`.
    pub compression: String,
    /// Rows per row group.
    pub row_group_rows: u32,
    /// Target shard size in megabytes.
    pub target_size_mb: f64,
    /// Whether rows were shuffled across shards, and with which seed.
    pub shuffle_seed: Option<u64>,
    /// Shards left untouched because their bytes were unchanged.
    pub unchanged: u64,
}

/// One shard-writing job.
pub struct ShardJob<'a> {
    /// The run folder (reads `decode/` and `label/`).
    pub run_dir: &'a Path,
    /// Output folder (`RUN/shard/`).
    pub shard_dir: &'a Path,
    /// Settings.
    pub opts: &'a ShardOptions,
    /// Spec seed (for the shuffle).
    pub seed: u64,
    /// Worker threads for image encoding.
    pub threads: usize,
}

struct Clip {
    rec: ClipRecord,
    labels: ClipLabels,
    images: ClipImages,
}

/// Where a clip's `image` values come from: the decode stage's raw frames, or
/// the PNG frames the label stage encoded from them.
enum ClipImages {
    Raw(FrameReader),
    Png(PngFrameReader),
}

fn io_at(path: &Path) -> impl FnOnce(io::Error) -> ShardError + '_ {
    move |source| ShardError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// The name of shard `i`.
pub fn shard_name(i: usize) -> String {
    format!("shard-{i:05}.parquet")
}

/// The writer properties of every shard.
pub fn writer_properties(opts: &ShardOptions) -> WriterProperties {
    let level = ZstdLevel::try_new(opts.zstd_level).unwrap_or_default();
    let image = ColumnPath::from("image");
    WriterProperties::builder()
        .set_compression(Compression::ZSTD(level))
        .set_max_row_group_row_count(Some(opts.row_group_rows as usize))
        // PNG bytes repeat rarely and their min/max say nothing.
        .set_column_dictionary_enabled(image.clone(), false)
        .set_column_statistics_enabled(image, EnabledStatistics::None)
        .build()
}

/// Writes the shards of the run.
pub fn write_shards(job: &ShardJob<'_>) -> Result<ShardSummary, ShardError> {
    let label_dir = job.run_dir.join("label");
    let decode_dir = job.run_dir.join("decode");
    let records = decoded_clips(job.run_dir).map_err(io_at(&decode_dir))?;
    let cal_path = label_dir.join(CALIBRATION_FILE);
    let calibration: Option<CalibrationFigures> = crate::store::read_json(&cal_path).ok();
    let mut remapped = offset_corrected_actions(job.run_dir)?;
    let mut clips = Vec::with_capacity(records.len());
    for mut rec in records {
        if let Some(a) = remapped.remove(&(rec.set.clone(), rec.id.clone())) {
            rec.actions = Some(a);
        }
        let lpath = ClipLabels::path(&label_dir, &rec.set, &rec.id);
        let bad = |reason: String| ShardError::Labels {
            set: rec.set.clone(),
            id: rec.id.clone(),
            path: lpath.clone(),
            reason,
        };
        let labels =
            ClipLabels::read(&label_dir, &rec.set, &rec.id).map_err(|e| bad(e.to_string()))?;
        let t = rec.frames.saturating_sub(1) as usize;
        if labels.frames != rec.frames || labels.action_est.len() != t || labels.code.len() != t {
            return Err(bad(format!(
                "labels for {} frames ({} transitions), decoded clip has {} frames",
                labels.frames,
                labels.action_est.len(),
                rec.frames
            )));
        }
        let images =
            match job.opts.image {
                ImageEncoding::Raw => ClipImages::Raw(FrameReader::open(
                    &ClipRecord::frames_path(&decode_dir, &rec.set, &rec.id),
                )?),
                ImageEncoding::Png => {
                    let path = png_frames_path(&label_dir, &rec.set, &rec.id);
                    if !path.exists() {
                        return Err(ShardError::PngFramesMissing { path });
                    }
                    ClipImages::Png(PngFrameReader::open(&path)?)
                }
            };
        clips.push(Clip {
            rec,
            labels,
            images,
        });
    }
    let (width, height, fps) = clips
        .first()
        .map_or((0, 0, 0.0), |c| (c.rec.width, c.rec.height, c.rec.fps));
    let action_dims = calibration
        .as_ref()
        .map(|c| c.standardisation.dims.clone())
        .or_else(|| {
            clips
                .iter()
                .find(|c| c.rec.labelled)
                .map(|c| c.rec.action_dims.clone())
        })
        .unwrap_or_default();
    for c in &clips {
        let inconsistent = |reason: String| ShardError::Inconsistent {
            set: c.rec.set.clone(),
            id: c.rec.id.clone(),
            reason,
        };
        if (c.rec.width, c.rec.height) != (width, height) || c.rec.fps != fps {
            return Err(inconsistent(format!(
                "{}x{} at {} fps, other clips are {width}x{height} at {fps} fps",
                c.rec.width, c.rec.height, c.rec.fps
            )));
        }
        let (matches, path) = match &c.images {
            ClipImages::Raw(f) => (
                (f.width(), f.height(), f.len()) == (width, height, c.rec.frames as usize),
                f.path(),
            ),
            ClipImages::Png(p) => (p.len() == c.rec.frames as usize, p.path()),
        };
        if !matches {
            return Err(inconsistent(format!(
                "frame store {} does not match the clip record",
                path.display()
            )));
        }
        if c.rec.labelled && c.rec.action_dims != action_dims {
            return Err(inconsistent(format!(
                "action dimensions {:?}, expected {action_dims:?}",
                c.rec.action_dims
            )));
        }
    }
    // The row order: (clip, frame) pairs.
    let mut order: Vec<(u32, u32)> = clips
        .iter()
        .enumerate()
        .flat_map(|(i, c)| (0..c.rec.frames).map(move |f| (i as u32, f)))
        .collect();
    if job.opts.shuffle {
        Rng::for_name(job.seed, "shard.shuffle").shuffle(&mut order);
    }
    fs::create_dir_all(job.shard_dir).map_err(io_at(job.shard_dir))?;
    let props = writer_properties(job.opts);
    let target = (job.opts.target_size_mb * 1e6) as usize;
    let pool = crate::util::thread_pool(job.threads);
    let mut shards: Vec<ShardFile> = Vec::new();
    let mut unchanged = 0u64;
    let mut current: Option<OpenShard> = None;
    let mut rows_per_set: BTreeMap<String, u64> = BTreeMap::new();
    let mut conf = (0u64, 0.0f64);
    let groups: Vec<&[(u32, u32)]> = order
        .chunks(job.opts.row_group_rows.max(1) as usize)
        .collect();
    // Row groups are built and compressed on the pool, at most `depth` at a
    // time (images encoded in parallel inside each); this thread splices the
    // finished column chunks into the shard in row-group order.
    let factory = column_writer_factory(&props)?;
    let depth = job.threads.max(1) * 2;
    let (token_tx, token_rx) = std::sync::mpsc::sync_channel::<()>(depth);
    for _ in 0..depth {
        token_tx.send(()).expect("room for every token");
    }
    let (done_tx, done_rx) =
        std::sync::mpsc::channel::<(usize, Result<EncodedGroup, ShardError>)>();
    let mut write_all = |token_tx: std::sync::mpsc::SyncSender<()>| -> Result<(), ShardError> {
        let mut early: BTreeMap<usize, Result<EncodedGroup, ShardError>> = BTreeMap::new();
        for (g, group) in groups.iter().copied().enumerate() {
            let encoded = loop {
                if let Some(e) = early.remove(&g) {
                    break e;
                }
                let (i, e) = done_rx
                    .recv()
                    .expect("every row group is encoded or failed");
                early.insert(i, e);
            }?;
            for &(ci, f) in group {
                let c = &clips[ci as usize];
                *rows_per_set.entry(c.rec.set.clone()).or_default() += 1;
                if let Some(v) = c.labels.confidence.get(f as usize) {
                    conf.0 += 1;
                    conf.1 += *v as f64;
                }
            }
            if current.is_none() {
                current = Some(OpenShard::create(job.shard_dir, shards.len(), &props)?);
            }
            let open = current.as_mut().expect("just opened");
            open.append(encoded)?;
            let _ = token_tx.send(());
            if open.writer.bytes_written() >= target {
                let (file, same) = current.take().expect("open").finish()?;
                unchanged += same as u64;
                shards.push(file);
            }
        }
        if let Some(open) = current.take() {
            let (file, same) = open.finish()?;
            unchanged += same as u64;
            shards.push(file);
        }
        Ok(())
    };
    let result = std::thread::scope(|scope| {
        let (clips, groups, image, factory, pool) =
            (&clips, &groups, job.opts.image, &factory, &pool);
        scope.spawn(move || {
            pool.in_place_scope(|s| {
                for (g, &group) in groups.iter().enumerate() {
                    // A token comes back each time a group is written; none
                    // when the writer stopped.
                    if token_rx.recv().is_err() {
                        break;
                    }
                    let done = done_tx.clone();
                    s.spawn(move |_| {
                        let r = build_batch(clips, group, image, g)
                            .and_then(|batch| encode_group(factory, &batch, g));
                        let _ = done.send((g, r));
                    });
                }
            });
        });
        write_all(token_tx)
    });
    if let Err(e) = result {
        if let Some(open) = current.take() {
            let _ = fs::remove_file(&open.tmp);
        }
        return Err(e);
    }
    remove_stale(job.shard_dir, &shards)?;
    Ok(ShardSummary {
        schema: columns(),
        rows: order.len() as u64,
        shards,
        rows_per_set,
        clips: clips.len() as u64,
        action_dims,
        fps,
        image: ImageInfo {
            encoding: job.opts.image,
            width,
            height,
            channels: 3,
        },
        normalisation: Normalisation {
            actions: calibration.as_ref().map(|c| c.standardisation.clone()),
        },
        confidence: ConfidenceFigures {
            rows: conf.0,
            mean: if conf.0 > 0 {
                conf.1 / conf.0 as f64
            } else {
                0.0
            },
        },
        calibration,
        codes_table: format!("label/{CODES_FILE}"),
        calibration_table: format!("label/{CALIBRATION_FILE}"),
        compression: format!("zstd({})", job.opts.zstd_level),
        row_group_rows: job.opts.row_group_rows,
        target_size_mb: job.opts.target_size_mb,
        shuffle_seed: job.opts.shuffle.then_some(job.seed),
        unchanged,
    })
}

/// The decode-grid actions the align stage re-mapped with an estimated clock
/// offset (`[actions] offset = "estimate"`), by (set, clip id): these, not the
/// decode stage's, fill the `action` column. Empty when align did not run or
/// estimated no offset.
fn offset_corrected_actions(
    run_dir: &Path,
) -> Result<BTreeMap<(String, String), Vec<Vec<f32>>>, ShardError> {
    let path = crate::align::view::alignment_path(run_dir);
    if !path.exists() {
        return Ok(BTreeMap::new());
    }
    let alignment: crate::align::Alignment =
        crate::store::read_json(&path).map_err(io_at(&path))?;
    Ok(alignment
        .clips
        .into_iter()
        .filter_map(|c| c.actions.map(|a| ((c.set, c.id), a)))
        .collect())
}

/// Removes everything in `dir` but the shards and the manifest.
fn remove_stale(dir: &Path, shards: &[ShardFile]) -> Result<(), ShardError> {
    let keep: Vec<&str> = shards.iter().map(|s| s.file.as_str()).collect();
    for entry in fs::read_dir(dir).map_err(io_at(dir))? {
        let entry = entry.map_err(io_at(dir))?;
        let name = entry.file_name().to_string_lossy().into_owned();
        if name == MANIFEST_FILE || keep.contains(&name.as_str()) {
            continue;
        }
        let path = entry.path();
        let r = if path.is_dir() {
            fs::remove_dir_all(&path)
        } else {
            fs::remove_file(&path)
        };
        r.map_err(io_at(&path))?;
    }
    Ok(())
}

/// A `binary` column holds at most `i32::MAX` bytes per row group.
fn fits_in_binary_array(bytes: usize, g: usize) -> Result<(), ShardError> {
    if bytes > i32::MAX as usize {
        return Err(ShardError::ImageBytes { group: g, bytes });
    }
    Ok(())
}

/// The raw RGB frames of a row group, read straight into one values buffer.
fn raw_images(clips: &[Clip], group: &[(u32, u32)], g: usize) -> Result<BinaryArray, ShardError> {
    let frame_bytes = clips
        .first()
        .map_or(0, |c| c.rec.width as usize * c.rec.height as usize * 3);
    fits_in_binary_array(group.len() * frame_bytes, g)?;
    let mut values = vec![0u8; group.len() * frame_bytes];
    if frame_bytes > 0 {
        values
            .par_chunks_mut(frame_bytes)
            .zip(group.par_iter())
            .try_for_each(|(out, &(ci, f))| match &clips[ci as usize].images {
                ClipImages::Raw(frames) => frames.read_into(f as usize, out),
                ClipImages::Png(_) => unreachable!("raw images come from frame stores"),
            })?;
    }
    let offsets = OffsetBuffer::from_lengths(std::iter::repeat_n(frame_bytes, group.len()));
    Ok(BinaryArray::new(offsets, Buffer::from_vec(values), None))
}

/// The PNG frames of a row group (encoded by the label stage), read with
/// positioned reads straight into one values buffer.
fn png_images(clips: &[Clip], group: &[(u32, u32)], g: usize) -> Result<BinaryArray, ShardError> {
    let store = |ci: u32| match &clips[ci as usize].images {
        ClipImages::Png(p) => p,
        ClipImages::Raw(_) => unreachable!("PNG images come from PNG frame stores"),
    };
    let lengths: Vec<usize> = group
        .iter()
        .map(|&(ci, f)| store(ci).png_len(f as usize))
        .collect();
    let bytes = lengths.iter().sum();
    fits_in_binary_array(bytes, g)?;
    let mut values = vec![0u8; bytes];
    let mut slices = Vec::with_capacity(group.len());
    let mut rest = values.as_mut_slice();
    for &n in &lengths {
        let (head, tail) = rest.split_at_mut(n);
        slices.push(head);
        rest = tail;
    }
    slices
        .into_par_iter()
        .zip(group.par_iter())
        .try_for_each(|(out, &(ci, f))| store(ci).read_into(f as usize, out))?;
    let offsets = OffsetBuffer::from_lengths(lengths);
    Ok(BinaryArray::new(offsets, Buffer::from_vec(values), None))
}

/// The record batch of one row group.
fn build_batch(
    clips: &[Clip],
    group: &[(u32, u32)],
    image: ImageEncoding,
    g: usize,
) -> Result<RecordBatch, ShardError> {
    let images = match image {
        ImageEncoding::Raw => raw_images(clips, group, g)?,
        ImageEncoding::Png => png_images(clips, group, g)?,
    };
    let n = group.len();
    let row = |&(ci, f): &(u32, u32)| (&clips[ci as usize], f as usize);
    let mut action = ListBuilder::with_capacity(Float32Builder::with_capacity(n * 4), n);
    let mut est = ListBuilder::with_capacity(Float32Builder::with_capacity(n * 4), n);
    let mut std = ListBuilder::with_capacity(Float32Builder::with_capacity(n * 4), n);
    let mut confidence = Vec::with_capacity(n);
    let mut ood = Vec::with_capacity(n);
    let mut code = Vec::with_capacity(n);
    for r in group {
        let (c, f) = row(r);
        let put = |b: &mut ListBuilder<Float32Builder>, v: Option<&Vec<f32>>| match v {
            Some(v) => {
                b.values().append_slice(v);
                b.append(true);
            }
            None => b.append(false),
        };
        put(&mut action, c.rec.actions.as_ref().and_then(|a| a.get(f)));
        put(&mut est, c.labels.action_est.get(f));
        put(&mut std, c.labels.action_std.get(f));
        confidence.push(c.labels.confidence.get(f).copied());
        ood.push(c.labels.ood.get(f).copied());
        code.push(c.labels.code.get(f).copied());
    }
    let columns: Vec<ArrayRef> = vec![
        Arc::new(StringArray::from_iter_values(
            group.iter().map(|r| row(r).0.rec.id.as_str()),
        )),
        Arc::new(StringArray::from_iter_values(
            group.iter().map(|r| row(r).0.rec.set.as_str()),
        )),
        Arc::new(BooleanArray::from(
            group
                .iter()
                .map(|r| row(r).0.rec.labelled)
                .collect::<Vec<_>>(),
        )),
        Arc::new(UInt32Array::from_iter_values(group.iter().map(|r| r.1))),
        Arc::new(Float64Array::from_iter_values(group.iter().map(|r| {
            let (c, f) = row(r);
            c.rec.time_of(f as u32)
        }))),
        Arc::new(images),
        Arc::new(action.finish()),
        Arc::new(est.finish()),
        Arc::new(std.finish()),
        Arc::new(Float32Array::from(confidence)),
        Arc::new(BooleanArray::from(ood)),
        Arc::new(UInt16Array::from(code)),
        Arc::new(StringArray::from_iter_values(
            group.iter().map(|r| row(r).0.labels.split.name()),
        )),
    ];
    RecordBatch::try_new(schema(), columns).map_err(|e| ShardError::Parquet {
        path: PathBuf::from(format!("row group {g}")),
        message: e.to_string(),
    })
}

/// One row group's column chunks, encoded and compressed, ready to append.
struct EncodedGroup {
    chunks: Vec<ArrowColumnChunk>,
    rows: usize,
}

/// A factory of column writers with the shards' schema and properties.
fn column_writer_factory(
    props: &WriterProperties,
) -> Result<ArrowRowGroupWriterFactory, ShardError> {
    ArrowWriter::try_new(io::sink(), schema(), Some(props.clone()))
        .and_then(ArrowWriter::into_serialized_writer)
        .map(|(_, factory)| factory)
        .map_err(|e| ShardError::Parquet {
            path: PathBuf::from("(column writers)"),
            message: e.to_string(),
        })
}

/// Encodes and compresses every column of one row group.
fn encode_group(
    factory: &ArrowRowGroupWriterFactory,
    batch: &RecordBatch,
    g: usize,
) -> Result<EncodedGroup, ShardError> {
    let err = |e: parquet::errors::ParquetError| ShardError::Parquet {
        path: PathBuf::from(format!("row group {g}")),
        message: e.to_string(),
    };
    let mut writers = factory.create_column_writers(g).map_err(err)?;
    let mut next = writers.iter_mut();
    for (array, field) in batch.columns().iter().zip(batch.schema().fields()) {
        for leaf in compute_leaves(field, array).map_err(err)? {
            next.next()
                .expect("one column writer per leaf")
                .write(&leaf)
                .map_err(err)?;
        }
    }
    let chunks = writers
        .into_iter()
        .map(|w| w.close())
        .collect::<Result<_, _>>()
        .map_err(err)?;
    Ok(EncodedGroup {
        chunks,
        rows: batch.num_rows(),
    })
}

/// Bytes between two requests to start writing the file back to disk.
const WRITEBACK_STEP: u64 = 8 << 20;

/// A writer that hashes what passes through. Parquet's own writer buffers
/// small writes; pages reach the file in one write each, uncopied. Every
/// [`WRITEBACK_STEP`] bytes it asks the kernel to start writing the new bytes
/// to disk, so that the `fsync` before the rename has little left to wait for.
struct HashingFile {
    inner: fs::File,
    hasher: Sha256,
    written: u64,
    writeback_from: u64,
}

impl HashingFile {
    fn new(inner: fs::File) -> Self {
        Self {
            inner,
            hasher: Sha256::new(),
            written: 0,
            writeback_from: 0,
        }
    }
}

impl Write for HashingFile {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        let n = self.inner.write(buf)?;
        self.hasher.update(&buf[..n]);
        self.written += n as u64;
        if self.written - self.writeback_from >= WRITEBACK_STEP {
            start_writeback(&self.inner, self.writeback_from, self.written);
            self.writeback_from = self.written;
        }
        Ok(n)
    }
    fn flush(&mut self) -> io::Result<()> {
        self.inner.flush()
    }
}

/// Asks the kernel to start writing bytes `from..to` of `file` back to disk
/// without waiting (Linux `sync_file_range` with `SYNC_FILE_RANGE_WRITE`); a
/// hint only, so a failure is ignored: the `fsync` at the end still waits for
/// every byte.
#[cfg(target_os = "linux")]
fn start_writeback(file: &fs::File, from: u64, to: u64) {
    use std::os::fd::AsRawFd;
    // SAFETY: the descriptor is open for the duration of the call; the call
    // reads no memory of ours.
    unsafe {
        libc::sync_file_range(
            file.as_raw_fd(),
            from as libc::off64_t,
            (to - from) as libc::off64_t,
            libc::SYNC_FILE_RANGE_WRITE,
        );
    }
}

#[cfg(not(target_os = "linux"))]
fn start_writeback(_file: &fs::File, _from: u64, _to: u64) {}

struct OpenShard {
    writer: SerializedFileWriter<HashingFile>,
    tmp: PathBuf,
    path: PathBuf,
    name: String,
    rows: u64,
    groups: u64,
}

impl OpenShard {
    fn create(dir: &Path, index: usize, props: &WriterProperties) -> Result<Self, ShardError> {
        let name = shard_name(index);
        let path = dir.join(&name);
        let tmp = crate::store::atomic::temp_path(&path);
        let file = fs::File::create(&tmp).map_err(io_at(&tmp))?;
        let sink = HashingFile::new(file);
        let err = |e: parquet::errors::ParquetError| ShardError::Parquet {
            path: path.clone(),
            message: e.to_string(),
        };
        // The Arrow writer adds the Arrow schema to the file's metadata; its
        // serialized writer then takes the column chunks encoded elsewhere.
        let (writer, _) = ArrowWriter::try_new(sink, schema(), Some(props.clone()))
            .and_then(ArrowWriter::into_serialized_writer)
            .map_err(err)?;
        Ok(Self {
            writer,
            tmp,
            path,
            name,
            rows: 0,
            groups: 0,
        })
    }

    /// Appends one encoded row group.
    fn append(&mut self, group: EncodedGroup) -> Result<(), ShardError> {
        let err = |e: parquet::errors::ParquetError| ShardError::Parquet {
            path: self.path.clone(),
            message: e.to_string(),
        };
        let mut row_group = self.writer.next_row_group().map_err(err)?;
        for chunk in group.chunks {
            chunk.append_to_row_group(&mut row_group).map_err(err)?;
        }
        row_group.close().map_err(err)?;
        self.rows += group.rows as u64;
        self.groups += 1;
        Ok(())
    }

    /// Closes the shard; returns its record and whether an identical file was kept.
    fn finish(self) -> Result<(ShardFile, bool), ShardError> {
        let Self {
            writer,
            tmp,
            path,
            name,
            rows,
            groups,
        } = self;
        let result = (|| {
            let sink = writer.into_inner().map_err(|e| ShardError::Parquet {
                path: path.clone(),
                message: e.to_string(),
            })?;
            let HashingFile {
                inner: file,
                hasher,
                ..
            } = sink;
            file.sync_all().map_err(io_at(&tmp))?;
            let bytes = file.metadata().map_err(io_at(&tmp))?.len();
            drop(file);
            let sha256: String = hasher
                .finalize()
                .iter()
                .map(|b| format!("{b:02x}"))
                .collect();
            let same = fs::metadata(&path).is_ok_and(|m| m.len() == bytes)
                && crate::util::sha256_file(&path).is_ok_and(|h| h == sha256);
            if same {
                fs::remove_file(&tmp).map_err(io_at(&tmp))?;
            } else {
                fs::rename(&tmp, &path).map_err(io_at(&path))?;
            }
            Ok((
                ShardFile {
                    file: name,
                    rows,
                    row_groups: groups,
                    bytes,
                    sha256,
                },
                same,
            ))
        })();
        if result.is_err() {
            let _ = fs::remove_file(&tmp);
        }
        result
    }
}
