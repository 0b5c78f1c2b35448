//! NIfTI-1 and NIfTI-2 single-file volumes (.nii, .nii.gz), either byte order. The header is
//! read by its published layout (NIfTI-1: 348 bytes; NIfTI-2: 540 bytes); the samples follow at
//! `vox_offset`. Scaling (scl_slope, scl_inter) is applied when it changes a value; the
//! index-to-world transform (sform, else qform, else the voxel sizes) is kept as
//! [`super::World`] in RAS millimetres. The stack frame itself stays (i·vx, j·vy, k·vz).

use super::raw::{self, Kind};
use super::{LoadOptions, Samples, Stack, VoxelSize, VoxelSource, World};
use crate::progress::Progress;
use crate::{Error, Result};
use std::io::Read;
use std::path::Path;

/// True for the file names this reader takes.
pub(super) fn claims(path: &Path) -> bool {
    let name = path.file_name().map(|n| n.to_string_lossy().to_lowercase()).unwrap_or_default();
    name.ends_with(".nii") || name.ends_with(".nii.gz")
}

/// What the header says.
struct Head {
    dims: [usize; 3],
    /// Volumes beyond the first (4-D files): only the first is read.
    extra_volumes: usize,
    datatype: i16,
    voxel_mm: [f64; 3],
    units_known: bool,
    offset: usize,
    slope: f64,
    inter: f64,
    world: World,
    big_endian: bool,
}

/// The file's first `limit` bytes (all of it with `u64::MAX`), inflated when gzip-compressed
/// (gzip magic 1f 8b, whatever the name): the header alone needs no more than 540.
fn read_start(path: &Path, limit: u64) -> Result<Vec<u8>> {
    let mut out = vec![];
    reader(path)?.take(limit).read_to_end(&mut out).map_err(|e| read_error(path, e))?;
    Ok(out)
}

/// The file's bytes from the start, inflated when gzip-compressed (gzip magic 1f 8b, whatever
/// the name).
fn reader(path: &Path) -> Result<Box<dyn Read>> {
    let mut f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
    let mut magic = [0u8; 2];
    let gz = f.read_exact(&mut magic).is_ok() && magic == [0x1f, 0x8b];
    std::io::Seek::rewind(&mut f).map_err(|e| Error::io(path, e))?;
    Ok(if gz { Box::new(flate2::read::MultiGzDecoder::new(std::io::BufReader::with_capacity(1 << 20, f))) } else { Box::new(f) })
}

fn read_error(path: &Path, e: std::io::Error) -> Error {
    match e.kind() {
        std::io::ErrorKind::InvalidInput | std::io::ErrorKind::InvalidData => {
            Error::format(path, format!("cannot inflate the gzip stream (truncated or corrupt?): {e}"))
        }
        _ => Error::io(path, e),
    }
}

// the two header layouts are read into one tuple, field by field beside its offset
#[allow(clippy::type_complexity)]
fn parse(path: &Path, b: &[u8]) -> Result<Head> {
    let bad = |m: &str| Error::format(path, m.to_string());
    if b.len() < 348 {
        return Err(bad("not a NIfTI file: shorter than a NIfTI-1 header"));
    }
    let le = i32::from_le_bytes(b[0..4].try_into().unwrap());
    let be = i32::from_be_bytes(b[0..4].try_into().unwrap());
    let (v2, big) = match (le, be) {
        (348, _) => (false, false),
        (_, 348) => (false, true),
        (540, _) => (true, false),
        (_, 540) => (true, true),
        _ => return Err(bad("not a NIfTI file: header size is neither 348 (NIfTI-1) nor 540 (NIfTI-2)")),
    };
    if v2 && b.len() < 540 {
        return Err(bad("NIfTI-2 header truncated"));
    }
    let bytes = |o: usize, n: usize| -> [u8; 8] {
        let mut a = [0u8; 8];
        a[..n].copy_from_slice(&b[o..o + n]);
        if big {
            a[..n].reverse();
        }
        a
    };
    let i16_at = |o: usize| i16::from_le_bytes(bytes(o, 2)[..2].try_into().unwrap());
    let i32_at = |o: usize| i32::from_le_bytes(bytes(o, 4)[..4].try_into().unwrap());
    let f32_at = |o: usize| f32::from_le_bytes(bytes(o, 4)[..4].try_into().unwrap()) as f64;
    let i64_at = |o: usize| i64::from_le_bytes(bytes(o, 8));
    let f64_at = |o: usize| f64::from_le_bytes(bytes(o, 8));
    // (datatype, dim[0..8], pixdim[0..8], vox_offset, slope, inter, units, qform, sform, quatern
    // b c d, qoffset x y z, srow x y z)
    let (datatype, dim, pixdim, offset, slope, inter, units, qcode, scode, quat, qoff, srow): (
        i16,
        [i64; 8],
        [f64; 8],
        f64,
        f64,
        f64,
        u8,
        i32,
        i32,
        [f64; 3],
        [f64; 3],
        [[f64; 4]; 3],
    ) = if v2 {
        (
            i16_at(12),
            std::array::from_fn(|k| i64_at(16 + 8 * k)),
            std::array::from_fn(|k| f64_at(104 + 8 * k)),
            i64_at(168) as f64,
            f64_at(176),
            f64_at(184),
            i32_at(500) as u8,
            i32_at(344),
            i32_at(348),
            [f64_at(352), f64_at(360), f64_at(368)],
            [f64_at(376), f64_at(384), f64_at(392)],
            std::array::from_fn(|r| std::array::from_fn(|c| f64_at(400 + 32 * r + 8 * c))),
        )
    } else {
        (
            i16_at(70),
            std::array::from_fn(|k| i16_at(40 + 2 * k) as i64),
            std::array::from_fn(|k| f32_at(76 + 4 * k)),
            f32_at(108),
            f32_at(112),
            f32_at(116),
            b[123],
            i16_at(252) as i32,
            i16_at(254) as i32,
            [f32_at(256), f32_at(260), f32_at(264)],
            [f32_at(268), f32_at(272), f32_at(276)],
            std::array::from_fn(|r| std::array::from_fn(|c| f32_at(280 + 16 * r + 4 * c))),
        )
    };
    let nd = dim[0];
    if !(2..=7).contains(&nd) {
        return Err(bad(&format!("NIfTI dim[0] = {nd}; a volume needs 2 to 7 dimensions")));
    }
    let size = |k: usize| if (k as i64) <= nd { dim[k] } else { 1 };
    let d = [size(1), size(2), size(3)];
    if d.iter().any(|n| !(1..=1 << 20).contains(n)) {
        return Err(bad(&format!("NIfTI dimensions {} × {} × {} are not a volume", d[0], d[1], d[2])));
    }
    let extra: i64 = (4..=nd as usize).map(size).fold(1i64, |a, x| a.saturating_mul(x.max(1))) - 1;
    let scale = match units & 7 {
        1 => Some(1000.0),
        2 => Some(1.0),
        3 => Some(0.001),
        _ => None,
    };
    let f = scale.unwrap_or(1.0);
    let voxel_mm = [pixdim[1].abs() * f, pixdim[2].abs() * f, pixdim[3].abs() * f];
    if voxel_mm.iter().any(|x| !(x.is_finite() && *x > 0.0)) && nd >= 3 {
        return Err(bad(&format!("NIfTI voxel size {:?} is not positive", &pixdim[1..4])));
    }
    // index → world (mm, RAS): sform, else qform (quaternion, qfac = pixdim[0]), else scaling
    let world = if scode > 0 {
        World { matrix: srow.map(|r| r.map(|x| x * f)), frame: "RAS", source: format!("NIfTI sform (code {scode})") }
    } else if qcode > 0 {
        let [qb, qc, qd] = quat;
        let qa = (1.0 - (qb * qb + qc * qc + qd * qd)).max(0.0).sqrt();
        let r = [
            [qa * qa + qb * qb - qc * qc - qd * qd, 2.0 * (qb * qc - qa * qd), 2.0 * (qb * qd + qa * qc)],
            [2.0 * (qb * qc + qa * qd), qa * qa + qc * qc - qb * qb - qd * qd, 2.0 * (qc * qd - qa * qb)],
            [2.0 * (qb * qd - qa * qc), 2.0 * (qc * qd + qa * qb), qa * qa + qd * qd - qb * qb - qc * qc],
        ];
        let qfac = if pixdim[0] < 0.0 { -1.0 } else { 1.0 };
        let s = [voxel_mm[0], voxel_mm[1], voxel_mm[2] * qfac];
        World {
            matrix: std::array::from_fn(|i| [r[i][0] * s[0], r[i][1] * s[1], r[i][2] * s[2], qoff[i] * f]),
            frame: "RAS",
            source: format!("NIfTI qform (code {qcode})"),
        }
    } else {
        World {
            matrix: std::array::from_fn(|i| std::array::from_fn(|c| if c == i { voxel_mm[i] } else { 0.0 })),
            frame: "RAS",
            source: "NIfTI voxel sizes (no qform or sform)".into(),
        }
    };
    // samples start after the header and its 4-byte extension flag at the earliest
    let header_len = if v2 { 540.0 } else { 348.0 };
    let offset = if offset >= header_len { offset as usize } else { header_len as usize + 4 };
    Ok(Head {
        dims: d.map(|x| x as usize),
        extra_volumes: extra as usize,
        datatype,
        voxel_mm,
        units_known: scale.is_some(),
        offset,
        slope,
        inter,
        world,
        big_endian: big,
    })
}

/// The sample type of a NIfTI datatype code, for the types read here.
fn datatype(path: &Path, code: i16) -> Result<Kind> {
    Ok(match code {
        2 => Kind::U8,
        4 => Kind::I16,
        8 => Kind::I32,
        16 => Kind::F32,
        64 => Kind::F64,
        256 => Kind::I8,
        512 => Kind::U16,
        768 => Kind::U32,
        c => return Err(Error::format(path, format!("NIfTI datatype {c} is not supported (grey 8/16/32-bit integers and 32/64-bit floats are)"))),
    })
}

pub(super) fn header(path: &Path) -> Result<super::Header> {
    let h = parse(path, &read_start(path, 540)?)?;
    let kind = datatype(path, h.datatype)?;
    let voxel = Some(VoxelSize::new(h.voxel_mm, std::array::from_fn(|_| VoxelSource::FileHeader)));
    let (sample, bytes_per_sample) = kind.held(scaled(&h));
    Ok(super::Header { dims: h.dims, sample, bytes_per_sample, voxel })
}

/// The scaling changes values: a slope other than 0 or 1, or an intercept other than 0.
fn scaled(h: &Head) -> bool {
    h.slope != 0.0 && h.slope.is_finite() && (h.slope != 1.0 || h.inter != 0.0)
}

pub(super) fn load(path: &Path, opts: &LoadOptions, progress: &Progress) -> Result<Stack> {
    // the header first: the memory the volume needs is checked before the file is inflated
    let h = parse(path, &read_start(path, 540)?)?;
    let kind = datatype(path, h.datatype)?;
    let n = h.dims.iter().product::<usize>();
    super::check_memory(path, (n as u64).saturating_mul(kind.held(scaled(&h)).1 as u64), opts.max_bytes)?;
    let mut warnings = vec![];
    if h.extra_volumes > 0 {
        warnings.push(format!("{}: a 4-D file; only the first of {} volumes is read", path.display(), h.extra_volumes + 1));
    }
    if !h.units_known {
        warnings.push(format!("{}: the header gives no spatial unit; millimetres assumed", path.display()));
    }
    // the samples stream through a block buffer into the stack: no second copy of the volume
    let scale = scaled(&h).then_some((h.slope, h.inter, "scl_slope, scl_inter"));
    let (m, c) = scale.map(|(m, c, _)| (m, c)).unwrap_or((1.0, 0.0));
    let mut r = reader(path)?;
    std::io::copy(&mut (&mut r).take(h.offset as u64), &mut std::io::sink()).map_err(|e| read_error(path, e))?;
    const BLOCK: usize = 1 << 22;
    let bps = kind.bytes();
    let mut buf = vec![0u8; BLOCK * bps];
    progress.start(n.div_ceil(BLOCK) as u64);
    let short = || Error::format(path, format!("the file holds fewer samples than its header's {} × {} × {} (truncated?)", h.dims[0], h.dims[1], h.dims[2]));
    macro_rules! stream {
        ($t:ty, $out:path, $samples:path) => {{
            let mut v: Vec<$t> = vec![Default::default(); n];
            for o in v.chunks_mut(BLOCK) {
                progress.check()?;
                let b = &mut buf[..o.len() * bps];
                r.read_exact(b).map_err(|e| if e.kind() == std::io::ErrorKind::UnexpectedEof { short() } else { read_error(path, e) })?;
                raw::convert(b, kind, h.big_endian, (m, c), $out(o));
                progress.add(1);
            }
            $samples(v.into())
        }};
    }
    let samples = match kind.held(scale.is_some()).0 {
        "uint8" => stream!(u8, raw::Out::U8, Samples::U8),
        "uint16" => stream!(u16, raw::Out::U16, Samples::U16),
        _ => stream!(f32, raw::Out::F32, Samples::F32),
    };
    warnings.extend(raw::notes(path, kind, scale));
    let voxel = Some(VoxelSize::new(h.voxel_mm, std::array::from_fn(|_| VoxelSource::FileHeader)));
    let stack = Stack { dims: h.dims, samples, voxel, origin_vox: [0.0; 3], path: path.to_path_buf(), warnings, world: Some(h.world) };
    super::crop_and_bin(stack, opts)
}
