//! Turn assignment: the unwrapped angle of every lamina or ligament landmark, found by walking
//! the spiral in the cochlear frame.
//!
//! Heights cannot order the landmarks: the basal turn of a real cochlea dips below its height at
//! 0° before it climbs. Instead, each edge's landmarks are chained: links go from a point to one
//! a little further round (0 < Δangle < 180°) at a similar radius and height, cheapest first, each
//! point taking one successor and one predecessor and no link closing a loop (a greedy path
//! cover; a link far dearer than the cover's typical link is cut). Along a chain the angle grows
//! by the wrapped steps. Which end is the base follows from the radius, which falls toward the
//! apex, and the height, which rises overall; that also gives the handedness. Points the main
//! chain leaves out (stray or duplicate clicks, the pieces of a noisy trace) are put on the turn
//! whose curve lies nearest them, the curve continued past its ends; a point whose alternative
//! turn lies about as near as its own is reported as ambiguous rather than guessed silently.
//!
//! Angles in degrees, lengths in mm. The row order of the input never matters.

use crate::frame::{Frame, Handedness, v3::V};

/// A link's cost is arc-like travel (r̄·Δangle) plus this many times the change in radius and height:
/// along a turn radius and height change slowly, between turns they jump.
const STEP_WEIGHT: f64 = 4.0;
/// A link may change radius + height by at most this fraction of the median radius, plus
/// `JUMP_PER_RAD` of it per radian of angle step (a coarse trace over a dipping basal turn climbs
/// or sinks ~0.5 mm between landmarks 30° apart).
const MAX_JUMP: f64 = 0.3;
const JUMP_PER_RAD: f64 = 0.6;
/// A link dearer than this many times the median link of a first cover is left out.
const MAX_LINK_COST: f64 = 6.0;
/// Angle steps below this (degrees) do not link: a duplicate click is placed by matching instead.
const MIN_STEP_DEG: f64 = 0.01;
/// An alternative turn nearer than this many times the point's own distance makes it ambiguous…
const AMBIGUOUS_RATIO: f64 = 2.0;
/// …when the point also lies more than this fraction of the way across the gap to that turn.
const ACROSS: f64 = 0.6;

/// Turn assignment of the partition landmarks of both edges.
#[derive(Clone, Debug, Default)]
pub struct Turns {
    /// Unwrapped angle (degrees) of each lamina point, in input order.
    pub lamina: Vec<f64>,
    /// Unwrapped angle (degrees) of each ligament point, in input order.
    pub ligament: Vec<f64>,
    /// The spiral advances against the frame's handedness (angles were negated to grow apically).
    pub reversed: bool,
    /// Points that could belong to another turn: (edge 0 = lamina / 1 = ligament, index within the
    /// edge, assigned angle, alternative angle), degrees.
    pub ambiguous: Vec<(usize, usize, f64, f64)>,
}

/// One point in cochlear coordinates: radius (mm), wrapped angle (deg), height (mm).
#[derive(Clone, Copy, Debug)]
struct Cyl {
    r: f64,
    a: f64,
    z: f64,
}

/// The handedness of a specimen from its partition landmarks (stack mm), given a right-handed
/// frame: Left when the spiral advances clockwise about the axis seen from the apex.
pub fn handedness(right: &Frame, lamina: &[V], ligament: &[V]) -> Handedness {
    if assign(right, lamina, ligament).reversed { Handedness::Left } else { Handedness::Right }
}

/// Assigns turns to the lamina and ligament points (stack mm) in `frame`.
///
/// ```
/// use ductline::frame::{Frame, Handedness};
/// let f = Frame::new([0.0; 3], [0.0, 0.0, 1.0], [1.0, 0.0, 0.0], Handedness::Right).unwrap();
/// // two and a half turns every 30°, radius shrinking, height dipping before it climbs; rows shuffled
/// let mut lam: Vec<[f64; 3]> = (0..=30).map(|k| {
///     let t = 30.0 * k as f64;
///     f.to_stack(3.0 - t / 450.0, t, 0.002 * t - 0.6 * (t.to_radians() / 2.0).sin().powi(2) * (t < 360.0) as u8 as f64)
/// }).collect();
/// lam.reverse();
/// let turns = ductline::spiral::assign(&f, &lam, &[]);
/// assert!(!turns.reversed && turns.ambiguous.is_empty());
/// assert!((turns.lamina[0] - 900.0).abs() < 1e-9 && turns.lamina[30].abs() < 1e-9);
/// ```
pub fn assign(frame: &Frame, lamina: &[V], ligament: &[V]) -> Turns {
    let cyl = |pts: &[V]| -> Vec<Cyl> {
        pts.iter()
            .map(|p| {
                let c = frame.to_cochlear(*p);
                Cyl { r: c[0], a: c[1], z: c[2] }
            })
            .collect()
    };
    let mut pts = [cyl(lamina), cyl(ligament)];
    // each edge's chains, the longest first, each unwrapped along its links
    let mut chains: [Vec<Chain>; 2] = [chain(&pts[0]), chain(&pts[1])];
    // direction: the base end has the larger radius and the lower height
    let score: f64 = (0..2).filter_map(|e| chains[e].first().map(|c| c.apex_score(&pts[e]))).sum();
    let reversed = score < 0.0;
    if reversed {
        for e in 0..2 {
            chains[e].iter_mut().flat_map(|c| c.theta.iter_mut()).for_each(|t| *t = -*t);
            chains[e].iter_mut().for_each(|c| {
                c.idx.reverse();
                c.theta.reverse();
            });
            pts[e].iter_mut().for_each(|p| p.a = -p.a);
        }
    }
    // the other chains of an edge are placed, longest first, on the turns where the curve of
    // the chains placed so far lies nearest (a chain of three or more placed unambiguously joins
    // that curve, so a short piece near the apex is placed against the turn before it, not
    // against a curve that ends a turn short of it)
    let mut theta = [vec![f64::NAN; pts[0].len()], vec![f64::NAN; pts[1].len()]];
    let mut ambiguous = vec![];
    for e in 0..2 {
        let Some(main) = chains[e].first() else { continue };
        let mut placed: Vec<(f64, usize)> = main.theta.iter().copied().zip(main.idx.iter().copied()).collect();
        let mut curve = Curve::new(&main.idx, &main.theta, &pts[e]);
        for (k, c) in chains[e].iter().enumerate() {
            let (shift, alt) = if k == 0 { (0.0, None) } else { curve.place(c, &pts[e]) };
            for (&i, &t) in c.idx.iter().zip(&c.theta) {
                theta[e][i] = t + shift;
                if let Some(alt) = alt {
                    ambiguous.push((e, i, t + shift, t + alt));
                }
            }
            if k > 0 && c.idx.len() >= 3 && alt.is_none() {
                placed.extend(c.theta.iter().map(|t| t + shift).zip(c.idx.iter().copied()));
                placed.sort_by(|a, b| a.0.total_cmp(&b.0));
                let (t, idx): (Vec<f64>, Vec<usize>) = placed.iter().copied().unzip();
                curve = Curve::new(&idx, &t, &pts[e]);
            }
        }
    }
    // the basal end of the ligament (else the lamina) in [−90°, 270°); both edges move together
    if let Some(base) = min_finite(&theta[1]).or(min_finite(&theta[0])) {
        let shift = -360.0 * ((base + 90.0) / 360.0).floor();
        theta.iter_mut().flatten().for_each(|t| *t += shift);
        ambiguous.iter_mut().for_each(|a| (a.2, a.3) = (a.2 + shift, a.3 + shift));
    }
    // the lamina on the ligament's turns: the whole-turn shift that brings its points nearest
    if let (Some(lig), false) = (chains[1].first(), pts[0].is_empty()) {
        let curve = Curve::new(&lig.idx, &lig.idx.iter().map(|&i| theta[1][i]).collect::<Vec<_>>(), &pts[1]);
        let k = curve.turn_shift(&theta[0], &pts[0]);
        theta[0].iter_mut().for_each(|t| *t += 360.0 * k);
        ambiguous.iter_mut().filter(|a| a.0 == 0).for_each(|a| (a.2, a.3) = (a.2 + 360.0 * k, a.3 + 360.0 * k));
    }
    // points of a main chain that lie about as near another turn of it as their own place
    for e in 0..2 {
        let Some(main) = chains[e].first() else { continue };
        let t: Vec<f64> = main.idx.iter().map(|&i| theta[e][i]).collect();
        let curve = Curve::new(&main.idx, &t, &pts[e]);
        for (k, &i) in main.idx.iter().enumerate() {
            let (own, at) = curve.leave_one_out(k);
            for alt in [t[k] - 360.0, t[k] + 360.0] {
                if alt < t[0] || alt > t[t.len() - 1] {
                    continue;
                }
                // nearer the other turn than most of the way across the gap between the turns
                let d = curve.dist(alt, pts[e][i]);
                if d < AMBIGUOUS_RATIO * own && d < ACROSS * curve.dist(alt, at) {
                    ambiguous.push((e, i, t[k], alt));
                }
            }
        }
    }
    ambiguous.sort_by_key(|a| (a.0, a.1));
    ambiguous.dedup_by(|a, b| a.0 == b.0 && a.1 == b.1);
    let [lamina, ligament] = theta;
    Turns { lamina, ligament, reversed, ambiguous }
}

fn min_finite(v: &[f64]) -> Option<f64> {
    v.iter().copied().filter(|x| x.is_finite()).reduce(f64::min)
}

/// A chain of points (indices into its edge) with the unwrapped angle of each (degrees), in
/// order of growing angle.
#[derive(Clone, Debug)]
struct Chain {
    idx: Vec<usize>,
    theta: Vec<f64>,
}

impl Chain {
    fn span(&self) -> f64 {
        self.theta[self.theta.len() - 1] - self.theta[0]
    }

    /// Positive when the chain runs base → apex: the radius falls (counted double) and the height
    /// rises along it, from least-squares slopes over the whole chain (mm over its span).
    fn apex_score(&self, pts: &[Cyl]) -> f64 {
        let n = self.idx.len() as f64;
        let mt = self.theta.iter().sum::<f64>() / n;
        let sxx: f64 = self.theta.iter().map(|t| (t - mt).powi(2)).sum();
        if !(sxx > 0.0) {
            return 0.0;
        }
        let change = |y: &dyn Fn(&Cyl) -> f64| -> f64 {
            let my = self.idx.iter().map(|&i| y(&pts[i])).sum::<f64>() / n;
            let sxy: f64 = self.idx.iter().zip(&self.theta).map(|(&i, t)| (t - mt) * (y(&pts[i]) - my)).sum();
            sxy / sxx * self.span()
        };
        -2.0 * change(&|p| p.r) + change(&|p| p.z)
    }
}

/// The greedy path cover of one edge's points: chains sorted by angular span, longest first.
fn chain(pts: &[Cyl]) -> Vec<Chain> {
    let n = pts.len();
    let mut radii: Vec<f64> = pts.iter().map(|p| p.r).collect();
    radii.sort_by(f64::total_cmp);
    let rbar = radii.get(n / 2).copied().unwrap_or(0.0);
    let step = |i: usize, j: usize| (pts[j].a - pts[i].a).rem_euclid(360.0);
    let mut links = vec![];
    for i in 0..n {
        for j in 0..n {
            let d = step(i, j);
            let jump = (pts[j].r - pts[i].r).abs() + (pts[j].z - pts[i].z).abs();
            if i == j || !(MIN_STEP_DEG..180.0).contains(&d) || jump > (MAX_JUMP + JUMP_PER_RAD * d.to_radians()) * rbar {
                continue;
            }
            let cost = 0.5 * (pts[i].r + pts[j].r) * d.to_radians() + STEP_WEIGHT * jump;
            links.push((cost, i, j));
        }
    }
    links.sort_by(|a, b| a.0.total_cmp(&b.0).then((a.1, a.2).cmp(&(b.1, b.2))));
    // the cover, then again without the links dearer than six times the median link it took: in
    // a noisy trace two chains can zig-zag through one turn, and the one left over at a turn's
    // end then reaches back a quarter turn to another turn (a jump its own turn never makes);
    // cut there, the pieces are placed on their turns like stray points
    let (mut succ, mut pred) = cover(n, &links, f64::INFINITY);
    let mut taken: Vec<f64> = links.iter().filter(|l| succ[l.1] == l.2).map(|l| l.0).collect();
    if !taken.is_empty() {
        taken.sort_by(f64::total_cmp);
        (succ, pred) = cover(n, &links, MAX_LINK_COST * taken[taken.len() / 2]);
    }
    let mut out: Vec<Chain> = (0..n)
        .filter(|&i| pred[i] == usize::MAX)
        .map(|start| {
            let (mut idx, mut theta) = (vec![start], vec![pts[start].a]);
            let mut i = start;
            while succ[i] != usize::MAX {
                let j = succ[i];
                theta.push(theta[theta.len() - 1] + step(i, j));
                idx.push(j);
                i = j;
            }
            Chain { idx, theta }
        })
        .collect();
    out.sort_by(|a, b| b.span().total_cmp(&a.span()).then(b.idx.len().cmp(&a.idx.len())).then(a.idx[0].cmp(&b.idx[0])));
    out
}

/// The greedy path cover of `n` points by `links` (cost, from, to), cheapest first, each point
/// taking one successor and one predecessor and no link closing a loop, links dearer than
/// `max_cost` left out: (successor, predecessor) of each point, `usize::MAX` for none.
fn cover(n: usize, links: &[(f64, usize, usize)], max_cost: f64) -> (Vec<usize>, Vec<usize>) {
    let (mut succ, mut pred) = (vec![usize::MAX; n], vec![usize::MAX; n]);
    let mut root: Vec<usize> = (0..n).collect();
    fn find(root: &mut [usize], mut i: usize) -> usize {
        while root[i] != i {
            root[i] = root[root[i]];
            i = root[i];
        }
        i
    }
    for &(cost, i, j) in links {
        if cost > max_cost || succ[i] != usize::MAX || pred[j] != usize::MAX {
            continue;
        }
        let (ri, rj) = (find(&mut root, i), find(&mut root, j));
        if ri == rj {
            continue;
        }
        root[ri] = rj;
        succ[i] = j;
        pred[j] = i;
    }
    (succ, pred)
}

/// An edge's curve from its main chain: radius and height, piecewise linear in angle (degrees),
/// held constant beyond the ends.
struct Curve {
    t: Vec<f64>,
    r: Vec<f64>,
    z: Vec<f64>,
}

impl Curve {
    fn new(idx: &[usize], theta: &[f64], pts: &[Cyl]) -> Curve {
        Curve { t: theta.to_vec(), r: idx.iter().map(|&i| pts[i].r).collect(), z: idx.iter().map(|&i| pts[i].z).collect() }
    }

    /// (radius, height) at angle `t`.
    fn at(&self, t: f64) -> (f64, f64) {
        let n = self.t.len();
        if n == 1 || t <= self.t[0] {
            return (self.r[0], self.z[0]);
        }
        if t >= self.t[n - 1] {
            return (self.r[n - 1], self.z[n - 1]);
        }
        let k = self.t.partition_point(|&x| x <= t).clamp(1, n - 1);
        let f = (t - self.t[k - 1]) / (self.t[k] - self.t[k - 1]).max(1e-12);
        (self.r[k - 1] + f * (self.r[k] - self.r[k - 1]), self.z[k - 1] + f * (self.z[k] - self.z[k - 1]))
    }

    /// (radius, height) at angle `t`, continued beyond the ends along the straight line through
    /// the curve's last (first) quarter turn, the radius kept above zero: a chain lying past the
    /// curve's end is compared with where the spiral goes, not with its end held still (a trace
    /// whose one stray point split the apical turn off its chain had that turn put a turn lower).
    fn at_extended(&self, t: f64) -> (f64, f64) {
        let n = self.t.len();
        let (end, from) = if t > self.t[n - 1] {
            (n - 1, self.t.partition_point(|&x| x < self.t[n - 1] - 90.0).min(n - 1))
        } else if t < self.t[0] {
            (0, self.t.partition_point(|&x| x <= self.t[0] + 90.0).saturating_sub(1))
        } else {
            return self.at(t);
        };
        let dt = self.t[end] - self.t[from];
        if dt.abs() < 1e-9 {
            return self.at(t);
        }
        let f = (t - self.t[end]) / dt;
        ((self.r[end] + f * (self.r[end] - self.r[from])).max(0.0), self.z[end] + f * (self.z[end] - self.z[from]))
    }

    /// Distance (mm, in the radius–height plane) of a point from the curve at angle `t` (continued
    /// past its ends, see [`Curve::at_extended`]).
    fn dist(&self, t: f64, p: Cyl) -> f64 {
        let (r, z) = self.at_extended(t);
        (p.r - r).hypot(p.z - z)
    }

    /// Distance of the curve's own k-th point from the line through its neighbours, and the
    /// point on that line (where the curve would pass without it).
    fn leave_one_out(&self, k: usize) -> (f64, Cyl) {
        let n = self.t.len();
        let (r, z) = match (k.checked_sub(1), (k + 1 < n).then_some(k + 1)) {
            (Some(a), Some(b)) => {
                let f = (self.t[k] - self.t[a]) / (self.t[b] - self.t[a]).max(1e-12);
                (self.r[a] + f * (self.r[b] - self.r[a]), self.z[a] + f * (self.z[b] - self.z[a]))
            }
            (Some(a), None) | (None, Some(a)) => (self.r[a], self.z[a]),
            (None, None) => return (f64::INFINITY, Cyl { r: self.r[k], a: 0.0, z: self.z[k] }),
        };
        ((self.r[k] - r).hypot(self.z[k] - z), Cyl { r, a: 0.0, z })
    }

    /// The whole-turn shift (degrees) that puts a chain nearest this curve, and a second shift
    /// when that one is about as near (ambiguous). Only shifts that keep the chain's middle within
    /// a turn of the curve's range are tried (beyond its ends the curve is continued, see
    /// [`Curve::at_extended`]).
    fn place(&self, c: &Chain, pts: &[Cyl]) -> (f64, Option<f64>) {
        let mid = 0.5 * (c.theta[0] + c.theta[c.theta.len() - 1]);
        let (lo, hi) = (self.t[0] - 360.0, self.t[self.t.len() - 1] + 360.0);
        let mut costs: Vec<(f64, f64)> = (((lo - mid) / 360.0).floor() as i64..=((hi - mid) / 360.0).ceil() as i64)
            .map(|m| 360.0 * m as f64)
            .filter(|s| (lo..=hi).contains(&(mid + s)))
            .map(|s| (c.idx.iter().zip(&c.theta).map(|(&i, &t)| self.dist(t + s, pts[i])).sum::<f64>() / c.idx.len() as f64, s))
            .collect();
        costs.sort_by(|a, b| a.0.total_cmp(&b.0));

        match costs.as_slice() {
            [] => (0.0, None),
            [(_, s)] => (*s, None),
            [(c0, s0), (c1, s1), ..] => (*s0, (*c1 < AMBIGUOUS_RATIO * *c0).then_some(*s1)),
        }
    }

    /// The number of whole turns (−1, 0 or 1) to add to the angles `theta` of the other edge's
    /// points `pts` so that, where they overlap this (ligament) curve, they lie at its height and
    /// inside its radius (median misfit, mm). A shift is taken only when it halves the misfit.
    fn turn_shift(&self, theta: &[f64], pts: &[Cyl]) -> f64 {
        let (lo, hi) = (self.t[0], self.t[self.t.len() - 1]);
        let misfit = |k: f64| -> Option<f64> {
            let mut d: Vec<f64> = theta
                .iter()
                .zip(pts)
                .map(|(t, p)| (t + 360.0 * k, p))
                .filter(|(t, _)| (lo..=hi).contains(t))
                .map(|(t, p)| {
                    let (r, z) = self.at(t);
                    (p.z - z).abs() + (p.r - r).max(0.0)
                })
                .collect();
            if d.len() < 3 {
                return None;
            }
            d.sort_by(f64::total_cmp);
            Some(d[d.len() / 2])
        };
        let here = misfit(0.0).unwrap_or(f64::INFINITY);
        [-1.0, 1.0]
            .into_iter()
            .filter_map(|k| misfit(k).map(|m| (m, k)))
            .filter(|(m, _)| *m < 0.5 * here)
            .min_by(|a, b| a.0.total_cmp(&b.0))
            .map_or(0.0, |b| b.1)
    }
}
