use ductline::*;
use std::time::Instant;
fn main() {
    let t = Instant::now();
    let opts = stack::LoadOptions { voxel: Some(stack::VoxelSize::from_user_um(&[19.5; 3]).unwrap()), map: std::env::var("MAP").is_ok(), ..Default::default() };
    let st = stack::load(std::path::Path::new("/tmp/bm/plain.tif"), &opts).unwrap();
    println!("load {:.3}", t.elapsed().as_secs_f64());
    let mut st = st;
    if std::env::var("HUGE").is_ok() {
        let t = Instant::now();
        let data: Vec<u16> = match &st.samples {
            stack::Samples::U16(b) => b.to_vec(),
            _ => panic!(),
        };
        let bytes = data.len() * 2;
        let mut m = memmap2::MmapMut::map_anon(bytes).unwrap();
        m.advise(memmap2::Advice::HugePage).unwrap();
        m.copy_from_slice(bytemuck::cast_slice(&data));
        let m = m.make_read_only().unwrap();
        st.samples = stack::Samples::U16(stack::Buf::Mapped { map: std::sync::Arc::new(m), offset: 0, len: data.len() });
        println!("huge copy {:.3}", t.elapsed().as_secs_f64());
    }
    let t = Instant::now();
    let lm = landmarks::read_csv(std::path::Path::new("/tmp/bm/landmarks.csv"), Some(&st)).unwrap();
    println!("csv {:.3}", t.elapsed().as_secs_f64());
    let t = Instant::now();
    let cl = pipeline::fit(&lm, &centreline::FitSettings::default()).unwrap();
    println!("fit {:.3}", t.elapsed().as_secs_f64());
    let t = Instant::now();
    let g = section::geometry(&cl, 0.0838);
    println!("geometry {:.3} ({})", t.elapsed().as_secs_f64(), g.len());
    {
        use rayon::prelude::*;
        let grids: Vec<section::Grid> = g.iter().map(|g| section::section_grid(g, 1.2, 0.00975)).collect();
        for _ in 0..std::env::var("TRI").map(|_| 8).unwrap_or(0) {
            let t = Instant::now();
            let n: usize = grids.par_iter().map(|g| section::resample(&st, g).len()).sum();
            let dt = t.elapsed().as_secs_f64();
            println!("trilinear {:.0} M/s", n as f64 / dt / 1e6);
        }
    }
    let ms = measure::MeasureSettings { step_mm: 0.0838, ..Default::default() };
    let gw = cochlea::Greenwood::preset("human").unwrap();
    for _ in 0..3 {
        let t = Instant::now();
        let (_, rows) = measure::measure(&st, &cl, &ms, &[], &gw, &progress::Progress::new()).unwrap();
        println!("measure {:.3}", t.elapsed().as_secs_f64());
        let t = Instant::now();
        let s = export::table_csv(&rows);
        println!("csv {:.3} {}", t.elapsed().as_secs_f64(), s.len());
    }
}
#[allow(dead_code)]
fn unused() {}
