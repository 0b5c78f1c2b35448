//! Loads a stack and prints the time, throughput and peak resident memory against the stack's bytes.
//!
//!     cargo run --release --example bench_load -- STACK.tif [repeats]

use ductline::stack::{self, LoadOptions};
use std::time::Instant;

fn peak_rss_bytes() -> u64 {
    let s = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    s.lines().find(|l| l.starts_with("VmHWM:")).and_then(|l| l.split_whitespace().nth(1)).and_then(|v| v.parse::<u64>().ok()).unwrap_or(0) * 1024
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let path = std::path::PathBuf::from(args.get(1).expect("usage: bench_load STACK [repeats]"));
    let repeats: usize = args.get(2).and_then(|s| s.parse().ok()).unwrap_or(3);
    let mut best = f64::INFINITY;
    let mut bytes = 0;
    for _ in 0..repeats {
        let t = Instant::now();
        let st = stack::load(&path, &LoadOptions::default()).unwrap_or_else(|e| panic!("{e}"));
        best = best.min(t.elapsed().as_secs_f64());
        bytes = st.bytes();
        drop(st);
    }
    let peak = peak_rss_bytes();
    println!(
        "ductline {}: best of {repeats} {:.3} s ({:.0} MB/s), stack {:.1} MB, peak RSS {:.1} MB = {:.3} × stack + {:.1} MB",
        path.display(),
        best,
        bytes as f64 / 1e6 / best,
        bytes as f64 / 1e6,
        peak as f64 / 1e6,
        peak as f64 / bytes as f64,
        (peak as f64 - bytes as f64) / 1e6
    );
}
