//! Assisted tracing: from seven points (the axis, the window, two lamina and two ligament points
//! near the base) the lamina tips and ligament points are proposed along the whole spiral.
//!
//! The duct is followed apically in radial cuts (half-planes through the modiolar axis), one
//! every `step_deg`, each read as the mean of a thin slab of cuts that move with the spiral
//! (noise down by up to √7 where the shelf is faint). Each step is predicted from the points so
//! far (a straight line in θ through the last four, for the log radius and the height of each
//! edge) and searched near the prediction:
//!
//! 1. the partition's height: in each column of the cut just inside the predicted lamina tip, the
//!    height of the strongest bright ridge between darker fluid above and below (the bony shelf's
//!    outer end); their median;
//! 2. the ligament point: along the partition, outward, the first clear rise out of the lumen
//!    (fluid into the spiral ligament or the wall), at its half level;
//! 3. the lamina tip: along the partition, where the ridge falls from the shelf's level to the
//!    lumen's, at its half level, nearest the prediction.
//!
//! Each proposed point carries a confidence (the partition's and the duct's contrast against the
//! noise, lowered by a jump from the prediction).
//!
//! The search windows scale with the predicted partition's width, but with at least half the
//! duct's equivalent radius: a real basal membrane is a fifth of the duct's width or less. With
//! seeds on such a narrow membrane (under [`NARROW_MM`]), a lamina tip not found near its
//! prediction is looked for farther in, since the membrane widens toward the apex.
//!
//! Where the partition does not show near its prediction but the duct's dark blob does, it is
//! looked for again at other heights within the blob's middle half: a prediction made from
//! guesses drifts, and a partition outside the search band would never be found again.
//!
//! Where the partition does not show — clinical CT, where the bony shelf and the membrane are far
//! thinner than a voxel, or a stretch where the steps above fail — the lumen is followed instead:
//! the duct's dark blob in the cut (its centroid and size, [`duct`]), with the lamina and ligament
//! points kept where they lay relative to it (offsets in units of the blob's size, the median of
//! the last nine steps that found the partition, the seeds first); in a duct under
//! [`FEW_VOXELS`] in radius the ligament is put instead on the lumen's outer edge at the
//! partition's height, as far past it as at the seeds ([`outer_edge`]: the blob's size does not
//! follow a duct so few voxels across), and the lamina tip at the share of the width from the
//! centroid to it where the partition last showed, less the share a lamina loses toward the apex
//! ([`lamina_tip`]). Such points carry a confidence
//! under 0.5, so the review shows them as guesses. Tracing stops where the duct is lost — too
//! small to follow, too little contrast three steps running, or the cut leaves the stack — and
//! says at what angle and why. Last, each edge's proposals are smoothed along the spiral
//! ([`smooth_along`]; the seeds stay as placed).

use crate::frame::{Frame, Handedness, v3::V};
use crate::landmarks::{Kind, Landmark};
use crate::stack::Stack;
use crate::{Error, Result};

/// A proposed landmark and how sure the tracer is of it (0–1).
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Proposed {
    pub lm: Landmark,
    pub confidence: f64,
    /// Unwrapped angle (degrees).
    pub angle_deg: f64,
}

/// What a trace found.
#[derive(Clone, Debug)]
pub struct Trace {
    /// The frame the seeds set (handedness from the seeds' side of the window).
    pub frame: Frame,
    pub proposed: Vec<Proposed>,
    /// The last angle reached (degrees) and why tracing stopped there.
    pub stopped_deg: f64,
    pub reason: String,
}

/// One edge point in cochlear coordinates.
#[derive(Clone, Copy, Debug)]
struct Edge {
    angle: f64,
    r: f64,
    h: f64,
}

/// Values of the radial cut at `angle_deg`: `nr` × `nh` samples from (r0, h0) every `pitch` mm.
struct Cut {
    r0: f64,
    h0: f64,
    pitch: f64,
    nr: usize,
    nh: usize,
    v: Vec<f32>,
}

impl Cut {
    fn new(stack: &Stack, f: &Frame, angle_deg: f64, r: [f64; 2], h: [f64; 2], pitch: f64) -> Cut {
        Cut::mean(stack, f, &[(angle_deg, 0.0, 0.0)], r, h, pitch)
    }
    /// The mean of the cuts at the angles of `at` (angle in degrees, then the r and h shifts in mm
    /// that carry the cut at `at[0]`'s grid onto that angle's): a slab of cuts about one angle,
    /// each moved with the spiral, averages the noise of the cuts as a thick slice would without
    /// smearing the edges. A sample outside the stack in any cut is NaN.
    fn mean(stack: &Stack, f: &Frame, at: &[(f64, f64, f64)], r: [f64; 2], h: [f64; 2], pitch: f64) -> Cut {
        let nr = ((r[1] - r[0]) / pitch).ceil().max(2.0) as usize;
        let nh = ((h[1] - h[0]) / pitch).ceil().max(2.0) as usize;
        let mut v = vec![0.0f32; nr * nh];
        for &(a, dr, dh) in at {
            for j in 0..nh {
                for i in 0..nr {
                    let p = f.to_stack(r[0] + dr + i as f64 * pitch, a, h[0] + dh + j as f64 * pitch);
                    v[j * nr + i] += if stack.contains_mm(p) { stack.sample_mm(p) } else { f32::NAN };
                }
            }
        }
        let n = at.len() as f32;
        v.iter_mut().for_each(|x| *x /= n);
        Cut { r0: r[0], h0: h[0], pitch, nr, nh, v }
    }
    /// The cut the tracer reads for predicted lamina and ligament points `pl`, `pg` with windows
    /// scaled by `width` (the partition's, or more; see [`SPAN_OF_DUCT`]): from the lamina's
    /// inner side (1.2 widths in) to beyond the ligament, and as high as [`find`] reads about
    /// their mean height (its search band of a tenth of the width and a voxel either side, and
    /// the fluid it samples 4.5 voxels off the partition), sampled every `pitch` mm; the mean of
    /// the slab of cuts `slab` (see [`Cut::mean`]; its first angle is the cut's own).
    #[allow(clippy::too_many_arguments)]
    fn around(stack: &Stack, f: &Frame, slab: &[(f64, f64, f64)], pl: Edge, pg: Edge, width: f64, vmax: f64, pitch: f64) -> Cut {
        let hp = 0.5 * (pl.h + pg.h);
        let half_h = 0.1 * width + 7.0 * vmax;
        Cut::mean(stack, f, slab, [(pl.r - 1.2 * width).max(0.0), pg.r + 0.6 * width + 4.0 * vmax], [hp - half_h, hp + half_h], pitch)
    }
    fn at(&self, i: usize, j: usize) -> f32 {
        self.v[j * self.nr + i]
    }
    fn col(&self, r: f64) -> usize {
        (((r - self.r0) / self.pitch).round().max(0.0) as usize).min(self.nr - 1)
    }
    fn row(&self, h: f64) -> usize {
        (((h - self.h0) / self.pitch).round().max(0.0) as usize).min(self.nh - 1)
    }
}

fn median(v: &mut [f64]) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// The duct's lumen in one radial cut: centroid (cochlear r, h; mm) and equivalent radius
/// (√(area/π), mm), with its contrast against the noise.
#[derive(Clone, Copy, Debug)]
struct Duct {
    r: f64,
    h: f64,
    rho: f64,
    snr: f64,
}

/// The dark blob of the duct in the radial cut at `angle_deg`, near a predicted centroid `c`
/// (r, h mm) of a duct about `rho` mm in equivalent radius. The cut (2.5 ρ a side from the
/// prediction, at `pitch` or ρ/15 if coarser) is smoothed 3×3; the lumen level is its darkest tenth within ρ/2 of
/// the prediction, the surroundings' level the brightest tenth of the cut. Pixels below 40 % of
/// the way between them, connected to the darkest pixel within ρ/2 of the prediction, within
/// 1.4 ρ of it and nearer to it than to the centroids `others` of the turns already traced in
/// this plane (a neighbouring turn merged by a septum thinner than the blur stays out), form the
/// blob. None where the duct's neighbourhood leaves the stack or the lumen does not stand out (under six noise
/// widths).
fn duct(stack: &Stack, f: &Frame, angle_deg: f64, c: (f64, f64), rho: f64, pitch: f64, others: &[(f64, f64)]) -> Option<Duct> {
    let half = 2.5 * rho;
    // about fifteen samples a radius are plenty for a centroid and a size
    let pitch = pitch.max(rho / 15.0);
    let cut = Cut::new(stack, f, angle_deg, [(c.0 - half).max(0.0), c.0 + half], [c.1 - half, c.1 + half], pitch);
    let (nr, nh) = (cut.nr, cut.nh);
    let sm: Vec<f64> = (0..nr * nh)
        .map(|k| {
            let (i, j) = (k % nr, k / nr);
            let (mut sum, mut n) = (0.0, 0.0);
            for jj in j.saturating_sub(1)..=(j + 1).min(nh - 1) {
                for ii in i.saturating_sub(1)..=(i + 1).min(nr - 1) {
                    let x = cut.at(ii, jj) as f64;
                    if x.is_finite() {
                        (sum, n) = (sum + x, n + 1.0);
                    }
                }
            }
            if n > 0.0 { sum / n } else { f64::NAN }
        })
        .collect();
    let pos = |k: usize| (cut.r0 + (k % nr) as f64 * pitch, cut.h0 + (k / nr) as f64 * pitch);
    let dist = |k: usize| {
        let (r, h) = pos(k);
        let d = (r - c.0).hypot(h - c.1);
        if others.iter().any(|o| (r - o.0).hypot(h - o.1) < d) { f64::INFINITY } else { d }
    };
    // the duct's own neighbourhood must lie in the stack (the rest of the cut may leave it)
    let (inside_stack, around) = (0..nr * nh).filter(|&k| dist(k) <= 1.4 * rho).fold((0, 0), |(a, b), k| (a + sm[k].is_finite() as usize, b + 1));
    if inside_stack * 4 < around * 3 {
        return None;
    }
    let mut near: Vec<f64> = (0..nr * nh).filter(|&k| dist(k) <= 0.5 * rho && sm[k].is_finite()).map(|k| sm[k]).collect();
    let mut all: Vec<f64> = sm.iter().copied().filter(|x| x.is_finite()).collect();
    if near.len() < 4 || all.len() < 16 {
        return None;
    }
    near.sort_by(f64::total_cmp);
    all.sort_by(f64::total_cmp);
    let (lumen, wall) = (near[near.len() / 10], all[all.len() * 9 / 10]);
    // the noise from neighbour differences of the raw cut (MAD-based σ of a difference / √2)
    let mut diffs: Vec<f64> =
        (0..nr * nh).filter(|k| k % nr + 1 < nr).map(|k| (cut.v[k] as f64 - cut.v[k + 1] as f64).abs()).filter(|x| x.is_finite()).collect();
    let noise = (1.4826 * median(&mut diffs) / std::f64::consts::SQRT_2).max(1e-6);
    let snr = (wall - lumen) / noise;
    if snr < 6.0 {
        return None;
    }
    // (a duct under `FEW_VOXELS` in radius is cut at 30 %: see there)
    let vmax = stack.voxel.as_ref().map_or(0.0, |v| v.max());
    let frac = if rho < FEW_VOXELS * vmax { 0.3 } else { 0.4 };
    let thr = lumen + frac * (wall - lumen);
    let seed = (0..nr * nh).filter(|&k| dist(k) <= 0.5 * rho && sm[k].is_finite()).min_by(|&a, &b| sm[a].total_cmp(&sm[b]))?;
    let mut inside = vec![false; nr * nh];
    let mut stack_px = vec![seed];
    inside[seed] = true;
    let (mut n, mut sr, mut sh) = (0.0, 0.0, 0.0);
    while let Some(k) = stack_px.pop() {
        let (r, h) = pos(k);
        (n, sr, sh) = (n + 1.0, sr + r, sh + h);
        let (i, j) = (k % nr, k / nr);
        for q in [(i > 0).then(|| k - 1), (i + 1 < nr).then(|| k + 1), (j > 0).then(|| k - nr), (j + 1 < nh).then(|| k + nr)].into_iter().flatten() {
            if !inside[q] && sm[q] < thr && dist(q) <= 1.4 * rho {
                inside[q] = true;
                stack_px.push(q);
            }
        }
    }
    Some(Duct { r: sr / n, h: sh / n, rho: (n * pitch * pitch / std::f64::consts::PI).sqrt(), snr })
}

/// The lumen's outer edge (cochlear r, mm) at height `h` mm in the slab of cuts `slab` (see
/// [`Cut::mean`]) about a duct centred at radius `r` mm, `rho` mm in equivalent radius: along r,
/// in the mean over ±one voxel of height, the first crossing outward of half the way from the
/// lumen to the brightest within 2.5 ρ of it (`top`). Half the way up a blurred step is where the
/// step lies, whatever the blur, for a duct a few blur widths across; where soft tissue lines
/// the wall the crossing lies a little out in it, by about as much at every turn. Also returns
/// the profile's darkest within ρ/2 of `r` as a share of `top`.
///
/// The lumen is that darkest value, or, given `lumen_share` (the share read at the seeds, where
/// the duct is widest), `lumen_share`·`top` where that is darker: in a duct only a few blur
/// widths across the far wall's blur lifts the darkest value, and half the way from it the
/// crossing moved out as the duct narrowed (the family at 200 µm: ligament guesses up to 0.16 mm
/// out by the second turn; member 9's midline +5.7 % long, now +4.8 %, and the twelve members'
/// mean error 1.8 → 1.6 %). A share, not a level, follows a scanner's slow drift; it is used
/// only where the wall's level is above zero. None where the profile never rises half way or
/// leaves the stack first.
#[allow(clippy::too_many_arguments)]
fn outer_edge(
    stack: &Stack,
    f: &Frame,
    slab: &[(f64, f64, f64)],
    r: f64,
    h: f64,
    rho: f64,
    vmax: f64,
    pitch: f64,
    lumen_share: Option<f64>,
) -> Option<(f64, f64)> {
    let cut = Cut::mean(stack, f, slab, [(r - 0.5 * rho).max(0.0), r + 2.5 * rho], [h - vmax, h + vmax], pitch);
    let prof: Vec<f64> = (0..cut.nr).map(|i| (0..cut.nh).map(|j| cut.at(i, j) as f64).sum::<f64>() / cut.nh as f64).collect();
    let m = (0..=cut.col(r + 0.5 * rho)).filter(|&i| prof[i].is_finite()).min_by(|&x, &y| prof[x].total_cmp(&prof[y]))?;
    let top = prof[m..].iter().copied().take_while(|x| x.is_finite()).fold(f64::NEG_INFINITY, f64::max);
    if top <= prof[m] {
        return None; // a flat profile: no edge (and no 0/0 below)
    }
    let lumen = lumen_share.filter(|_| top > 0.0).map_or(prof[m], |q| (q * top).min(prof[m]));
    let half = lumen + 0.5 * (top - lumen);
    let i = (m + 1..cut.nr).take_while(|&i| prof[i].is_finite()).find(|&i| prof[i] >= half)?;
    let t = ((half - prof[i - 1]) / (prof[i] - prof[i - 1])).clamp(0.0, 1.0);
    Some((cut.r0 + (i as f64 - 1.0 + t) * cut.pitch, prof[m] / top))
}

/// The duct's equivalent radius (voxels) under which its blob is cut at 30 % of the way from the
/// lumen to the surroundings instead of 40 %: the soft tissue round the duct (spiral ligament,
/// limbus, nerve core; a quarter to a third of the way to bone) then blurs into the cut and joins
/// the blob, which swells and drifts off the duct. At 200 µm three of the family's twelve
/// members lost the duct in the basal turn (at 190–420° of 811–907°); cut at 30 % all reach 94 %
/// of the depth or more. At 150 µm the traced lengths' largest error fell from +5.2 to +4.3 %
/// (member 9), and the apical blob is followed a little farther (member 1: 43° past the
/// landmarks' end, 20° before). At 25–80 µm the ducts are larger (only member 2's apex is cut
/// lower) and the traces are unchanged. Retrying at 30 % only where the 40 % blob is rejected
/// does not help: the blobs before had already drifted with the tissue they took in.
const FEW_VOXELS: f64 = 5.0;

/// The smallest duct (equivalent radius, voxels at their largest side) whose blob is followed
/// where the partition does not show. At 300 µm (clinical CT) a human apical duct is about three
/// voxels across: with a floor of 1.5 voxels in radius the family's members stopped there at
/// 1–81 % of the depth (three under 10 %: the basal duct's blob, cut at 30 %, read 2.6–2.9
/// voxels across); from one voxel eight of twelve reach 98 % or more (lengths +0.4 to +5.4 %). At
/// 150 and 200 µm the traces are unchanged but for member 4 at 200 µm (95 → 100 % of the depth).
const MIN_RHO_VOX: f64 = 1.0;

/// A partition narrower than this (mm) at the seeds is a basal basilar membrane of a real
/// cochlea (about 0.08–0.16 mm wide there, widening toward the apex; REFERENCES.md, secondary),
/// not a partition spanning the duct as in the phantom family.
const NARROW_MM: f64 = 0.3;

/// The duct's equivalent radius (mm) up to which the first search for its blob widens from a
/// narrow partition: three voxels at clinical resolution (150 µm); a human basal duct is larger
/// still (scalae of about 1 mm² each; from memory).
const DUCT_RHO_MM: f64 = 0.45;

/// Where the partition's ends lie relative to the duct, in units of its equivalent radius:
/// (lamina r, lamina h, ligament r, ligament h) minus the centroid, over ρ; and last the
/// ligament's radius itself (mm), where they were read (see [`lamina_tip`]).
type Offsets = [f64; 5];

/// The tracer's windows about the partition's ends scale with the partition's width, but with
/// at least this share of the duct's equivalent radius: a basal membrane of a fifth of the
/// duct's width would otherwise leave windows of a voxel or two, too small to read the shelf's
/// level inside its tip or to take the step-to-step change of a membrane that widens apically.
const SPAN_OF_DUCT: f64 = 0.5;

/// How fast the bony lamina's share of the duct's width (from its inner wall to the ligament, at
/// the partition) falls toward the apex, per unit of ln(ligament radius): the share about halves
/// (× 0.55) while the radius falls about 3.5-fold from base to apex. The basilar membrane widens
/// from 0.08–0.16 mm at the base to 0.42–0.65 mm at the apex (REFERENCES.md, secondary) while
/// the duct narrows; the 3.5-fold fall of the radius is from memory.
const LAMINA_SHARE_PER_LN_R: f64 = 0.45 / 1.252_763; // ln 3.5

/// The guessed lamina tip's radius (mm) on a duct whose centroid lies at radius `r` and whose
/// ligament lies at `lig` (mm), from where it lay at the last steps that showed the partition:
/// `q` = (tip − centroid) / (ligament − centroid) there, at a ligament radius `cal_r` (mm).
/// The lamina's share of the width, (q + 1)/2 on a duct symmetric about its centroid, falls
/// apically by [`LAMINA_SHARE_PER_LN_R`]. Kept at the calibration's q, the tip drifted outward
/// turn by turn: on the family's members at 200 µm, all guesses past the seeds, it lay
/// 0.16–0.33 mm out over the trace's last fifth (median; now 0.02–0.17 mm).
/// None where the ligament does not lie outward of the centroid or `q` is not a number.
fn lamina_tip(r: f64, lig: f64, q: f64, cal_r: f64) -> Option<f64> {
    if !(lig > r && q.is_finite() && cal_r > 0.0) {
        return None;
    }
    let share = 0.5 * (q + 1.0) * (1.0 - LAMINA_SHARE_PER_LN_R * (cal_r / lig).ln().max(0.0)).max(0.2);
    Some(r + (lig - r) * (2.0 * share - 1.0))
}

/// How far back (degrees) the partition's place relative to the lumen is taken from, for the
/// guesses: the last nine steps that showed both within this, or the last three whatever their
/// angle where fewer did. Where the lumen's blob was not found for a stretch, the last nine went
/// back far, to a duct of another shape: family member 8 drawn at isotropic 35 µm found both again
/// at 610–620° after such a stretch, and its guesses from 630° on lay 4–10 voxels off to the apex
/// (p95 8.6 voxels; now 1.3).
const CAL_WINDOW_DEG: f64 = 90.0;

fn offsets(d: &Duct, l: Edge, g: Edge) -> Offsets {
    [(l.r - d.r) / d.rho, (l.h - d.h) / d.rho, (g.r - d.r) / d.rho, (g.h - d.h) / d.rho, g.r]
}

/// Straight-line prediction at `a` from the last four points (least squares in θ; radius on a log scale).
fn predict(pts: &[Edge], a: f64) -> Edge {
    let tail = &pts[pts.len().saturating_sub(4)..];
    let n = tail.len() as f64;
    let ma = tail.iter().map(|e| e.angle).sum::<f64>() / n;
    let saa: f64 = tail.iter().map(|e| (e.angle - ma).powi(2)).sum();
    let line = |g: &dyn Fn(&Edge) -> f64| {
        let mg = tail.iter().map(g).sum::<f64>() / n;
        let slope = if saa > 0.0 { tail.iter().map(|e| (e.angle - ma) * (g(e) - mg)).sum::<f64>() / saa } else { 0.0 };
        mg + slope * (a - ma)
    };
    Edge { angle: a, r: line(&|e| e.r.ln()).exp(), h: line(&|e| e.h) }
}

/// The slab of cuts read for the step at `angle` (see [`Cut::mean`]): the cut itself first, then
/// pairs either side about a voxel apart at the partition's middle, over at most ±0.4 of the step
/// and three a side, each shifted as the predicted partition moves. Cuts a voxel apart carry
/// independent noise; the partition's bony shelf, under a voxel thick and faint at 60–80 µm,
/// then shows in a slab where one cut loses it in the noise.
fn slab(lam: &[Edge], lig: &[Edge], angle: f64, step_deg: f64, vmax: f64) -> Vec<(f64, f64, f64)> {
    let mid = |a: f64| {
        let (l, g) = (predict(lam, a), predict(lig, a));
        (0.5 * (l.r + g.r), 0.5 * (l.h + g.h))
    };
    let (r0, h0) = mid(angle);
    let da = (vmax / r0.max(vmax)).to_degrees();
    let m = ((0.4 * step_deg / da).floor() as i32).clamp(0, 3);
    let mut out = vec![(angle, 0.0, 0.0)];
    for k in (1..=m).flat_map(|k| [k, -k]) {
        let a = angle + k as f64 * da;
        let (r, h) = mid(a);
        out.push((a, r - r0, h - h0));
    }
    out
}

/// Proposes lamina and ligament landmarks along the spiral from `seeds` (axis_base, axis_apex,
/// window, and at least two lamina and two ligament points near the base), every `step_deg`.
///
/// The returned proposals exclude the seeds; `stopped_deg` and `reason` say where and why the
/// trace ended.
pub fn trace(stack: &Stack, seeds: &[Landmark], step_deg: f64) -> Result<Trace> {
    let vox = stack.voxel()?;
    if !(1.0..=45.0).contains(&step_deg) {
        return Err(Error::invalid(format!("the trace step must lie within 1…45°, got {step_deg}°")));
    }
    let one = |k: Kind| crate::landmarks::single(seeds, k);
    let (b, a, w) = (one(Kind::AxisBase)?, one(Kind::AxisApex)?, one(Kind::Window)?);
    // Seeds spanning enough of the spiral to fit it (a trace resumed from accepted points): the
    // fit gives the handedness (the way they turn) and unwraps their angles. Seeds near the base
    // only: they lie just past the window, at small positive angles (summed, not counted by sign:
    // seeds on the window's own line sit at ±0°), as they lie.
    let right = Frame::new(b, a, w, Handedness::Right)?;
    let spiral = crate::centreline::Centreline::fit(&right, seeds, &Default::default()).ok();
    let handed = match &spiral {
        Some(s) => s.frame.handed,
        None => {
            let side: f64 =
                seeds.iter().filter(|l| matches!(l.kind, Kind::Lamina | Kind::Ligament)).map(|l| crate::frame::wrap180(right.to_cochlear(l.p)[1])).sum();
            if side >= 0.0 { Handedness::Right } else { Handedness::Left }
        }
    };
    let frame = Frame::new(b, a, w, handed)?;
    let edges = |k: Kind| -> Vec<Edge> {
        let mut v: Vec<Edge> = seeds
            .iter()
            .filter(|l| l.kind == k)
            .map(|l| {
                let c = frame.to_cochlear(l.p);
                let angle = spiral.as_ref().map_or(c[1], |s| s.unwrap_deg(c[0], c[1], c[2]));
                Edge { angle, r: c[0], h: c[2] }
            })
            .collect();
        v.sort_by(|x, y| x.angle.total_cmp(&y.angle));
        v
    };
    let (mut lam, mut lig) = (edges(Kind::Lamina), edges(Kind::Ligament));
    if lam.len() < 2 || lig.len() < 2 {
        return Err(Error::invalid(format!("tracing needs at least two lamina and two ligament seeds near the base; got {} and {}", lam.len(), lig.len())));
    }
    let vmax = vox.max();
    let pitch = 0.5 * vox.min();
    let mut proposed = vec![];
    let start = lam.last().unwrap().angle.max(lig.last().unwrap().angle);
    // the duct beside the partition: its blob at the last seeds' angle (found twice, the second
    // time at the size the first found) sets where the partition's ends lie relative to it
    let mid = |l: &Edge, g: &Edge| (0.5 * (l.r + g.r), 0.5 * (l.h + g.h));
    let (l0, g0) = (*lam.last().unwrap(), *lig.last().unwrap());
    // (half the partition's width, at least three voxels, is the first guess of the duct's size.
    // At the base of a real cochlea the basilar membrane is a fifth of the duct's width or less
    // (under [`NARROW_MM`]), and its midpoint lies by the lateral wall: there, while the blob
    // fills the disc it may take, the search widens from its centroid, up to [`DUCT_RHO_MM`].
    // Past that the disc would reach the next turn, not yet traced to be kept apart.)
    let mut guess = None;
    let (mut c, mut rho) = (mid(&l0, &g0), (0.5 * (g0.r - l0.r).abs()).max(3.0 * vmax));
    let narrow = (g0.r - l0.r).abs() < NARROW_MM;
    while let Some(d) = duct(stack, &frame, start, c, rho, pitch, &[]) {
        guess = Some(d);
        if !narrow || d.rho < 0.8 * rho || rho >= 0.99 * DUCT_RHO_MM {
            break;
        }
        (c, rho) = ((d.r, d.h), (1.5 * rho).min(DUCT_RHO_MM));
    }
    let first = guess.and_then(|d| duct(stack, &frame, start, (d.r, d.h), d.rho, pitch, &[]));
    // (the offsets found wherever the partition showed, with their angles, the seeds' first; the
    // median of the last nine within [`CAL_WINDOW_DEG`] is used, so one step misread in the noise
    // does not move the guesses that follow)
    let mut cals: Vec<(f64, Offsets)> = first.map(|d| (start, offsets(&d, l0, g0))).into_iter().collect();
    let mut cal: Option<Offsets> = cals.first().map(|c| c.1);
    // (how far the seeds' ligament lies past the lumen's outer edge, mm, and the lumen's share of
    // the wall's level there: see the guesses below)
    let at_seeds = first.and_then(|d| outer_edge(stack, &frame, &slab(&lam, &lig, start, step_deg, vmax), d.r, 0.5 * (l0.h + g0.h), d.rho, vmax, pitch, None));
    let past_edge = at_seeds.map(|e| g0.r - e.0);
    // (a share below one: the wall brighter than zero and than the lumen; where the wall's level
    // is zero or below the ratio says nothing of a gain)
    let share_at_seeds = at_seeds.map(|e| e.1).filter(|q| q.is_finite() && *q < 1.0);
    let mut ducts: Vec<(Edge, f64)> = first.map(|d| (Edge { angle: start, r: d.r, h: d.h }, d.rho)).into_iter().collect();
    let mut r_min = ducts.first().map_or(f64::INFINITY, |d| d.0.r);
    let mut angle = start;
    let mut weak = 0;
    // the number of points of each run of steps found one after another (a failed step ends a run)
    let mut runs: Vec<usize> = vec![];
    // the last angle with accepted points
    let mut last_ok = start;
    let (reason, stopped) = loop {
        angle += step_deg;
        if angle > 2000.0 {
            break ("six turns traced; stopped".to_string(), last_ok);
        }
        let (pl, pg) = (predict(&lam, angle), predict(&lig, angle));
        let width = pg.r - pl.r;
        let rho_now = ducts.last().map_or(0.0, |d| d.1);
        // the scale of the search windows for a partition `w` mm wide
        let span_of = |w: f64| w.max(SPAN_OF_DUCT * rho_now);
        let span = span_of(width);
        // (the slab's cuts follow the predicted partition, whatever lamina tip is tried in it)
        let cuts = slab(&lam, &lig, angle, step_deg, vmax);
        // the partition itself, where it shows, for a lamina tip predicted at `pl`
        let look = |pl: Edge, pg: Edge| {
            let width = pg.r - pl.r;
            let span = span_of(width);
            if width < 3.0 * vmax {
                return Err(format!("the predicted partition is under three voxels wide ({:.3} mm)", width));
            }
            let cut = Cut::around(stack, &frame, &cuts, pl, pg, span, vmax, pitch);
            find(&cut, pl, pg, span, vmax, true).and_then(|(l, g, conf)| {
                // a point far from its prediction is less sure; one over a fifth of the span off
                // is not taken (the spiral changes slowly between steps)
                let off = (l.r - pl.r).abs().max((g.r - pg.r).abs()).max((l.h - pl.h).abs()) / span;
                let conf = conf * (-(off / 0.12).powi(2)).exp();
                if conf < 0.2 || off > 0.2 {
                    Err("the partition is lost (confidence under 0.2, or far from its prediction)".to_string())
                } else {
                    Ok((l, g, conf))
                }
            })
        };
        let mut fine = look(pl, pg);
        // A narrow basal membrane widens toward the apex (REFERENCES.md) faster than the steps
        // so far predict, and its tip is then lost inward of the prediction: there the tip is
        // looked for farther in, a quarter of the span a step, up to a partition 1.4 ρ wide
        // (seven tenths of the duct's equivalent diameter); the first found with a confidence of
        // 0.3 or more is taken.
        if narrow && fine.is_err() {
            let mut w = if width < 3.0 * vmax { 3.0 * vmax } else { width + 0.25 * span };
            while w <= 1.4 * rho_now {
                let found = look(Edge { r: pg.r - w, ..pl }, pg);
                if found.as_ref().is_ok_and(|f| f.2 >= 0.3) {
                    fine = found;
                    break;
                }
                w += 0.25 * span;
            }
        }
        // the duct's blob, near where the last ones predict it and apart from the turns below
        // (traced one and two turns back in the same plane)
        // (the size expected: the median of the last nine; the duct narrows slowly toward the
        // apex, and a blob that jumps or swells is something else)
        let lumen = (!ducts.is_empty()).then(|| median(&mut ducts.iter().rev().take(9).map(|d| d.1).collect::<Vec<_>>())).and_then(|rho| {
            let tail: Vec<Edge> = ducts.iter().map(|d| d.0).collect();
            let c = predict(&tail, angle);
            // (the blob found there, else the partition's midpoint among the points placed there:
            // a trace resumed from accepted points has no blobs of its own that far back)
            let nearest = |v: &[Edge], a: f64| {
                v.iter().copied().filter(|e| (e.angle - a).abs() < 0.6 * step_deg).min_by(|x, y| (x.angle - a).abs().total_cmp(&(y.angle - a).abs()))
            };
            let below: Vec<(f64, f64)> = [360.0, 720.0]
                .iter()
                .filter_map(|t| {
                    let a = angle - t;
                    let placed = nearest(&lam, a).zip(nearest(&lig, a)).map(|(l, g)| mid(&l, &g));
                    nearest(&tail, a).map(|e| (e.r, e.h)).or(placed)
                })
                .collect();
            duct(stack, &frame, angle, (c.r, c.h), rho, pitch, &below)
                .filter(|d| (d.r - c.r).hypot(d.h - c.h) < 0.5 * rho && d.rho > 0.6 * rho && d.rho < 1.25 * rho)
        });
        // Where the partition does not show near its prediction but the lumen does, it is looked
        // for at other heights within the lumen's middle half, a search band's height apart:
        // predicted from guesses (the lumen's centroid and the partition's place relative to it at
        // the last steps that showed it), the prediction drifts as the scalae's shares of the duct
        // change, and a partition beyond the search band is never found again.
        if fine.is_err()
            && cal.is_some()
            && let Some(d) = &lumen
        {
            let step = 0.1 * span + vmax;
            let k = (0.5 * d.rho / step).floor() as i32;
            let mid_h = 0.5 * (pl.h + pg.h);
            let best = (-k..=k)
                .map(|j| d.h + j as f64 * step - mid_h)
                .filter_map(|dh| look(Edge { h: pl.h + dh, ..pl }, Edge { h: pg.h + dh, ..pg }).ok())
                .filter(|(l, g, c)| *c >= 0.3 && (0.5 * (l.h + g.h) - d.h).abs() <= 0.5 * d.rho)
                .max_by(|a, b| a.2.total_cmp(&b.2));
            if let Some(b) = best {
                fine = Ok(b);
            }
        }
        let found = match (fine, lumen, cal) {
            (Ok((l, g, conf)), _, _) => {
                if let Some(d) = &lumen {
                    let o = offsets(d, l, g);
                    cals.push((angle, o));
                    let mut tail: Vec<&Offsets> = cals[cals.len().saturating_sub(9)..].iter().filter(|c| c.0 >= angle - CAL_WINDOW_DEG).map(|c| &c.1).collect();
                    if tail.len() < 3 {
                        tail = cals[cals.len().saturating_sub(3)..].iter().map(|c| &c.1).collect();
                    }
                    cal = Some(std::array::from_fn(|k| median(&mut tail.iter().map(|c| c[k]).collect::<Vec<_>>())));
                }
                Ok((l, g, conf))
            }
            // the partition does not show: kept where it lay relative to the lumen, as a guess
            // past the apex the blob found is something else: the spiral never turns outward
            (Err(why), Some(d), Some(_)) if d.r > r_min + 0.5 * d.rho => Err(format!("{why}; the lumen turns outward (past the apex?)")),
            (Err(why), Some(d), Some(o)) if d.rho >= MIN_RHO_VOX * vmax => {
                let mut l = Edge { angle, r: d.r + o[0] * d.rho, h: d.h + o[1] * d.rho };
                let mut g = Edge { angle, r: d.r + o[2] * d.rho, h: d.h + o[3] * d.rho };
                // The ligament lies on the lateral wall: the lumen's outer edge at the
                // partition's height, as far past it as at the seeds. Kept in units of the blob's
                // size it drifted outward turn by turn: at 200 µm the blob (cut 30 % of the way
                // to the surroundings) is about as large at the apex as at the base, while the
                // duct halves (the family's members at 200 µm, all guesses past the seeds: the
                // ligament 0.2–0.6 mm out by the apex, midline lengths +3 to +11 %).
                // (only for ducts under `FEW_VOXELS` in radius: finer, the partition shows often
                // enough to keep the offsets current, and along its height the profile runs on the
                // bony shelf, whose rise is taken for the wall: member 12 at 45 µm stopped at 63 %)
                if d.rho < FEW_VOXELS * vmax
                    && let Some(e) =
                        past_edge.and_then(|p| outer_edge(stack, &frame, &cuts, d.r, 0.5 * (l.h + g.h), d.rho, vmax, pitch, share_at_seeds).map(|e| e.0 + p))
                {
                    g.r = e;
                    l.r = lamina_tip(d.r, g.r, o[0] / o[2], o[4]).unwrap_or(l.r);
                }
                // Past the apex a guess follows whatever dark blob lies near the axis (the
                // helicotrema's cap, the apical modiolus): the outside phantom at 200 µm, all
                // guesses, ran on 360° past its 900° with the lamina tip 0.15–0.3 mm from the
                // axis. A duct whose lamina tip comes within half its radius of the axis is past
                // its end (a lamina tip lies a shelf's width or more out from the axis).
                if l.r < 0.5 * d.rho {
                    Err(format!("{why}; the guessed lamina tip reaches the modiolar axis (past the apex?)"))
                } else {
                    Ok((l, g, 0.45 * (d.snr / 12.0).min(1.0)))
                }
            }
            (Err(why), Some(d), Some(_)) if d.rho < MIN_RHO_VOX * vmax => {
                Err(format!("{why}; the lumen is under two voxels across ({:.3} mm, equivalent diameter) to follow", 2.0 * d.rho))
            }
            (Err(why), None, Some(_)) => Err(format!("{why}, and the lumen is lost (no dark duct near its prediction)")),
            (Err(why), _, _) => Err(why),
        };
        if let Some(d) = lumen {
            ducts.push((Edge { angle, r: d.r, h: d.h }, d.rho));
            r_min = r_min.min(d.r);
        }
        match found {
            Ok((l, g, conf)) => {
                if weak > 0 || runs.is_empty() {
                    runs.push(0);
                }
                *runs.last_mut().unwrap() += 1;
                weak = 0;
                for (e, kind) in [(l, Kind::Lamina), (g, Kind::Ligament)] {
                    let p = frame.to_stack(e.r, e.angle, e.h);
                    if !stack.contains_mm(p) {
                        return Ok(Trace { frame, proposed, stopped_deg: last_ok, reason: "the spiral leaves the stack".into() });
                    }
                    proposed.push(Proposed { lm: Landmark { kind, p }, confidence: conf, angle_deg: angle });
                }
                lam.push(l);
                lig.push(g);
                last_ok = angle;
            }
            Err(why) => {
                weak += 1;
                if weak >= 3 {
                    break (why, last_ok);
                }
            }
        }
    };
    // past the duct's end the search can still find a shelf, a wall or a dark blob in what lies
    // beyond (the apical cap, the modiolus): a tail of points turning outward is dropped
    let (mut stopped, mut reason) = (stopped, reason);
    // a short run found again after a gap, with nothing after it, is something beyond the duct
    if runs.len() > 1 && runs.last().is_some_and(|&n| n < 3) {
        let n = runs.pop().unwrap();
        let from = lam[lam.len() - n].angle;
        lam.truncate(lam.len() - n);
        lig.truncate(lig.len() - n);
        proposed.retain(|p| p.angle_deg < from);
        stopped = proposed.last().map_or(start, |p| p.angle_deg);
        reason = format!("{reason} (the last points, found again past a gap, are left out)");
    }
    while lam.len() > 1 && proposed.last().is_some_and(|p| p.angle_deg > start) {
        let (l, g) = (lam[lam.len() - 1], lig[lig.len() - 1]);
        if !(outward(&lam[..lam.len() - 1], l, g.r - l.r) || outward(&lig[..lig.len() - 1], g, g.r - l.r)) {
            break;
        }
        lam.pop();
        lig.pop();
        proposed.retain(|p| p.angle_deg < l.angle);
        stopped = proposed.last().map_or(start, |p| p.angle_deg);
        reason = "the partition turns outward past here (the duct's end?)".to_string();
    }
    // each edge's proposals smoothed along the spiral against the seeds and each other (four
    // steps a side; at coarser steps the spiral bends too much between them)
    if step_deg <= 15.0 {
        for (curve, kind) in [(&lam, Kind::Lamina), (&lig, Kind::Ligament)] {
            let conf: Vec<f64> =
                curve.iter().map(|e| proposed.iter().find(|p| p.lm.kind == kind && p.angle_deg == e.angle).map_or(1.0, |p| p.confidence)).collect();
            let fixed: Vec<bool> = curve.iter().map(|e| e.angle <= start).collect();
            let smooth = smooth_along(curve, &conf, &fixed, 4.0 * step_deg, vmax);
            for p in proposed.iter_mut().filter(|p| p.lm.kind == kind) {
                if let Some(e) = smooth.iter().find(|e| e.angle == p.angle_deg) {
                    p.lm.p = frame.to_stack(e.r, e.angle, e.h);
                }
            }
        }
    }
    Ok(Trace { frame, proposed, stopped_deg: stopped.max(start), reason })
}

/// An edge's points smoothed along the spiral: each point not `fixed` (the seeds are the user's)
/// is replaced by a local quadratic fit in θ (log radius and height) over the points within
/// `half_deg` degrees, weighted by a tricube of the angle apart, by each point's confidence
/// `conf` and, after a first pass, by Tukey's biweight of its misfit (4.685 robust σ, σ at
/// least a quarter of `vmax` mm), so a step misread in the noise moves toward its neighbours and
/// a stray one barely pulls them. Where the shelf is faint (60–80 µm, a blur over a voxel) the
/// lamina points scatter by ±1–2 voxels from step to step (member 1 at 70 µm: 0.8 voxel
/// standard deviation, 0.56 after); a quadratic follows the basal turn's dip, which a straight
/// line over four steps a side cut short (3 % of the scalae's areas moved from one scala to the
/// other at 120–240° on member 10).
fn smooth_along(curve: &[Edge], conf: &[f64], fixed: &[bool], half_deg: f64, vmax: f64) -> Vec<Edge> {
    let n = curve.len();
    let mut rob = vec![1.0; n];
    let mut out = curve.to_vec();
    for pass in 0..3 {
        for i in (0..n).filter(|&i| !fixed[i]) {
            // weighted least squares of a quadratic in the angle apart (the basal turn's dip bends
            // the height too much for a straight line over four steps a side), value at 0
            let mut a = [[0.0f64; 3]; 3];
            let (mut by, mut bz) = ([0.0f64; 3], [0.0f64; 3]);
            for j in 0..n {
                let d = (curve[j].angle - curve[i].angle) / half_deg;
                if d.abs() >= 1.0 {
                    continue;
                }
                let w = (1.0 - d.abs().powi(3)).powi(3) * conf[j].max(0.05) * rob[j];
                let b = [1.0, d, d * d];
                for (p, bp) in b.iter().enumerate() {
                    for (q, bq) in b.iter().enumerate() {
                        a[p][q] += w * bp * bq;
                    }
                    by[p] += w * bp * curve[j].r.ln();
                    bz[p] += w * bp * curve[j].h;
                }
            }
            if let (Some(y), Some(z)) = (solve3(a, by), solve3(a, bz)) {
                out[i].r = y[0].exp();
                out[i].h = z[0];
            }
        }
        if pass == 2 {
            break;
        }
        let miss: Vec<f64> = (0..n).map(|i| (curve[i].r - out[i].r).hypot(curve[i].h - out[i].h)).collect();
        let mut m: Vec<f64> = (0..n).filter(|&i| !fixed[i]).map(|i| miss[i]).collect();
        let sigma = (1.4826 * median(&mut m)).max(0.25 * vmax);
        rob = miss.iter().map(|e| (1.0 - (e / (4.685 * sigma)).powi(2)).max(0.0).powi(2)).collect();
        // the seeds always count
        (0..n).filter(|&i| fixed[i]).for_each(|i| rob[i] = 1.0);
    }
    out
}

/// The solution of the 3 × 3 system `a` x = `b` (Cramer's rule); None where `a` is singular
/// (fewer than three distinct angles in a window).
fn solve3(a: [[f64; 3]; 3], b: [f64; 3]) -> Option<[f64; 3]> {
    let det = |m: [[f64; 3]; 3]| {
        m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1]) - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
            + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0])
    };
    let d = det(a);
    let scale = a.iter().flatten().fold(0.0f64, |m, x| m.max(x.abs()));
    if !(d.abs() > 1e-12 * scale.powi(3)) {
        return None;
    }
    Some(std::array::from_fn(|k| {
        let mut m = a;
        (0..3).for_each(|r| m[r][k] = b[r]);
        det(m) / d
    }))
}

/// Whether edge point `e` lies farther from the axis than its curve did anywhere over the half
/// turn before it, by more than 0.15 of the partition's `width`: past the basal turn (540° on) a
/// cochlea's spiral only tightens, so such a point lies beyond the duct's end. (Nearer the base
/// the turn can widen before it tightens.)
fn outward(curve: &[Edge], e: Edge, width: f64) -> bool {
    e.angle >= 540.0
        && curve.iter().filter(|c| c.angle >= e.angle - 180.0 && c.angle < e.angle).map(|c| c.r).reduce(f64::min).is_some_and(|m| e.r > m + 0.15 * width)
}

/// The lamina tip, the ligament point and a confidence in one cut, given their predictions and
/// the `width` (mm) the search windows scale with (the predicted partition's, or more for a
/// narrow membrane: [`SPAN_OF_DUCT`]); `crests`: whether a ligament rise that levels off only
/// at a thin wall's crest is fitted (see below).
fn find(cut: &Cut, pl: Edge, pg: Edge, width: f64, vmax: f64, crests: bool) -> std::result::Result<(Edge, Edge, f64), String> {
    let d = ((1.5 * vmax) / cut.pitch).round().max(2.0) as usize; // ridge flank offset (rows)
    let band = ((0.1 * width + vmax) / cut.pitch).ceil() as usize;
    let hp = 0.5 * (pl.h + pg.h);
    let j0 = cut.row(hp);
    if cut.v.iter().filter(|x| x.is_nan()).count() * 4 > cut.v.len() {
        return Err("the cut leaves the stack".into());
    }
    // 1. partition height: ridge rows in the columns of the shelf's outer end, just inside the
    // predicted tip (past the limbus, which pads the shelf's inner part; the membrane beyond the
    // tip is too thin to show)
    let (ca, cb) = (cut.col(pl.r - (0.15 * width).max(2.0 * vmax)), cut.col(pl.r - 0.02 * width));
    let ridge = |i: usize, j: usize| -> f64 {
        if j < d || j + d >= cut.nh {
            return f64::NAN;
        }
        (cut.at(i, j) as f64) - 0.5 * (cut.at(i, j - d) as f64 + cut.at(i, j + d) as f64)
    };
    let mut rows = vec![];
    let mut strengths = vec![];
    for i in ca..=cb {
        let best = (j0.saturating_sub(band)..=(j0 + band).min(cut.nh - 1))
            .filter_map(|j| Some((j, ridge(i, j))).filter(|x| x.1.is_finite()))
            .max_by(|a, b| a.1.total_cmp(&b.1));
        if let Some((j, s)) = best {
            rows.push(j as f64);
            strengths.push(s);
        }
    }
    if rows.len() < 3 {
        return Err("no partition found in the cut".into());
    }
    let jp = median(&mut rows).round() as usize;
    let h = cut.h0 + jp as f64 * cut.pitch;
    // levels: the lumen from just above and below the partition in the middle of the duct, the
    // noise from their spread
    let mid = cut.col(0.5 * (pl.r + pg.r));
    let wide = ((0.15 * width) / cut.pitch).round().max(3.0) as usize;
    let mut fluid: Vec<f64> = vec![];
    let mut diffs: Vec<f64> = vec![];
    for j in [jp.saturating_sub(3 * d), jp.saturating_sub(2 * d), (jp + 2 * d).min(cut.nh - 1), (jp + 3 * d).min(cut.nh - 1)] {
        for i in mid.saturating_sub(wide)..(mid + wide).min(cut.nr - 1) {
            let (a, b) = (cut.at(i, j) as f64, cut.at(i + 1, j) as f64);
            if a.is_finite() && b.is_finite() {
                fluid.push(a);
                diffs.push((a - b).abs());
            }
        }
    }
    if fluid.len() < 8 {
        return Err("the cut leaves the stack".into());
    }
    let lumen = median(&mut fluid);
    // the noise from neighbour differences (robust to slow shading): MAD-based σ of a difference / √2
    let noise = (1.4826 * median(&mut diffs) / std::f64::consts::SQRT_2).max(1e-6);
    // 2. ligament: the mean of the partition's rows (±1 voxel) outward from the middle; the
    // first clear rise
    let rows_pm = (vmax / cut.pitch).round() as usize;
    let along = |i: usize| -> f64 {
        let js = jp.saturating_sub(rows_pm)..=(jp + rows_pm).min(cut.nh - 1);
        let n = js.clone().count() as f64;
        js.map(|j| cut.at(i, j) as f64).sum::<f64>() / n
    };
    let raw: Vec<f64> = (0..cut.nr).map(along).collect();
    // a little smoothing along r (three samples)
    let prof: Vec<f64> = (0..cut.nr).map(|i| (raw[i.saturating_sub(1)] + raw[i] + raw[(i + 1).min(cut.nr - 1)]) / 3.0).collect();
    let (ga, gb) = (cut.col(0.5 * (pl.r + pg.r)), cut.col(pg.r + 0.35 * width));
    let pmax = prof[ga..=gb].iter().cloned().filter(|x| x.is_finite()).fold(f64::NEG_INFINITY, f64::max);
    let rows_n = (2 * rows_pm + 1) as f64;
    // the first clear rise out of the fluid: above the lumen by three noise widths of the
    // averaged profile and an eighth of the way to the brightest wall, for two voxels on
    let rise = lumen + (3.0 * noise / (3.0 * rows_n).sqrt()).max(0.12 * (pmax - lumen));
    let vox_n = ((vmax / cut.pitch).round() as usize).max(1);
    let Some(gi) = (ga..=gb).find(|&i| (i..(i + 2 * vox_n).min(cut.nr)).all(|k| prof[k] > rise)) else {
        return Err("no lateral wall found along the partition".into());
    };
    // the level beyond the rise: where it levels off (the spiral ligament's, or the wall's) within
    // three voxels
    let grad = |i: usize| 0.5 * (prof[(i + 1).min(cut.nr - 1)] - prof[i.saturating_sub(1)]);
    let steep = (gi..(gi + 3 * vox_n).min(cut.nr)).map(grad).fold(0.0, f64::max);
    let flat = (gi..(gi + 3 * vox_n).min(cut.nr)).find(|&i| i > gi && grad(i) < 0.25 * steep).unwrap_or((gi + 3 * vox_n).min(cut.nr - 1));
    let top = prof[flat];
    if !top.is_finite() {
        return Err("the lateral wall leaves the stack".into());
    }
    // the half level from the profile's own floor in the duct's middle (the membrane along the
    // partition lifts it a little above the fluid's level off the partition: read from there, the
    // edge came out 0.1–0.15 voxel inward)
    let mut floor: Vec<f64> = prof[mid.saturating_sub(wide)..(mid + wide).min(cut.nr - 1)].iter().copied().filter(|x| x.is_finite()).collect();
    let base = if floor.is_empty() { lumen } else { median(&mut floor).clamp(lumen, 0.5 * (lumen + top)) };
    let half = 0.5 * (base + top);
    let mut rg = cut.r0 + gi as f64 * cut.pitch;
    for i in (ga.max(1)..=flat).rev() {
        if prof[i - 1] < half && prof[i] >= half {
            let t = (half - prof[i - 1]) / (prof[i] - prof[i - 1]);
            rg = cut.r0 + (i as f64 - 1.0 + t) * cut.pitch;
            break;
        }
    }
    // Where the first rise does not level off within three voxels, or levels off only at a crest
    // that falls again within three voxels with nothing brighter behind it (the blurred top of a
    // bony wall as thin as the blur, not a soft-tissue plateau before the bone nor thick bone),
    // the spiral ligament is too thin for the blur to show its own level, and the half level
    // above lies past the lumen's edge (by about a voxel at a blur of one; member 6 at
    // 40 × 40 × 60 µm, a 0.13 mm ligament on a 0.12 mm wall: 1.2 voxels). Then the rise is
    // fitted by a blurred lumen | soft tissue | bone model and the lumen edge is its first step
    // (none where the fit finds no layer: a bare wall keeps the half level). Crests are read so
    // only where `crests` is set (tracing, not a lone snap).
    let past = flat..(flat + 3 * vox_n).min(cut.nr);
    let (lo, hi) = past.map(|i| prof[i]).fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), x| (a.min(x), b.max(x)));
    let crest = crests && hi < top + 0.5 * (top - lumen) && lo < top - 0.25 * (top - lumen);
    if grad(flat) >= 0.25 * steep || crest {
        let a = ga.max(cut.col(rg - 0.25 * width));
        let b = (flat + 2 * vox_n).min(cut.nr - 1);
        if let Some(x) = layered_edge(&prof[a..=b], lumen, 1.5 * vox_n as f64) {
            rg = cut.r0 + (a as f64 + x) * cut.pitch;
        }
    }
    // 3. lamina tip: the ridge along the partition falls from the shelf to the lumen
    // brightness over the darker side (the limbus may pad the shelf's other side), smoothed over
    // five samples along r
    let over = |i: usize, j: usize| -> f64 {
        if j < d || j + d >= cut.nh {
            return f64::NAN;
        }
        (cut.at(i, j) as f64) - (cut.at(i, j - d) as f64).min(cut.at(i, j + d) as f64)
    };
    let bright: Vec<f64> = (0..cut.nr)
        .map(|i| (jp.saturating_sub(rows_pm)..=(jp + rows_pm).min(cut.nh - 1)).map(|j| over(i, j)).filter(|x| x.is_finite()).fold(f64::NAN, f64::max))
        .collect();
    let shelf: Vec<f64> = (0..cut.nr).map(|i| median(&mut (i.saturating_sub(2)..=(i + 2).min(cut.nr - 1)).map(|k| bright[k]).collect::<Vec<_>>())).collect();
    let (la, lb) = (cut.col(pl.r - 0.3 * width), cut.col(pl.r + 0.3 * width).min(cut.col(rg) - 1));
    if lb <= la + 2 {
        return Err("the lamina and the ligament run together".into());
    }
    // (beside a narrow membrane, whose tip moves inward as it widens, the shelf's level is read
    // farther in, half the span to a tenth: a window reaching the tip reads it low, and the
    // crossing then lags toward the prediction step after step — family member 12 lost the
    // partition at 450° and stopped at 530° of 925°)
    let narrow = pg.r - pl.r < width;
    let (ia, ib) = if narrow { (cut.col(pl.r - 0.5 * width), cut.col(pl.r - 0.1 * width)) } else { (la, cut.col(pl.r - 0.05 * width).max(la)) };
    let mut inner: Vec<f64> = shelf[ia..=ib].iter().cloned().filter(|x| x.is_finite()).collect();
    let mut outer: Vec<f64> =
        shelf[cut.col(pl.r + 0.15 * width).min(lb)..=cut.col(rg - 0.1 * width).max(lb)].iter().cloned().filter(|x| x.is_finite()).collect();
    let (s_in, s_out) = (median(&mut inner), median(&mut outer));
    if !(s_in - s_out > 2.0 * noise) {
        return Err("no bony shelf found along the partition".into());
    }
    let half = 0.5 * (s_in + s_out);
    // crossings from above to below half, nearest the prediction
    let want = (pl.r - cut.r0) / cut.pitch;
    let mut best: Option<f64> = None;
    for i in la..lb {
        let (p, q) = (shelf[i], shelf[i + 1]);
        if p >= half && q < half {
            let x = i as f64 + (p - half) / (p - q);
            if best.is_none_or(|b| (x - want).abs() < (b - want).abs()) {
                best = Some(x);
            }
        }
    }
    let Some(x) = best else { return Err("the end of the bony shelf is not clear".into()) };
    let rl = cut.r0 + x * cut.pitch;
    // confidence: the partition's ridge and the wall's rise against the noise
    let ridge_snr = median(&mut strengths) / noise;
    let wall_snr = (top - lumen) / noise;
    let conf = (ridge_snr / 4.0).min(1.0) * (wall_snr / 6.0).min(1.0) * ((s_in - s_out) / (4.0 * noise)).min(1.0);
    Ok((Edge { angle: pl.angle, r: rl, h }, Edge { angle: pg.angle, r: rg, h }, conf.max(0.0)))
}

/// The lumen edge (in samples) of a profile `p` that rises from the lumen level `lumen` to bone
/// through a soft-tissue layer: the first step a of the blurred model
/// m(x) = L + (T − L)·Φ((x − a)/σ) + (B − T)·Φ((x − a − w)/σ) fitted in least squares (T and B
/// linear for each a, w and σ from half a sample to about `smax`; a coarse grid, then eighths
/// about the best). None
/// where the first step is under a tenth of the whole rise (no layer: the edge is the bone's) or
/// above two thirds of it (no bone behind), or the fit fails.
fn layered_edge(p: &[f64], lumen: f64, smax: f64) -> Option<f64> {
    use crate::measure::{phi, phi_table, two_basis_fit};
    let n = p.len();
    if n < 6 {
        return None;
    }
    let y: Vec<f64> = p.iter().map(|v| v - lumen).collect();
    let yy: f64 = y.iter().map(|v| v * v).sum();
    type Best = (f64, [f64; 2], f64, f64, f64); // sse, [first step, second step], a, w, σ
    let mut best: Best = (f64::INFINITY, [0.0; 2], 0.0, 0.0, 1.0);
    // keeps a fit (sse, steps) of (a, w, σ) that is better and climbs at both steps
    let keep = |best: &mut Best, fit: Option<(f64, [f64; 2])>, a: f64, w: f64, s: f64| {
        if let Some((e, c)) = fit
            && e < best.0
            && c[0] >= 0.0
            && c[1] >= 0.0
        {
            *best = (e, c, a, w, s);
        }
    };
    // coarse: edges every g samples (g keeps the grid near 16 steps a side) and σ every half
    // sample, Φ from one table per σ; then eighths of g about the best
    let g = (n / 16).max(1);
    let mut s = 0.5;
    while s <= smax.max(0.5) {
        let table = phi_table(n, s);
        for a in (0..n).step_by(g) {
            for w in (g..n - a).step_by(g) {
                let fit = two_basis_fit(&y, yy, |i| [table[i + n - a], table[i + n - a - w]]);
                keep(&mut best, fit, a as f64, w as f64, s);
            }
        }
        s += 0.5;
    }
    let (a0, w0, s0) = (best.2, best.3, best.4);
    let fine = |k: i32| k as f64 * g as f64 / 8.0;
    for da in -8..=8 {
        for dw in -8..=8 {
            for ds in -2..=2 {
                let (a, w, s) = (a0 + fine(da), w0 + fine(dw), s0 + ds as f64 / 8.0);
                if w > 0.0 && s >= 0.5 {
                    let fit = two_basis_fit(&y, yy, |i| [phi((i as f64 - a) / s), phi((i as f64 - a - w) / s)]);
                    keep(&mut best, fit, a, w, s);
                }
            }
        }
    }
    let (_, [t, b], a, _, _) = best;
    let whole = t + b;
    (whole > 0.0 && t >= 0.1 * whole && t <= 0.67 * whole).then_some(a)
}

/// Where the partition's ends lie near a guess, for snapping a click: `lamina` and `ligament`
/// are rough stack points (mm) of the two ends at one angle (one clicked, the other from the
/// fit); the radial cut through the lamina guess is read as the tracer reads each step
/// ([`trace`]). Returns the found lamina tip and ligament point, or None where the cut does not
/// show them clearly.
pub fn snap(stack: &Stack, frame: &Frame, lamina: V, ligament: V) -> Option<(V, V)> {
    let vox = stack.voxel().ok()?;
    let (vmax, pitch) = (vox.max(), 0.5 * vox.min());
    let [rl, angle, hl] = frame.to_cochlear(lamina);
    // the ligament guess's radius and height, taken at the lamina's angle
    let [rg, _, hg] = frame.to_cochlear(ligament);
    let (pl, pg) = (Edge { angle, r: rl, h: hl }, Edge { angle, r: rg, h: hg });
    if pg.r - pl.r < 3.0 * vmax {
        return None;
    }
    // (a crest is not fitted: one click's cut cannot tell a bare bony ring's blurred top from a
    // thin wall behind a ligament — the bundled sample's bare 0.3 mm ring at 70 µm had the snap
    // land a voxel inside the lumen — where a trace's steps are held to their prediction)
    let width = pg.r - pl.r;
    let (l, g, conf) = find(&Cut::around(stack, frame, &[(angle, 0.0, 0.0)], pl, pg, width, vmax, pitch), pl, pg, width, vmax, false).ok()?;
    (conf >= 0.2).then(|| (frame.to_stack(l.r, angle, l.h), frame.to_stack(g.r, angle, g.h)))
}

/// A proposed modiolar axis (axis_base, axis_apex; stack mm) from the window and three or more
/// lamina points placed along the basal turn, in the order placed (base toward apex).
///
/// The points of one turn lie near a plane across the axis: its normal (Newell's method over
/// the points in order) is the first axis direction; with five points or more it is turned
/// against the tilt a climbing spiral gives its points' plane. The axis passes through the
/// centre of the circle fitted to the points in that plane (algebraic least squares, Kåsa 1976),
/// with five points or more of a spiral whose radius changes linearly with the angle (a
/// circle's centre sits off toward the wide end of a shrinking turn), and points the way the
/// points climb — the basal dip can make the first turn sink, so the result is a proposal to
/// check. axis_base is the axis point level with the window; axis_apex lies one mean lamina
/// radius above it.
///
/// ```
/// use ductline::trace::propose_axis;
/// // four points on a circle of radius 2 about the line x = 1, y = 1 (z up), climbing
/// let pts: Vec<[f64; 3]> = (0..4).map(|k| { let a = 1.5 * k as f64; [1.0 + 2.0 * a.cos(), 1.0 + 2.0 * a.sin(), 0.1 * k as f64] }).collect();
/// let (b, a) = propose_axis([3.5, 1.0, -0.2], &pts).unwrap();
/// assert!((b[0] - 1.0).abs() < 0.05 && (b[1] - 1.0).abs() < 0.05 && a[2] > b[2]);
/// ```
pub fn propose_axis(window: V, lamina: &[V]) -> Result<(V, V)> {
    use crate::frame::v3;
    if lamina.len() < 3 {
        return Err(Error::invalid(format!("an axis proposal needs three or more lamina points along the basal turn, got {}", lamina.len())));
    }
    let n = lamina.len();
    let c = v3::scale(lamina.iter().fold([0.0; 3], |a, p| v3::add(a, *p)), 1.0 / n as f64);
    let mut normal = [0.0; 3];
    for i in 0..n {
        normal = v3::add(normal, v3::cross(v3::sub(lamina[i], c), v3::sub(lamina[(i + 1) % n], c)));
    }
    if v3::norm(normal) < 1e-12 {
        return Err(Error::invalid("the lamina points lie on a line: place them around the basal turn"));
    }
    let mut ez = v3::unit(normal);
    let mut centre = c;
    // a spiral climbs as it turns, which tilts the plane of its points: with five points or more
    // the heights are fitted as a climb linear in the angle plus a tilt (h = h0 + k·θ + a·cos θ +
    // b·sin θ) and the axis is turned against the tilt, four times
    for _ in 0..if n >= 5 { 4 } else { 1 } {
        let ex = v3::unit(v3::sub(v3::sub(lamina[0], c), v3::scale(ez, v3::dot(v3::sub(lamina[0], c), ez))));
        let ey = v3::cross(ez, ex);
        let q: Vec<[f64; 2]> = lamina.iter().map(|p| [v3::dot(v3::sub(*p, c), ex), v3::dot(v3::sub(*p, c), ey)]).collect();
        let circle = circle_centre(&q).ok_or_else(|| Error::invalid("the lamina points do not define a circle: place them around the basal turn"))?;
        let [cx, cy] = if n >= 5 { spiral_centre(&q, circle) } else { circle };
        centre = v3::add(c, v3::add(v3::scale(ex, cx), v3::scale(ey, cy)));
        if n < 5 {
            break;
        }
        let th = unwrapped_angles(&q, [cx, cy]);
        let h: Vec<f64> = lamina.iter().map(|p| v3::dot(v3::sub(*p, centre), ez)).collect();
        let rows: Vec<[f64; 4]> = th.iter().map(|t| [1.0, *t, t.cos(), t.sin()]).collect();
        let Some([_, _, a, b]) = least_squares(&rows, &h) else { break };
        let r = q.iter().map(|p| (p[0] - cx).hypot(p[1] - cy)).sum::<f64>() / n as f64;
        ez = v3::unit(v3::sub(ez, v3::scale(v3::add(v3::scale(ex, a), v3::scale(ey, b)), 1.0 / r)));
    }
    // up: the way the points climb
    if v3::dot(v3::sub(lamina[n - 1], lamina[0]), ez) < 0.0 {
        ez = v3::scale(ez, -1.0);
    }
    let radius = lamina
        .iter()
        .map(|p| {
            let d = v3::sub(*p, centre);
            v3::norm(v3::sub(d, v3::scale(ez, v3::dot(d, ez))))
        })
        .sum::<f64>()
        / n as f64;
    let base = v3::axpy(centre, v3::dot(v3::sub(window, centre), ez), ez);
    Ok((base, v3::axpy(base, radius, ez)))
}

/// Centre of the circle through 2-D points by algebraic least squares (Kåsa 1976):
/// x² + y² + D·x + E·y + F = 0 solved for D, E, F; None when they are collinear.
fn circle_centre(q: &[[f64; 2]]) -> Option<[f64; 2]> {
    let rows: Vec<[f64; 3]> = q.iter().map(|p| [p[0], p[1], 1.0]).collect();
    let rhs: Vec<f64> = q.iter().map(|p| -(p[0] * p[0] + p[1] * p[1])).collect();
    let x = least_squares(&rows, &rhs)?;
    Some([-0.5 * x[0], -0.5 * x[1]])
}

/// Angles (rad) of 2-D points about `c`, unwrapped in their order.
fn unwrapped_angles(q: &[[f64; 2]], c: [f64; 2]) -> Vec<f64> {
    let mut th: Vec<f64> = vec![];
    for p in q {
        let t = (p[1] - c[1]).atan2(p[0] - c[0]);
        th.push(match th.last() {
            Some(&prev) => prev + (t - prev + std::f64::consts::PI).rem_euclid(std::f64::consts::TAU) - std::f64::consts::PI,
            None => t,
        });
    }
    th
}

/// Centre of a spiral through 2-D points in order whose radius changes linearly with the angle
/// (|q − c| = r0 + r1·θ), by Gauss–Newton from the circle's centre `start`; the circle's
/// centre sits off toward the wide end of a shrinking turn.
fn spiral_centre(q: &[[f64; 2]], start: [f64; 2]) -> [f64; 2] {
    let mut c = start;
    let mean_r = q.iter().map(|p| (p[0] - c[0]).hypot(p[1] - c[1])).sum::<f64>() / q.len() as f64;
    let (mut r0, mut r1) = (mean_r, 0.0);
    for _ in 0..20 {
        let th = unwrapped_angles(q, c);
        let mut rows = vec![];
        let mut e = vec![];
        for (p, t) in q.iter().zip(&th) {
            let rho = (p[0] - c[0]).hypot(p[1] - c[1]).max(1e-12);
            rows.push([-(p[0] - c[0]) / rho, -(p[1] - c[1]) / rho, -1.0, -t]);
            e.push(-(rho - r0 - r1 * t));
        }
        let Some(d) = least_squares(&rows, &e) else { break };
        c = [c[0] + d[0], c[1] + d[1]];
        r0 += d[2];
        r1 += d[3];
        if d[0].hypot(d[1]) < 1e-9 * mean_r {
            break;
        }
    }
    c
}

/// Least squares for N unknowns (normal equations); None for a singular system.
fn least_squares<const N: usize>(rows: &[[f64; N]], y: &[f64]) -> Option<[f64; N]> {
    let mut m = [[0.0f64; N]; N];
    let mut r = [0.0f64; N];
    for (row, y) in rows.iter().zip(y) {
        for i in 0..N {
            r[i] += row[i] * y;
            for j in 0..N {
                m[i][j] += row[i] * row[j];
            }
        }
    }
    solve(m, r)
}

/// Gaussian elimination with partial pivoting; None for a singular system.
fn solve<const N: usize>(mut m: [[f64; N]; N], mut r: [f64; N]) -> Option<[f64; N]> {
    let scale = m.iter().flatten().fold(0.0f64, |a, x| a.max(x.abs())).max(1e-300);
    for k in 0..N {
        let p = (k..N).max_by(|&a, &b| m[a][k].abs().total_cmp(&m[b][k].abs()))?;
        if m[p][k].abs() < 1e-12 * scale {
            return None;
        }
        m.swap(k, p);
        r.swap(k, p);
        for i in k + 1..N {
            let f = m[i][k] / m[k][k];
            let pivot = m[k];
            for (a, b) in m[i][k..].iter_mut().zip(&pivot[k..]) {
                *a -= f * b;
            }
            r[i] -= f * r[k];
        }
    }
    let mut x = [0.0; N];
    for k in (0..N).rev() {
        x[k] = (r[k] - (k + 1..N).map(|j| m[k][j] * x[j]).sum::<f64>()) / m[k][k];
    }
    Some(x)
}

/// The landmark CSV of a trace: the seeds (confidence 1) then the proposals, with `confidence`
/// and `source` (seed or proposed) columns after the four the format requires.
pub fn to_csv(seeds: &[Landmark], t: &Trace) -> String {
    let mut s = String::from("kind,x_mm,y_mm,z_mm,confidence,source\n");
    for l in seeds {
        s.push_str(&format!("{},{:.6},{:.6},{:.6},1,seed\n", l.kind.as_str(), l.p[0], l.p[1], l.p[2]));
    }
    for p in &t.proposed {
        s.push_str(&format!("{},{:.6},{:.6},{:.6},{:.3},proposed\n", p.lm.kind.as_str(), p.lm.p[0], p.lm.p[1], p.lm.p[2], p.confidence));
    }
    s
}
