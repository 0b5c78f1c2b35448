//! Measuring speed: trilinear samples per second, and 400 sections on a 512³ phantom.
//!
//!     cargo run --release --example bench_measure [voxel_um] [outdir]
//!
//! With an outdir it also writes the phantom there, and the section planes for
//! bench/measure_reference.py (see bench/measure_vs_scipy.py).
//!
//! The default voxel size (19.5 µm) makes the default phantom about 512 voxels across.

use ductline::centreline::FitSettings;
use ductline::cochlea::Greenwood;
use ductline::measure::MeasureSettings;
use ductline::phantom::{self, PhantomSpec};
use ductline::pipeline;
use ductline::progress::Progress;
use ductline::section::{self, Grid};
use std::time::Instant;

fn main() {
    let vox: f64 = std::env::args().nth(1).and_then(|s| s.parse().ok()).unwrap_or(19.5);
    let t = Instant::now();
    let spec = PhantomSpec { voxel_um: [vox; 3], ..Default::default() };
    let ph = phantom::generate(&spec, &Progress::new()).unwrap();
    println!("phantom {:?} voxels ({:.0} MB) in {:.1} s", ph.stack.dims, ph.stack.bytes() as f64 / 1e6, t.elapsed().as_secs_f64());
    if let Some(dir) = std::env::args().nth(2) {
        phantom::write(&ph, std::path::Path::new(&dir)).unwrap();
    }
    let cl = pipeline::fit(&ph.landmarks, &FitSettings::default(), ph.stack.voxel().unwrap().max()).unwrap();
    // sampler throughput: the planes of 400 sections, 2.4 mm square at half-voxel pitch
    let step = cl.length / 400.0;
    let geoms = section::geometry(&cl, step);
    let pitch = 0.5 * vox / 1000.0;
    let grids: Vec<Grid> = geoms.iter().map(|g| section::section_grid(g, 1.2, pitch)).collect();
    let t = Instant::now();
    let n: usize = {
        use rayon::prelude::*;
        grids.par_iter().map(|g| section::resample(&ph.stack, g).len()).sum()
    };
    let dt = t.elapsed().as_secs_f64();
    println!("trilinear: {n} samples in {dt:.3} s = {:.0} M samples/s ({} threads)", n as f64 / dt / 1e6, rayon::current_num_threads());
    // the whole measure, 400 sections
    let ms = MeasureSettings { step_mm: step, ..Default::default() };
    let t = Instant::now();
    let (_, rows) = ductline::measure::measure(&ph.stack, &cl, &ms, &[], &Greenwood::preset("human").unwrap(), &Progress::new()).unwrap();
    println!(
        "measure: {} sections in {:.3} s ({:.1} ms a section)",
        rows.len(),
        t.elapsed().as_secs_f64(),
        1e3 * t.elapsed().as_secs_f64() / rows.len() as f64
    );
    // the same sections for bench/measure_reference.py (scipy/scikit-image doing the same job)
    if let Some(dir) = std::env::args().nth(2) {
        let secs: Vec<serde_json::Value> = geoms
            .iter()
            .zip(&rows)
            .map(|(g, r)| {
                serde_json::json!({"centre": g.centre, "u": g.u, "v": g.v, "lamina_uv": r.lamina_uv, "ligament_uv": r.ligament_uv,
                                           "half_mm": r.half_mm, "pitch_mm": r.pitch_mm, "sv_area_mm2": r.sv.area, "st_area_mm2": r.st.area})
            })
            .collect();
        let out = serde_json::json!({"voxel_mm": ph.stack.voxel.as_ref().unwrap().mm, "step_mm": step, "sections": secs, "seconds": t.elapsed().as_secs_f64()});
        std::fs::write(std::path::Path::new(&dir).join("sections.json"), out.to_string()).unwrap();
    }
}
