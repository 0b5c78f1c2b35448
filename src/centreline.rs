//! The centreline: lamina and ligament landmarks fitted as smooth curves of radius and height
//! against unwrapped angle (cubic smoothing splines), and their midline with arc length,
//! curvature and rotation-minimizing frames.
//!
//! Angles here are radians (θ, unwrapped, 0 toward the round window); lengths mm.

use crate::frame::{Frame, v3, v3::V, wrap180};
use crate::landmarks::{Kind, Landmark};
use crate::spline::SmoothSpline;
use crate::{Error, Result};
use serde::{Deserialize, Serialize};

/// Fit settings the user can change.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FitSettings {
    /// Smoothing λ for all four curves (radius and height of both edges); None = chosen by GCV.
    pub smoothing: Option<f64>,
    /// A landmark whose residual exceeds median + this × 1.4826·MAD is flagged.
    pub outlier_mads: f64,
}

impl Default for FitSettings {
    fn default() -> Self {
        FitSettings { smoothing: None, outlier_mads: 4.0 }
    }
}

/// Residuals below this (mm) are never flagged, so noise-free traces do not flag rounding.
const RESIDUAL_FLOOR_MM: f64 = 0.005;
/// Relative tolerance of the arc-length quadrature.
pub const LENGTH_TOL: f64 = 1e-11;

/// One fitted edge (lamina or ligament).
#[derive(Clone, Debug)]
pub struct Edge {
    pub r: SmoothSpline,
    pub z: SmoothSpline,
    /// Angular range of its landmarks (rad).
    pub range: (f64, f64),
    /// Per landmark used: (index into the landmark list, θ rad, residual mm, flagged).
    pub residuals: Vec<(usize, f64, f64, bool)>,
}

impl Edge {
    /// Frame-local point (mm) at angle θ.
    pub fn local(&self, t: f64) -> V {
        let r = self.r.eval(t);
        [r * t.cos(), r * t.sin(), self.z.eval(t)]
    }
}

/// The fitted centreline (partition midline) with its frame and edges.
#[derive(Clone, Debug)]
pub struct Centreline {
    pub frame: Frame,
    pub lamina: Edge,
    pub ligament: Edge,
    /// Common angular range of both edges (rad): s = 0 at `t0`.
    pub t0: f64,
    pub t1: f64,
    /// Total length (mm).
    pub length: f64,
    nodes: Vec<f64>,
    cum: Vec<f64>,
}

/// Unwrapped angles (rad) of partition landmarks: ordered by height, each step taken as the
/// shortest turn from the one before; the lowest starts in [−90°, 270°).
pub fn unwrap_angles(frame: &Frame, pts: &[V]) -> Vec<f64> {
    let c: Vec<[f64; 3]> = pts.iter().map(|p| frame.to_cochlear(*p)).collect();
    let mut order: Vec<usize> = (0..pts.len()).collect();
    order.sort_by(|&a, &b| c[a][2].total_cmp(&c[b][2]));
    let mut out = vec![0.0; pts.len()];
    let mut prev: Option<f64> = None;
    for &i in &order {
        let a = c[i][1];
        let t = match prev {
            None => {
                if a < -90.0 {
                    a + 360.0
                } else {
                    a
                }
            }
            Some(p) => p + wrap180(a - p),
        };
        out[i] = t;
        prev = Some(t);
    }
    out.into_iter().map(f64::to_radians).collect()
}

fn fit_edge(frame: &Frame, items: &[Landmark], idx: &[usize], theta: &[f64], kind: Kind, s: &FitSettings) -> Result<Edge> {
    if idx.len() < 4 {
        return Err(Error::invalid(format!("{} {} landmarks: the fit needs at least 4", idx.len(), kind.as_str())));
    }
    let mut pts: Vec<(f64, f64, f64, usize)> = idx
        .iter()
        .zip(theta)
        .map(|(&i, &t)| {
            let c = frame.to_cochlear(items[i].p);
            (t, c[0], c[2], i)
        })
        .collect();
    pts.sort_by(|a, b| a.0.total_cmp(&b.0));
    // equal angles: nudge apart by a negligible amount so the knots increase strictly
    for k in 1..pts.len() {
        if pts[k].0 <= pts[k - 1].0 {
            pts[k].0 = pts[k - 1].0 + 1e-9;
        }
    }
    let span = (pts[pts.len() - 1].0 - pts[0].0).to_degrees();
    if span < 90.0 {
        return Err(Error::invalid(format!("{} landmarks span {span:.0}°: the fit needs at least 90°", kind.as_str())));
    }
    let t: Vec<f64> = pts.iter().map(|p| p.0).collect();
    let r = SmoothSpline::fit(&t, &pts.iter().map(|p| p.1).collect::<Vec<_>>(), s.smoothing)?;
    let z = SmoothSpline::fit(&t, &pts.iter().map(|p| p.2).collect::<Vec<_>>(), s.smoothing)?;
    let res: Vec<f64> = pts.iter().map(|p| (p.1 - r.eval(p.0)).hypot(p.2 - z.eval(p.0))).collect();
    let med = median(&res);
    let mad = 1.4826 * median(&res.iter().map(|x| (x - med).abs()).collect::<Vec<_>>());
    let limit = (med + s.outlier_mads * mad).max(RESIDUAL_FLOOR_MM);
    let residuals = pts.iter().zip(&res).map(|(p, &e)| (p.3, p.0, e, e > limit)).collect();
    Ok(Edge { r, z, range: (t[0], t[t.len() - 1]), residuals })
}

/// Median of a non-empty slice (0 for empty).
pub fn median(x: &[f64]) -> f64 {
    if x.is_empty() {
        return 0.0;
    }
    let mut v = x.to_vec();
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 { v[n / 2] } else { 0.5 * (v[n / 2 - 1] + v[n / 2]) }
}

impl Centreline {
    /// Fits both edges and builds the midline. Errors: too few landmarks, span under 90°, edges
    /// that cross, no common angular range.
    pub fn fit(frame: &Frame, items: &[Landmark], s: &FitSettings) -> Result<Centreline> {
        let edge_idx: Vec<usize> = (0..items.len()).filter(|&i| matches!(items[i].kind, Kind::Lamina | Kind::Ligament)).collect();
        let theta = unwrap_angles(frame, &edge_idx.iter().map(|&i| items[i].p).collect::<Vec<_>>());
        let pick = |k: Kind| -> (Vec<usize>, Vec<f64>) { edge_idx.iter().zip(&theta).filter(|(i, _)| items[**i].kind == k).map(|(i, t)| (*i, *t)).unzip() };
        let (li, lt) = pick(Kind::Lamina);
        let (gi, gt) = pick(Kind::Ligament);
        // the two edges are independent: the ligament is fitted on a thread of its own (not the
        // rayon pool, which a measure in the background may keep busy while the app refits)
        let (lamina, ligament) = std::thread::scope(|sc| {
            let lig = sc.spawn(|| fit_edge(frame, items, &gi, &gt, Kind::Ligament, s));
            let lam = fit_edge(frame, items, &li, &lt, Kind::Lamina, s);
            (lam, lig.join().unwrap_or_else(|e| std::panic::resume_unwind(e)))
        });
        let (lamina, ligament) = (lamina?, ligament?);
        let t0 = lamina.range.0.max(ligament.range.0);
        let t1 = lamina.range.1.min(ligament.range.1);
        if t1 - t0 < 90f64.to_radians() {
            return Err(Error::invalid(format!("lamina and ligament landmarks overlap over {:.0}° only: the fit needs at least 90°", (t1 - t0).to_degrees())));
        }
        let n = ((t1 - t0).to_degrees().ceil() as usize).max(2);
        for k in 0..=4 * n {
            let t = t0 + (t1 - t0) * k as f64 / (4 * n) as f64;
            if ligament.r.eval(t) - lamina.r.eval(t) <= 0.0 {
                return Err(Error::invalid(format!("lamina and ligament curves cross near {:.0}°: check the landmark kinds there", t.to_degrees())));
            }
        }
        let mut cl = Centreline { frame: frame.clone(), lamina, ligament, t0, t1, length: 0.0, nodes: vec![], cum: vec![] };
        let nodes: Vec<f64> = (0..=n).map(|k| t0 + (t1 - t0) * k as f64 / n as f64).collect();
        let mut cum = vec![0.0];
        for w in nodes.windows(2) {
            let seg = arc_length(|t| cl.speed(t), w[0], w[1], LENGTH_TOL);
            cum.push(cum[cum.len() - 1] + seg);
        }
        cl.length = cum[cum.len() - 1];
        cl.nodes = nodes;
        cl.cum = cum;
        Ok(cl)
    }

    /// Midline radius and height and their first two θ-derivatives: [(r, r', r''), (z, z', z'')].
    fn rz(&self, t: f64) -> [(f64, f64, f64); 2] {
        let (a, b) = (self.lamina.r.eval3(t), self.ligament.r.eval3(t));
        let (c, d) = (self.lamina.z.eval3(t), self.ligament.z.eval3(t));
        let m = |x: (f64, f64, f64), y: (f64, f64, f64)| (0.5 * (x.0 + y.0), 0.5 * (x.1 + y.1), 0.5 * (x.2 + y.2));
        [m(a, b), m(c, d)]
    }

    /// Frame-local position, first and second derivative w.r.t. θ.
    fn local3(&self, t: f64) -> (V, V, V) {
        let [(r, r1, r2), (z, z1, z2)] = self.rz(t);
        let (s, c) = t.sin_cos();
        ([r * c, r * s, z], [r1 * c - r * s, r1 * s + r * c, z1], [r2 * c - 2.0 * r1 * s - r * c, r2 * s + 2.0 * r1 * c - r * s, z2])
    }

    /// |dP/dθ| (mm per rad).
    pub fn speed(&self, t: f64) -> f64 {
        v3::norm(self.local3(t).1)
    }

    /// Arc length (mm) from t0 to θ.
    pub fn s_at(&self, t: f64) -> f64 {
        let k = match self.nodes.binary_search_by(|x| x.total_cmp(&t)) {
            Ok(k) => return self.cum[k],
            Err(k) => k.clamp(1, self.nodes.len() - 1) - 1,
        };
        self.cum[k] + gauss(|x| self.speed(x), self.nodes[k], t)
    }

    /// θ (rad) at arc length s (mm), by Newton steps on the quadrature.
    pub fn theta_at(&self, s: f64) -> f64 {
        let s = s.clamp(0.0, self.length);
        let k = match self.cum.binary_search_by(|x| x.total_cmp(&s)) {
            Ok(k) => return self.nodes[k],
            Err(k) => k.clamp(1, self.nodes.len() - 1) - 1,
        };
        let (a, b) = (self.nodes[k], self.nodes[k + 1]);
        let mut t = a + (b - a) * (s - self.cum[k]) / (self.cum[k + 1] - self.cum[k]);
        for _ in 0..20 {
            let f = self.cum[k] + gauss(|x| self.speed(x), a, t) - s;
            let dt = f / self.speed(t);
            t = (t - dt).clamp(a, b);
            if dt.abs() < 1e-14 {
                break;
            }
        }
        t
    }

    /// Stack-frame point at θ (rad).
    pub fn point(&self, t: f64) -> V {
        self.frame.from_local(self.local3(t).0)
    }

    /// Unit tangent (stack frame) at θ, pointing toward the apex.
    pub fn tangent(&self, t: f64) -> V {
        v3::unit(self.frame.dir_to_stack(self.local3(t).1))
    }

    /// Radius of curvature (mm) at θ: |P'|³ / |P' × P''|.
    pub fn curvature_radius(&self, t: f64) -> f64 {
        let (_, d1, d2) = self.local3(t);
        let c = v3::norm(v3::cross(d1, d2));
        if c == 0.0 { f64::INFINITY } else { v3::norm(d1).powi(3) / c }
    }

    /// (radius, height) of the midline at θ.
    pub fn radius_height(&self, t: f64) -> (f64, f64) {
        let [(r, ..), (z, ..)] = self.rz(t);
        (r, z)
    }

    /// Stack point of an edge at θ.
    pub fn edge_point(&self, kind: Kind, t: f64) -> V {
        let e = if kind == Kind::Lamina { &self.lamina } else { &self.ligament };
        self.frame.from_local(e.local(t))
    }

    /// True when θ lies outside either edge's landmark range.
    pub fn extrapolated(&self, t: f64) -> bool {
        let out = |r: (f64, f64)| t < r.0 - 1e-9 || t > r.1 + 1e-9;
        out(self.lamina.range) || out(self.ligament.range)
    }

    /// Angular depth (degrees) from t0 to t1.
    pub fn depth_deg(&self) -> f64 {
        (self.t1 - self.t0).to_degrees()
    }

    /// Landmarks flagged as outliers: (index, θ rad, residual mm).
    pub fn flagged(&self) -> Vec<(usize, f64, f64)> {
        self.lamina.residuals.iter().chain(&self.ligament.residuals).filter(|r| r.3).map(|r| (r.0, r.1, r.2)).collect()
    }

    /// Basal diameter A (mm): from the round-window direction through the axis to the opposite side,
    /// on the fitted ligament (lateral) curve: r(0°) + r(180°).
    pub fn basal_diameter(&self) -> f64 {
        self.ligament.r.eval(0.0) + self.ligament.r.eval(std::f64::consts::PI)
    }
}

/// Adaptive Simpson quadrature of f over [a, b] to relative tolerance `tol`.
pub fn arc_length(f: impl Fn(f64) -> f64, a: f64, b: f64, tol: f64) -> f64 {
    #[allow(clippy::too_many_arguments)]
    fn rec(f: &dyn Fn(f64) -> f64, a: f64, b: f64, fa: f64, fm: f64, fb: f64, whole: f64, eps: f64, depth: u32) -> f64 {
        let m = 0.5 * (a + b);
        let (lm, rm) = (0.5 * (a + m), 0.5 * (m + b));
        let (flm, frm) = (f(lm), f(rm));
        let left = (m - a) / 6.0 * (fa + 4.0 * flm + fm);
        let right = (b - m) / 6.0 * (fm + 4.0 * frm + fb);
        let delta = left + right - whole;
        if depth == 0 || delta.abs() <= 15.0 * eps {
            return left + right + delta / 15.0;
        }
        rec(f, a, m, fa, flm, fm, left, eps / 2.0, depth - 1) + rec(f, m, b, fm, frm, fb, right, eps / 2.0, depth - 1)
    }
    if a == b {
        return 0.0;
    }
    let (fa, fm, fb) = (f(a), f(0.5 * (a + b)), f(b));
    let whole = (b - a) / 6.0 * (fa + 4.0 * fm + fb);
    let eps = (tol * whole.abs()).max(1e-15);
    rec(&f, a, b, fa, fm, fb, whole, eps, 40)
}

/// 8-point Gauss–Legendre quadrature on [a, b] (short, smooth pieces only).
fn gauss(f: impl Fn(f64) -> f64, a: f64, b: f64) -> f64 {
    const X: [f64; 4] = [0.183_434_642_495_649_8, 0.525_532_409_916_329, 0.796_666_477_413_626_7, 0.960_289_856_497_536_3];
    const W: [f64; 4] = [0.362_683_783_378_362, 0.313_706_645_877_887_3, 0.222_381_034_453_374_5, 0.101_228_536_290_376_3];
    let (c, h) = (0.5 * (a + b), 0.5 * (b - a));
    h * X.iter().zip(W).map(|(x, w)| w * (f(c - h * x) + f(c + h * x))).sum::<f64>()
}

/// Rotation-minimizing frames by double reflection (Wang, Jüttler, Zheng, Liu 2008).
/// `pts` and unit tangents `tan` along a curve, `r0` the first reference vector (made normal to
/// the first tangent). Returns one unit reference vector per point, normal to its tangent.
pub fn rotation_minimizing(pts: &[V], tan: &[V], r0: V) -> Vec<V> {
    let mut r = vec![v3::unit(v3::axpy(r0, -v3::dot(r0, tan[0]), tan[0]))];
    for i in 0..pts.len().saturating_sub(1) {
        let v1 = v3::sub(pts[i + 1], pts[i]);
        let c1 = v3::dot(v1, v1);
        if c1 == 0.0 {
            r.push(r[i]);
            continue;
        }
        let rl = v3::axpy(r[i], -2.0 / c1 * v3::dot(v1, r[i]), v1);
        let tl = v3::axpy(tan[i], -2.0 / c1 * v3::dot(v1, tan[i]), v1);
        let v2 = v3::sub(tan[i + 1], tl);
        let c2 = v3::dot(v2, v2);
        let next = if c2 == 0.0 { rl } else { v3::axpy(rl, -2.0 / c2 * v3::dot(v2, rl), v2) };
        r.push(v3::unit(next));
    }
    r
}
