//! Decoding one clip: read packets explicitly (so I/O errors and damaged data
//! surface), decode, resample to the output fps by presentation timestamps and
//! stream the converted frames into the frame store.
//!
//! Resampling rule (variable frame rate safe): output frame `k` is shown at
//! `t_k = k / fps` seconds after the first source frame and takes the source
//! frame being displayed then, i.e. the last one whose timestamp is `<= t_k`
//! (plus a small tolerance for timestamp rounding). Output frames run while
//! `t_k` is before the end of the last source frame. A source frame that no
//! output frame takes is *dropped*; every output after the first that takes
//! the same source frame is *repeated*. Only the frame being displayed is
//! held, so memory does not grow with clip length.

use std::path::Path;

use ffmpeg::ffi;
use ffmpeg::util::frame::Video as VideoFrame;
use ffmpeg_next as ffmpeg;

use super::DecodeOptions;
use super::convert::{Converter, Geometry, plan};
pub use super::error::DecodeError;
pub use super::probe::probe;
use super::probe::{Colour, check_limits, colour_of, open};
use crate::store::{FrameWriter, SourceInfo};

/// Counts from decoding one clip.
#[derive(Debug, Clone)]
pub struct DecodeStats {
    /// What the source is (frames and duration as actually decoded).
    pub source: SourceInfo,
    /// Output frames written.
    pub frames: u32,
    /// Source frames dropped by resampling.
    pub dropped: u64,
    /// Output frames repeating a source frame.
    pub repeated: u64,
}

/// Timestamp tolerance in seconds: a source frame stamped at most this much
/// after an output time still counts as displayed at it (MP4 time bases round).
fn tolerance(fps: f64) -> f64 {
    (1e-3f64).min(0.25 / fps)
}

fn is_again(e: &ffmpeg::Error) -> bool {
    matches!(e, ffmpeg::Error::Other { errno } if *errno == ffmpeg::util::error::EAGAIN)
}

/// The state of the resampler and converter while one clip decodes.
struct Resampler<'a> {
    path: &'a Path,
    opts: &'a DecodeOptions,
    writer: &'a mut FrameWriter,
    rotation: i32,
    coded_height: u32,
    eps: f64,
    /// The frame being displayed, its time and how often it was output.
    current: VideoFrame,
    current_t: Option<f64>,
    current_uses: u64,
    /// Whether `rgb` holds `current` converted.
    converted: bool,
    rgb: Vec<u8>,
    converter: Option<Converter>,
    colour: Option<Colour>,
    /// Source timestamp origin (first frame), in stream ticks.
    origin: Option<i64>,
    last_duration_s: f64,
    next_k: u64,
    decoded: u64,
    dropped: u64,
    repeated: u64,
}

impl Resampler<'_> {
    fn out_time(&self, k: u64) -> f64 {
        k as f64 / self.opts.fps
    }

    /// Writes the current frame as output frames while `t_k + eps < until`.
    fn emit_until(&mut self, until: f64) -> Result<(), DecodeError> {
        if self.current_t.is_none() {
            return Ok(());
        }
        while self.out_time(self.next_k) + self.eps < until {
            if !self.converted {
                self.convert_current()?;
            }
            let frame = self.next_k as u32;
            self.writer
                .push(&self.rgb)
                .map_err(|source| DecodeError::Store {
                    path: self.path.to_path_buf(),
                    frame,
                    source,
                })?;
            if self.current_uses > 0 {
                self.repeated += 1;
            }
            self.current_uses += 1;
            self.next_k += 1;
            if self.next_k > u32::MAX as u64 {
                return Err(DecodeError::TooLong {
                    path: self.path.to_path_buf(),
                    duration_s: until,
                    max_s: self.opts.max_duration_s,
                });
            }
        }
        Ok(())
    }

    fn convert_current(&mut self) -> Result<(), DecodeError> {
        let index = self.decoded.saturating_sub(1);
        // SAFETY: `current` holds a decoded frame.
        let (format, w, h) = unsafe {
            let f = &*self.current.as_ptr();
            (f.format, f.width as u32, f.height as u32)
        };
        let format_name = format!("{:?}", self.current.format()).to_lowercase();
        let path = self.path;
        let fail = move |reason: &'static str| DecodeError::Convert {
            path: path.to_path_buf(),
            format: format_name.clone(),
            frame: index,
            reason,
        };
        if self.converter.as_ref().map(|c| c.input) != Some((format, w, h)) {
            // First frame, or the stream changed size or format mid-clip.
            let geom: Geometry = plan(
                (w, h),
                self.rotation,
                self.opts.crop,
                (self.opts.width, self.opts.height),
            )
            .map_err(|(uw, uh)| match self.opts.crop {
                super::Crop::Box { x, y, w, h } => DecodeError::BadBox {
                    path: self.path.to_path_buf(),
                    x,
                    y,
                    w,
                    h,
                    width: uw,
                    height: uh,
                },
                _ => unreachable!("only a fixed box can fail to fit"),
            })?;
            let colour = self.colour.expect("colour is chosen on the first frame");
            self.converter = None;
            self.converter =
                Some(Converter::new(format, w, h, geom, colour, self.opts.scaler).map_err(&fail)?);
        }
        let conv = self.converter.as_mut().expect("converter was just built");
        // SAFETY: `current` is a decoded frame matching the converter's input and
        // is converted at most once (guarded by `converted`).
        let rgb = unsafe { conv.convert(self.current.as_mut_ptr()) }.map_err(fail)?;
        self.rgb.clear();
        self.rgb.extend_from_slice(rgb);
        self.converted = true;
        Ok(())
    }

    /// Takes a newly decoded frame (in `incoming`) as the displayed frame.
    fn push_source(
        &mut self,
        incoming: &mut VideoFrame,
        time_base: f64,
    ) -> Result<(), DecodeError> {
        let ts = incoming.timestamp().or(incoming.pts());
        let t = match (ts, self.origin) {
            (Some(ts), Some(o)) => (ts - o) as f64 * time_base,
            (Some(ts), None) => {
                self.origin = Some(ts);
                0.0
            }
            // No timestamp: one frame duration after the previous frame.
            (None, _) => self.current_t.map_or(0.0, |t| t + self.last_duration_s),
        };
        // Never go back in time (damaged timestamps).
        let t = self.current_t.map_or(t, |c| t.max(c));
        if t > self.opts.max_duration_s {
            return Err(DecodeError::TooLong {
                path: self.path.to_path_buf(),
                duration_s: t,
                max_s: self.opts.max_duration_s,
            });
        }
        if self.colour.is_none() {
            // SAFETY: `incoming` holds a decoded frame.
            let f = unsafe { &*incoming.as_ptr() };
            // SAFETY: a decoded video frame's format is an AVPixelFormat value.
            let fmt: ffi::AVPixelFormat = unsafe { std::mem::transmute(f.format) };
            self.colour = Some(colour_of(
                f.colorspace,
                f.color_range,
                fmt,
                self.coded_height,
            ));
        }
        self.emit_until(t)?;
        if self.current_t.is_some() && self.current_uses == 0 {
            self.dropped += 1;
        }
        let pkt_duration = incoming.packet().duration;
        if pkt_duration > 0 {
            self.last_duration_s = pkt_duration as f64 * time_base;
        } else if let Some(c) = self.current_t
            && t > c
        {
            self.last_duration_s = t - c;
        }
        std::mem::swap(&mut self.current, incoming);
        self.current_t = Some(t);
        self.current_uses = 0;
        self.converted = false;
        self.decoded += 1;
        Ok(())
    }
}

/// Decodes a clip into `writer` at the options' fps and size: probe, check
/// the limits, decode, resample by timestamps, convert, crop/pad, resize.
pub fn decode_clip(
    path: &Path,
    opts: &DecodeOptions,
    writer: &mut FrameWriter,
) -> Result<DecodeStats, DecodeError> {
    let mut opened = open(path)?;
    check_limits(&opened.info, opts)?;
    let owned = || path.to_path_buf();
    let stream = opened
        .input
        .stream(opened.stream_index)
        .expect("stream index came from this input");
    let ctx = ffmpeg::codec::Context::from_parameters(stream.parameters()).map_err(|source| {
        DecodeError::Decoder {
            path: owned(),
            codec: opened.info.codec.clone(),
            source,
        }
    })?;
    let mut decoder = ctx
        .decoder()
        .video()
        .map_err(|source| DecodeError::Decoder {
            path: owned(),
            codec: opened.info.codec.clone(),
            source,
        })?;
    let time_base = opened.time_base;
    let fallback_duration = if opened.info.fps > 0.0 {
        1.0 / opened.info.fps
    } else {
        1.0 / opts.fps
    };
    let mut rs = Resampler {
        path,
        opts,
        writer,
        rotation: opened.info.rotation,
        coded_height: opened.info.height,
        eps: tolerance(opts.fps),
        current: VideoFrame::empty(),
        current_t: None,
        current_uses: 0,
        converted: false,
        rgb: Vec::new(),
        converter: None,
        colour: None,
        origin: None,
        last_duration_s: fallback_duration,
        next_k: 0,
        decoded: 0,
        dropped: 0,
        repeated: 0,
    };
    let mut incoming = VideoFrame::empty();
    let mut packets = 0u64;
    loop {
        // A fresh packet each time: av_read_frame does not release the buffer
        // of the packet it fills, so reusing one would leak every packet.
        let mut packet = ffmpeg::Packet::empty();
        match packet.read(&mut opened.input) {
            Ok(()) => {}
            Err(ffmpeg::Error::Eof) => break,
            Err(e) if is_again(&e) => continue,
            Err(source) => {
                return Err(DecodeError::Read {
                    path: owned(),
                    frame: rs.decoded,
                    source,
                });
            }
        }
        if packet.stream() != opened.stream_index {
            continue;
        }
        if packet.is_corrupt() {
            return Err(DecodeError::Corrupt {
                path: owned(),
                frame: packets,
            });
        }
        packets += 1;
        decoder
            .send_packet(&packet)
            .map_err(|source| DecodeError::Decode {
                path: owned(),
                frame: rs.decoded,
                source,
            })?;
        drain(&mut decoder, &mut incoming, &mut rs, time_base)?;
    }
    decoder.send_eof().map_err(|source| DecodeError::Decode {
        path: owned(),
        frame: rs.decoded,
        source,
    })?;
    drain(&mut decoder, &mut incoming, &mut rs, time_base)?;

    if opened.announced_frames > 0 && packets < opened.announced_frames {
        return Err(DecodeError::Truncated {
            path: owned(),
            got: packets,
            expected: opened.announced_frames,
        });
    }
    let Some(last_t) = rs.current_t else {
        return Err(DecodeError::NoFrames { path: owned() });
    };
    let end = last_t + rs.last_duration_s;
    rs.emit_until(end)?;
    if rs.current_uses == 0 {
        rs.dropped += 1;
    }
    let colour = rs.colour.expect("colour chosen on the first frame");
    let mut source = opened.info.clone();
    source.frames = rs.decoded;
    source.duration_s = end;
    source.matrix = colour.matrix.to_string();
    source.range = if colour.full { "full" } else { "limited" }.to_string();
    source.untagged = colour.untagged;
    Ok(DecodeStats {
        source,
        frames: rs.next_k as u32,
        dropped: rs.dropped,
        repeated: rs.repeated,
    })
}

/// Receives every frame the decoder has ready.
fn drain(
    decoder: &mut ffmpeg::decoder::Video,
    incoming: &mut VideoFrame,
    rs: &mut Resampler<'_>,
    time_base: f64,
) -> Result<(), DecodeError> {
    loop {
        match decoder.receive_frame(incoming) {
            Ok(()) => rs.push_source(incoming, time_base)?,
            Err(ffmpeg::Error::Eof) => return Ok(()),
            Err(e) if is_again(&e) => return Ok(()),
            Err(source) => {
                return Err(DecodeError::Decode {
                    path: rs.path.to_path_buf(),
                    frame: rs.decoded,
                    source,
                });
            }
        }
    }
}
