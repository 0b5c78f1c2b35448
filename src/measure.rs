//! Per-section measures: scala areas from partial-volume fractions, partition width, lateral wall
//! thickness, and flags whenever a value cannot be trusted.
//!
//! Method, per section (all lengths mm):
//! 1. Resample the stack on a square grid normal to the centreline at pitch ≤ half the smallest
//!    voxel side; the grid grows (×1.25, keeping the samples it has) until both scalae and their
//!    edge bands lie inside it or the capture limit is reached.
//! 2. Levels: Otsu's threshold splits dark (fluid) from bright (bone); the fluid and bone levels
//!    are the medians of each class's interior pixels (at least one voxel from the other class),
//!    so blurred edges do not pull them; the segmentation threshold is their midpoint.
//! 3. The partition line through the lamina and ligament points splits the lumen. Each scala is
//!    grown (4-connected) from a seed on its side over pixels below the threshold.
//! 4. Area = Σ fᵢ·pitch² with the fluid fraction fᵢ = (bone − vᵢ)/(bone − fluid), summed over the
//!    grown region and the edge band around it (pixels within two voxels that are nearer to this
//!    region than to any other dark region on the same side). A blur spreads each edge over the
//!    band but keeps the sum; the fractions are not clipped, so noise averages out instead of
//!    biasing the sum.
//! 5. Wall: along the partition direction from the partition midpoint outward, the distance
//!    between the upward (lumen → bone) crossing of the fluid/bone half level and the downward
//!    crossing of the half level between bone and whatever lies outside the wall.

use crate::centreline::Centreline;
use crate::cochlea::Greenwood;
use crate::frame::v3::V;
use crate::progress::Progress;
use crate::section::{self, SectionGeom};
use crate::stack::Stack;
use crate::with_samples;
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
    /// Fluid and bone grey levels for all sections; None = found per section.
    pub levels: Option<[f32; 2]>,
}

impl Default for MeasureSettings {
    fn default() -> Self {
        MeasureSettings { step_mm: 0.1, pitch_mm: None, capture_mm: 3.0, levels: None }
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
        }
    }
}

/// One scala found in a section.
#[derive(Clone, Debug, Default, Serialize, Deserialize)]
pub struct Scala {
    /// mm²; None when it cannot be trusted (see the row's flags).
    pub area: Option<f64>,
    /// Closed outline at the half-fluid level, section coordinates (mm), star-sampled from the centroid.
    pub outline: Vec<[f64; 2]>,
    /// Fraction-weighted centroid (section coordinates, mm).
    pub centroid: [f64; 2],
    pub seed: Option<[f64; 2]>,
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
    /// Fluid and bone levels used.
    pub levels: [f32; 2],
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
    /// `open`, `no_seed` and `low_contrast` blank both areas; `no_wall` blanks the wall.
    pub fn blank_unsound(&mut self) {
        for f in self.flags.clone() {
            match f {
                Flag::Extrapolated | Flag::Excluded => {
                    (self.sv.area, self.st.area, self.partition_width_mm, self.wall_mm) = (None, None, None, None);
                }
                Flag::Open | Flag::NoSeed | Flag::LowContrast => (self.sv.area, self.st.area) = (None, None),
                Flag::NoWall => self.wall_mm = None,
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
    let geoms = section::geometry(cl, s.step_mm);
    progress.start(geoms.len() as u64);
    let pitch = s.pitch_mm.unwrap_or(f64::INFINITY).min(0.5 * vox.min());
    let rows = geoms
        .par_iter()
        .map(|g| {
            progress.check()?;
            let ov = overrides.iter().filter(|o| (o.s_mm - g.s).abs() <= 0.5 * s.step_mm).min_by(|a, b| (a.s_mm - g.s).abs().total_cmp(&(b.s_mm - g.s).abs()));
            let mut row = section_row(stack, cl, g, s, pitch, vox.max(), ov, gw);
            if cl.extrapolated(g.theta) {
                row.flags.push(Flag::Extrapolated);
            }
            row.blank_unsound();
            progress.add(1);
            Ok(row)
        })
        .collect::<Result<Vec<Row>>>()?;
    Ok((geoms, rows))
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
    n: usize,
    pitch: f64,
    start: f64,
    /// Per pixel: on the apical (positive) side of the partition line.
    apical: Vec<bool>,
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
}

#[allow(clippy::too_many_arguments)]
fn section_row(stack: &Stack, cl: &Centreline, g: &SectionGeom, s: &MeasureSettings, pitch: f64, vmax: f64, ov: Option<&Override>, gw: &Greenwood) -> Row {
    let (radius, height) = cl.radius_height(g.theta);
    let lam = g.to_plane(g.lamina);
    let lig = g.to_plane(g.ligament);
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
        levels: [f32::NAN; 2],
        half_mm: 0.0,
        pitch_mm: pitch,
        lamina_uv: lam,
        ligament_uv: lig,
    };
    if ov.is_some_and(|o| o.exclude) {
        row.partition_width_mm = None;
        row.flags.push(Flag::Excluded);
        return row;
    }
    let d = [lig[0] - lam[0], lig[1] - lam[1]];
    let dn = d[0].hypot(d[1]).max(1e-12);
    let mut n = [-d[1] / dn, d[0] / dn];
    if n[1] < 0.0 {
        n = [-n[0], -n[1]];
    }
    let line = Line { p: lam, n };
    let mid = [0.5 * (lam[0] + lig[0]), 0.5 * (lam[1] + lig[1])];
    let mut half = (START_HALF * g.width()).max(10.0 * vmax).min(s.capture_mm);
    let levels_given = ov.and_then(|o| o.levels).or(s.levels);
    let mut img = sample_section(stack, g, &line, half, pitch, None);
    loop {
        let levels = match levels_given {
            Some(l) => Some(l),
            None => find_levels(&img, (1.5 * vmax / pitch).ceil() as usize),
        };
        let Some([fluid, bone]) = levels else {
            row.flags.push(Flag::LowContrast);
            return row;
        };
        row.levels = [fluid, bone];
        row.half_mm = half;
        if !(bone > fluid) {
            row.flags.push(Flag::LowContrast);
            return row;
        }
        let mut thr = 0.5 * (fluid + bone);
        let band = (2.0 * vmax / pitch).ceil() as usize;
        let erode = (vmax / pitch).ceil() as usize;
        // The dark class may hold other dark matter (soft tissue, air) besides fluid: take the fluid
        // level from the interior of the scalae themselves, then segment again.
        let can_grow = half < s.capture_mm;
        if levels_given.is_none() {
            match lumen_level(&img, &line, mid, thr, vmax, g.width(), erode, band) {
                // a scala already overflows the square: grow it before refining anything
                Lumen::Overflows if can_grow => {
                    half = (half * GROWTH).min(s.capture_mm);
                    img = sample_section(stack, g, &line, half, pitch, Some(img));
                    continue;
                }
                Lumen::Level(f) => {
                    row.levels = [f, bone];
                    thr = 0.5 * (f + bone);
                }
                _ => {}
            }
        }
        let [fluid, bone] = row.levels;
        let mut grow_more = false;
        let mut open = false;
        let mut scalae = [Scala::default(), Scala::default()];
        let mut missing = false;
        for (k, side) in [1.0f64, -1.0].into_iter().enumerate() {
            let given = ov.and_then(|o| if k == 0 { o.seed_sv } else { o.seed_st });
            let seed = given.and_then(|q| img.index(q)).or_else(|| find_seed(&img, &line, mid, side, thr, vmax, g.width()));
            let Some(seed) = seed else {
                missing = true;
                continue;
            };
            let r = grow(&img, seed, side, thr);
            // the region and its edge band must fit inside the square
            if r.overflows(img.n, band) && can_grow {
                grow_more = true;
                break;
            }
            open |= r.touches_border || r.touches_nan;
            let (area, field, centroid) = fraction_area(&img, &r, side, thr, fluid, bone, band);
            scalae[k] = Scala { area: Some(area), outline: outline(&img, &field, centroid), centroid, seed: Some(img.uv(seed)) };
        }
        if grow_more {
            half = (half * GROWTH).min(s.capture_mm);
            img = sample_section(stack, g, &line, half, pitch, Some(img));
            continue;
        }
        if missing {
            row.flags.push(Flag::NoSeed);
        }
        if open {
            row.flags.push(Flag::Open);
        }
        if missing || open {
            for sc in &mut scalae {
                sc.area = None;
            }
        }
        let [sv, st] = scalae;
        row.sv = sv;
        row.st = st;
        row.wall_mm = wall(stack, g, mid, [d[0] / dn, d[1] / dn], pitch, s.capture_mm, thr, bone);
        if row.wall_mm.is_none() {
            row.flags.push(Flag::NoWall);
        }
        return row;
    }
}

/// Resamples the section square of half-size `half`; samples an earlier, smaller square `old`
/// already holds are copied, not resampled (both grids have an even size, so they align).
fn sample_section(stack: &Stack, g: &SectionGeom, line: &Line, half: f64, pitch: f64, old: Option<Img>) -> Img {
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
    // which side of the partition line each pixel lies on, row by row
    let mut apical = Vec::with_capacity(n * n);
    for b in 0..n {
        let q = start + b as f64 * pitch;
        apical.extend((0..n).map(|a| line.side([start + a as f64 * pitch, q]) > 0.0));
    }
    Img { v, n, pitch, start, apical }
}

/// Otsu's threshold (Otsu 1979) over finite values: the cut maximizing between-class variance.
pub fn otsu(values: &[f32]) -> Option<f32> {
    let (lo, hi) = values.iter().filter(|x| x.is_finite()).fold((f32::INFINITY, f32::NEG_INFINITY), |(a, b), &x| (a.min(x), b.max(x)));
    if !(hi > lo) {
        return None;
    }
    const B: usize = 256;
    let mut hist = [0f64; B];
    let k = (B as f32 - 1.0) / (hi - lo);
    for &x in values.iter().filter(|x| x.is_finite()) {
        hist[((x - lo) * k + 0.5) as usize] += 1.0;
    }
    let total: f64 = hist.iter().sum();
    let sum_all: f64 = hist.iter().enumerate().map(|(i, h)| i as f64 * h).sum();
    let (mut w0, mut s0, mut best, mut cut) = (0.0, 0.0, -1.0, 0);
    for (i, h) in hist.iter().enumerate().take(B - 1) {
        w0 += h;
        s0 += i as f64 * h;
        let w1 = total - w0;
        if w0 == 0.0 || w1 == 0.0 {
            continue;
        }
        let (m0, m1) = (s0 / w0, (sum_all - s0) / w1);
        let between = w0 * w1 * (m0 - m1).powi(2);
        if between > best {
            best = between;
            cut = i;
        }
    }
    Some(lo + (cut as f32 + 0.5) / (B as f32 - 1.0) * (hi - lo))
}

/// Fluid and bone levels: medians of the interior pixels of Otsu's two classes (pixels whose
/// square neighbourhood of radius `r` lies wholly in their class, inside the stack). Otsu's
/// threshold is taken on every other pixel of each row and column: the section is sampled at
/// half a voxel or finer, so that still sees every voxel.
fn find_levels(img: &Img, r: usize) -> Option<[f32; 2]> {
    let n = img.n;
    let sub: Vec<f32> = img.v.chunks(n).step_by(2).flat_map(|row| row.iter().step_by(2).copied()).collect();
    let t = otsu(&sub)?;
    let all = Rect { a0: 0, a1: n, b0: 0, b1: n };
    let full = ((2 * r + 1) * (2 * r + 1)) as u32;
    let (mut d, mut b) = (vec![], vec![]);
    // dark interior: all dark; bright interior: nothing dark and nothing outside the stack
    let dark = BoxCount::new(n, all, |i| img.v[i] < t && img.v[i].is_finite());
    dark.each_square(n, r, |i, c| {
        if c == full {
            d.push(img.v[i]);
        }
    });
    let not_bright = if img.v.iter().all(|x| x.is_finite()) { dark } else { BoxCount::new(n, all, |i| !(img.v[i] >= t && img.v[i].is_finite())) };
    not_bright.each_square(n, r, |i, c| {
        if c == 0 {
            b.push(img.v[i]);
        }
    });
    if d.len() < 4 || b.len() < 4 {
        return None;
    }
    Some([median_f32(&mut d), median_f32(&mut b)])
}

fn median_f32(v: &mut [f32]) -> f32 {
    let m = v.len() / 2;
    *v.select_nth_unstable_by(m, f32::total_cmp).1
}

/// Counts of a pixel set over squares, from a summed-area table over a rectangle of an n×n
/// image: O(1) a square whatever its size.
struct BoxCount {
    sum: Vec<u32>,
    rect: Rect,
    w: usize,
}

impl BoxCount {
    fn new(n: usize, rect: Rect, set: impl Fn(usize) -> bool) -> BoxCount {
        let w = rect.a1 - rect.a0 + 1;
        let mut sum = vec![0u32; w * (rect.b1 - rect.b0 + 1)];
        for b in rect.b0..rect.b1 {
            let mut row = 0u32;
            let (above, here) = ((b - rect.b0) * w, (b - rect.b0 + 1) * w);
            for a in rect.a0..rect.a1 {
                row += set(b * n + a) as u32;
                sum[here + a - rect.a0 + 1] = sum[above + a - rect.a0 + 1] + row;
            }
        }
        BoxCount { sum, rect, w }
    }
    /// Calls `f(i, c)` for every pixel i of the n×n image whose (2r+1)² square lies within the
    /// rectangle, with c the number of set pixels in that square.
    fn each_square(&self, n: usize, r: usize, mut f: impl FnMut(usize, u32)) {
        let (w, rc) = (self.w, self.rect);
        for b in rc.b0 + r..rc.b1.saturating_sub(r) {
            let top = &self.sum[(b - r - rc.b0) * w..][..w];
            let bot = &self.sum[(b + r + 1 - rc.b0) * w..][..w];
            for a in rc.a0 + r..rc.a1.saturating_sub(r) {
                let (x0, x1) = (a - r - rc.a0, a + r + 1 - rc.a0);
                f(b * n + a, bot[x1] + top[x0] - top[x1] - bot[x0]);
            }
        }
    }
}

/// What the scalae grown at a first threshold tell of the fluid level.
enum Lumen {
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
fn lumen_level(img: &Img, line: &Line, mid: [f64; 2], thr: f32, vmax: f64, width: f64, erode: usize, band: usize) -> Lumen {
    let mut vals = vec![];
    for side in [1.0, -1.0] {
        let Some(seed) = find_seed(img, line, mid, side, thr, vmax, width) else { continue };
        let r = grow(img, seed, side, thr);
        if r.overflows(img.n, band) {
            return Lumen::Overflows;
        }
        let inside = BoxCount::new(img.n, r.bounds, |i| r.mask[i]);
        let full = ((2 * erode + 1) * (2 * erode + 1)) as u32;
        inside.each_square(img.n, erode, |i, c| {
            if c == full {
                vals.push(img.v[i]);
            }
        });
    }
    if vals.len() < 4 {
        return Lumen::Unknown;
    }
    Lumen::Level(median_f32(&mut vals))
}

/// A dark pixel on the given side of the partition, a little way off its midpoint, whose 3×3
/// neighbourhood is dark too.
fn find_seed(img: &Img, line: &Line, mid: [f64; 2], side: f64, thr: f32, vmax: f64, width: f64) -> Option<usize> {
    let n = img.n;
    let dark = |i: usize| img.v[i].is_finite() && img.v[i] < thr;
    let mut d = 1.5 * vmax;
    let far = (0.8 * width).max(4.0 * vmax);
    while d <= far {
        let q = [mid[0] + side * d * line.n[0], mid[1] + side * d * line.n[1]];
        if let Some(i) = img.index(q) {
            let (a, b) = (i % n, i / n);
            if a > 0 && b > 0 && a + 1 < n && b + 1 < n && img.apical[i] == (side > 0.0) {
                let all = (0..3).all(|db| (0..3).all(|da| dark((b + db - 1) * n + a + da - 1)));
                if all {
                    return Some(i);
                }
            }
        }
        d += 0.5 * img.pitch;
    }
    None
}

/// Pixel rectangle a ∈ [a0, a1), b ∈ [b0, b1).
#[derive(Clone, Copy)]
struct Rect {
    a0: usize,
    a1: usize,
    b0: usize,
    b1: usize,
}

impl Rect {
    /// Widened by `k` pixels on every side, within an n×n image.
    fn widen(self, k: usize, n: usize) -> Rect {
        Rect { a0: self.a0.saturating_sub(k), a1: (self.a1 + k).min(n), b0: self.b0.saturating_sub(k), b1: (self.b1 + k).min(n) }
    }
    fn pixels(self, n: usize) -> impl Iterator<Item = usize> {
        (self.b0..self.b1).flat_map(move |b| (self.a0..self.a1).map(move |a| b * n + a))
    }
}

struct Region {
    mask: Vec<bool>,
    /// Bounding box of the mask.
    bounds: Rect,
    touches_border: bool,
    touches_nan: bool,
}

impl Region {
    /// The region comes within `band` pixels of the border of the n×n square.
    fn overflows(&self, n: usize, band: usize) -> bool {
        let b = self.bounds;
        b.a0.min(b.b0).min(n - b.a1).min(n - b.b1) < band
    }
}

/// 4-connected flood fill from `seed` over dark pixels on one side of the partition line.
fn grow(img: &Img, seed: usize, side: f64, thr: f32) -> Region {
    let n = img.n;
    let mut mask = vec![false; n * n];
    let mut stack = vec![seed];
    mask[seed] = true;
    let (mut touches_border, mut touches_nan) = (false, false);
    let mut bounds = Rect { a0: seed % n, a1: seed % n + 1, b0: seed / n, b1: seed / n + 1 };
    while let Some(i) = stack.pop() {
        let (a, b) = (i % n, i / n);
        if a == 0 || b == 0 || a + 1 == n || b + 1 == n {
            touches_border = true;
        }
        bounds = Rect { a0: bounds.a0.min(a), a1: bounds.a1.max(a + 1), b0: bounds.b0.min(b), b1: bounds.b1.max(b + 1) };
        let mut visit = |j: usize| {
            if mask[j] {
                return;
            }
            let x = img.v[j];
            if x.is_nan() {
                touches_nan = true;
                return;
            }
            if x < thr && img.apical[j] == (side > 0.0) {
                mask[j] = true;
                stack.push(j);
            }
        };
        if a > 0 {
            visit(i - 1);
        }
        if a + 1 < n {
            visit(i + 1);
        }
        if b > 0 {
            visit(i - n);
        }
        if b + 1 < n {
            visit(i + n);
        }
    }
    Region { mask, bounds, touches_border, touches_nan }
}

/// Pixels of an n×n image within Euclidean distance `k` (pixels) of a set, the set included;
/// `set` is tested over `rect`. The pixel of a set nearest to any pixel outside it is an edge
/// pixel (one with a 4-neighbour outside the set), so discs around the edge pixels cover the rest.
fn near(n: usize, rect: Rect, k: usize, set: impl Fn(usize) -> bool) -> Vec<bool> {
    let mut out = vec![false; n * n];
    let k = k as isize;
    for i in rect.pixels(n) {
        if !set(i) {
            continue;
        }
        out[i] = true;
        let (a, b) = ((i % n) as isize, (i / n) as isize);
        let n = n as isize;
        let edge = [(-1, 0), (1, 0), (0, -1), (0, 1)].iter().any(|(da, db)| {
            let (x, y) = (a + da, b + db);
            x >= 0 && y >= 0 && x < n && y < n && !set((y * n + x) as usize)
        });
        if !edge {
            continue;
        }
        for y in (b - k).max(0)..(b + k + 1).min(n) {
            for x in (a - k).max(0)..(a + k + 1).min(n) {
                if (x - a).pow(2) + (y - b).pow(2) <= k * k {
                    out[(y * n + x) as usize] = true;
                }
            }
        }
    }
    out
}

/// Partial-volume area (mm²) of a grown region and its edge band; also the per-pixel fluid
/// fraction field (0 outside) and the fraction-weighted centroid. The band holds the pixels
/// on the region's side within `band` pixels of it and no nearer to another dark pixel there.
#[allow(clippy::too_many_arguments)]
fn fraction_area(img: &Img, r: &Region, side: f64, thr: f32, fluid: f32, bone: f32, band: usize) -> (f64, Vec<f32>, [f64; 2]) {
    let (n, mask) = (img.n, &r.mask);
    let k = band as isize;
    let same = |i: usize| img.apical[i] == (side > 0.0);
    let other_dark = |i: usize| !mask[i] && img.v[i].is_finite() && img.v[i] < thr && same(i);
    let reach = r.bounds.widen(band, n);
    let near_region = near(n, r.bounds, band, |i| mask[i]);
    // only dark pixels within two bands of the region can be nearer to a band pixel
    let near_other = near(n, r.bounds.widen(2 * band, n), band, other_dark);
    // the nearest pixel of the region, and of the other dark pixels, within the window
    let nearest = |i: usize| -> (isize, isize) {
        let (a, b, nn) = ((i % n) as isize, (i / n) as isize, n as isize);
        let (mut dr, mut dother) = (isize::MAX, isize::MAX);
        for y in (b - k).max(0)..(b + k + 1).min(nn) {
            for x in (a - k).max(0)..(a + k + 1).min(nn) {
                let j = (y * nn + x) as usize;
                let d2 = (x - a).pow(2) + (y - b).pow(2);
                if mask[j] {
                    dr = dr.min(d2);
                } else if other_dark(j) {
                    dother = dother.min(d2);
                }
            }
        }
        (dr, dother)
    };
    let mut field = vec![0f32; mask.len()];
    let frac = |x: f32| (bone - x) / (bone - fluid);
    for i in reach.pixels(n) {
        let x = img.v[i];
        let inside = mask[i]
            || (near_region[i] && x.is_finite() && same(i) && {
                // no other dark pixel within the band: the pixel is the region's; else the nearer wins
                !near_other[i] || {
                    let (dr, dother) = nearest(i);
                    dr <= dother
                }
            });
        if inside {
            field[i] = frac(x);
        }
    }
    let p2 = img.pitch * img.pitch;
    let (mut sum, mut cu, mut cv) = (0.0f64, 0.0f64, 0.0f64);
    for i in reach.pixels(n) {
        let f = field[i];
        if f != 0.0 {
            let q = img.uv(i);
            sum += f as f64;
            cu += f as f64 * q[0];
            cv += f as f64 * q[1];
        }
    }
    let c = if sum > 0.0 { [cu / sum, cv / sum] } else { [0.0, 0.0] };
    (sum * p2, field, c)
}

/// Star outline of a fraction field at the half level, [`OUTLINE_POINTS`] rays from `c`.
fn outline(img: &Img, field: &[f32], c: [f64; 2]) -> Vec<[f64; 2]> {
    let n = img.n;
    let at = |q: [f64; 2]| -> f32 {
        let x = (q[0] - img.start) / img.pitch;
        let y = (q[1] - img.start) / img.pitch;
        if x < 0.0 || y < 0.0 || x > (n - 1) as f64 || y > (n - 1) as f64 {
            return 0.0;
        }
        let (i, j) = ((x.floor() as usize).min(n - 2), (y.floor() as usize).min(n - 2));
        let (fx, fy) = ((x - i as f64) as f32, (y - j as f64) as f32);
        let f = |a: usize, b: usize| field[b * n + a].clamp(0.0, 1.0);
        let top = f(i, j) + (f(i + 1, j) - f(i, j)) * fx;
        let bot = f(i, j + 1) + (f(i + 1, j + 1) - f(i, j + 1)) * fx;
        top + (bot - top) * fy
    };
    let step = 0.5 * img.pitch;
    let limit = 2.0 * (n as f64) * img.pitch;
    (0..OUTLINE_POINTS)
        .map(|k| {
            let a = std::f64::consts::TAU * k as f64 / OUTLINE_POINTS as f64;
            let dir = [a.cos(), a.sin()];
            let (mut r, mut prev) = (0.0, at(c));
            loop {
                let q = [c[0] + (r + step) * dir[0], c[1] + (r + step) * dir[1]];
                let cur = at(q);
                if cur < 0.5 || r > limit {
                    let t = if prev > cur { ((prev - 0.5) / (prev - cur)).clamp(0.0, 1.0) as f64 } else { 0.0 };
                    let rr = r + t * step;
                    break [c[0] + rr * dir[0], c[1] + rr * dir[1]];
                }
                r += step;
                prev = cur;
            }
        })
        .collect()
}

/// Lateral wall thickness (mm) along the partition direction `dir` from `mid` (section
/// coordinates): the threshold crossing into bone, then the crossing out of it. The profile is
/// the mean of four lines at ±1 and ±2 pitches off the partition line.
#[allow(clippy::too_many_arguments)]
fn wall(stack: &Stack, g: &SectionGeom, mid: [f64; 2], dir: [f64; 2], pitch: f64, capture: f64, thr: f32, bone: f32) -> Option<f64> {
    let vox = stack.voxel.as_ref()?;
    let h = 0.5 * pitch;
    let steps = ((capture + 1.0) / h) as usize;
    let normal = [-dir[1], dir[0]];
    let prof: Vec<f32> = with_samples!(&stack.samples, data => (0..steps).map(|i| {
        let d = i as f64 * h;
        let mut acc = 0.0f32;
        for o in [-2.0, -1.0, 1.0, 2.0] {
            let q = [mid[0] + d * dir[0] + o * pitch * normal[0], mid[1] + d * dir[1] + o * pitch * normal[1]];
            acc += section::trilinear_idx(data, stack.dims, stack.to_index(g.from_plane(q)));
        }
        acc / 4.0
    }).collect());
    let cross = |i: usize, t: f32| -> f64 {
        let (a, b) = (prof[i - 1], prof[i]);
        ((i - 1) as f64 + ((t - a) / (b - a)).clamp(0.0, 1.0) as f64) * h
    };
    let first_dark = prof.iter().position(|x| x.is_finite() && *x < thr)?;
    let up = (first_dark + 1..prof.len()).find(|&i| !prof[i].is_finite() || prof[i] >= thr)?;
    let down = (up + 1..prof.len()).find(|&i| !prof[i].is_finite() || prof[i] < thr)?;
    if !prof[up].is_finite() || !prof[down].is_finite() {
        return None;
    }
    // The outer edge's half level lies between bone and what is outside the wall, which need
    // not be fluid: take that level from the profile two to four voxels beyond the edge.
    let k = (vox.max() / h).ceil() as usize;
    let mut outside: Vec<f32> = prof.get(down + 2 * k..(down + 4 * k).min(prof.len()))?.iter().copied().filter(|x| x.is_finite()).collect();
    if outside.is_empty() {
        return None;
    }
    outside.sort_by(f32::total_cmp);
    let t_out = (0.5 * (bone + outside[outside.len() / 2])).max(thr);
    let down = (up + 1..prof.len()).find(|&i| prof[i] < t_out).unwrap_or(down);
    Some(cross(down, t_out) - cross(up, thr))
}
