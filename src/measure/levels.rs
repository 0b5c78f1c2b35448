//! Step 2: grey levels of lumen, soft tissue and bone.
//!
//! Each section's first square is histogrammed; the histograms of the sections within ±`pool` of a
//! section (a tube along the duct, smoothed along s) are summed and split in three classes by
//! multi-level Otsu (Liao, Chen & Chung 2001: the two thresholds maximising the between-class
//! variance). Lumen and bone are the modes (peaks of the lightly smoothed histogram) of the
//! darkest and brightest classes: partial volume spreads blurred edges thinly over the range but
//! leaves the peaks where pure material is, so thin bony walls do not bias them and no patch of
//! pure bone is required. Soft tissue is the darkest real peak between them (see `three_levels`)
//! until the lateral wall says better: rays across the wall next to the partition's outer end,
//! where the spiral ligament lines the lumen, are averaged over the tube and fitted by a blurred
//! lumen | soft tissue | bone model (`wall_profile`, `wall_level`). Each edge pixel's own ray
//! tells the area step which material lies beyond it (`plateaus`).

use super::regions::{find_seed, grow};
use super::{Img, Line};
use serde::{Deserialize, Serialize};

/// Lumen (fluid or air), soft-tissue and bone grey levels of a section, in stack units.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Levels {
    pub lumen: f32,
    pub tissue: f32,
    pub bone: f32,
}

impl Levels {
    pub const NONE: Levels = Levels { lumen: f32::NAN, tissue: f32::NAN, bone: f32::NAN };

    /// The scalae grow below this: halfway from lumen to soft tissue.
    pub fn lumen_cut(&self) -> f32 {
        0.5 * (self.lumen + self.tissue)
    }

    /// Bone starts above this: halfway from soft tissue to bone (from lumen when they coincide).
    pub fn bone_cut(&self) -> f32 {
        if self.tissue < self.bone { 0.5 * (self.tissue + self.bone) } else { 0.5 * (self.lumen + self.bone) }
    }
}

/// Histogram bins over the value range of all first squares.
const BINS: usize = 256;

/// Levels for every section from the pooled histograms of its neighbours (±`pool` sections).
///
/// `centre` holds each section's median value near its centreline point (inside the duct, NaN
/// where unknown). Where the pooled median of those lies at the level the split takes for soft
/// tissue, something darker than the lumen fills the darkest class (air around a specimen, air
/// cells beside a fluid-filled duct): the bins below halfway to the duct's level are dropped and
/// the split is made again (see [`lumen_class`]).
pub(super) fn pooled(imgs: &[Img], centre: &[f32], pool: usize) -> Vec<Option<Levels>> {
    use rayon::prelude::*;
    let (lo, hi) = imgs
        .par_iter()
        .map(|im| im.v.iter().filter(|x| x.is_finite()).fold((f32::INFINITY, f32::NEG_INFINITY), |(a, b), &x| (a.min(x), b.max(x))))
        .reduce(|| (f32::INFINITY, f32::NEG_INFINITY), |a, b| (a.0.min(b.0), a.1.max(b.1)));
    if !(hi > lo) {
        return vec![None; imgs.len()];
    }
    let k = (BINS as f32 - 1.0) / (hi - lo);
    let hists: Vec<Vec<f64>> = imgs
        .par_iter()
        .map(|im| {
            let mut h = vec![0.0; BINS];
            for x in im.v.iter().step_by(2).filter(|x| x.is_finite()) {
                h[((x - lo) * k + 0.5) as usize] += 1.0;
            }
            h
        })
        .collect();
    (0..imgs.len())
        .into_par_iter()
        .map(|i| {
            let h = window_sum(&hists, i, pool);
            let at = |bin: usize| lo + bin as f32 / k;
            let mut near: Vec<f32> = centre[i.saturating_sub(pool)..(i + pool + 1).min(centre.len())].iter().copied().filter(|x| x.is_finite()).collect();
            let duct = (!near.is_empty()).then(|| (median_f32(&mut near) - lo) * k);
            lumen_class(&h, duct).map(|(a, b, c)| Levels { lumen: at(a), tissue: at(b), bone: at(c) })
        })
        .collect()
}

/// [`three_levels`] of a histogram whose lumen is the class the duct's centre lies in: `duct` is
/// the value near the sections' centreline points, in (fractional) bins.
///
/// - Where it lies at or above three quarters of the way from the darkest class's mode to the
///   level taken for soft tissue, that "soft tissue" is the lumen and the darkest class is
///   something darker (air around a specimen); the bins below halfway to the duct's level are
///   dropped and the split made again, kept where its lumen lands within a quarter of that way of
///   the duct's value (else the first split stands).
/// - Where the darkest class's mode lies a fifth or more of the way from it to bone, the lumen
///   holds too few pixels to make a class of its own (scalae a few voxels across in a tube of
///   soft tissue and bone: clinical resolution), and the darkest class is soft tissue (20–35 %
///   of the way from fluid to bone in the anatomy notes) or what lies outside the capsule. The
///   lumen is then the mode of the bins below halfway from the duct's value to that class, where
///   it lies within half that way of the duct's value (pure lumen in the scalae's middle), else
///   the duct's value itself; soft tissue and bone stay as the split took them (the wall fit
///   reads soft tissue where it can). A darkest class nearer the duct's value is the lumen with
///   something a little brighter (a background at 0.1–0.2 of the step): each section re-takes
///   its lumen from its scalae' interior (`lumen_level`), as before.
fn lumen_class(h: &[f64], duct: Option<f32>) -> Option<(usize, usize, usize)> {
    let (a, b, c) = three_levels(h)?;
    let Some(d) = duct.map(|d| d as f64) else { return Some((a, b, c)) };
    let (fa, fb, fc) = (a as f64, b as f64, c as f64);
    if fa - d >= 0.2 * (fc - d) {
        let cut = ((fa + d) / 2.0) as usize;
        let mode = mode_of(&running5(h), 0, cut.min(h.len() - 1) + 1)?;
        let lumen = if (mode as f64 - d).abs() <= 0.5 * (fa - d) { mode } else { d.round().max(0.0) as usize };
        return Some((lumen, b, c));
    }
    if !(fb > fa && d >= fb - 0.25 * (fb - fa)) {
        return Some((a, b, c));
    }
    let cut = ((fa + d) / 2.0) as usize;
    let mut trimmed = h.to_vec();
    trimmed[..=cut.min(h.len() - 1)].iter_mut().for_each(|x| *x = 0.0);
    match three_levels(&trimmed) {
        Some((a2, b2, c2)) if (a2 as f64 - d).abs() <= 0.25 * (fb - fa) => Some((a2, b2, c2)),
        _ => Some((a, b, c)),
    }
}

/// A histogram summed over 5-bin windows (clipped at its ends): noise does not pick a stray bin
/// as a mode.
fn running5(h: &[f64]) -> Vec<f64> {
    let n = h.len();
    (0..n).map(|i| h[i.saturating_sub(2)..(i + 3).min(n)].iter().sum::<f64>()).collect()
}

/// The bin in a..b where the smoothed histogram `sm` is highest (the lowest such bin on a tie).
fn mode_of(sm: &[f64], a: usize, b: usize) -> Option<usize> {
    (a..b).max_by(|&x, &y| sm[x].total_cmp(&sm[y]).then(y.cmp(&x)))
}

/// The sum of the histograms of sections i − k ..= i + k (those that exist): a tube along the duct.
pub(super) fn window_sum(hists: &[Vec<f64>], i: usize, k: usize) -> Vec<f64> {
    let mut h = vec![0.0; hists[i].len()];
    for hh in &hists[i.saturating_sub(k)..(i + k + 1).min(hists.len())] {
        h.iter_mut().zip(hh).for_each(|(a, b)| *a += b);
    }
    h
}

/// The two thresholds of a three-class Otsu split of a histogram, as bin indices (t1 < t2: class
/// 0 = bins ≤ t1, class 1 = bins in (t1, t2], class 2 = the rest); None when fewer than three
/// bins are filled.
pub fn otsu3(h: &[f64]) -> Option<(usize, usize)> {
    let n = h.len();
    let (mut w, mut m) = (vec![0.0; n + 1], vec![0.0; n + 1]);
    for i in 0..n {
        w[i + 1] = w[i] + h[i];
        m[i + 1] = m[i] + i as f64 * h[i];
    }
    let term = |a: usize, b: usize| {
        let (ww, mm) = (w[b] - w[a], m[b] - m[a]);
        if ww > 0.0 { mm * mm / ww } else { 0.0 }
    };
    let mut best = (f64::NEG_INFINITY, 0, 0);
    for t1 in 1..n - 1 {
        for t2 in t1 + 1..n {
            let v = term(0, t1) + term(t1, t2) + term(t2, n);
            if v > best.0 {
                best = (v, t1, t2);
            }
        }
    }
    (h.iter().filter(|&&x| x > 0.0).count() >= 3).then_some((best.1 - 1, best.2 - 1))
}

/// (lumen, tissue, bone) bins of a histogram: lumen and bone are the modes of the darkest and
/// brightest Otsu classes; soft tissue is the darkest peak between them (a local maximum of the
/// smoothed histogram holding at least 1 % of the pixels within ±4 bins), so a brighter
/// background outside the capsule is not taken for the tissue that lines the lumen. With no such
/// peak, soft tissue is taken as bone.
fn three_levels(h: &[f64]) -> Option<(usize, usize, usize)> {
    let (t1, t2) = otsu3(h)?;
    // a 5-bin running mean keeps noise from picking a stray bin as the mode
    let n = h.len();
    let sm = running5(h);
    let mode = |a: usize, b: usize| mode_of(&sm, a, b);
    let total: f64 = h.iter().sum();
    // bone: its class's mode, or where a thin-walled section has no pure-bone peak, the class's
    // 60th percentile (the mode then sits on the partial-volume plateau)
    let bright: f64 = h[t2 + 1..].iter().sum();
    let mut acc = 0.0;
    let p60 = (t2 + 1..n).find(|&i| {
        acc += h[i];
        acc >= 0.6 * bright
    })?;
    let (lumen, bone) = (mode(0, t1 + 1)?, mode(t2 + 1, n)?.max(p60));
    let gap = (bone - lumen) / 10;
    let tissue = (lumen + gap.max(1)..bone.saturating_sub(gap))
        .find(|&i| {
            let peak = (i.saturating_sub(3)..(i + 4).min(n)).all(|j| sm[j] <= sm[i]);
            let mass: f64 = h[i.saturating_sub(4)..(i + 5).min(n)].iter().sum();
            peak && mass >= 0.01 * total
        })
        .unwrap_or(bone);
    Some((lumen, tissue, bone))
}

/// Raises each section's bone level to the 90th percentile of the levels of the sections whose
/// centres (`centres`, mm) lie within `radius` mm of its own (itself included, any turn), where
/// that is higher. The otic capsule is one bone; a section whose walls are all thinner than the
/// blur sees only their blurred crests, while a turn above or the modiolus beside it shows the
/// bone itself. The upper tenth is left out so that one tube reading high (noise, a bright
/// artefact) does not set its neighbours' level; the distance keeps a scanner's slow drift
/// along the slices and its cupping (a few per cent over it) out of the comparison. A section
/// read as lumen against bone alone (soft tissue at bone's level: none found) keeps its levels:
/// where that reading is wrong (a ligament a voxel thick the wall fit could not see), a brighter
/// bone counts the ligament as more lumen (150 µm member 2: SV+ST 11 → 23 % median).
pub(super) fn bone_nearby(levels: &mut [Option<Levels>], centres: &[[f64; 3]], radius: f64) {
    let bone: Vec<Option<f32>> = levels.iter().map(|l| l.map(|l| l.bone)).collect();
    for (lv, c) in levels.iter_mut().zip(centres) {
        let Some(lv) = lv.as_mut() else { continue };
        let mut near: Vec<f32> =
            centres.iter().zip(&bone).filter(|(d, _)| (0..3).map(|a| (d[a] - c[a]).powi(2)).sum::<f64>() <= radius * radius).filter_map(|(_, b)| *b).collect();
        if near.is_empty() {
            continue;
        }
        near.sort_by(f32::total_cmp);
        let b = near[(near.len() - 1) * 9 / 10];
        if b > lv.bone && lv.tissue < lv.bone {
            lv.bone = b;
        }
    }
}

/// The noise of a (smoothed) section image about the lumen level `lumen`, in stack units: 1.4826
/// times the median distance below it of the values under it (the lumen's lower half: a normal
/// distribution's median absolute deviation scaled to its standard deviation, common practice).
/// None with fewer than 20 such values.
pub(super) fn noise_below(v: &[f32], lumen: f32) -> Option<f32> {
    let mut dev: Vec<f32> = v.iter().filter(|&&x| x < lumen).map(|&x| lumen - x).collect();
    (dev.len() >= 20).then(|| 1.4826 * median_f32(&mut dev))
}

pub(super) fn median_f32(v: &mut [f32]) -> f32 {
    let m = v.len() / 2;
    *v.select_nth_unstable_by(m, f32::total_cmp).1
}

/// What the scalae grown at a first threshold tell of the lumen level.
pub(super) enum Lumen {
    /// Median of the interior pixels (at least `erode` pixels from any non-region pixel).
    Level(f32),
    /// A scala comes within the edge band of the square's border.
    Overflows,
    /// Neither scala has interior pixels.
    Unknown,
}

/// The fluid level from both scalae grown at threshold `thr`, or word that one of them does
/// not fit in the square with its edge band of `band` pixels.
#[allow(clippy::too_many_arguments)]
pub(super) fn lumen_level(img: &Img, line: &Line, mid: [f64; 2], thr: f32, vmax: f64, width: f64, erode: usize, band: usize) -> Lumen {
    let mut vals = vec![];
    for side in [1.0, -1.0] {
        let Some(seed) = find_seed(img, line, mid, side, thr, vmax, width) else { continue };
        let r = grow(img, seed, side, thr);
        if r.overflows(img.n, band) {
            return Lumen::Overflows;
        }
        r.each_interior(img.n, erode, |i| vals.push(img.v[i]));
    }
    if vals.len() < 4 {
        return Lumen::Unknown;
    }
    Lumen::Level(median_f32(&mut vals))
}

/// What the ray from one edge pixel of a region found (see [`plateaus`]).
pub(super) struct Plateau {
    /// The edge pixel (index into the section image).
    pub pixel: usize,
    /// The smoothed value on the plateau.
    pub value: f32,
    /// Unit direction of the ray (pixels).
    pub dir: [f64; 2],
    /// Distance from the edge pixel to the plateau (pixels).
    pub at: f64,
    /// Where the ray shows soft tissue between lumen and bone: the fitted lumen and bone edges
    /// along it and the blur of the unsmoothed section image (pixels; see [`fit_layer`]).
    pub layer: Option<Layer>,
}

/// A soft-tissue layer across one ray: the lumen edge at `lumen`, the bone edge at `bone`
/// (pixels from the edge pixel along the ray), the blur σ (pixels) of the section image and the
/// level of the bone behind.
#[derive(Clone, Copy, Debug)]
pub(super) struct Layer {
    pub lumen: f64,
    pub bone: f64,
    pub sigma: f64,
    pub bone_level: f32,
    /// Where the bone ends again (pixels along the ray): a thin bony shelf under a limbus, with
    /// lumen beyond it; None where the bone runs on.
    pub end: Option<f64>,
}

impl Layer {
    /// The blurred bone share at `t` pixels along the ray.
    pub fn bone_share(&self, t: f64) -> f64 {
        phi((t - self.bone) / self.sigma) - self.end.map_or(0.0, |e| phi((t - e) / self.sigma))
    }
}

/// The level of the first material beyond the lumen, seen from each edge pixel of the regions
/// `masks` (whose pixels lie in `bounds`), and the blur σ of the section image (pixels) where the
/// bare edges say. Rays that climb more slowly than the bare edges carry a fitted soft-tissue
/// layer (`Plateau::layer`, see [`fit_layer`]).
///
/// From an edge pixel a ray runs outward along the gradient of the smoothed image (steps of
/// half a pixel, at most four voxels of `vox` pixels each). A ray that climbs from the
/// lumen/soft-tissue midpoint to the soft-tissue/bone midpoint (or, where it crosses a thin bony
/// shelf whose blurred crest stays lower, to half the way from soft tissue to the crest) much
/// more slowly than the bare edges of the same section meets soft tissue lining bone (a spiral
/// ligament or a limbus thinner than the blur shows no plateau); its plateau is put one blur
/// width past the lumen edge. A ray over a bare thin crest finds bone. Otherwise, past the
/// steepest rise of the lumen edge (within its first 1.5 voxels), the plateau is where the rise
/// is least before it climbs again (by half the edge's rise) or two voxels have passed: inside a
/// soft-tissue layer (the saddle between its edge and the bone's behind it), or in bone where
/// bone walls the lumen. A ray that falls back toward the lumen past that point (a crest of soft
/// tissue between two lumens) or that reaches a region again says nothing about any material and
/// is dropped. The value says which material (the area step compares it with the
/// soft-tissue–bone midpoint); the soft-tissue level itself comes from [`wall_level`]. With
/// scala vestibuli's side (`side` > 0) of a partition with a limbus, rays across a thin crest are fitted for a limbus on a
/// bony shelf ([`fit_bar`]) instead of being taken as bare crests, also where the crest stays
/// near the soft-tissue level on the modiolar side of the lamina tip. From scala tympani's
/// lateral half (`side` < 0, lateral of the partition's midpoint), where the spiral ligament lines
/// the wall, every climb slower than the bare edges is fitted for a layer.
pub(super) fn plateaus(
    img: &Img,
    masks: &[&[bool]],
    bounds: super::regions::Rect,
    lv: &Levels,
    vox: usize,
    part: &super::Partition,
    side: f64,
) -> (Vec<Plateau>, Option<f64>) {
    let limbus = (side > 0.0 && part.limbus).then_some(part);
    let step = lv.bone - lv.lumen;
    let reach = 8 * vox; // half-pixel steps: four voxels
    let rays = edge_rays(img, masks, bounds, reach + 1, vox, |_, _| true);
    // Where a ray first crosses the lumen/soft-tissue midpoint and then the soft-tissue/bone
    // midpoint (half steps, linear between samples), and whether it turned back below bone: a
    // thin bony shelf or septum whose blurred crest stays under that midpoint stands in for bone
    // at half the way from soft tissue to its crest. None where no bone is met.
    let crossings = |k: usize, f: &[f32]| -> Option<(f64, f64, bool)> {
        let first =
            |level: f32| (1..f.len()).find(|&i| f[i] >= level).map(|i| (i - 1) as f64 + ((level - f[i - 1]) / (f[i] - f[i - 1])).clamp(0.0, 1.0) as f64);
        let peak = f.iter().fold(f32::MIN, |m, &x| m.max(x));
        let crest = peak < lv.bone_cut();
        if crest && peak < lv.tissue + 0.2 * (lv.bone - lv.tissue) {
            // From scala vestibuli over the shelf (the modiolar side of the lamina tip) a low
            // crest is the shelf and its limbus under a blur that leaves them little height:
            // both crossings at half the crest's height, for the limbus fit. Elsewhere such a
            // crest says nothing.
            let on_shelf = limbus.is_some_and(|part| part.along(img.uv(k)) < 0.0);
            if on_shelf && peak > lv.lumen + 0.1 * step {
                let x = first(0.5 * (lv.lumen + peak))?;
                return Some((x, x, true));
            }
            return None;
        }
        let level = if crest { 0.5 * (lv.tissue + peak) } else { lv.bone_cut() };
        Some((first(lv.lumen_cut())?, first(level)?, crest))
    };
    // A bare blurred edge climbs from one midpoint to the other in the shortest run the section
    // shows (1.4 blur widths for soft tissue a third of the way to bone; a thin crest's climb is
    // shorter still); a soft-tissue layer on bone holds the climb back for about its thickness,
    // even where blur leaves it no plateau. The bare run is the lower quartile of the runs to
    // thick bone: most of a scala's edge meets bone.
    let gaps: Vec<Option<(f64, f64, bool)>> = rays.iter().map(|(k, _, f)| if lv.tissue < lv.bone { crossings(*k, f) } else { None }).collect();
    let mut runs: Vec<f64> = gaps.iter().flatten().filter(|g| !g.2).map(|(xt, xb, _)| xb - xt).collect();
    runs.sort_by(f64::total_cmp);
    let bare_run = (runs.len() >= 8).then(|| runs[runs.len() / 4]);
    // The blur of the smoothed image along the rays (half pixels), from the median run of the
    // bare edges: a blurred lumen | bone step crosses the two midpoints Φ⁻¹(q/2) and
    // Φ⁻¹((1 + q)/2) blur widths from its edge, q = (tissue − lumen)/(bone − lumen).
    let q = ((lv.tissue - lv.lumen) / step) as f64;
    let sigma_sm = bare_run.and_then(|bare| {
        let bare_runs: Vec<f64> = runs.iter().copied().filter(|&r| r <= 1.25 * bare + 1.0).collect();
        let median = bare_runs[bare_runs.len() / 2];
        let s = median / (inv_phi(0.5 * (1.0 + q)) - inv_phi(0.5 * q));
        (s.is_finite() && s > 0.0).then_some(s)
    });
    // σ of the unsmoothed image (pixels): the smoothing adds one pixel in quadrature
    let sigma = sigma_sm.map(|s| ((0.5 * s).powi(2) - 1.0).max(0.09).sqrt());
    let mut out = vec![];
    for ((k, [dx, dy], f), gap) in rays.into_iter().zip(gaps) {
        // a climb slower than a bare edge's: fit where the lumen ends and the bone begins. On
        // scala tympani's lateral half any climb slower than the bare edges' is fitted: the
        // spiral ligament lines that wall all the way (thinning from the partition down), and where
        // it is under two voxels its climb is barely slower than bone's; taken for bare bone it
        // counted as lumen (the family at 80 µm, scala tympani median error summed over twelve
        // members 43.1 → 31.1 %, member 9 6.6 → 3.5 %, member 10 5.8 → 3.3 %; member 7, whose
        // soft tissue the wall fit reads a tenth of the step dark, 1.9 → 2.9 %). Scala
        // vestibuli's lateral wall was tried too: three members whose scala vestibuli already
        // reads low read lower (member 9 −4.9 → −10.4 % signed).
        let ligament = side < 0.0 && part.along(img.uv(k)) > 0.5 * part.width();
        if let (Some(bare), Some(s), Some(sigma), Some((xt, xb, false))) = (bare_run, sigma_sm, sigma, gap)
            && xb - xt > if ligament { bare } else { 1.15 * bare + 0.5 }
            // the bone behind: the section's level, or the ray's own crest where it reads higher
            // (the pooled level reads low where the walls are thin for the blur)
            && let level = f.iter().fold(lv.bone, |m, &x| m.max(x))
            && let Some((a, c)) = fit_layer(&f, &Levels { bone: level, ..*lv }, s, xt, xb)
        {
            let layer = Layer { lumen: 0.5 * a, bone: 0.5 * c, sigma, bone_level: level, end: None };
            out.push(Plateau { pixel: k, value: lv.tissue, dir: [dx, dy], at: 0.5 * c, layer: Some(layer) });
            continue;
        }
        // From scala vestibuli (`limbus`), a ray across a thin crest — the bony shelf under the
        // blur, with the spiral limbus on its vestibular side or bare, lumen again beyond — is
        // fitted by lumen | soft tissue | bone | lumen (`fit_bar`): taken as a bare crest, a
        // limbus about a voxel thick counted as most of a pixel of lumen (80 µm member 8: SV
        // +11.9 % signed median, now +4.2 %; the fluid-filled members at 150 µm SV +12 to +16 %,
        // now −0.4 to +4 % on members 0, 2, 5, 10). Scala tympani's side of the shelf is bare.
        if limbus.is_some()
            && let (Some(s), Some(sigma), Some((xt, xb, true))) = (sigma_sm, sigma, gap)
            && let Some((a, c, e)) = fit_bar(&f, lv, s, xt, xb)
        {
            let layer = Layer { lumen: 0.5 * a, bone: 0.5 * c, sigma, bone_level: lv.bone, end: Some(0.5 * e) };
            out.push(Plateau { pixel: k, value: lv.tissue, dir: [dx, dy], at: 0.5 * c, layer: Some(layer) });
            continue;
        }
        // a thin crest's bare climb to half its height is shorter: 0.9 blur widths, not 1.4
        if let (Some(bare), Some((xt, xb, crest))) = (bare_run, gap)
            && xb - xt > 1.25 * bare * if crest { 0.7 } else { 1.0 } + 1.0
        {
            // lined (a layer over about 1.5 blur widths): soft tissue from the lumen edge on;
            // the lumen's blur reaches about half the bare run (one blur width) past it
            out.push(Plateau { pixel: k, value: lv.tissue, dir: [dx, dy], at: 0.5 * (xt + 0.7 * bare), layer: None });
            continue;
        }
        if let Some((_, xb, true)) = gap {
            // a bare thin crest (a bony shelf or septum under the blur): bone, whatever its height
            out.push(Plateau { pixel: k, value: lv.bone, dir: [dx, dy], at: 0.5 * xb, layer: None });
            continue;
        }
        let slope: Vec<f32> = f.windows(2).map(|w| w[1] - w[0]).collect();
        let by = |x: &usize, y: &usize| slope[*x].total_cmp(&slope[*y]);
        let Some(p) = (0..(3 * vox).min(slope.len())).max_by(by) else { continue };
        if !(slope[p] > 0.0) {
            continue;
        }
        // the first plateau: the least rise before the ray climbs again by half the edge's
        let mut j = p;
        for i in p + 1..(p + 1 + 4 * vox).min(slope.len()) {
            if slope[i] < -0.25 * slope[p] {
                j = p; // falling back: a crest
                break;
            } else if slope[i] < slope[j] {
                j = i;
            } else if slope[i] > slope[j] + 0.5 * slope[p] {
                break;
            }
        }
        if j == p {
            continue;
        }
        if f[(j + 2 * vox).min(reach)] < f[j] - 0.1 * step {
            continue;
        }
        out.push(Plateau { pixel: k, value: f[j], dir: [dx, dy], at: 0.5 * j as f64, layer: None });
    }
    (out, sigma)
}

/// The lumen edge a and bone edge c ≥ a (half pixels along the ray) of the blurred
/// lumen | soft tissue | bone model m(x) = L + (T − L)·Φ((x − a)/σ) + (B − T)·Φ((x − c)/σ) that
/// fits the ray's smoothed values `f` (every half pixel) best in least squares, up to two
/// samples past its highest; σ in half pixels, L, T, B the section's levels. A grid of half
/// steps within three of the crossings `xt` (lumen/soft-tissue midpoint) and `xb`
/// (soft-tissue/bone midpoint), then eighths within one step of the best. None where the ray
/// is too short to say.
fn fit_layer(f: &[f32], lv: &Levels, sigma: f64, xt: f64, xb: f64) -> Option<(f64, f64)> {
    let top = (0..f.len()).max_by(|&a, &b| f[a].total_cmp(&f[b]))?;
    let f = &f[..(top + 3).min(f.len())];
    if f.len() < 6 {
        return None;
    }
    let (l, t, b) = (lv.lumen as f64, lv.tissue as f64, lv.bone as f64);
    let sse = |a: f64, c: f64| -> f64 {
        f.iter().enumerate().map(|(i, &y)| (y as f64 - l - (t - l) * phi((i as f64 - a) / sigma) - (b - t) * phi((i as f64 - c) / sigma)).powi(2)).sum()
    };
    // (error, a, c) of the best pair so far, improved over a square grid of ±k steps about (a0, c0)
    let search = |mut best: (f64, f64, f64), (a0, c0): (f64, f64), step: f64, k: i32| {
        for i in -k..=k {
            for j in -k..=k {
                let (a, c) = (a0 + step * i as f64, c0 + step * j as f64);
                if c >= a {
                    let e = sse(a, c);
                    if e < best.0 {
                        best = (e, a, c);
                    }
                }
            }
        }
        best
    };
    let coarse = search((f64::INFINITY, xt, xb), (xt, xb), 0.5, 6);
    let best = search(coarse, (coarse.1, coarse.2), 0.125, 4);
    Some((best.1, best.2))
}

/// The edges of the blurred lumen | soft tissue | bone | lumen model
/// m(x) = L + (T − L)·(Φ((x − a)/σ) − Φ((x − c)/σ)) + (B − L)·(Φ((x − c)/σ) − Φ((x − e)/σ))
/// (a ≤ c < e) that fits a ray's smoothed values `f` (every half pixel) best in least squares:
/// a ray from a scala across a thin bony shelf (c to e) with a limbus (a to c) on it or none
/// (a = c), lumen beyond. σ in half pixels, L, T, B the section's levels; every whole sample
/// within six of the crossings `xt` (lumen/soft tissue) and `xb` (halfway to the crest), and
/// bars up to six samples wide, Φ from one table. None where the ray is too short.
fn fit_bar(f: &[f32], lv: &Levels, sigma: f64, xt: f64, xb: f64) -> Option<(f64, f64, f64)> {
    let n = f.len();
    if n < 6 {
        return None;
    }
    let (l, t, b) = (lv.lumen as f64, lv.tissue as f64, lv.bone as f64);
    let table = phi_table(n + 16, sigma);
    let off = (n + 16) as isize;
    let at = |i: usize, x: isize| table[(i as isize - x + off) as usize];
    let mut best = (f64::INFINITY, 0isize, 0isize, 0isize);
    let (xt, xb) = (xt.round() as isize, xb.round() as isize);
    for a in (xt - 6).max(-4)..=(xt + 6) {
        for c in a.max(xb - 6)..=(xb + 6) {
            for e in c + 1..=c + 6 {
                let sse: f64 = f
                    .iter()
                    .enumerate()
                    .map(|(i, &y)| {
                        let (pa, pc, pe) = (at(i, a), at(i, c), at(i, e));
                        (y as f64 - l - (t - l) * (pa - pc) - (b - l) * (pc - pe)).powi(2)
                    })
                    .sum();
                if sse < best.0 {
                    best = (sse, a, c, e);
                }
            }
        }
    }
    best.0.is_finite().then_some((best.1 as f64, best.2 as f64, best.3 as f64))
}

/// The inverse of [`phi`] on (0, 1), by bisection (to 1e-9).
fn inv_phi(p: f64) -> f64 {
    let (mut lo, mut hi) = (-10.0, 10.0);
    while hi - lo > 1e-9 {
        let m = 0.5 * (lo + hi);
        if phi(m) < p { lo = m } else { hi = m }
    }
    0.5 * (lo + hi)
}

/// Length of a lateral-wall profile (mm): the thickest spiral ligament and the bone behind it.
pub(super) const PROFILE_MM: f64 = 0.6;

/// The summed profile, in q = (v − lumen)/(bone − lumen), across the lateral wall next to the
/// partition's outer end, and the number of rays summed (see [`wall_level`]).
///
/// Rays start at the edge pixels of the scalae `found` within `near` mm of the ligament point
/// `lig` (section mm) whose outward gradient runs within 60° of the partition's direction `dir`
/// (lamina → ligament), and sample the smoothed image every half pixel over [`PROFILE_MM`]. Rays
/// that leave the image or cross a scala again are left out. There the spiral ligament, the
/// thickest soft tissue round the duct, lies between lumen and bone.
pub(super) fn wall_profile(img: &Img, found: &[super::regions::Region], lv: &Levels, lig: [f64; 2], dir: [f64; 2], near: f64) -> (Vec<f64>, usize) {
    let len = (PROFILE_MM / (0.5 * img.pitch)).ceil() as usize + 1;
    let mut sum = vec![0.0; len];
    let masks: Vec<&[bool]> = found.iter().map(|r| &r.mask[..]).collect();
    let Some(bounds) = found.iter().map(|r| r.bounds).reduce(|a, b| a.union(b)) else { return (sum, 0) };
    let lateral = |k: usize, d: [f64; 2]| {
        let q = img.uv(k);
        (q[0] - lig[0]).hypot(q[1] - lig[1]) <= near && d[0] * dir[0] + d[1] * dir[1] >= 0.5
    };
    let rays = edge_rays(img, &masks, bounds, len, 4, lateral);
    for (_, _, f) in &rays {
        for (s, x) in sum.iter_mut().zip(f) {
            *s += ((x - lv.lumen) / (lv.bone - lv.lumen)) as f64;
        }
    }
    (sum, rays.len())
}

/// The wall read from the lateral-wall profiles of a tube of sections ([`wall_profile`]: each a
/// sum of rays and their count): the profiles of the longest length summed, divided by their
/// rays and fitted by [`wall_level`]; None with under ten rays.
pub(super) fn tube_wall<'a>(profiles: impl Iterator<Item = &'a (Vec<f64>, usize)>, pitch: f64, vox: f64) -> Option<Wall> {
    let tube: Vec<&(Vec<f64>, usize)> = profiles.collect();
    let len = tube.iter().map(|p| p.0.len()).max()?;
    let (mut sum, mut rays) = (vec![0.0; len], 0);
    for (p, k) in tube.into_iter().filter(|p| p.0.len() == len) {
        sum.iter_mut().zip(p).for_each(|(a, b)| *a += b);
        rays += k;
    }
    if rays < 10 {
        return None;
    }
    sum.iter_mut().for_each(|a| *a /= rays as f64);
    wall_level(&sum, pitch, vox)
}

/// The soft-tissue level, as q = (v − lumen)/(bone − lumen), from a mean lateral-wall profile
/// `p` (q every half pixel of `pitch` mm, voxels of `vox` mm at their largest; see
/// [`wall_profile`]), or None where the profile does not show a layer between lumen and bone.
///
/// The profile is fitted, up to its highest point, by a blurred lumen | soft tissue | bone model
/// q(x) = t·(Φ((x − a)/σ) − Φ((x − a − w)/σ)) + b·Φ((x − a − w)/σ) (Φ the normal distribution
/// function, the lumen at 0): for each edge position a, layer thickness w and blur σ (up to
/// 0.15 mm) t and b follow by linear least squares; a coarse grid (half pixels, or coarser on long
/// profiles) finds the best fit and a grid eight times finer around it refines it. Fitting the
/// whole edge reads the level of a layer too thin or too blurred to show a plateau of its own
/// (the saddle between its edges lies below it). Where the layer leaves over 80 % of the misfit
/// of lumen straight against bone, is thinner than the blur, darker than the lumen or over 55 %
/// of the way to bone, the wall is bare bone (at voxels under [`BARE_WALL_BELOW_MM`]; coarser, it
/// says nothing); a profile too short to fit, or a fit with the layer
/// over 10 % brighter than bone and a crest short of 90 % of bone, says nothing (None). A thick
/// layer whose bony wall is thinner than the profile is refitted over the whole profile
/// ([`behind_thin_wall`]).
///
/// The level is t where the layer is resolved (fitted 1.75 voxels thick or more,
/// [`THIN_LAYER_VOX`]): the bony wall behind a ligament is often as thin as the blur, so its
/// fitted step b stays well under bone, and t/b read the layer 0.04–0.1 of the lumen–bone step
/// too high (the family at 35–80 µm: members 0, 1, 2, 4, 6, 8 and 9; areas next to the ligament
/// several per cent high). t reads within 0.045 of the truth on every member. A layer fitted
/// thinner than that (clinical CT, where the ligament is about a voxel) holds no pure soft
/// tissue; its t is a partial-volume mix, and t/b is kept there (with t the family at 150 µm
/// read SV+ST 6.7 → 9.7 % off, mean of the members' medians). In between, the level moves from
/// one to the other.
pub(super) fn wall_level(p: &[f64], pitch: f64, vox: f64) -> Option<Wall> {
    let top = (0..p.len()).max_by(|&a, &b| p[a].total_cmp(&p[b]))?;
    let whole = p;
    let p = &p[..(top + 3).min(p.len())];
    if p.len() < 8 {
        return None;
    }
    let yy: f64 = p.iter().map(|y| y * y).sum();
    // least squares of t and b given the two edges' Φ at every sample: (sse, [t, b])
    let solve = |cdf: &dyn Fn(usize) -> (f64, f64)| {
        two_basis_fit(p, yy, |i| {
            let (f1, f2) = cdf(i);
            [f1 - f2, f2]
        })
    };
    // coarse: positions and blur every g half pixels (g keeps the grid near 32 steps a side),
    // Φ from one table per blur; then fine: eighths of g within one coarse step of the best
    let len = p.len() as isize;
    let g = (len / 32).max(1);
    let smax = ((0.15 / (0.5 * pitch)) as isize).max(2);
    let mut best = (f64::INFINITY, [0.0; 2], 0.0, 0.0, 0.0); // sse, [t, b], a, w, σ
    for s in (1..=smax).step_by(g as usize) {
        let table = phi_table(len as usize, s as f64);
        let at = |i: usize, c: isize| table[(i as isize - c + len) as usize];
        for a in (0..len / 2).step_by(g as usize) {
            for w in (0..len - a).step_by(g as usize) {
                if let Some((sse, c)) = solve(&|i| (at(i, a), at(i, a + w)))
                    && sse < best.0
                {
                    best = (sse, c, a as f64, w as f64, s as f64);
                }
            }
        }
    }
    let fine = |k: isize| k as f64 * g as f64 / 8.0;
    let (a0, w0, s0) = (best.2, best.3, best.4);
    for da in -8..=8 {
        for dw in -8..=8 {
            for ds in -4..=4 {
                let (a, w, s) = (a0 + fine(da), w0 + fine(dw), s0 + fine(ds));
                if w < 0.0 || s < 0.5 {
                    continue;
                }
                if let Some((sse, c)) = solve(&|i| (phi((i as f64 - a) / s), phi((i as f64 - a - w) / s)))
                    && sse < best.0
                {
                    best = (sse, c, a, w, s);
                }
            }
        }
    }
    // lumen straight against bone: q(x) = b·Φ((x − a)/σ), b by least squares; coarse, then fine
    let bare_fit = |cdf: &dyn Fn(usize) -> f64| -> f64 {
        let (fy, ff) = p.iter().enumerate().fold((0.0, 0.0), |(fy, ff), (i, &y)| {
            let f = cdf(i);
            (fy + f * y, ff + f * f)
        });
        if ff > 0.0 { yy - fy * fy / ff } else { f64::INFINITY }
    };
    let mut bare = (f64::INFINITY, 0.0, 0.0);
    for s in (1..=smax).step_by(g as usize) {
        for a in (0..len).step_by(g as usize) {
            let sse = bare_fit(&|i| phi((i as f64 - a as f64) / s as f64));
            if sse < bare.0 {
                bare = (sse, a as f64, s as f64);
            }
        }
    }
    let (a0, s0) = (bare.1, bare.2);
    for da in -8..=8 {
        for ds in -4..=4 {
            let (a, s) = (a0 + fine(da), s0 + fine(ds));
            if s >= 0.5 {
                bare.0 = bare.0.min(bare_fit(&|i| phi((i as f64 - a) / s)));
            }
        }
    }
    let bare = bare.0;
    let (sse, [t, b], _, w, sigma) = best;
    // a layer clearly brighter than bone is no fit of a lateral wall; one that explains little
    // of what lumen against bone leaves unexplained, is thinner than the blur, darker than the
    // lumen or over 55 % of the way to bone is no soft tissue (soft tissue lies much nearer
    // fluid than bone; a shoulder that high is a resampled bone edge's, common practice)
    // A "layer" brighter than bone is the bone's own shoulder: where the crest reaches bone the
    // wall is bare (today's phantom with 0.12 mm walls and a blur of one voxel at 50 µm: the
    // fit ran off above bone on most stretches, soft tissue stayed at a partial-volume peak of
    // the tube and SV/ST read −11.8/−11.5 %, now −7.2/−7.0 %); a crest short of bone may hide a
    // ligament a voxel thick (150 µm member 3: taken as bare, SV+ST 6 → 20 %).
    if !(t < 1.1 * b) {
        return (p[top] >= 0.9).then_some(Wall::Bare);
    }
    if sse > 0.8 * bare || !(w >= sigma && t > 0.0 && t < 0.55 * b) {
        // A wall whose blurred crest stays under 70 % of the way to bone is thinner than the
        // blur: a ligament about a voxel thick on it (clinical CT) fits as bare bone too, so the
        // fit cannot say (counting such a ligament as half lumen put areas up to 28 % high,
        // member 9 at 150 µm); the tube's soft-tissue peak then stands.
        // The same holds wherever the voxel is coarse enough for a whole ligament to fit as bare
        // bone against a solid capsule ([`BARE_WALL_BELOW_MM`]).
        if p[top] < 0.7 || vox >= BARE_WALL_BELOW_MM {
            return None;
        }
        return Some(Wall::Bare);
    }
    let (t, b, w) = behind_thin_wall(whole, top, (best.2, w, sigma), (t, b), pitch, vox).unwrap_or((t, b, w));
    let resolved = ((w * 0.5 * pitch / vox - THIN_LAYER_VOX[0]) / (THIN_LAYER_VOX[1] - THIN_LAYER_VOX[0])).clamp(0.0, 1.0);
    let q = t / b + resolved * (t - t / b);
    Some(Wall::Layer(q as f32))
}

/// The soft-tissue layer of a lateral-wall profile `p` (q every half pixel of `pitch` mm, its
/// highest point at `top`) refitted where its bony wall is thinner than the profile, as (t, b, w):
/// the profile falls back from its crest by more than a tenth of the lumen–bone step, the crest
/// (`tb`, the three-region fit's t and b) stays under 90 % of bone, and the layer was fitted
/// (`aws`: edge a, thickness w, blur σ, half pixels) at least [`THICK_LAYER_VOX`] voxels thick
/// (`vox` mm at their largest). Fitted only up to its crest as lumen | soft tissue | bone, such a
/// profile's blurred shell reads low, and so does its layer: the fit trades the layer's level for
/// the shell's missing height (the family at 40 µm, member 13: ligament 0.22 mm, a 0.11 mm shell
/// with soft tissue behind, blur 1.47 voxels: t 0.25–0.28 for 0.30, scala vestibuli −2.6 %
/// signed median). The whole profile is fitted by lumen | soft tissue | bone | beyond,
/// q(x) = t·(Φ₁ − Φ₂) + b·(Φ₂ − Φ₃) + e·Φ₃ with Φₖ = Φ((x − edgeₖ)/σ) at edges a, a + w and
/// a + w + d: t, b and e by linear least squares, a, w, d and σ by a pattern search from the
/// three-region fit (the shell d from 1 to 16 pixels). The refit stands where its level lies
/// within 0.06 of the first (a thinner layer's refit is ill-posed: member 4 at 50 µm, a ligament
/// fitted 2.2–2.4 voxels thick, read 0.02–0.25 for 0.30) and below 55 % of its bone; else None.
fn behind_thin_wall(p: &[f64], top: usize, aws: (f64, f64, f64), tb: (f64, f64), pitch: f64, vox: f64) -> Option<(f64, f64, f64)> {
    let ((a, w, sigma), (t, b)) = (aws, tb);
    let falls = p.last().is_some_and(|&end| end < p[top] - 0.1);
    if !falls || b >= 0.9 || w * 0.5 * pitch / vox < THICK_LAYER_VOX {
        return None;
    }
    let yy: f64 = p.iter().map(|y| y * y).sum();
    // residual and (t, b, e) at edges a, a + w, a + w + d and blur σ (half pixels)
    let fit = |[a, w, d, s]: [f64; 4]| -> Option<(f64, [f64; 3])> {
        if w < 0.0 || d < 0.0 || s < 0.5 {
            return None;
        }
        three_basis_fit(p, yy, |i| {
            let x = i as f64;
            let (f1, f2, f3) = (phi((x - a) / s), phi((x - a - w) / s), phi((x - a - w - d) / s));
            [f1 - f2, f2 - f3, f3]
        })
    };
    let start = [2.0, 4.0, 8.0, 16.0, 32.0].into_iter().filter_map(|d| fit([a, w, d, sigma]).map(|(e, c)| (e, c, [a, w, d, sigma])));
    let (mut sse, mut c, mut v) = start.min_by(|x, y| x.0.total_cmp(&y.0))?;
    // pattern search: each parameter a step either way, the step halved when none helps
    let mut h = 2.0;
    while h > 0.06 {
        let mut moved = false;
        for k in 0..4 {
            for step in [-h, h] {
                let mut u = v;
                u[k] += step;
                if let Some((e, cu)) = fit(u)
                    && e < sse
                {
                    (sse, c, v, moved) = (e, cu, u, true);
                }
            }
        }
        if !moved {
            h *= 0.5;
        }
    }
    let [t4, b4, _] = c;
    (t4 > 0.0 && t4 < 0.55 * b4 && (t4 - t).abs() <= 0.06).then_some((t4, b4, v[1]))
}

/// Fitted soft-tissue layers at least this thick (voxels, largest side) are refitted behind a thin
/// bony wall ([`behind_thin_wall`]). The family's ligaments fit 3.9–4.7 voxels thick where the
/// refit helps (members 8 and 13, 0.22–0.23 mm at 35×35×50 and 40 µm) and 2.1–2.7 voxels on
/// members 0, 4 and 9 (50–80 µm). Refitted at any thickness, member 4's level read 0.02–0.25 for
/// 0.30 in places (SV p95 7 → 79 %) and members 1, 6 and 9 lost 5–42 points of p95, though member
/// 0 read better (SV 1.9 → 1.4 % median).
const THICK_LAYER_VOX: f64 = 3.0;

/// Voxel side (mm, largest) from which a lateral wall that fits as bare bone is not taken for one:
/// the spiral ligament of a real cochlea, 0.1–0.3 mm thick at the partition (from memory), is
/// then two voxels or less, under the blur a step like bare bone's, and taken for bare bone it
/// counts as two-thirds lumen. The outside phantom with a solid capsule (0.15 mm ligament, blur
/// one voxel) read SV+ST 25.7 % high at 150 µm (22.8 % air-filled, 41 % at 200 µm), now 12.9 %
/// (11.7, 14.2): the tube's soft-tissue peak stands in. The family at 150 µm never fits bare
/// there (unchanged); ductline's plain phantom, whose walls are bare, reads 0.7 points lower at
/// 100 µm (SV −5.2 % signed); below this the fit decides as before (at 60 µm, bare walls at 80
/// µm read SV 3.5 % for 1.5 %).
const BARE_WALL_BELOW_MM: f64 = 0.1;

/// Fitted soft-tissue layers thinner than the first (voxels, largest side) hold no pure soft
/// tissue and are read relative to the wall (t/b); from the second on they are resolved and read
/// as fitted (t); in between the level moves linearly from one to the other (see
/// [`wall_level`]). Set in the gap the family shows: its ligaments fit 1.75–4.4 voxels thick at
/// 25–80 µm (1.75–1.8 on member 6, whose largest side is 1.5 times its smallest) and 1.0–1.56
/// at 150 µm. A ramp from 1.25 to 2 voxels cost member 6 0.5 % (SV) and the family at 150 µm
/// 0.3 % (SV+ST, mean).
const THIN_LAYER_VOX: [f64; 2] = [1.6, 1.75];

/// Linear least squares of y ≈ c₀·f₀(i) + c₁·f₁(i) over the samples y (Σy² = `yy` given):
/// (the residual sum of squares, [c₀, c₁]), or None where the two bases are (nearly) collinear.
pub(crate) fn two_basis_fit(y: &[f64], yy: f64, basis: impl Fn(usize) -> [f64; 2]) -> Option<(f64, [f64; 2])> {
    let (m, r) = normal_equations(y, basis);
    let det = m[0][0] * m[1][1] - m[0][1] * m[1][0];
    if !(det.abs() > 1e-9 * (m[0][0] * m[1][1]).abs().max(1e-300)) {
        return None;
    }
    let c = [(r[0] * m[1][1] - r[1] * m[0][1]) / det, (m[0][0] * r[1] - m[1][0] * r[0]) / det];
    Some((residual(yy, &m, &r, &c), c))
}

/// The normal equations of y ≈ Σ cₖ·fₖ(i) over the samples y: (M, r) with M = Σ f fᵀ, r = Σ f·y.
fn normal_equations<const N: usize>(y: &[f64], basis: impl Fn(usize) -> [f64; N]) -> ([[f64; N]; N], [f64; N]) {
    let (mut m, mut r) = ([[0.0f64; N]; N], [0.0f64; N]);
    for (i, &v) in y.iter().enumerate() {
        let f = basis(i);
        for u in 0..N {
            r[u] += f[u] * v;
            for t in 0..N {
                m[u][t] += f[u] * f[t];
            }
        }
    }
    (m, r)
}

/// The residual sum of squares Σ(model − y)² = Σy² − 2c·r + cᵀMc of coefficients c, given Σy² =
/// `yy` and the normal equations (M, r) ([`normal_equations`]).
fn residual<const N: usize>(yy: f64, m: &[[f64; N]; N], r: &[f64; N], c: &[f64; N]) -> f64 {
    let fitted: f64 = (0..N).map(|u| c[u] * (0..N).map(|t| m[u][t] * c[t]).sum::<f64>()).sum();
    yy - 2.0 * (0..N).map(|u| c[u] * r[u]).sum::<f64>() + fitted
}

/// Linear least squares of y ≈ Σ cₖ·fₖ(i) over three bases (Σy² = `yy` given), by Cramer's
/// rule: (the residual sum of squares, c), or None where the bases are (nearly) dependent.
fn three_basis_fit(y: &[f64], yy: f64, basis: impl Fn(usize) -> [f64; 3]) -> Option<(f64, [f64; 3])> {
    let (m, r) = normal_equations(y, basis);
    let det3 = |m: &[[f64; 3]; 3]| {
        m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1]) - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
            + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0])
    };
    let det = det3(&m);
    if !(det.abs() > 1e-12 * (m[0][0] * m[1][1] * m[2][2]).abs().max(1e-300)) {
        return None;
    }
    let mut c = [0.0; 3];
    for (k, ck) in c.iter_mut().enumerate() {
        let mut mk = m;
        (0..3).for_each(|u| mk[u][k] = r[u]);
        *ck = det3(&mk) / det;
    }
    Some((residual(yy, &m, &r, &c), c))
}

/// What the lateral wall shows between lumen and bone (see [`wall_level`]).
#[derive(Clone, Copy, Debug, PartialEq)]
pub(super) enum Wall {
    /// A soft-tissue layer at this level, as q = (v − lumen)/(bone − lumen).
    Layer(f32),
    /// Lumen straight against bone.
    Bare,
}

/// Φ(d/σ) for the whole-sample offsets d = −n ..= n, at index d + n: one table per blur σ
/// (samples) for fits over many edge positions.
pub(crate) fn phi_table(n: usize, sigma: f64) -> Vec<f64> {
    (0..2 * n + 1).map(|d| phi((d as f64 - n as f64) / sigma)).collect()
}

/// The standard normal distribution function (Abramowitz & Stegun 7.1.26 for erf, error
/// under 1.5e-7).
pub(crate) fn phi(z: f64) -> f64 {
    let x = z.abs() / std::f64::consts::SQRT_2;
    let t = 1.0 / (1.0 + 0.327_591_1 * x);
    let y = 1.0 - (((((1.061_405_429 * t - 1.453_152_027) * t) + 1.421_413_741) * t - 0.284_496_736) * t + 0.254_829_592) * t * (-x * x).exp();
    if z >= 0.0 { 0.5 * (1.0 + y) } else { 0.5 * (1.0 - y) }
}

/// Rays from the edge pixels of the regions `masks` (pixels in `bounds`; an edge pixel has a
/// 4-neighbour outside every region) along the gradient of the smoothed image, for which
/// `keep(pixel, direction)` holds: (pixel, unit direction, `len` smoothed values every half
/// pixel). Rays that leave the image or enter a region again from their `skip`-th sample on are
/// left out.
fn edge_rays(
    img: &Img,
    masks: &[&[bool]],
    bounds: super::regions::Rect,
    len: usize,
    skip: usize,
    keep: impl Fn(usize, [f64; 2]) -> bool,
) -> Vec<(usize, [f64; 2], Vec<f32>)> {
    let n = img.n;
    let any = |k: usize| masks.iter().any(|m| m[k]);
    let mut out = vec![];
    for k in bounds.pixels(n) {
        let (a, b) = (k % n, k / n);
        if !any(k) || a == 0 || b == 0 || a + 1 >= n || b + 1 >= n || [k - 1, k + 1, k - n, k + n].iter().all(|&j| any(j)) {
            continue; // not an edge pixel
        }
        let (gx, gy) = ((img.sm[k + 1] - img.sm[k - 1]) as f64, (img.sm[k + n] - img.sm[k - n]) as f64);
        let gn = gx.hypot(gy);
        if !(gn > 0.0) || !keep(k, [gx / gn, gy / gn]) {
            continue;
        }
        let (dx, dy) = (gx / gn, gy / gn);
        let at = |i: usize| (a as f64 + 0.5 * i as f64 * dx, b as f64 + 0.5 * i as f64 * dy);
        let f: Vec<f32> = (0..len).map(at).map(|(x, y)| bilinear(&img.sm, n, x, y)).collect();
        // finite values lie within the image, so the rounded positions index it
        if f.iter().any(|x| !x.is_finite()) || (skip..len).map(at).any(|(x, y)| any(y.round() as usize * n + x.round() as usize)) {
            continue;
        }
        out.push((k, [dx, dy], f));
    }
    out
}

/// Bilinear value of an n×n image at pixel coordinates (a, b); NaN outside.
fn bilinear(v: &[f32], n: usize, a: f64, b: f64) -> f32 {
    if !(a >= 0.0 && b >= 0.0 && a <= (n - 1) as f64 && b <= (n - 1) as f64) {
        return f32::NAN;
    }
    let (a0, b0) = ((a as usize).min(n - 2), (b as usize).min(n - 2));
    let (fa, fb) = ((a - a0 as f64) as f32, (b - b0 as f64) as f32);
    let at = |x: usize, y: usize| v[y * n + x];
    let top = at(a0, b0) * (1.0 - fa) + at(a0 + 1, b0) * fa;
    let bot = at(a0, b0 + 1) * (1.0 - fa) + at(a0 + 1, b0 + 1) * fa;
    top * (1.0 - fb) + bot * fb
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Blurred lumen | soft tissue | bone profiles built from the closed form of a Gaussian-blurred
    /// step (Φ of the distance over σ; handbook result), with a little deterministic noise: the
    /// fit reads the layer's level within 0.03 of the lumen–bone step both where the layer shows a
    /// plateau and where it is only 1.5 or 2 blur widths thick (its middle then reads far off).
    #[test]
    fn wall_level_reads_thin_blurred_layers() {
        let pitch = 0.02; // mm; the profile is sampled every half pixel
        let profile = |t: f64, a: f64, w: f64, sigma: f64| -> Vec<f64> {
            (0..61)
                .map(|i| {
                    let x = 0.01 * i as f64;
                    let (f1, f2) = (phi((x - a) / sigma), phi((x - a - w) / sigma));
                    t * (f1 - f2) + f2 + 0.004 * ((i * 7919) % 13) as f64 / 13.0
                })
                .collect()
        };
        for (t, w, sigma) in [(0.3, 0.15, 0.025), (0.25, 0.075, 0.05), (0.4, 0.12, 0.06)] {
            let p = profile(t, 0.1, w, sigma);
            let Some(Wall::Layer(q)) = wall_level(&p, pitch, 2.0 * pitch) else { panic!("no layer read") };
            assert!((q as f64 - t).abs() < 0.03, "t {t} w {w} σ {sigma}: read {q}");
            // where the layer is thin for its blur, the value in its middle is far from its level
            if w < 2.0 * sigma {
                let mid = ((0.1 + 0.5 * w) / 0.01) as usize;
                assert!((p[mid] - t).abs() > 0.05, "mid-layer {} is near {t}", p[mid]);
            }
        }
        // lumen straight against bone: no layer
        let step: Vec<f64> = (0..61).map(|i| phi((0.01 * i as f64 - 0.1) / 0.03)).collect();
        assert_eq!(wall_level(&step, pitch, 2.0 * pitch), Some(Wall::Bare));
    }

    /// A ligament in front of a bony wall about as thin as the blur (its blurred crest stays
    /// well under bone) and soft tissue beyond, from the same closed form (handbook result): the
    /// layer's level is read within 0.03 of the lumen–bone step. Taken relative to the wall's
    /// fitted step (t/b, as it was), it read 0.07–0.1 too high.
    #[test]
    fn wall_level_behind_a_thin_bony_wall() {
        let (pitch, sigma) = (0.025, 0.04); // mm; 50 µm voxels, a blur of 0.8 voxel
        for (t, w, e) in [(0.25, 0.13, 0.06), (0.32, 0.2, 0.08), (0.22, 0.16, 0.05)] {
            let p: Vec<f64> = (0..49)
                .map(|i| {
                    let x = 0.5 * pitch * i as f64;
                    let (fa, fc, fe) = (phi((x - 0.05) / sigma), phi((x - 0.05 - w) / sigma), phi((x - 0.05 - w - e) / sigma));
                    t * (fa - fc) + (fc - fe) + 0.35 * fe
                })
                .collect();
            let crest = p.iter().fold(0.0f64, |m, &x| m.max(x));
            assert!(crest < 0.9, "the wall's crest {crest} should stay under bone");
            let Some(Wall::Layer(q)) = wall_level(&p, pitch, 2.0 * pitch) else { panic!("no layer read (t {t}, w {w}, e {e})") };
            assert!((q as f64 - t).abs() < 0.03, "t {t} w {w} e {e}: read {q}");
        }
    }

    /// A thick ligament (0.18–0.24 mm, 40 µm voxels) in front of a bony shell of 0.1–0.12 mm with
    /// soft tissue beyond, blurred by 1.3–1.5 voxels, from the same closed form (handbook result),
    /// the profile starting where it has risen 8 % of the step (rays start at the grown lumen's
    /// edge, on its blur): the layer's level within 0.005 of the step. Fitted only up to the
    /// shell's blurred crest (lumen | soft tissue | bone) the first read 0.289 for 0.3
    /// (`behind_thin_wall`).
    #[test]
    fn wall_level_refits_a_thick_layer_behind_a_thin_shell() {
        let (pitch, vox) = (0.02, 0.04); // mm: half-voxel pixels, sampled every half pixel
        for (t, w, d, sigma) in [(0.3, 0.224, 0.11, 0.059), (0.22, 0.18, 0.1, 0.052), (0.33, 0.24, 0.12, 0.06)] {
            let q = |x: f64| t * (phi(x / sigma) - phi((x - w) / sigma)) + phi((x - w) / sigma) - phi((x - w - d) / sigma) + 0.35 * phi((x - w - d) / sigma);
            let mut x0 = -0.3;
            while q(x0) < 0.08 {
                x0 += 0.001;
            }
            let p: Vec<f64> = (0..61).map(|i| q(x0 + 0.5 * pitch * i as f64)).collect();
            let crest = p.iter().fold(0.0f64, |m, &x| m.max(x));
            assert!(crest < 0.9, "the shell's crest {crest} should stay under bone");
            let Some(Wall::Layer(read)) = wall_level(&p, pitch, vox) else { panic!("no layer read (t {t}, w {w}, d {d})") };
            assert!((read as f64 - t).abs() < 0.005, "t {t} w {w} d {d} σ {sigma}: read {read}");
        }
    }

    /// Rays across a bony shelf three or four samples wide under a blur of two (its blurred crest
    /// stays under bone: a crest ray), bare or with a limbus of 2–6 samples on it and lumen
    /// beyond, built from the closed form of Gaussian-blurred steps (handbook result) with a
    /// little deterministic noise: the fit finds the shelf's near edge within one sample and the
    /// limbus's lumen edge within 1.5, and the lumen share 1 − Φa + Φe it implies at the shelf's
    /// near edge within 0.05 of the truth.
    #[test]
    fn fit_bar_finds_a_limbus_on_a_thin_shelf() {
        let lv = Levels { lumen: 100.0, tissue: 250.0, bone: 800.0 };
        let sigma = 2.0;
        for (limbus, shelf) in [(0.0, 3.0), (2.0, 3.0), (4.0, 4.0), (6.0, 3.0)] {
            let (a, c) = (6.0, 6.0 + limbus);
            let e = c + shelf;
            let model = |x: f64| {
                let (pa, pc, pe) = (phi((x - a) / sigma), phi((x - c) / sigma), phi((x - e) / sigma));
                100.0 + 150.0 * (pa - pc) + 700.0 * (pc - pe)
            };
            let f: Vec<f32> = (0..25).map(|i| (model(i as f64) + 4.0 * (((i * 7919) % 13) as f64 / 13.0 - 0.5)) as f32).collect();
            let cross = |level: f32| (1..f.len()).find(|&i| f[i] >= level).map(|i| (i - 1) as f64 + ((level - f[i - 1]) / (f[i] - f[i - 1])) as f64).unwrap();
            let peak = f.iter().fold(f32::MIN, |m, &x| m.max(x));
            let (fa, fc, fe) = fit_bar(&f, &lv, sigma, cross(lv.lumen_cut()), cross(0.5 * (lv.tissue + peak))).unwrap();
            assert!((fc - c).abs() <= 1.0 && (fa - a).abs() <= 1.5, "limbus {limbus}, shelf {shelf}: edges {fa}, {fc}, {fe}");
            let share = |a: f64, e: f64| 1.0 - phi((c - a) / sigma) + phi((c - e) / sigma);
            assert!((share(fa, fe) - share(a, e)).abs() < 0.05, "limbus {limbus}, shelf {shelf}: lumen share {} for {}", share(fa, fe), share(a, e));
        }
    }

    /// Two turns 1 mm apart, sections every 0.5 mm: the lower turn's tubes read only thin crests
    /// (bone 0.6), the upper shows bone (0.9) over its first 5 mm. The lower sections within
    /// 2.5 mm of the upper turn take its level; those farther keep their own; one tube reading
    /// high (1.5, at x = 9 mm) sets no neighbour's level; a section without levels stays without.
    #[test]
    fn bone_from_the_sections_nearby() {
        let lv = |bone: f32| Some(Levels { lumen: 0.1, tissue: 0.3, bone });
        let (mut centres, mut levels) = (vec![], vec![]);
        for i in 0..=20 {
            centres.push([0.5 * i as f64, 0.0, 0.0]);
            levels.push(lv(if i == 18 { 1.5 } else { 0.6 }));
        }
        for i in 0..=10 {
            centres.push([0.5 * i as f64, 0.0, 1.0]);
            levels.push(lv(0.9));
        }
        centres.push([0.0, 0.0, 0.5]);
        levels.push(None);
        bone_nearby(&mut levels, &centres, 2.5);
        let bone = |k: usize| levels[k].unwrap().bone;
        // lower turn, x = 0 … 4 mm: over a fifth of their neighbours show 0.9
        assert!((0..=8).all(|k| bone(k) == 0.9), "{:?}", (0..=8).map(bone).collect::<Vec<_>>());
        // x ≥ 7.5 mm: no section of the upper turn within 2.5 mm; the bright tube stays alone
        assert!((15..=20).filter(|&k| k != 18).all(|k| bone(k) == 0.6));
        assert_eq!(bone(18), 1.5);
        assert!((21..=31).all(|k| bone(k) == 0.9));
        assert!(levels[32].is_none());
        // a section read as two materials (soft tissue at bone's level) keeps its levels
        let two = Levels { lumen: 0.1, tissue: 0.6, bone: 0.6 };
        let mut levels = vec![Some(two)];
        levels.extend((0..10).map(|_| lv(0.9)));
        bone_nearby(&mut levels, &[[0.0, 0.0, 0.5]; 11], 2.5);
        assert_eq!(levels[0], Some(two));
    }

    /// A tube at clinical resolution: soft tissue (bin 100) and what lies outside the capsule
    /// (130) fill most of it, bone 15 % (200), and the scalae's few pure lumen pixels 3 % (35),
    /// with partial volume spread thinly between. The split alone takes the soft tissue for the
    /// lumen; with the duct's centre at bin 40 the lumen is found at its own small peak, the
    /// other two levels unchanged. With the centre at the darkest class's own level, or only a
    /// tenth of the way to bone below it, nothing changes.
    #[test]
    fn a_lumen_too_small_for_a_class_of_its_own() {
        let peak = |c: f64, w: f64, mass: f64| move |i: usize| mass * (-0.5 * ((i as f64 - c) / w).powi(2)).exp() / (w * 2.5066);
        let (l, t, o, b) = (peak(35.0, 4.0, 0.03), peak(100.0, 5.0, 0.6), peak(130.0, 5.0, 0.2), peak(200.0, 6.0, 0.15));
        let h: Vec<f64> = (0..256).map(|i| 1e4 * (l(i) + t(i) + o(i) + b(i)) + if (35..200).contains(&i) { 5.0 } else { 0.0 }).collect();
        let (a, b, c) = three_levels(&h).unwrap();
        assert!(a >= 95, "the split alone: lumen at {a}");
        let (lumen, tissue, bone) = lumen_class(&h, Some(40.0)).unwrap();
        assert!(lumen.abs_diff(35) <= 2, "lumen at {lumen}");
        assert_eq!((tissue, bone), (b, c));
        assert_eq!(lumen_class(&h, Some(a as f32)), three_levels(&h));
        assert_eq!(lumen_class(&h, Some(a as f32 - 0.1 * (c - a) as f32)), three_levels(&h));
    }

    /// A ray across lumen | soft tissue | bone built from the closed form of Gaussian-blurred
    /// steps (handbook result), with a little deterministic noise: whether the layer is three
    /// blur widths thick, one, or half of one (where the profile shows no plateau at all), the
    /// fit finds the bone edge (whose blur the area step takes from it) within 0.15 of a sample
    /// and the lumen edge (which only bounds where lumen may lie) within 0.3.
    #[test]
    fn fit_layer_finds_both_edges_of_thin_layers() {
        let lv = Levels { lumen: 100.0, tissue: 250.0, bone: 800.0 };
        let sigma = 3.0; // samples (half pixels)
        for w in [9.0, 3.0, 1.5] {
            let (a, c) = (5.0, 5.0 + w);
            let f: Vec<f32> = (0..24)
                .map(|i| {
                    let x = i as f64;
                    let m = 100.0 + 150.0 * phi((x - a) / sigma) + 550.0 * phi((x - c) / sigma);
                    (m + 4.0 * (((i * 7919) % 13) as f64 / 13.0 - 0.5)) as f32
                })
                .collect();
            let cross = |level: f32| (1..f.len()).find(|&i| f[i] >= level).map(|i| (i - 1) as f64 + ((level - f[i - 1]) / (f[i] - f[i - 1])) as f64).unwrap();
            let (fa, fc) = fit_layer(&f, &lv, sigma, cross(lv.lumen_cut()), cross(lv.bone_cut())).unwrap();
            assert!((fc - c).abs() < 0.15 && (fa - a).abs() < 0.3, "layer {w}: edges {fa:.2}, {fc:.2} for {a}, {c}");
        }
    }
}
