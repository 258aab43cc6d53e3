//! H.264 MP4 writer for the demo clips (libx264 through ffmpeg-next).
//!
//! Frames arrive as RGB24 and are converted here to 4:2:0 Y'CbCr with the
//! ITU-R BT.601-7 matrix in limited ("studio", 16-235 / 16-240) range; the
//! stream is tagged accordingly (matrix, primaries and transfer SMPTE 170M,
//! range MPEG) so readers do not have to guess. x264 runs single-threaded and
//! the muxer in bit-exact mode, so a seed gives byte-identical files on a given
//! FFmpeg/x264 build.

use std::path::Path;

use ffmpeg::{Dictionary, Packet, Rational, codec, color, encoder, format, frame};
use ffmpeg_next as ffmpeg;

/// An open MP4 file receiving frames.
pub(crate) struct Mp4Writer {
    octx: format::context::Output,
    encoder: encoder::Video,
    frame: frame::Video,
    time_base: Rational,
    stream_time_base: Rational,
    next_pts: i64,
    size: u32,
}

/// Settings of the demo encoder.
#[derive(Debug, Clone, Copy)]
pub(crate) struct EncodeSettings {
    pub size: u32,
    pub fps: f64,
    pub crf: u32,
    pub gop: u32,
}

impl Mp4Writer {
    /// Creates `path` (written as MP4 whatever its extension) and opens x264.
    pub(crate) fn create(path: &Path, s: &EncodeSettings) -> Result<Self, ffmpeg::Error> {
        ffmpeg::init()?;
        // x264's per-file statistics are noise here; real failures come back as errors.
        ffmpeg::log::set_level(ffmpeg::log::Level::Error);
        let codec = encoder::find_by_name("libx264").ok_or(ffmpeg::Error::EncoderNotFound)?;
        let mut octx = format::output_as(path, "mp4")?;
        let global_header = octx.format().flags().contains(format::Flags::GLOBAL_HEADER);
        let rate = Rational::from(s.fps);
        let time_base = rate.invert();

        let mut enc = codec::context::Context::new_with_codec(codec)
            .encoder()
            .video()?;
        enc.set_width(s.size);
        enc.set_height(s.size);
        enc.set_format(format::Pixel::YUV420P);
        enc.set_time_base(time_base);
        enc.set_frame_rate(Some(rate));
        enc.set_gop(s.gop);
        // No B-frames: presentation order equals decode order, no edit list games.
        enc.set_max_b_frames(0);
        enc.set_colorspace(color::Space::SMPTE170M);
        enc.set_color_range(color::Range::MPEG);
        enc.set_color_primaries(color::Primaries::SMPTE170M);
        enc.set_color_transfer_characteristic(color::TransferCharacteristic::SMPTE170M);
        if global_header {
            enc.set_flags(codec::Flags::GLOBAL_HEADER);
        }
        let mut opts = Dictionary::new();
        opts.set("preset", "medium");
        opts.set("crf", &s.crf.to_string());
        // One thread: x264's output then depends only on its input.
        opts.set("threads", "1");
        let encoder = enc.open_with(opts)?;

        {
            let mut ost = octx.add_stream(codec)?;
            ost.set_parameters(&encoder);
            ost.set_time_base(time_base);
            ost.set_avg_frame_rate(rate);
            ost.set_rate(rate);
        }
        let mut mux = Dictionary::new();
        // Leave out the muxer's version string (bit-exact output).
        mux.set("fflags", "+bitexact");
        octx.write_header_with(mux)?;
        let stream_time_base = octx.stream(0).expect("stream added").time_base();

        let mut frame = frame::Video::new(format::Pixel::YUV420P, s.size, s.size);
        frame.set_color_space(color::Space::SMPTE170M);
        frame.set_color_range(color::Range::MPEG);
        frame.set_color_primaries(color::Primaries::SMPTE170M);
        frame.set_color_transfer_characteristic(color::TransferCharacteristic::SMPTE170M);
        Ok(Self {
            octx,
            encoder,
            frame,
            time_base,
            stream_time_base,
            next_pts: 0,
            size: s.size,
        })
    }

    /// Encodes one RGB24 frame (`size`×`size`, rows top to bottom).
    pub(crate) fn push_rgb(&mut self, rgb: &[u8]) -> Result<(), ffmpeg::Error> {
        rgb_to_yuv420_bt601(rgb, self.size as usize, &mut self.frame);
        self.frame.set_pts(Some(self.next_pts));
        self.next_pts += 1;
        self.encoder.send_frame(&self.frame)?;
        self.drain()
    }

    /// Flushes the encoder and writes the MP4 trailer.
    pub(crate) fn finish(mut self) -> Result<(), ffmpeg::Error> {
        self.encoder.send_eof()?;
        self.drain()?;
        self.octx.write_trailer()
    }

    fn drain(&mut self) -> Result<(), ffmpeg::Error> {
        let mut packet = Packet::empty();
        loop {
            match self.encoder.receive_packet(&mut packet) {
                Ok(()) => {
                    packet.set_stream(0);
                    packet.rescale_ts(self.time_base, self.stream_time_base);
                    packet.write_interleaved(&mut self.octx)?;
                }
                Err(ffmpeg::Error::Other { errno }) if errno == ffmpeg::error::EAGAIN => {
                    return Ok(());
                }
                Err(ffmpeg::Error::Eof) => return Ok(()),
                Err(e) => return Err(e),
            }
        }
    }
}

/// Converts packed RGB24 to planar 4:2:0 Y'CbCr, ITU-R BT.601-7 limited range:
/// Y' = 16 + 219·(0.299 R + 0.587 G + 0.114 B), Cb = 128 + 224·(B − Y)/1.772,
/// Cr = 128 + 224·(R − Y)/1.402 (R, G, B in 0..1); chroma is the mean of each
/// 2×2 block.
fn rgb_to_yuv420_bt601(rgb: &[u8], size: usize, frame: &mut frame::Video) {
    let luma = |r: f32, g: f32, b: f32| 0.299 * r + 0.587 * g + 0.114 * b;
    let stride = frame.stride(0);
    {
        let y = frame.data_mut(0);
        for j in 0..size {
            for i in 0..size {
                let p = &rgb[(j * size + i) * 3..][..3];
                let l = luma(p[0] as f32, p[1] as f32, p[2] as f32) / 255.0;
                y[j * stride + i] = (16.0 + 219.0 * l).round().clamp(0.0, 255.0) as u8;
            }
        }
    }
    let half = size / 2;
    let (su, sv) = (frame.stride(1), frame.stride(2));
    let mut cb = vec![0u8; half * half];
    let mut cr = vec![0u8; half * half];
    for j in 0..half {
        for i in 0..half {
            let mut acc = [0.0f32; 3];
            for (dj, di) in [(0, 0), (0, 1), (1, 0), (1, 1)] {
                let p = &rgb[((2 * j + dj) * size + 2 * i + di) * 3..][..3];
                for k in 0..3 {
                    acc[k] += p[k] as f32 / (4.0 * 255.0);
                }
            }
            let l = luma(acc[0], acc[1], acc[2]);
            let u = 128.0 + 224.0 * (acc[2] - l) / 1.772;
            let v = 128.0 + 224.0 * (acc[0] - l) / 1.402;
            cb[j * half + i] = u.round().clamp(0.0, 255.0) as u8;
            cr[j * half + i] = v.round().clamp(0.0, 255.0) as u8;
        }
    }
    let plane_u = frame.data_mut(1);
    for j in 0..half {
        plane_u[j * su..j * su + half].copy_from_slice(&cb[j * half..(j + 1) * half]);
    }
    let plane_v = frame.data_mut(2);
    for j in 0..half {
        plane_v[j * sv..j * sv + half].copy_from_slice(&cr[j * half..(j + 1) * half]);
    }
}
