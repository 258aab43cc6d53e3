//! Raster pictures for the report: frames from the frame store scaled up,
//! action arrows drawn onto them, strips of frames, and PNG data URIs (PNG
//! via [`crate::export::encode_png`], base64 written here).

/// An RGB8 raster.
#[derive(Debug, Clone)]
pub struct Canvas {
    /// Width in pixels.
    pub width: u32,
    /// Height in pixels.
    pub height: u32,
    /// Row-major RGB bytes.
    pub rgb: Vec<u8>,
}

/// Arrow colour for inferred or code actions.
pub const ARROW: [u8; 3] = [255, 214, 10];
/// Outline drawn under arrows so they read on light and dark frames.
pub const OUTLINE: [u8; 3] = [20, 20, 20];

impl Canvas {
    /// A canvas filled with `fill`.
    pub fn new(width: u32, height: u32, fill: [u8; 3]) -> Self {
        let mut rgb = Vec::with_capacity(width as usize * height as usize * 3);
        for _ in 0..width as usize * height as usize {
            rgb.extend_from_slice(&fill);
        }
        Self { width, height, rgb }
    }

    /// A frame (`w * h * 3` RGB bytes) scaled up by an integer `scale` (nearest neighbour).
    pub fn from_frame(frame: &[u8], w: u32, h: u32, scale: u32) -> Self {
        let mut c = Self::new(w * scale, h * scale, [0, 0, 0]);
        c.blit(frame, w, h, 0, 0, scale);
        c
    }

    /// Copies a frame scaled by `scale` with its top-left corner at (`x`, `y`).
    pub fn blit(&mut self, frame: &[u8], w: u32, h: u32, x: u32, y: u32, scale: u32) {
        if frame.len() < (w * h * 3) as usize {
            return;
        }
        for ty in 0..h * scale {
            let cy = y + ty;
            if cy >= self.height {
                break;
            }
            let sy = ty / scale;
            for tx in 0..w * scale {
                let cx = x + tx;
                if cx >= self.width {
                    break;
                }
                let s = ((sy * w + tx / scale) * 3) as usize;
                let d = ((cy * self.width + cx) * 3) as usize;
                self.rgb[d..d + 3].copy_from_slice(&frame[s..s + 3]);
            }
        }
    }

    /// Sets one pixel (ignored outside the canvas).
    pub fn put(&mut self, x: i64, y: i64, color: [u8; 3]) {
        if x >= 0 && y >= 0 && (x as u32) < self.width && (y as u32) < self.height {
            let d = ((y as u32 * self.width + x as u32) * 3) as usize;
            self.rgb[d..d + 3].copy_from_slice(&color);
        }
    }

    /// A filled disc of radius `r` at (`cx`, `cy`).
    pub fn disc(&mut self, cx: f64, cy: f64, r: f64, color: [u8; 3]) {
        let (x0, x1) = ((cx - r).floor() as i64, (cx + r).ceil() as i64);
        let (y0, y1) = ((cy - r).floor() as i64, (cy + r).ceil() as i64);
        for y in y0..=y1 {
            for x in x0..=x1 {
                let (dx, dy) = (x as f64 + 0.5 - cx, y as f64 + 0.5 - cy);
                if dx * dx + dy * dy <= r * r {
                    self.put(x, y, color);
                }
            }
        }
    }

    /// A line of width `2 * r` from (`x0`, `y0`) to (`x1`, `y1`).
    pub fn line(&mut self, x0: f64, y0: f64, x1: f64, y1: f64, r: f64, color: [u8; 3]) {
        let len = ((x1 - x0).powi(2) + (y1 - y0).powi(2)).sqrt();
        let steps = (len * 2.0).ceil().max(1.0) as usize;
        for i in 0..=steps {
            let t = i as f64 / steps as f64;
            self.disc(x0 + (x1 - x0) * t, y0 + (y1 - y0) * t, r, color);
        }
    }

    /// An arrow from (`x`, `y`) by (`dx`, `dy`) pixels, outlined; a dot when
    /// the arrow is shorter than two pixels.
    pub fn arrow(&mut self, x: f64, y: f64, dx: f64, dy: f64, color: [u8; 3]) {
        let len = (dx * dx + dy * dy).sqrt();
        if !len.is_finite() || len < 2.0 {
            self.disc(x, y, 3.5, OUTLINE);
            self.disc(x, y, 2.5, color);
            return;
        }
        let (ux, uy) = (dx / len, dy / len);
        let head = (len * 0.35).clamp(4.0, 10.0);
        let (tx, ty) = (x + dx, y + dy);
        let wings = [
            (
                tx - head * (ux * 0.87 - uy * 0.5),
                ty - head * (uy * 0.87 + ux * 0.5),
            ),
            (
                tx - head * (ux * 0.87 + uy * 0.5),
                ty - head * (uy * 0.87 - ux * 0.5),
            ),
        ];
        for (r, c) in [(2.4, OUTLINE), (1.3, color)] {
            self.line(x, y, tx, ty, r, c);
            for (wx, wy) in wings {
                self.line(tx, ty, wx, wy, r, c);
            }
        }
    }

    /// The canvas as a PNG data URI; `None` when encoding fails.
    pub fn data_uri(&self) -> Option<String> {
        png_data_uri(&self.rgb, self.width, self.height)
    }
}

/// PNG data URI of RGB bytes.
pub fn png_data_uri(rgb: &[u8], width: u32, height: u32) -> Option<String> {
    let png = crate::export::encode_png(rgb, width, height).ok()?;
    Some(format!("data:image/png;base64,{}", base64(&png)))
}

/// Standard base64 (RFC 4648, with padding).
pub fn base64(bytes: &[u8]) -> String {
    const T: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut out = String::with_capacity(bytes.len().div_ceil(3) * 4);
    for chunk in bytes.chunks(3) {
        let b = [
            chunk[0],
            *chunk.get(1).unwrap_or(&0),
            *chunk.get(2).unwrap_or(&0),
        ];
        let n = (b[0] as u32) << 16 | (b[1] as u32) << 8 | b[2] as u32;
        out.push(T[(n >> 18) as usize & 63] as char);
        out.push(T[(n >> 12) as usize & 63] as char);
        out.push(if chunk.len() > 1 {
            T[(n >> 6) as usize & 63] as char
        } else {
            '='
        });
        out.push(if chunk.len() > 2 {
            T[n as usize & 63] as char
        } else {
            '='
        });
    }
    out
}

/// Index of the x-like and y-like action dimensions (`dx`/`x`..., else the
/// first two); `None` with fewer than two dimensions.
pub fn planar_dims(dims: &[String]) -> Option<(usize, usize)> {
    let find = |names: &[&str]| {
        dims.iter()
            .position(|d| names.contains(&d.to_ascii_lowercase().as_str()))
    };
    match (
        find(&["dx", "x", "vx", "delta_x"]),
        find(&["dy", "y", "vy", "delta_y"]),
    ) {
        (Some(x), Some(y)) if x != y => Some((x, y)),
        _ if dims.len() >= 2 => Some((0, 1)),
        _ => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn base64_matches_rfc4648_test_vectors() {
        // RFC 4648 section 10 test vectors.
        for (i, o) in [
            ("", ""),
            ("f", "Zg=="),
            ("fo", "Zm8="),
            ("foo", "Zm9v"),
            ("foob", "Zm9vYg=="),
            ("fooba", "Zm9vYmE="),
            ("foobar", "Zm9vYmFy"),
        ] {
            assert_eq!(base64(i.as_bytes()), o);
        }
    }

    #[test]
    fn arrow_marks_pixels_along_its_direction() {
        let mut c = Canvas::new(40, 40, [0, 0, 0]);
        c.arrow(10.0, 20.0, 20.0, 0.0, ARROW);
        let px =
            |x: u32, y: u32| &c.rgb[((y * 40 + x) * 3) as usize..((y * 40 + x) * 3 + 3) as usize];
        assert_eq!(px(20, 20), ARROW);
        assert_eq!(px(20, 5), [0, 0, 0]);
    }

    #[test]
    fn scaled_frame_repeats_pixels() {
        let frame = [1, 2, 3, 4, 5, 6];
        let c = Canvas::from_frame(&frame, 2, 1, 2);
        assert_eq!((c.width, c.height), (4, 2));
        assert_eq!(&c.rgb[..12], &[1, 2, 3, 1, 2, 3, 4, 5, 6, 4, 5, 6]);
    }

    #[test]
    fn planar_dims_prefer_names() {
        let d = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        assert_eq!(planar_dims(&d(&["grip", "dy", "dx"])), Some((2, 1)));
        assert_eq!(planar_dims(&d(&["a", "b"])), Some((0, 1)));
        assert_eq!(planar_dims(&d(&["a"])), None);
    }
}
