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
    let (nu, nv) = match axis {
        2 => (nx, ny),
        1 => (nx, nz),
        _ => (ny, nz),
    };
    plane_window(stack, axis, index, [0, nu], [0, nv])
}

/// The part [u0, u1) × [v0, v1) of a plane (in its own row/column numbering, as [`plane`]).
/// Rows are gathered in parallel; only the voxels shown are touched, which keeps zoomed-in views
/// of memory-mapped stacks fast.
pub fn plane_window(stack: &Stack, axis: usize, index: usize, u: [usize; 2], v: [usize; 2]) -> Vec<f32> {
    let [nx, ny, _] = stack.dims;
    let w = u[1] - u[0];
    let mut out = vec![0f32; w * (v[1] - v[0])];
    with_samples!(&stack.samples, d => out.par_chunks_mut(w.max(1)).enumerate().for_each(|(r, row)| {
        let b = v[0] + r;
        // (start of the row, step between its samples) in the buffer
        let (start, step) = match axis {
            2 => ((index * ny + b) * nx + u[0], 1),
            1 => ((b * ny + index) * nx + u[0], 1),
            _ => ((b * ny + u[0]) * nx + index, nx),
        };
        for (a, px) in row.iter_mut().enumerate() {
            *px = sample_f(d, start + a * step);
        }
    }));
    out
}

#[inline]
fn sample_f<T: Sample>(d: &[T], i: usize) -> f32 {
    d[i].f()
}

/// A b×b×b block-averaged copy of the stack (an overview for zoomed-out display), in memory,
/// with coordinates kept (its voxel (0,0,0) sits at the centre of the first block).
pub fn overview(stack: &Stack, b: usize) -> Stack {
    let [nx, ny, nz] = stack.dims;
    let dims = [(nx / b).max(1), (ny / b).max(1), nz.div_ceil(b)];
    let slice = dims[0] * dims[1];
    let b_xy = b.min(nx).min(ny);
    let mut out = vec![0f32; slice * dims[2]];
    with_samples!(&stack.samples, d => out.par_chunks_mut(slice).enumerate().for_each(|(k, o)| {
        let pages: Vec<&[_]> = (k * b..((k + 1) * b).min(nz)).map(|p| &d[p * nx * ny..(p + 1) * nx * ny]).collect();
        crate::stack::bin_block(&pages, nx, ny, b_xy, o, |x| x);
    }));
    let voxel = stack.voxel.clone().map(|mut v| {
        v.mm = v.mm.map(|x| x * b as f64);
        v
    });
    let scale: [f64; 3] = match &stack.voxel {
        Some(v) => std::array::from_fn(|a| v.mm[a] / v.original_mm[a]),
        None => [1.0; 3],
    };
    Stack {
        dims,
        samples: crate::stack::Samples::F32(out.into()),
        voxel,
        origin_vox: std::array::from_fn(|a| stack.origin_vox[a] + (b as f64 - 1.0) / 2.0 * scale[a]),
        path: stack.path.clone(),
        warnings: vec![],
        world: stack.world.clone(),
    }
}

/// Window/level: grey values `window[0]` → black and `window[1]` → white, linear between,
/// as RGBA bytes (4 per value) into `out` (4 × as many bytes as values; a caller's texture
/// buffer). NaN becomes [`OUTSIDE_RGBA`].
pub fn window_level(values: &[f32], window: [f32; 2], out: &mut [u8]) {
    assert_eq!(out.len(), 4 * values.len(), "window_level: four bytes a value");
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
