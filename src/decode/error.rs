//! Errors from probing and decoding one clip. Every variant names the clip
//! file; those raised while decoding also name the source frame index.

use std::path::PathBuf;

use crate::store::FrameStoreError;

/// Errors probing or decoding one clip; each names the clip file.
#[derive(Debug, thiserror::Error)]
pub enum DecodeError {
    /// The clip file cannot be read at all.
    #[error("{path}: cannot read the file: {source}")]
    Io {
        /// The clip.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// The clip file has no bytes.
    #[error("{path}: the file is empty (0 bytes)")]
    Empty {
        /// The clip.
        path: PathBuf,
    },
    /// FFmpeg cannot open the file as a media container.
    #[error(
        "{path}: not a readable video file (FFmpeg: {source}); is it truncated or not a video?"
    )]
    Open {
        /// The clip.
        path: PathBuf,
        /// FFmpeg's error.
        #[source]
        source: ffmpeg_next::Error,
    },
    /// The container has no video stream.
    #[error("{path}: the file has no video stream ({streams} other stream(s))")]
    NoVideo {
        /// The clip.
        path: PathBuf,
        /// Number of non-video streams found.
        streams: usize,
    },
    /// The video stream's codec cannot be decoded by this FFmpeg.
    #[error("{path}: cannot open a decoder for codec {codec}: {source}")]
    Decoder {
        /// The clip.
        path: PathBuf,
        /// Codec name.
        codec: String,
        /// FFmpeg's error.
        #[source]
        source: ffmpeg_next::Error,
    },
    /// The picture is larger than the configured limit.
    #[error(
        "{path}: picture is {width}x{height} (upright), larger than the limit {max_width}x{max_height}; refused before decoding"
    )]
    TooLarge {
        /// The clip.
        path: PathBuf,
        /// Upright width.
        width: u32,
        /// Upright height.
        height: u32,
        /// Limit on width.
        max_width: u32,
        /// Limit on height.
        max_height: u32,
    },
    /// The clip is longer than the configured limit.
    #[error("{path}: clip lasts {duration_s:.1} s, longer than the limit {max_s:.1} s")]
    TooLong {
        /// The clip.
        path: PathBuf,
        /// Duration (known so far) in seconds.
        duration_s: f64,
        /// Limit in seconds.
        max_s: f64,
    },
    /// Reading a packet from the container failed (I/O error or damaged file).
    #[error("{path}: reading failed after source frame {frame}: {source}")]
    Read {
        /// The clip.
        path: PathBuf,
        /// Source frames decoded before the failure.
        frame: u64,
        /// FFmpeg's error.
        #[source]
        source: ffmpeg_next::Error,
    },
    /// The demuxer flagged a packet as corrupt.
    #[error("{path}: damaged or truncated data at source frame {frame}")]
    Corrupt {
        /// The clip.
        path: PathBuf,
        /// Source frame index (packets read so far).
        frame: u64,
    },
    /// The decoder rejected the data.
    #[error("{path}: decoding failed at source frame {frame}: {source}")]
    Decode {
        /// The clip.
        path: PathBuf,
        /// Source frame index.
        frame: u64,
        /// FFmpeg's error.
        #[source]
        source: ffmpeg_next::Error,
    },
    /// The file ends before the frames its header announces.
    #[error("{path}: file is truncated: it holds {got} of the {expected} frames its header lists")]
    Truncated {
        /// The clip.
        path: PathBuf,
        /// Video packets found.
        got: u64,
        /// Frames the container announces.
        expected: u64,
    },
    /// The stream decoded to no picture at all.
    #[error("{path}: the video stream holds no decodable frame")]
    NoFrames {
        /// The clip.
        path: PathBuf,
    },
    /// A fixed crop box does not fit inside the upright picture.
    #[error(
        "{path}: crop box x={x} y={y} w={w} h={h} does not fit in the {width}x{height} upright picture"
    )]
    BadBox {
        /// The clip.
        path: PathBuf,
        /// Box left.
        x: u32,
        /// Box top.
        y: u32,
        /// Box width.
        w: u32,
        /// Box height.
        h: u32,
        /// Upright width.
        width: u32,
        /// Upright height.
        height: u32,
    },
    /// The pixel format cannot be converted (swscale refused it).
    #[error("{path}: cannot convert pixel format {format} at source frame {frame}: {reason}")]
    Convert {
        /// The clip.
        path: PathBuf,
        /// Pixel format name.
        format: String,
        /// Source frame index.
        frame: u64,
        /// What failed.
        reason: &'static str,
    },
    /// Writing the frame store failed.
    #[error("{path}: writing output frame {frame} failed: {source}")]
    Store {
        /// The clip.
        path: PathBuf,
        /// Output frame index.
        frame: u32,
        /// The store's error.
        #[source]
        source: FrameStoreError,
    },
}

impl DecodeError {
    /// The clip file the error is about.
    pub fn path(&self) -> &std::path::Path {
        match self {
            Self::Io { path, .. }
            | Self::Empty { path }
            | Self::Open { path, .. }
            | Self::NoVideo { path, .. }
            | Self::Decoder { path, .. }
            | Self::TooLarge { path, .. }
            | Self::TooLong { path, .. }
            | Self::Read { path, .. }
            | Self::Corrupt { path, .. }
            | Self::Decode { path, .. }
            | Self::Truncated { path, .. }
            | Self::NoFrames { path }
            | Self::BadBox { path, .. }
            | Self::Convert { path, .. }
            | Self::Store { path, .. } => path,
        }
    }
}
