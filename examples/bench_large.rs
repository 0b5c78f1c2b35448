//! Opens a large stack (memory-mapped when uncompressed), times view updates and reports the peak
//! resident memory against the stack's bytes. Optionally measures 400 sections.
//!
//!     cargo run --release --example bench_large -- STACK.tif --voxel-um 19.5 [LANDMARKS.csv]

use ductline::centreline::FitSettings;
use ductline::cochlea::Greenwood;
use ductline::frame::v3;
use ductline::measure::MeasureSettings;
use ductline::progress::Progress;
use ductline::section::{self, Grid};
use ductline::stack::{self, LoadOptions, VoxelSize};
use std::time::Instant;

fn rss(field: &str) -> f64 {
    let s = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    s.lines().find(|l| l.starts_with(field)).and_then(|l| l.split_whitespace().nth(1)).and_then(|v| v.parse::<f64>().ok()).unwrap_or(0.0) * 1024.0
}

fn ms(t: Instant) -> f64 {
    t.elapsed().as_secs_f64() * 1e3
}

fn main() {
    let a: Vec<String> = std::env::args().collect();
    let path = std::path::PathBuf::from(&a[1]);
    let vox: f64 = a.get(3).and_then(|s| s.parse().ok()).unwrap_or(19.5);
    let t = Instant::now();
    let st = stack::load(&path, &LoadOptions { voxel: Some(VoxelSize::from_user_um(&[vox]).unwrap()), ..Default::default() }).unwrap();
    println!("open {:?} ({:.2} GB, mapped: {}) in {:.1} ms", st.dims, st.bytes() as f64 / 1e9, st.samples.is_mapped(), ms(t));
    let window = [15000.0, 60000.0];
    let mut rgba = vec![];
    let [nx, ny, nz] = st.dims;
    for (axis, name) in [(2, "k plane"), (1, "j plane"), (0, "i plane")] {
        let mut times = vec![];
        for r in 0..8 {
            let idx = (st.dims[axis] / 9) * (r + 1);
            let t = Instant::now();
            let p = ductline::display::plane(&st, axis, idx);
            window_level(&p, window, &mut rgba);
            times.push(ms(t));
        }
        times.sort_by(f64::total_cmp);
        println!("{name}: median {:.1} ms, worst {:.1} ms", times[4], times[7]);
    }
    // the radial cut as the app makes it: at most 1024 samples a side
    let (lo, hi) = st.bounds_mm().unwrap();
    let centre = v3::scale(v3::add(lo, hi), 0.5);
    let reach = v3::dist(lo, hi) / 2.0;
    let pitch = (st.voxel.as_ref().unwrap().min()).max(2.0 * reach / 1024.0);
    let n = (2.0 * reach / pitch) as usize;
    let mut times = vec![];
    for r in 0..8 {
        let t0 = r as f64 * 0.4;
        let er = [t0.cos(), t0.sin(), 0.0];
        let g = Grid { origin: v3::axpy(v3::axpy(centre, -reach, er), reach, [0.0, 0.0, 1.0]), du: v3::scale(er, pitch), dv: [0.0, 0.0, -pitch], nu: n, nv: n };
        let t = Instant::now();
        let vals = section::resample(&st, &g);
        window_level(&vals, window, &mut rgba);
        times.push(ms(t));
    }
    times.sort_by(f64::total_cmp);
    println!("radial cut {n}×{n}: median {:.1} ms, worst {:.1} ms", times[4], times[7]);
    // what the app shows: the overview when zoomed out, the visible window at full resolution when zoomed in
    let b = 4;
    let t = Instant::now();
    let ov = ductline::display::overview(&st, b);
    println!("overview {b}×{b}×{b} {:?} ({:.0} MB) built in {:.1} s", ov.dims, ov.bytes() as f64 / 1e6, t.elapsed().as_secs_f64());
    for (axis, name) in [(2, "k"), (1, "j"), (0, "i")] {
        let t = Instant::now();
        for r in 0..8 {
            let p = ductline::display::plane(&ov, axis, (ov.dims[axis] / 9) * (r + 1));
            window_level(&p, window, &mut rgba);
        }
        println!("zoomed out, {name} plane from the overview: {:.2} ms", ms(t) / 8.0);
    }
    let opitch = ov.voxel.as_ref().unwrap().min().max(2.0 * reach / 1024.0);
    let on = (2.0 * reach / opitch) as usize;
    let t = Instant::now();
    for r in 0..8 {
        let t0 = r as f64 * 0.4;
        let er = [t0.cos(), t0.sin(), 0.0];
        let g =
            Grid { origin: v3::axpy(v3::axpy(centre, -reach, er), reach, [0.0, 0.0, 1.0]), du: v3::scale(er, opitch), dv: [0.0, 0.0, -opitch], nu: on, nv: on };
        window_level(&section::resample(&ov, &g), window, &mut rgba);
    }
    println!("zoomed out, radial cut {on}×{on} from the overview: {:.2} ms", ms(t) / 8.0);
    for zoom in [2usize, 4] {
        for (axis, name, nu, nv) in [(2, "k", nx, ny), (1, "j", nx, nz), (0, "i", ny, nz)] {
            let (wu, wv) = (nu / zoom, nv / zoom);
            let mut worst: f64 = 0.0;
            let t = Instant::now();
            for r in 0..8 {
                let t1 = Instant::now();
                let (u0, v0) = ((nu - wu) * r / 8, (nv - wv) * r / 8);
                let p = ductline::display::plane_window(&st, axis, (st.dims[axis] / 9) * (r + 1), [u0, u0 + wu], [v0, v0 + wv]);
                window_level(&p, window, &mut rgba);
                worst = worst.max(ms(t1));
            }
            println!("zoom {zoom}, {name} plane window {wu}×{wv} at full resolution: mean {:.1} ms, worst {worst:.1} ms", ms(t) / 8.0);
        }
    }
    println!("after viewing: peak RSS {:.2} GB = {:.3} × stack ({nx}×{ny}×{nz})", rss("VmHWM:") / 1e9, rss("VmHWM:") / st.bytes() as f64);
    if let Some(lm) = a.get(4) {
        let items = ductline::landmarks::read_csv(std::path::Path::new(lm), Some(&st)).unwrap();
        let cl = ductline::pipeline::fit(&items, &FitSettings::default(), st.voxel().unwrap().max()).unwrap();
        let ms_ = MeasureSettings { step_mm: cl.length / 400.0, ..Default::default() };
        let t = Instant::now();
        let (_, rows) = ductline::measure::measure(&st, &cl, &ms_, &[], &Greenwood::preset("human").unwrap(), &Progress::new()).unwrap();
        let sound = rows.iter().filter(|r| r.sound()).count();
        println!("measure: {} sections ({sound} sound) in {:.2} s; peak RSS {:.2} GB", rows.len(), t.elapsed().as_secs_f64(), rss("VmHWM:") / 1e9);
    }
}

/// Window/level into a reused byte buffer (grown to four bytes a value).
fn window_level(values: &[f32], window: [f32; 2], out: &mut Vec<u8>) {
    out.resize(4 * values.len(), 0);
    ductline::display::window_level(values, window, out);
}
