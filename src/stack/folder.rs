//! A folder of single-page TIFF or PNG slices, taken in natural order (slice_2 before slice_10).

use super::tiff::Kind;
use super::{LoadOptions, Sample, Samples, Stack, VoxelSize, VoxelSource};
use crate::progress::Progress;
use crate::{Error, Result};
use rayon::prelude::*;
use std::cmp::Ordering;
use std::path::{Path, PathBuf};

/// Natural order of names: runs of digits compare by value, the rest by characters.
/// Letter case only breaks ties.
pub fn natural_cmp(a: &str, b: &str) -> Ordering {
    natural_nocase(a, b).then_with(|| a.cmp(b))
}

fn natural_nocase(a: &str, b: &str) -> Ordering {
    let (mut a, mut b) = (a.as_bytes(), b.as_bytes());
    loop {
        match (a.first(), b.first()) {
            (None, None) => return Ordering::Equal,
            (None, _) => return Ordering::Less,
            (_, None) => return Ordering::Greater,
            (Some(x), Some(y)) if x.is_ascii_digit() && y.is_ascii_digit() => {
                let da = a.iter().take_while(|c| c.is_ascii_digit()).count();
                let db = b.iter().take_while(|c| c.is_ascii_digit()).count();
                let (na, nb) = (trim_zeros(&a[..da]), trim_zeros(&b[..db]));
                let ord = na.len().cmp(&nb.len()).then_with(|| na.cmp(nb)).then_with(|| da.cmp(&db));
                if ord != Ordering::Equal {
                    return ord;
                }
                a = &a[da..];
                b = &b[db..];
            }
            (Some(x), Some(y)) => {
                let ord = x.to_ascii_lowercase().cmp(&y.to_ascii_lowercase());
                if ord != Ordering::Equal {
                    return ord;
                }
                a = &a[1..];
                b = &b[1..];
            }
        }
    }
}

fn trim_zeros(d: &[u8]) -> &[u8] {
    let n = d.iter().take_while(|c| **c == b'0').count();
    &d[n.min(d.len().saturating_sub(1))..]
}

/// The slice files of a folder in natural order.
pub(crate) fn slice_files(dir: &Path) -> Result<Vec<PathBuf>> {
    let rd = std::fs::read_dir(dir).map_err(|e| Error::io(dir, e))?;
    let mut files: Vec<PathBuf> =
        rd.filter_map(|e| e.ok().map(|e| e.path())).filter(|p| p.is_file() && matches!(ext(p).as_str(), "tif" | "tiff" | "png")).collect();
    if files.is_empty() {
        return Err(Error::format(dir, "folder holds no TIFF or PNG slices"));
    }
    files.sort_by(|a, b| natural_cmp(&a.file_name().unwrap_or_default().to_string_lossy(), &b.file_name().unwrap_or_default().to_string_lossy()));
    Ok(files)
}

fn ext(p: &Path) -> String {
    p.extension().map(|e| e.to_string_lossy().to_ascii_lowercase()).unwrap_or_default()
}

/// One slice file's header: size, kind and its in-plane voxel size if any.
fn slice_header(p: &Path) -> Result<SliceHeader> {
    if ext(p) == "png" {
        let r = png_reader(p)?;
        let info = r.info();
        let (ct, bd) = r.output_color_type();
        let kind = match (ct, bd) {
            (png::ColorType::Grayscale | png::ColorType::GrayscaleAlpha, png::BitDepth::Eight) => Kind::Gray8,
            (png::ColorType::Grayscale | png::ColorType::GrayscaleAlpha, png::BitDepth::Sixteen) => Kind::Gray16,
            (png::ColorType::Rgb, b) => Kind::Rgb { channels: 3, bits: if b == png::BitDepth::Sixteen { 16 } else { 8 } },
            (png::ColorType::Rgba, b) => Kind::Rgb { channels: 4, bits: if b == png::BitDepth::Sixteen { 16 } else { 8 } },
            (ct, bd) => return Err(Error::format(p, format!("unsupported PNG sample format {ct:?} {bd:?}"))),
        };
        let voxel = info.pixel_dims.filter(|d| d.unit == png::Unit::Meter && d.xppu > 0 && d.yppu > 0).map(|d| {
            let (x, y) = (1000.0 / d.xppu as f64, 1000.0 / d.yppu as f64);
            VoxelSize::new([x, y, x], [VoxelSource::PngPhys, VoxelSource::PngPhys, VoxelSource::AssumedIsotropic])
        });
        Ok((info.width as usize, info.height as usize, kind, voxel))
    } else {
        let h = super::tiff::header(p)?;
        let kind = match h.sample {
            "uint8" => Kind::Gray8,
            "uint16" => Kind::Gray16,
            _ => Kind::GrayF32,
        };
        Ok((h.dims[0], h.dims[1], kind, h.voxel))
    }
}

fn png_reader(p: &Path) -> Result<png::Reader<std::io::BufReader<std::fs::File>>> {
    let f = std::fs::File::open(p).map_err(|e| Error::io(p, e))?;
    let mut d = png::Decoder::new(std::io::BufReader::new(f));
    d.set_transformations(png::Transformations::EXPAND);
    d.read_info().map_err(|e| Error::format(p, format!("not a readable PNG: {e}")))
}

/// Header facts of the whole folder, checking every slice agrees with the first.
pub(super) fn header(dir: &Path) -> Result<super::Header> {
    let files = slice_files(dir)?;
    let (nx, ny, kind, voxel) = check_all(&files)?;
    Ok(super::Header { dims: [nx, ny, files.len()], sample: kind.name(), bytes_per_sample: kind.bytes(), voxel })
}

/// Width, height, sample kind and voxel size of a slice.
type SliceHeader = (usize, usize, Kind, Option<VoxelSize>);

fn check_all(files: &[PathBuf]) -> Result<SliceHeader> {
    let first = slice_header(&files[0])?;
    let heads: Vec<Result<SliceHeader>> = files[1..].par_iter().map(|f| slice_header(f)).collect();
    for (f, h) in files[1..].iter().zip(heads) {
        let (w, hgt, k, _) = h?;
        if (w, hgt) != (first.0, first.1) {
            return Err(Error::format(f, format!("slice size {w}×{hgt} differs from the first slice's {}×{}", first.0, first.1)));
        }
        if k.name() != first.2.name() {
            return Err(Error::format(f, format!("sample type {} differs from the first slice's {}", k.name(), first.2.name())));
        }
    }
    Ok(first)
}

pub(super) fn load(dir: &Path, opts: &LoadOptions, progress: &Progress) -> Result<Stack> {
    let files = slice_files(dir)?;
    let (nx, ny, kind, voxel) = check_all(&files)?;
    let b = opts.bin;
    let (crop, dims) = super::crop_and_dims(dir, opts.crop, [nx, ny, files.len()], b)?;
    super::check_memory(dir, (dims.iter().product::<usize>() * kind.bytes()) as u64, opts.max_bytes)?;
    let files = &files[crop[2][0]..crop[2][1]];
    progress.start(files.len() as u64);
    let xy = [crop[0], crop[1]];
    let samples = match kind.name() {
        "uint8" => Samples::U8(decode(files, nx, ny, xy, b, super::to_u8, progress)?.into()),
        "uint16" => Samples::U16(decode(files, nx, ny, xy, b, super::to_u16, progress)?.into()),
        _ => Samples::F32(decode(files, nx, ny, xy, b, super::to_f32, progress)?.into()),
    };
    let mut warnings = vec![];
    if let Kind::Rgb { .. } = kind {
        warnings.push(format!("{}: colour slices turned into grey (BT.601 luma)", dir.display()));
    }
    Ok(Stack { dims, samples, voxel, origin_vox: [0.0; 3], path: dir.to_path_buf(), warnings, world: None })
}

/// Decodes the slices in parallel, one output slice at a time from `bin` files (cropped, binned).
fn decode<T: Sample>(files: &[PathBuf], nx: usize, ny: usize, crop: [[usize; 2]; 2], bin: usize, conv: fn(f32) -> T, progress: &Progress) -> Result<Vec<T>> {
    let out_slice = ((crop[0][1] - crop[0][0]) / bin) * ((crop[1][1] - crop[1][0]) / bin);
    let mut out = vec![T::zeroed(); out_slice * files.len().div_ceil(bin)];
    out.par_chunks_mut(out_slice).enumerate().try_for_each(|(k, slice)| -> Result<()> {
        progress.check()?;
        let group = &files[k * bin..((k + 1) * bin).min(files.len())];
        let pages = group
            .iter()
            .map(|f| {
                let mut v = vec![T::zeroed(); nx * ny];
                read_slice(f, &mut v, conv).map(|_| v)
            })
            .collect::<Result<Vec<_>>>()?;
        super::assemble(&pages, nx, crop, bin, slice, conv);
        progress.add(group.len() as u64);
        Ok(())
    })?;
    Ok(out)
}

fn read_slice<T: Sample>(p: &Path, out: &mut [T], conv: fn(f32) -> T) -> Result<()> {
    if ext(p) != "png" {
        let mut dec = super::tiff::open(p)?;
        let (_, _, kind) = super::tiff::page_kind(p, 0, &mut dec)?;
        return super::tiff::read_page(p, 0, &mut dec, kind, out, conv);
    }
    let mut r = png_reader(p)?;
    let size = r.output_buffer_size().ok_or_else(|| Error::format(p, "PNG too large"))?;
    let mut buf = vec![0u8; size];
    let info = r.next_frame(&mut buf).map_err(|e| Error::format(p, format!("cannot decode PNG (truncated or corrupt?): {e}")))?;
    let ch = info.color_type.samples();
    let sixteen = info.bit_depth == png::BitDepth::Sixteen;
    let bps = if sixteen { 2 } else { 1 };
    let val = |o: usize| -> f32 { if sixteen { u16::from_be_bytes([buf[o], buf[o + 1]]) as f32 } else { buf[o] as f32 } };
    for (i, o) in out.iter_mut().enumerate() {
        let base = i * ch * bps;
        *o = if ch >= 3 { conv(super::luma(val(base), val(base + bps), val(base + 2 * bps))) } else { conv(val(base)) };
    }
    Ok(())
}
