//! Sections: planes normal to the centreline at a uniform step in s, and trilinear resampling of
//! the stack on them (working on the stack's own sample type; no widened copy of the volume).

use crate::centreline::{Centreline, rotation_minimizing};
use crate::frame::{v3, v3::V};
use crate::landmarks::Kind;
use crate::stack::{Sample, Stack};
use crate::with_samples;
use std::ops::Range;

/// Where and how one section lies (all stack-frame mm, unit vectors).
#[derive(Clone, Debug)]
pub struct SectionGeom {
    /// Arc length from the basal end (mm).
    pub s: f64,
    /// Unwrapped angle (rad).
    pub theta: f64,
    /// Centreline point.
    pub centre: V,
    /// Unit tangent (plane normal), toward the apex.
    pub t: V,
    /// First in-plane axis, along the partition (lamina → ligament).
    pub u: V,
    /// Second in-plane axis, toward the apex side (scala vestibuli).
    pub v: V,
    /// Where the lamina and ligament curves cross this plane.
    pub lamina: V,
    pub ligament: V,
    /// Rotation-minimizing reference vector (continuous along the curve, no twist).
    pub rmf: V,
}

impl SectionGeom {
    /// In-plane coordinates (mm) of a stack point relative to the centre.
    pub fn to_plane(&self, p: V) -> [f64; 2] {
        let d = v3::sub(p, self.centre);
        [v3::dot(d, self.u), v3::dot(d, self.v)]
    }
    /// Stack point of in-plane coordinates (mm).
    pub fn from_plane(&self, q: [f64; 2]) -> V {
        v3::axpy(v3::axpy(self.centre, q[0], self.u), q[1], self.v)
    }
    /// Partition width (mm): lamina to ligament.
    pub fn width(&self) -> f64 {
        v3::dist(self.lamina, self.ligament)
    }
}

/// Where an edge curve crosses the plane through `c` with normal `t`, searched near θ.
fn crossing(cl: &Centreline, kind: Kind, c: V, t: V, theta: f64) -> V {
    let f = |a: f64| v3::dot(v3::sub(cl.edge_point(kind, a), c), t);
    let (mut a, mut fa) = (theta, f(theta));
    let mut b = theta + 1e-3;
    let mut fb = f(b);
    for _ in 0..30 {
        if (fb - fa).abs() < 1e-300 {
            break;
        }
        let n = b - fb * (b - a) / (fb - fa);
        a = b;
        fa = fb;
        b = n;
        fb = f(b);
        if fb.abs() < 1e-12 {
            break;
        }
    }
    if (b - theta).abs() > 0.5 { cl.edge_point(kind, theta) } else { cl.edge_point(kind, b) }
}

/// How far past the traced range (rad, about 35°) the other turns are followed.
pub const BEYOND_RAD: f64 = 0.6;

/// Where the other turns of the spiral cross a section's plane: for each half turn k·π away
/// (k = ±1 … ±5) the centreline point in the plane (section coordinates, mm). Turns stacked
/// above and below and the turns across the modiolus all meet the plane, each with its own lumen
/// around that point. The duct goes on a little past the traced range (the hook, the apex), so
/// the centreline is followed up to [`BEYOND_RAD`] past either end.
pub fn other_turns(cl: &Centreline, g: &SectionGeom) -> Vec<[f64; 2]> {
    let f = |a: f64| v3::dot(v3::sub(cl.point(a), g.centre), g.t);
    let (lo, hi) = (cl.t0 - BEYOND_RAD, cl.t1 + BEYOND_RAD);
    let mut out = vec![];
    for k in (-5i32..=5).filter(|&k| k != 0) {
        let start = g.theta + k as f64 * std::f64::consts::PI;
        if start < lo - 0.5 || start > hi + 0.5 {
            continue;
        }
        // secant steps from the half turn, kept on the range
        let (mut a, mut b) = (start.clamp(lo, hi), (start + 0.05).clamp(lo, hi));
        if a == b {
            b = a - 0.05;
        }
        let (mut fa, mut fb) = (f(a), f(b));
        for _ in 0..40 {
            if fb.abs() < 1e-9 || (fb - fa).abs() < 1e-300 {
                break;
            }
            let c = (b - fb * (b - a) / (fb - fa)).clamp(lo, hi);
            (a, fa) = (b, fb);
            (b, fb) = (c, f(c));
        }
        if fb.abs() < 1e-6 && (b - start).abs() < 1.2 {
            out.push(g.to_plane(cl.point(b)));
        }
    }
    out
}

/// Section geometry at s = 0, step, 2·step, … ≤ length (mm).
pub fn geometry(cl: &Centreline, step: f64) -> Vec<SectionGeom> {
    let n = (cl.length / step + 1e-9).floor() as usize + 1;
    let thetas: Vec<f64> = (0..n).map(|k| cl.theta_at(k as f64 * step)).collect();
    let pts: Vec<V> = thetas.iter().map(|&t| cl.point(t)).collect();
    let tans: Vec<V> = thetas.iter().map(|&t| cl.tangent(t)).collect();
    let r0 = v3::sub(cl.edge_point(Kind::Ligament, thetas[0]), cl.edge_point(Kind::Lamina, thetas[0]));
    let rmf = rotation_minimizing(&pts, &tans, r0);
    (0..n)
        .map(|k| {
            let (c, t) = (pts[k], tans[k]);
            let lamina = crossing(cl, Kind::Lamina, c, t, thetas[k]);
            let ligament = crossing(cl, Kind::Ligament, c, t, thetas[k]);
            let d = v3::sub(ligament, lamina);
            let d = v3::axpy(d, -v3::dot(d, t), t);
            let u = if v3::norm(d) > 1e-9 { v3::unit(d) } else { rmf[k] };
            let mut v = v3::cross(t, u);
            if v3::dot(v, cl.frame.ez) < 0.0 {
                v = v3::scale(v, -1.0);
            }
            SectionGeom { s: k as f64 * step, theta: thetas[k], centre: c, t, u, v, lamina, ligament, rmf: rmf[k] }
        })
        .collect()
}

/// A sampling grid on a plane: sample (a, b) lies at `origin + a·du + b·dv` (mm), a < nu, b < nv.
#[derive(Clone, Debug)]
pub struct Grid {
    pub origin: V,
    pub du: V,
    pub dv: V,
    pub nu: usize,
    pub nv: usize,
}

/// Trilinear value at continuous voxel indices (i, j, k); NaN outside [0, n−1] on any axis.
#[inline]
pub fn trilinear_idx<T: Sample>(data: &[T], dims: [usize; 3], x: [f64; 3]) -> f32 {
    let mut i0 = [0usize; 3];
    let mut f = [0f32; 3];
    for a in 0..3 {
        let n = dims[a];
        let xa = x[a];
        if !(xa >= 0.0 && xa <= (n - 1) as f64) {
            return f32::NAN;
        }
        let fl = (xa.floor() as usize).min(n.saturating_sub(2));
        i0[a] = fl;
        f[a] = if n > 1 { (xa - fl as f64) as f32 } else { 0.0 };
    }
    let sx = 1usize.min(dims[0] - 1);
    let sy = if dims[1] > 1 { dims[0] } else { 0 };
    let sz = if dims[2] > 1 { dims[0] * dims[1] } else { 0 };
    let b = (i0[2] * dims[1] + i0[1]) * dims[0] + i0[0];
    let c000 = data[b].f();
    let c100 = data[b + sx].f();
    let c010 = data[b + sy].f();
    let c110 = data[b + sy + sx].f();
    let c001 = data[b + sz].f();
    let c101 = data[b + sz + sx].f();
    let c011 = data[b + sz + sy].f();
    let c111 = data[b + sz + sy + sx].f();
    let x00 = c000 + (c100 - c000) * f[0];
    let x10 = c010 + (c110 - c010) * f[0];
    let x01 = c001 + (c101 - c001) * f[0];
    let x11 = c011 + (c111 - c011) * f[0];
    let y0 = x00 + (x10 - x00) * f[1];
    let y1 = x01 + (x11 - x01) * f[1];
    y0 + (y1 - y0) * f[2]
}

/// Resamples the stack on a grid (row-major: index b·nu + a). Needs a voxel size.
pub fn resample(stack: &Stack, g: &Grid) -> Vec<f32> {
    let mut out = vec![f32::NAN; g.nu * g.nv];
    resample_part(stack, g, 0..g.nv, 0..g.nu, &mut out);
    out
}

/// Resamples the samples b ∈ `rows`, a ∈ `cols` of a grid into `out` (nu·nv values, row-major);
/// other entries are left as they are.
pub fn resample_part(stack: &Stack, g: &Grid, rows: Range<usize>, cols: Range<usize>, out: &mut [f32]) {
    let Some(vox) = &stack.voxel else { return };
    let inv = vox.mm.map(|x| 1.0 / x);
    let step = |d: V| [d[0] * inv[0], d[1] * inv[1], d[2] * inv[2]];
    let (o, du, dv) = (stack.to_index(g.origin), step(g.du), step(g.dv));
    let dims = stack.dims;
    // strictly inside the last voxel centre on every axis, so the fast path needs no checks; the
    // margin is far above the rounding error of stepping along a row by repeated addition
    let inside = |p: V| (0..3).all(|a| dims[a] >= 2 && p[a] >= 0.0 && p[a] < (dims[a] - 1) as f64 - 1e-6);
    with_samples!(&stack.samples, data => {
        for b in rows {
            let row = v3::axpy(o, b as f64, dv);
            let line = &mut out[b * g.nu..(b + 1) * g.nu];
            // the samples of this row strictly inside the stack form one run (the box is convex)
            let at = |a: usize| v3::axpy(row, a as f64, du);
            let run = inside_run(row, du, dims, cols.clone());
            let (mut lo, mut hi) = (run.start, run.end);
            while lo < hi && !inside(at(lo)) {
                lo += 1;
            }
            while hi > lo && !inside(at(hi - 1)) {
                hi -= 1;
            }
            for (a, px) in line.iter_mut().enumerate().take(lo).skip(cols.start) {
                *px = trilinear_idx(data, dims, at(a));
            }
            let mut p = at(lo);
            for px in &mut line[lo..hi] {
                *px = trilinear_inside(data, dims, p);
                p = [p[0] + du[0], p[1] + du[1], p[2] + du[2]];
            }
            for (a, px) in line.iter_mut().enumerate().take(cols.end).skip(hi) {
                *px = trilinear_idx(data, dims, at(a));
            }
        }
    })
}

/// The indices a ∈ `cols` for which p + a·d lies within [0, n − 1) on every axis, widened by a
/// sample at each end against rounding (the caller checks the ends).
fn inside_run(p: V, d: V, dims: [usize; 3], cols: Range<usize>) -> Range<usize> {
    let (mut lo, mut hi) = (cols.start as f64, cols.end as f64 - 1.0);
    for k in 0..3 {
        let top = dims[k] as f64 - 1.0;
        if d[k] == 0.0 {
            if !(p[k] >= 0.0 && p[k] < top) {
                return cols.start..cols.start;
            }
            continue;
        }
        let (t0, t1) = ((0.0 - p[k]) / d[k], (top - p[k]) / d[k]);
        lo = lo.max(t0.min(t1));
        hi = hi.min(t0.max(t1));
    }
    if !(hi >= lo) {
        return cols.start..cols.start;
    }
    let a0 = (lo.floor() - 1.0).max(cols.start as f64) as usize;
    let a1 = (hi.ceil() + 2.0).min(cols.end as f64) as usize;
    a0..a1.max(a0)
}

/// [`trilinear_idx`] for indices known to satisfy 0 ≤ x < n − 1 on every axis (n ≥ 2).
#[inline(always)]
fn trilinear_inside<T: Sample>(data: &[T], dims: [usize; 3], x: [f64; 3]) -> f32 {
    let (i, j, k) = (x[0] as usize, x[1] as usize, x[2] as usize);
    let (fx, fy, fz) = ((x[0] - i as f64) as f32, (x[1] - j as f64) as f32, (x[2] - k as f64) as f32);
    let (sy, sz) = (dims[0], dims[0] * dims[1]);
    let b = k * sz + j * sy + i;
    let c = &data[b..b + sz + sy + 2];
    let lerp = |a: f32, b: f32, t: f32| a + (b - a) * t;
    let y0 = lerp(lerp(c[0].f(), c[1].f(), fx), lerp(c[sy].f(), c[sy + 1].f(), fx), fy);
    let y1 = lerp(lerp(c[sz].f(), c[sz + 1].f(), fx), lerp(c[sz + sy].f(), c[sz + sy + 1].f(), fx), fy);
    lerp(y0, y1, fz)
}

/// A square grid of half-size `half` (mm) and `pitch` (mm) centred on the section, rows offset by
/// half a pitch in v so no sample lies on the partition line v = 0.
pub fn section_grid(g: &SectionGeom, half: f64, pitch: f64) -> Grid {
    let n = (2.0 * half / pitch).round() as usize;
    let n = n + n % 2; // even: rows at ±pitch/2, ±3·pitch/2, …
    let start = -(n as f64 - 1.0) * 0.5 * pitch;
    Grid { origin: g.from_plane([start, start]), du: v3::scale(g.u, pitch), dv: v3::scale(g.v, pitch), nu: n, nv: n }
}
