//! Step 3: each scala grown from a seed on its side of the partition, with its necks cut.

use super::{Img, Line};

/// Counts of a pixel set over squares, from a summed-area table over a rectangle of an n×n
/// image: O(1) a square whatever its size.
pub(super) struct BoxCount {
    sum: Vec<u32>,
    rect: Rect,
    w: usize,
}

impl BoxCount {
    pub(super) fn new(n: usize, rect: Rect, set: impl Fn(usize) -> bool) -> BoxCount {
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
    pub(super) fn each_square(&self, n: usize, r: usize, mut f: impl FnMut(usize, u32)) {
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

/// The darkest pixel on the given side of the partition, along its normal through the midpoint
/// (from half a voxel to 0.8 partition widths or four voxels off), whose 3×3 neighbourhood is
/// dark too: deep in the scala even where a small scala at coarse voxels is dark only near its
/// middle.
pub(super) fn find_seed(img: &Img, line: &Line, mid: [f64; 2], side: f64, thr: f32, vmax: f64, width: f64) -> Option<usize> {
    let n = img.n;
    let dark = |i: usize| img.sm[i].is_finite() && img.sm[i] < thr && !img.is_blocked(i);
    let far = (0.8 * width).max(4.0 * vmax);
    let mut best: Option<usize> = None;
    let mut d = 0.5 * vmax;
    while d <= far {
        let q = [mid[0] + side * d * line.n[0], mid[1] + side * d * line.n[1]];
        if let Some(i) = img.index(q) {
            let (a, b) = (i % n, i / n);
            if a > 0 && b > 0 && a + 1 < n && b + 1 < n && img.on(i, side) {
                let all = (0..3).all(|db| (0..3).all(|da| dark((b + db - 1) * n + a + da - 1)));
                if all && best.is_none_or(|k| img.sm[i] < img.sm[k]) {
                    best = Some(i);
                }
            }
        }
        d += 0.5 * img.pitch;
    }
    best
}

/// Pixel rectangle a ∈ [a0, a1), b ∈ [b0, b1).
#[derive(Clone, Copy)]
pub(super) struct Rect {
    pub a0: usize,
    pub a1: usize,
    pub b0: usize,
    pub b1: usize,
}

impl Rect {
    /// The smallest rectangle holding both.
    pub(super) fn union(self, o: Rect) -> Rect {
        Rect { a0: self.a0.min(o.a0), a1: self.a1.max(o.a1), b0: self.b0.min(o.b0), b1: self.b1.max(o.b1) }
    }
    /// Widened by `k` pixels on every side, within an n×n image.
    pub(super) fn widen(self, k: usize, n: usize) -> Rect {
        Rect { a0: self.a0.saturating_sub(k), a1: (self.a1 + k).min(n), b0: self.b0.saturating_sub(k), b1: (self.b1 + k).min(n) }
    }
    pub(super) fn pixels(self, n: usize) -> impl Iterator<Item = usize> {
        (self.b0..self.b1).flat_map(move |b| (self.a0..self.a1).map(move |a| b * n + a))
    }
}

pub(super) struct Region {
    pub mask: Vec<bool>,
    /// Bounding box of the mask.
    pub bounds: Rect,
    pub touches_border: bool,
    pub touches_nan: bool,
}

impl Region {
    /// The region comes within `band` pixels of the border of the n×n square.
    /// Calls `f(i)` for each pixel of the region whose (2r+1)² square lies wholly in it (its
    /// interior, at least `r` pixels from anything else), on an n×n image.
    pub(super) fn each_interior(&self, n: usize, r: usize, mut f: impl FnMut(usize)) {
        let full = ((2 * r + 1) * (2 * r + 1)) as u32;
        BoxCount::new(n, self.bounds, |i| self.mask[i]).each_square(n, r, |i, c| {
            if c == full {
                f(i)
            }
        });
    }

    pub(super) fn overflows(&self, n: usize, band: usize) -> bool {
        let b = self.bounds;
        b.a0.min(b.b0).min(n - b.a1).min(n - b.b1) < band
    }
}

/// 4-connected flood fill from `seed` over pixels of the smoothed image darker than `thr` on one
/// side of the partition line, stopping at a user's barrier.
pub(super) fn grow(img: &Img, seed: usize, side: f64, thr: f32) -> Region {
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
            let x = img.sm[j];
            if x.is_nan() {
                touches_nan = true;
                return;
            }
            if x < thr && img.on(j, side) && !img.is_blocked(j) {
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

/// The image smoothed by a binomial [1 2 1]/4 kernel applied twice in each direction (σ ≈ one
/// pixel, half a voxel); a pixel next to a NaN is NaN.
pub(super) fn smooth(v: &[f32], n: usize) -> Vec<f32> {
    let (mut a, mut b) = (v.to_vec(), vec![0.0f32; v.len()]);
    for _ in 0..2 {
        // along rows, then along columns; an edge pixel stands in for its missing neighbour
        for (src, dst) in a.chunks_exact(n).zip(b.chunks_exact_mut(n)) {
            for i in 0..n {
                dst[i] = 0.25 * src[i.saturating_sub(1)] + 0.5 * src[i] + 0.25 * src[(i + 1).min(n - 1)];
            }
        }
        for y in 0..n {
            let (up, here, down) = (y.saturating_sub(1) * n, y * n, (y + 1).min(n - 1) * n);
            for x in 0..n {
                a[here + x] = 0.25 * b[up + x] + 0.5 * b[here + x] + 0.25 * b[down + x];
            }
        }
    }
    a
}

/// Cuts the necks of a region: pixels deeper than ρ (chamfer distance to the region's outside,
/// ρ = a quarter of the deepest pixel's depth, at least `min_px`) form its core; the core
/// component nearest the seed is kept and grown back by 2ρ within the region (which restores
/// corners down to 60°, as where the partition meets the wall). Whatever hung on through a neck
/// narrower than 2ρ — a nerve canal, a gap in a septum, the next turn — is dropped beyond the
/// neck, with its touches of the border.
pub(super) fn cut_necks(img: &Img, r: Region, seed: usize, min_px: usize) -> Region {
    let n = img.n;
    let rc = r.bounds.widen(1, n);
    let (w, h) = (rc.a1 - rc.a0, rc.b1 - rc.b0);
    let at = |x: usize, y: usize| (rc.b0 + y) * n + rc.a0 + x;
    // chamfer distance to the outside of the mask, in thirds of a pixel
    let d = chamfer(w, h, |k| !r.mask[at(k % w, k / w)]);
    let deepest = d.iter().copied().max().unwrap_or(0);
    let rho = ((0.25 * deepest as f64) as u32).max(3 * min_px as u32);
    if deepest <= rho {
        return r;
    }
    // the core component nearest the seed: search outward from the seed within the mask
    let local = |i: usize| -> Option<usize> {
        let (a, b) = (i % n, i / n);
        (a >= rc.a0 && a < rc.a1 && b >= rc.b0 && b < rc.b1).then(|| (b - rc.b0) * w + a - rc.a0)
    };
    let Some(s0) = local(seed) else { return r };
    let mut seen = vec![false; w * h];
    let mut queue = std::collections::VecDeque::from([s0]);
    seen[s0] = true;
    let mut start = None;
    while let Some(k) = queue.pop_front() {
        if d[k] > rho {
            start = Some(k);
            break;
        }
        for j in neighbours(k, w, h) {
            if !seen[j] && d[j] > 0 {
                seen[j] = true;
                queue.push_back(j);
            }
        }
    }
    let Some(start) = start else { return r };
    // the core component, then everything within ρ of it inside the mask (chamfer steps)
    let mut keep = vec![u32::MAX; w * h];
    let mut stack = vec![start];
    keep[start] = 0;
    let mut core = vec![];
    while let Some(k) = stack.pop() {
        core.push(k);
        for j in neighbours(k, w, h) {
            if keep[j] != 0 && d[j] > rho {
                keep[j] = 0;
                stack.push(j);
            }
        }
    }
    // chamfer distances grow from the core in small integer steps: a bucket per distance
    // (Dial's shortest-path queue) instead of a heap
    let limit = (2 * rho + 2) as usize;
    let mut buckets: Vec<Vec<usize>> = vec![vec![]; limit + 1];
    buckets[0] = core;
    for dist in 0..=limit {
        while let Some(k) = buckets[dist].pop() {
            if dist as u32 > keep[k] {
                continue;
            }
            let (x, y) = (k % w, k / w);
            for (dx, dy, c) in [(-1, 0, 3), (1, 0, 3), (0, -1, 3), (0, 1, 3), (-1, -1, 4), (1, -1, 4), (-1, 1, 4), (1, 1, 4)] {
                let (xx, yy) = (x as isize + dx, y as isize + dy);
                if xx < 0 || yy < 0 || xx >= w as isize || yy >= h as isize {
                    continue;
                }
                let j = yy as usize * w + xx as usize;
                let nd = dist + c;
                if d[j] > 0 && nd <= limit && (nd as u32) < keep[j] {
                    keep[j] = nd as u32;
                    buckets[nd].push(j);
                }
            }
        }
    }
    let mut mask = vec![false; n * n];
    let (mut touches_border, mut bounds) = (false, Rect { a0: n, a1: 0, b0: n, b1: 0 });
    for (k, _) in keep.iter().enumerate().filter(|(_, d)| **d != u32::MAX) {
        {
            let (a, b) = (rc.a0 + k % w, rc.b0 + k / w);
            mask[b * n + a] = true;
            touches_border |= a == 0 || b == 0 || a + 1 == n || b + 1 == n;
            bounds = Rect { a0: bounds.a0.min(a), a1: bounds.a1.max(a + 1), b0: bounds.b0.min(b), b1: bounds.b1.max(b + 1) };
        }
    }
    // a NaN next to the kept part still counts
    let touches_nan = r.touches_nan
        && bounds
            .widen(1, n)
            .pixels(n)
            .any(|i| img.sm[i].is_nan() && [i.wrapping_sub(1), i + 1, i.wrapping_sub(n), i + n].iter().any(|&j| j < n * n && mask[j]));
    Region { mask, bounds, touches_border, touches_nan }
}

/// 4-neighbours of pixel k in a w×h grid.
fn neighbours(k: usize, w: usize, h: usize) -> impl Iterator<Item = usize> {
    let (x, y) = (k % w, k / w);
    [(x > 0).then(|| k - 1), (x + 1 < w).then(|| k + 1), (y > 0).then(|| k - w), (y + 1 < h).then(|| k + w)].into_iter().flatten()
}

/// Chamfer (3-4) distance of every pixel of a w×h grid to the nearest pixel of a set, in thirds
/// of a pixel (Borgefors 1986: within 8 % of Euclidean); far from any set pixel: u32::MAX / 4.
pub(super) fn chamfer(w: usize, h: usize, set: impl Fn(usize) -> bool) -> Vec<u32> {
    const FAR: u32 = u32::MAX / 4;
    let mut d: Vec<u32> = (0..w * h).map(|k| if set(k) { 0 } else { FAR }).collect();
    for y in 0..h {
        for x in 0..w {
            let k = y * w + x;
            if d[k] == 0 {
                continue;
            }
            let mut m = d[k];
            if x > 0 {
                m = m.min(d[k - 1] + 3);
            }
            if y > 0 {
                m = m.min(d[k - w] + 3);
                if x > 0 {
                    m = m.min(d[k - w - 1] + 4);
                }
                if x + 1 < w {
                    m = m.min(d[k - w + 1] + 4);
                }
            }
            d[k] = m;
        }
    }
    for y in (0..h).rev() {
        for x in (0..w).rev() {
            let k = y * w + x;
            if d[k] == 0 {
                continue;
            }
            let mut m = d[k];
            if x + 1 < w {
                m = m.min(d[k + 1] + 3);
            }
            if y + 1 < h {
                m = m.min(d[k + w] + 3);
                if x + 1 < w {
                    m = m.min(d[k + w + 1] + 4);
                }
                if x > 0 {
                    m = m.min(d[k + w - 1] + 4);
                }
            }
            d[k] = m;
        }
    }
    d
}

/// The scala on one side of the partition (`side` +1 apical, −1 basal): grown from `seed` (the
/// user's, else one found near the partition midpoint) below `thr`, its necks cut. None when no
/// seed is found.
#[allow(clippy::too_many_arguments)]
pub(super) fn scala(
    img: &Img,
    line: &Line,
    mid: [f64; 2],
    side: f64,
    thr: f32,
    vmax: f64,
    width: f64,
    erode: usize,
    seed: Option<usize>,
) -> Option<(usize, Region)> {
    let seed = seed.or_else(|| find_seed(img, line, mid, side, thr, vmax, width))?;
    Some((seed, cut_necks(img, fill_holes(img.n, grow(img, seed, side, thr)), seed, erode)))
}

/// The region with its holes filled: the pixels it encloses (not joined to the edge of its
/// bounding box through other pixels outside it, 4-neighbours) join it. Noise leaves specks
/// brighter than the growth threshold inside a scala; as holes they made necks that
/// [`cut_necks`] cut, and the piece cut off then counted as another dark space, its lumen lost
/// (the outside phantom at contrast-to-noise 6: a basal scala tympani lost a quarter of its
/// area; tests/family.rs `low_contrast_to_noise_80um`). Filled, they count by their values like
/// the region's other edge pixels.
fn fill_holes(n: usize, mut r: Region) -> Region {
    let rc = r.bounds.widen(1, n);
    let (w, h) = (rc.a1 - rc.a0, rc.b1 - rc.b0);
    let at = |k: usize| (rc.b0 + k / w) * n + rc.a0 + k % w;
    // the pixels outside the region reached from the box's edge
    let mut outside = vec![false; w * h];
    let mut stack: Vec<usize> = (0..w * h).filter(|&k| (k % w == 0 || k / w == 0 || k % w + 1 == w || k / w + 1 == h) && !r.mask[at(k)]).collect();
    stack.iter().for_each(|&k| outside[k] = true);
    while let Some(k) = stack.pop() {
        for j in neighbours(k, w, h) {
            if !outside[j] && !r.mask[at(j)] {
                outside[j] = true;
                stack.push(j);
            }
        }
    }
    (0..w * h).filter(|&k| !outside[k]).for_each(|k| r.mask[at(k)] = true);
    r
}

/// Which pixels of an n×n image belong to the first `own` of several seeds (one label): a seeded watershed
/// (flooding in order of value, each pixel taken by the first label to reach it through its
/// 4-neighbours), so the boundaries between labels run along the ridges between their basins —
/// the septa between turns, however blurred. Values are binned into 1024 levels; within a bin
/// flooding goes first come, first served (a geodesic split where the image is flat). NaN pixels
/// belong to no one. A seed that falls on an earlier seed is ignored.
pub(super) fn territory(v: &[f32], n: usize, seeds: &[usize], own: usize) -> Vec<bool> {
    // on 2×2 blocks (the section pitch is at most half a voxel, so a block is at most a voxel:
    // a septum's ridge survives), a quarter of the work; the blocks' labels go back to their pixels
    let m = n.div_ceil(2);
    let block = |i: usize| (i / n / 2) * m + (i % n) / 2;
    let mut coarse = vec![0.0f32; m * m];
    let mut count = vec![0u8; m * m];
    for (y, row) in v.chunks_exact(n).enumerate() {
        let (c, k) = (&mut coarse[y / 2 * m..(y / 2 + 1) * m], &mut count[y / 2 * m..(y / 2 + 1) * m]);
        for (x, &val) in row.iter().enumerate() {
            c[x / 2] += val;
            k[x / 2] += 1;
        }
    }
    coarse.iter_mut().zip(&count).for_each(|(c, &k)| *c /= k as f32);
    let seeds: Vec<usize> = seeds.iter().map(|&s| block(s)).collect();
    let own = watershed(&coarse, m, &seeds, own);
    let mut out = Vec::with_capacity(n * n);
    for y in 0..n {
        out.extend((0..n).map(|x| own[y / 2 * m + x / 2]));
    }
    out
}

/// The seeded watershed of [`territory`] on an m×m image: whether each pixel goes to the first `own` seeds.
fn watershed(v: &[f32], n: usize, seeds: &[usize], own: usize) -> Vec<bool> {
    const BINS: usize = 1024;
    let (lo, hi) = v.iter().filter(|x| x.is_finite()).fold((f32::INFINITY, f32::NEG_INFINITY), |(a, b), &x| (a.min(x), b.max(x)));
    let scale = if hi > lo { (BINS - 1) as f32 / (hi - lo) } else { 0.0 };
    let bin = |i: usize| ((v[i] - lo) * scale) as usize;
    // label + 1 per pixel (0: not reached yet)
    let mut label = vec![0u16; n * n];
    let mut queue: Vec<Vec<usize>> = vec![vec![]; BINS];
    for (k, &s) in seeds.iter().enumerate() {
        if label[s] == 0 && v[s].is_finite() {
            label[s] = if k < own { 1 } else { k as u16 + 1 };
            queue[bin(s)].push(s);
        }
    }
    // the flood never runs back down: a pixel below the current level joins it, so each bin is
    // read once, first in first out
    for level in 0..BINS {
        let mut h = 0;
        while let Some(&i) = queue[level].get(h) {
            h += 1;
            for j in neighbours(i, n, n) {
                if label[j] == 0 && v[j].is_finite() {
                    label[j] = label[i];
                    queue[bin(j).max(level)].push(j);
                }
            }
        }
        queue[level] = vec![];
    }
    label.into_iter().map(|l| l == 1).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Two dark discs of unequal size touching at a faint ridge (a septum thinner than the blur,
    /// still below any lumen threshold between them): the split follows the ridge, not the
    /// midpoint between the seeds. Closed form: the ridge is where the discs meet (x = 32).
    #[test]
    fn territory_follows_the_ridge_between_seeds() {
        let n = 64;
        let (a, b) = (([18.0, 32.0], 14.0), ([38.0, 32.0], 6.0));
        let dark = |c: [f64; 2], r: f64, x: f64, y: f64| (x - c[0]).hypot(y - c[1]) < r;
        let v: Vec<f32> = (0..n * n)
            .map(|i| {
                let (x, y) = ((i % n) as f64, (i / n) as f64);
                if x == 32.0 && (y - 32.0).abs() < 6.0 {
                    0.3 // the faint septum
                } else if dark(a.0, a.1, x, y) || dark(b.0, b.1, x, y) {
                    0.1
                } else {
                    1.0
                }
            })
            .collect();
        let v = smooth(&v, n);
        let own = territory(&v, n, &[32 * n + 18, 32 * n + 38], 1);
        // the seeds' midpoint is x = 28; the ridge at 32 decides
        for x in 5..=30 {
            assert!(own[32 * n + x], "x = {x} on the own side of the ridge");
        }
        for x in 34..=43 {
            assert!(!own[32 * n + x], "x = {x} beyond the ridge");
        }
        // a plain geodesic split without the ridge would cut near the midpoint (on 2×2 blocks)
        let flat: Vec<f32> = vec![0.5; n * n];
        let own = territory(&flat, n, &[32 * n + 18, 32 * n + 38], 1);
        assert!(own[32 * n + 27] && !own[32 * n + 31]);
    }
}
