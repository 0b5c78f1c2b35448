//! Step 5: lateral wall thickness.

use super::levels::Levels;
use crate::section::{self, SectionGeom};
use crate::stack::Stack;
use crate::with_samples;

/// Lateral wall thickness (mm) along the partition direction `dir` from `mid` (section
/// coordinates): past the lumen, the crossing into bone (halfway from soft tissue to bone, so a
/// soft-tissue lining is not counted as wall), then the crossing out of it; a wall under three
/// voxels by those crossings is measured by the bone it holds instead (see below). The profile is
/// the mean of eight lines at ±1 to ±4 pitches off the partition line (a thin wall read from fewer
/// scatters with the noise).
pub(super) fn wall(stack: &Stack, g: &SectionGeom, mid: [f64; 2], dir: [f64; 2], pitch: f64, capture: f64, lv: &Levels) -> Option<f64> {
    let (lumen_cut, thr, bone) = (lv.lumen_cut(), lv.bone_cut(), lv.bone);
    let vox = stack.voxel.as_ref()?;
    let h = 0.5 * pitch;
    let steps = ((capture + 1.0) / h) as usize;
    let normal = [-dir[1], dir[0]];
    let prof: Vec<f32> = with_samples!(&stack.samples, data => (0..steps).map(|i| {
        let d = i as f64 * h;
        let mut acc = 0.0f32;
        for o in [-4.0, -3.0, -2.0, -1.0, 1.0, 2.0, 3.0, 4.0] {
            let q = [mid[0] + d * dir[0] + o * pitch * normal[0], mid[1] + d * dir[1] + o * pitch * normal[1]];
            acc += section::trilinear_idx(data, stack.dims, stack.to_index(g.from_plane(q)));
        }
        acc / 8.0
    }).collect());
    let cross = |i: usize, t: f32| -> f64 {
        let (a, b) = (prof[i - 1], prof[i]);
        ((i - 1) as f64 + ((t - a) / (b - a)).clamp(0.0, 1.0) as f64) * h
    };
    let first_dark = prof.iter().position(|x| x.is_finite() && *x < lumen_cut)?;
    // the profile up to where it leaves the stack
    let end = (first_dark..prof.len()).find(|&i| !prof[i].is_finite()).unwrap_or(prof.len());
    // The wall is the first bright run past the lumen (at the lumen/bone midpoint). It starts
    // where it crosses the soft-tissue/bone midpoint; a thin wall blurred below that is taken at
    // the lumen/bone one (its thickness then comes from the bone it holds, below).
    let mut low = (0.5 * (lv.lumen + bone)).min(thr);
    // A wall thinner than the blur (clinical CT) may not even reach that: then it is the first
    // crest past the lumen standing a quarter of the lumen–bone step above the lumen, taken at
    // half its height above the lumen.
    if !(first_dark + 1..end).any(|i| prof[i] >= low) {
        let rise = (first_dark + 1..end).find(|&i| prof[i] >= lv.lumen + 0.25 * (bone - lv.lumen))?;
        let crest = (rise..end).take_while(|&i| i + 1 < end && prof[i + 1] >= prof[i]).last().map_or(rise, |i| i + 1);
        low = 0.5 * (lv.lumen + prof[crest]);
    }
    let first = (first_dark + 1..end).find(|&i| prof[i] >= low)?;
    let run = (first..end).find(|&i| prof[i] < low).unwrap_or(end);
    let (up, thr) = (first..run).find(|&i| prof[i] >= thr).map_or((first, low), |i| (i, thr));
    // The outer edge's half level lies between bone and what is outside the wall, which need
    // not be fluid: take that level from the profile two to four voxels beyond the edge.
    let k = (vox.max() / h).ceil() as usize;
    let level_beyond = |from: usize| -> Option<f32> {
        let mut v: Vec<f32> = prof.get(from + 2 * k..(from + 4 * k).min(end))?.iter().copied().filter(|x| x.is_finite()).collect();
        v.sort_by(f32::total_cmp);
        v.get(v.len() / 2).copied()
    };
    // Where what lies outside is itself above the midpoint (a background between soft tissue and
    // bone), the profile never falls below it: the wall then ends halfway from its crest (within
    // two voxels of where it rose) down to the level two to four voxels past that crest.
    let mut down = match (up + 1..end).find(|&i| prof[i] < thr) {
        Some(d) => d,
        None => {
            let crest = (up..(up + 2 * k).min(end)).max_by(|&i, &j| prof[i].total_cmp(&prof[j]))?;
            let beyond = level_beyond(crest)?;
            let half = 0.5 * (prof[crest] + beyond);
            if !(prof[crest] - beyond > 0.1 * (bone - lv.lumen)) {
                return None;
            }
            (crest + 1..end).find(|&i| prof[i] < half)?
        }
    };
    let mut lo_out = level_beyond(down)?;
    let t_out = (0.5 * (bone + lo_out)).max(thr);
    // The outer edge is where the wall falls below that level, searched from where it first
    // stands above it (a wall still rising through it would otherwise end one sample after it
    // began). A wall whose crest stays under it is thinner than the blur, and where what lies
    // outside is nearly as bright as the soft-tissue/bone midpoint the run above that midpoint
    // can run on far past it (150 µm member 1: 0.5–0.9 mm read for 0.13): such a wall is
    // measured by the bone it holds (below), its outer edge held within a voxel of its crest
    // and the level outside taken beyond that.
    let thin = match (up..down).find(|&i| prof[i] >= t_out) {
        Some(top) => {
            down = (top + 1..end).find(|&i| prof[i] < t_out).unwrap_or(down);
            false
        }
        None => {
            let crest = (up..down).max_by(|&i, &j| prof[i].total_cmp(&prof[j])).unwrap_or(up);
            if down > crest + k {
                down = crest + k;
                lo_out = level_beyond(down)?;
            }
            true
        }
    };
    // (a wall held at its crest has no crossings that mean anything)
    let crossing = (!thin).then(|| cross(down, t_out) - cross(up, thr));
    if let Some(c) = crossing
        && c >= 3.0 * vox.max()
    {
        return Some(c);
    }
    // A wall within a few voxels of the blur never reaches its full level, and the crossings
    // close in on each other: take its thickness from the bone it holds instead, the integral of
    // the bone fraction over the profile from two voxels before it to two voxels after, against
    // the level inside (soft tissue or lumen) before its peak and the level outside after it.
    let a = up.saturating_sub(2 * k).max(first_dark);
    let b = (down + 2 * k).min(end);
    let mut inner: Vec<f32> = prof[first_dark..a.max(first_dark + 1)].iter().rev().take(k.max(1)).copied().filter(|x| x.is_finite()).collect();
    // (where the integral cannot be taken, the crossings stand)
    if inner.is_empty() || prof[a..b].iter().any(|x| !x.is_finite()) {
        return crossing;
    }
    inner.sort_by(f32::total_cmp);
    // where the section has a soft-tissue level, the spiral ligament lines the wall here (it is
    // thickest where the partition meets it): bone is what stands above soft tissue, not above
    // the lumen two voxels in, and nothing below soft tissue counts. (The level is held to what
    // lies outside the wall where that is darker: the wall fit can read soft tissue high.)
    let lined = lv.tissue < lv.bone;
    // The floor stands [`LINING_MARGIN`] of the lumen–bone step above the soft-tissue level: the
    // ligament's own values scatter about that level (noise, and the wall fit's error of a few
    // hundredths), and those clipped above a floor at the level itself count as bone. With the
    // level itself, walls read 5–17 µm thicker on the family's members 0–2 at 60–80 µm (member
    // 1: 0.19 → 0.41 voxel median error); with the margin 0.08–0.25 voxel.
    let floor = lv.tissue + LINING_MARGIN * (bone - lv.lumen);
    let lo_in = if lined { inner[inner.len() / 2].max(floor.min(lo_out)) } else { inner[inner.len() / 2] };
    let peak = (a..b).max_by(|&i, &j| prof[i].total_cmp(&prof[j]))?;
    let frac = |x: f32, lo: f32| ((x - lo) / (bone - lo)) as f64;
    if !(bone > lo_in && bone > lo_out) {
        return crossing;
    }
    let before = |x: f32| if lined { frac(x, lo_in).max(0.0) } else { frac(x, lo_in) };
    let held: f64 = (a..peak).map(|i| before(prof[i])).sum::<f64>() + (peak..b).map(|i| frac(prof[i], lo_out)).sum::<f64>();
    Some(held * h)
}

/// Margin (fraction of the lumen–bone step) of the wall's inner floor above the soft-tissue
/// level where a ligament lines the wall (see [`wall`]).
const LINING_MARGIN: f32 = 0.06;
