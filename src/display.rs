//! Display helpers with no GUI types: whole stack planes and window/level mapping to RGBA bytes.
//! The app turns these into textures; benchmarks time them on their own.

use crate::stack::{Sample, Stack};
use crate::with_samples;
use rayon::prelude::*;

/// RGBA of samples outside the stack (NaN): a dark blue that no grey value maps to.
pub const OUTSIDE_RGBA: [u8; 4] = [14, 20, 44, 255];

/// The plane of constant index `index` along stack axis `axis` (0 = i, 1 = j, 2 = k) as f32,
/// row-major with the lower remaining axis fastest: (i, j) for k, (i, k) for j, (j, k) for i.
pub fn plane(stack: &Stack, axis: usize, index: usize) -> Vec<f32> {
    let [nx, ny, nz] = stack.dims;
    with_samples!(&stack.samples, v => plane_of(v, [nx, ny, nz], axis, index))
}

fn plane_of<T: Sample>(v: &[T], [nx, ny, nz]: [usize; 3], axis: usize, index: usize) -> Vec<f32> {
    match axis {
        2 => v[index * nx * ny..(index + 1) * nx * ny].par_iter().map(|s| s.f()).collect(),
        1 => (0..nz).flat_map(|k| (0..nx).map(move |i| (k * ny + index) * nx + i)).map(|i| v[i].f()).collect(),
        _ => (0..nz).flat_map(|k| (0..ny).map(move |j| (k * ny + j) * nx + index)).map(|i| v[i].f()).collect(),
    }
}

/// Window/level: grey values `window[0]` → black and `window[1]` → white, linear between,
/// as RGBA bytes (4 per value). NaN becomes [`OUTSIDE_RGBA`].
pub fn window_level(values: &[f32], window: [f32; 2], out: &mut Vec<u8>) {
    out.resize(values.len() * 4, 0);
    let lo = window[0];
    let s = 255.0 / (window[1] - window[0]).max(f32::EPSILON);
    out.par_chunks_mut(4 * 4096).zip(values.par_chunks(4096)).for_each(|(o, v)| {
        for (px, &x) in o.chunks_exact_mut(4).zip(v) {
            px.copy_from_slice(&if x.is_nan() {
                OUTSIDE_RGBA
            } else {
                let g = ((x - lo) * s).clamp(0.0, 255.0) as u8;
                [g, g, g, 255]
            });
        }
    });
}
