//! A cochlea built apart from ductline (`tests/fixtures/outside_phantom.py`, numpy and
//! scipy.ndimage.gaussian_filter): a logarithmic spiral with rounded-rectangle scalae, the
//! modiolar axis along the stack's rows, thin bony shells in porous bone, a spiral ligament, a
//! bare bony shelf (no limbus), 80 µm voxels, blur one voxel, contrast-to-noise 12, 8-bit. Its
//! truth (areas on planes normal to the analytic partition midline every 3°, the midline's
//! length) comes from the same script. The method was not developed on it.
//!
//! What is held is what a user of other data would first ask: every section measured and sound,
//! the midline length, SV+ST, and a trace from seven points over the whole duct. Known gap,
//! held loosely: scala vestibuli reads about 5 % low (median) because the measure expects a
//! spiral limbus on the vestibular side of the bony shelf (real cochleae have one, this phantom
//! does not) and counts the blurred shelf there against soft tissue; told that the shelf is bare
//! (`MeasureSettings::bare_shelf`) it reads 2 % high. Scala tympani reads about 3 % high. See
//! the README's limits.

use ductline::centreline::FitSettings;
use ductline::cochlea::Greenwood;
use ductline::measure::{MeasureSettings, Row};
use ductline::progress::Progress;
use std::path::Path;

mod common;

struct Truth {
    angle: Vec<f64>,
    sv: Vec<f64>,
    st: Vec<f64>,
    length_mm: f64,
    depth_deg: f64,
}

fn truth(dir: &Path) -> Truth {
    let text = std::fs::read_to_string(dir.join("truth.csv")).unwrap();
    let mut t = Truth { angle: vec![], sv: vec![], st: vec![], length_mm: 0.0, depth_deg: 0.0 };
    for line in text.lines().skip(1) {
        let v: Vec<f64> = line.split(',').map(|x| x.parse().unwrap()).collect();
        t.angle.push(v[0]);
        t.sv.push(v[2]);
        t.st.push(v[3]);
    }
    let meta: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(dir.join("phantom.json")).unwrap()).unwrap();
    t.length_mm = meta["length_mm"].as_f64().unwrap();
    t.depth_deg = meta["depth_deg"].as_f64().unwrap();
    t
}

fn interp(x: &[f64], y: &[f64], at: f64) -> f64 {
    let k = x.partition_point(|&a| a < at).clamp(1, x.len() - 1);
    y[k - 1] + (at - x[k - 1]) / (x[k] - x[k - 1]) * (y[k] - y[k - 1])
}

/// A committed fixture's folder, stack (its voxel side, mm, checked as read from the ImageJ
/// spacing) and truth.
fn open(name: &str, voxel_mm: f64) -> (std::path::PathBuf, ductline::stack::Stack, Truth) {
    let dir = common::fixture(name);
    let stack = ductline::stack::load(&dir.join("stack.tif"), &Default::default()).unwrap();
    assert_eq!(stack.voxel().unwrap().max(), voxel_mm, "voxel size from the ImageJ spacing");
    let t = truth(&dir);
    (dir, stack, t)
}

/// A trace of the fixture's seven points (seeds.csv) at 10° steps, printed: the angle it stopped
/// at, and the seeds with the proposals as one landmark list, as `measure` reads them.
fn trace_seeds(dir: &Path, stack: &ductline::stack::Stack, t: &Truth) -> (f64, Vec<ductline::landmarks::Landmark>) {
    let seeds = ductline::landmarks::read_csv(&dir.join("seeds.csv"), Some(stack)).unwrap();
    assert_eq!(seeds.len(), 7);
    let traced = ductline::trace::trace(stack, &seeds, 10.0).unwrap();
    eprintln!("trace: to {:.0}° of {:.0}°: {}", traced.stopped_deg, t.depth_deg, traced.reason);
    let lm = ductline::landmarks::parse_csv(&ductline::trace::to_csv(&seeds, &traced), Path::new("traced.csv"), Some(stack)).unwrap();
    (traced.stopped_deg, lm)
}

/// The whole pipeline on `lm` with the settings `ms`.
fn run(stack: &ductline::stack::Stack, lm: &[ductline::landmarks::Landmark], ms: &MeasureSettings) -> ductline::pipeline::Outcome {
    let gw = Greenwood::preset("human").unwrap();
    ductline::pipeline::run(stack, lm, &FitSettings::default(), ms, &[], &gw, &Progress::new()).unwrap()
}

/// Share of sound rows 30° or more from either end, and the median |error| (%) of SV, ST and
/// SV+ST over those of them with both areas (a row flagged only for its wall keeps them),
/// printed with the signed medians.
fn score(label: &str, rows: &[Row], t: &Truth) -> (f64, f64, f64, f64) {
    let inner: Vec<&Row> = common::inner_rows(rows, t.depth_deg, 30.0).collect();
    let sound = inner.iter().filter(|r| r.sound()).count() as f64 / inner.len() as f64;
    let (mut sv, mut st, mut tot) = (vec![], vec![], vec![]);
    for r in inner.iter() {
        let (Some(a), Some(b)) = (r.sv.area, r.st.area) else { continue };
        let (tsv, tst) = (interp(&t.angle, &t.sv, r.angle_deg), interp(&t.angle, &t.st, r.angle_deg));
        sv.push(100.0 * (a / tsv - 1.0));
        st.push(100.0 * (b / tst - 1.0));
        tot.push(100.0 * ((a + b) / (tsv + tst) - 1.0));
    }
    // (`common::quantile` sorts its own copy)
    let med = |v: &[f64]| common::quantile(v, 0.5);
    let abs_med = |v: &[f64]| med(&v.iter().map(|x| x.abs()).collect::<Vec<_>>());
    let out = (sound, abs_med(&sv), abs_med(&st), abs_med(&tot));
    eprintln!(
        "{label}: {} rows, {:.0} % sound; |error| median SV {:.1} % (signed {:+.1}), ST {:.1} % ({:+.1}), SV+ST {:.1} % ({:+.1})",
        inner.len(),
        100.0 * sound,
        out.1,
        med(&sv),
        out.2,
        med(&st),
        out.3,
        med(&tot)
    );
    out
}

/// From its own landmarks (every 10°) and from a trace of seven points: 95 % of the sections or
/// more sound (all are), SV+ST within 5 % median (the measures issue asks 3 % at 80 µm of its own
/// family; here 3.4 % from the landmarks, 3.0 % traced), the length within 0.5 % from the
/// landmarks (0.00 %) and 1 % traced (+0.49 %), the trace to at least 95 % of the depth (it
/// reaches the end), SV and ST within 9 % median (5.1 and 5.5 % from the landmarks, 6.4 and 5.4 %
/// traced: the known gap above); with `bare_shelf` set, SV within 4.5 % (4.2 %) and ST as before.
#[test]
fn a_phantom_built_elsewhere() {
    let (dir, stack, t) = open("outside", 0.08);
    let landmarks = ductline::landmarks::read_csv(&dir.join("landmarks.csv"), Some(&stack)).unwrap();
    let ms = MeasureSettings { step_mm: 0.25, ..Default::default() };
    let run = |lm: &[ductline::landmarks::Landmark], ms: &MeasureSettings| run(&stack, lm, ms);

    let placed = run(&landmarks, &ms);
    let length = placed.centreline.length;
    let (sound, sv, st, tot) = score("from the landmarks", &placed.rows, &t);
    eprintln!("length {length:.3} mm, truth {:.3} mm", t.length_mm);
    assert!(sound >= 0.95, "sound {sound}");
    assert!(tot <= 5.0 && sv <= 9.0 && st <= 9.0, "SV+ST {tot} %, SV {sv} %, ST {st} %");
    assert!((length / t.length_mm - 1.0).abs() <= 0.005, "length {length} for {}", t.length_mm);

    // told that the shelf is bare, scala vestibuli reads within 4.5 % median (4.2 %, signed
    // +1.6 %; −1.0 % before the shelf's blur counted against bone out to three blur widths, with
    // 3.4 % median: the rows scatter by ±5–10 % at 80 µm and contrast-to-noise 12)
    let bare = MeasureSettings { bare_shelf: true, ..ms.clone() };
    let told = run(&landmarks, &bare);
    let (sound, sv_bare, st_bare, _) = score("from the landmarks, bare shelf", &told.rows, &t);
    assert!(sound >= 0.95 && sv_bare <= 4.5 && sv_bare < sv && (st_bare - st).abs() < 0.5, "bare shelf: SV {sv_bare} %, ST {st_bare} %");

    let (stopped, lm) = trace_seeds(&dir, &stack, &t);
    assert!(stopped >= 0.95 * t.depth_deg, "trace reached {stopped}°");
    let out = run(&lm, &ms);
    let length = out.centreline.length;
    let (sound, sv, st, tot) = score("traced", &out.rows, &t);
    eprintln!("traced length {length:.3} mm");
    assert!(sound >= 0.95, "sound {sound}");
    assert!(tot <= 5.0 && sv <= 9.0 && st <= 9.0, "SV+ST {tot} %, SV {sv} %, ST {st} %");
    assert!((length / t.length_mm - 1.0).abs() <= 0.01, "traced length {length} for {}", t.length_mm);
}

/// The same script's cochlea in another pose and another labyrinth (`outside_air`): air-filled
/// (air at 0.02 of full scale, far darker than the soft tissue at 0.42), mirrored (a right ear;
/// the committed one turns as a left ear), the modiolar axis tilted 30° and −20°,
/// contrast-to-noise 8, 80 µm. Held as for the plain one, from the landmarks and from seven
/// points: 95 % sound or more (100 % both), SV+ST within 5 % median (2.0 %, traced 1.9 %), SV and
/// ST within 9 % (2.6 and 2.3 %, traced 4.4 and 3.1 %; SV low by the bare shelf, as above), the
/// length within 0.5 % from the landmarks (0.00 %) and 1 % traced (−0.22 %), the trace to 95 % of
/// the depth or more (890° of 900°).
#[test]
fn an_air_filled_right_ear_tilted() {
    let (dir, stack, t) = open("outside_air", 0.08);
    let ms = MeasureSettings { step_mm: 0.25, ..Default::default() };
    let landmarks = ductline::landmarks::read_csv(&dir.join("landmarks.csv"), Some(&stack)).unwrap();
    let (stopped, proposed) = trace_seeds(&dir, &stack, &t);
    assert!(stopped >= 0.95 * t.depth_deg, "trace reached {stopped}°");
    for (label, lm, tol) in [("from the landmarks", &landmarks, 0.005), ("traced", &proposed, 0.01)] {
        let out = run(&stack, lm, &ms);
        let length = out.centreline.length;
        let (sound, sv, st, tot) = score(label, &out.rows, &t);
        eprintln!("{label}: length {length:.3} mm, truth {:.3} mm", t.length_mm);
        assert!(sound >= 0.95, "{label}: sound {sound}");
        assert!(tot <= 5.0 && sv <= 9.0 && st <= 9.0, "{label}: SV+ST {tot} %, SV {sv} %, ST {st} %");
        assert!((length / t.length_mm - 1.0).abs() <= tol, "{label}: length {length} for {}", t.length_mm);
    }
}

/// The same script at clinical resolution: 200 µm voxels, a solid bony capsule (`--wall-mm 0`),
/// blur 1.2 voxels. No step of the trace finds the partition (a 0.05 mm shelf and a membrane in
/// 0.2 mm voxels): every point is a guess kept where the partition lay relative to the duct's
/// dark blob. The trace must still stop at the duct's end, not follow some other dark blob near
/// the axis: before the guard past the apex it ran on to 1260° of 900°. Held: stopped within
/// 90–105 % of the depth, and the midline length from the traced points within 5 % (the
/// tracing issue's bound for real CT; +2.5 %; +4.5 % with the guessed lamina tip kept at the
/// seeds' share of the duct's width, +3.9 % with the ligament guessed from the blob too). 85 % of
/// the rows or more have both areas (91 %;
/// the measures issue asks 60 % on real CT: the others are `no_seed`, a scala under the blur)
/// and none is negative. SV+ST within 12 % median from the landmarks and 15 % traced (9.4 and
/// 12.4 %; the measures issue asks 15 % on real CT): the 0.15 mm ligament cannot be resolved in
/// 0.2 mm voxels, and before a bare-looking wall stopped being taken for bare bone at such voxels
/// (`levels::BARE_WALL_BELOW_MM`) it counted as two-thirds lumen: 41 % high; before the duct's
/// lumen level could come from the values at the centreline points (src/measure/mod.rs) 13.5 and
/// 13.8 %. Few rows are sound: against a solid capsule no wall thickness can be read
/// (`no_wall`).
#[test]
fn a_trace_at_clinical_resolution_stops_at_the_apex() {
    let (dir, stack, t) = open("outside_200um", 0.2);
    let (stopped, lm) = trace_seeds(&dir, &stack, &t);
    let depth = stopped / t.depth_deg;
    assert!((0.9..=1.05).contains(&depth), "trace reached {stopped:.0}° of {:.0}°", t.depth_deg);
    let ms = MeasureSettings { step_mm: 0.25, ..Default::default() };
    let out = run(&stack, &lm, &ms);
    let length = out.centreline.length;
    eprintln!("traced length {length:.3} mm, truth {:.3} mm", t.length_mm);
    assert!((length / t.length_mm - 1.0).abs() <= 0.05, "traced length {length} for {}", t.length_mm);
    let (_, _, _, tot) = score("traced", &out.rows, &t);
    let landmarks = ductline::landmarks::read_csv(&dir.join("landmarks.csv"), Some(&stack)).unwrap();
    let placed = run(&stack, &landmarks, &ms);
    let (_, _, _, tot_placed) = score("from the landmarks", &placed.rows, &t);
    assert!(tot <= 15.0 && tot_placed <= 12.0, "SV+ST {tot:.1} % traced, {tot_placed:.1} % from the landmarks");
    let inner: Vec<&Row> = common::inner_rows(&out.rows, t.depth_deg, 30.0).collect();
    let both = inner.iter().filter(|r| r.sv.area.is_some() && r.st.area.is_some()).count();
    eprintln!("{both} of {} rows with both areas", inner.len());
    assert!(both * 100 >= 85 * inner.len(), "{both} of {} rows with both areas", inner.len());
    assert!(out.rows.iter().flat_map(|r| [r.sv.area, r.st.area]).flatten().all(|a| a > 0.0), "a negative or zero area");
}
