//! Step 4: partial-volume areas, centroids and outlines.

use super::levels::Levels;
use super::regions::{Rect, Region, chamfer};
use super::{Img, OUTLINE_POINTS, Partition};

/// Pixels of an n×n image within Euclidean distance `k` (pixels) of a set, the set included;
/// `set` is tested over `rect`. The pixel of a set nearest to any pixel outside it is an edge
/// pixel (one with a 4-neighbour outside the set), so discs around the edge pixels cover the rest.
pub(super) fn near(n: usize, rect: Rect, k: usize, set: impl Fn(usize) -> bool) -> Vec<bool> {
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

/// Partial-volume area (mm²) of a grown region and its edge band; also the per-pixel lumen
/// fraction field (0 outside) and the fraction-weighted centroid. Region pixels at least `pure`
/// pixels inside (the coarsest voxel side) count 1; the others, and the band pixels (on the
/// region's side, within `band` pixels of it and no nearer to another dark pixel there), count
/// (ref − v)/(ref − lumen), with ref the level of the material beyond the lumen there: what the
/// ray from the nearest edge pixel met first (soft tissue or bone; `levels::plateaus`, its rays
/// `pure` pixels a voxel), else bone where bone lies within 1.75 voxels of the edge (`erode`
/// pixels a voxel: the finest side). Past a soft-tissue plateau a pixel holds no lumen. Where the
/// nearest edge pixel's ray fitted a soft-tissue layer (`levels::Layer`), the pixels that ray
/// passes count (tissue + (bone − tissue)·β − v)/(tissue − lumen), β = Φ((t − bone edge)/σ) the
/// blurred bone share at their distance t along it: exact for the blurred three-material model
/// whatever the layer's thickness. No pixel over four blur widths from the region holds lumen,
/// nor one past the crest of a bony wall thinner than that ([`past_crest`]). The fractions are
/// not clipped, so noise averages out instead of biasing the sum. `part` is the section's
/// partition: next to it the material beyond is known from the anatomy where no ray says.
#[allow(clippy::too_many_arguments)]
pub(super) fn fraction_area(
    img: &Img,
    r: &Region,
    side: f64,
    lv: &Levels,
    band: usize,
    erode: usize,
    pure: usize,
    part: &Partition,
) -> (f64, Vec<f32>, [f64; 2]) {
    let (n, mask) = (img.n, &r.mask);
    let thr = lv.lumen_cut();
    let k = band as isize;
    let same = |i: usize| img.on(i, side);
    let other_dark = |i: usize| !mask[i] && img.sm[i].is_finite() && img.sm[i] < thr && same(i);
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
    let mut interior = vec![false; n * n];
    r.each_interior(n, pure, |i| interior[i] = true);
    // bone: a smoothed value a fifth of the way from soft tissue to bone, so that a thin, blurred
    // septum still counts as bone
    let two_tissues = lv.tissue < lv.bone;
    let (w, h) = (reach.a1 - reach.a0, reach.b1 - reach.b0);
    let at = |k: usize| (reach.b0 + k / w) * n + reach.a0 + k % w;
    let bone_level = lv.tissue + 0.2 * (lv.bone - lv.tissue);
    let d_bone = chamfer(w, h, |k| img.sm[at(k)] >= bone_level);
    let d_lumen = chamfer(w, h, |k| mask[at(k)]);
    // distance to the other side of the partition (chamfer units)
    let d_part = chamfer(w, h, |k| img.side[at(k)] as f64 == -side);
    // Next to the partition lies the bony shelf (modiolus to lamina tip) or the basilar
    // membrane, thinner than a voxel (lamina tip to ligament): both count against bone, where a
    // shelf whose blurred crest stays near the soft-tissue level (too low for its rays to say)
    // counted as soft tissue took about a pixel of lumen off each side of it (the family's
    // member 0 at 80 µm, a basal section: ST −5.5 → +0.3 %). Not on scala vestibuli's side of
    // the shelf, where the spiral limbus sits (unless the settings say the shelf is bare), nor
    // within two voxels of the ligament.
    let vox_mm = erode as f64 * img.pitch;
    // (`along`: the pixel's distance along the partition from the lamina tip, `Partition::along`)
    let by_partition = |along: f64| along < part.width() - 2.0 * vox_mm && (side < 0.0 || along > 0.0 || !part.limbus);
    // one voxel in chamfer units (thirds of a pixel)
    let vox3 = 3 * erode as u32;
    // a pixel a voxel or more outside the lumen whose value sits at the soft-tissue level is soft
    // tissue even on bone (a blurred lumen–bone edge is brighter there)
    let tissue_band = (lv.tissue - 0.25 * (lv.tissue - lv.lumen), lv.tissue + 0.1 * (lv.bone - lv.tissue));
    // Against what a pixel's lumen fraction is taken. Each edge pixel's ray says which material
    // lies beyond it (`levels::plateaus`): the pixels along a ray take that material as their
    // reference out to its plateau, and past a soft-tissue plateau hold no lumen (a thin ligament
    // or limbus on bone is not a blurred bone edge). Where no ray says (it crossed a thin septum or
    // the partition, or ran past a corner), the stretch of edge nearest the pixel decides: bone
    // beyond stretches that meet bone directly (bone within 1.75 voxels; an edge with a ray
    // counts as its ray says), out to the band; bone within 1.5 voxels of the partition (see
    // `by_partition`); soft tissue elsewhere, but only within 1.5 voxels of the lumen: beyond
    // the lumen's own blur soft tissue holds no lumen.
    #[derive(Clone, Copy, PartialEq)]
    enum Ref {
        Bone,
        Tissue,
        None,
        /// Soft tissue with bone's blur: the blurred bone fraction β of the pixel and the level of
        /// the bone behind, from its ray's fitted layer (`levels::fit_layer`).
        Mixed(f32, f32),
    }
    let mut by_ray: Vec<Option<Ref>> = vec![None; w * h];
    // the blur σ of the section image (pixels), where the edges say (`levels::plateaus`)
    let mut blur: Option<f64> = None;
    let mut lined: Vec<Option<Ref>> = vec![None; w * h];
    if two_tissues {
        let cell = |x: f64, y: f64| -> Option<usize> {
            let (x, y) = (x.round(), y.round());
            let inside = x >= reach.a0 as f64 && y >= reach.b0 as f64 && x < reach.a1 as f64 && y < reach.b1 as f64;
            inside.then(|| (y as usize - reach.b0) * w + x as usize - reach.a0)
        };
        let plateaus;
        (plateaus, blur) = super::levels::plateaus(img, &[mask], r.bounds, lv, pure, part, side);
        for p in plateaus.iter().filter(|p| p.layer.is_none()) {
            let (a, b) = ((p.pixel % n) as f64, (p.pixel / n) as f64);
            let kind = if p.value < lv.bone_cut() { Ref::Tissue } else { Ref::Bone };
            lined[(p.pixel / n - reach.b0) * w + p.pixel % n - reach.a0] = Some(kind);
            let mut t = 0.0;
            while t <= band as f64 {
                let mark = if kind == Ref::Tissue && t > p.at { Ref::None } else { kind };
                // soft tissue met by any ray wins over what other rays say of the pixel
                if let Some(c) = cell(a + t * p.dir[0], b + t * p.dir[1])
                    && !mask[at(c)]
                    && (by_ray[c].is_none() || mark == Ref::Tissue || (mark == Ref::None && by_ray[c] == Some(Ref::Bone)))
                {
                    by_ray[c] = Some(mark);
                }
                t += 0.5;
            }
        }
        // Where the nearest edge pixel's ray fitted a soft-tissue layer, a pixel takes bone's
        // blurred share β at its distance along that ray; past the lumen's blur (three σ beyond
        // its edge) it holds no lumen.
        let layered: Vec<(&super::levels::Plateau, super::levels::Layer)> = plateaus.iter().filter_map(|p| Some((p, p.layer?))).collect();
        if !layered.is_empty() {
            // the layered ray from each edge pixel that has one (index into `layered`)
            let mut from: Vec<Option<usize>> = vec![None; w * h];
            for (j, (p, _)) in layered.iter().enumerate() {
                let k = (p.pixel / n - reach.b0) * w + p.pixel % n - reach.a0;
                from[k] = Some(j);
                lined[k] = Some(Ref::Tissue);
            }
            let nearest = nearest_edge(w, h, band + erode, |k| mask[at(k)], |k| from[k]);
            for (k, e) in nearest.iter().enumerate() {
                let (Some(Some(j)), false) = (e, interior[at(k)]) else { continue };
                let (p, layer) = layered[*j];
                let (x, y) = ((at(k) % n) as f64 - (p.pixel % n) as f64, (at(k) / n) as f64 - (p.pixel / n) as f64);
                let t = x * p.dir[0] + y * p.dir[1];
                // pixels the ray passes near take its profile; others beyond the lumen's blur
                // hold no lumen either
                if (y * p.dir[0] - x * p.dir[1]).abs() > 1.5 {
                    if d_lumen[k] as f64 / 3.0 > 3.0 * layer.sigma + 1.0 {
                        by_ray[k] = Some(Ref::None);
                    }
                    continue;
                }
                let beta = layer.bone_share(t) as f32;
                by_ray[k] = Some(if t > layer.lumen + 3.0 * layer.sigma { Ref::None } else { Ref::Mixed(beta, layer.bone_level) });
            }
        }
    }
    // The bony shelf's blur reaches about three blur widths past it: within that of the
    // partition line over the shelf (the modiolar side of the lamina tip), where `by_partition`
    // holds, a pixel counts against bone whatever its ray says. Under a blur of 1.5 voxels the
    // shelf's crest sits near the soft-tissue level and its rays took it for soft tissue, each
    // taking most of a voxel of lumen off scala tympani along the shelf — most of its roof where
    // the basilar membrane is as narrow as a real one (member 13 at 40 µm: ST −7.6 → −0.9 %
    // signed median). In chamfer units (three a pixel); `blur` is σ in pixels.
    let shelf_reach = (1.5 * vox3 as f64).max(9.0 * blur.unwrap_or(0.0));
    // Scala tympani modiolar of the lamina tip is walled by bone: the shelf's tympanic side is
    // bare and the modiolar wall is bone (the nerve behind it lies past the wall's crest, see
    // `past_crest`). Within two blur widths of the grown lumen there (at least a voxel) a pixel
    // counts against bone whatever its ray says: under a blur over a voxel the lumen's corner by
    // the modiolus climbs slowly, its rays took it for a soft-tissue layer on bone, and each pixel
    // there lost up to 0.7 of its lumen (member 8 at 40 µm, blur 1.3 voxels: ST signed median
    // −2.4 → −0.8 %; member 13, blur 1.47: −1.3 → +0.3 %; the family at 200 µm within half a
    // point per member but member 9's ST, 6.8 → 8.1 %). Farther out the rays still decide: at
    // 200 µm the modiolus's nerve core lies within the band, and counted against bone it read
    // scala tympani 3–8 points high.
    let modiolar_reach = (vox3 as f64).max(6.0 * blur.unwrap_or(0.0));
    let on_bone_edge = chamfer(w, h, |k| mask[at(k)] && lined[k].map_or(4 * d_bone[k] <= 7 * vox3, |r| r == Ref::Bone));
    // A pixel beyond the crest of a bony wall, seen from the nearest edge pixel of the lumen,
    // holds no lumen (see [`past_crest`]).
    let edge_of = nearest_edge(w, h, band + erode, |k| mask[at(k)], |k| k);
    let beyond_wall = |i: usize, k: usize| -> bool {
        let Some(e) = edge_of[k] else { return false };
        let (ax, ay) = ((i % n) as f64, (i / n) as f64);
        let (bx, by) = ((at(e) % n) as f64, (at(e) / n) as f64);
        let steps = (2.0 * (bx - ax).hypot(by - ay)).ceil() as usize;
        let path = (1..steps).map(|j| {
            let t = j as f64 / steps as f64;
            img.sm[(ay + t * (by - ay)).round() as usize * n + (ax + t * (bx - ax)).round() as usize]
        });
        past_crest(img.sm[i], path, lv)
    };
    let reference = |i: usize| {
        let k = (i / n - reach.b0) * w + i % n - reach.a0;
        if !mask[i] && beyond_wall(i, k) {
            return Ref::None;
        }
        let along = part.along(img.uv(i));
        if (d_part[k] as f64) <= shelf_reach && along < 0.0 && by_partition(along) {
            return Ref::Bone;
        }
        if side < 0.0 && along < 0.0 && (d_lumen[k] as f64) <= modiolar_reach {
            return Ref::Bone;
        }
        if let Some(r) = by_ray[k] {
            return r;
        }
        let x = img.sm[i];
        let tissue = d_lumen[k] >= vox3 && x >= tissue_band.0 && x <= tissue_band.1;
        let bone_edge = on_bone_edge[k] <= d_lumen[k] + 3 && !tissue;
        let partition = 2 * d_part[k] <= 3 * vox3 && by_partition(along);
        if !two_tissues || bone_edge || partition {
            Ref::Bone
        } else if 2 * d_lumen[k] <= 3 * vox3 {
            Ref::Tissue
        } else {
            Ref::None
        }
    };
    // the mask's edge lies within about 1.2 σ inside a blurred lumen edge (at the lumen/soft
    // tissue midpoint), and the lumen's blur reaches 2.5 σ past it: no lumen beyond 4 σ
    let beyond = |i: usize| {
        let k = (i / n - reach.b0) * w + i % n - reach.a0;
        blur.is_some_and(|s| d_lumen[k] as f64 / 3.0 > 4.0 * s + 0.5)
    };
    let mut field = vec![0f32; mask.len()];
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
        if inside && !beyond(i) {
            field[i] = if interior[i] {
                1.0
            } else {
                match reference(i) {
                    Ref::Bone => (lv.bone - x) / (lv.bone - lv.lumen),
                    // outside the grown lumen, brighter than soft tissue is bone's blur, not less lumen
                    Ref::Tissue if !mask[i] => ((lv.tissue - x) / (lv.tissue - lv.lumen)).max(0.0),
                    Ref::Tissue => (lv.tissue - x) / (lv.tissue - lv.lumen),
                    Ref::None => 0.0,
                    Ref::Mixed(beta, bone) => (lv.tissue + (bone - lv.tissue) * beta - x) / (lv.tissue - lv.lumen),
                }
            };
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

/// Whether a pixel of smoothed value `x` lies past the crest of a bony wall, given the smoothed
/// values on the straight path from it to the nearest edge pixel of the lumen: the path rises
/// above the soft-tissue/bone midpoint and stands 0.08 of the lumen–bone step above the pixel,
/// which itself lies a quarter of the step below bone. Such a pixel holds no lumen: beyond a
/// wall thinner than the lumen's blur reach lies something darker than bone (porous bone,
/// marrow, a nerve core), and counted against bone it passed for lumen (the outside phantom with
/// 0.12 mm shells in porous bone at 80 µm: 66 pixels beyond the wall added 5 % to a scala
/// tympani). Thick bone's noise does not pass: its pixels lie near bone, not a quarter below.
/// (The path is lazy: it is not read for a pixel at bone's level.)
fn past_crest(x: f32, path: impl Iterator<Item = f32>, lv: &Levels) -> bool {
    let step = lv.bone - lv.lumen;
    x < lv.bone - 0.25 * step && {
        let top = path.fold(f32::NEG_INFINITY, f32::max);
        top >= lv.bone_cut() && top - x >= 0.08 * step
    }
}

/// For each pixel of a w×h window within `reach` steps (8-connected) of an edge pixel of the
/// set `inside` (a set pixel with a 4-neighbour outside it): what `label` says of the nearest
/// edge pixel (breadth-first from all edge pixels at once), or None beyond reach.
fn nearest_edge<T: Copy>(w: usize, h: usize, reach: usize, inside: impl Fn(usize) -> bool, label: impl Fn(usize) -> T) -> Vec<Option<T>> {
    let mut out: Vec<Option<T>> = vec![None; w * h];
    let mut front = vec![];
    for (k, o) in out.iter_mut().enumerate() {
        let (x, y) = (k % w, k / w);
        let outside = |xx: usize, yy: usize| !inside(yy * w + xx);
        let edge =
            inside(k) && ((x > 0 && outside(x - 1, y)) || (x + 1 < w && outside(x + 1, y)) || (y > 0 && outside(x, y - 1)) || (y + 1 < h && outside(x, y + 1)));
        if edge {
            *o = Some(label(k));
            front.push(k);
        }
    }
    for _ in 0..reach {
        let mut next = vec![];
        for &k in &front {
            let (x, y) = ((k % w) as isize, (k / w) as isize);
            for (dx, dy) in [(-1, 0), (1, 0), (0, -1), (0, 1), (-1, -1), (1, -1), (-1, 1), (1, 1)] {
                let (xx, yy) = (x + dx, y + dy);
                if xx >= 0 && yy >= 0 && (xx as usize) < w && (yy as usize) < h {
                    let j = yy as usize * w + xx as usize;
                    if out[j].is_none() {
                        out[j] = out[k];
                        next.push(j);
                    }
                }
            }
        }
        front = next;
    }
    out
}

/// Star outline of a fraction field at the half level, [`OUTLINE_POINTS`] rays from `c`.
pub(super) fn outline(img: &Img, field: &[f32], c: [f64; 2]) -> Vec<[f64; 2]> {
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::measure::phi;

    /// A lumen (0.15) against a bony wall (0.9) 0.12 mm thick with porous bone (0.45) beyond,
    /// blurred by σ = 0.08 mm: the closed form of a Gaussian-blurred box (handbook erf),
    /// v(x) = L + (B − L)·Φ(x/σ) − (B − O)·Φ((x − w)/σ), sampled every 0.02 mm. Pixels from the
    /// lumen's edge up to the crest are not past it; those more than one blur width past the
    /// wall are. On thick bone (O = B) with noise of contrast-to-noise 8 (a fixed pseudo-random
    /// sequence, smoothed over three samples) at most one in a thousand is.
    #[test]
    fn past_the_crest_of_a_thin_wall_only() {
        let lv = Levels { lumen: 0.15, tissue: 0.35, bone: 0.9 };
        let (sigma, w, h) = (0.08, 0.12, 0.02);
        let xs: Vec<f64> = (0..40).map(|i| -0.2 + i as f64 * h).collect();
        let model = |o: f64, x: f64| 0.15 + 0.75 * phi(x / sigma) - (0.9 - o) * phi((x - w) / sigma);
        // the lumen's edge pixel: the last sample below the lumen/soft-tissue midpoint
        let v: Vec<f32> = xs.iter().map(|&x| model(0.45, x) as f32).collect();
        let edge = v.iter().rposition(|&y| y < lv.lumen_cut()).unwrap();
        let crest = (0..v.len()).max_by(|&a, &b| v[a].total_cmp(&v[b])).unwrap();
        for i in edge + 1..v.len() {
            let past = past_crest(v[i], v[edge + 1..i].iter().copied(), &lv);
            if i <= crest {
                assert!(!past, "x = {:.2} mm, before the crest at {:.2}", xs[i], xs[crest]);
            }
            if xs[i] > w + sigma {
                assert!(past, "x = {:.2} mm, a blur width past the wall", xs[i]);
            }
        }
        // thick bone with noise: σ_noise = 0.75/8, smoothed over three samples
        let mut seed = 12345u64;
        let mut noise = || {
            seed = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            // the sum of 12 uniforms less 6: near-normal, unit variance
            (0..12).map(|k| ((seed >> (16 + 4 * k)) & 0xf) as f64 / 15.0).sum::<f64>() - 6.0
        };
        let (mut bone, mut past) = (0, 0);
        for _ in 0..200 {
            let raw: Vec<f64> = xs.iter().map(|&x| model(0.9, x) + 0.75 / 8.0 * noise()).collect();
            let v: Vec<f32> = (0..raw.len()).map(|i| ((raw[i.saturating_sub(1)] + raw[i] + raw[(i + 1).min(raw.len() - 1)]) / 3.0) as f32).collect();
            let Some(edge) = v.iter().rposition(|&y| y < lv.lumen_cut()) else { continue };
            for i in (edge + 1..v.len()).filter(|&i| xs[i] > 0.1) {
                bone += 1;
                past += past_crest(v[i], v[edge + 1..i].iter().copied(), &lv) as usize;
            }
        }
        // (a 3.5σ dip of the smoothed noise passes: about 2 in 10 000)
        assert!(past * 1000 <= bone, "{past} of {bone} thick-bone samples taken as past a crest");
    }
}
