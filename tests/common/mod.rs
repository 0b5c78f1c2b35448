//! Helpers shared by the integration tests.
#![allow(dead_code)]

use ductline::measure::Row;
use ductline::phantom::TruthRow;
use std::path::PathBuf;

pub fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures").join(name)
}

pub fn raw_u16(name: &str) -> Vec<u16> {
    std::fs::read(fixture(name)).unwrap().chunks_exact(2).map(|c| u16::from_le_bytes([c[0], c[1]])).collect()
}

/// A truth column linearly interpolated at `angle_deg`.
pub fn truth_at(truth: &[TruthRow], angle_deg: f64, col: fn(&TruthRow) -> f64) -> f64 {
    let i = truth.partition_point(|t| t.angle_deg < angle_deg).clamp(1, truth.len() - 1);
    let (a, b) = (&truth[i - 1], &truth[i]);
    let f = (angle_deg - a.angle_deg) / (b.angle_deg - a.angle_deg);
    col(a) * (1.0 - f) + col(b) * f
}

/// The rows at least `margin_deg` from either end of a duct traced to `depth_deg` (the checks'
/// window: the ends of a centreline are extrapolated and its sections cut the end caps).
pub fn inner_rows(rows: &[Row], depth_deg: f64, margin_deg: f64) -> impl Iterator<Item = &Row> {
    rows.iter().filter(move |r| r.angle_deg >= margin_deg && r.angle_deg <= depth_deg - margin_deg)
}

/// Errors of measured rows against the phantom truth, rows at least `margin_deg` from both ends:
/// (relative SV area, relative ST area, width mm, wall mm) per row, and how many rows were flagged.
pub struct Errors {
    pub sv: Vec<f64>,
    pub st: Vec<f64>,
    pub width: Vec<f64>,
    pub wall: Vec<f64>,
    pub flagged: usize,
    pub rows: usize,
}

pub fn errors(rows: &[Row], truth: &[TruthRow], margin_deg: f64) -> Errors {
    let tmax = truth.last().unwrap().angle_deg;
    let mut e = Errors { sv: vec![], st: vec![], width: vec![], wall: vec![], flagged: 0, rows: 0 };
    for r in inner_rows(rows, tmax, margin_deg) {
        e.rows += 1;
        if !r.sound() {
            e.flagged += 1;
        }
        let t = |c: fn(&TruthRow) -> f64| truth_at(truth, r.angle_deg, c);
        if let Some(a) = r.sv.area {
            e.sv.push((a - t(|x| x.sv_area_mm2)).abs() / t(|x| x.sv_area_mm2));
        }
        if let Some(a) = r.st.area {
            e.st.push((a - t(|x| x.st_area_mm2)).abs() / t(|x| x.st_area_mm2));
        }
        if let Some(w) = r.partition_width_mm {
            e.width.push((w - t(|x| x.partition_width_mm)).abs());
        }
        if let Some(w) = r.wall_mm {
            e.wall.push((w - t(|x| x.wall_mm)).abs());
        }
    }
    e
}

/// The q-quantile (0..1) of a non-empty set of values.
pub fn quantile(v: &[f64], q: f64) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    s[((s.len() - 1) as f64 * q).round() as usize]
}
