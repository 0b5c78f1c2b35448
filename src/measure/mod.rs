//! Per-section measures: scala areas from partial-volume fractions, partition width, lateral wall
//! thickness, and flags whenever a value cannot be trusted. One file a step:
//!
//! 1. Resample (here): a square grid normal to the centreline at pitch ≤ half the smallest voxel
//!    side; the grid grows (×1.25, keeping the samples it has) until both scalae and their edge
//!    bands lie inside it or the capture limit is reached.
//! 2. Levels ([`levels`]): lumen and bone from a three-class Otsu split of the pooled histogram
//!    of the neighbouring sections (a tube around the duct, smoothed along s), as the modes of the
//!    darkest and brightest classes (or, where the duct's centre lies well below the darkest
//!    class, the duct's own small peak: scalae too few voxels across to make a class) — no patch
//!    of pure bone is needed, so thin walls do; soft
//!    tissue from the ring 1.5–2.5 voxels outside the scalae (where a spiral ligament or limbus
//!    lines them its values pile up at the soft-tissue level), summed over the same tube; a ring
//!    that is nearly all bone means two materials. The lumen level is then re-taken from the
//!    interior of the scalae themselves — unless that lies well above the darkest tenth of the
//!    duct's levels: scalae too small for the blur (apical turns at clinical resolution) keep
//!    the duct's lumen level.
//! 3. Regions ([`regions`]): first the section's territory — a seeded watershed of the image
//!    from its centreline point against points of the spaces around it (the other turns crossing
//!    the plane, the modiolar axis, points beyond the lateral wall), so a septum or wall thinner
//!    than the blur still parts them along its ridge. The partition line through the lamina and
//!    ligament points splits the lumen. Each scala is grown (4-connected) from a seed on its side over pixels of a lightly
//!    smoothed image below the lumen/soft-tissue midpoint, so it stops at soft tissue as well as at
//!    bone; then necks narrower than a fraction of the scala's own size (canals, gaps in a septum)
//!    are cut by a morphological opening by reconstruction, and only the part holding the seed is
//!    kept. A section that still reaches its border is flagged `open`.
//! 4. Areas ([`areas`]): interior pixels count whole; pixels near the edge count their lumen
//!    fraction (ref − v)/(ref − lumen). Beyond stretches of edge that meet bone directly, ref is
//!    the bone level, out to a band of 4.5 voxels; next to the partition (the bony shelf seen from
//!    scala tympani, and from scala vestibuli too where `bare_shelf` is set; the membrane beyond
//!    the lamina tip) bone too — over the shelf out to three blur widths from the partition line,
//!    whatever the edge's rays say, as far as the shelf's blur reaches; elsewhere ref is the
//!    soft-tissue level (taken a little higher where the pixel's own surroundings are), and only
//!    within 1.5 voxels of the lumen — soft tissue beyond the lumen's blur holds no lumen, and a
//!    thin layer on bone is not half fluid. A stretch of edge is lined with soft tissue where its rays climb from the
//!    lumen/soft-tissue midpoint to bone much more slowly than the section's bare edges do, even
//!    where the layer is too thin to show a plateau. There a blurred lumen | soft tissue | bone
//!    model is fitted to the ray (its lumen and bone edges; the blur from the section's bare
//!    edges), and the pixels it passes count (soft tissue + bone's blurred share there − v)/(soft
//!    tissue − lumen), which holds however thin the layer: a ligament tapering to nothing is
//!    neither half fluid nor cut off. From scala vestibuli, rays across the thin bony shelf are
//!    fitted the same way with the shelf's far side and the lumen beyond it in the model (the
//!    spiral limbus on the shelf). Pixels nearer to another lumen region are left to it.
//! 5. Wall ([`wall`]): along the partition direction outward, from where bone starts to where it
//!    ends; each row reports the median over ±0.5 mm of s (`walls_along`, `median_along`).
//!    Width and wall under one voxel are flagged `below_resolution` and left blank.

mod areas;
mod levels;
pub(crate) use levels::{phi, phi_table, two_basis_fit};
mod regions;
mod wall;

pub use levels::{Levels, otsu3};

use crate::centreline::Centreline;
use crate::cochlea::Greenwood;
use crate::frame::v3::{self, V};
use crate::progress::Progress;
use crate::section::{self, SectionGeom};
use crate::stack::Stack;
use crate::{Error, Result};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

/// Measure settings.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct MeasureSettings {
    /// Distance between output positions along the centreline (mm).
    pub step_mm: f64,
    /// Resampling pitch (mm); None = half the smallest voxel side. Larger values are capped there.
    pub pitch_mm: Option<f64>,
    /// Largest half-size of a section (mm): a scala reaching it is flagged `open`.
    pub capture_mm: f64,
    /// Lumen and bone grey levels for all sections (no soft-tissue class); None = found from the
    /// sections themselves.
    pub levels: Option<[f32; 2]>,
    /// Scala vestibuli's side of the bony shelf is bare (no spiral limbus on it): the shelf then
    /// counts as bone from both sides. Off by default: real cochleae carry a limbus there, and a
    /// limbus as thin as the blur cannot be told from a bare shelf in the image, so the measure
    /// reads the blurred shelf on that side against soft tissue (on a phantom without a limbus
    /// that costs scala vestibuli 3–5 % of its area at 40–80 µm).
    #[serde(default)]
    pub bare_shelf: bool,
}

/// Distance (mm) within which sections lend each other their bone level (`levels::bone_nearby`).
const BONE_NEARBY_MM: f64 = 2.5;

/// Sections pooled on either side of each one for its levels (a tube along the duct).
const POOL_MM: f64 = 0.4;

/// Distance (mm) along the duct over which the soft-tissue levels fitted on the lateral wall
/// (`levels::tube_wall`, one every 2·[`POOL_MM`]) are taken together: each section's level is
/// the median of the fits within this of its nearest. The spiral ligament is one tissue along
/// the duct and a level is relative to its section's lumen and bone, which follow a scanner's
/// drift; one fit alone scatters with the noise of its stretch (0.02–0.05 of the lumen–bone step
/// on the family) and carried its stretch's sections with it. The family at its own voxels,
/// every 0.1 mm from the true landmarks, sums of the fourteen members' SV / ST medians and p95s:
/// one fit 21.3 / 13.6 and 60.6 / 34.9 %; ±2.5 mm 20.7 / 14.1 and 56.0 / 34.2; ±4 mm 20.3 /
/// 14.1 and 55.6 / 33.4 (member 9 SV p95 12.5 → 9.7 %, member 11 3.9 → 2.2 %); the whole duct
/// 21.2 / 14.0 and 55.5 / 32.9. At 80 µm the medians stay (38.8 → 38.9 / 27.3 → 27.8 %, members
/// 0–11) and the p95s fall (101.9 → 97.6 / 65.4 → 63.5 %); at 150 and 200 µm and on the outside
/// phantom's variants every SV+ST median moves by at most a point.
const TISSUE_ALONG_MM: f64 = 4.0;

impl Default for MeasureSettings {
    fn default() -> Self {
        MeasureSettings { step_mm: 0.1, pitch_mm: None, capture_mm: 3.0, levels: None, bare_shelf: false }
    }
}

/// What the user set for one section (kept in the project file).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Override {
    /// Arc length of the section it belongs to (mm); matched to the nearest section.
    pub s_mm: f64,
    /// Fluid and bone levels for this section.
    pub levels: Option<[f32; 2]>,
    /// Seeds in section coordinates (u along the partition, v toward the apex; mm from the centre).
    pub seed_sv: Option<[f64; 2]>,
    pub seed_st: Option<[f64; 2]>,
    /// Leave this section out: its values are blank and flagged `excluded`.
    pub exclude: bool,
    /// A barrier line the scalae may not grow across (two points, section coordinates, mm): for a
    /// leak the automatic neck cutting does not close.
    #[serde(default)]
    pub barrier: Option<[[f64; 2]; 2]>,
}

/// Why a value is not sound.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Flag {
    /// A scala reaches the section border, the capture limit or the edge of the stack.
    Open,
    /// The section lies beyond the landmarks of an edge.
    Extrapolated,
    /// No dark pixel found to start a scala from.
    NoSeed,
    /// Fluid and bone levels too close to separate.
    LowContrast,
    /// Left out by the user.
    Excluded,
    /// The wall's outer edge was not found.
    NoWall,
    /// The wall or the partition is thinner than one voxel: that value is left blank.
    BelowResolution,
    /// A scala came out with no lumen (an area ≤ 0): both areas are left blank.
    NoLumen,
}

impl Flag {
    pub fn word(self) -> &'static str {
        match self {
            Flag::Open => "open",
            Flag::Extrapolated => "extrapolated",
            Flag::NoSeed => "no_seed",
            Flag::LowContrast => "low_contrast",
            Flag::Excluded => "excluded",
            Flag::NoWall => "no_wall",
            Flag::BelowResolution => "below_resolution",
            Flag::NoLumen => "no_lumen",
        }
    }
}

/// One scala found in a section.
#[derive(Clone, Debug, Default, Serialize, Deserialize)]
pub struct Scala {
    /// mm²: the median of the sound sections' own areas within ±0.5 mm along s (see
    /// `areas_along`); None when it cannot be trusted (see the row's flags).
    pub area: Option<f64>,
    /// mm²: this section's own area, before the median along s.
    #[serde(default)]
    pub own_area: Option<f64>,
    /// Closed outline at the half-fluid level, section coordinates (mm), star-sampled from the centroid.
    pub outline: Vec<[f64; 2]>,
    /// Fraction-weighted centroid (section coordinates, mm).
    pub centroid: [f64; 2],
    pub seed: Option<[f64; 2]>,
}

impl Scala {
    /// No area, of its own or along s (the row's flags say why).
    fn blank(&mut self) {
        (self.area, self.own_area) = (None, None);
    }
}

/// The measures at one output position; the table row plus what the inspector draws.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Row {
    pub s_mm: f64,
    pub angle_deg: f64,
    pub point: V,
    pub radius_mm: f64,
    pub height_mm: f64,
    pub curvature_radius_mm: f64,
    pub cf_hz: f64,
    pub sv: Scala,
    pub st: Scala,
    pub partition_width_mm: Option<f64>,
    pub wall_mm: Option<f64>,
    pub flags: Vec<Flag>,
    /// Lumen, soft-tissue and bone levels used (NaN when none were found).
    pub levels: Levels,
    /// Section half-size and pitch used (mm).
    pub half_mm: f64,
    pub pitch_mm: f64,
    /// Partition end points in section coordinates (mm).
    pub lamina_uv: [f64; 2],
    pub ligament_uv: [f64; 2],
}

impl Row {
    pub fn flag_words(&self) -> String {
        self.flags.iter().map(|f| f.word()).collect::<Vec<_>>().join(";")
    }
    pub fn sound(&self) -> bool {
        self.flags.is_empty()
    }

    /// The one rule for flags: each flag blanks the values it concerns, so a value that is not
    /// sound is never written. `extrapolated` and `excluded` blank every measure of the row;
    /// `open`, `no_seed`, `low_contrast` and `no_lumen` blank both areas; `no_wall` blanks the wall;
    /// `below_resolution` goes with a blank wall or width (whichever is under one voxel).
    pub fn blank_unsound(&mut self) {
        for f in self.flags.clone() {
            match f {
                Flag::Extrapolated | Flag::Excluded => {
                    (self.partition_width_mm, self.wall_mm) = (None, None);
                    self.sv.blank();
                    self.st.blank();
                }
                Flag::Open | Flag::NoSeed | Flag::LowContrast | Flag::NoLumen => {
                    self.sv.blank();
                    self.st.blank();
                }
                Flag::NoWall => self.wall_mm = None,
                // the value under one voxel was blanked where it was found
                Flag::BelowResolution => {}
            }
        }
    }
}

/// Points on the star outline of each scala.
pub const OUTLINE_POINTS: usize = 64;

/// Factor by which a section square grows when a scala does not fit in it.
const GROWTH: f64 = 1.25;

/// First half-size of a section square, in partition widths (1.5: the fastest on the phantoms;
/// a smaller square has to grow more often, a larger one samples more bone).
const START_HALF: f64 = 1.5;

/// Measures every section. Parallel over sections; `progress` counts sections and can cancel.
pub fn measure(
    stack: &Stack,
    cl: &Centreline,
    s: &MeasureSettings,
    overrides: &[Override],
    gw: &Greenwood,
    progress: &Progress,
) -> Result<(Vec<SectionGeom>, Vec<Row>)> {
    let vox = stack.voxel()?;
    if !(s.step_mm > 0.0) {
        return Err(Error::invalid(format!("step must be positive, got {} mm", s.step_mm)));
    }
    // levels set by the user must put the lumen below bone
    let bad = |l: [f32; 2]| !(l[0] < l[1] && l[0].is_finite() && l[1].is_finite());
    if let Some(l) = s.levels.filter(|l| bad(*l)) {
        return Err(Error::invalid(format!("measure.levels: lumen {} must lie below bone {}", l[0], l[1])));
    }
    if let Some(o) = overrides.iter().find(|o| o.levels.is_some_and(bad)) {
        let l = o.levels.unwrap_or_default();
        return Err(Error::invalid(format!("the levels set for the section at s = {:.2} mm: lumen {} must lie below bone {}", o.s_mm, l[0], l[1])));
    }
    let geoms = section::geometry(cl, s.step_mm);
    progress.start(2 * geoms.len() as u64);
    let pitch = s.pitch_mm.unwrap_or(f64::INFINITY).min(0.5 * vox.min());
    let vmax = vox.max();
    // Two voxels in pixels. `pure`, the coarsest side: a region pixel that far inside is lumen
    // whatever the blur's direction, and the rays that read the material beyond an edge
    // (`levels::plateaus`) run and look that many voxels, to cross the blurred edge in any
    // direction; the scalae grown for the lateral wall's profile cut their necks at it too.
    // `erode`, the finest side: the reach of the rules that tell a section's regions and the
    // areas' references apart. Where the coarsest side set that reach too, a thin spiral limbus or
    // ligament within it of bone passed for a bony edge and counted as lumen: the family's
    // members at 1:2 voxels read SV+ST signed medians +2.3 (member 0 at 50 × 50 × 100 µm), +4.1
    // (member 4) and +4.3 % (member 6 at 40 × 40 × 80 µm); now −0.6, +1.9 and +0.3 %, near the
    // same members' cubic-voxel readings (+0.2, +2.4 and +0.0 % at 50, 50 and 40 µm; every 0.1 mm).
    let pure = (vmax / pitch).ceil() as usize;
    let erode = (vox.min() / pitch).ceil() as usize;
    let ov_of = |g: &SectionGeom| {
        overrides.iter().filter(|o| (o.s_mm - g.s).abs() <= 0.5 * s.step_mm).min_by(|a, b| (a.s_mm - g.s).abs().total_cmp(&(b.s_mm - g.s).abs()))
    };
    // each section's partition and the spaces around it, found once (the other turns' crossings
    // take a few root searches on the centreline)
    let parts: Vec<Partition> = geoms.par_iter().map(|g| Partition::of(cl, g, !s.bare_shelf)).collect();
    // first pass: each section's first square, and the histograms that give the levels
    let first: Vec<Img> = geoms
        .par_iter()
        .zip(parts.par_iter())
        .map(|(g, part)| {
            progress.check()?;
            // (large enough for the lateral wall's profile beyond the partition's outer end: with
            // a basal membrane of 0.15 mm at 40 µm the square was 0.8 mm across, the wall's rays
            // ran out of it, and the whole basal turn took the soft-tissue level of the one
            // stretch past 360° that had enough rays — 0.22 of the lumen–bone step for 0.31)
            let half = (START_HALF * g.width()).max(0.5 * g.width() + levels::PROFILE_MM + 2.0 * vmax).max(10.0 * vmax).min(s.capture_mm);
            let img = sample_section(stack, g, part, half, pitch, None, ov_of(g).and_then(|o| o.barrier));
            progress.add(1);
            Ok(img)
        })
        .collect::<Result<_>>()?;
    let pool = ((POOL_MM / s.step_mm).round() as usize).clamp(1, 10);
    // the value inside the duct next to each centreline point: the median within a quarter of
    // the partition's width of it (the partition itself is a thin line through it)
    let centre: Vec<f32> = first
        .par_iter()
        .zip(geoms.par_iter())
        .map(|(img, g)| {
            let r = (0.25 * g.width() / pitch).max(2.0);
            let c = 0.5 * (img.n - 1) as f64;
            let (lo, hi) = ((c - r).floor().max(0.0) as usize, ((c + r).ceil() as usize).min(img.n - 1));
            let mut v: Vec<f32> = (lo..=hi)
                .flat_map(|b| (lo..=hi).map(move |a| (a, b)))
                .filter(|&(a, b)| (a as f64 - c).hypot(b as f64 - c) <= r)
                .map(|(a, b)| img.v[b * img.n + a])
                .filter(|x| x.is_finite())
                .collect();
            if v.is_empty() { f32::NAN } else { levels::median_f32(&mut v) }
        })
        .collect();
    let mut auto = levels::pooled(&first, &centre, pool);
    // Soft tissue from the lateral wall next to the partition's outer end: the scalae grown in
    // each first square, the mean profile of rays across the wall there summed over the tube of
    // neighbouring sections, fitted by a blurred lumen | soft tissue | bone model
    // (`levels::wall_level`) every 2·`pool` sections; a section takes the median of the fits
    // within [`TISSUE_ALONG_MM`] of its nearest.
    // The profile of section k from scalae grown below `cut` (None where it has no levels).
    let profile = |k: usize, cut: f32| -> Option<(Vec<f64>, usize)> {
        let (img, g, part) = (&first[k], &geoms[k], &parts[k]);
        let lv = auto[k].filter(|l| l.lumen < l.bone)?;
        let found: Vec<regions::Region> = [1.0f64, -1.0]
            .into_iter()
            .filter_map(|side| regions::scala(img, &part.line, part.mid, side, cut, vmax, g.width(), pure, None))
            .map(|(_, r)| r)
            .collect();
        Some(levels::wall_profile(img, &found, &lv, g.to_plane(g.ligament), part.dir, (0.3f64).max(3.0 * vmax)))
    };
    // The sections of the tube around section i.
    let tube = |i: usize| i.saturating_sub(2 * pool)..(i + 2 * pool + 1).min(first.len());
    // First from scalae grown below 15 % of the lumen–bone step (under the soft tissue of most
    // specimens). Where that reads a soft-tissue layer, again from scalae grown below three noise
    // deviations above the lumen where that is lower ([`WALL_CUT_NOISE`]), and where the second
    // also reads a layer, its level stands.
    let cut15 = |lv: &Levels| lv.lumen_cut().min(lv.lumen + 0.15 * (lv.bone - lv.lumen));
    let profiles: Vec<Option<(Vec<f64>, usize)>> = (0..first.len()).into_par_iter().map(|k| auto[k].and_then(|lv| profile(k, cut15(&lv)))).collect();
    let fitted: Vec<(usize, levels::Wall)> = (0..first.len())
        .into_par_iter()
        .step_by(2 * pool)
        .filter_map(|i| levels::tube_wall(tube(i).filter_map(|k| profiles[k].as_ref()), pitch, vmax).map(|w| (i, w)))
        .collect();
    let layer_near = |k: usize| fitted.iter().any(|(i, w)| matches!(w, levels::Wall::Layer(_)) && tube(*i).contains(&k));
    let second: Vec<Option<(Vec<f64>, usize)>> = (0..first.len())
        .into_par_iter()
        .map(|k| {
            let lv = auto[k].filter(|_| layer_near(k))?;
            let (cut, step) = (cut15(&lv), lv.bone - lv.lumen);
            let low = lv.lumen + (WALL_CUT_NOISE * levels::noise_below(&first[k].sm, lv.lumen)?).max(0.03 * step);
            if low < cut { profile(k, low) } else { None }
        })
        .collect();
    let fitted: Vec<(usize, levels::Wall)> = fitted
        .par_iter()
        .map(|&(i, wall)| {
            let redo = matches!(wall, levels::Wall::Layer(_)) && tube(i).any(|k| second[k].is_some());
            let again = redo.then(|| levels::tube_wall(tube(i).filter_map(|k| second[k].as_ref().or(profiles[k].as_ref())), pitch, vmax)).flatten();
            (i, again.filter(|w| matches!(w, levels::Wall::Layer(_))).unwrap_or(wall))
        })
        .collect();
    // Where a third or more of the stretches of the duct show a soft-tissue layer, every section
    // takes the nearest layer's level: the spiral ligament runs the whole duct, and one too thin
    // or blurred to fit in a stretch is still there (the rays of each edge then say where it
    // lines the lumen and where bone is bare; a wall thinner than the blur often reads as bare
    // lumen against bone, 80 µm member 9: half its stretches, its areas 24 % high). With no
    // wall profile anywhere: the tube's soft-tissue peak if it has one (see `levels::pooled`),
    // else two materials.
    let layered: Vec<(usize, levels::Wall)> = fitted.iter().copied().filter(|f| matches!(f.1, levels::Wall::Layer(_))).collect();
    let fitted = if 3 * layered.len() >= fitted.len() && !layered.is_empty() { layered } else { fitted };
    // Each layer's level is the median of the layers fitted within [`TISSUE_ALONG_MM`] of it
    // along the duct (a bare wall stays bare). Not [`median_along`], whose stretch narrows to as
    // many values on either side so that a wall or an area that trends along s keeps its trend:
    // the ligament's level does not trend, and near the duct's ends that stretch would shrink to
    // the one fit whose noise this median is there to take out.
    // (each layer's arc length and level, read once)
    let layers: Vec<(f64, f32)> = fitted.iter().filter_map(|&(i, wall)| if let levels::Wall::Layer(q) = wall { Some((geoms[i].s, q)) } else { None }).collect();
    let fitted: Vec<(usize, levels::Wall)> = fitted
        .iter()
        .map(|&(i, wall)| {
            let levels::Wall::Layer(_) = wall else { return (i, wall) };
            let mut near: Vec<f32> = layers.iter().filter(|l| (l.0 - geoms[i].s).abs() <= TISSUE_ALONG_MM).map(|l| l.1).collect();
            (i, levels::Wall::Layer(levels::median_f32(&mut near)))
        })
        .collect();
    for (i, lv) in auto.iter_mut().enumerate() {
        if let (Some(lv), Some(&(_, wall))) = (lv.as_mut(), fitted.iter().min_by_key(|f| f.0.abs_diff(i))) {
            lv.tissue = match wall {
                levels::Wall::Layer(q) => lv.lumen + q * (lv.bone - lv.lumen),
                levels::Wall::Bare => lv.bone,
            };
        }
    }
    // The lumen is one material along the whole duct (perilymph or air). Where a section's
    // lumen level lies well above the darkest the duct shows, its scalae are too small for the
    // blur to leave any pure lumen (the apical turns at clinical resolution: their blurred
    // interior would pass for lumen and every edge pixel would count too much), and the duct's
    // level stands in: the darkest tenth of the sections' levels, or of the values at their
    // centreline points where that is darker. The margin, a tenth of the lumen–bone step, leaves
    // a scanner's slow drift alone. (At clinical resolution the sections' levels, modes of the
    // tube's darkest class, are all read from a class that partial volume smears: even the
    // basal turn's lie above pure lumen, while the median in the middle of a basal section is
    // pure lumen. The family at 200 µm, SV+ST median error per member: mean 13.2 → 11.0 %,
    // over 15 % on five members → two (member 8 23.8 → 26.3 %, its signed median +21.5 → +9.2);
    // the outside phantom at 200 µm 13.5 → 9.4 %; at 150 µm the members' mean 6.9 → 6.7 %; at
    // 80 µm and finer nothing changes.)
    let duct = {
        let mut lumen: Vec<(f32, f32)> = auto.iter().flatten().filter(|l| l.lumen < l.bone).map(|l| (l.lumen, l.bone - l.lumen)).collect();
        lumen.sort_by(|a, b| a.0.total_cmp(&b.0));
        let mut mid: Vec<f32> = centre.iter().copied().filter(|x| x.is_finite()).collect();
        mid.sort_by(f32::total_cmp);
        (lumen.len() >= 5).then(|| {
            let (level, step) = lumen[lumen.len() / 10];
            let level = if mid.len() >= 5 { level.min(mid[mid.len() / 10]) } else { level };
            (level, level + 0.1 * step)
        })
    };
    // Bone is one material too, but a tube whose walls are all thinner than the blur never shows
    // it: its brightest class is their blurred crests (member 1 at 80 µm: 40 k where the
    // modiolus shows 48 k), and every lumen pixel next to such a wall then counts too little (its
    // basal turn read 10–15 % low). Each section with soft tissue takes the bone of the sections
    // around it in space where that is brighter (`levels::bone_nearby`).
    let centres: Vec<[f64; 3]> = geoms.iter().map(|g| g.centre).collect();
    levels::bone_nearby(&mut auto, &centres, BONE_NEARBY_MM);
    if let Some((level, limit)) = duct {
        for lv in auto.iter_mut().flatten().filter(|l| l.lumen > limit) {
            lv.lumen = level;
        }
    }
    let rows = first
        .into_par_iter()
        .zip(geoms.par_iter())
        .zip(auto)
        .zip(parts.par_iter())
        .map(|(((img, g), auto), part)| {
            progress.check()?;
            let ov = ov_of(g);
            let given = ov.and_then(|o| o.levels).or(s.levels).map(|l| Levels { lumen: l[0], tissue: l[1], bone: l[1] });
            // the lumen level is re-taken from the section's own scalae (levels found, not given)
            // where it lies within the duct's range
            let limit = given.is_none().then(|| duct.map_or(f32::INFINITY, |d| d.1));
            let mut row = section_row(stack, cl, g, part, s, pitch, vmax, (erode, pure), ov, gw, img, given.or(auto), limit);
            if cl.extrapolated(g.theta) {
                row.flags.push(Flag::Extrapolated);
            }
            row.blank_unsound();
            progress.add(1);
            Ok(row)
        })
        .collect::<Result<Vec<Row>>>()?;
    let mut rows = rows;
    walls_along(&mut rows, vmax);
    areas_along(&mut rows);
    Ok((geoms, rows))
}

/// Share of the way from lumen to soft tissue below which a scala grows where none of its pixels
/// lies below the midpoint (`section_row`): every pixel that dark holds lumen, a quarter of it or
/// more. Grown against bone alone instead, as before, the ligament and limbus of those sections
/// counted as lumen by 60–80 % (the family at 200 µm, members 1 and 8: apical SV 30–65 % high).
/// The family at 200 µm from its landmarks, SV+ST median per member: 14.5 → 8.7 % (member 1),
/// 26.3 → 9.2 % (member 8), 8.1 → 5.8 % (member 2); the members' mean 11.0 → 8.8 %. 0.85 and 1.0
/// left fewer sections to bone alone but read members 1 and 8 0.3–3 points higher.
const DEEP_CUT: f32 = 0.7;

/// How many noise standard deviations above the lumen level the scalae grow for the lateral
/// wall's second profile (`measure`; at least 3 % of the lumen–bone step, at most the first's cut,
/// 15 %). With the 15 % cut alone, soft tissue only a little brighter than fluid (10 % of the
/// step; `ductline phantom --tissue 0.1`) lay below it, the scalae took the spiral ligament in,
/// the rays started at its far side and the wall fit read the bone edge's partial volume for soft
/// tissue (0.19–0.23 for 0.10): the ligament counted as half lumen. Members 0 and 5 at 40 µm with
/// such tissue: SV/ST median 9.9/7.0 → 1.5/0.8 % and 5.5/4.6 → 2.4/1.4 % (member 2, CNR 9, whose
/// noise keeps the cut near 15 %: SV+ST 24 → 13.5 %). The second profile's fit stands only where
/// the first's also reads a soft-tissue layer: taken wherever it fitted, it found a layer on the
/// bare thin walls of ductline's plain phantom (0.12 mm at 50 µm, blur one voxel: SV −7.2 →
/// −11.5 %). The family as drawn (soft tissue 20–35 % of the step): own resolution, 80, 150 and
/// 200 µm within half a point per member but member 9 at 150 µm (SV+ST 6.1 → 7.7 %).
const WALL_CUT_NOISE: f32 = 3.0;

/// Width of the edge band (voxels, largest side) whose pixels count their lumen fraction.
const BAND_VOX: f64 = 4.5;

/// Half-length (mm along s) of the stretch whose median wall and areas a row reports.
const ALONG_MM: f64 = 0.5;

/// What the area columns hold, for the JSON metadata (the stretch from [`ALONG_MM`]).
pub fn areas_note() -> String {
    format!(
        "sv_area_mm2 and st_area_mm2: the median of the sound sections' own areas (sv_section_area_mm2, st_section_area_mm2) \
         within ±{ALONG_MM} mm along s, as many sections either side"
    )
}

/// The median of each value's stretch: the values `v` (s in mm, the value where there is one)
/// within ±`h` mm of each, as many on either side (its own included), so a value that rises or
/// falls steadily keeps its own and a lone spike does not pass; near a gap or an end the stretch
/// narrows. Where there is no value there stays none.
fn median_along(v: &[(f64, Option<f64>)], h: f64) -> Vec<Option<f64>> {
    let known: Vec<(f64, f64)> = v.iter().filter_map(|&(s, x)| Some((s, x?))).collect();
    let mut at = 0;
    v.iter()
        .map(|&(s, x)| {
            x?;
            // known[at] is this value; the stretch takes k values on either side
            let below = known[..at].iter().rev().take_while(|y| s - y.0 <= h + 1e-9).count();
            let above = known[at + 1..].iter().take_while(|y| y.0 - s <= h + 1e-9).count();
            let k = below.min(above);
            let mut near: Vec<f64> = known[at - k..=at + k].iter().map(|y| y.1).collect();
            near.sort_by(f64::total_cmp);
            at += 1;
            Some(near[k])
        })
        .collect()
}

/// Each row's wall becomes the median of the walls measured within ±[`ALONG_MM`] of it
/// ([`median_along`]): a wall of one or two voxels read from one profile scatters by a good part
/// of a voxel, while the bony wall changes little over a millimetre. A median under one voxel
/// (`vmax`, mm) is `below_resolution` and blank.
fn walls_along(rows: &mut [Row], vmax: f64) {
    let raw: Vec<(f64, Option<f64>)> = rows.iter().map(|r| (r.s_mm, r.wall_mm)).collect();
    for (r, median) in rows.iter_mut().zip(median_along(&raw, ALONG_MM)) {
        let Some(median) = median else { continue };
        r.wall_mm = Some(median);
        if median < vmax {
            r.wall_mm = None;
            if !r.flags.contains(&Flag::BelowResolution) {
                r.flags.push(Flag::BelowResolution);
            }
        }
    }
}

/// Each scala's area becomes the median of the sound areas within ±[`ALONG_MM`] of it
/// ([`median_along`]); the section's own stays in `Scala::own_area`. A section's area decides a
/// ring of edge pixels between materials, and at coarse voxels a few of those pixels more or less
/// move it by several per cent from one section to the next, while the duct's cross-section
/// changes over millimetres (the phantoms' truth tables move by under 0.6 % under this median).
/// The family at its own resolution, every 0.1 mm, scala vestibuli median error summed over the
/// fourteen members: 28.8 → 24.6 points, p95 83.3 → 65.7 (member 1 3.4 → 2.5 %, member 9 3.5 →
/// 2.7 %); members whose error is a bias do not change.
fn areas_along(rows: &mut [Row]) {
    let scalae: [fn(&mut Row) -> &mut Scala; 2] = [|r| &mut r.sv, |r| &mut r.st];
    for pick in scalae {
        let own: Vec<(f64, Option<f64>)> = rows.iter_mut().map(|r| (r.s_mm, pick(r).area)).collect();
        for (r, median) in rows.iter_mut().zip(median_along(&own, ALONG_MM)) {
            pick(r).area = median;
        }
    }
}

/// The partition in a section: its line, midpoint and unit direction lamina → ligament (mm);
/// and points of what lies around the duct, whose dark spaces this section's scalae may not
/// take (see [`sample_section`]).
struct Partition {
    line: Line,
    mid: [f64; 2],
    dir: [f64; 2],
    /// Section coordinates (mm) of points in other spaces: where the other turns cross the
    /// plane, the modiolar axis (nerve core, internal auditory canal) and points beyond the
    /// lateral wall.
    others: Vec<[f64; 2]>,
    /// Whether a spiral limbus is expected on scala vestibuli's side of the bony shelf
    /// (`MeasureSettings::bare_shelf` off).
    limbus: bool,
}

/// Distances (mm) past the ligament point, along the partition, of the points taken to lie
/// beyond the lateral wall (spiral ligament and capsule bone, or whatever is outside it).
const BEYOND_WALL_MM: [f64; 5] = [0.6, 1.0, 1.5, 2.0, 3.0];

impl Partition {
    /// `limbus`: whether a spiral limbus is expected on the shelf (see [`Partition::limbus`]).
    fn of(cl: &Centreline, g: &SectionGeom, limbus: bool) -> Partition {
        let (lam, lig) = (g.to_plane(g.lamina), g.to_plane(g.ligament));
        let d = [lig[0] - lam[0], lig[1] - lam[1]];
        let dn = d[0].hypot(d[1]).max(1e-12);
        let mut n = [-d[1] / dn, d[0] / dn];
        if n[1] < 0.0 {
            n = [-n[0], -n[1]];
        }
        let (mid, dir) = ([0.5 * (lam[0] + lig[0]), 0.5 * (lam[1] + lig[1])], [d[0] / dn, d[1] / dn]);
        let mut others = section::other_turns(cl, g);
        // the modiolar axis within 3 mm of the foot of the section centre on it
        let f = &cl.frame;
        let foot = v3::axpy(f.origin, v3::dot(v3::sub(g.centre, f.origin), f.ez), f.ez);
        others.extend((-30..=30).map(|k| g.to_plane(v3::axpy(foot, 0.1 * k as f64, f.ez))));
        others.extend(BEYOND_WALL_MM.iter().map(|d| [lig[0] + d * dir[0], lig[1] + d * dir[1]]));
        Partition { line: Line { p: lam, n }, mid, dir, others, limbus }
    }

    /// Distance (mm) of section point `q` along the partition from the lamina tip toward the
    /// ligament: negative over the bony shelf, past [`Partition::width`] beyond the ligament.
    pub(super) fn along(&self, q: [f64; 2]) -> f64 {
        (q[0] - self.line.p[0]) * self.dir[0] + (q[1] - self.line.p[1]) * self.dir[1]
    }

    /// Lamina tip to ligament (mm).
    pub(super) fn width(&self) -> f64 {
        2.0 * (self.mid[0] - self.line.p[0]).hypot(self.mid[1] - self.line.p[1])
    }
}

/// The partition line in section coordinates: a point on it and the unit normal toward v > 0.
struct Line {
    p: [f64; 2],
    n: [f64; 2],
}

impl Line {
    fn side(&self, q: [f64; 2]) -> f64 {
        (q[0] - self.p[0]) * self.n[0] + (q[1] - self.p[1]) * self.n[1]
    }
}

/// A resampled section image.
struct Img {
    v: Vec<f32>,
    /// The image lightly smoothed (binomial 3×3 twice, σ ≈ one pixel): what the scalae grow over.
    sm: Vec<f32>,
    n: usize,
    pitch: f64,
    start: f64,
    /// Per pixel: +1 on the apical side of the partition line, −1 on the basal side, 0 outside
    /// this turn's territory (another turn, the modiolus or beyond the lateral wall; see
    /// [`sample_section`]).
    side: Vec<i8>,
    /// Per pixel: on a barrier line drawn by the user (empty when there is none).
    blocked: Vec<bool>,
}

impl Img {
    fn uv(&self, i: usize) -> [f64; 2] {
        [self.start + (i % self.n) as f64 * self.pitch, self.start + (i / self.n) as f64 * self.pitch]
    }
    fn index(&self, q: [f64; 2]) -> Option<usize> {
        let a = ((q[0] - self.start) / self.pitch).round();
        let b = ((q[1] - self.start) / self.pitch).round();
        if a < 0.0 || b < 0.0 || a >= self.n as f64 || b >= self.n as f64 { None } else { Some(b as usize * self.n + a as usize) }
    }
    /// Whether pixel i lies on the given side of the partition (+1.0 apical, −1.0 basal) and
    /// in this turn's territory.
    fn on(&self, i: usize, side: f64) -> bool {
        self.side[i] as f64 == side
    }
    fn is_blocked(&self, i: usize) -> bool {
        !self.blocked.is_empty() && self.blocked[i]
    }
}

#[allow(clippy::too_many_arguments)]
fn section_row(
    stack: &Stack,
    cl: &Centreline,
    g: &SectionGeom,
    part: &Partition,
    s: &MeasureSettings,
    pitch: f64,
    vmax: f64,
    (erode, pure): (usize, usize),
    ov: Option<&Override>,
    gw: &Greenwood,
    mut img: Img,
    levels: Option<Levels>,
    lumen_limit: Option<f32>,
) -> Row {
    let (radius, height) = cl.radius_height(g.theta);
    let mut row = Row {
        s_mm: g.s,
        angle_deg: g.theta.to_degrees(),
        point: g.centre,
        radius_mm: radius,
        height_mm: height,
        curvature_radius_mm: cl.curvature_radius(g.theta),
        cf_hz: gw.cf(1.0 - g.s / cl.length),
        sv: Scala::default(),
        st: Scala::default(),
        partition_width_mm: Some(g.width()),
        wall_mm: None,
        flags: vec![],
        levels: Levels::NONE,
        half_mm: 0.0,
        pitch_mm: pitch,
        lamina_uv: g.to_plane(g.lamina),
        ligament_uv: g.to_plane(g.ligament),
    };
    if ov.is_some_and(|o| o.exclude) {
        row.partition_width_mm = None;
        row.flags.push(Flag::Excluded);
        return row;
    }
    if g.width() < vmax {
        row.partition_width_mm = None;
        row.flags.push(Flag::BelowResolution);
    }
    let barrier = ov.and_then(|o| o.barrier);
    let mut half = 0.5 * (img.n - 1) as f64 * pitch;
    let Some(mut lv) = levels.filter(|l| l.bone > l.lumen) else {
        row.flags.push(Flag::LowContrast);
        return row;
    };
    let (line, mid) = (&part.line, part.mid);
    // the edge band: the lumen's blur reaches about 4σ past the grown region's edge, which lies
    // up to 1.2σ inside the lumen against bone; at a blur over a voxel three voxels lost part of
    // it (the family's member 9 at 65 µm, blur 1.24 voxels: SV/ST signed median −3.1/−3.5 →
    // +1.0/+0.1 %; member 1, blur 1.14: −3.9/−3.2 → −1.9/−1.7 %; the others within 0.4 %)
    let band = (BAND_VOX * vmax / pitch).ceil() as usize;
    let mut deep = false;
    loop {
        row.half_mm = half;
        row.levels = lv;
        let can_grow = half < s.capture_mm;
        let regrow = |img: Img, half: &mut f64| -> Img {
            *half = (*half * GROWTH).min(s.capture_mm);
            sample_section(stack, g, part, *half, pitch, Some(img), barrier)
        };
        // the lumen level from the interior of the scalae themselves (levels found, not given),
        // unless it lies above `lumen_limit` (scalae too small for the blur: the duct's stands)
        if let Some(limit) = lumen_limit {
            match levels::lumen_level(&img, line, mid, lv.lumen_cut(), vmax, g.width(), pure, band) {
                // a scala already overflows the square: grow it before refining anything
                levels::Lumen::Overflows if can_grow => {
                    img = regrow(img, &mut half);
                    continue;
                }
                levels::Lumen::Level(f) if f < lv.tissue && f <= limit => row.levels.lumen = f,
                _ => {}
            }
        }
        let thr = if deep { row.levels.lumen + DEEP_CUT * (row.levels.tissue - row.levels.lumen) } else { row.levels.lumen_cut() };
        let mut grow_more = false;
        let mut open = false;
        let mut scalae = [Scala::default(), Scala::default()];
        let mut missing = false;
        for (k, side) in [1.0f64, -1.0].into_iter().enumerate() {
            let user_seed = ov.and_then(|o| if k == 0 { o.seed_sv } else { o.seed_st }).and_then(|q| img.index(q));
            let Some((seed, r)) = regions::scala(&img, line, mid, side, thr, vmax, g.width(), erode, user_seed) else {
                missing = true;
                continue;
            };
            // the region and its edge band must fit inside the square
            if r.overflows(img.n, band) && can_grow {
                grow_more = true;
                break;
            }
            open |= r.touches_border || r.touches_nan;
            let (area, field, centroid) = areas::fraction_area(&img, &r, side, &row.levels, band, erode, pure, part);
            scalae[k] = Scala { area: Some(area), own_area: Some(area), outline: areas::outline(&img, &field, centroid), centroid, seed: Some(img.uv(seed)) };
        }
        if grow_more {
            img = regrow(img, &mut half);
            lv = row.levels;
            continue;
        }
        // a scala too small for the blur to leave any pixel below the lumen/soft-tissue midpoint
        // is grown again below [`DEEP_CUT`] of the way to soft tissue, its levels kept; one that
        // shows no pixel even that dark is grown against bone alone (two materials), as where no
        // soft tissue is found
        let three = row.levels.tissue < row.levels.bone && lumen_limit.is_some();
        if missing && three && !deep {
            deep = true;
            lv = row.levels;
            continue;
        }
        if missing && three {
            deep = false;
            lv = Levels { tissue: row.levels.bone, ..row.levels };
            continue;
        }
        if missing {
            row.flags.push(Flag::NoSeed);
        }
        if open {
            row.flags.push(Flag::Open);
        }
        if !missing && !open && scalae.iter().any(|sc| !sc.area.is_some_and(|a| a > 0.0)) {
            row.flags.push(Flag::NoLumen);
        }
        let [sv, st] = scalae;
        row.sv = sv;
        row.st = st;
        // (a wall under one voxel is blanked by `walls_along`, once its neighbours are known)
        row.wall_mm = wall::wall(stack, g, mid, part.dir, pitch, s.capture_mm, &row.levels);
        if row.wall_mm.is_none() {
            row.flags.push(Flag::NoWall);
        }
        return row;
    }
}

/// The duct's own territory is flooded from its centreline point and from a point on either side
/// of the partition, this many partition widths off its midpoint along the normal: inside both
/// scalae. From the centreline point alone, at 300 µm (the duct a blob a few voxels across) the
/// other seeds' floods often reached one side of the partition first and took it whole, and the
/// family's members had areas on 56–99 % of their sections (`no_seed`); now 74–100 %. 25–200 µm:
/// unchanged but for a section or two more measured.
const OWN_SEEDS_WIDTHS: f64 = 0.2;

/// Resamples the section square of half-size `half`; samples an earlier, smaller square `old`
/// already holds are copied, not resampled (both grids have an even size, so they align).
fn sample_section(stack: &Stack, g: &SectionGeom, part: &Partition, half: f64, pitch: f64, old: Option<Img>, barrier: Option<[[f64; 2]; 2]>) -> Img {
    let grid = section::section_grid(g, half, pitch);
    let n = grid.nu;
    let start = -(n as f64 - 1.0) * 0.5 * pitch;
    let mut v = vec![f32::NAN; n * n];
    match old.filter(|o| o.n <= n && (n - o.n).is_multiple_of(2)) {
        Some(o) => {
            let k = (n - o.n) / 2;
            for b in 0..o.n {
                v[(b + k) * n + k..(b + k) * n + k + o.n].copy_from_slice(&o.v[b * o.n..(b + 1) * o.n]);
                section::resample_part(stack, &grid, b + k..b + k + 1, 0..k, &mut v);
                section::resample_part(stack, &grid, b + k..b + k + 1, k + o.n..n, &mut v);
            }
            section::resample_part(stack, &grid, 0..k, 0..n, &mut v);
            section::resample_part(stack, &grid, k + o.n..n, 0..n, &mut v);
        }
        None => section::resample_part(stack, &grid, 0..n, 0..n, &mut v),
    }
    let sm = regions::smooth(&v, n);
    // this turn's territory: a watershed of the smoothed image from its centreline point and a
    // point inside each scala ([`OWN_SEEDS_WIDTHS`]) against the points of the spaces around it
    // (other turns, modiolus, beyond the lateral wall), so that where a septum or a wall is
    // thinner than the blur its ridge still parts them
    let seed = |q: [f64; 2]| -> Option<usize> {
        let (a, b) = (((q[0] - start) / pitch).round(), ((q[1] - start) / pitch).round());
        (a >= 0.0 && b >= 0.0 && a < n as f64 && b < n as f64).then(|| b as usize * n + a as usize)
    };
    let (m, d, nn) = (part.mid, OWN_SEEDS_WIDTHS * part.width(), part.line.n);
    let ours = [[0.0, 0.0], [m[0] + d * nn[0], m[1] + d * nn[1]], [m[0] - d * nn[0], m[1] - d * nn[1]]];
    let mut seeds: Vec<usize> = ours.into_iter().filter_map(seed).collect();
    let k = seeds.len();
    seeds.extend(part.others.iter().copied().filter_map(seed));
    let own = regions::territory(&sm, n, &seeds, k);
    // which side of the partition line each pixel lies on, row by row
    let mut side = Vec::with_capacity(n * n);
    for b in 0..n {
        let y = start + b as f64 * pitch;
        side.extend((0..n).map(|a| (b * n + a, [start + a as f64 * pitch, y])).map(|(i, q)| match (own[i], part.line.side(q) > 0.0) {
            (false, _) => 0,
            (true, true) => 1,
            (true, false) => -1,
        }));
    }
    let mut img = Img { v, sm, n, pitch, start, side, blocked: vec![] };
    if let Some([p, q]) = barrier {
        // the segment drawn with steps of a third of a pixel, each step blocking its 3×3 pixels
        img.blocked = vec![false; n * n];
        let steps = (3.0 * (q[0] - p[0]).hypot(q[1] - p[1]) / pitch).ceil().max(1.0) as usize;
        for k in 0..=steps {
            let f = k as f64 / steps as f64;
            if let Some(i) = img.index([p[0] + f * (q[0] - p[0]), p[1] + f * (q[1] - p[1])]) {
                let (a, b) = ((i % n) as isize, (i / n) as isize);
                for (da, db) in [(0, 0), (1, 0), (0, 1), (1, 1)] {
                    let (x, y) = (a + da, b + db);
                    if x < n as isize && y < n as isize {
                        img.blocked[y as usize * n + x as usize] = true;
                    }
                }
            }
        }
    }
    img
}

#[cfg(test)]
mod tests {
    use super::median_along;

    /// A running median with as many values on either side leaves a steadily rising or falling
    /// sequence as it is and takes out a lone spike (common practice: a median of a monotone
    /// window is its middle value). Values every 0.1 mm, stretch ±0.25 mm: two either side.
    #[test]
    fn median_along_keeps_trends_and_drops_spikes() {
        let s = |i: usize| 0.1 * i as f64;
        let ramp: Vec<(f64, Option<f64>)> = (0..20).map(|i| (s(i), Some(1.0 - 0.03 * i as f64 + 0.0005 * (i * i) as f64))).collect();
        let out = median_along(&ramp, 0.25);
        for (a, b) in ramp.iter().zip(&out) {
            assert_eq!(a.1, *b, "a falling, curving sequence keeps its values");
        }
        let mut spiky = ramp.clone();
        spiky[7].1 = Some(5.0);
        let out = median_along(&spiky, 0.25);
        assert!((out[7].unwrap() - ramp[7].1.unwrap()).abs() < 0.04, "the spike is replaced by a neighbour: {:?}", out[7]);
        assert!(out.iter().all(|x| x.unwrap() <= 1.0), "no row takes the spike");
    }

    /// The ends and a gap narrow the stretch (the first value has no neighbour below, so it keeps
    /// its own); a row without a value stays without, and takes no part.
    #[test]
    fn median_along_narrows_at_ends_and_gaps() {
        let v = vec![(0.0, Some(9.0)), (0.1, Some(1.0)), (0.2, Some(2.0)), (0.3, None), (0.4, Some(3.0)), (0.5, Some(4.0))];
        let out = median_along(&v, 0.25);
        assert_eq!(out[0], Some(9.0), "the first value has no neighbour below");
        assert_eq!(out[1], Some(2.0), "one either side: median of 9, 1, 2");
        assert_eq!(out[3], None);
        // 0.2 mm: known values within 0.25 below are 0.0 and 0.1, above only 0.4 → one either side
        assert_eq!(out[2], Some(2.0), "median of 1, 2, 3");
        assert_eq!(out[5], Some(4.0), "the last keeps its own");
    }
}
