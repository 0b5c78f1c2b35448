//! The realistic phantom family (`PhantomSpec::variant`): turns embedded in capsule bone with thin
//! shared septa, soft tissue lining the lumen, a bony modiolus with nerve canals, fluid- or
//! air-filled, rings, cupping, drift, contrast-to-noise 5–30, blur, left and right ears tilted up
//! to 60°. Twelve members at 25–80 µm are measured and compared with their analytic truth (5 µm
//! rasterization of the same geometry, `phantom::truth`), and two more (12 and 13) whose
//! basilar membrane is as narrow as a real one (0.1–0.25 mm at the base, REFERENCES.md; the
//! first twelve span most of the duct); each prints its share of sound sections and its area,
//! width and wall errors.
//!
//! What is held here is what the method reaches today, as a guard against regressions; the
//! targets of the measures issue (median ≤ 1.5 %, p95 ≤ 4 %) are not met on every member yet —
//! the lumen fractions next to soft tissue are only as good as the soft-tissue level read from
//! the lateral wall (within about 0.04 of the lumen–bone step on this family), and the limbus on
//! the thin bony shelf is read by a coarser rule (README, limits). The printed table is the
//! record.

use ductline::centreline::FitSettings;
use ductline::cochlea::Greenwood;
use ductline::measure::{Flag, MeasureSettings};
use ductline::phantom::{self, PhantomSpec};
use ductline::progress::Progress;

mod common;

struct Member {
    n: u64,
    voxel: [f64; 3],
}

fn stats(v: &mut [f64]) -> (f64, f64) {
    if v.is_empty() {
        return (f64::NAN, f64::NAN);
    }
    v.sort_by(f64::total_cmp);
    (common::quantile(v, 0.5), common::quantile(v, 0.95))
}

/// A member measured from its own landmarks at 0.25 mm steps: rows, truth, truth's last angle (°).
fn run_member(n: u64, voxel: [f64; 3]) -> (PhantomSpec, Vec<ductline::measure::Row>, Vec<phantom::TruthRow>) {
    run_spec(PhantomSpec { truth_step_deg: 5.0, ..PhantomSpec::variant(n, voxel) })
}

/// The phantom of `spec` measured from its landmarks every 0.25 mm: its rows, none with a
/// negative area anywhere, and its truth.
fn run_spec(spec: PhantomSpec) -> (PhantomSpec, Vec<ductline::measure::Row>, Vec<phantom::TruthRow>) {
    let ph = phantom::generate(&spec, &Progress::new()).unwrap();
    let ms = MeasureSettings { step_mm: 0.25, ..Default::default() };
    let gw = Greenwood::preset("human").unwrap();
    let out = ductline::pipeline::run(&ph.stack, &ph.landmarks, &FitSettings::default(), &ms, &[], &gw, &Progress::new()).unwrap();
    let negative = out.rows.iter().find(|r| r.sv.area.is_some_and(|a| a < 0.0) || r.st.area.is_some_and(|a| a < 0.0));
    assert!(negative.is_none(), "phantom seed {} at {:?} µm: a negative area at {:.0}°", spec.seed, spec.voxel_um, negative.map_or(0.0, |r| r.angle_deg));
    (spec, out.rows, ph.truth)
}

/// Share of the sections ≥ 30° from either end that have both areas, the median SV+ST error
/// against truth and the largest area / truth, of member n at `voxel` µm.
fn clinical(n: u64, voxel: f64) -> (f64, f64, f64) {
    let (spec, rows, truth) = run_member(n, [voxel; 3]);
    let tmax = spec.theta_max().to_degrees();
    let inner: Vec<_> = common::inner_rows(&rows, tmax, 30.0).collect();
    let (mut worst, mut sum) = (0.0f64, vec![]);
    for r in inner.iter().filter(|r| r.sv.area.is_some() && r.st.area.is_some()) {
        let (sv, st) = (r.sv.area.unwrap(), r.st.area.unwrap());
        let (tsv, tst) = (common::truth_at(&truth, r.angle_deg, |t| t.sv_area_mm2), common::truth_at(&truth, r.angle_deg, |t| t.st_area_mm2));
        worst = worst.max(sv / tsv).max(st / tst);
        sum.push(((sv + st) / (tsv + tst) - 1.0).abs());
    }
    let measured = sum.len() as f64 / inner.len() as f64;
    let (med, _) = stats(&mut sum);
    eprintln!("member {n:>2} at {voxel} µm: areas on {:.0} %, SV+ST median error {:.1} %, largest area / truth {worst:.2}", 100.0 * measured, 100.0 * med);
    (measured, med, worst)
}

/// At clinical CT resolution (150 µm) the bony septa between turns (0.06–0.2 mm in the family),
/// the lateral capsule wall and the modiolar wall are thinner than a voxel and the blur: nothing
/// in the threshold stops a scala from flooding the turn above or below, the modiolus or what lies
/// outside. The spaces around each section (the other turns crossing its plane, the modiolar axis,
/// points beyond the lateral wall) part the lumen along the ridges such walls still leave (a
/// seeded watershed), and seeds are looked for deep in small scalae. Before: sound sections came
/// out at up to 4.9 times their true area (member 1, a scala flooding the turn above), and members
/// 6–10 had areas on only 6–61 % of their sections (`no_seed`, `open`). Now every
/// member has areas on at least 95 % of its sections, none over 2.5 times its truth, and SV+ST
/// within 15 % median (soft tissue a voxel thick is hard to tell from partial-volume lumen at this
/// resolution: members run 4–10 % off).
///
/// At 200 µm the scalae are a few voxels across: the tube around the duct holds too few lumen
/// pixels to make a class of their own, and its darkest class is soft tissue (`levels::pooled`
/// then takes the lumen from the duct's centre). Before that, SV+ST read up to 88 % high (member
/// 2; mean over the family 26 %); now every member has areas on at least 60 % of its sections
/// and SV+ST within 30 % median (members run 4–26 % off, mean 11 %: with a blur of 1.3 voxels no
/// pixel of a scala is pure lumen; 3–24 %, mean 13 %, before the duct's lumen level could come
/// from the values at the centreline points, member 8 then 24 % → 26 % with its signed median
/// +22 → +9 %). A scala whose blurred pixels nowhere reach the lumen/soft-tissue midpoint was
/// then grown against bone alone, its ligament and limbus counted 60–80 % lumen; it now grows
/// below 0.7 of the way to soft tissue first (`measure::DEEP_CUT`): members 1 and 8 14.5 → 8.7 %
/// and 26.3 → 9.2 %, mean 11.0 → 8.8 %. Since each row's area is the median of the sections' own
/// areas within ±0.5 mm (`measure::areas_along`) the mean is 8.5 → 7.3 % (every 0.25 mm), and
/// member 3 (air-filled, its soft tissue read 0.43 of the way to bone for 0.28) 18.6 → 20.1 %:
/// the section-to-section scatter that pulled some of its sections toward the truth is gone and
/// its bias is left. Held here at 22 % each and 8.5 % mean (it was 20 % and 10 %).
#[test]
fn clinical_resolution_keeps_turns_apart() {
    let mut at200 = vec![];
    for n in 0..12 {
        let (measured, med, worst) = clinical(n, 150.0);
        assert!(measured >= 0.95, "member {n}: areas on {:.0} % of sections", 100.0 * measured);
        assert!(worst < 2.5, "member {n}: a section at {worst:.2} times its true area");
        // soft tissue a voxel thick is not counted as half lumen where the wall fit cannot read
        // it (the tube's soft-tissue peak stands): SV+ST within 15 % (median) on every member
        // (it was up to 28 % with such walls read as bare bone)
        assert!(med < 0.15, "member {n}: SV+ST median error {:.1} %", 100.0 * med);
        let (measured, med, _) = clinical(n, 200.0);
        assert!(measured >= 0.6 && med < 0.22, "member {n} at 200 µm: areas on {:.0} %, SV+ST median error {:.1} %", 100.0 * measured, 100.0 * med);
        at200.push(med);
    }
    let mean = at200.iter().sum::<f64>() / at200.len() as f64;
    assert!(mean < 0.085, "family at 200 µm: SV+ST median error {:.1} % (mean of the members')", 100.0 * mean);
}

/// At 300 µm (clinical CT of the temporal bone) a scala is two or three voxels across and none
/// of its pixels is pure lumen. The floor an independent check sets on real clinical scans:
/// areas on at least 60 % of the sections, none negative. Before the duct's territory was flooded
/// from a point inside each scala (`measure::OWN_SEEDS_WIDTHS`), members 1 and 5 had areas on 59
/// and 56 % (`no_seed`); now 74–100 %. The areas read high (SV+ST 13–61 % median): the darkest
/// pixel of the basal duct lies a quarter of the way from the lumen to bone (air-filled member 7:
/// 12 k for air at 2.5 k), so every pixel counts too much lumen, and soft tissue a voxel thick is
/// not found at all. Held under 70 % here (members 8 and 9 read 65–67 % before a scala too
/// small to show the lumen/soft-tissue midpoint grew below `measure::DEEP_CUT`).
#[test]
fn clinical_resolution_300um_has_areas() {
    for n in 0..12 {
        let (measured, med, _) = clinical(n, 300.0);
        assert!(measured >= 0.6, "member {n} at 300 µm: areas on {:.0} % of sections", 100.0 * measured);
        assert!(med < 0.7, "member {n} at 300 µm: SV+ST median error {:.1} %", 100.0 * med);
    }
}

/// Soft tissue only a little brighter than fluid (a tenth of the lumen–bone step; the family
/// draws 0.2–0.35): the ligament must still count as tissue, not lumen. Members 0 and 5 at 40 µm,
/// truth by rasterising the analytic sections (the phantom's own truth.csv). Before the scalae
/// for the wall's profile grew below a noise-set cut (`measure::WALL_CUT_NOISE`) their SV/ST
/// medians were 9.9/7.0 % and 5.5/4.6 %; now within 3 % (SV) and 2 % (ST) (1.5/0.9 and 2.4/1.4 %).
#[test]
fn faint_soft_tissue() {
    for n in [0u64, 5] {
        let mut spec = PhantomSpec { truth_step_deg: 5.0, ..PhantomSpec::variant(n, [40.0; 3]) };
        spec.set_tissue_share(0.1);
        let ((sv, _), (st, _), _) = area_errors(spec);
        eprintln!("member {n} at 40 µm, soft tissue 0.1 of the step: SV/ST median error {:.1}/{:.1} %", 100.0 * sv, 100.0 * st);
        assert!(sv < 0.03 && st < 0.02, "member {n}: SV/ST median error {:.1}/{:.1} %", 100.0 * sv, 100.0 * st);
    }
}

/// The median and p95 of the SV and of the ST area errors against truth over the sections ≥ 30°
/// from either end of the phantom of `spec`, every one of which must have both areas, and the
/// share of those sections that are sound.
fn area_errors(spec: PhantomSpec) -> ((f64, f64), (f64, f64), f64) {
    let n = spec.seed;
    let (_, rows, truth) = run_spec(spec);
    let mut e = common::errors(&rows, &truth, 30.0);
    assert!(e.sv.len() == e.rows && e.st.len() == e.rows, "seed {n}: SV on {}, ST on {} of {} sections", e.sv.len(), e.st.len(), e.rows);
    let sound = 1.0 - e.flagged as f64 / e.rows as f64;
    (stats(&mut e.sv), stats(&mut e.st), sound)
}

/// The family's two most blurred members at 40 µm (member 8: blur 1.30 voxels, contrast-to-noise
/// 13; member 13: 1.47 voxels): scala tympani within the targets, median ≤ 1.5 % and p95
/// ≤ 4 % against truth by rasterising the analytic sections (the phantom's own truth). Where the
/// lumen's blurred corner by the modiolus climbed slowly, the rays read a soft-tissue layer on
/// bare bone and took up to 0.7 of a pixel of lumen off each pixel there; with bone walling scala
/// tympani modiolar of the lamina tip (`measure::areas`), 2.4/5.1 → 1.0/3.3 % (member 8) and
/// 1.4/4.7 → 1.0/2.6 % (member 13).
#[test]
fn heavy_blur_scala_tympani() {
    for n in [8u64, 13] {
        let (_, (st, st95), _) = area_errors(PhantomSpec { truth_step_deg: 5.0, ..PhantomSpec::variant(n, [40.0; 3]) });
        eprintln!("member {n} at 40 µm: ST median/p95 error {:.1}/{:.1} %", 100.0 * st, 100.0 * st95);
        assert!(st <= 0.015 && st95 <= 0.04, "member {n}: ST median/p95 error {:.1}/{:.1} %", 100.0 * st, 100.0 * st95);
    }
}

/// Scala tympani at 80 µm where the spiral ligament is a voxel or two thick (members 4, 9 and 10:
/// 0.13–0.17 mm at the partition, thinning toward the floor; blur 0.7–1.2 voxels): median within
/// 4 % against truth by rasterising the analytic sections (the phantom's own truth). A ligament
/// that thin climbs barely slower than bare bone; taken for bone, it counted as lumen. With every
/// slow climb on scala tympani's lateral half fitted for a layer (`measure::levels::plateaus`),
/// 5.5/6.7/5.9 → 3.3/3.5/3.3 % median. (The target at 80 µm is 3 %.)
#[test]
fn thin_ligament_scala_tympani_80um() {
    for n in [4u64, 9, 10] {
        let (_, (st, st95), _) = area_errors(PhantomSpec { truth_step_deg: 5.0, ..PhantomSpec::variant(n, [80.0; 3]) });
        eprintln!("member {n} at 80 µm: ST median/p95 error {:.1}/{:.1} %", 100.0 * st, 100.0 * st95);
        assert!(st <= 0.04, "member {n}: ST median/p95 error {:.1}/{:.1} %", 100.0 * st, 100.0 * st95);
    }
}

/// Voxels twice as long along the slice axis as across it (the anatomy notes reach 1:2): members 0
/// and 6 at 50 × 50 × 100 and 40 × 40 × 80 µm, SV and ST median within 2.5 % against truth by
/// rasterising the analytic sections (the phantom's own truth). When the rules of the regions
/// and areas counted in the coarsest voxel side, a thin spiral limbus or ligament within reach
/// of the bone passed for a bony edge and counted as lumen: SV/ST medians 3.0/1.7 % (member 0;
/// member 6 read 5.7/3.0 % every 0.1 mm). With those rules in the finest side (the pure interior
/// and the rays across each edge still in the coarsest), 1.4/0.4 and 1.1/0.8 % (the same members
/// at 50 and 40 µm cubic, every 0.1 mm: 0.7/0.4 and 0.9/0.6 %).
#[test]
fn anisotropic_voxels_read_like_cubic_ones() {
    for (n, voxel) in [(0u64, [50.0, 50.0, 100.0]), (6, [40.0, 40.0, 80.0])] {
        let ((sv, sv95), (st, st95), sound) = area_errors(PhantomSpec { truth_step_deg: 5.0, ..PhantomSpec::variant(n, voxel) });
        eprintln!(
            "member {n} at {voxel:?} µm: SV {:.1}/{:.1} %, ST {:.1}/{:.1} % (median/p95), {:.0} % sound",
            100.0 * sv,
            100.0 * sv95,
            100.0 * st,
            100.0 * st95,
            100.0 * sound
        );
        assert!(sv <= 0.025 && st <= 0.025, "member {n} at {voxel:?} µm: SV/ST median error {:.1}/{:.1} %", 100.0 * sv, 100.0 * st);
        assert!(sound >= 0.95, "member {n} at {voxel:?} µm: {:.0} % sound", 100.0 * sound);
    }
}

/// Contrast-to-noise 6 (the anatomy notes reach down to 5; the family's members 0–13 happen to
/// draw 9–29): members 1, 3 (air-filled) and 7 at 80 µm, against truth by rasterising the analytic
/// sections (the phantom's own truth). Noise leaves specks above the growth threshold inside a
/// scala; as holes they made necks that were cut, and the piece cut off counted as another dark
/// space. With the grown region's holes filled (`measure::regions`), member 3's SV/ST median
/// 8.9/6.8 → 6.9/5.3 % and p95 51.2/45.0 → 22.9/21.6 %, member 1's ST p95 28.7 → 18.7 %. Held: 95 % of the
/// sections sound, SV and ST within 8 % median and 30 % p95 (at contrast-to-noise 6 a pixel's
/// noise is a sixth of the lumen–bone step, so single rows scatter by 10–20 %).
#[test]
fn low_contrast_to_noise_80um() {
    for n in [1u64, 3, 7] {
        let mut spec = PhantomSpec { truth_step_deg: 5.0, ..PhantomSpec::variant(n, [80.0; 3]) };
        spec.scanner.cnr = Some(6.0);
        let ((svm, sv95), (stm, st95), sound) = area_errors(spec);
        eprintln!(
            "member {n} at 80 µm, contrast-to-noise 6: {:.0} % sound, SV {:.1}/{:.1} %, ST {:.1}/{:.1} % (median/p95)",
            100.0 * sound,
            100.0 * svm,
            100.0 * sv95,
            100.0 * stm,
            100.0 * st95
        );
        assert!(sound >= 0.95, "member {n}: {:.0} % sound", 100.0 * sound);
        assert!(svm <= 0.08 && stm <= 0.08 && sv95 <= 0.3 && st95 <= 0.3, "member {n}: SV {svm:.3}/{sv95:.3}, ST {stm:.3}/{st95:.3}");
    }
}

#[test]
fn family_sweep() {
    let members = [
        Member { n: 0, voxel: [80.0; 3] },
        Member { n: 1, voxel: [70.0; 3] },
        Member { n: 2, voxel: [60.0, 60.0, 80.0] },
        Member { n: 3, voxel: [50.0; 3] },
        Member { n: 4, voxel: [50.0; 3] },
        Member { n: 5, voxel: [45.0; 3] },
        Member { n: 6, voxel: [40.0, 40.0, 60.0] },
        Member { n: 7, voxel: [40.0; 3] },
        Member { n: 8, voxel: [35.0, 35.0, 50.0] },
        Member { n: 9, voxel: [65.0; 3] },
        Member { n: 10, voxel: [30.0; 3] },
        Member { n: 11, voxel: [25.0, 25.0, 50.0] },
        Member { n: 12, voxel: [45.0; 3] },
        Member { n: 13, voxel: [40.0; 3] },
    ];
    eprintln!("member voxel_um        cnr  air  sound   SV med/p95 %    ST med/p95 %   width µm  wall µm");
    let mut worst_sv: f64 = 0.0;
    let mut worst_st: f64 = 0.0;
    let mut sum_sv = 0.0;
    for m in &members {
        let (spec, rows, truth) = run_member(m.n, m.voxel);
        let tmax = spec.theta_max().to_degrees();
        let inner: Vec<_> = common::inner_rows(&rows, tmax, 30.0).collect();
        for r in &inner {
            for a in [r.sv.area, r.st.area].into_iter().flatten() {
                assert!(a > 0.0, "member {}: a non-positive area {a} at s = {} mm", m.n, r.s_mm);
            }
        }
        let common::Errors { mut sv, mut st, mut width, mut wall, flagged, rows: counted } = common::errors(&rows, &truth, 30.0);
        assert_eq!(counted, inner.len(), "member {}: the truth ends at θmax", m.n);
        let sound = 1.0 - flagged as f64 / counted as f64;
        let measured = inner.iter().filter(|r| r.sv.area.is_some() && r.st.area.is_some()).count() as f64 / inner.len() as f64;
        let leaks = inner.iter().filter(|r| r.flags.iter().any(|f| matches!(f, Flag::Open | Flag::LowContrast))).count();
        let ((svm, sv95), (stm, st95)) = (stats(&mut sv), stats(&mut st));
        let (wm, _) = stats(&mut width);
        let (lm, _) = stats(&mut wall);
        eprintln!(
            "{:>6} {:<14} {:>5.1} {:>4} {:>5.0} %  {:>5.1} / {:>5.1}   {:>5.1} / {:>5.1}   {:>6.1}  {:>7.1}",
            m.n,
            format!("{:?}", m.voxel.map(|x| x as u32)),
            spec.scanner.cnr.unwrap_or(f64::NAN),
            if spec.levels[0] < 0.1 { "yes" } else { "no" },
            100.0 * sound,
            100.0 * svm,
            100.0 * sv95,
            100.0 * stm,
            100.0 * st95,
            1000.0 * wm,
            1000.0 * lm
        );
        // areas on nearly every section: no leaks, levels found without thick bone
        assert!(measured >= 0.9, "member {}: areas on {:.0} % of sections", m.n, 100.0 * measured);
        assert!(leaks * 20 <= inner.len(), "member {}: {leaks} of {} sections open or without levels", m.n, inner.len());
        // the floor for thin-walled phantoms: sound sections (no flag at all, so no wall
        // read under one voxel from a one-profile scatter either)
        assert!(sound >= 0.95, "member {}: {:.0} % of sections sound", m.n, 100.0 * sound);
        // the lateral wall, the median of its rows' errors, within 0.38 voxel (largest side; the
        // issue's target is 0.3: member 3 sits at 0.34, member 13 — blur 1.47 voxels, the
        // heaviest of the family — at 0.375 at 40 µm, the rest at 0.08–0.31; member 13 read
        // 0.355 before its ligament's level was refitted behind the thin shell, 0.02 of the step higher
        // (`levels::behind_thin_wall`): the wall then starts at a higher soft-tissue/bone
        // midpoint, and it already read thin, −9 → −10 µm signed median).
        // It was up to 0.43 (member 10) while a wall still rising through its outer half level
        // was taken to end one sample after it began, and 0.41 on member 1 when the soft-tissue
        // level dropped to its truth before the wall's inner floor got its margin
        // (`wall::LINING_MARGIN`)
        let vox = m.voxel.iter().fold(0.0f64, |a, &b| a.max(b)) / 1000.0;
        assert!(lm <= 0.38 * vox, "member {}: wall median error {:.1} µm", m.n, 1000.0 * lm);
        worst_sv = worst_sv.max(svm);
        sum_sv += svm;
        worst_st = worst_st.max(stm);
    }
    // the state reached (see the module note), with room for other seeds: every member's median
    // area error (taking bone from the sections nearby brought member 1 from 4.6/5.3 to
    // 2.8/3.8 %; the soft-tissue level at its fitted value, bone next to the partition and the
    // wider edge band the worst from 5.2/3.8 to 4.8/3.3 %)
    assert!(worst_st < 0.04, "worst ST median error {:.1} %", 100.0 * worst_st);
    assert!(worst_sv < 0.06, "worst SV median error {:.1} %", 100.0 * worst_sv);
    // the family's mean SV median error: each section's soft-tissue level the median of the
    // lateral-wall fits within ±4 mm along the duct (`measure::TISSUE_ALONG_MM`); with the
    // nearest fit alone a stretch's noise carried its sections, and the mean read 1.71 % (now 1.61)
    let mean_sv = sum_sv / members.len() as f64;
    eprintln!("family mean SV median error {:.3} %", 100.0 * mean_sv);
    assert!(mean_sv < 0.0166, "family mean SV median error {:.2} %", 100.0 * mean_sv);
}
