//! CPU side of a view update at 2048²: take a whole slice out of a 16-bit stack and map it
//! through window/level to RGBA bytes (what becomes the texture). Prints milliseconds.
//!
//!     cargo run --release --example bench_view

use ductline::stack::{Samples, Stack};
use std::time::Instant;

fn main() {
    let n = 2048;
    let slices = 8;
    let data: Vec<u16> = (0..n * n * slices).map(|i| ((i * 2654435761usize) >> 16) as u16).collect();
    let st = Stack::from_samples([n, n, slices], Samples::U16(data.into()), None).unwrap();
    let mut rgba = vec![];
    let mut times = vec![];
    for r in 0..40 {
        let t = Instant::now();
        let plane = ductline::display::plane(&st, 2, r % slices);
        window_level(&plane, [1000.0, 60000.0], &mut rgba);
        times.push(t.elapsed().as_secs_f64() * 1e3);
    }
    times.sort_by(f64::total_cmp);
    println!(
        "2048² slice → RGBA: median {:.2} ms, best {:.2} ms, worst {:.2} ms ({} threads)",
        times[times.len() / 2],
        times[0],
        times[times.len() - 1],
        rayon::current_num_threads()
    );
    let t = Instant::now();
    for _ in 0..20 {
        window_level(&ductline::display::plane(&st, 1, 700), [1000.0, 60000.0], &mut rgba);
    }
    println!("2048×8 j-plane → RGBA: {:.3} ms", t.elapsed().as_secs_f64() * 1e3 / 20.0);
}

/// Window/level into a reused byte buffer (grown to four bytes a value).
fn window_level(values: &[f32], window: [f32; 2], out: &mut Vec<u8>) {
    out.resize(4 * values.len(), 0);
    ductline::display::window_level(values, window, out);
}
