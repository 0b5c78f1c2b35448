//! The centreline: lamina and ligament landmarks fitted as smooth curves of radius and height
//! against unwrapped angle (cubic smoothing splines), and their midline with arc length,
//! curvature and rotation-minimizing frames.
//!
//! Angles here are radians (θ, unwrapped, 0 toward the round window); lengths mm.

use crate::frame::{Frame, Handedness, v3, v3::V};
use crate::landmarks::{Kind, Landmark};
use crate::spiral;
use crate::spline::SmoothSpline;
use crate::{Error, Result};
use serde::{Deserialize, Serialize};
use std::f64::consts::PI;

/// Fit settings the user can change.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FitSettings {
    /// Smoothing λ for all four curves (radius and height of both edges); None = chosen by GCV.
    pub smoothing: Option<f64>,
    /// A landmark whose residual exceeds this many times the fit's noise estimate (and at least
    /// one voxel plus the noise) is reported as an outlier.
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
/// Tukey's biweight cut-off, in noise σ of the two-dimensional (radius, height) residual.
const BIWEIGHT_C: f64 = 4.5;
/// Smallest weight a landmark keeps in the robust fit (so the spline system stays well posed)…
const MIN_WEIGHT: f64 = 1e-3;
/// …and below this it leaves the spline for that pass.
const DROP_WEIGHT: f64 = 0.01;
/// Median of a 2-D Gaussian residual's length is √(2 ln 2)·σ (Rayleigh distribution).
const RAYLEIGH_MEDIAN: f64 = 1.177_410_022_515_474_6;
/// The basal diameter A is reported when the ligament landmarks reach this close (degrees) to 0° and 180°.
const A_REACH_DEG: f64 = 5.0;

/// One fitted edge (lamina or ligament).
#[derive(Clone, Debug)]
pub struct Edge {
    pub r: SmoothSpline,
    pub z: SmoothSpline,
    /// Angular range of its landmarks (rad).
    pub range: (f64, f64),
    /// Per landmark used: (index into the landmark list, θ rad, residual mm, flagged).
    pub residuals: Vec<(usize, f64, f64, bool)>,
    /// Robust weight of each landmark in the fit (same order as `residuals`; near 0 = ignored).
    pub weights: Vec<f64>,
    /// The fit's noise estimate σ (mm) and the residual above which a landmark is flagged (mm).
    pub noise_mm: f64,
    pub limit_mm: f64,
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
    /// Landmarks that could belong to another turn: (index, assigned θ rad, alternative θ rad).
    pub ambiguous: Vec<(usize, f64, f64)>,
    nodes: Vec<f64>,
    cum: Vec<f64>,
}

/// Robust smoothing fit of one edge: radius and height against θ, iteratively reweighted with
/// Tukey's biweight on leave-one-out residuals (so a point the curve bends toward still shows
/// its misfit), the smoothing re-chosen by weighted GCV at each pass. `voxel_mm` (largest side,
/// 0 when unknown) bounds the noise estimate and the outlier limit from below.
#[allow(clippy::too_many_arguments)]
fn fit_edge(frame: &Frame, items: &[Landmark], idx: &[usize], theta: &[f64], kind: Kind, s: &FitSettings, voxel_mm: f64) -> Result<Edge> {
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
    pts.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.3.cmp(&b.3)));
    // two points 0.1 mm or more apart within 0.06° of each other: the turns were not told apart
    // there (a trace noisier than the gap between turns); no curve can pass through both
    if let Some(w) = pts.windows(2).find(|w| w[1].0 - w[0].0 < 1e-3 && (w[1].1 - w[0].1).hypot(w[1].2 - w[0].2) > 0.1) {
        return Err(Error::invalid(format!(
            "{} landmarks #{} and #{} fall at the same angle ({:.1}°) {:.2} mm apart: the turns could not be told apart there; check them",
            kind.as_str(),
            w[0].3.min(w[1].3) + 1,
            w[0].3.max(w[1].3) + 1,
            w[0].0.to_degrees(),
            (w[1].1 - w[0].1).hypot(w[1].2 - w[0].2)
        )));
    }
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
    let (rr, zz): (Vec<f64>, Vec<f64>) = pts.iter().map(|p| (p.1, p.2)).unzip();
    let sigma_floor = (0.25 * voxel_mm).max(0.002);
    // Tukey's biweight of misfits `e` (mm), each allowed `slack[k]` mm on top of the noise scale;
    // also returns the noise estimate σ (mm)
    let biweight = |e: &[f64], slack: &[f64]| -> (Vec<f64>, f64) {
        let noise = median(e) / RAYLEIGH_MEDIAN;
        let scale = BIWEIGHT_C * noise.max(sigma_floor);
        (e.iter().zip(slack).map(|(e, sl)| (1.0 - (e / (scale + sl)).powi(2)).max(0.0).powi(2).max(MIN_WEIGHT)).collect(), noise)
    };
    // first weights from each point's distance to the median of its two neighbours on either
    // side: a spike cannot pull that, where it can pull a first spline (GCV then interpolates it).
    // A coarse trace of a curving turn misses that median by more than noise, but so do its
    // neighbours, where a lone spike stands out: here and in every pass, a misfit is allowed
    // twice the median misfit of its two neighbours on either side.
    let around = |y: &[f64], k: usize| -> f64 { median(&(k.saturating_sub(2)..(k + 3).min(y.len())).filter(|&j| j != k).map(|j| y[j]).collect::<Vec<_>>()) };
    let start: Vec<f64> = (0..t.len()).map(|k| (rr[k] - around(&rr, k)).hypot(zz[k] - around(&zz, k))).collect();
    let slack: Vec<f64> = (0..t.len()).map(|k| 2.0 * around(&start, k)).collect();
    let mut w = biweight(&start, &slack).0;
    let (mut r, mut z, mut noise);
    let mut pass = 0;
    loop {
        // points the biweight has all but rejected leave the spline (a free knot would only add a
        // kink and blur the cross-validation); their misfit is then their plain residual
        let keep: Vec<usize> = (0..t.len()).filter(|&k| w[k] >= DROP_WEIGHT).collect();
        if keep.len() < 4 {
            return Err(Error::invalid(format!("{} landmarks disagree too much to fit one curve: check them", kind.as_str())));
        }
        let pick = |v: &[f64]| -> Vec<f64> { keep.iter().map(|&k| v[k]).collect() };
        let (tk, wk) = (pick(&t), pick(&w));
        r = SmoothSpline::fit_weighted(&tk, &pick(&rr), &wk, s.smoothing)?;
        z = SmoothSpline::fit_weighted(&tk, &pick(&zz), &wk, s.smoothing)?;
        let mut lev = vec![(0.0, 0.0); t.len()];
        for (j, &k) in keep.iter().enumerate() {
            lev[k] = (r.leverage[j], z.leverage[j]);
        }
        let loo: Vec<f64> = (0..t.len())
            .map(|k| {
                let er = (rr[k] - r.eval(t[k])) / (1.0 - lev[k].0).max(1e-12);
                let ez = (zz[k] - z.eval(t[k])) / (1.0 - lev[k].1).max(1e-12);
                er.hypot(ez)
            })
            .collect();
        let slack: Vec<f64> = (0..t.len()).map(|k| 2.0 * around(&loo, k)).collect();
        let next;
        (next, noise) = biweight(&loo, &slack);
        let change = next.iter().zip(&w).map(|(a, b)| (a - b).abs()).fold(0.0, f64::max);
        pass += 1;
        if change < 1e-3 || pass == 20 {
            break;
        }
        w = next;
    }
    let res: Vec<f64> = (0..t.len()).map(|k| (rr[k] - r.eval(t[k])).hypot(zz[k] - z.eval(t[k]))).collect();
    let limit = (s.outlier_mads * noise).max(voxel_mm + noise).max(RESIDUAL_FLOOR_MM);
    let residuals = pts.iter().zip(&res).map(|(p, &e)| (p.3, p.0, e, e > limit)).collect();
    Ok(Edge { r, z, range: (t[0], t[t.len() - 1]), residuals, weights: w, noise_mm: noise, limit_mm: limit })
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
    /// Fits both edges and builds the midline, with no voxel size known (see [`Centreline::fit_at`]).
    pub fn fit(frame: &Frame, items: &[Landmark], s: &FitSettings) -> Result<Centreline> {
        Self::fit_at(frame, items, s, 0.0)
    }

    /// Fits both edges and builds the midline. Angles come from walking the spiral
    /// ([`crate::spiral`]); if the landmarks turn against the frame's handedness the frame is
    /// turned over. `voxel_mm`: the largest voxel side (0 when unknown), the smallest residual
    /// ever called an outlier. Errors: too few landmarks, span under 90°, edges that cross, no
    /// common angular range.
    pub fn fit_at(frame: &Frame, items: &[Landmark], s: &FitSettings, voxel_mm: f64) -> Result<Centreline> {
        let of = |k: Kind| -> Vec<usize> { (0..items.len()).filter(|&i| items[i].kind == k).collect() };
        let (li, gi) = (of(Kind::Lamina), of(Kind::Ligament));
        let pts = |ix: &[usize]| -> Vec<V> { ix.iter().map(|&i| items[i].p).collect() };
        let turns = spiral::assign(frame, &pts(&li), &pts(&gi));
        let mut frame = frame.clone();
        if turns.reversed {
            frame.handed = match frame.handed {
                Handedness::Right => Handedness::Left,
                Handedness::Left => Handedness::Right,
            };
        }
        let frame = &frame;
        let rad = |v: &[f64]| -> Vec<f64> { v.iter().map(|t| t.to_radians()).collect() };
        let (lt, gt) = (rad(&turns.lamina), rad(&turns.ligament));
        let ambiguous = turns.ambiguous.iter().map(|&(e, k, t, alt)| (if e == 0 { li[k] } else { gi[k] }, t.to_radians(), alt.to_radians())).collect();
        // the two edges are independent: the ligament is fitted on a thread of its own (not the
        // rayon pool, which a measure in the background may keep busy while the app refits)
        let (lamina, ligament) = std::thread::scope(|sc| {
            let lig = sc.spawn(|| fit_edge(frame, items, &gi, &gt, Kind::Ligament, s, voxel_mm));
            let lam = fit_edge(frame, items, &li, &lt, Kind::Lamina, s, voxel_mm);
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
        let mut cl = Centreline { frame: frame.clone(), lamina, ligament, t0, t1, length: 0.0, ambiguous, nodes: vec![], cum: vec![] };
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

    /// The angle along the spiral (degrees, unwrapped as in the landmark list and the table) of a
    /// point at cochlear radius `r` mm, wrapped angle `angle_deg` and height `h` mm: of the turns
    /// the wrapped angle falls on, the one whose midline passes nearest (r, h).
    pub fn unwrap_deg(&self, r: f64, angle_deg: f64, h: f64) -> f64 {
        (-2..=5)
            .map(|k| angle_deg + 360.0 * k as f64)
            .filter(|a| (self.t0 - PI..=self.t1 + PI).contains(&a.to_radians()))
            .map(|a| {
                let (rm, hm) = self.radius_height(a.to_radians().clamp(self.t0, self.t1));
                (a, (r - rm).hypot(h - hm))
            })
            .min_by(|x, y| x.1.total_cmp(&y.1))
            .map_or(angle_deg, |x| x.0)
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
    /// on the fitted ligament (lateral) curve: r(0°) + r(180°). Err with the reason when the
    /// ligament landmarks do not reach both 0° and 180° (it would be extrapolated).
    pub fn basal_diameter(&self) -> std::result::Result<f64, String> {
        let (a, b) = (self.ligament.range.0.to_degrees(), self.ligament.range.1.to_degrees());
        if a > A_REACH_DEG || b < 180.0 - A_REACH_DEG {
            return Err(format!("the ligament landmarks run from {a:.0}° to {b:.0}°, not over both 0° and 180°"));
        }
        Ok(self.ligament.r.eval(0.0) + self.ligament.r.eval(std::f64::consts::PI))
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
