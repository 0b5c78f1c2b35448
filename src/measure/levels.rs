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
            let h = window_sum(&hists, i, pool);
            let at = |bin: usize| lo + bin as f32 / k;
            three_levels(&h).map(|(a, b, c)| Levels { lumen: at(a), tissue: at(b), bone: at(c) })
        })
        .collect()
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

/// Bins of the ring histograms, over q = (v − lumen)/(bone − lumen) ∈ [0, 1).
pub(super) const RING_BINS: usize = 128;

/// Histogram of the values in the ring 1.5 to 2.5 voxels (`vox` pixels each) outside the scalae
/// `found`, binned by q = (v − lumen)/(bone − lumen) so that the rings of neighbouring sections
/// can be summed. Where soft tissue lines the lumen (spiral ligament, limbus) the ring lies in it,
/// past most of the blur of its edge, and its values pile up at the soft-tissue level; where bone
/// walls the lumen they spread over the blurred edge instead.
pub(super) fn ring_histogram(img: &Img, found: &[super::regions::Region], lv: &Levels, vox: usize) -> Vec<f64> {
    use super::regions::{Rect, chamfer};
    let mut h = vec![0.0; RING_BINS];
    let n = img.n;
    let Some(bounds) = found.iter().map(|r| r.bounds).reduce(|a, b| Rect { a0: a.a0.min(b.a0), a1: a.a1.max(b.a1), b0: a.b0.min(b.b0), b1: a.b1.max(b.b1) })
    else {
        return h;
    };
    let rc = bounds.widen(3 * vox, n);
    let (w, hh) = (rc.a1 - rc.a0, rc.b1 - rc.b0);
    let at = |k: usize| (rc.b0 + k / w) * n + rc.a0 + k % w;
    // chamfer distance in thirds of a pixel: one voxel is 3·vox
    let d = chamfer(w, hh, |k| found.iter().any(|r| r.mask[at(k)]));
    let (lo, hi) = ((9 * vox) as u32 / 2, (15 * vox) as u32 / 2);
    let step = lv.bone - lv.lumen;
    for (k, &dk) in d.iter().enumerate() {
        let x = img.v[at(k)];
        if dk > lo && dk <= hi && x.is_finite() {
            let q = (x - lv.lumen) / step;
            if (0.0..1.0).contains(&q) {
                h[(q * RING_BINS as f32) as usize] += 1.0;
            }
        }
    }
    h
}

/// What the ring round the lumen shows (see [`ring_histogram`]).
#[derive(Clone, Copy, Debug, PartialEq)]
pub(super) enum Ring {
    /// Soft tissue at this level, as q = (v − lumen)/(bone − lumen).
    Tissue(f32),
    /// Under a fifth of the ring lies below q = 0.65: bone walls the lumen (two materials).
    Walled,
    /// Soft tissue, but no clear peak (the tube's histogram is asked instead).
    Unclear,
}

/// The soft-tissue level from a summed ring histogram: the darkest clear peak between q = 0.08
/// and 0.65 (a local maximum over ±4 bins, at least 1.5 times the mean density of the ring above
/// q = 0.08 and holding a tenth of its pixels within ±6 bins), refined as the mean of its ±4 bins.
pub(super) fn ring_tissue(h: &[f64]) -> Ring {
    let n = h.len();
    let sm: Vec<f64> = (0..n).map(|i| h[i.saturating_sub(1)..(i + 2).min(n)].iter().sum::<f64>() / 3.0).collect();
    let bin = |q: f64| (q * n as f64) as usize;
    let total: f64 = h[bin(0.08)..].iter().sum();
    let mean = total / (n - bin(0.08)) as f64;
    if total < 30.0 {
        return Ring::Unclear;
    }
    if h[bin(0.08)..bin(0.65)].iter().sum::<f64>() < 0.2 * total {
        return Ring::Walled;
    }
    let peak = (bin(0.08)..bin(0.65)).find(|&i| {
        let top = (i.saturating_sub(4)..(i + 5).min(n)).all(|j| sm[j] <= sm[i]);
        let mass: f64 = h[i.saturating_sub(6)..(i + 7).min(n)].iter().sum();
        top && sm[i] >= 1.5 * mean && mass >= 0.1 * total
    });
    let Some(peak) = peak else { return Ring::Unclear };
    let (a, b) = (peak.saturating_sub(4), (peak + 5).min(n));
    let (w, m) = (a..b).fold((0.0, 0.0), |(w, m), j| (w + h[j], m + h[j] * (j as f64 + 0.5)));
    Ring::Tissue((m / w / n as f64) as f32)
}

/// The maximum of `v` over the (2r+1)² square around each pixel of `rect` (NaN-free values only;
/// −∞ elsewhere), as an n×n field. Separable: rows, then columns.
pub(super) fn local_max(v: &[f32], n: usize, rect: super::regions::Rect, r: usize) -> Vec<f32> {
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

#[cfg(test)]
mod tests {
    use super::*;

    /// A ring of soft tissue at q = 0.3 (Gaussian spread 0.03) over a flat spread of blurred
    /// lumen–bone edges, and a ring of bone only: the level is the peak's centre (to a bin),
    /// and the bone ring reads as two materials.
    #[test]
    fn ring_reads_tissue_or_bone() {
        let q = |i: usize| (i as f64 + 0.5) / RING_BINS as f64;
        let tissue: Vec<f64> = (0..RING_BINS).map(|i| 5.0 + 200.0 * (-0.5 * ((q(i) - 0.3) / 0.03).powi(2)).exp()).collect();
        match ring_tissue(&tissue) {
            Ring::Tissue(t) => assert!((t - 0.3).abs() < 1.0 / RING_BINS as f32, "{t}"),
            r => panic!("{r:?}"),
        }
        let bone: Vec<f64> = (0..RING_BINS).map(|i| if q(i) > 0.7 { 50.0 } else { 1.0 }).collect();
        assert_eq!(ring_tissue(&bone), Ring::Walled);
        // a flat spread with no peak is unclear
        assert_eq!(ring_tissue(&vec![10.0; RING_BINS]), Ring::Unclear);
    }
}
