//! Assisted tracing (`ductline::trace`) on phantoms with analytic truth: from seven points the
//! proposals lie on the true edge curves (the phantom's `edge`, the curve its landmarks sample),
//! reach the true angular depth, and measure like the true landmarks.

use ductline::landmarks::{Kind, Landmark};
use ductline::phantom::{self, Phantom, PhantomSpec};
use ductline::progress::Progress;

/// The seven seeds: the axis and window, and the first two lamina and ligament landmarks.
fn seeds(ph: &Phantom) -> Vec<Landmark> {
    let mut out: Vec<Landmark> = ph.landmarks.iter().filter(|l| matches!(l.kind, Kind::AxisBase | Kind::AxisApex | Kind::Window)).copied().collect();
    for k in [Kind::Lamina, Kind::Ligament] {
        out.extend(ph.landmarks.iter().filter(|l| l.kind == k).take(2));
    }
    out
}

/// Distance (mm) from a stack point to the phantom's true edge curve of `kind`.
fn off_curve(ph: &Phantom, kind: Kind, p: [f64; 3], near_deg: f64) -> f64 {
    let q = ph.placement.to_local(p);
    (-400..=400)
        .map(|k| (near_deg + k as f64 * 0.05).to_radians())
        .map(|t| ductline::frame::v3::dist(q, ph.spec.edge(kind, t)))
        .fold(f64::INFINITY, f64::min)
}

fn quantile(v: &mut [f64], q: f64) -> f64 {
    v.sort_by(f64::total_cmp);
    v[((v.len() - 1) as f64 * q).round() as usize]
}

/// Prints and returns (median, p95 distance in voxels, depth reached as a share of the truth).
fn run(spec: PhantomSpec) -> (f64, f64, f64) {
    let ph = phantom::generate(&spec, &Progress::new()).unwrap();
    let t = ductline::trace::trace(&ph.stack, &seeds(&ph), 10.0).unwrap();
    let vmax = ph.stack.voxel.as_ref().unwrap().max();
    let mut d: Vec<f64> = t.proposed.iter().map(|p| off_curve(&ph, p.lm.kind, p.lm.p, p.angle_deg) / vmax).collect();
    let (med, p95) = (quantile(&mut d, 0.5), quantile(&mut d, 0.95));
    let depth = t.stopped_deg / spec.theta_max().to_degrees();
    eprintln!(
        "voxel {:?}: {} proposals, off the true edges median {med:.2} / p95 {p95:.2} voxels, to {:.0}° of {:.0}° ({:.0} %): {}",
        spec.voxel_um,
        t.proposed.len(),
        t.stopped_deg,
        spec.theta_max().to_degrees(),
        100.0 * depth,
        t.reason
    );
    (med, p95, depth)
}

#[test]
fn proposals_follow_the_true_edges() {
    run(PhantomSpec { voxel_um: [40.0; 3], ..Default::default() });
    let only: Option<u64> = std::env::var("DL_ONLY").ok().and_then(|x| x.parse().ok());
    for (n, v) in [(3, [50.0; 3]), (7, [40.0; 3]), (10, [30.0; 3]), (8, [35.0, 35.0, 50.0])] {
        if only.is_some_and(|o| o != n) {
            continue;
        }
        run(PhantomSpec { truth_step_deg: 30.0, ..PhantomSpec::variant(n, v) });
    }
}
