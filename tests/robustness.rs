//! Property tests of geometry invariants, NaN voxels, and saves interrupted by a killed process.

use ductline::centreline::{Centreline, FitSettings, rotation_minimizing};
use ductline::frame::{Frame, Handedness, v3};
use ductline::landmarks::{Kind, Landmark};
use ductline::measure::MeasureSettings;
use proptest::prelude::*;

fn unit(a: [f64; 3]) -> Option<[f64; 3]> {
    (v3::norm(a) > 1e-3).then(|| v3::unit(a))
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(200))]

    /// stack → cochlear → stack returns the point to 1e-9 mm, for any frame and handedness.
    #[test]
    fn frame_round_trip(ax in prop::array::uniform3(-1.0f64..1.0), wx in prop::array::uniform3(-1.0f64..1.0),
                        o in prop::array::uniform3(-20.0f64..20.0), p in prop::array::uniform3(-30.0f64..30.0), left in any::<bool>()) {
        let (Some(a), Some(w)) = (unit(ax), unit(wx)) else { return Ok(()) };
        prop_assume!(v3::norm(v3::cross(a, w)) > 0.05);
        let f = Frame::new(o, v3::axpy(o, 3.0, a), v3::axpy(o, 2.0, w), if left { Handedness::Left } else { Handedness::Right }).unwrap();
        let c = f.to_cochlear(p);
        prop_assert!(c[0] >= 0.0 && c[1] > -180.0 && c[1] <= 180.0);
        prop_assert!(v3::dist(f.to_stack(c[0], c[1], c[2]), p) < 1e-9);
    }

    /// Arc length grows with θ; θ(s(θ)) = θ; RMF vectors stay unit and normal to the tangent.
    #[test]
    fn centreline_invariants(r0 in 1.5f64..5.0, taper in 0.2f64..0.9, pitch in 0.5f64..3.0, turns in 0.6f64..3.0,
                             width in 0.2f64..1.0, noise in prop::collection::vec(-0.01f64..0.01, 200)) {
        let f = Frame::new([0.0; 3], [0.0, 0.0, 1.0], [1.0, 0.0, 0.0], Handedness::Right).unwrap();
        let mut lms = vec![];
        let n = (turns * 16.0) as usize;
        for k in 0..=n {
            let t = turns * 360.0 * k as f64 / n as f64;
            let r = r0 * (1.0 - taper * k as f64 / n as f64 * 0.8);
            let z = pitch * t / 360.0;
            lms.push(Landmark { kind: Kind::Lamina, p: f.to_stack(r - width / 2.0 + noise[k % 200], t, z) });
            lms.push(Landmark { kind: Kind::Ligament, p: f.to_stack(r + width / 2.0 - noise[(k + 7) % 200], t, z) });
        }
        let cl = Centreline::fit(&f, &lms, &FitSettings::default()).unwrap();
        let mut prev = -1.0;
        for k in 0..=50 {
            let t = cl.t0 + (cl.t1 - cl.t0) * k as f64 / 50.0;
            let s = cl.s_at(t);
            prop_assert!(s > prev);
            prev = s;
            prop_assert!((cl.theta_at(s) - t).abs() < 1e-9);
        }
        prop_assert!((cl.s_at(cl.t1) - cl.length).abs() < 1e-9 * cl.length);
        let g = ductline::section::geometry(&cl, cl.length / 40.0);
        let pts: Vec<_> = g.iter().map(|x| x.centre).collect();
        let tan: Vec<_> = g.iter().map(|x| x.t).collect();
        for (r, t) in rotation_minimizing(&pts, &tan, [0.3, 1.0, 0.2]).iter().zip(&tan) {
            prop_assert!((v3::norm(*r) - 1.0).abs() < 1e-12 && v3::dot(*r, *t).abs() < 1e-9);
        }
        for s in &g {
            prop_assert!((v3::norm(s.u) - 1.0).abs() < 1e-9 && v3::dot(s.u, s.t).abs() < 1e-9 && v3::dot(s.v, s.t).abs() < 1e-9);
        }
    }

    /// Areas are never negative and never NaN in the table: any section either has finite,
    /// non-negative values or blank cells with a flag — even on pure noise.
    #[test]
    fn areas_never_negative_flags_instead_of_nan(seed in 0u64..1000) {
        let (nx, ny, nz) = (40usize, 40usize, 12usize);
        let mut x = seed.wrapping_mul(6364136223846793005).wrapping_add(1);
        let data: Vec<u16> = (0..nx * ny * nz).map(|_| { x = x.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407); (x >> 48) as u16 }).collect();
        let vox = ductline::stack::VoxelSize::from_user_um(&[50.0]).unwrap();
        let st = ductline::stack::Stack::from_samples([nx, ny, nz], ductline::stack::Samples::U16(data.into()), Some(vox)).unwrap();
        let f = Frame::new([1.0, 1.0, 0.1], [1.0, 1.0, 0.5], [1.8, 1.0, 0.1], Handedness::Right).unwrap();
        let mut lms = vec![
            Landmark { kind: Kind::AxisBase, p: [1.0, 1.0, 0.1] },
            Landmark { kind: Kind::AxisApex, p: [1.0, 1.0, 0.5] },
            Landmark { kind: Kind::Window, p: [1.8, 1.0, 0.1] },
        ];
        for k in 0..=12 {
            let t = 30.0 * k as f64;
            lms.push(Landmark { kind: Kind::Lamina, p: f.to_stack(0.5, t, 0.05 + 0.02 * k as f64) });
            lms.push(Landmark { kind: Kind::Ligament, p: f.to_stack(0.8, t, 0.05 + 0.02 * k as f64) });
        }
        let cl = Centreline::fit(&f, &lms, &FitSettings::default()).unwrap();
        let ms = MeasureSettings { step_mm: 0.3, capture_mm: 0.8, ..Default::default() };
        let (_, rows) = ductline::measure::measure(&st, &cl, &ms, &[], &ductline::cochlea::Greenwood::preset("human").unwrap(), &ductline::progress::Progress::new()).unwrap();
        for r in &rows {
            for a in [r.sv.area, r.st.area, r.wall_mm, r.partition_width_mm].into_iter().flatten() {
                prop_assert!(a.is_finite() && a >= -1e-9, "value {a}");
            }
        }
        let csv = ductline::export::table_csv(&rows);
        prop_assert!(!csv.to_lowercase().contains("nan") && !csv.contains("inf"));
    }
}

/// NaN voxels (a float stack with a hole) give flags and blank cells, never NaN in the table.
#[test]
fn nan_voxels_are_flagged_not_reported() {
    let spec = ductline::phantom::PhantomSpec { voxel_um: [80.0; 3], ..Default::default() };
    let ph = ductline::phantom::generate(&spec, &ductline::progress::Progress::new()).unwrap();
    let ductline::stack::Samples::U16(v) = &ph.stack.samples else { panic!() };
    let mut f: Vec<f32> = v.iter().map(|x| *x as f32).collect();
    let [nx, ny, nz] = ph.stack.dims;
    // a hole through the basal turn
    for k in 0..nz {
        for j in ny / 2..ny / 2 + 6 {
            for i in nx - 30..nx {
                f[(k * ny + j) * nx + i] = f32::NAN;
            }
        }
    }
    let st = ductline::stack::Stack::from_samples(ph.stack.dims, ductline::stack::Samples::F32(f.into()), ph.stack.voxel.clone()).unwrap();
    let out = ductline::pipeline::run(
        &st,
        &ph.landmarks,
        &FitSettings::default(),
        &MeasureSettings { step_mm: 0.25, ..Default::default() },
        &[],
        &ductline::cochlea::Greenwood::preset("human").unwrap(),
        &ductline::progress::Progress::new(),
    )
    .unwrap();
    let open = out.rows.iter().filter(|r| r.flags.contains(&ductline::measure::Flag::Open)).count();
    assert!(open > 0, "sections through the hole are flagged open");
    // a flag blanks the section's own areas as well as the table's (the JSON carries both)
    for r in out.rows.iter().filter(|r| !r.sound()) {
        assert!(r.sv.area.is_some() || r.sv.own_area.is_none(), "own SV area kept on a blank row at s = {}", r.s_mm);
        assert!(r.st.area.is_some() || r.st.own_area.is_none(), "own ST area kept on a blank row at s = {}", r.s_mm);
    }
    assert!(out.rows.iter().filter(|r| r.sound()).count() > out.rows.len() / 2);
    let csv = ductline::export::table_csv(&out.rows);
    assert!(!csv.to_lowercase().contains("nan"));
}

/// A save killed at any moment leaves the previous project intact: a child process saves large
/// projects in a loop; we kill it at varied moments and the file always parses to a whole version.
#[test]
fn killed_saves_leave_a_whole_project() {
    if let Ok(path) = std::env::var("DUCTLINE_SAVE_LOOP") {
        // child: alternate two versions forever
        let path = std::path::PathBuf::from(path);
        let stack = path.with_file_name("stack.bin");
        for i in 0.. {
            let mut p = ductline::project::Project::new(&stack, &path).unwrap();
            p.landmarks = (0..20000).map(|k| Landmark { kind: Kind::Lamina, p: [k as f64, (i % 2) as f64, 0.5] }).collect();
            p.save(&path).unwrap();
        }
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("p.ductline.json");
    std::fs::write(dir.path().join("stack.bin"), b"x").unwrap();
    let mut p = ductline::project::Project::new(&dir.path().join("stack.bin"), &path).unwrap();
    p.landmarks = vec![Landmark { kind: Kind::Window, p: [1.0, 2.0, 3.0] }];
    p.save(&path).unwrap();
    for round in 0..12 {
        let mut child = std::process::Command::new(std::env::current_exe().unwrap())
            .args(["killed_saves_leave_a_whole_project", "--exact", "--nocapture"])
            .env("DUCTLINE_SAVE_LOOP", &path)
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(std::time::Duration::from_millis(40 + 37 * round));
        child.kill().unwrap();
        child.wait().unwrap();
        let back = ductline::project::Project::load(&path).unwrap_or_else(|e| panic!("round {round}: {e}"));
        assert!(back.landmarks.len() == 1 || back.landmarks.len() == 20000, "a whole version");
    }
}
