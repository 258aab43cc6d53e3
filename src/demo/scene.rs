//! The simulated tabletop: an effector (robot gripper or human hand) seen from
//! above, pushing square blocks around, stepped on the action-log grid.
//!
//! Units are table centimetres, `x` to the right of the image and `y` towards
//! its bottom edge, origin at the view centre. The effector's motion is
//! integrated from per-tick deltas stored as integers in units of
//! [`MICRO_PER_CM`]⁻¹ cm, so the logged deltas (printed with four decimals) sum
//! exactly to the displacement the frames show. Blocks are kinematic: the
//! effector's collision disc pushes them out of its way; blocks push each other
//! and stay on the visible table.

use super::rng::Rng;

/// Integer action units per centimetre (deltas are multiples of 1e-4 cm).
pub(crate) const MICRO_PER_CM: i64 = 10_000;

/// Which embodiment a clip shows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Kind {
    Robot,
    Human,
}

/// How an embodiment moves and how its camera frames the table.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Embodiment {
    pub kind: Kind,
    /// Width (and height) of the visible table in cm.
    pub view_cm: f64,
    /// Speed multiplier on the shared motion plan (accelerations scale by its square).
    pub speed: f64,
    /// Radius of the disc that pushes blocks, in cm.
    pub collider_cm: f64,
}

/// Robot camera: 32 cm of table across the image (3 px/cm at 96 px).
pub(crate) const ROBOT_VIEW_CM: f64 = 32.0;
/// Human camera: 40 cm of table across the image (2.4 px/cm at 96 px).
pub(crate) const HUMAN_VIEW_CM: f64 = 40.0;
/// Human motion is this many times faster than the robot's, in cm/s.
pub(crate) const HUMAN_SPEED: f64 = 1.8;

impl Embodiment {
    /// The fixed parameters of an embodiment.
    pub(crate) fn of(kind: Kind) -> Self {
        match kind {
            Kind::Robot => Self {
                kind,
                view_cm: ROBOT_VIEW_CM,
                speed: 1.0,
                collider_cm: 2.4,
            },
            Kind::Human => Self {
                kind,
                view_cm: HUMAN_VIEW_CM,
                speed: HUMAN_SPEED,
                collider_cm: 3.4,
            },
        }
    }

    /// How far from the view centre the effector may go, per axis.
    fn effector_limit(&self) -> f64 {
        self.view_cm * 0.5 - self.view_cm * 0.12
    }
}

/// A block's fixed look and size.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Block {
    /// Half the side of the square, cm.
    pub half: f64,
    /// Albedo, linear 0..1 per channel.
    pub color: [f32; 3],
}

/// What one video frame shows.
#[derive(Debug, Clone)]
pub(crate) struct FrameState {
    /// Effector reference point (gripper pad centre, palm centre), cm.
    pub effector: [f64; 2],
    /// Gripper fingers or hand closed.
    pub closed: bool,
    /// Block centres, cm, in the order of [`Simulation::blocks`].
    pub blocks: Vec<[f64; 2]>,
}

/// A simulated clip: the per-tick action log and the per-frame scene states.
#[derive(Debug, Clone)]
pub(crate) struct Simulation {
    /// Per tick: effector delta over the tick, in 1e-4 cm.
    pub deltas: Vec<[i64; 2]>,
    /// Per tick: gripper command in force (1 = closed).
    pub grip: Vec<u8>,
    /// Per frame: what the camera sees at the frame's time.
    pub frames: Vec<FrameState>,
    pub blocks: Vec<Block>,
}

const BLOCK_COLORS: [[f32; 3]; 8] = [
    [0.80, 0.16, 0.14],
    [0.16, 0.36, 0.78],
    [0.18, 0.62, 0.26],
    [0.92, 0.78, 0.16],
    [0.94, 0.50, 0.12],
    [0.52, 0.26, 0.66],
    [0.10, 0.62, 0.64],
    [0.90, 0.90, 0.88],
];

enum Goal {
    Move { target: [f64; 2], speed: f64 },
    Pause { ticks: u32 },
}

/// Simulates `frames` frames with `ratio` log ticks per frame at `log_rate` Hz.
pub(crate) fn simulate(
    body: &Embodiment,
    frames: usize,
    ratio: usize,
    log_rate: f64,
    rng: &mut Rng,
) -> Simulation {
    let dt = 1.0 / log_rate;
    let limit = body.effector_limit();
    let table = body.view_cm * 0.5;
    // Per-clip variation of the operator's pace.
    let pace = body.speed * rng.range(0.85, 1.15);
    let accel = 40.0 * pace * pace;

    let n_blocks = rng.int(2, 4) as usize;
    let mut blocks = Vec::with_capacity(n_blocks);
    let mut centres: Vec<[f64; 2]> = Vec::with_capacity(n_blocks);
    let mut micro = [
        to_micro(rng.range(-limit, limit)),
        to_micro(rng.range(-limit, limit)),
    ];
    let start = from_micro(micro);
    let mut colours = BLOCK_COLORS.to_vec();
    for _ in 0..n_blocks {
        let half = rng.range(2.0, 3.0);
        let ci = rng.int(0, colours.len() as u64 - 1) as usize;
        let color = colours.remove(ci);
        // Rejection-sample a free spot (the table is roomy; give up after a while).
        let mut best = [0.0, 0.0];
        for _ in 0..200 {
            let c = [
                rng.range(-limit + 2.0, limit - 2.0),
                rng.range(-limit + 2.0, limit - 2.0),
            ];
            best = c;
            let clear_of_effector = dist(c, start) > half * 1.5 + body.collider_cm + 1.0;
            let clear_of_blocks = centres
                .iter()
                .zip(&blocks)
                .all(|(o, b): (&[f64; 2], &Block)| dist(c, *o) > (half + b.half) * 1.5 + 1.0);
            if clear_of_effector && clear_of_blocks {
                break;
            }
        }
        centres.push(best);
        blocks.push(Block { half, color });
    }

    let fps = log_rate / ratio as f64;
    let grip = grip_schedule(frames, ratio, fps, pace, rng);
    let ticks = frames * ratio;
    let mut deltas = Vec::with_capacity(ticks);
    let mut states = Vec::with_capacity(frames);
    let mut v = [0.0f64; 2];
    let mut goals: std::collections::VecDeque<Goal> = Default::default();
    let mut goal_ticks = 0u32;

    for tick in 0..ticks {
        if tick % ratio == 0 {
            // The frame shows the gripper as commanded over the previous tick.
            let closed = grip[tick.saturating_sub(1)] == 1;
            states.push(FrameState {
                effector: from_micro(micro),
                closed,
                blocks: centres.clone(),
            });
        }
        if goals.is_empty() {
            let here = from_micro(micro);
            plan(
                &mut goals, body, pace, log_rate, limit, here, &centres, &blocks, rng,
            );
            goal_ticks = 0;
        }
        let p = from_micro(micro);
        let mut desired = [0.0, 0.0];
        let mut done = false;
        match goals.front_mut().expect("planned") {
            Goal::Move { target, speed } => {
                let to = [target[0] - p[0], target[1] - p[1]];
                let d = (to[0] * to[0] + to[1] * to[1]).sqrt();
                let s = speed.min((2.0 * accel * (d - 0.05).max(0.0)).sqrt());
                if d > 1e-6 {
                    desired = [to[0] / d * s, to[1] / d * s];
                }
                let vn = (v[0] * v[0] + v[1] * v[1]).sqrt();
                // Give up on a goal the blocks keep us from (6 s at robot pace).
                done = (d < 0.3 && vn < 3.0 * pace) || goal_ticks as f64 * dt > 6.0 / pace;
            }
            Goal::Pause { ticks } => {
                if *ticks == 0 {
                    done = true;
                } else {
                    *ticks -= 1;
                }
            }
        }
        if done {
            goals.pop_front();
            goal_ticks = 0;
        } else {
            goal_ticks += 1;
        }
        let dv = [desired[0] - v[0], desired[1] - v[1]];
        let dvn = (dv[0] * dv[0] + dv[1] * dv[1]).sqrt();
        let cap = accel * dt;
        let k = if dvn > cap { cap / dvn } else { 1.0 };
        v = [v[0] + dv[0] * k, v[1] + dv[1] * k];

        let before = micro;
        let lim = to_micro(limit);
        for a in 0..2 {
            let next = micro[a] + to_micro(v[a] * dt);
            micro[a] = next.clamp(-lim, lim);
            if micro[a] != next {
                v[a] = 0.0;
            }
        }
        push_blocks(body, table, &mut micro, &mut v, &mut centres, &blocks);
        micro = [micro[0].clamp(-lim, lim), micro[1].clamp(-lim, lim)];
        deltas.push([micro[0] - before[0], micro[1] - before[1]]);
    }
    Simulation {
        deltas,
        grip,
        frames: states,
        blocks,
    }
}

/// Gripper command per tick. Changes happen only at frame boundaries, so the
/// command held over a frame interval is the state the next frame shows; every
/// clip of four frames or more closes and opens at least once.
fn grip_schedule(frames: usize, ratio: usize, fps: f64, pace: f64, rng: &mut Rng) -> Vec<u8> {
    let mut toggles = Vec::new();
    let mut at = 0.0f64;
    loop {
        // Dwell 0.8-2.5 s at robot pace, counted in frames.
        at += rng.range(0.8, 2.5) * fps / pace;
        let frame = at.round() as usize;
        if frame + 1 >= frames {
            break;
        }
        if frame >= 1 && toggles.last() != Some(&frame) {
            toggles.push(frame);
        }
    }
    if toggles.len() < 2 && frames >= 4 {
        toggles = vec![frames / 3, (2 * frames / 3).max(frames / 3 + 1)];
    }
    let mut state = u8::from(rng.chance(0.5));
    let mut grip = Vec::with_capacity(frames * ratio);
    let mut next = toggles.iter().peekable();
    for frame in 0..frames {
        if next.peek() == Some(&&frame) {
            state ^= 1;
            next.next();
        }
        grip.extend(std::iter::repeat_n(state, ratio));
    }
    grip
}

#[allow(clippy::too_many_arguments)]
fn plan(
    goals: &mut std::collections::VecDeque<Goal>,
    body: &Embodiment,
    pace: f64,
    log_rate: f64,
    limit: f64,
    p: [f64; 2],
    centres: &[[f64; 2]],
    blocks: &[Block],
    rng: &mut Rng,
) {
    let clampv = |c: [f64; 2]| [c[0].clamp(-limit, limit), c[1].clamp(-limit, limit)];
    let cruise = rng.range(5.0, 12.0) * pace;
    if !blocks.is_empty() && rng.chance(0.65) {
        let b = rng.int(0, blocks.len() as u64 - 1) as usize;
        let c = centres[b];
        // Push towards a spot in the inner table so blocks stay in view.
        let aim = [
            rng.range(-limit, limit) * 0.6,
            rng.range(-limit, limit) * 0.6,
        ];
        let mut dir = [aim[0] - c[0], aim[1] - c[1]];
        let mut len = (dir[0] * dir[0] + dir[1] * dir[1]).sqrt();
        if len < 1e-3 {
            let a = rng.range(0.0, std::f64::consts::TAU);
            dir = [a.cos(), a.sin()];
            len = 1.0;
        }
        dir = [dir[0] / len, dir[1] / len];
        let back = blocks[b].half + body.collider_cm + rng.range(1.0, 3.0);
        let approach = clampv([c[0] - dir[0] * back, c[1] - dir[1] * back]);
        let push = rng.range(4.0, 10.0).min(len.max(2.0));
        let through = clampv([c[0] + dir[0] * push, c[1] + dir[1] * push]);
        goals.push_back(Goal::Move {
            target: approach,
            speed: cruise,
        });
        if rng.chance(0.4) {
            goals.push_back(Goal::Pause {
                ticks: pause_ticks(rng, pace, log_rate, 0.1, 0.4),
            });
        }
        goals.push_back(Goal::Move {
            target: through,
            speed: rng.range(3.0, 7.0) * pace,
        });
    } else {
        let mut target = [rng.range(-limit, limit), rng.range(-limit, limit)];
        // Prefer moves of a useful length.
        if dist(target, p) < 4.0 {
            target = [-target[0], -target[1]];
        }
        goals.push_back(Goal::Move {
            target: clampv(target),
            speed: cruise,
        });
    }
    if rng.chance(0.3) {
        goals.push_back(Goal::Pause {
            ticks: pause_ticks(rng, pace, log_rate, 0.2, 0.8),
        });
    }
}

/// A pause of `lo..hi` seconds at robot pace, in log ticks; pauses shorten
/// with pace like every other duration.
fn pause_ticks(rng: &mut Rng, pace: f64, log_rate: f64, lo: f64, hi: f64) -> u32 {
    (rng.range(lo, hi) * log_rate / pace).round() as u32
}

/// Resolves contacts after the effector moved: the effector pushes blocks,
/// blocks push each other and stay on the table; if a block is stuck, the
/// effector is held back instead (the logged delta is what really happened).
fn push_blocks(
    body: &Embodiment,
    table: f64,
    micro: &mut [i64; 2],
    v: &mut [f64; 2],
    centres: &mut [[f64; 2]],
    blocks: &[Block],
) {
    let r = body.collider_cm;
    let p = from_micro(*micro);
    for (c, b) in centres.iter_mut().zip(blocks) {
        if let Some((n, depth)) = disc_box_contact(p, r, *c, b.half) {
            c[0] += n[0] * depth;
            c[1] += n[1] * depth;
        }
    }
    for _ in 0..4 {
        for i in 0..centres.len() {
            for j in i + 1..centres.len() {
                let (hi, hj) = (blocks[i].half, blocks[j].half);
                let d = [centres[j][0] - centres[i][0], centres[j][1] - centres[i][1]];
                let ox = hi + hj - d[0].abs();
                let oy = hi + hj - d[1].abs();
                if ox > 0.0 && oy > 0.0 {
                    let (axis, o) = if ox < oy { (0, ox) } else { (1, oy) };
                    let s = if d[axis] >= 0.0 { 1.0 } else { -1.0 };
                    centres[i][axis] -= s * o * 0.5;
                    centres[j][axis] += s * o * 0.5;
                }
            }
        }
        for (c, b) in centres.iter_mut().zip(blocks) {
            let m = table - b.half - 0.5;
            c[0] = c[0].clamp(-m, m);
            c[1] = c[1].clamp(-m, m);
        }
    }
    // Blocks that could not get out of the way hold the effector back.
    for (c, b) in centres.iter().zip(blocks) {
        let p = from_micro(*micro);
        if let Some((n, depth)) = disc_box_contact(p, r, *c, b.half) {
            for a in 0..2 {
                // Round away from zero so the contact is really resolved.
                let m = n[a] * depth * MICRO_PER_CM as f64;
                micro[a] -= if m > 0.0 { m.ceil() } else { m.floor() } as i64;
            }
            let vn = v[0] * n[0] + v[1] * n[1];
            if vn > 0.0 {
                v[0] -= vn * n[0];
                v[1] -= vn * n[1];
            }
        }
    }
}

/// Contact between a disc (centre `p`, radius `r`) and an axis-aligned square
/// (centre `c`, half side `h`): the unit normal from the disc into the square
/// and the penetration depth.
fn disc_box_contact(p: [f64; 2], r: f64, c: [f64; 2], h: f64) -> Option<([f64; 2], f64)> {
    let q = [
        p[0].clamp(c[0] - h, c[0] + h),
        p[1].clamp(c[1] - h, c[1] + h),
    ];
    let d = [q[0] - p[0], q[1] - p[1]];
    let dn = (d[0] * d[0] + d[1] * d[1]).sqrt();
    if dn >= r {
        return None;
    }
    if dn > 1e-9 {
        return Some(([d[0] / dn, d[1] / dn], r - dn));
    }
    // Disc centre inside the square: leave along the shallowest axis.
    let rel = [c[0] - p[0], c[1] - p[1]];
    let pen = [h - rel[0].abs(), h - rel[1].abs()];
    let axis = if pen[0] < pen[1] { 0 } else { 1 };
    let mut n = [0.0, 0.0];
    n[axis] = if rel[axis] >= 0.0 { 1.0 } else { -1.0 };
    Some((n, r + h - rel[axis].abs()))
}

fn dist(a: [f64; 2], b: [f64; 2]) -> f64 {
    ((a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2)).sqrt()
}

pub(crate) fn to_micro(cm: f64) -> i64 {
    (cm * MICRO_PER_CM as f64).round() as i64
}

pub(crate) fn from_micro(m: [i64; 2]) -> [f64; 2] {
    [
        m[0] as f64 / MICRO_PER_CM as f64,
        m[1] as f64 / MICRO_PER_CM as f64,
    ]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn frame_displacements_equal_summed_deltas() {
        let mut rng = Rng::new(3);
        let body = Embodiment::of(Kind::Robot);
        let sim = simulate(&body, 40, 5, 50.0, &mut rng);
        assert_eq!(sim.deltas.len(), 200);
        assert_eq!(sim.frames.len(), 40);
        for k in 0..39 {
            let sum: [i64; 2] = sim.deltas[k * 5..k * 5 + 5]
                .iter()
                .fold([0, 0], |a, d| [a[0] + d[0], a[1] + d[1]]);
            let a = sim.frames[k].effector;
            let b = sim.frames[k + 1].effector;
            assert!((b[0] - a[0] - sum[0] as f64 / 1e4).abs() < 1e-9);
            assert!((b[1] - a[1] - sum[1] as f64 / 1e4).abs() < 1e-9);
            // The next frame shows the grip held over this interval.
            assert_eq!(sim.frames[k + 1].closed, sim.grip[k * 5] == 1);
        }
    }

    #[test]
    fn grip_opens_and_closes_in_short_clips() {
        for seed in 0..50 {
            let mut rng = Rng::new(seed);
            let g = grip_schedule(6, 5, 10.0, 1.8, &mut rng);
            assert!(g.contains(&0) && g.contains(&1), "seed {seed}");
            // Constant within each frame interval.
            assert!(g.chunks(5).all(|c| c.iter().all(|&x| x == c[0])));
        }
    }

    #[test]
    fn effector_stays_in_view_and_blocks_get_pushed() {
        let mut moved = false;
        for seed in 0..6 {
            let mut rng = Rng::new(seed);
            let body = Embodiment::of(Kind::Human);
            let sim = simulate(&body, 120, 5, 50.0, &mut rng);
            let lim = body.effector_limit() + 1e-9;
            for f in &sim.frames {
                assert!(f.effector[0].abs() <= lim && f.effector[1].abs() <= lim);
            }
            let first = &sim.frames[0].blocks;
            let last = &sim.frames.last().unwrap().blocks;
            moved |= first.iter().zip(last).any(|(a, b)| dist(*a, *b) > 1.0);
        }
        assert!(moved);
    }

    #[test]
    fn humans_move_about_1_8_times_faster() {
        let mean_speed = |kind| {
            let body = Embodiment::of(kind);
            let (mut total, mut n) = (0.0, 0usize);
            for seed in 0..30 {
                let sim = simulate(&body, 100, 5, 50.0, &mut Rng::derive(seed, kind as u64));
                for d in &sim.deltas {
                    total += ((d[0] * d[0] + d[1] * d[1]) as f64).sqrt();
                    n += 1;
                }
            }
            total / n as f64
        };
        let ratio = mean_speed(Kind::Human) / mean_speed(Kind::Robot);
        assert!((1.5..2.2).contains(&ratio), "speed ratio {ratio}");
    }
}
