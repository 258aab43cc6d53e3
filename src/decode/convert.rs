//! Picture geometry and conversion of one decoded frame to the output RGB.
//!
//! The crop (or letterbox) is planned in upright coordinates and mapped back
//! onto the coded picture. A frame is cropped in its own pixel format (plane
//! pointer offsets, no copy), converted from YUV to RGB *and* resized by one
//! swscale call in the coded orientation with the clip's matrix and range,
//! then rotated upright while it is copied into the output frame. With no crop
//! and no rotation this is exactly what the FFmpeg CLI's `scale` filter does,
//! so its output can serve as a reference.

use std::ffi::c_int;
use std::ptr;

use ffmpeg_next::ffi;

use super::probe::Colour;
use super::{Crop, Scaler};

/// A rectangle in pixels.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Rect {
    pub x: u32,
    pub y: u32,
    pub w: u32,
    pub h: u32,
}

/// Where the pixels of one source frame go.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Geometry {
    /// Degrees clockwise that make the picture upright.
    pub rotation: i32,
    /// Region of the coded picture that is used.
    pub crop: Rect,
    /// Size swscale produces, in the coded orientation.
    pub scaled: (u32, u32),
    /// Top-left corner of the upright scaled picture inside the output.
    pub place: (u32, u32),
    /// Output size.
    pub out: (u32, u32),
}

/// Plans the geometry; `Err(upright size)` when a fixed box does not fit.
pub(crate) fn plan(
    coded: (u32, u32),
    rotation: i32,
    crop: Crop,
    out: (u32, u32),
) -> Result<Geometry, (u32, u32)> {
    let turned = rotation % 180 == 90;
    let (uw, uh) = if turned { (coded.1, coded.0) } else { coded };
    let (ow, oh) = out;
    // Box in upright coordinates, the size it is scaled to, and where it goes.
    let (upright_box, content, place) = match crop {
        Crop::Center => {
            let b = if uw as u64 * oh as u64 > uh as u64 * ow as u64 {
                let w = ((uh as f64 * ow as f64 / oh as f64).round() as u32).clamp(1, uw);
                Rect {
                    x: (uw - w) / 2,
                    y: 0,
                    w,
                    h: uh,
                }
            } else {
                let h = ((uw as f64 * oh as f64 / ow as f64).round() as u32).clamp(1, uh);
                Rect {
                    x: 0,
                    y: (uh - h) / 2,
                    w: uw,
                    h,
                }
            };
            (b, out, (0, 0))
        }
        Crop::None => {
            let s = (ow as f64 / uw as f64).min(oh as f64 / uh as f64);
            let cw = ((uw as f64 * s).round() as u32).clamp(1, ow);
            let ch = ((uh as f64 * s).round() as u32).clamp(1, oh);
            (
                Rect {
                    x: 0,
                    y: 0,
                    w: uw,
                    h: uh,
                },
                (cw, ch),
                ((ow - cw) / 2, (oh - ch) / 2),
            )
        }
        Crop::Box { x, y, w, h } => {
            let fits = w > 0
                && h > 0
                && x as u64 + w as u64 <= uw as u64
                && y as u64 + h as u64 <= uh as u64;
            if !fits {
                return Err((uw, uh));
            }
            (Rect { x, y, w, h }, out, (0, 0))
        }
    };
    let (cw, ch) = coded;
    let b = upright_box;
    let crop = match rotation {
        90 => Rect {
            x: b.y,
            y: ch - b.x - b.w,
            w: b.h,
            h: b.w,
        },
        180 => Rect {
            x: cw - b.x - b.w,
            y: ch - b.y - b.h,
            w: b.w,
            h: b.h,
        },
        270 => Rect {
            x: cw - b.y - b.h,
            y: b.x,
            w: b.h,
            h: b.w,
        },
        _ => b,
    };
    let scaled = if turned {
        (content.1, content.0)
    } else {
        content
    };
    Ok(Geometry {
        rotation,
        crop,
        scaled,
        place,
        out,
    })
}

/// swscale flags for a scaler. Accurate rounding and full-resolution chroma
/// interpolation keep YUV to RGB within about a level of the exact BT.601 /
/// BT.709 result (swscale's fast path is off by up to ~5 levels on saturated
/// colours); the FFmpeg CLI gives the same output with
/// `scale=...:flags=area+accurate_rnd+full_chroma_int`.
pub(crate) fn sws_flags(scaler: Scaler) -> c_int {
    let filter = match scaler {
        Scaler::Area => ffi::SWS_AREA,
        Scaler::Bilinear => ffi::SWS_BILINEAR,
        Scaler::Bicubic => ffi::SWS_BICUBIC,
    };
    filter | ffi::SWS_ACCURATE_RND | ffi::SWS_FULL_CHR_H_INT
}

/// The FFmpeg CLI `scale` filter flags equal to [`sws_flags`] (for references).
pub fn cli_flags(scaler: Scaler) -> &'static str {
    match scaler {
        Scaler::Area => "area+accurate_rnd+full_chroma_int",
        Scaler::Bilinear => "bilinear+accurate_rnd+full_chroma_int",
        Scaler::Bicubic => "bicubic+accurate_rnd+full_chroma_int",
    }
}

/// Row alignment of the scaled buffer (swscale's SIMD paths like it aligned).
const ALIGN: usize = 64;

/// Converts frames of one pixel format and size to output RGB frames.
pub(crate) struct Converter {
    sws: *mut ffi::SwsContext,
    /// (pixel format, width, height) of the frames this converter accepts.
    pub input: (i32, u32, u32),
    geom: Geometry,
    scaled: *mut u8,
    stride: usize,
    out: Vec<u8>,
}

// SAFETY: the swscale context and buffer are owned exclusively by this value
// and only used through `&mut self`.
unsafe impl Send for Converter {}

impl Converter {
    /// Builds a converter for frames of `format` at `width` x `height`.
    pub fn new(
        format: i32,
        width: u32,
        height: u32,
        geom: Geometry,
        colour: Colour,
        scaler: Scaler,
    ) -> Result<Self, &'static str> {
        let (sw, sh) = geom.scaled;
        // SAFETY: `format` comes from a decoded AVFrame, so it is a valid AVPixelFormat.
        let src_fmt: ffi::AVPixelFormat = unsafe { std::mem::transmute(format) };
        let sws = unsafe {
            ffi::sws_getContext(
                geom.crop.w as c_int,
                geom.crop.h as c_int,
                src_fmt,
                sw as c_int,
                sh as c_int,
                ffi::AVPixelFormat::AV_PIX_FMT_RGB24,
                sws_flags(scaler),
                ptr::null_mut(),
                ptr::null_mut(),
                ptr::null(),
            )
        };
        if sws.is_null() {
            return Err("swscale cannot convert this pixel format to RGB");
        }
        if !colour.rgb {
            // SAFETY: the coefficient table is static inside libswscale.
            unsafe {
                let table = ffi::sws_getCoefficients(colour.sws_cs);
                ffi::sws_setColorspaceDetails(
                    sws,
                    table,
                    colour.full as c_int,
                    table,
                    1,
                    0,
                    1 << 16,
                    1 << 16,
                );
            }
        }
        let stride = (sw as usize * 3).div_ceil(ALIGN) * ALIGN;
        // Extra rows of slack: some swscale output paths write a little past the end.
        let bytes = stride * (sh as usize + 2);
        let scaled = unsafe { ffi::av_mallocz(bytes) } as *mut u8;
        if scaled.is_null() {
            unsafe { ffi::sws_freeContext(sws) };
            return Err("out of memory for the scaled frame");
        }
        Ok(Self {
            sws,
            input: (format, width, height),
            geom,
            scaled,
            stride,
            out: vec![0u8; geom.out.0 as usize * geom.out.1 as usize * 3],
        })
    }

    /// Crops `frame` in place (plane pointers only), converts and places it;
    /// returns the output RGB frame (no row padding).
    ///
    /// # Safety
    /// `frame` must be a valid decoded video frame matching [`Self::input`],
    /// not yet cropped by this function.
    pub unsafe fn convert(&mut self, frame: *mut ffi::AVFrame) -> Result<&[u8], &'static str> {
        let g = self.geom;
        // SAFETY: caller guarantees `frame` is valid and matches `input`.
        unsafe {
            let f = &mut *frame;
            let (fw, fh) = (f.width as u32, f.height as u32);
            f.crop_left = g.crop.x as _;
            f.crop_top = g.crop.y as _;
            f.crop_right = (fw - g.crop.x - g.crop.w) as _;
            f.crop_bottom = (fh - g.crop.y - g.crop.h) as _;
            if ffi::av_frame_apply_cropping(frame, ffi::AV_FRAME_CROP_UNALIGNED as c_int) < 0
                || f.width as u32 != g.crop.w
                || f.height as u32 != g.crop.h
            {
                return Err("this pixel format cannot be cropped");
            }
            let dst = [
                self.scaled,
                ptr::null_mut(),
                ptr::null_mut(),
                ptr::null_mut(),
            ];
            let dst_stride = [self.stride as c_int, 0, 0, 0];
            let rows = ffi::sws_scale(
                self.sws,
                f.data.as_ptr() as *const *const u8,
                f.linesize.as_ptr(),
                0,
                f.height,
                dst.as_ptr(),
                dst_stride.as_ptr(),
            );
            if rows <= 0 {
                return Err("swscale failed");
            }
        }
        let (sw, sh) = (g.scaled.0 as usize, g.scaled.1 as usize);
        // SAFETY: the buffer holds `stride * (sh + 2)` bytes written above.
        let src = unsafe { std::slice::from_raw_parts(self.scaled, self.stride * sh) };
        place(src, self.stride, (sw, sh), g, &mut self.out);
        Ok(&self.out)
    }
}

impl Drop for Converter {
    fn drop(&mut self) {
        // SAFETY: both were allocated in `new` and are freed once.
        unsafe {
            ffi::sws_freeContext(self.sws);
            ffi::av_free(self.scaled as *mut _);
        }
    }
}

/// Copies the scaled picture (coded orientation, padded rows) into `out`,
/// rotated upright and placed at the geometry's offset.
fn place(src: &[u8], stride: usize, (sw, sh): (usize, usize), g: Geometry, out: &mut [u8]) {
    let ow = g.out.0 as usize;
    let (px, py) = (g.place.0 as usize, g.place.1 as usize);
    // Upright size of the placed picture.
    let (uw, uh) = if g.rotation % 180 == 90 {
        (sh, sw)
    } else {
        (sw, sh)
    };
    if g.rotation == 0 {
        for y in 0..sh {
            let d = ((py + y) * ow + px) * 3;
            out[d..d + sw * 3].copy_from_slice(&src[y * stride..y * stride + sw * 3]);
        }
        return;
    }
    for yu in 0..uh {
        let row = ((py + yu) * ow + px) * 3;
        for xu in 0..uw {
            let (xs, ys) = match g.rotation {
                90 => (yu, sh - 1 - xu),
                180 => (sw - 1 - xu, sh - 1 - yu),
                _ => (sw - 1 - yu, xu),
            };
            let s = ys * stride + xs * 3;
            let d = row + xu * 3;
            out[d..d + 3].copy_from_slice(&src[s..s + 3]);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn center_crop_of_wide_source() {
        let g = plan((640, 480), 0, Crop::Center, (64, 64)).unwrap();
        assert_eq!(
            g.crop,
            Rect {
                x: 80,
                y: 0,
                w: 480,
                h: 480
            }
        );
        assert_eq!(g.scaled, (64, 64));
    }

    #[test]
    fn letterbox_pads_tall_sides() {
        let g = plan((640, 480), 0, Crop::None, (64, 64)).unwrap();
        assert_eq!(
            g.crop,
            Rect {
                x: 0,
                y: 0,
                w: 640,
                h: 480
            }
        );
        assert_eq!((g.scaled, g.place), ((64, 48), (0, 8)));
    }

    #[test]
    fn box_maps_back_through_rotation() {
        // Coded 100x60 shown turned 90 degrees clockwise: upright 60x100.
        let b = Crop::Box {
            x: 10,
            y: 20,
            w: 30,
            h: 40,
        };
        let g = plan((100, 60), 90, b, (30, 40)).unwrap();
        // Upright (x', y') = coded (y', 59 - x'): x' in 10..40 -> coded y in 20..50.
        assert_eq!(
            g.crop,
            Rect {
                x: 20,
                y: 20,
                w: 40,
                h: 30
            }
        );
        assert_eq!(g.scaled, (40, 30));
        let g = plan((100, 60), 270, b, (30, 40)).unwrap();
        // Upright (x', y') = coded (99 - y', x').
        assert_eq!(
            g.crop,
            Rect {
                x: 40,
                y: 10,
                w: 40,
                h: 30
            }
        );
        assert!(
            plan(
                (100, 60),
                0,
                Crop::Box {
                    x: 90,
                    y: 0,
                    w: 20,
                    h: 10
                },
                (8, 8)
            )
            .is_err()
        );
    }

    #[test]
    fn place_rotates_clockwise() {
        // 2x1 scaled picture [A B] turned 90 clockwise becomes a 1x2 column [A; B].
        let g = Geometry {
            rotation: 90,
            crop: Rect {
                x: 0,
                y: 0,
                w: 1,
                h: 2,
            },
            scaled: (2, 1),
            place: (0, 0),
            out: (1, 2),
        };
        let src = [1, 1, 1, 2, 2, 2];
        let mut out = [0u8; 6];
        place(&src, 6, (2, 1), g, &mut out);
        assert_eq!(out, [1, 1, 1, 2, 2, 2]);
        let g270 = Geometry { rotation: 270, ..g };
        place(&src, 6, (2, 1), g270, &mut out);
        assert_eq!(out, [2, 2, 2, 1, 1, 1]);
    }
}
