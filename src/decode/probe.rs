//! Probing: open a clip, find its video stream and read what the container and
//! codec parameters say (codec, size, fps, duration, rotation, colour), without
//! decoding the whole clip. Also the size/duration limits checked before decoding.

use std::ffi::c_int;
use std::path::Path;
use std::sync::Once;

use ffmpeg::ffi;
use ffmpeg::format::context::Input;
use ffmpeg::media;
use ffmpeg_next as ffmpeg;

use super::DecodeOptions;
use super::error::DecodeError;
use crate::store::SourceInfo;

/// One-time FFmpeg set-up: quiet logging (our errors carry FFmpeg's cause).
pub(crate) fn init() {
    static ONCE: Once = Once::new();
    ONCE.call_once(|| {
        let _ = ffmpeg::init();
        let level = if std::env::var_os("ACTUARY_FFMPEG_LOG").is_some() {
            ffmpeg::util::log::Level::Warning
        } else {
            ffmpeg::util::log::Level::Fatal
        };
        ffmpeg::util::log::set_level(level);
    });
}

/// How to turn the clip's samples into RGB.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Colour {
    /// Name recorded in [`SourceInfo::matrix`].
    pub matrix: &'static str,
    /// The swscale `SWS_CS_*` constant for the matrix.
    pub sws_cs: c_int,
    /// Full (`true`) or limited range.
    pub full: bool,
    /// The matrix or range was guessed.
    pub untagged: bool,
    /// The source is already RGB (no matrix applies).
    pub rgb: bool,
}

/// Chooses the matrix and range for a stream. Untagged clips are read as
/// BT.601 below 720 lines and BT.709 from 720 lines up, limited range
/// (common practice of players, no source).
pub(crate) fn colour_of(
    space: ffi::AVColorSpace,
    range: ffi::AVColorRange,
    format: ffi::AVPixelFormat,
    coded_height: u32,
) -> Colour {
    use ffi::AVColorSpace as S;
    use ffi::AVPixelFormat as P;
    let desc = unsafe { ffi::av_pix_fmt_desc_get(format) };
    let is_rgb =
        !desc.is_null() && unsafe { (*desc).flags } & (ffi::AV_PIX_FMT_FLAG_RGB as u64) != 0;
    if is_rgb {
        return Colour {
            matrix: "rgb",
            sws_cs: ffi::SWS_CS_DEFAULT,
            full: true,
            untagged: false,
            rgb: true,
        };
    }
    let jpeg_format = matches!(
        format,
        P::AV_PIX_FMT_YUVJ420P
            | P::AV_PIX_FMT_YUVJ422P
            | P::AV_PIX_FMT_YUVJ444P
            | P::AV_PIX_FMT_YUVJ440P
            | P::AV_PIX_FMT_YUVJ411P
    );
    let (full, range_guessed) = match range {
        ffi::AVColorRange::AVCOL_RANGE_JPEG => (true, false),
        ffi::AVColorRange::AVCOL_RANGE_MPEG => (false, false),
        _ if jpeg_format => (true, false),
        _ => (false, true),
    };
    let (matrix, sws_cs, matrix_guessed) = match space {
        S::AVCOL_SPC_BT709 => ("bt709", ffi::SWS_CS_ITU709, false),
        S::AVCOL_SPC_BT470BG | S::AVCOL_SPC_SMPTE170M => ("bt601", ffi::SWS_CS_ITU601, false),
        S::AVCOL_SPC_FCC => ("fcc", ffi::SWS_CS_FCC, false),
        S::AVCOL_SPC_SMPTE240M => ("smpte240m", ffi::SWS_CS_SMPTE240M, false),
        S::AVCOL_SPC_BT2020_NCL | S::AVCOL_SPC_BT2020_CL => ("bt2020", ffi::SWS_CS_BT2020, false),
        _ if coded_height >= 720 => ("bt709", ffi::SWS_CS_ITU709, true),
        _ => ("bt601", ffi::SWS_CS_ITU601, true),
    };
    Colour {
        matrix,
        sws_cs,
        full,
        untagged: range_guessed || matrix_guessed,
        rgb: false,
    }
}

/// Rotation (degrees clockwise, a multiple of 90) needed to show the stream
/// upright, from the display matrix side data or else the `rotate` tag.
fn rotation_of(stream: &ffmpeg::format::stream::Stream) -> i32 {
    for sd in stream.side_data() {
        if sd.kind() == ffmpeg::codec::packet::side_data::Type::DisplayMatrix
            && sd.data().len() >= 36
        {
            // The matrix is nine native-endian i32 values; copy to get alignment.
            let mut m = [0i32; 9];
            for (i, v) in m.iter_mut().enumerate() {
                *v = i32::from_ne_bytes(sd.data()[i * 4..i * 4 + 4].try_into().unwrap());
            }
            let ccw = unsafe { ffi::av_display_rotation_get(m.as_ptr()) };
            if ccw.is_finite() {
                return normalise_rotation(-ccw);
            }
        }
    }
    stream
        .metadata()
        .get("rotate")
        .and_then(|v| v.trim().parse::<f64>().ok())
        .map(normalise_rotation)
        .unwrap_or(0)
}

/// Rounds an angle to the nearest multiple of 90 in `0..360`.
fn normalise_rotation(deg: f64) -> i32 {
    let q = (deg / 90.0).round() as i64;
    (q.rem_euclid(4) * 90) as i32
}

/// An opened clip with its video stream located.
pub(crate) struct Opened {
    pub input: Input,
    pub stream_index: usize,
    pub time_base: f64,
    pub info: SourceInfo,
    /// Frames the container announces (0 when unknown).
    pub announced_frames: u64,
}

fn rational(r: ffmpeg::Rational) -> Option<f64> {
    (r.numerator() > 0 && r.denominator() > 0)
        .then(|| r.numerator() as f64 / r.denominator() as f64)
}

/// Opens `path` and reads its stream facts (shared by [`probe`] and decoding).
pub(crate) fn open(path: &Path) -> Result<Opened, DecodeError> {
    init();
    let owned = || path.to_path_buf();
    let meta = std::fs::metadata(path).map_err(|source| DecodeError::Io {
        path: owned(),
        source,
    })?;
    if meta.len() == 0 {
        return Err(DecodeError::Empty { path: owned() });
    }
    let input = ffmpeg::format::input(path).map_err(|source| DecodeError::Open {
        path: owned(),
        source,
    })?;
    let Some(stream) = input.streams().best(media::Type::Video) else {
        return Err(DecodeError::NoVideo {
            path: owned(),
            streams: input.streams().count(),
        });
    };
    let params = stream.parameters();
    // SAFETY: the parameters live as long as the stream, which `input` owns.
    let par = unsafe { &*params.as_ptr() };
    if par.width <= 0 || par.height <= 0 {
        return Err(DecodeError::NoVideo {
            path: owned(),
            streams: input.streams().count(),
        });
    }
    let (width, height) = (par.width as u32, par.height as u32);
    // SAFETY: codecpar.format holds an AVPixelFormat for video streams.
    let format: ffi::AVPixelFormat = unsafe { std::mem::transmute(par.format) };
    let colour = colour_of(par.color_space, par.color_range, format, height);
    let time_base = rational(stream.time_base()).unwrap_or(1.0 / 90_000.0);
    let fps = rational(stream.avg_frame_rate())
        .or_else(|| rational(stream.rate()))
        .unwrap_or(0.0);
    let duration_s = if stream.duration() > 0 {
        stream.duration() as f64 * time_base
    } else if input.duration() > 0 {
        input.duration() as f64 / f64::from(ffi::AV_TIME_BASE)
    } else {
        0.0
    };
    let announced_frames = stream.frames().max(0) as u64;
    let frames = if announced_frames > 0 {
        announced_frames
    } else {
        (duration_s * fps).round().max(0.0) as u64
    };
    let info = SourceInfo {
        path: owned(),
        codec: params.id().name().to_string(),
        width,
        height,
        fps,
        duration_s,
        frames,
        rotation: rotation_of(&stream),
        matrix: colour.matrix.to_string(),
        range: if colour.full { "full" } else { "limited" }.to_string(),
        untagged: colour.untagged,
    };
    let stream_index = stream.index();
    Ok(Opened {
        input,
        stream_index,
        time_base,
        info,
        announced_frames,
    })
}

/// Probes a clip without decoding it: codec, size, fps, duration, rotation,
/// colour matrix and range. Fast enough to run over hundreds of clips.
pub fn probe(path: &Path) -> Result<SourceInfo, DecodeError> {
    open(path).map(|o| o.info)
}

/// Probes a clip and refuses it when it exceeds the options' limits.
pub fn probe_checked(path: &Path, opts: &DecodeOptions) -> Result<SourceInfo, DecodeError> {
    let info = probe(path)?;
    check_limits(&info, opts)?;
    Ok(info)
}

/// Upright (displayed) size of a source.
pub fn upright_size(info: &SourceInfo) -> (u32, u32) {
    if info.rotation % 180 == 90 {
        (info.height, info.width)
    } else {
        (info.width, info.height)
    }
}

/// Refuses a clip whose upright size or duration exceeds the options' limits,
/// so an oversize clip never reaches the decoder.
pub fn check_limits(info: &SourceInfo, opts: &DecodeOptions) -> Result<(), DecodeError> {
    let (width, height) = upright_size(info);
    if width > opts.max_width || height > opts.max_height {
        return Err(DecodeError::TooLarge {
            path: info.path.clone(),
            width,
            height,
            max_width: opts.max_width,
            max_height: opts.max_height,
        });
    }
    if info.duration_s > opts.max_duration_s {
        return Err(DecodeError::TooLong {
            path: info.path.clone(),
            duration_s: info.duration_s,
            max_s: opts.max_duration_s,
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rotation_rounds_to_quarter_turns() {
        assert_eq!(normalise_rotation(-90.0), 270);
        assert_eq!(normalise_rotation(90.4), 90);
        assert_eq!(normalise_rotation(-180.0), 180);
        assert_eq!(normalise_rotation(360.0), 0);
    }

    #[test]
    fn untagged_matrix_follows_height() {
        // Common practice of players, no source: BT.601 below 720 lines, BT.709 from 720.
        let sd = colour_of(
            ffi::AVColorSpace::AVCOL_SPC_UNSPECIFIED,
            ffi::AVColorRange::AVCOL_RANGE_UNSPECIFIED,
            ffi::AVPixelFormat::AV_PIX_FMT_YUV420P,
            480,
        );
        assert_eq!((sd.matrix, sd.full, sd.untagged), ("bt601", false, true));
        let hd = colour_of(
            ffi::AVColorSpace::AVCOL_SPC_UNSPECIFIED,
            ffi::AVColorRange::AVCOL_RANGE_UNSPECIFIED,
            ffi::AVPixelFormat::AV_PIX_FMT_YUV420P,
            720,
        );
        assert_eq!(hd.matrix, "bt709");
        let j = colour_of(
            ffi::AVColorSpace::AVCOL_SPC_BT709,
            ffi::AVColorRange::AVCOL_RANGE_UNSPECIFIED,
            ffi::AVPixelFormat::AV_PIX_FMT_YUVJ420P,
            480,
        );
        assert_eq!((j.matrix, j.full, j.untagged), ("bt709", true, false));
    }
}
