//! Assisted tracing (`ductline::trace`) on phantoms with analytic truth: from seven points the
//! proposals lie on the true edge curves (the phantom's `edge`, the curve its landmarks sample),
//! reach the true angular depth, and measure like the true landmarks.

use ductline::landmarks::{Kind, Landmark};
use ductline::phantom::{self, Phantom, PhantomSpec};
use ductline::progress::Progress;

mod common;

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
    (-400..=400).map(|k| (near_deg + k as f64 * 0.05).to_radians()).map(|t| ductline::frame::v3::dist(q, ph.spec.edge(kind, t))).fold(f64::INFINITY, f64::min)
}

/// Prints and returns (median, p95 distance in voxels, depth reached as a share of the truth).
fn run(spec: PhantomSpec) -> (f64, f64, f64) {
    let (med, p95, depth, _) = run_kinds(spec);
    (med, p95, depth)
}

/// [`run`], and the ligament proposals' median distance (voxels) from the true ligament curve.
fn run_kinds(spec: PhantomSpec) -> (f64, f64, f64, f64) {
    let ph = phantom::generate(&spec, &Progress::new()).unwrap();
    let t = ductline::trace::trace(&ph.stack, &seeds(&ph), 10.0).unwrap();
    let vmax = ph.stack.voxel.as_ref().unwrap().max();
    let d: Vec<f64> = t.proposed.iter().map(|p| off_curve(&ph, p.lm.kind, p.lm.p, p.angle_deg) / vmax).collect();
    let lig: Vec<f64> = t.proposed.iter().zip(&d).filter(|(p, _)| p.lm.kind == Kind::Ligament).map(|(_, &x)| x).collect();
    let (med, p95, lig) = (common::quantile(&d, 0.5), common::quantile(&d, 0.95), common::quantile(&lig, 0.5));
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
    (med, p95, depth, lig)
}

/// A phantom traced from its seven seeds and measured from the proposals at 0.25 mm steps, with
/// the traced length (mm) from the first row to the row nearest the truth's last angle — or the
/// trace's end, where that comes first — the phantom's length over the same span (mm), and that
/// row's angle (°), and the angle where the trace stopped (°).
fn measure_traced(spec: &PhantomSpec) -> (phantom::Phantom, ductline::pipeline::Outcome, (f64, f64, f64, f64)) {
    let ph = phantom::generate(spec, &Progress::new()).unwrap();
    let s = seeds(&ph);
    let t = ductline::trace::trace(&ph.stack, &s, 10.0).unwrap();
    let text = ductline::trace::to_csv(&s, &t);
    let lms = ductline::landmarks::parse_csv(&text, std::path::Path::new("traced.csv"), Some(&ph.stack)).unwrap();
    assert_eq!(lms.len(), s.len() + t.proposed.len());
    let ms = ductline::measure::MeasureSettings { step_mm: 0.25, ..Default::default() };
    let gw = ductline::cochlea::Greenwood::preset("human").unwrap();
    let out = ductline::pipeline::run(&ph.stack, &lms, &ductline::centreline::FitSettings::default(), &ms, &[], &gw, &Progress::new()).unwrap();
    // the traced depth may pass the landmarks' last angle (the phantom's duct runs on):
    // compare over the truth's span
    let tmax = spec.theta_max().to_degrees();
    let at = out.rows.iter().min_by(|a, b| (a.angle_deg - tmax).abs().total_cmp(&(b.angle_deg - tmax).abs())).unwrap();
    let len = at.s_mm - out.rows[0].s_mm;
    let want = common::truth_at(&ph.truth, at.angle_deg, |r| r.s_mm) - common::truth_at(&ph.truth, out.rows[0].angle_deg, |r| r.s_mm);
    let angle = at.angle_deg;
    (ph, out, (len, want, angle, t.stopped_deg))
}

/// At clinical resolution (200 µm) the partition never shows past the seeds and the lamina tip is
/// guessed from the lumen all the way. A real osseous lamina's share of the duct's width falls
/// toward the apex (the basilar membrane widens from 0.08–0.16 mm to 0.42–0.65 mm, REFERENCES.md)
/// as does the family's (its shelf spans 45–60 % of the duct at the base, 25–35 % at the apex).
/// Kept at the seeds' share, the tip drifted 0.16–0.33 mm outward over the trace's last fifth
/// (median; now 0.02–0.17 mm), and the midlines of the twelve members came out +1.9 to +4.8 %
/// long and member 9, its ligament guessed 0.1–0.2 mm out, +6.7 % (3.6 % on average); then +0.7
/// to +3.4 % and +5.7 % (1.8 % on average). The ligament guessed on the lumen's outer edge sat
/// up to 0.16 mm out by the second turn, the edge read half the way from a lumen level that the
/// far wall's blur lifts as the duct narrows; read from the lumen's share of the wall's level at
/// the seeds (`outer_edge` in src/trace.rs), now +0.6 to +3.1 % and +4.8 % (1.6 % on average).
/// The midline traced from seven points is held within 5 % of the phantom's length on every
/// member (the real-CT check) and 1.75 % on average; the old reading fails both.
#[test]
fn clinical_resolution_200um_midline_length() {
    let mut errs = vec![];
    for n in 0..12 {
        let spec = PhantomSpec { truth_step_deg: 10.0, ..PhantomSpec::variant(n, [200.0; 3]) };
        let (_, _, (len, want, at, _)) = measure_traced(&spec);
        let e = 100.0 * (len / want - 1.0);
        eprintln!("member {n} at 200 µm: traced midline to {at:.0}°: {len:.3} mm, phantom {want:.3} mm ({e:+.2} %)");
        assert!(e.abs() <= 5.0, "member {n}: traced length {len:.3} mm vs {want:.3} mm ({e:+.2} %)");
        errs.push(e.abs());
    }
    let mean = errs.iter().sum::<f64>() / errs.len() as f64;
    eprintln!("mean |error| {mean:.2} %");
    assert!(mean <= 1.75, "traced lengths at 200 µm: mean |error| {mean:.2} %");
}

/// At 300 µm (clinical CT) the duct is two to six voxels across and every point is a guess from
/// its blob. A blob under 1.5 voxels in radius used to end the trace: the family's members
/// stopped at 1–81 % of the depth (three under 10 %). Now one under a voxel does (`MIN_RHO_VOX`
/// in src/trace.rs): eight of the twelve reach 98 % or more, their midlines +0.4 to +5.4 % long;
/// members 1 and 6 stop at 63 and 78 % (the partition guessed turning outward), 8 and 9 (blur
/// 1.3 and 1.24 voxels, 0.37–0.39 mm) lose the lumen at 40 and 12 %. With the outer edge read
/// from the seeds' lumen share (see `clinical_resolution_200um_midline_length`) the eight read
/// −0.8 to +3.8 % (member 2 now stops at 92 %). Held: at least eight members reach 90 % of the
/// depth, and each that does has its midline within 5 % (member 5 read +5.4 % before).
#[test]
fn clinical_resolution_300um_follows_the_lumen() {
    let mut reached = 0;
    for n in 0..12 {
        let spec = PhantomSpec { truth_step_deg: 10.0, ..PhantomSpec::variant(n, [300.0; 3]) };
        let tmax = spec.theta_max().to_degrees();
        let (_, _, (len, want, at, stopped)) = measure_traced(&spec);
        let e = 100.0 * (len / want - 1.0);
        eprintln!("member {n} at 300 µm: stopped at {stopped:.0}° of {tmax:.0}°; midline to {at:.0}°: {len:.3} mm, phantom {want:.3} mm ({e:+.2} %)");
        if stopped >= 0.9 * tmax {
            reached += 1;
            assert!(e.abs() <= 5.0, "member {n} at 300 µm: traced length {len:.3} mm vs {want:.3} mm ({e:+.2} %)");
        }
    }
    assert!(reached >= 8, "{reached} of 12 members traced to 90 % of the depth at 300 µm");
}

/// From seven points, on the default phantom and on family members at 30–80 µm (thin shelf
/// tapering toward the apex, limbus, ligament, scanner effects; left and right ears, tilted,
/// anisotropic voxels): the proposals lie within 1 voxel (median) and 2 voxels (p95) of the true
/// edge curves and reach at least 95 % of the true angular depth, and no more than 40° past it
/// (the duct runs 25° on). Members 1 (70 µm, blur 1.1 voxels), 2 (60 × 60 × 80 µm, contrast to
/// noise 9) and 8 (35 × 35 × 50 µm, tilted 49°) strayed 2.9, 4.0 and 5.7 voxels (p95) before each
/// step read a slab of cuts (a shelf too faint in one cut), the guesses kept a median offset and
/// a ligament on a wall as thin as the blur was fitted; now 1.5, 0.7 and 0.7. Member 13 (40 µm,
/// blur 1.47 voxels: the shelf faint) was guessed from the lumen over 280–580°, the guesses
/// drifted up to 7.5 voxels in height and the partition, beyond the search band, was never found
/// again (0.96/7.26 voxels median/p95); since a step that misses it looks again at other heights
/// within the lumen's middle half (`trace::trace`), 0.47/1.48 — and member 12 (45 µm, a narrow
/// membrane) 0.16/0.72 → 0.15/0.63, member 9 (65 µm) unchanged at 0.56/1.16. Member 8 drawn at
/// isotropic 35 µm (the family draws it at 35 × 35 × 50) lost the partition at 620° and its
/// guesses, placed by the partition's offsets from steps long before (the lumen's blob had not
/// been found for a stretch), stayed 4–10 voxels off to the apex (0.52/8.64); with the offsets
/// from the last 90° only (`trace::CAL_WINDOW_DEG`), 0.39/1.32 (and member 13 0.44/1.27, member
/// 1 0.63/1.15, member 2 0.28/0.56, the rest within 0.03 voxel).
#[test]
fn proposals_follow_the_true_edges() {
    let only: Option<u64> = std::env::var("DL_ONLY").ok().and_then(|x| x.parse().ok());
    let mut cases = vec![(None, PhantomSpec { voxel_um: [40.0; 3], ..Default::default() })];
    for (n, v) in [
        (3, [50.0; 3]),
        (7, [40.0; 3]),
        (10, [30.0; 3]),
        (8, [35.0, 35.0, 50.0]),
        (1, [70.0; 3]),
        (2, [60.0, 60.0, 80.0]),
        (13, [40.0; 3]),
        (12, [45.0; 3]),
        (9, [65.0; 3]),
        (8, [35.0; 3]),
    ] {
        cases.push((Some(n), PhantomSpec { truth_step_deg: 30.0, ..PhantomSpec::variant(n, v) }));
    }
    for (n, spec) in cases {
        if only.is_some_and(|o| Some(o) != n) {
            continue;
        }
        let tmax = spec.theta_max().to_degrees();
        let (med, p95, depth) = run(spec);
        assert!(med <= 1.0 && p95 <= 2.0, "member {n:?}: off the edges median {med:.2}, p95 {p95:.2} voxels");
        assert!(depth >= 0.95 && depth * tmax <= tmax + 40.0, "member {n:?}: reached {:.0} % of the depth", 100.0 * depth);
    }
}

/// At clinical CT resolution (150 µm) the bony shelf and the membrane are far thinner than a
/// voxel: the tracer follows the lumen instead (the duct's blob in each cut, the partition's ends
/// kept where they lay relative to it at the seeds) and marks those points as guesses (confidence
/// under 0.5). Members 0, 1 (a left ear, whose seeds on the window's own line used to turn the
/// frame the wrong way), 5 and 11 (air-filled): before, no proposal at all; now at least 95 % of
/// the true depth, proposals within 1.5 voxels of the true edges (median), no more than 45° past
/// the last landmark (the phantom's duct runs 25° past it; beyond, the tracer used to follow the
/// apical cap or the modiolus for up to 60° more, lengthening the midline by up to 10 %; member 1
/// runs 43° past since ducts under five voxels in radius are cut nearer the lumen, `FEW_VOXELS`
/// in src/trace.rs, with its length from the proposals +1.9 % where it was +2.9 %).
#[test]
fn clinical_resolution_follows_the_lumen() {
    for n in [0, 1, 5, 11] {
        let spec = PhantomSpec { truth_step_deg: 30.0, ..PhantomSpec::variant(n, [150.0; 3]) };
        let tmax = spec.theta_max().to_degrees();
        let (med, _, depth) = run(spec);
        assert!(depth >= 0.95 && depth * tmax <= tmax + 45.0, "member {n}: reached {:.0} % of the depth", 100.0 * depth);
        assert!(med <= 1.5, "member {n}: off the edges median {med:.2} voxels");
    }
}

/// At 200 µm (clinical CT) members 6, 8 and 9 lost the duct in the basal turn: its blob, cut
/// 40 % of the way from the lumen to the bright surroundings, took in the soft tissue beside it,
/// swelled and drifted, and the trace stopped at 190–420° (21–48 % of the depth). Ducts under
/// five voxels in radius are now cut at 30 % (`FEW_VOXELS` in src/trace.rs): each reaches at
/// least 90 % of the depth (99–103 %) and no more than 45° past it.
///
/// There every point past the seeds is a guess, and the ligament, kept where it lay relative to
/// the duct's blob in units of the blob's size, drifted outward turn by turn (the blob is about
/// as large at the apex as at the base; member 9's ligament 0.41 mm = 2 voxels out, median,
/// its midline 11 % long). It is now put on the lumen's outer edge, as far past it as at the
/// seeds (`outer_edge` in src/trace.rs): within one voxel of the true ligament curve (median;
/// members 6, 8, 9: 0.1–0.7).
#[test]
fn clinical_resolution_200um_keeps_the_duct() {
    for n in [6, 8, 9] {
        let spec = PhantomSpec { truth_step_deg: 30.0, ..PhantomSpec::variant(n, [200.0; 3]) };
        let tmax = spec.theta_max().to_degrees();
        let (_, _, depth, lig) = run_kinds(spec);
        assert!(depth >= 0.9 && depth * tmax <= tmax + 45.0, "member {n}: reached {:.0} % of the depth", 100.0 * depth);
        assert!(lig <= 1.0, "member {n}: the ligament proposals lie {lig:.2} voxels off the true curve (median)");
    }
}

/// A basal basilar membrane as narrow as a real cochlea's (REFERENCES.md: about 0.08–0.16 mm at
/// the base, widening toward the apex): the default phantom with the bony shelf spanning 91 %
/// of the duct's width at the base and 40 % at the apex (partition 0.16 → 0.5 mm). The seeds'
/// partition is then two to four voxels wide and its midpoint lies by the lateral wall; the first
/// search for the duct's blob took the partition's width for the duct's size and found a sliver,
/// so at 80 µm, where the partition does not show, the trace stopped at 25° (3 % of the depth);
/// now it reaches at least 90 % (103 %: the duct runs 25° on).
///
/// At 40 µm with scanner noise (contrast to noise 12, blur one voxel; also with a duct as wide as
/// a human basal turn's, half-width 0.85 mm, and a 0.05 mm shelf) the partition is followed: the
/// proposals lie within 1 voxel (median) and 2 voxels (p95) of the true edges. Before, the
/// search windows scaled with the predicted partition (a voxel or two to read the shelf's level
/// inside its tip), the lamina tip was lost inward as the membrane widened faster than predicted,
/// and the guesses that stood in kept the seeds' place relative to the duct: both cases 1.3 and
/// 1.1 voxels off (median), 11 (p95); the lamina tips alone 7.3 and 8.4 (median). Family member
/// 12 (45 µm, contrast to noise 9.6, the membrane 0.18 → 0.48 mm) lost the partition at 450° and
/// stopped at 530° of 925° while the shelf's level was read from a window the widening membrane
/// reached into. At 80 µm the 0.03 mm shelf is a third of a voxel thick and often guessed
/// (printed, not held).
#[test]
fn a_narrow_basal_membrane() {
    let narrow = PhantomSpec { shelf_fraction: [0.91, 0.4], truth_step_deg: 30.0, ..Default::default() };
    let mut noisy = PhantomSpec { voxel_um: [40.0; 3], blur_vox: 1.0, ..narrow.clone() };
    noisy.scanner.cnr = Some(12.0);
    let wide_duct = PhantomSpec { half_width_mm: [0.85, 0.42], shelf_thickness_mm: 0.05, ..noisy.clone() };
    let member12 = PhantomSpec { truth_step_deg: 30.0, ..PhantomSpec::variant(12, [45.0; 3]) };
    for (name, spec, follows) in [
        ("40 µm, noisy", noisy, true),
        ("40 µm, noisy, a wide duct", wide_duct, true),
        ("family member 12 at 45 µm", member12, true),
        ("80 µm", PhantomSpec { voxel_um: [80.0; 3], ..narrow }, false),
    ] {
        let (med, p95, depth) = run(spec);
        assert!(depth >= 0.9, "{name}: reached {:.0} % of the depth", 100.0 * depth);
        assert!(!follows || (med <= 1.0 && p95 <= 2.0), "{name}: off the edges median {med:.2}, p95 {p95:.2} voxels");
    }
}

/// The proposals (seeds included) written as an ordinary landmark CSV measure like the truth:
/// length within 0.5 % and SV/ST areas within 1.5 % (median) and 4 % (p95) of the analytic truth
/// over the sections at least 30° from either end — on the default phantom at 40 µm and on
/// family members 5 (45 µm: limbus, a shelf tapering to 0.015 mm, cupping and rings, contrast to
/// noise 21) and 10 (30 µm, a left ear tilted 51°). The README gives the whole family's numbers
/// (members whose measure from the true landmarks already misses 1.5 % do not make it from
/// proposals either).
#[test]
fn proposals_measure_like_the_truth() {
    let only: Option<u64> = std::env::var("DL_ONLY").ok().and_then(|x| x.parse().ok());
    let cases = [
        (None, PhantomSpec { voxel_um: [40.0; 3], truth_step_deg: 5.0, ..Default::default() }),
        (Some(5), PhantomSpec { truth_step_deg: 5.0, ..PhantomSpec::variant(5, [45.0; 3]) }),
        (Some(10), PhantomSpec { truth_step_deg: 5.0, ..PhantomSpec::variant(10, [30.0; 3]) }),
    ];
    for (n, spec) in cases {
        if only.is_some_and(|o| Some(o) != n) {
            continue;
        }
        let (ph, out, (len, want, at, _)) = measure_traced(&spec);
        let tmax = spec.theta_max().to_degrees();
        let truth_at = |a: f64, f: fn(&phantom::TruthRow) -> f64| common::truth_at(&ph.truth, a, f);
        eprintln!("member {n:?}: traced length to {at:.0}°: {len:.3} mm, phantom {want:.3} mm");
        assert!((len / want - 1.0).abs() < 0.005, "member {n:?}: length {len} vs {want}");
        for (name, get, truth) in [
            (
                "SV",
                (|r: &ductline::measure::Row| r.sv.area) as fn(&ductline::measure::Row) -> Option<f64>,
                (|t: &phantom::TruthRow| t.sv_area_mm2) as fn(&phantom::TruthRow) -> f64,
            ),
            ("ST", |r| r.st.area, |t| t.st_area_mm2),
        ] {
            let e: Vec<f64> =
                common::inner_rows(&out.rows, tmax, 30.0).filter_map(|r| get(r).map(|a| (a / truth_at(r.angle_deg, truth) - 1.0).abs())).collect();
            let (med, p95) = (common::quantile(&e, 0.5), common::quantile(&e, 0.95));
            eprintln!("member {n:?} {name}: area error median {:.2} %, p95 {:.2} % over {} sections", 100.0 * med, 100.0 * p95, e.len());
            assert!(e.len() > 100 && med <= 0.015 && p95 <= 0.04, "member {n:?} {name}: median {med}, p95 {p95}");
        }
    }
}

/// Snapping a click (`trace::snap`): guesses 1.5 voxels off the true lamina tip and ligament
/// point, in a random direction, land within one voxel (median) and 1.5 voxels (p95) of the true
/// edge curves, on the default phantom at 40 µm and a fluid-filled family member at 45 µm, at
/// angles over the whole spiral (a snap stays at the angle of the click; the cut there decides).
#[test]
fn snap_lands_on_the_edges() {
    for spec in [PhantomSpec { voxel_um: [40.0; 3], ..Default::default() }, PhantomSpec { truth_step_deg: 30.0, ..PhantomSpec::variant(5, [45.0; 3]) }] {
        let ph = phantom::generate(&spec, &Progress::new()).unwrap();
        let vmax = ph.stack.voxel.as_ref().unwrap().max();
        let frame = ductline::landmarks::frame_from(&ph.landmarks).unwrap();
        let (mut off, mut missed) = (vec![], 0);
        let mut seed = 7u64;
        let mut rnd = || {
            seed = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            (seed >> 11) as f64 / (1u64 << 53) as f64
        };
        for a in (20..(spec.theta_max().to_degrees() as i64 - 20)).step_by(37) {
            let t = (a as f64).to_radians();
            let truth = |k: Kind| ph.placement.to_stack(ph.spec.edge(k, t));
            let mut jitter = |p: [f64; 3]| {
                let (u, v) = (rnd() * std::f64::consts::TAU, rnd() * std::f64::consts::PI);
                [p[0] + 1.5 * vmax * u.cos() * v.sin(), p[1] + 1.5 * vmax * u.sin() * v.sin(), p[2] + 1.5 * vmax * v.cos()]
            };
            let (gl, gg) = (jitter(truth(Kind::Lamina)), jitter(truth(Kind::Ligament)));
            let Some((l, g)) = ductline::trace::snap(&ph.stack, &frame, gl, gg) else {
                missed += 1;
                continue;
            };
            off.push(off_curve(&ph, Kind::Lamina, l, a as f64) / vmax);
            off.push(off_curve(&ph, Kind::Ligament, g, a as f64) / vmax);
        }
        let n = off.len() / 2;
        let (med, p95) = (common::quantile(&off, 0.5), common::quantile(&off, 0.95));
        eprintln!("voxel {:?}: {n} snaps ({missed} not clear), off the true edges median {med:.2} / p95 {p95:.2} voxels", spec.voxel_um);
        assert!(n >= 15 && missed * 5 <= n, "{n} snapped, {missed} not");
        assert!(med <= 1.0 && p95 <= 1.5, "median {med:.2}, p95 {p95:.2} voxels");
    }
}

/// The axis proposal (`trace::propose_axis`) from the window and six lamina points spread over
/// the basal turn: its direction within 8° of the phantom's true modiolar axis (either way up:
/// the basal dip can make the first turn sink before it climbs, so which end is the apex is for
/// the user to check) and the line within 0.35 mm of the true axis at the window's level — a
/// starting point the user then moves, on the default phantom and on tilted family members.
/// Member 6 is printed, not held: its basal turn sinks 1.3 mm before it climbs (the basal dip),
/// which the fitted tilt takes up, leaving the axis about 15° off (README, limits).
#[test]
fn axis_proposal_near_the_true_axis() {
    for (n, spec) in [
        (None, PhantomSpec { voxel_um: [60.0; 3], ..Default::default() }),
        (Some(3), PhantomSpec::variant(3, [60.0; 3])),
        (Some(6), PhantomSpec::variant(6, [60.0; 3])),
        (Some(8), PhantomSpec::variant(8, [60.0; 3])),
    ] {
        let ph = phantom::generate(&spec, &Progress::new()).unwrap();
        let window = ph.landmarks.iter().find(|l| l.kind == Kind::Window).unwrap().p;
        // six lamina landmarks spread over the first 300° (the phantom lists them base to apex)
        let lam: Vec<[f64; 3]> = ph.landmarks.iter().filter(|l| l.kind == Kind::Lamina).map(|l| l.p).collect();
        let every = (60.0 / spec.landmark_step_deg).round() as usize;
        let pts: Vec<[f64; 3]> = (0..6).filter_map(|k| lam.get(k * every).copied()).collect();
        assert_eq!(pts.len(), 6);
        let (b, a) = ductline::trace::propose_axis(window, &pts).unwrap();
        let dir = ductline::frame::v3::unit(ductline::frame::v3::sub(a, b));
        let (o, z) = (ph.placement.to_stack([0.0, 0.0, 0.0]), ph.placement.to_stack([0.0, 0.0, 1.0]));
        let truth = ductline::frame::v3::unit(ductline::frame::v3::sub(z, o));
        let angle = ductline::frame::v3::dot(dir, truth).abs().min(1.0).acos().to_degrees();
        // distance from the proposed base point to the true axis line
        let d = ductline::frame::v3::sub(b, o);
        let off = ductline::frame::v3::norm(ductline::frame::v3::sub(d, ductline::frame::v3::scale(truth, ductline::frame::v3::dot(d, truth))));
        eprintln!("member {n:?}, tilt {:?}, dip {:.2} mm: axis {angle:.1}° off, {off:.3} mm from the true axis", spec.tilt_deg, spec.basal_dip_mm);
        if n != Some(6) {
            assert!(angle < 8.0 && off < 0.35, "member {n:?}: axis {angle:.1}° off, {off:.3} mm away");
        }
    }
}

/// A trace resumed from many points (the app traces again beyond a moved point from every
/// landmark up to it): the true landmarks up to about 400° (more than a turn, so their wrapped
/// angles repeat) as seeds on member 5 at 45 µm and on member 1 (a left ear) at 150 µm. The
/// proposals start past the last seed, lie within 1 voxel (45 µm) / 1.5 voxels (150 µm) of the
/// true edges (median) and reach at least 95 % of the depth. Before the seeds' angles were
/// unwrapped along their spiral, they wrapped at ±180° and such a trace mixed the turns.
#[test]
fn a_trace_resumes_from_many_points() {
    for (n, vox, tol) in [(5, 45.0, 1.0), (1, 150.0, 1.5)] {
        let spec = PhantomSpec { truth_step_deg: 30.0, ..PhantomSpec::variant(n, [vox; 3]) };
        let ph = phantom::generate(&spec, &Progress::new()).unwrap();
        let mut seeds: Vec<Landmark> = ph.landmarks.iter().filter(|l| matches!(l.kind, Kind::AxisBase | Kind::AxisApex | Kind::Window)).copied().collect();
        for k in [Kind::Lamina, Kind::Ligament] {
            seeds.extend(ph.landmarks.iter().filter(|l| l.kind == k).take(41));
        }
        let t = ductline::trace::trace(&ph.stack, &seeds, 10.0).unwrap();
        let vmax = ph.stack.voxel.as_ref().unwrap().max();
        let first = t.proposed.iter().map(|p| p.angle_deg).fold(f64::INFINITY, f64::min);
        let d: Vec<f64> = t.proposed.iter().map(|p| off_curve(&ph, p.lm.kind, p.lm.p, p.angle_deg) / vmax).collect();
        let med = common::quantile(&d, 0.5);
        let depth = t.stopped_deg / spec.theta_max().to_degrees();
        eprintln!(
            "member {n} at {vox} µm from 41 + 41 seeds: first proposal at {first:.0}°, {} proposals, median {med:.2} voxels off, {:.0} % of the depth",
            t.proposed.len(),
            100.0 * depth
        );
        assert!(first > 400.0 && first < 420.0, "member {n}: first proposal at {first:.0}°");
        assert!(med <= tol, "member {n}: median {med:.2} voxels off the true edges");
        assert!(depth >= 0.95, "member {n}: {:.0} % of the depth", 100.0 * depth);
    }
}
