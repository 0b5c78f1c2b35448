//! Step 2: grey levels of lumen, soft tissue and bone.
//!
//! Each section's first square is histogrammed; the histograms of the sections within ±`pool` of a
//! section (a tube along the duct, smoothed along s) are summed and split in three classes by
//! multi-level Otsu (Liao, Chen & Chung 2001: the two thresholds maximising the between-class
//! variance). Lumen and bone are the modes (peaks of the lightly smoothed histogram) of the
//! darkest and brightest classes: partial volume spreads blurred edges thinly over the range but
//! leaves the peaks where pure material is, so thin bony walls do not bias them and no patch of
//! pure bone is required. Soft tissue is the darkest real peak between them (see `three_levels`).

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
pub(super) fn pooled(imgs: &[Img], pool: usize) -> Vec<Option<Levels>> {
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
            let mut h = vec![0.0; BINS];
            for hh in &hists[i.saturating_sub(pool)..(i + pool + 1).min(hists.len())] {
                h.iter_mut().zip(hh).for_each(|(a, b)| *a += b);
            }
            let at = |bin: usize| lo + bin as f32 / k;
            three_levels(&h).map(|(a, b, c)| Levels { lumen: at(a), tissue: at(b), bone: at(c) })
        })
        .collect()
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
    let sm: Vec<f64> = (0..n).map(|i| h[i.saturating_sub(2)..(i + 3).min(n)].iter().sum::<f64>()).collect();
    let mode = |a: usize, b: usize| (a..b).max_by(|&x, &y| sm[x].total_cmp(&sm[y]).then(y.cmp(&x)));
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

/// What borders the lumen of a section.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(super) enum Near {
    /// Soft tissue at this level.
    Tissue(f32),
    /// Bone nearly all round: two materials.
    Bone,
    /// Tissue, but no clear level here (the pooled histogram's is used).
    Unclear,
}

/// The soft-tissue level next to the lumen: the mode of the smoothed values in the ring 1.5 to
/// four voxels (`vox` pixels each) outside the scalae `found`, leaving out pixels within a voxel
/// of bone and values within 10 % of the lumen–bone step of the lumen. `Bone` with under 30 such
/// pixels or under a twentieth of the ring (the lumen is walled by bone: no soft tissue to weigh),
/// `Unclear` when their values show no clear peak.
pub(super) fn tissue_near(img: &Img, found: &[super::regions::Region], lv: &Levels, vox: usize) -> Near {
    use super::areas::near;
    use super::regions::Rect;
    let n = img.n;
    let union = |i: usize| found.iter().any(|r| r.mask[i]);
    let Some(bounds) = found.iter().map(|r| r.bounds).reduce(|a, b| Rect { a0: a.a0.min(b.a0), a1: a.a1.max(b.a1), b0: a.b0.min(b.b0), b1: a.b1.max(b.b1) })
    else {
        return Near::Unclear;
    };
    let outer = near(n, bounds, 4 * vox, union);
    let inner = near(n, bounds, (3 * vox).div_ceil(2), union);
    let reach = bounds.widen(4 * vox, n);
    let bone_near = local_max(&img.sm, n, reach, vox);
    let (lo, hi) = (lv.lumen + 0.1 * (lv.bone - lv.lumen), lv.bone_cut());
    const B: usize = 64;
    let mut h = [0f64; B];
    let (mut count, mut ring) = (0, 0);
    for i in reach.pixels(n) {
        let x = img.sm[i];
        if outer[i] && !inner[i] && x.is_finite() {
            ring += 1;
            if bone_near[i] < lv.bone_cut() && x > lo && x < hi {
                h[(((x - lo) / (hi - lo)) * (B as f32 - 1.0)) as usize] += 1.0;
                count += 1;
            }
        }
    }
    // soft tissue must line a fair part of the lumen to weigh: else the lumen is walled by bone
    if count < 30 || count * 20 < ring {
        return Near::Bone;
    }
    let sm: Vec<f64> = (0..B).map(|i| h[i.saturating_sub(1)..(i + 2).min(B)].iter().sum()).collect();
    let Some(m) = (0..B).max_by(|&a, &b| sm[a].total_cmp(&sm[b])) else { return Near::Unclear };
    // a real tissue shows as a peak inside the range, well above the flat spread of blurred edges
    let mean = sm.iter().sum::<f64>() / B as f64;
    if !(2..=B - B / 10).contains(&m) || sm[m] < 3.0 * mean {
        return Near::Unclear;
    }
    Near::Tissue(lo + (m as f32 + 0.5) / (B as f32 - 1.0) * (hi - lo))
}

/// The maximum of `v` over the (2r+1)² square around each pixel of `rect` (NaN-free values only;
/// −∞ elsewhere), as an n×n field. Separable: rows, then columns.
fn local_max(v: &[f32], n: usize, rect: super::regions::Rect, r: usize) -> Vec<f32> {
    let mut rows = vec![f32::NEG_INFINITY; n * n];
    let wide = rect.widen(r, n);
    for b in wide.b0..wide.b1 {
        for a in rect.a0..rect.a1 {
            let m = (a.saturating_sub(r)..(a + r + 1).min(n)).map(|x| v[b * n + x]).filter(|x| x.is_finite()).fold(f32::NEG_INFINITY, f32::max);
            rows[b * n + a] = m;
        }
    }
    let mut out = vec![f32::NEG_INFINITY; n * n];
    for b in rect.b0..rect.b1 {
        for a in rect.a0..rect.a1 {
            out[b * n + a] = (b.saturating_sub(r)..(b + r + 1).min(n)).map(|y| rows[y * n + a]).fold(f32::NEG_INFINITY, f32::max);
        }
    }
    out
}
