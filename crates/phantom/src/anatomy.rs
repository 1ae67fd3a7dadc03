//! The parametric anatomy of one subject: drawn from the subject's generator, evaluated at
//! template points (world mm before the subject's smooth deformation).
//!
//! Template frame (NIfTI RAS+ world, mm): +x towards the subject's right, +y anterior,
//! +z superior (head-ward); the body axis is near x = y = 0 and z = 0 is mid-abdomen.
//! Reference sizes are those of a slim adult (body 240 × 180 mm at mid-abdomen, liver about
//! 150 × 115 × 140 mm, kidneys 110 × 60 × 50 mm, spleen 115 × 70 × 50 mm, aorta 25 mm wide,
//! vertebral bodies 42 × 32 × 26 mm).

use std::f64::consts::PI;

use rand_chacha::ChaCha8Rng;

use crate::rng::Draw;
use crate::shapes::{rotation, subdivide, Blob, Tube, Wobble};

/// Label values (see [`crate::LABELS`]).
pub(crate) mod label {
    pub const LIVER: u16 = 1;
    pub const SPLEEN: u16 = 2;
    pub const KIDNEY_RIGHT: u16 = 3;
    pub const KIDNEY_LEFT: u16 = 4;
    pub const STOMACH: u16 = 5;
    pub const AORTA: u16 = 6;
    pub const IVC: u16 = 7;
    pub const SPINE: u16 = 8;
    pub const BOWEL: u16 = 9;
    pub const BODY: u16 = 10;
}

/// Hounsfield units of air (and of bowel/stomach gas).
pub(crate) const HU_AIR: f32 = -1000.0;

/// Where a point lies relative to the body wall.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Zone {
    /// Outside the skin.
    Outside,
    /// Subcutaneous fat.
    Fat,
    /// The muscle wall (thicker at the back: paraspinal muscles).
    Muscle,
    /// Inside the muscle wall.
    Cavity,
}

/// The trunk: nested rounded cross-sections (skin, inner fat boundary, inner muscle
/// boundary) whose size varies smoothly along z.
///
/// The cross-section is the superellipse `(|x/a|ⁿ + |y/b|ⁿ)^(1/n) < 1` with `n = 2.4`,
/// `b = b_ant` in front (y ≥ 0) and `n = 3.2`, `b = b_post` behind (a flatter back).
#[derive(Clone, Debug)]
pub(crate) struct Body {
    pub centre: [f64; 2],
    pub a: f64,
    pub b_ant: f64,
    pub b_post: f64,
    pub fat: f64,
    pub muscle: f64,
    pub muscle_back: f64,
    /// Relative width change `A·sin(ω z + φ)` as `[A, ω (rad/mm), φ]`.
    pub width_wave: [f64; 3],
    /// Relative depth change, same form.
    pub depth_wave: [f64; 3],
}

/// `radiusⁿ` of the superellipse cross-section at `(x, y)` (mm); below 1 inside (comparing the
/// n-th power with 1 is the same as comparing the radius).
#[inline]
fn superellipse(x: f64, y: f64, a: f64, b_ant: f64, b_post: f64) -> f64 {
    let u = (x / a).abs();
    if y >= 0.0 {
        u.powf(2.4) + (y / b_ant).powf(2.4)
    } else {
        u.powf(3.2) + (-y / b_post).powf(3.2)
    }
}

impl Body {
    /// Width and depth factors at height `z` (mm).
    #[inline]
    fn profile(&self, z: f64) -> (f64, f64) {
        let [wa, ww, wp] = self.width_wave;
        let [da, dw, dp] = self.depth_wave;
        (1.0 + wa * (ww * z + wp).sin(), 1.0 + da * (dw * z + dp).sin())
    }

    /// The zone of template point `p`.
    #[inline]
    pub(crate) fn zone(&self, p: &[f64; 3]) -> Zone {
        let (w, d) = self.profile(p[2]);
        let x = p[0] - self.centre[0];
        let y = p[1] - self.centre[1];
        let (a, ba, bp) = (self.a * w, self.b_ant * d, self.b_post * d);
        if superellipse(x, y, a, ba, bp) >= 1.0 {
            return Zone::Outside;
        }
        let f = self.fat;
        if superellipse(x, y, a - f, ba - f, bp - f) >= 1.0 {
            return Zone::Fat;
        }
        let m = self.muscle;
        if superellipse(x, y, a - f - m, ba - f - m, bp - f - self.muscle_back) >= 1.0 {
            return Zone::Muscle;
        }
        Zone::Cavity
    }
}

/// The lumbar/lower thoracic spine: a stack of vertebral bodies (elliptic cylinders with a
/// cortical shell) separated by discs, each with a neural arch, a spinous process and two
/// transverse processes. Its axis bends smoothly (lordosis in y, a slight lateral curve in x).
#[derive(Clone, Debug)]
pub(crate) struct Spine {
    pub x0: f64,
    pub y0: f64,
    pub lordosis: f64,
    pub lateral: f64,
    pub lateral_phase: f64,
    pub phase_z: f64,
    pub period: f64,
    pub height: f64,
    pub semi: [f64; 2],
    pub shell: f64,
    pub canal: f64,
}

impl Spine {
    /// Centre `(x, y)` (mm) of the vertebral bodies at height `z`.
    #[inline]
    pub(crate) fn axis(&self, z: f64) -> (f64, f64) {
        (
            self.x0 + self.lateral * (PI * z / 420.0 + self.lateral_phase).sin(),
            self.y0 + self.lordosis * (PI * z / 400.0).cos(),
        )
    }

    /// Label and HU of `p` if it is bone of the spine, a disc or the canal.
    #[inline]
    fn sample(&self, p: &[f64; 3], hu: &Hu) -> Option<(u16, f32)> {
        let reach = self.canal + 45.0;
        if (p[0] - self.x0).abs() > reach + self.lateral.abs() || p[1] > self.y0 + self.lordosis.abs() + self.semi[1] {
            return None;
        }
        let (xc, yc) = self.axis(p[2]);
        let (dx, dy) = (p[0] - xc, p[1] - yc);
        let zl = (p[2] - self.phase_z).rem_euclid(self.period);
        let e = ((dx / self.semi[0]).powi(2) + (dy / self.semi[1]).powi(2)).sqrt();
        if e < 1.0 {
            if zl >= self.height {
                return Some((label::BODY, hu.disc));
            }
            let side = (1.0 - e) * self.semi[1];
            let end = zl.min(self.height - zl);
            let v = if side.min(end) < self.shell { hu.cortical } else { hu.cancellous };
            return Some((label::SPINE, v));
        }
        if zl < 3.0 || zl > self.height - 3.0 {
            return None;
        }
        let cy = yc - self.semi[1] - self.canal - 2.0;
        let dyc = p[1] - cy;
        let dc = (dx * dx + dyc * dyc).sqrt();
        if dc < self.canal {
            return Some((label::BODY, hu.canal));
        }
        let arch = dc < self.canal + 6.0 && dyc < self.canal + 2.0;
        let spinous = dx.abs() < 4.0 && dyc < 0.0 && dyc > -(self.canal + 22.0);
        let transverse = dyc.abs() < 5.0 && dx.abs() < self.canal + 28.0;
        (arch || spinous || transverse).then_some((label::SPINE, hu.arch))
    }

    /// Volume of the vertebral bodies between heights `z0` and `z1`, mm³: each full body
    /// is an elliptic cylinder `π·a·b·h` (textbook formula), partial ones count their share.
    #[cfg(test)]
    pub(crate) fn body_volume_mm3(&self, z0: f64, z1: f64) -> f64 {
        let area = PI * self.semi[0] * self.semi[1];
        let mut v = 0.0;
        let first = ((z0 - self.phase_z) / self.period).floor() as i64 - 1;
        let last = ((z1 - self.phase_z) / self.period).ceil() as i64 + 1;
        for n in first..=last {
            let lo = self.phase_z + n as f64 * self.period;
            let hi = lo + self.height;
            v += area * (hi.min(z1) - lo.max(z0)).max(0.0);
        }
        v
    }
}

/// Intensities of one subject (HU), jittered a little between subjects (contrast timing).
#[derive(Clone, Debug)]
pub(crate) struct Hu {
    pub fat: f32,
    pub muscle: f32,
    pub visceral_fat: f32,
    pub liver: f32,
    pub spleen: f32,
    pub kidney_cortex: f32,
    pub kidney_medulla: f32,
    pub stomach_wall: f32,
    pub fluid: f32,
    pub aorta: f32,
    pub ivc: f32,
    pub cortical: f32,
    pub cancellous: f32,
    pub arch: f32,
    pub disc: f32,
    pub canal: f32,
    pub bowel_wall: f32,
}

/// A stomach: a blob with a wall of `wall` mm and gas above the level `gas_y` (mm, world y;
/// gas rises anteriorly in a supine subject), fluid below.
#[derive(Clone, Debug)]
pub(crate) struct Stomach {
    pub blob: Blob,
    pub wall: f64,
    pub gas_y: f64,
}

/// The whole subject in template coordinates.
#[derive(Clone, Debug)]
pub(crate) struct Anatomy {
    pub body: Body,
    pub spine: Spine,
    pub aorta: Tube,
    pub ivc: Tube,
    pub psoas: Tube,
    pub kidney_right: Blob,
    pub kidney_left: Blob,
    pub liver: Blob,
    pub spleen: Blob,
    pub stomach: Stomach,
    /// Bowel pieces; a piece's tag is its gas–fluid level as a fraction of the lumen radius
    /// (gas where `y − y_axis > tag·r_lumen`; ≤ −1: all gas, ≥ 1: all fluid).
    pub bowel: Tube,
    pub bowel_wall: f64,
    pub hu: Hu,
}

fn wobble(rng: &mut ChaCha8Rng, amp: f64) -> Wobble {
    Wobble { lin: rng.sym3([amp; 3]), sq: rng.sym3([amp; 3]), off: rng.sym3([amp; 3]), cubic: rng.sym(amp) }
}

/// Semi-axes scaled so that the volume changes by a factor uniform in `[0.8, 1.2]`, each axis
/// then stretched by up to ±6 %, and x, y by the body's width and depth factors `body`
/// (larger bodies hold larger organs).
fn vary_size(rng: &mut ChaCha8Rng, semi: [f64; 3], body: [f64; 2]) -> [f64; 3] {
    let s = rng.range(0.8, 1.2).cbrt();
    let f = [body[0], body[1], 1.0];
    [0, 1, 2].map(|d| semi[d] * f[d] * s * (1.0 + rng.sym(0.06)))
}

fn add(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [a[0] + b[0], a[1] + b[1], a[2] + b[2]]
}

impl Anatomy {
    /// Draws a subject. Every random choice comes from `rng`, in a fixed order.
    /// `v` scales the differences between subjects (see `PhantomParams::variation`).
    pub(crate) fn draw(rng: &mut ChaCha8Rng, v: f64) -> Anatomy {
        // Body: width and depth ±12 %, shifted by up to 2 mm.
        let sx = 1.0 + rng.sym(0.12 * v);
        let sy = 1.0 + rng.sym(0.12 * v);
        // Subcutaneous fat thickens the body from outside: the cavity does not depend on it.
        let fat = rng.range(8.0, 20.0);
        let body = Body {
            centre: [rng.sym(2.0), rng.sym(2.0)],
            a: (104.0 + fat) * sx,
            b_ant: (78.0 + fat) * sy,
            b_post: (74.0 + fat) * sy,
            fat,
            muscle: rng.range(8.0, 12.0),
            muscle_back: rng.range(16.0, 22.0),
            width_wave: [rng.range(0.0, 0.02), 2.0 * PI / rng.range(500.0, 900.0), rng.range(0.0, 2.0 * PI)],
            depth_wave: [rng.range(0.0, 0.03), 2.0 * PI / rng.range(400.0, 800.0), rng.range(0.0, 2.0 * PI)],
        };
        // Organ positions follow the body (scaled with it) and then jitter.
        let at = |x: f64, y: f64, z: f64| [body.centre[0] + x * sx, body.centre[1] + y * sy, z];
        let breath = rng.sym(10.0 * v); // diaphragm position moves the upper abdomen along z
        let jitter = |rng: &mut ChaCha8Rng| rng.sym3([10.0 * v, 8.0 * v, 10.0 * v]);

        let spine = Spine {
            x0: body.centre[0],
            y0: body.centre[1] - body.b_post + fat + 44.0,
            lordosis: rng.range(4.0, 10.0),
            lateral: rng.sym(3.0),
            lateral_phase: rng.range(0.0, 2.0 * PI),
            phase_z: rng.range(0.0, 34.0),
            period: rng.range(32.0, 36.0),
            height: rng.range(24.0, 27.0),
            semi: [21.0 * rng.range(0.92, 1.08), 16.0 * rng.range(0.92, 1.08)],
            shell: 2.5,
            canal: 8.0,
        };
        // Vessels run in front of the vertebral bodies (aorta left, IVC right) and split
        // into iliac vessels at the bifurcation.
        let front = |z: f64| {
            let (x, y) = spine.axis(z);
            (x, y + spine.semi[1])
        };
        let vessel = |dx: f64, r: f64, z: f64| {
            let (x, y) = front(z);
            [x + dx, y + r + 1.5, z]
        };
        // A trunk from above the field of view down to the split at height `split`, then
        // one branch per side through `(±mid_x, mid_y)` 60 mm lower to `(±end_x, end_y)` 140 mm
        // lower (template x, y before body scaling).
        let tree = |rng: &mut ChaCha8Rng, dx: f64, r: f64, split: f64, r_branch: f64, mid: [f64; 2], end: [f64; 2]| {
            let mut tube = Tube::default();
            let trunk: Vec<[f64; 3]> = [210.0, 140.0, 70.0, 0.0, split + 30.0]
                .iter()
                .map(|&z| add(vessel(dx, r, z), [rng.sym(2.0), 0.0, 0.0]))
                .chain(std::iter::once(vessel(dx * 0.5, r * 0.8, split)))
                .collect();
            tube.add_polyline(&subdivide(&trunk, 20.0), |n| if n > 12 { r * 0.85 } else { r }, |_| 0.0);
            let start = *trunk.last().expect("non-empty");
            for side in [-1.0, 1.0] {
                let m = at(side * mid[0], mid[1], split - 60.0);
                let e = at(side * end[0], end[1], split - 140.0);
                tube.add_polyline(&subdivide(&[start, m, e], 20.0), |_| r_branch, |_| 0.0);
            }
            tube
        };
        let (r_ao, bif, ao_dx) = (rng.range(11.0, 14.0), rng.range(-85.0, -55.0), -rng.range(10.0, 16.0));
        let r_il = rng.range(5.5, 7.0);
        let aorta = tree(rng, ao_dx, r_ao, bif, r_il, [42.0, 8.0], [62.0, 5.0]);
        let (r_ivc, ivc_dx, conf) = (rng.range(9.0, 12.0), rng.range(18.0, 24.0), bif - rng.range(5.0, 15.0));
        let ivc = tree(rng, ivc_dx, r_ivc, conf, r_il + 1.5, [38.0, -4.0], [58.0, -8.0]);
        // Psoas muscles: beside the lumbar vertebral bodies, widening downwards.
        let mut psoas = Tube::default();
        for side in [-1.0, 1.0] {
            let top = rng.range(50.0, 70.0);
            let pts: Vec<[f64; 3]> = (0..8)
                .map(|n| {
                    let z = top - n as f64 * 36.0;
                    let (x, y) = spine.axis(z);
                    let r = 7.0 + 2.5 * n as f64;
                    [x + side * (spine.semi[0] + r - 2.0), y - 4.0 + n as f64, z]
                })
                .collect();
            psoas.add_polyline(&pts, |n| 7.0 + 2.5 * n as f64, |_| 0.0);
        }

        let kidney = |rng: &mut ChaCha8Rng, side: f64, z: f64| {
            let c = add(at(side * 62.0, -28.0, z + 0.6 * breath), jitter(rng));
            // local x lateral (π turn for the left kidney), upper pole tilted medially
            let gamma = if side > 0.0 { 0.0 } else { PI } + side * rng.range(0.2, 0.5);
            let rot = rotation(rng.sym(0.15), -rng.range(0.1, 0.3), gamma);
            Blob::new(
                c,
                rot,
                vary_size(rng, [30.0, 25.0, 55.0], [sx, sy]),
                rng.range(0.15, 0.3),
                0.0,
                wobble(rng, 0.04),
            )
        };
        let kidney_right = kidney(rng, 1.0, 28.0);
        let kidney_left = kidney(rng, -1.0, 40.0);

        let liver = Blob::new(
            add(at(30.0, 14.0, 92.0 + breath), jitter(rng)),
            // the left lobe swings anteriorly (in front of the stomach)
            rotation(rng.sym(0.12), rng.sym(0.15), -0.25 + rng.sym(0.1)),
            vary_size(rng, [72.0, 54.0, 76.0], [sx, sy]),
            rng.sym(0.1),
            rng.range(0.35, 0.5),
            wobble(rng, 0.05),
        );
        let spleen = Blob::new(
            add(at(-68.0, -14.0, 110.0 + breath), jitter(rng)),
            rotation(-0.35 + rng.sym(0.15), rng.sym(0.15), -0.5 + rng.sym(0.15)),
            vary_size(rng, [24.0, 35.0, 58.0], [sx, sy]),
            rng.range(-0.25, -0.1),
            0.0,
            wobble(rng, 0.05),
        );
        let sblob = Blob::new(
            add(at(-54.0, 26.0, 68.0 + breath), jitter(rng)),
            rotation(rng.sym(0.15), -0.3 + rng.sym(0.1), rng.sym(0.2)),
            vary_size(rng, [34.0, 28.0, 50.0], [sx, sy]),
            rng.range(0.1, 0.25),
            rng.range(0.0, 0.3),
            wobble(rng, 0.05),
        );
        let stomach = Stomach {
            wall: rng.range(4.0, 6.0),
            gas_y: sblob.centre[1] + sblob.semi[1] * rng.range(-0.1, 0.6),
            blob: sblob,
        };

        // Bowel: the colon framing the abdomen, then small-bowel loops filling the lower middle.
        let mut bowel = Tube::default();
        let colon_ctrl = [
            [62.0, 5.0, -120.0],
            [72.0, 0.0, -60.0],
            [72.0, 0.0, 0.0],
            [62.0, 15.0, 22.0],
            [35.0, 45.0, 8.0],
            [0.0, 52.0, -5.0],
            [-35.0, 45.0, 8.0],
            [-66.0, 12.0, 30.0],
            [-72.0, -5.0, 0.0],
            [-72.0, -5.0, -70.0],
            [-64.0, 0.0, -120.0],
            [-35.0, 25.0, -140.0],
            [-5.0, 15.0, -155.0],
            [0.0, -30.0, -175.0],
            [0.0, -38.0, -205.0],
        ]
        .map(|[x, y, z]| add(at(x, y, z), rng.sym3([6.0, 6.0, 8.0])));
        let r_colon = rng.range(18.0, 24.0);
        let colon = subdivide(&colon_ctrl, 14.0);
        let colon_levels: Vec<f64> = (0..colon.len()).map(|_| rng.range(-1.3, 0.4)).collect();
        bowel.add_polyline(&colon, |_| r_colon, |n| colon_levels[n]);
        let (lo, hi) = ([-50.0, -10.0, -150.0], [50.0, 52.0, -15.0]);
        let loops = 7;
        for _ in 0..loops {
            let mut p = [rng.range(lo[0], hi[0]), rng.range(lo[1], hi[1]), rng.range(lo[2], hi[2])];
            let mut dir = rng.sym3([1.0; 3]);
            let mut pts = Vec::with_capacity(16);
            for _ in 0..15 {
                pts.push(at(p[0], p[1], p[2]));
                let turn = rng.sym3([0.9; 3]);
                let mut nd = add(dir, turn);
                let len = (nd[0] * nd[0] + nd[1] * nd[1] + nd[2] * nd[2]).sqrt().max(1e-6);
                nd = nd.map(|v| v / len);
                for d in 0..3 {
                    let next = p[d] + 18.0 * nd[d];
                    if next < lo[d] || next > hi[d] {
                        nd[d] = -nd[d];
                    }
                    p[d] += 18.0 * nd[d];
                }
                dir = nd;
            }
            let r = rng.range(11.0, 14.0);
            let levels: Vec<f64> = (0..pts.len()).map(|_| rng.range(-0.6, 1.6)).collect();
            bowel.add_polyline(&pts, |_| r, |n| levels[n]);
        }

        let hu = Hu {
            fat: -100.0 + rng.sym(8.0 * v) as f32,
            muscle: 50.0 + rng.sym(5.0 * v) as f32,
            visceral_fat: -85.0 + rng.sym(8.0 * v) as f32,
            liver: 60.0 + rng.sym(6.0 * v) as f32,
            spleen: 50.0 + rng.sym(6.0 * v) as f32,
            kidney_cortex: 35.0 + rng.sym(5.0 * v) as f32,
            kidney_medulla: 25.0 + rng.sym(5.0 * v) as f32,
            stomach_wall: 40.0 + rng.sym(5.0 * v) as f32,
            fluid: 10.0 + rng.sym(5.0 * v) as f32,
            aorta: 150.0 + rng.sym(15.0 * v) as f32,
            ivc: 120.0 + rng.sym(15.0 * v) as f32,
            cortical: 1000.0 + rng.sym(60.0 * v) as f32,
            cancellous: 300.0 + rng.sym(40.0 * v) as f32,
            arch: 700.0 + rng.sym(60.0 * v) as f32,
            disc: 90.0 + rng.sym(10.0 * v) as f32,
            canal: 15.0 + rng.sym(5.0 * v) as f32,
            bowel_wall: 20.0 + rng.sym(5.0 * v) as f32,
        };
        Anatomy {
            body,
            spine,
            aorta,
            ivc,
            psoas,
            kidney_right,
            kidney_left,
            liver,
            spleen,
            stomach,
            bowel,
            bowel_wall: rng.range(2.5, 3.5),
            hu,
        }
    }

    /// Label and noiseless HU at template point `p`; `tex ∈ [−1, 1]` is a smooth texture value.
    ///
    /// Ownership is decided by a fixed priority: spine, aorta, IVC, kidneys, psoas (these may
    /// lie in the muscle wall), then liver, spleen, stomach, bowel (only inside the muscle
    /// wall), then the body's own tissue (fat, muscle, visceral fat).
    #[inline]
    pub(crate) fn sample(&self, p: &[f64; 3], tex: f32) -> (u16, f32) {
        let hu = &self.hu;
        let zone = self.body.zone(p);
        match zone {
            Zone::Outside => return (0, HU_AIR),
            Zone::Fat => return (label::BODY, hu.fat + 6.0 * tex),
            Zone::Muscle | Zone::Cavity => {}
        }
        if let Some(s) = self.spine.sample(p, hu) {
            return s;
        }
        if self.aorta.inside(p).is_some() {
            return (label::AORTA, hu.aorta);
        }
        if self.ivc.inside(p).is_some() {
            return (label::IVC, hu.ivc);
        }
        for (blob, l) in [(&self.kidney_right, label::KIDNEY_RIGHT), (&self.kidney_left, label::KIDNEY_LEFT)] {
            if let Some(level) = blob.inside(p) {
                return (l, if level > 0.72 { hu.kidney_cortex } else { hu.kidney_medulla });
            }
        }
        if self.psoas.inside(p).is_some() {
            return (label::BODY, hu.muscle + 4.0 * tex);
        }
        if zone == Zone::Muscle {
            return (label::BODY, hu.muscle + 4.0 * tex);
        }
        if self.liver.inside(p).is_some() {
            return (label::LIVER, hu.liver + 4.0 * tex);
        }
        if self.spleen.inside(p).is_some() {
            return (label::SPLEEN, hu.spleen + 3.0 * tex);
        }
        let st = &self.stomach;
        if let Some(level) = st.blob.inside(p) {
            let min_semi = st.blob.semi.iter().cloned().fold(f64::INFINITY, f64::min);
            let v = if level > 1.0 - st.wall / min_semi {
                hu.stomach_wall
            } else if p[1] > st.gas_y {
                HU_AIR
            } else {
                hu.fluid
            };
            return (label::STOMACH, v);
        }
        if let Some(hit) = self.bowel.inside(p) {
            let v = if hit.depth < self.bowel_wall {
                hu.bowel_wall
            } else {
                let r_lumen = hit.radius - self.bowel_wall;
                if p[1] - hit.axis[1] > hit.tag * r_lumen {
                    HU_AIR
                } else {
                    hu.fluid
                }
            };
            return (label::BOWEL, v);
        }
        (label::BODY, hu.visceral_fat + 30.0 * tex)
    }

    /// The blobs with their labels, for checks.
    #[cfg(test)]
    pub(crate) fn blobs(&self) -> [(u16, &Blob); 5] {
        [
            (label::LIVER, &self.liver),
            (label::SPLEEN, &self.spleen),
            (label::KIDNEY_RIGHT, &self.kidney_right),
            (label::KIDNEY_LEFT, &self.kidney_left),
            (label::STOMACH, &self.stomach.blob),
        ]
    }
}
