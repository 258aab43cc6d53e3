//! Rasteriser for the demo scene: signed-distance shapes with analytic
//! anti-aliasing (coverage = clamp(0.5 − distance in pixels)), so sub-pixel
//! motion shows up as smooth edge changes, painted back to front over a
//! per-clip table texture and multiplied by a per-clip lighting map.

use super::rng::Rng;
use super::scene::{Block, Embodiment, FrameState, Kind};

type V2 = [f64; 2];
type Rgb = [f32; 3];

/// Per-clip appearance: table, lighting, effector colours, camera extras.
#[derive(Debug, Clone)]
pub(crate) struct Look {
    table: Rgb,
    /// Texture direction (unit), frequencies and phase.
    grain: (V2, f64, f64, f64),
    gain: f32,
    tint: Rgb,
    /// Lighting change per cm across the table (x, y).
    gradient: [f32; 2],
    vignette: f32,
    /// Shadow offset per cm of height above the table.
    shadow_dir: V2,
    skin: Rgb,
    sleeve: Rgb,
    /// Human shoulder x position (cm) and thumb side (+1 / −1).
    shoulder_x: f64,
    thumb: f64,
}

const SKIN: [Rgb; 6] = [
    [0.95, 0.80, 0.69],
    [0.90, 0.70, 0.57],
    [0.80, 0.60, 0.45],
    [0.66, 0.47, 0.33],
    [0.50, 0.34, 0.23],
    [0.36, 0.25, 0.18],
];
const SLEEVE: [Rgb; 6] = [
    [0.20, 0.24, 0.45],
    [0.55, 0.12, 0.16],
    [0.22, 0.40, 0.25],
    [0.15, 0.15, 0.17],
    [0.70, 0.70, 0.72],
    [0.45, 0.35, 0.55],
];

impl Look {
    /// Draws a clip's appearance for an embodiment.
    pub(crate) fn sample(kind: Kind, rng: &mut Rng) -> Self {
        let a = rng.range(0.0, std::f64::consts::TAU);
        let jitter = |rng: &mut Rng, c: Rgb, s: f64| -> Rgb {
            let j = rng.range(-s, s) as f32;
            [c[0] + j, c[1] + j, c[2] + j]
        };
        let s = rng.range(0.0, std::f64::consts::TAU);
        match kind {
            // A lab bench: cool grey-green mat under even overhead light.
            Kind::Robot => Self {
                table: jitter(rng, [0.58, 0.63, 0.61], 0.04),
                grain: ([a.cos(), a.sin()], 0.35, 0.11, rng.range(0.0, 6.3)),
                gain: rng.range(0.95, 1.08) as f32,
                tint: [
                    rng.range(0.98, 1.02) as f32,
                    1.0,
                    rng.range(1.0, 1.05) as f32,
                ],
                gradient: [
                    rng.range(-0.002, 0.002) as f32,
                    rng.range(-0.002, 0.002) as f32,
                ],
                vignette: 0.05,
                shadow_dir: [0.15 * s.cos(), 0.15 * s.sin()],
                skin: SKIN[0],
                sleeve: SLEEVE[0],
                shoulder_x: 0.0,
                thumb: 1.0,
            },
            // A wooden kitchen table under warm, uneven light.
            Kind::Human => Self {
                table: jitter(rng, [0.62, 0.45, 0.30], 0.05),
                grain: ([a.cos(), a.sin()], 1.7, 0.23, rng.range(0.0, 6.3)),
                gain: rng.range(0.78, 1.0) as f32,
                tint: [
                    rng.range(1.03, 1.09) as f32,
                    rng.range(0.97, 1.0) as f32,
                    rng.range(0.82, 0.9) as f32,
                ],
                gradient: [
                    rng.range(-0.008, 0.008) as f32,
                    rng.range(-0.008, 0.008) as f32,
                ],
                vignette: 0.22,
                shadow_dir: [0.3 * s.cos(), 0.3 * s.sin()],
                skin: *rng.pick(&SKIN),
                sleeve: *rng.pick(&SLEEVE),
                shoulder_x: rng.range(-12.0, 12.0),
                thumb: if rng.chance(0.5) { 1.0 } else { -1.0 },
            },
        }
    }
}

#[derive(Debug, Clone, Copy)]
enum Shape {
    Circle {
        c: V2,
        r: f64,
    },
    Capsule {
        a: V2,
        b: V2,
        r: f64,
    },
    /// Rounded box with axis `u` (unit), half extents along `u` and its normal.
    Box {
        c: V2,
        u: V2,
        half: V2,
        round: f64,
    },
    /// Ellipse with axis `u` (unit) and radii along `u` and its normal.
    Ellipse {
        c: V2,
        u: V2,
        radii: V2,
    },
}

impl Shape {
    /// Signed distance in cm (negative inside).
    fn sdf(&self, p: V2) -> f64 {
        match *self {
            Shape::Circle { c, r } => len(sub(p, c)) - r,
            Shape::Capsule { a, b, r } => {
                let pa = sub(p, a);
                let ba = sub(b, a);
                let h = (dot(pa, ba) / dot(ba, ba).max(1e-12)).clamp(0.0, 1.0);
                len(sub(pa, scale(ba, h))) - r
            }
            Shape::Box { c, u, half, round } => {
                let d = sub(p, c);
                let q = [
                    dot(d, u).abs() - half[0] + round,
                    dot(d, perp(u)).abs() - half[1] + round,
                ];
                len([q[0].max(0.0), q[1].max(0.0)]) + q[0].max(q[1]).min(0.0) - round
            }
            Shape::Ellipse { c, u, radii } => {
                let d = sub(p, c);
                let l = [dot(d, u), dot(d, perp(u))];
                let k0 = len([l[0] / radii[0], l[1] / radii[1]]);
                let k1 = len([l[0] / (radii[0] * radii[0]), l[1] / (radii[1] * radii[1])]);
                if k1 < 1e-12 {
                    -radii[0].min(radii[1])
                } else {
                    k0 * (k0 - 1.0) / k1
                }
            }
        }
    }

    /// Bounding radius around a centre, for pixel bounding boxes.
    fn bounds(&self) -> (V2, V2) {
        match *self {
            Shape::Circle { c, r } => ([c[0] - r, c[1] - r], [c[0] + r, c[1] + r]),
            Shape::Capsule { a, b, r } => (
                [a[0].min(b[0]) - r, a[1].min(b[1]) - r],
                [a[0].max(b[0]) + r, a[1].max(b[1]) + r],
            ),
            Shape::Box { c, half, .. } => {
                let r = len(half);
                ([c[0] - r, c[1] - r], [c[0] + r, c[1] + r])
            }
            Shape::Ellipse { c, radii, .. } => {
                let r = radii[0].max(radii[1]);
                ([c[0] - r, c[1] - r], [c[0] + r, c[1] + r])
            }
        }
    }

    fn shifted(self, o: V2) -> Self {
        match self {
            Shape::Circle { c, r } => Shape::Circle { c: add(c, o), r },
            Shape::Capsule { a, b, r } => Shape::Capsule {
                a: add(a, o),
                b: add(b, o),
                r,
            },
            Shape::Box { c, u, half, round } => Shape::Box {
                c: add(c, o),
                u,
                half,
                round,
            },
            Shape::Ellipse { c, u, radii } => Shape::Ellipse {
                c: add(c, o),
                u,
                radii,
            },
        }
    }
}

/// Renders the frames of one clip.
pub(crate) struct Renderer {
    size: usize,
    /// Pixels per cm.
    scale: f64,
    half_view: f64,
    kind: Kind,
    look: Look,
    /// Table albedo per pixel.
    background: Vec<Rgb>,
    /// Lighting multiplier per pixel.
    light: Vec<Rgb>,
}

impl Renderer {
    /// Prepares the static table and lighting of a clip.
    pub(crate) fn new(body: &Embodiment, size: u32, look: Look) -> Self {
        let size = size as usize;
        let scale = size as f64 / body.view_cm;
        let half_view = body.view_cm * 0.5;
        let mut background = Vec::with_capacity(size * size);
        let mut light = Vec::with_capacity(size * size);
        let (dir, f1, f2, phase) = look.grain;
        for j in 0..size {
            for i in 0..size {
                let p = [
                    (i as f64 + 0.5) / scale - half_view,
                    (j as f64 + 0.5) / scale - half_view,
                ];
                let along = dot(p, dir);
                let across = dot(p, perp(dir));
                let t = look.table;
                let shade = match body.kind {
                    // Faint 5 cm grid and slow mottling.
                    Kind::Robot => {
                        let gx = ((p[0] / 5.0).round() * 5.0 - p[0]).abs();
                        let gy = ((p[1] / 5.0).round() * 5.0 - p[1]).abs();
                        let line = (0.5 - (gx.min(gy) - 0.08) * scale).clamp(0.0, 1.0);
                        1.0 - 0.05 * line + 0.02 * (along * f2 + phase).sin()
                    }
                    // Wood grain: wavy stripes along the plank.
                    Kind::Human => {
                        let w = (across * f1 + 1.5 * (along * f2 + phase).sin()).sin();
                        1.0 + 0.06 * w + 0.03 * (across * 0.4 + phase).sin()
                    }
                };
                let shade = shade as f32;
                background.push([t[0] * shade, t[1] * shade, t[2] * shade]);
                let r2 = ((p[0] * p[0] + p[1] * p[1]) / (half_view * half_view)) as f32;
                let l = look.gain
                    * (1.0 + look.gradient[0] * p[0] as f32 + look.gradient[1] * p[1] as f32)
                    * (1.0 - look.vignette * 0.5 * r2);
                light.push([l * look.tint[0], l * look.tint[1], l * look.tint[2]]);
            }
        }
        Self {
            size,
            scale,
            half_view,
            kind: body.kind,
            look,
            background,
            light,
        }
    }

    /// One frame as packed RGB24, rows top to bottom.
    pub(crate) fn render(&self, state: &FrameState, blocks: &[Block]) -> Vec<u8> {
        let mut img = self.background.clone();
        let sd = self.look.shadow_dir;

        let block_shapes: Vec<(Shape, Rgb)> = state
            .blocks
            .iter()
            .zip(blocks)
            .map(|(c, b)| {
                let shape = Shape::Box {
                    c: *c,
                    u: [1.0, 0.0],
                    half: [b.half, b.half],
                    round: 0.4,
                };
                (shape, b.color)
            })
            .collect();
        // Blocks are about 4 cm tall, the effector floats about 8 cm up.
        let block_shadow: Vec<Shape> = block_shapes
            .iter()
            .map(|(s, _)| s.shifted(scale(sd, 4.0)))
            .collect();
        self.shadow(&mut img, &block_shadow, 1.2, 0.28);
        for (s, col) in &block_shapes {
            // A darker rim, then the top face.
            let dark = [col[0] * 0.7, col[1] * 0.7, col[2] * 0.7];
            self.fill(&mut img, s, dark);
            if let Shape::Box { c, u, half, round } = *s {
                let inner = Shape::Box {
                    c,
                    u,
                    half: [half[0] - 0.35, half[1] - 0.35],
                    round,
                };
                self.fill(&mut img, &inner, *col);
            }
        }

        let parts = match self.kind {
            Kind::Robot => self.gripper(state),
            Kind::Human => self.hand(state),
        };
        let shadow: Vec<Shape> = parts
            .iter()
            .map(|(s, _)| s.shifted(scale(sd, 8.0)))
            .collect();
        self.shadow(&mut img, &shadow, 2.5, 0.3);
        for (s, col) in &parts {
            self.fill(&mut img, s, *col);
        }

        let mut out = Vec::with_capacity(self.size * self.size * 3);
        for (c, l) in img.iter().zip(&self.light) {
            for k in 0..3 {
                out.push(((c[k] * l[k]).clamp(0.0, 1.0) * 255.0).round() as u8);
            }
        }
        out
    }

    /// The robot: an arm from beyond the top edge, a wrist with an orange
    /// marker and two fingers whose gap shows the gripper state.
    fn gripper(&self, state: &FrameState) -> Vec<(Shape, Rgb)> {
        let p = state.effector;
        let base = [0.0, -(self.half_view + 8.0)];
        let u = unit(sub(p, base));
        let v = perp(u);
        let wrist = sub(p, scale(u, 3.2));
        let gap = if state.closed { 1.15 } else { 3.8 };
        let metal = [0.62, 0.64, 0.67];
        let finger = [0.30, 0.31, 0.34];
        let mut parts = vec![
            (
                Shape::Capsule {
                    a: base,
                    b: wrist,
                    r: 1.5,
                },
                [0.24, 0.26, 0.29],
            ),
            (Shape::Circle { c: wrist, r: 2.3 }, metal),
            (Shape::Circle { c: wrist, r: 0.9 }, [0.95, 0.52, 0.10]),
            (
                Shape::Box {
                    c: sub(p, scale(u, 1.3)),
                    u,
                    half: [0.55, 2.6],
                    round: 0.2,
                },
                metal,
            ),
        ];
        for side in [-1.0, 1.0] {
            parts.push((
                Shape::Box {
                    c: add(add(p, scale(v, side * gap * 0.5)), scale(u, 0.5)),
                    u,
                    half: [1.6, 0.5],
                    round: 0.25,
                },
                finger,
            ));
        }
        parts
    }

    /// The human: a sleeved forearm from beyond the bottom edge and a hand that
    /// is open (spread fingers) or closed (a fist with knuckles).
    fn hand(&self, state: &FrameState) -> Vec<(Shape, Rgb)> {
        let look = &self.look;
        let p = state.effector;
        let shoulder = [look.shoulder_x, self.half_view + 22.0];
        let u = unit(sub(p, shoulder));
        let v = perp(u);
        let skin = look.skin;
        let crease = [skin[0] * 0.78, skin[1] * 0.78, skin[2] * 0.78];
        let at = |du: f64, dv: f64| add(add(p, scale(u, du)), scale(v, dv));
        let mut parts = vec![
            (
                Shape::Capsule {
                    a: shoulder,
                    b: at(-4.8, 0.0),
                    r: 2.9,
                },
                look.sleeve,
            ),
            (
                Shape::Capsule {
                    a: at(-5.4, 0.0),
                    b: at(-2.0, 0.0),
                    r: 2.1,
                },
                skin,
            ),
        ];
        let side = look.thumb;
        if state.closed {
            parts.push((
                Shape::Ellipse {
                    c: at(0.3, 0.0),
                    u,
                    radii: [3.2, 3.1],
                },
                skin,
            ));
            for o in [-1.8, -0.6, 0.6, 1.8] {
                parts.push((
                    Shape::Circle {
                        c: at(2.6, o),
                        r: 0.95,
                    },
                    crease,
                ));
                parts.push((
                    Shape::Circle {
                        c: at(2.5, o),
                        r: 0.75,
                    },
                    skin,
                ));
            }
            parts.push((
                Shape::Capsule {
                    a: at(-0.4, side * 2.5),
                    b: at(1.6, side * 0.6),
                    r: 0.85,
                },
                crease,
            ));
        } else {
            parts.push((
                Shape::Ellipse {
                    c: p,
                    u,
                    radii: [3.4, 3.0],
                },
                skin,
            ));
            let fingers = [
                (-2.1, 3.1, -0.16),
                (-0.7, 3.9, -0.05),
                (0.7, 4.1, 0.05),
                (2.1, 3.4, 0.16),
            ];
            for (o, length, spread) in fingers {
                let a = at(2.4, o);
                let dir = unit(add(u, scale(v, spread)));
                let b = add(a, scale(dir, length));
                parts.push((Shape::Capsule { a, b, r: 0.82 }, crease));
                parts.push((Shape::Capsule { a, b, r: 0.62 }, skin));
            }
            let a = at(-0.6, side * 2.4);
            let dir = unit(add(scale(u, 0.6), scale(v, side * 0.8)));
            parts.push((
                Shape::Capsule {
                    a,
                    b: add(a, scale(dir, 3.3)),
                    r: 0.85,
                },
                skin,
            ));
        }
        parts
    }

    /// Pixel box (inclusive start, exclusive end) covering `shape` plus `pad` px.
    fn pixel_box(&self, shape: &Shape, pad: f64) -> (usize, usize, usize, usize) {
        let (lo, hi) = shape.bounds();
        let to_px = |x: f64| (x + self.half_view) * self.scale;
        let clampi = |x: f64| x.clamp(0.0, self.size as f64) as usize;
        (
            clampi((to_px(lo[0]) - pad).floor()),
            clampi((to_px(hi[0]) + pad).ceil()),
            clampi((to_px(lo[1]) - pad).floor()),
            clampi((to_px(hi[1]) + pad).ceil()),
        )
    }

    fn point(&self, i: usize, j: usize) -> V2 {
        [
            (i as f64 + 0.5) / self.scale - self.half_view,
            (j as f64 + 0.5) / self.scale - self.half_view,
        ]
    }

    /// Paints an opaque shape with anti-aliased edges.
    fn fill(&self, img: &mut [Rgb], shape: &Shape, col: Rgb) {
        let (x0, x1, y0, y1) = self.pixel_box(shape, 1.0);
        for j in y0..y1 {
            for i in x0..x1 {
                let d = shape.sdf(self.point(i, j)) * self.scale;
                let a = (0.5 - d).clamp(0.0, 1.0) as f32;
                if a > 0.0 {
                    let px = &mut img[j * self.size + i];
                    for k in 0..3 {
                        px[k] += (col[k] - px[k]) * a;
                    }
                }
            }
        }
    }

    /// Darkens under the union of `shapes` with a soft edge `soft` px wide.
    fn shadow(&self, img: &mut [Rgb], shapes: &[Shape], soft: f64, strength: f32) {
        let mut mask = vec![0.0f32; self.size * self.size];
        for shape in shapes {
            let (x0, x1, y0, y1) = self.pixel_box(shape, soft + 1.0);
            for j in y0..y1 {
                for i in x0..x1 {
                    let d = shape.sdf(self.point(i, j)) * self.scale;
                    let a = (0.5 - d / soft).clamp(0.0, 1.0) as f32;
                    let m = &mut mask[j * self.size + i];
                    *m = m.max(a);
                }
            }
        }
        for (px, m) in img.iter_mut().zip(&mask) {
            let f = 1.0 - strength * m;
            for c in px.iter_mut() {
                *c *= f;
            }
        }
    }
}

fn add(a: V2, b: V2) -> V2 {
    [a[0] + b[0], a[1] + b[1]]
}
fn sub(a: V2, b: V2) -> V2 {
    [a[0] - b[0], a[1] - b[1]]
}
fn scale(a: V2, s: f64) -> V2 {
    [a[0] * s, a[1] * s]
}
fn dot(a: V2, b: V2) -> f64 {
    a[0] * b[0] + a[1] * b[1]
}
fn len(a: V2) -> f64 {
    dot(a, a).sqrt()
}
fn perp(a: V2) -> V2 {
    [-a[1], a[0]]
}
fn unit(a: V2) -> V2 {
    let l = len(a).max(1e-12);
    [a[0] / l, a[1] / l]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sdf_signs_and_distances() {
        let c = Shape::Circle {
            c: [0.0, 0.0],
            r: 1.0,
        };
        assert!((c.sdf([2.0, 0.0]) - 1.0).abs() < 1e-12);
        let b = Shape::Box {
            c: [0.0, 0.0],
            u: [1.0, 0.0],
            half: [2.0, 1.0],
            round: 0.0,
        };
        assert!((b.sdf([3.0, 0.0]) - 1.0).abs() < 1e-12);
        assert!((b.sdf([0.0, 0.0]) + 1.0).abs() < 1e-12);
        let e = Shape::Ellipse {
            c: [0.0, 0.0],
            u: [1.0, 0.0],
            radii: [2.0, 1.0],
        };
        assert!(e.sdf([2.0, 0.0]).abs() < 1e-9);
        assert!(e.sdf([0.0, 0.5]) < 0.0 && e.sdf([0.0, 1.5]) > 0.0);
    }

    #[test]
    fn grip_state_changes_the_image() {
        for kind in [Kind::Robot, Kind::Human] {
            let body = Embodiment::of(kind);
            let look = Look::sample(kind, &mut Rng::new(1));
            let r = Renderer::new(&body, 96, look);
            let mut s = FrameState {
                effector: [0.0, 0.0],
                closed: false,
                blocks: vec![],
            };
            let open = r.render(&s, &[]);
            s.closed = true;
            let closed = r.render(&s, &[]);
            let changed = open.iter().zip(&closed).filter(|(a, b)| a != b).count();
            assert!(changed > 30, "{kind:?}: {changed} bytes changed");
        }
    }
}
