//! Synthetic cochlea with known truth, for validating the whole pipeline.
//!
//! Geometry (phantom-local frame: x toward the round window, z along the axis toward the apex,
//! angles θ in radians growing toward the apex). In the radial plane at angle θ the lumen is an
//! ellipse centred at radius rc(θ), height zc(θ), with radial half-width a(θ) and axial half-height
//! b(θ). A horizontal partition at zc splits it: a bony shelf (bone) from the inner wall to the
//! lamina radius, then a thin membrane (soft tissue) to the outer wall (the ligament). A bony
//! capsule, the ellipse grown by `wall_mm`, surrounds it; outside is background. rc follows a
//! logarithmic spiral, zc rises linearly, a and b taper linearly. Each voxel's value is the mean of
//! 4×4×4 sub-samples where a boundary is near (partial volume), then blurred and made noisy.
//!
//! Truth is computed from the same analytic geometry by fine rasterization (5 µm) in planes normal
//! to the analytic partition midline, and by fine stepping along the partition direction for the wall.

use crate::centreline::arc_length;
use crate::frame::{v3, v3::V};
use crate::landmarks::{Kind, Landmark};
use crate::progress::Progress;
use crate::stack::{Samples, Stack, VoxelSize, VoxelSource};
use crate::{Error, Result};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use std::f64::consts::{PI, TAU};

/// Everything that defines a phantom. Lengths mm, angles degrees, levels as fractions of full scale.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PhantomSpec {
    pub voxel_um: [f64; 3],
    pub turns: f64,
    /// Lumen centre radius at the base and the apex.
    pub radius_base_mm: f64,
    pub radius_apex_mm: f64,
    /// Rise along the axis per turn.
    pub rise_per_turn_mm: f64,
    /// Basal dip: the height loses D·sin⁴(π·θ/330°) over the first 330° (0 beyond), so the basal
    /// turn sinks below its height at 0° before it climbs, as in real cochleae (mm, D ≥ 0).
    #[serde(default)]
    pub basal_dip_mm: f64,
    /// Lumen half-width (radial) and half-height (axial) at base and apex.
    pub half_width_mm: [f64; 2],
    pub half_height_mm: [f64; 2],
    pub wall_mm: f64,
    /// Fraction of the lumen width taken by the bony shelf, base and apex.
    pub shelf_fraction: [f64; 2],
    pub shelf_thickness_mm: f64,
    pub membrane_thickness_mm: f64,
    /// Grey levels (fraction of full scale): fluid, soft tissue, bone, background.
    pub levels: [f64; 4],
    /// Noise standard deviation (fraction of full scale).
    pub noise: f64,
    /// Gaussian blur sigma in units of the smallest voxel side.
    pub blur_vox: f64,
    /// Tilt of the modiolar axis against the stack axes: rotation about x, then about y (degrees).
    pub tilt_deg: [f64; 2],
    /// Mirror the specimen (a left ear in this convention).
    pub left: bool,
    /// 8 or 16.
    pub bits: u8,
    /// Lumen continues this far (degrees) beyond the first and last landmarks.
    pub extend_deg: f64,
    /// Landmark spacing along the partition (degrees) and their noise (mm, per coordinate).
    pub landmark_step_deg: f64,
    pub landmark_noise_mm: f64,
    /// Truth table spacing (degrees).
    pub truth_step_deg: f64,
    pub seed: u64,
    /// What makes it look like a real cochlea (all off by default: free-standing rings).
    #[serde(default)]
    pub anatomy: Anatomy,
    /// Scanner effects (all off by default).
    #[serde(default)]
    pub scanner: Scanner,
}

/// Anatomy of a real cochlea (lengths mm, levels as fractions of full scale).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct Anatomy {
    /// The turns sit in the solid bone of the otic capsule (neighbouring turns share a septum,
    /// the modiolus is bone) instead of free-standing rings in the background.
    pub embedded: bool,
    /// Spiral ligament: soft tissue lining the lateral wall, this thick at the partition level.
    pub ligament_mm: f64,
    /// Spiral limbus: soft tissue this high on the inner 70 % of the bony shelf (scala vestibuli side).
    pub limbus_mm: f64,
    /// Bony shelf thickness at the apex (it tapers from `shelf_thickness_mm`); 0 = no taper.
    pub shelf_apex_mm: f64,
    /// Nerve core of the modiolus (radius at its floor, narrowing to nothing at the apex; 0 = none), with canals of `canal_radius_mm` toward
    /// scala tympani every `canal_every_deg` degrees (0 = none).
    pub nerve_core_mm: f64,
    pub canal_every_deg: f64,
    pub canal_radius_mm: f64,
    /// Internal auditory canal under the modiolus (radius; 0 = none).
    pub iac_mm: f64,
    /// Levels of the nerve (core and canals) and of the internal auditory canal.
    pub nerve_level: f64,
    pub iac_level: f64,
}

/// Scanner effects, applied to the partial-volume image (truth is unaffected).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct Scanner {
    /// Ring artefacts about the stack's z axis: amplitude as a fraction of (bone − lumen), and count.
    pub ring_amp: f64,
    pub rings: u32,
    /// Cupping: the centre of each slice darker by this fraction, falling off as 1 − (ρ/R)².
    pub cupping: f64,
    /// Slow intensity drift along z: ± this fraction from the first to the last slice.
    pub drift: f64,
    /// Contrast-to-noise ratio (bone − lumen)/σ; when set it replaces `noise`.
    pub cnr: Option<f64>,
}

impl Default for PhantomSpec {
    fn default() -> Self {
        PhantomSpec {
            voxel_um: [40.0; 3],
            turns: 2.5,
            radius_base_mm: 3.6,
            radius_apex_mm: 1.0,
            rise_per_turn_mm: 1.6,
            basal_dip_mm: 0.0,
            half_width_mm: [0.9, 0.5],
            half_height_mm: [0.65, 0.4],
            wall_mm: 0.3,
            shelf_fraction: [0.55, 0.3],
            shelf_thickness_mm: 0.03,
            membrane_thickness_mm: 0.005,
            levels: [0.15, 0.35, 0.9, 0.25],
            noise: 0.02,
            blur_vox: 0.7,
            tilt_deg: [0.0, 0.0],
            left: false,
            bits: 16,
            extend_deg: 25.0,
            landmark_step_deg: 15.0,
            landmark_noise_mm: 0.005,
            truth_step_deg: 3.0,
            seed: 1,
            anatomy: Anatomy::default(),
            scanner: Scanner::default(),
        }
    }
}

/// What a point of the phantom is made of.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Mat {
    Background,
    Bone,
    Tissue,
    /// The modiolus's nerve core and its canals.
    Nerve,
    /// The internal auditory canal.
    Iac,
    /// Scala vestibuli fluid (above the partition).
    Sv,
    /// Scala tympani fluid (below).
    St,
}

/// Cross-section parameters at one angle (mm).
#[derive(Clone, Copy, Debug)]
pub struct Duct {
    pub rc: f64,
    pub zc: f64,
    pub a: f64,
    pub b: f64,
    /// Lamina (shelf tip) and ligament radii.
    pub r_lam: f64,
    pub r_lig: f64,
}

impl PhantomSpec {
    /// Puts soft tissue (and the nerve and canal where they were at its level) `share` of the way
    /// from the lumen to bone: 0.2–0.35 in the fluid-filled members, a few per cent on clinical
    /// CT of a fluid-filled ear, where soft tissue is hardly brighter than fluid.
    pub fn set_tissue_share(&mut self, share: f64) {
        let [lumen, old, bone, _] = self.levels;
        let tissue = lumen + share * (bone - lumen);
        self.levels[1] = tissue;
        for level in [&mut self.anatomy.nerve_level, &mut self.anatomy.iac_level] {
            if *level == old {
                *level = tissue;
            }
        }
    }

    /// Angular extent of the landmarks (rad).
    pub fn theta_max(&self) -> f64 {
        self.turns * TAU
    }

    /// Height (mm) of the lumen centre at angle θ (rad): steady rise minus the basal dip.
    pub fn zc(&self, t: f64) -> f64 {
        const DIP_SPAN: f64 = 330.0 * PI / 180.0;
        let dip = if t > 0.0 && t < DIP_SPAN { (PI * t / DIP_SPAN).sin().powi(4) } else { 0.0 };
        self.rise_per_turn_mm * t / TAU - self.basal_dip_mm * dip
    }

    /// Cross-section at angle θ (rad); extends smoothly beyond [0, θmax].
    pub fn duct(&self, t: f64) -> Duct {
        let f = t / self.theta_max();
        let lerp = |v: [f64; 2]| v[0] + (v[1] - v[0]) * f;
        let rc = self.radius_base_mm * (f * (self.radius_apex_mm / self.radius_base_mm).ln()).exp();
        let a = lerp(self.half_width_mm);
        let sf = lerp(self.shelf_fraction);
        Duct { rc, zc: self.zc(t), a, b: lerp(self.half_height_mm), r_lam: rc - a + 2.0 * a * sf, r_lig: rc + a }
    }

    /// Material at a phantom-local point (mm) and the angle (rad) of the turn it belongs to,
    /// with a lower bound on the distance to the nearest material boundary (mm).
    pub fn material(&self, q: V) -> (Mat, f64, f64) {
        let r = q[0].hypot(q[1]);
        let phi = q[1].atan2(q[0]);
        let ext = self.extend_deg.to_radians();
        let (lo, hi) = (-ext, self.theta_max() + ext);
        let mut clear = f64::INFINITY;
        let mut bone: Option<f64> = None;
        let n0 = ((lo - phi) / TAU).floor() as i64 - 1;
        let n1 = ((hi - phi) / TAU).ceil() as i64 + 1;
        // a turn whose axis height is farther than the tallest capsule can reach is skipped,
        // keeping its distance in the clearance bound
        let reach = self.half_height_mm[0].max(self.half_height_mm[1]) + self.wall_mm;
        for n in n0..=n1 {
            let t = phi + TAU * n as f64;
            let dz_axis = (q[2] - self.zc(t)).abs();
            if dz_axis > reach + 0.05 {
                clear = clear.min(dz_axis - reach);
                continue;
            }
            let d = self.duct(t);
            let cap = self.wall_mm / d.rc;
            if t < lo - cap || t > hi + cap {
                continue;
            }
            let (dr, dz) = (r - d.rc, q[2] - d.zc);
            let end_clear = ((t - lo).abs().min((t - hi).abs())) * r.max(0.1);
            let rho = ((dr / d.a).powi(2) + (dz / d.b).powi(2)).sqrt();
            let (aw, bw) = (d.a + self.wall_mm, d.b + self.wall_mm);
            let rho_c = ((dr / aw).powi(2) + (dz / bw).powi(2)).sqrt();
            clear = clear.min((rho - 1.0).abs() * d.a.min(d.b)).min((rho_c - 1.0).abs() * aw.min(bw));
            let in_range = t >= lo && t <= hi;
            clear = clear.min(end_clear).min((t - lo + cap).abs() * r.max(0.1)).min((t - hi - cap).abs() * r.max(0.1));
            if rho < 1.0 && in_range {
                let shelf = self.shelf_at(t);
                let thick = if r < d.r_lam { shelf } else { self.membrane_thickness_mm };
                clear = clear.min((dz.abs() - 0.5 * thick).abs());
                if dz.abs() < 0.5 * shelf.max(self.membrane_thickness_mm) + 1e-3 {
                    clear = clear.min((r - d.r_lam).abs());
                }
                // the spiral limbus: a pad on the inner part of the shelf, scala vestibuli side
                let an = &self.anatomy;
                if an.limbus_mm > 0.0 {
                    let end = d.r_lam - 0.3 * (d.r_lam - (d.rc - d.a));
                    let top = 0.5 * shelf + an.limbus_mm;
                    clear = clear.min((r - end).abs()).min((dz - top).abs());
                    if r < end && dz > 0.0 && dz < top && dz >= 0.5 * thick {
                        return (Mat::Tissue, t, clear);
                    }
                }
                let m = if dz.abs() < 0.5 * thick {
                    if r < d.r_lam { Mat::Bone } else { Mat::Tissue }
                } else if dz > 0.0 {
                    Mat::Sv
                } else {
                    Mat::St
                };
                return (m, t, clear);
            }
            // the spiral ligament: a soft-tissue crescent between the lateral lumen and the bone
            // on the lateral wall only (outside half the half-width), thickest at the partition
            let lig = self.anatomy.ligament_mm;
            if lig > 0.0 && in_range && dr > 0.5 * d.a {
                let rho_l = ((dr / (d.a + lig)).powi(2) + (dz / (d.b + 0.5 * lig)).powi(2)).sqrt();
                clear = clear.min((rho_l - 1.0).abs() * d.a.min(d.b)).min((dr - 0.5 * d.a).abs());
                if rho_l < 1.0 {
                    return (Mat::Tissue, t, clear);
                }
            }
            if rho_c < 1.0 && bone.is_none() {
                bone = Some(t);
            }
        }
        if let Some(t) = bone {
            return (Mat::Bone, t, clear);
        }
        self.outside_lumen(r, phi, q[2], clear)
    }

    /// Bony shelf thickness (mm) at θ (rad): tapers to `anatomy.shelf_apex_mm` when that is set.
    pub fn shelf_at(&self, t: f64) -> f64 {
        let apex = self.anatomy.shelf_apex_mm;
        if apex > 0.0 {
            let f = (t / self.theta_max()).clamp(0.0, 1.0);
            self.shelf_thickness_mm + (apex - self.shelf_thickness_mm) * f
        } else {
            self.shelf_thickness_mm
        }
    }

    /// Height (mm) below which no lumen or capsule reaches (the dip taken at its full depth).
    pub fn floor_mm(&self) -> f64 {
        let lo = -self.extend_deg.to_radians();
        self.zc(lo).min(-self.basal_dip_mm) - self.duct(lo).b.max(self.half_height_mm[0]) - self.wall_mm
    }

    /// What lies outside every lumen and capsule ring at (r, φ rad, z): the embedded capsule and
    /// modiolus (bone), the nerve core and its canals, the internal auditory canal, or background.
    fn outside_lumen(&self, r: f64, phi: f64, z: f64, mut clear: f64) -> (Mat, f64, f64) {
        let an = &self.anatomy;
        let ext = self.extend_deg.to_radians();
        let (lo, hi) = (-ext, self.theta_max() + ext);
        let (z_floor, z_top) = (self.floor_mm(), self.zc(hi));
        // internal auditory canal: under the capsule floor, round the axis
        if an.iac_mm > 0.0 {
            let top = z_floor + 0.5 * self.wall_mm;
            clear = clear.min((r - an.iac_mm).abs().max(0.0)).min((z - top).abs());
            if r < an.iac_mm && z < top {
                return (Mat::Iac, phi, clear);
            }
        }
        // nerve core and canals
        if an.nerve_core_mm > 0.0 && z > z_floor && z < z_top {
            // the core narrows from its full radius at the floor to nothing at the apex
            let core = an.nerve_core_mm * (z_top - z) / (z_top - z_floor);
            clear = clear.min(0.5 * (r - core).abs()).min((z - z_floor).abs()).min((z - z_top).abs());
            if r < core {
                return (Mat::Nerve, phi, clear);
            }
            if an.canal_every_deg > 0.0 && an.canal_radius_mm > 0.0 {
                let step = an.canal_every_deg.to_radians();
                let k = (phi / step).round();
                let off = r * (phi - k * step).sin().abs();
                // the canal of this angle runs out to the inner wall of each turn, below its partition
                for n in (((lo - phi) / TAU).floor() as i64)..=(((hi - phi) / TAU).ceil() as i64) {
                    let t = k * step + TAU * n as f64;
                    if t < lo || t > hi {
                        continue;
                    }
                    let d = self.duct(t);
                    let dz = z - (d.zc - 0.5 * d.b);
                    let reach = d.rc - d.a + 0.5 * self.wall_mm;
                    let dist = off.hypot(dz);
                    clear = clear.min((dist - an.canal_radius_mm).abs());
                    if dist < an.canal_radius_mm && r < reach {
                        return (Mat::Nerve, t, clear);
                    }
                }
            }
        }
        if an.embedded {
            // between two stacked turns at this angle the capsule is solid out to their outer walls;
            // under the lowest turn and over the highest, the modiolus is bone inside their inner walls
            let outer = |t: f64| {
                let d = self.duct(t);
                d.rc + d.a + self.wall_mm
            };
            let n0 = ((lo - phi) / TAU).ceil() as i64;
            let n1 = ((hi - phi) / TAU).floor() as i64;
            if n0 <= n1 {
                let (t0, t1) = (phi + TAU * n0 as f64, phi + TAU * n1 as f64);
                for n in n0..n1 {
                    let (ta, tb) = (phi + TAU * n as f64, phi + TAU * (n + 1) as f64);
                    let (za, zb) = (self.zc(ta), self.zc(tb));
                    if z >= za && z <= zb {
                        let f = (z - za) / (zb - za);
                        let edge = outer(ta) + f * (outer(tb) - outer(ta));
                        clear = clear.min(0.5 * (r - edge).abs());
                        if r < edge {
                            return (Mat::Bone, ta, clear);
                        }
                    }
                }
                let (dl, dt) = (self.duct(t0), self.duct(t1));
                let base = dl.rc - dl.a;
                if z < self.zc(t0) && z > z_floor {
                    clear = clear.min((r - base).abs()).min((z - z_floor).abs());
                    if r < base {
                        return (Mat::Bone, t0, clear);
                    }
                }
                let roof = self.zc(t1) + dt.b + self.wall_mm;
                if z > self.zc(t1) && z < roof {
                    clear = clear.min((r - dt.rc).abs()).min((z - roof).abs());
                    if r < dt.rc {
                        return (Mat::Bone, t1, clear);
                    }
                }
            }
        }
        (Mat::Background, phi, clear)
    }

    fn level(&self, m: Mat) -> f64 {
        match m {
            Mat::Sv | Mat::St => self.levels[0],
            Mat::Tissue => self.levels[1],
            Mat::Bone => self.levels[2],
            Mat::Background => self.levels[3],
            Mat::Nerve => self.anatomy.nerve_level,
            Mat::Iac => self.anatomy.iac_level,
        }
    }

    /// Partition midline (phantom-local) at θ: halfway between lamina and ligament.
    pub fn midline(&self, t: f64) -> V {
        let d = self.duct(t);
        let r = 0.5 * (d.r_lam + d.r_lig);
        [r * t.cos(), r * t.sin(), d.zc]
    }

    /// Phantom-local point (mm) of an edge (lamina tip or ligament) at angle θ (rad).
    pub fn edge(&self, kind: Kind, t: f64) -> V {
        let d = self.duct(t);
        let r = if kind == Kind::Lamina { d.r_lam } else { d.r_lig };
        [r * t.cos(), r * t.sin(), d.zc]
    }

    fn midline_speed(&self, t: f64) -> f64 {
        let h = 1e-6;
        v3::norm(v3::sub(self.midline(t + h), self.midline(t - h))) / (2.0 * h)
    }

    /// Analytic length of the partition midline over the landmark range (mm).
    pub fn length(&self) -> f64 {
        arc_length(|t| self.midline_speed(t), 0.0, self.theta_max(), 1e-10)
    }
}

impl PhantomSpec {
    /// Member `n` of a seeded family of realistic cochleae at the given voxel size (µm): turns
    /// embedded in capsule bone with thin shared septa (0.06–0.2 mm), thin bony lateral walls
    /// (0.1–0.25 mm) lined by a spiral ligament (0.12–0.25 mm), a limbus (0.08–0.15 mm), a tapering shelf, a bony modiolus with a
    /// nerve core and canals toward scala tympani, an internal auditory canal, a basal dip of
    /// 0–1.4 mm; fluid-filled (soft tissue 20–35 % of the way from lumen to bone) or (every fourth, n = 3, 7, 11, …)
    /// air-filled; rings, cupping, drift, contrast-to-noise 5–30,
    /// blur 0.5–1.5 voxel; left or right, tilted up to 60°. Members 0–11 have a partition spanning
    /// most of the duct (the bony shelf 45–60 % of its width at the base); from member 12 on the
    /// basilar membrane is as narrow as a real one (the shelf 88–93 % at the base, 40–50 % at the
    /// apex: 0.1–0.25 mm widening to half the duct; REFERENCES.md). Every draw is printed in the
    /// spec.
    pub fn variant(n: u64, voxel_um: [f64; 3]) -> PhantomSpec {
        let mut g = Rng(0xC0C1_EA00 ^ n.wrapping_mul(0x9E37_79B9_7F4A_7C15));
        let mut u = |a: f64, b: f64| a + (b - a) * g.next();
        let _ = u(0.0, 1.0);
        // every fourth member air-filled
        let air = n % 4 == 3;
        let lumen = if air { u(0.02, 0.05) } else { u(0.12, 0.25) };
        let bone = u(0.75, 0.95);
        let tissue = if air { u(0.28, 0.4) } else { lumen + u(0.2, 0.35) * (bone - lumen) };
        // outside the capsule: soft tissue or porous petrous bone, at or a little above soft tissue
        let outside = tissue + u(0.0, 0.3) * (bone - tissue);
        // the spiral ligament lines the lateral wall (0.12–0.25 mm, as in human basal turns); the
        // bony wall outside it is thin (0.1–0.25 mm)
        let ligament = u(0.12, 0.25);
        let wall = ligament + u(0.1, 0.25);
        let mut sp = PhantomSpec {
            voxel_um,
            turns: u(2.25, 2.75),
            radius_base_mm: u(3.2, 3.9),
            radius_apex_mm: u(0.85, 1.2),
            half_width_mm: [u(0.8, 1.0), u(0.42, 0.55)],
            half_height_mm: [u(0.55, 0.7), u(0.35, 0.45)],
            wall_mm: wall,
            shelf_fraction: {
                let (base, apex) = (u(0.0, 1.0), u(0.0, 1.0));
                if n >= 12 {
                    // a basilar membrane as narrow as a real one: 0.1–0.25 mm at the base, widening
                    // to half the duct at the apex (REFERENCES.md)
                    [0.88 + 0.05 * base, 0.4 + 0.1 * apex]
                } else {
                    [0.45 + 0.15 * base, 0.25 + 0.1 * apex]
                }
            },
            shelf_thickness_mm: u(0.04, 0.08),
            basal_dip_mm: if u(0.0, 1.0) < 0.8 { u(0.3, 1.4) } else { 0.0 },
            levels: [lumen, tissue, bone, outside],
            blur_vox: u(0.5, 1.5),
            tilt_deg: [u(-60.0, 60.0), u(-60.0, 60.0)],
            left: u(0.0, 1.0) < 0.5,
            landmark_step_deg: 10.0,
            seed: n + 1,
            ..Default::default()
        };
        sp.anatomy = Anatomy {
            embedded: true,
            ligament_mm: ligament,
            limbus_mm: u(0.08, 0.15),
            shelf_apex_mm: u(0.01, 0.02),
            nerve_core_mm: u(0.6, 1.0),
            canal_every_deg: u(20.0, 40.0),
            canal_radius_mm: u(0.02, 0.04),
            iac_mm: u(0.6, 1.0),
            nerve_level: tissue,
            iac_level: if air { lumen } else { tissue },
        };
        sp.scanner = Scanner { ring_amp: u(0.02, 0.06), rings: u(0.0, 6.99) as u32, cupping: u(0.0, 0.15), drift: u(0.0, 0.1), cnr: Some(u(5.0, 30.0)) };
        let septum = u(0.06, 0.2);
        sp.rise_per_turn_mm = sp.rise_for_septum(septum);
        sp
    }

    /// The rise per turn (mm) that leaves a bony septum of `septum` mm at the thinnest point
    /// between the basal turn and the one above it (bisection on sampled lumen outlines).
    pub fn rise_for_septum(&self, septum: f64) -> f64 {
        let gap = |rise: f64| -> f64 {
            let sp = PhantomSpec { rise_per_turn_mm: rise, basal_dip_mm: 0.0, ..self.clone() };
            let mut best = f64::INFINITY;
            for k in 0..8 {
                let t = k as f64 * TAU / 8.0;
                let (a, b) = (sp.duct(t), sp.duct(t + TAU));
                let ring = |d: &Duct| -> Vec<(f64, f64)> {
                    (0..90).map(|i| (i as f64 * TAU / 90.0).sin_cos()).map(|(s, c)| (d.rc + d.a * c, d.zc + d.b * s)).collect()
                };
                let (pa, pb) = (ring(&a), ring(&b));
                for p in &pa {
                    for q in &pb {
                        best = best.min((p.0 - q.0).hypot(p.1 - q.1));
                    }
                }
            }
            best
        };
        let (mut lo, mut hi) = (0.0, 4.0);
        for _ in 0..40 {
            let m = 0.5 * (lo + hi);
            if gap(m) < septum { lo = m } else { hi = m }
        }
        hi
    }
}

/// Placement of the phantom in the stack: stack = centre + R·(x, ±y, z).
#[derive(Clone, Debug)]
pub struct Placement {
    pub centre: V,
    pub rot: [[f64; 3]; 3],
    pub mirror: f64,
}

impl Placement {
    pub fn to_stack(&self, q: V) -> V {
        let q = [q[0], self.mirror * q[1], q[2]];
        let m = &self.rot;
        v3::add(self.centre, [v3::dot(m[0], q), v3::dot(m[1], q), v3::dot(m[2], q)])
    }
    pub fn to_local(&self, p: V) -> V {
        let d = v3::sub(p, self.centre);
        let m = &self.rot;
        let q = [
            m[0][0] * d[0] + m[1][0] * d[1] + m[2][0] * d[2],
            m[0][1] * d[0] + m[1][1] * d[1] + m[2][1] * d[2],
            m[0][2] * d[0] + m[1][2] * d[1] + m[2][2] * d[2],
        ];
        [q[0], self.mirror * q[1], q[2]]
    }
}

fn rotation(tilt_deg: [f64; 2]) -> [[f64; 3]; 3] {
    let (a, b) = (tilt_deg[0].to_radians(), tilt_deg[1].to_radians());
    let rx = [[1.0, 0.0, 0.0], [0.0, a.cos(), -a.sin()], [0.0, a.sin(), a.cos()]];
    let ry = [[b.cos(), 0.0, b.sin()], [0.0, 1.0, 0.0], [-b.sin(), 0.0, b.cos()]];
    let mut m = [[0.0; 3]; 3];
    for i in 0..3 {
        for j in 0..3 {
            m[i][j] = (0..3).map(|k| ry[i][k] * rx[k][j]).sum();
        }
    }
    m
}

/// One row of the truth table.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct TruthRow {
    pub angle_deg: f64,
    pub s_mm: f64,
    pub sv_area_mm2: f64,
    pub st_area_mm2: f64,
    pub partition_width_mm: f64,
    pub wall_mm: f64,
}

/// A generated phantom: stack, landmarks, truth.
pub struct Phantom {
    pub spec: PhantomSpec,
    pub stack: Stack,
    pub landmarks: Vec<Landmark>,
    pub truth: Vec<TruthRow>,
    pub placement: Placement,
    pub length_mm: f64,
}

/// Small deterministic random numbers (SplitMix64 + Box–Muller).
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    }
    fn gauss(&mut self) -> f64 {
        let (u, v) = (self.next().max(1e-300), self.next());
        (-2.0 * u.ln()).sqrt() * (TAU * v).cos()
    }
}

/// Generates a phantom (stack, landmarks and truth).
pub fn generate(spec: &PhantomSpec, progress: &Progress) -> Result<Phantom> {
    if spec.voxel_um.iter().any(|v| !(*v > 0.0)) || spec.turns <= 0.3 || !(spec.bits == 8 || spec.bits == 16) {
        return Err(Error::invalid("phantom: voxel sizes must be positive, turns > 0.3, bits 8 or 16"));
    }
    let vox = spec.voxel_um.map(|x| x / 1000.0);
    // local bounding box, then its tilted extent
    let d0 = spec.duct(0.0);
    let dn = spec.duct(spec.theta_max());
    let margin = 0.3;
    let rmax = d0.rc + d0.a + spec.wall_mm + margin;
    let zlo = spec.floor_mm() - margin - if spec.anatomy.iac_mm > 0.0 { 0.8 } else { 0.0 };
    let zhi = dn.zc + dn.b.max(d0.b) + spec.wall_mm + margin;
    let rot = rotation(spec.tilt_deg);
    let pl0 = Placement { centre: [0.0; 3], rot, mirror: if spec.left { -1.0 } else { 1.0 } };
    let mut lo = [f64::INFINITY; 3];
    let mut hi = [f64::NEG_INFINITY; 3];
    for cx in [-rmax, rmax] {
        for cy in [-rmax, rmax] {
            for cz in [zlo, zhi] {
                let p = pl0.to_stack([cx, cy, cz]);
                for a in 0..3 {
                    lo[a] = lo[a].min(p[a]);
                    hi[a] = hi[a].max(p[a]);
                }
            }
        }
    }
    let dims: [usize; 3] = std::array::from_fn(|a| ((hi[a] - lo[a]) / vox[a]).ceil() as usize + 1);
    let centre: V = std::array::from_fn(|a| -lo[a]);
    let pl = Placement { centre, ..pl0 };
    let n: usize = dims.iter().product();
    if n > 1_500_000_000 {
        return Err(Error::invalid(format!("phantom of {dims:?} voxels is too large; use larger voxels")));
    }
    progress.start(dims[2] as u64 * 2);
    // partial-volume voxel values
    const S: usize = 4;
    let half_diag = 0.5 * v3::norm(vox);
    let mut vol = vec![0f32; n];
    let slice = dims[0] * dims[1];
    vol.par_chunks_mut(slice).enumerate().try_for_each(|(k, out)| -> Result<()> {
        progress.check()?;
        for j in 0..dims[1] {
            for i in 0..dims[0] {
                let c = [i as f64 * vox[0], j as f64 * vox[1], k as f64 * vox[2]];
                let (m, _, clear) = spec.material(pl.to_local(c));
                out[j * dims[0] + i] = if clear > half_diag {
                    spec.level(m) as f32
                } else {
                    let mut acc = 0.0;
                    for a in 0..S {
                        for b in 0..S {
                            for cc in 0..S {
                                let off = |x: usize, v: f64| ((x as f64 + 0.5) / S as f64 - 0.5) * v;
                                let p = [c[0] + off(a, vox[0]), c[1] + off(b, vox[1]), c[2] + off(cc, vox[2])];
                                acc += spec.level(spec.material(pl.to_local(p)).0);
                            }
                        }
                    }
                    (acc / (S * S * S) as f64) as f32
                };
            }
        }
        progress.add(1);
        Ok(())
    })?;
    blur(&mut vol, dims, std::array::from_fn(|a| spec.blur_vox * vox.iter().cloned().fold(f64::INFINITY, f64::min) / vox[a]));
    let full = if spec.bits == 8 { 255.0 } else { 65535.0 };
    let samples = {
        // scanner effects about the stack's z axis (the rotation axis): rings, cupping, drift
        let sc = &spec.scanner;
        let contrast = spec.levels[2] - spec.levels[0];
        let noise = sc.cnr.map_or(spec.noise, |c| contrast / c.max(0.1));
        let centre = [0.5 * (dims[0] - 1) as f64 * vox[0], 0.5 * (dims[1] - 1) as f64 * vox[1]];
        let big_r = centre[0].hypot(centre[1]).max(1e-9);
        let mut ring_rng = Rng(spec.seed ^ 0x005E_ED0F_7124);
        let rings: Vec<(f64, f64)> = (0..sc.rings).map(|_| (ring_rng.next() * big_r, if ring_rng.next() < 0.5 { -1.0 } else { 1.0 })).collect();
        let ring_w = vox[0].min(vox[1]);
        let noisy = |k: usize, v: &mut [f32]| {
            let mut rng = Rng(spec.seed.wrapping_mul(1_000_003).wrapping_add(k as u64));
            let drift = 1.0 + sc.drift * (2.0 * k as f64 / (dims[2].max(2) - 1) as f64 - 1.0);
            for (i, x) in v.iter_mut().enumerate() {
                let mut y = *x as f64;
                if sc.cupping != 0.0 || !rings.is_empty() {
                    let rho = (((i % dims[0]) as f64 * vox[0]) - centre[0]).hypot(((i / dims[0]) as f64 * vox[1]) - centre[1]);
                    y *= 1.0 - sc.cupping * (1.0 - (rho / big_r).powi(2)).max(0.0);
                    for (rr, sign) in &rings {
                        y += sign * sc.ring_amp * contrast * (-0.5 * ((rho - rr) / ring_w).powi(2)).exp();
                    }
                }
                *x = ((y * drift + noise * rng.gauss()) * full).round().clamp(0.0, full) as f32;
            }
        };
        vol.par_chunks_mut(slice).enumerate().for_each(|(k, v)| {
            noisy(k, v);
            progress.add(1);
        });
        if spec.bits == 8 {
            Samples::U8(vol.iter().map(|x| *x as u8).collect::<Vec<_>>().into())
        } else {
            Samples::U16(vol.iter().map(|x| *x as u16).collect::<Vec<_>>().into())
        }
    };
    drop(vol);
    let voxel = VoxelSize::new(vox, std::array::from_fn(|_| VoxelSource::User));
    let stack = Stack::from_samples(dims, samples, Some(voxel))?;
    let landmarks = landmarks(spec, &pl);
    let truth = truth(spec);
    Ok(Phantom { spec: spec.clone(), stack, landmarks, truth, placement: pl, length_mm: spec.length() })
}

/// Separable Gaussian blur with per-axis sigma in voxels (truncated at 3 sigma, edges clamped).
fn blur(vol: &mut [f32], dims: [usize; 3], sigma: [f64; 3]) {
    for axis in 0..3 {
        let s = sigma[axis];
        if s < 0.05 || dims[axis] < 2 {
            continue;
        }
        let r = (3.0 * s).ceil() as isize;
        let mut w: Vec<f32> = (-r..=r).map(|x| (-(x * x) as f64 / (2.0 * s * s)).exp() as f32).collect();
        let sum: f32 = w.iter().sum();
        w.iter_mut().for_each(|x| *x /= sum);
        let stride = [1, dims[0], dims[0] * dims[1]][axis];
        let len = dims[axis];
        let src = vol.to_vec();
        // lines along `axis`: start indices
        let slice = dims[0] * dims[1];
        vol.par_chunks_mut(slice).enumerate().for_each(|(k, out)| {
            for j in 0..dims[1] {
                for i in 0..dims[0] {
                    let idx = [i, j, k][axis] as isize;
                    let base = k * slice + j * dims[0] + i;
                    let mut acc = 0.0;
                    for (t, wt) in w.iter().enumerate() {
                        let x = (idx + t as isize - r).clamp(0, len as isize - 1);
                        let off = (x - idx) * stride as isize;
                        acc += wt * src[(base as isize + off) as usize];
                    }
                    out[j * dims[0] + i] = acc;
                }
            }
        });
    }
}

fn landmarks(spec: &PhantomSpec, pl: &Placement) -> Vec<Landmark> {
    let mut rng = Rng(spec.seed ^ 0xA5A5_5A5A);
    let mut out = vec![];
    let d0 = spec.duct(0.0);
    let tmax = spec.theta_max();
    out.push(Landmark { kind: Kind::AxisBase, p: pl.to_stack([0.0, 0.0, -0.5 * d0.b]) });
    out.push(Landmark { kind: Kind::AxisApex, p: pl.to_stack([0.0, 0.0, spec.duct(tmax).zc + 0.3]) });
    out.push(Landmark { kind: Kind::Window, p: pl.to_stack([d0.rc, 0.0, -0.5 * d0.b]) });
    let n = (tmax.to_degrees() / spec.landmark_step_deg).round().max(4.0) as usize;
    for kind in [Kind::Lamina, Kind::Ligament] {
        for k in 0..=n {
            let t = tmax * k as f64 / n as f64;
            let q = spec.edge(kind, t);
            let noise = [rng.gauss(), rng.gauss(), rng.gauss()].map(|g| g * spec.landmark_noise_mm);
            out.push(Landmark { kind, p: v3::add(pl.to_stack(q), noise) });
        }
    }
    out
}

/// Where an analytic edge crosses the plane through `c` with normal `t`, near θ.
fn edge_crossing(spec: &PhantomSpec, kind: Kind, c: V, t: V, theta: f64) -> V {
    let f = |a: f64| v3::dot(v3::sub(spec.edge(kind, a), c), t);
    let (mut a, mut b) = (theta - 0.3, theta + 0.3);
    for _ in 0..100 {
        let m = 0.5 * (a + b);
        if (f(a) < 0.0) == (f(m) < 0.0) { a = m } else { b = m }
    }
    spec.edge(kind, 0.5 * (a + b))
}

/// Truth per angle: areas by 5 µm rasterization of the normal plane (only this turn's fluid),
/// partition width between the analytic edges in the plane, wall by 0.5 µm steps outward.
pub fn truth(spec: &PhantomSpec) -> Vec<TruthRow> {
    let n = (spec.theta_max().to_degrees() / spec.truth_step_deg).round() as usize;
    (0..=n)
        .into_par_iter()
        .map(|k| {
            let t = spec.theta_max() * k as f64 / n as f64;
            let s_mm = arc_length(|x| spec.midline_speed(x), 0.0, t, 1e-9);
            let (sv, st, width, wall) = truth_section(spec, t, 0.005);
            TruthRow { angle_deg: t.to_degrees(), s_mm, sv_area_mm2: sv, st_area_mm2: st, partition_width_mm: width, wall_mm: wall }
        })
        .collect()
}

/// (SV area, ST area, partition width, wall) in the plane normal to the midline at θ, with the
/// areas rasterized at `pitch` mm.
pub fn truth_section(spec: &PhantomSpec, t: f64, pitch: f64) -> (f64, f64, f64, f64) {
    let c = spec.midline(t);
    let h = 1e-6;
    let tan = v3::unit(v3::sub(spec.midline(t + h), spec.midline(t - h)));
    let lam = edge_crossing(spec, Kind::Lamina, c, tan, t);
    let lig = edge_crossing(spec, Kind::Ligament, c, tan, t);
    let d = v3::sub(lig, lam);
    let u = v3::unit(v3::axpy(d, -v3::dot(d, tan), tan));
    let mut v = v3::cross(tan, u);
    if v[2] < 0.0 {
        v = v3::scale(v, -1.0);
    }
    let duct = spec.duct(t);
    let mid = v3::scale(v3::add(lam, lig), 0.5);
    let cu = v3::dot(v3::sub(mid, c), u);
    let (u0, u1) = (cu - 2.0 * duct.a - 0.1, cu + duct.a + 0.1);
    let (w0, w1) = (-duct.b - 0.1, duct.b + 0.1);
    // cells of 4×4 raster points: a cell whose centre is farther from every boundary than the
    // cell's half-diagonal is one material throughout, else each of its points is tested
    const K: usize = 4;
    let (nu, nw) = (((u1 - u0) / pitch) as usize / K, ((w1 - w0) / pitch) as usize / K);
    let half_diag = std::f64::consts::SQRT_2 * 0.5 * K as f64 * pitch;
    let (mut sv, mut st) = (0usize, 0usize);
    let mut count = |m: Mat, tt: f64, n: usize| {
        if (tt - t).abs() < PI {
            match m {
                Mat::Sv => sv += n,
                Mat::St => st += n,
                _ => {}
            }
        }
    };
    for cj in 0..nw {
        for ci in 0..nu {
            let at = |i: f64, j: f64| v3::axpy(v3::axpy(c, u0 + i * pitch, u), w0 + j * pitch, v);
            let (m, tt, clear) = spec.material(at((ci * K) as f64 + 0.5 * K as f64, (cj * K) as f64 + 0.5 * K as f64));
            if clear > half_diag {
                count(m, tt, K * K);
                continue;
            }
            for j in 0..K {
                for i in 0..K {
                    let (m, tt, _) = spec.material(at((ci * K + i) as f64 + 0.5, (cj * K + j) as f64 + 0.5));
                    count(m, tt, 1);
                }
            }
        }
    }
    // wall: outward from the partition midpoint along u
    let step = 0.0005;
    let mut wall = f64::NAN;
    let mut edge = None;
    for i in 0..8000 {
        let p = v3::axpy(mid, i as f64 * step, u);
        let m = spec.material(p).0;
        match (edge, m) {
            (None, Mat::Bone) if i > 0 => edge = Some(i),
            (Some(e), Mat::Background | Mat::Sv | Mat::St | Mat::Tissue) => {
                wall = (i - e) as f64 * step;
                break;
            }
            _ => {}
        }
    }
    let a = pitch * pitch;
    (sv as f64 * a, st as f64 * a, v3::norm(d), wall)
}

/// Writes the phantom into `dir`: phantom.tif (OME-TIFF), landmarks.csv, truth.csv, truth.json and
/// a project (phantom.ductline.json) that opens the stack with its landmarks placed.
pub fn write(ph: &Phantom, dir: &std::path::Path) -> Result<()> {
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
    crate::stack::write::write_tiff(&ph.stack, &dir.join("phantom.tif"), crate::stack::write::Packing::Deflate, false)?;
    crate::landmarks::write_csv(&dir.join("landmarks.csv"), &ph.landmarks)?;
    let mut csv = String::from("angle_deg,s_mm,sv_area_mm2,st_area_mm2,partition_width_mm,wall_mm\n");
    for r in &ph.truth {
        csv.push_str(&format!("{:.3},{:.6},{:.6},{:.6},{:.6},{:.6}\n", r.angle_deg, r.s_mm, r.sv_area_mm2, r.st_area_mm2, r.partition_width_mm, r.wall_mm));
    }
    crate::project::write_atomic(&dir.join("truth.csv"), csv.as_bytes())?;
    let json = serde_json::json!({
        "tool": "ductline",
        "version": crate::VERSION,
        "length_mm": ph.length_mm,
        "angular_depth_deg": ph.spec.theta_max().to_degrees(),
        "turns": ph.spec.turns,
        "voxel_um": ph.spec.voxel_um,
        "dims": ph.stack.dims,
        "handedness": if ph.spec.left { "left" } else { "right" },
        "spec": ph.spec,
        "note": "truth areas by 5 µm rasterization of planes normal to the analytic partition midline",
    });
    crate::project::write_atomic(&dir.join("truth.json"), serde_json::to_string_pretty(&json).unwrap_or_default().as_bytes())?;
    let prj_path = dir.join("phantom.ductline.json");
    let mut prj = crate::project::Project::new(&dir.join("phantom.tif"), &prj_path)?;
    prj.landmarks = ph.landmarks.clone();
    prj.save(&prj_path)
}
