//! Multi-page TIFF (classic and BigTIFF; stripped or tiled; uncompressed, LZW, Deflate, PackBits,
//! Zstd; grey or colour, interleaved or planar; thumbnail pages left out)
//! decoded in parallel into one contiguous buffer of the file's own sample type. Uncompressed
//! grey pages are read with one positioned read (or memory-mapped); Deflate grey strips, and grey
//! strips whose bits are stored reversed (FillOrder 2), are read and unpacked whole by ductline;
//! everything else goes through the tiff crate's decoder.

use super::{LoadOptions, Sample, Samples, Stack, VoxelSize, VoxelSource};
use crate::progress::Progress;
use crate::{Error, Result};
use rayon::prelude::*;
use std::fs::File;
use std::io::BufReader;
use std::path::Path;
use tiff::ColorType;
use tiff::decoder::{Decoder, Limits};
use tiff::tags::Tag;

type Dec = Decoder<BufReader<File>>;

/// How a page's samples become grey.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) enum Kind {
    Gray8,
    Gray16,
    GrayF32,
    /// RGB or RGBA with this many channels and bits.
    Rgb {
        channels: usize,
        bits: u8,
    },
    /// 12-bit grey packed two samples in three bytes (uncompressed strips): held as uint16.
    Packed12,
    /// 8-bit YCbCr (JPEG-compressed colour pages): the Y channel is the grey (BT.601 luma).
    Ycc,
    /// Signed 8/16/32-bit, unsigned 32-bit or 64-bit float grey: held as float32 (see
    /// [`Kind::note`]).
    Wide {
        signed: bool,
        float: bool,
        bits: u8,
    },
}

impl Kind {
    /// The sample type held in memory (colour becomes grey of the same depth).
    pub(crate) fn name(self) -> &'static str {
        match self {
            Kind::Gray8 => "uint8",
            Kind::Gray16 | Kind::Packed12 => "uint16",
            Kind::GrayF32 | Kind::Wide { .. } => "float32",
            Kind::Rgb { bits: 8, .. } | Kind::Ycc => "uint8",
            Kind::Rgb { .. } => "uint16",
        }
    }
    /// The file's own sample type where it differs from the one held, and whether every value
    /// survives the change: a note for `inspect` and the load warnings.
    pub(crate) fn note(self) -> Option<String> {
        if self == Kind::Packed12 {
            return Some("12-bit packed samples held as uint16 (every value exact)".into());
        }
        let Kind::Wide { signed, float, bits } = self else { return None };
        let name = match (signed, float) {
            (_, true) => format!("float{bits}"),
            (true, _) => format!("int{bits}"),
            _ => format!("uint{bits}"),
        };
        Some(match (float, bits) {
            (false, 8 | 16) => format!("{name} samples held as float32 (every value exact)"),
            (false, _) => format!("{name} samples held as float32 (exact up to ±16 777 216; larger values are rounded)"),
            _ => format!("{name} samples held as float32 (about 7 significant digits kept)"),
        })
    }
    /// Bytes per sample held in memory.
    pub(crate) fn bytes(self) -> usize {
        match self {
            Kind::Gray8 => 1,
            Kind::Gray16 => 2,
            Kind::GrayF32 | Kind::Wide { .. } => 4,
            Kind::Rgb { bits, .. } => bits as usize / 8,
            Kind::Ycc => 1,
            Kind::Packed12 => 2,
        }
    }
}

pub(crate) fn open(path: &Path) -> Result<Dec> {
    let f = File::open(path).map_err(|e| Error::io(path, e))?;
    let mut limits = Limits::default();
    limits.decoding_buffer_size = 1 << 32;
    Decoder::new(BufReader::with_capacity(1 << 16, f)).map(|d| d.with_limits(limits)).map_err(|e| Error::format(path, format!("not a readable TIFF: {e}")))
}

pub(crate) fn page_kind(path: &Path, page: usize, dec: &mut Dec) -> Result<(usize, usize, Kind)> {
    let perr = |e: tiff::TiffError| Error::page(path, page, e.to_string());
    let (w, h) = dec.dimensions().map_err(perr)?;
    let ct = dec.colortype().map_err(perr)?;
    let fmt = dec.find_tag_unsigned_vec::<u16>(Tag::SampleFormat).map_err(perr)?.and_then(|v| v.first().copied()).unwrap_or(1);
    layout_supported(dec).map_err(|m| Error::page(path, page, m))?;
    let kind = match (ct, fmt) {
        (ColorType::Gray(8), 1) => Kind::Gray8,
        (ColorType::Gray(16), 1) => Kind::Gray16,
        (ColorType::Gray(32), 3) => Kind::GrayF32,
        (ColorType::RGB(b @ (8 | 16)), 1) => Kind::Rgb { channels: 3, bits: b },
        (ColorType::RGBA(b @ (8 | 16)), 1) => Kind::Rgb { channels: 4, bits: b },
        (ColorType::YCbCr(8), 1) => Kind::Ycc,
        (ColorType::Gray(12), 1) => {
            let plain = tag(dec, Tag::Compression).unwrap_or(1) == 1 && dec.get_chunk_type() == tiff::decoder::ChunkType::Strip;
            if !plain {
                return Err(Error::page(path, page, "12-bit pages are read uncompressed and in strips only; save them uncompressed or as 16-bit"));
            }
            Kind::Packed12
        }
        (ColorType::Gray(b @ (8 | 16 | 32)), 2) => Kind::Wide { signed: true, float: false, bits: b },
        (ColorType::Gray(32), 1) => Kind::Wide { signed: false, float: false, bits: 32 },
        (ColorType::Gray(64), 3) => Kind::Wide { signed: true, float: true, bits: 64 },
        (ct, fmt) => {
            let f = match fmt {
                1 => "unsigned",
                2 => "signed",
                3 => "float",
                _ => "unknown",
            };
            return Err(Error::page(
                path,
                page,
                format!("unsupported sample format {ct:?} ({f}); ductline reads 8/16/32-bit unsigned or signed, 32/64-bit float grey, RGB(A) or JPEG YCbCr"),
            ));
        }
    };
    if w == 0 || h == 0 {
        return Err(Error::page(path, page, "page has zero width or height"));
    }
    if bits_reversed(dec) && !(cfg!(unix) && matches!(kind, Kind::Gray8 | Kind::Gray16 | Kind::GrayF32)) {
        return Err(Error::page(
            path,
            page,
            "bit-reversed bytes (FillOrder 2) are read only for unsigned 8/16-bit and float32 grey pages; save with the usual fill order",
        ));
    }
    Ok((w as usize, h as usize, kind))
}

/// Refuses page layouts that would otherwise be read with wrong values, and compressions no
/// decoder here handles, each with a message naming what the page uses.
fn layout_supported(dec: &mut Dec) -> std::result::Result<(), String> {
    let spp = tag(dec, Tag::SamplesPerPixel).unwrap_or(1);
    if spp == 2 || spp > 4 {
        return Err(format!("{spp} samples a pixel are not supported; ductline reads grey, RGB or RGBA pages"));
    }
    if bits_reversed(dec) && own_strips(dec).is_none() {
        return Err(
            "bit-reversed bytes (FillOrder 2) are read only for grey pages in strips (uncompressed, LZW, Deflate or PackBits); save with the usual fill order"
                .into(),
        );
    }
    if tag(dec, Tag::PhotometricInterpretation) == Some(0) {
        return Err(
            "min-is-white pages (PhotometricInterpretation 0) are not read, so that no value depends on how the page was compressed; save as min-is-black"
                .into(),
        );
    }
    let c = tag(dec, Tag::Compression).unwrap_or(1);
    let name = match c {
        1 | 5 | 7 | 8 | 32946 | 32773 | 50000 | 34926 => return Ok(()),
        2 => "CCITT RLE",
        3 | 4 => "CCITT fax",
        6 => "old-style JPEG",
        34925 => "LZMA",
        50001 | 34927 => "WebP",
        34887 => "LERC",
        33003 | 33005 | 34712 => "JPEG 2000",
        50002 => "JPEG XL",
        _ => "unknown",
    };
    Err(format!("compression {name} (code {c}) is not supported; save uncompressed, LZW, Deflate, PackBits or Zstd"))
}

/// What walking the page directories tells.
struct Walk {
    /// A decoder on the first full-resolution page.
    dec: Dec,
    nx: usize,
    ny: usize,
    pages: usize,
    kind: Kind,
    /// Byte offset of each page's samples when every page is one uncompressed run.
    raw: Option<Vec<u64>>,
    /// The directory index of each page of the stack (reduced-resolution pages left out).
    ifds: Vec<usize>,
    /// How many reduced-resolution pages (thumbnails, previews) were left out.
    reduced: usize,
}

/// Whether a page directory marks a reduced-resolution copy of another page (NewSubfileType
/// bit 0, or the old SubfileType 2): a thumbnail or preview, not a slice.
fn reduced_resolution(dec: &mut Dec) -> bool {
    tag(dec, Tag::NewSubfileType).is_some_and(|t| t & 1 == 1) || tag(dec, Tag::SubfileType) == Some(2)
}

/// Walks every page's directory (no pixel data), leaves out reduced-resolution pages and checks
/// that the others agree. Page numbers in messages count every directory from 0.
fn walk(path: &Path) -> Result<Walk> {
    let mut walker = open(path)?;
    let mut ifd = 0;
    let mut reduced = 0;
    while reduced_resolution(&mut walker) && walker.more_images() {
        walker.next_image().map_err(|e| Error::page(path, ifd + 1, format!("unreadable page directory: {e}")))?;
        (ifd, reduced) = (ifd + 1, reduced + 1);
    }
    let (nx, ny, kind) = page_kind(path, ifd, &mut walker)?;
    let page_bytes = nx * ny * kind.bytes();
    let mut raw = raw_run(&mut walker, page_bytes).map(|o| vec![o]);
    let mut ifds = vec![ifd];
    while walker.more_images() {
        ifd += 1;
        walker.next_image().map_err(|e| Error::page(path, ifd, format!("unreadable page directory: {e}")))?;
        if reduced_resolution(&mut walker) {
            reduced += 1;
            continue;
        }
        let (w, h, k) = page_kind(path, ifd, &mut walker)?;
        if (w, h) != (nx, ny) {
            return Err(Error::page(path, ifd, format!("size {w}×{h} differs from the first page's {nx}×{ny}")));
        }
        if k != kind {
            return Err(Error::page(path, ifd, format!("sample type {} differs from the first page's {}", k.name(), kind.name())));
        }
        if let Some(r) = &mut raw {
            match raw_run(&mut walker, page_bytes) {
                Some(o) => r.push(o),
                None => raw = None,
            }
        }
        ifds.push(ifd);
    }
    let mut dec = open(path)?;
    dec.seek_to_image(ifds[0]).map_err(|e| Error::page(path, ifds[0], format!("cannot reach page: {e}")))?;
    Ok(Walk { dec, nx, ny, pages: ifds.len(), kind, raw, ifds, reduced })
}

pub(super) fn header(path: &Path) -> Result<super::Header> {
    let mut w = walk(path)?;
    let voxel = voxel_from_tags(&mut w.dec);
    Ok(super::Header { dims: [w.nx, w.ny, w.pages], sample: w.kind.name(), bytes_per_sample: w.kind.bytes(), voxel })
}

/// Maps the file when its pages' samples lie back to back, aligned, in native order.
fn try_map<T: Sample>(path: &Path, w: &Walk) -> Option<super::Buf<T>> {
    let raw = w.raw.as_ref()?;
    let page = (w.nx * w.ny * std::mem::size_of::<T>()) as u64;
    let base = raw[0];
    if base % std::mem::align_of::<T>() as u64 != 0 || raw.iter().enumerate().any(|(k, o)| *o != base + k as u64 * page) {
        return None;
    }
    let file = File::open(path).ok()?;
    // SAFETY: the map is read-only; like every viewer that maps its input, ductline assumes the
    // file is not truncated or rewritten by another program while it is open.
    let map = unsafe { memmap2::Mmap::map(&file) }.ok()?;
    let len = w.nx * w.ny * w.pages;
    if (map.len() as u64) < base + page * w.pages as u64 {
        return None;
    }
    Some(super::Buf::Mapped { map: std::sync::Arc::new(map), offset: base as usize, len })
}

pub(super) fn load(path: &Path, opts: &LoadOptions, progress: &Progress) -> Result<Stack> {
    let mut w = walk(path)?;
    let voxel = voxel_from_tags(&mut w.dec);
    let (nx, ny, nz, kind) = (w.nx, w.ny, w.pages, w.kind);
    let b = opts.bin;
    let (crop, dims) = super::crop_and_dims(path, opts.crop, [nx, ny, nz], b)?;
    let mut warnings = vec![];
    if let Kind::Rgb { .. } = kind {
        warnings.push(format!("{}: colour pages turned into grey (BT.601 luma)", path.display()));
    }
    if kind == Kind::Ycc {
        warnings.push(format!("{}: JPEG colour (YCbCr) pages read as grey: their Y channel (BT.601 luma)", path.display()));
    }
    if let Some(note) = kind.note() {
        warnings.push(format!("{}: {note}", path.display()));
    }
    if w.reduced > 0 {
        warnings.push(format!("{}: {} reduced-resolution page(s) (thumbnails) left out; {} full-resolution pages read", path.display(), w.reduced, w.pages));
    }
    if let Some(v) = &voxel
        && v.source[2] == VoxelSource::AssumedIsotropic
    {
        warnings.push(format!("{}: the file gives no slice spacing; assumed equal to the pixel width", path.display()));
    }
    let whole = b == 1 && opts.crop.is_none();
    if opts.map && whole {
        let mapped = match kind {
            Kind::Gray8 => try_map::<u8>(path, &w).map(Samples::U8),
            Kind::Gray16 => try_map::<u16>(path, &w).map(Samples::U16),
            Kind::GrayF32 => try_map::<f32>(path, &w).map(Samples::F32),
            Kind::Rgb { .. } | Kind::Ycc | Kind::Packed12 | Kind::Wide { .. } => None,
        };
        if let Some(samples) = mapped {
            progress.start(1);
            progress.add(1);
            return Ok(Stack { dims, samples, voxel, origin_vox: [0.0; 3], path: path.to_path_buf(), warnings, world: None });
        }
    }
    let ifds = std::mem::take(&mut w.ifds);
    drop(w);
    let bytes = (dims.iter().product::<usize>() * kind.bytes()) as u64;
    super::check_memory(path, bytes, opts.max_bytes)?;
    progress.start((crop[2][1] - crop[2][0]) as u64);
    let samples = match kind {
        Kind::Gray8 | Kind::Rgb { bits: 8, .. } | Kind::Ycc => Samples::U8(decode::<u8>(path, &ifds, [nx, ny], kind, b, crop, super::to_u8, progress)?.into()),
        Kind::Gray16 | Kind::Packed12 | Kind::Rgb { .. } => Samples::U16(decode::<u16>(path, &ifds, [nx, ny], kind, b, crop, super::to_u16, progress)?.into()),
        Kind::GrayF32 | Kind::Wide { .. } => Samples::F32(decode::<f32>(path, &ifds, [nx, ny], kind, b, crop, super::to_f32, progress)?.into()),
    };
    Ok(Stack { dims, samples, voxel, origin_vox: [0.0; 3], path: path.to_path_buf(), warnings, world: None })
}

/// Decodes pages into one buffer, page groups in parallel (each group with its own file handle).
/// Each output slice comes from `bin` pages, cropped to `crop` and averaged b×b×b. Page k of the
/// stack is the file's directory `ifds[k]`.
#[allow(clippy::too_many_arguments)]
fn decode<T: Sample>(
    path: &Path,
    ifds: &[usize],
    [nx, ny]: [usize; 2],
    kind: Kind,
    bin: usize,
    crop: [[usize; 2]; 3],
    conv: fn(f32) -> T,
    progress: &Progress,
) -> Result<Vec<T>> {
    let size = crop.map(|r| r[1] - r[0]);
    let out_slice = (size[0] / bin) * (size[1] / bin);
    let out_nz = size[2].div_ceil(bin);
    let mut out = vec![T::zeroed(); out_slice * out_nz];
    let direct = bin == 1 && size[0] == nx && size[1] == ny;
    let xy = [crop[0], crop[1]];
    let threads = rayon::current_num_threads().max(1);
    // output slices per group: several groups a thread so uneven pages balance out
    let per = out_nz.div_ceil(threads * 4).max(1);
    out.par_chunks_mut(out_slice * per).enumerate().try_for_each(|(g, chunk)| -> Result<()> {
        let mut page = crop[2][0] + g * per * bin;
        let mut dec = open(path)?;
        dec.seek_to_image(ifds[page]).map_err(|e| Error::page(path, ifds[page], format!("cannot reach page: {e}")))?;
        let mut tmp: Vec<Vec<T>> = if direct { vec![] } else { (0..bin).map(|_| vec![T::zeroed(); nx * ny]).collect() };
        let n_slices = chunk.len() / out_slice;
        for (s, slice) in chunk.chunks_mut(out_slice).enumerate() {
            progress.check()?;
            let n_here = bin.min(crop[2][1] - page);
            if direct {
                read_page(path, ifds[page], &mut dec, kind, slice, conv)?;
            } else {
                for (p, buf) in tmp.iter_mut().enumerate().take(n_here) {
                    if p > 0 {
                        next(path, ifds, page + p, &mut dec)?;
                    }
                    read_page(path, ifds[page + p], &mut dec, kind, buf, conv)?;
                }
                super::assemble(&tmp[..n_here], nx, xy, bin, slice, conv);
            }
            page += n_here;
            progress.add(n_here as u64);
            if s + 1 < n_slices {
                next(path, ifds, page, &mut dec)?;
            }
        }
        Ok(())
    })?;
    Ok(out)
}

/// Moves the decoder from stack page `page − 1` to page `page` (directory `ifds[page]`).
fn next(path: &Path, ifds: &[usize], page: usize, dec: &mut Dec) -> Result<()> {
    let r = if page > 0 && ifds[page] == ifds[page - 1] + 1 { dec.next_image() } else { dec.seek_to_image(ifds[page]) };
    r.map_err(|e| Error::page(path, ifds[page], format!("cannot reach page: {e}")))
}

/// A tag's value as an unsigned number, if the page has it.
fn tag(dec: &mut Dec, t: Tag) -> Option<u32> {
    dec.find_tag_unsigned::<u32>(t).ok().flatten()
}

/// The compression code and the (offset, bytes) of each strip of a page with one sample a pixel,
/// stored in strips, in native byte order; None otherwise. Both of ductline's own read paths
/// start here.
fn grey_strips(dec: &mut Dec) -> Option<(u32, Vec<(u64, u64)>)> {
    use tiff::decoder::ChunkType;
    use tiff::tags::ByteOrder;
    if tag(dec, Tag::SamplesPerPixel).unwrap_or(1) != 1 || dec.get_chunk_type() != ChunkType::Strip {
        return None;
    }
    if matches!(dec.byte_order(), ByteOrder::LittleEndian) != cfg!(target_endian = "little") {
        return None;
    }
    let offs = dec.get_tag_u64_vec(Tag::StripOffsets).ok()?;
    let counts = dec.get_tag_u64_vec(Tag::StripByteCounts).ok()?;
    if offs.len() != counts.len() || offs.is_empty() {
        return None;
    }
    Some((tag(dec, Tag::Compression).unwrap_or(1), offs.into_iter().zip(counts).collect()))
}

/// Where an uncompressed grey page keeps its samples as one contiguous run of `len` bytes in
/// native byte order (offset in the file); None when any of that does not hold.
fn raw_run(dec: &mut Dec, len: usize) -> Option<u64> {
    if bits_reversed(dec) {
        return None;
    }
    let (1, strips) = grey_strips(dec)? else { return None };
    let contiguous = strips.windows(2).all(|w| w[1].0 == w[0].0 + w[0].1);
    (contiguous && strips.iter().map(|s| s.1).sum::<u64>() == len as u64).then_some(strips[0].0)
}

/// How a strip ductline reads itself is packed.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Codec {
    Plain,
    Deflate,
    Lzw,
    PackBits,
}

/// Where a page's strips lie and how to unpack them.
struct Strips {
    /// (file offset, stored bytes) of each strip, top to bottom.
    at: Vec<(u64, u64)>,
    codec: Codec,
    /// FillOrder 2: the bits of every stored byte run least significant first, so each byte is
    /// bit-reversed before it is unpacked (what the TIFF 6.0 specification, section 8, defines).
    reversed: bool,
    /// Rows a strip (the last may hold fewer).
    rows: usize,
    /// Samples a row.
    width: usize,
    /// Horizontal differencing (TIFF Predictor 2) to undo.
    differenced: bool,
}

/// True when the page's bytes are stored with their bits reversed (FillOrder 2).
fn bits_reversed(dec: &mut Dec) -> bool {
    tag(dec, Tag::FillOrder) == Some(2)
}

/// The strips of a grey page that ductline unpacks itself: Deflate pages (whole-strip inflate
/// is faster than the tiff crate's streaming), and FillOrder 2 pages (which the tiff crate reads
/// as if their bits ran the usual way) uncompressed or in LZW, Deflate or PackBits. Samples in
/// native byte order, one a pixel, without a predictor or with horizontal differencing of
/// 8/16-bit samples; None when any of that does not hold.
fn own_strips(dec: &mut Dec) -> Option<Strips> {
    let (code, at) = grey_strips(dec)?;
    let reversed = bits_reversed(dec);
    let codec = match (code, reversed) {
        (8 | 32946, _) => Codec::Deflate,
        (1, true) => Codec::Plain,
        (5, true) => Codec::Lzw,
        (32773, true) => Codec::PackBits,
        _ => return None,
    };
    let predictor = tag(dec, Tag::Predictor).unwrap_or(1);
    let bits = tag(dec, Tag::BitsPerSample).unwrap_or(1);
    if !(predictor == 1 || (predictor == 2 && bits <= 16)) || !matches!(bits, 8 | 16 | 32) {
        return None;
    }
    let (w, h) = dec.dimensions().ok()?;
    let rows = tag(dec, Tag::RowsPerStrip).unwrap_or(h).min(h) as usize;
    if rows == 0 || at.len() != (h as usize).div_ceil(rows) {
        return None;
    }
    Some(Strips { at, codec, reversed, rows, width: w as usize, differenced: predictor == 2 })
}

/// Unpacks PackBits data (TIFF 6.0 section 9) into `out`; the bytes written.
fn unpack_bits(packed: &[u8], out: &mut [u8]) -> usize {
    let (mut i, mut n) = (0, 0);
    while i < packed.len() && n < out.len() {
        let h = packed[i] as i8;
        i += 1;
        if h >= 0 {
            let k = (h as usize + 1).min(packed.len() - i).min(out.len() - n);
            out[n..n + k].copy_from_slice(&packed[i..i + k]);
            (i, n) = (i + k, n + k);
        } else if h != -128 && i < packed.len() {
            let k = (1 - h as isize) as usize;
            let k = k.min(out.len() - n);
            out[n..n + k].fill(packed[i]);
            (i, n) = (i + 1, n + k);
        }
    }
    n
}

/// Reads a page's strips straight into `out` (whole strips: bits reversed where the page says
/// so, then inflated, LZW-decoded, run-length unpacked or copied), then undoes horizontal
/// differencing if the page uses it.
#[cfg(unix)]
fn strips_page<T: Sample>(path: &Path, page: usize, dec: &mut Dec, strips: Strips, out: &mut [T]) -> Result<()> {
    use std::os::unix::fs::FileExt;
    let row_bytes = strips.width * std::mem::size_of::<T>();
    let bytes: &mut [u8] = bytemuck::cast_slice_mut(out);
    let mut z = libdeflater::Decompressor::new();
    let mut packed = vec![];
    let file_len = dec.inner().get_ref().metadata().map_err(|e| Error::io(path, e))?.len();
    let short = |n: usize, want: usize| Error::page(path, page, format!("a strip holds {n} bytes, {want} expected (truncated or corrupt?)"));
    for ((off, len), dst) in strips.at.iter().zip(bytes.chunks_mut(strips.rows * row_bytes)) {
        if off.checked_add(*len).is_none_or(|end| end > file_len) {
            return Err(Error::page(path, page, "a strip runs past the end of the file (truncated?)"));
        }
        packed.resize(*len as usize, 0);
        dec.inner().get_ref().read_exact_at(&mut packed, *off).map_err(|e| Error::page(path, page, format!("cannot read (truncated?): {e}")))?;
        if strips.reversed {
            packed.iter_mut().for_each(|b| *b = b.reverse_bits());
        }
        let n = match strips.codec {
            Codec::Plain => {
                let n = packed.len().min(dst.len());
                dst[..n].copy_from_slice(&packed[..n]);
                n
            }
            Codec::PackBits => unpack_bits(&packed, dst),
            Codec::Lzw => {
                let mut lzw = weezl::decode::Decoder::with_tiff_size_switch(weezl::BitOrder::Msb, 8);
                let (mut i, mut n) = (0, 0);
                while n < dst.len() {
                    let r = lzw.decode_bytes(&packed[i..], &mut dst[n..]);
                    (i, n) = (i + r.consumed_in, n + r.consumed_out);
                    match r.status {
                        Ok(weezl::LzwStatus::Ok) if r.consumed_in + r.consumed_out > 0 => {}
                        Ok(_) => break,
                        Err(_) => return Err(Error::page(path, page, "a compressed strip is corrupt (bad LZW data)")),
                    }
                }
                n
            }
            Codec::Deflate => match z.zlib_decompress(&packed, dst) {
                Ok(n) => n,
                Err(libdeflater::DecompressionError::InsufficientSpace) => {
                    return Err(Error::page(path, page, format!("a strip holds more than the {} bytes of its rows (corrupt?)", dst.len())));
                }
                Err(_) => return Err(Error::page(path, page, "a compressed strip is corrupt (bad Deflate data or checksum)")),
            },
        };
        if n != dst.len() {
            return Err(short(n, dst.len()));
        }
    }
    if strips.differenced {
        for row in out.chunks_mut(strips.width) {
            T::undo_differencing(row);
        }
    }
    Ok(())
}

pub(crate) fn read_page<T: Sample>(path: &Path, page: usize, dec: &mut Dec, kind: Kind, out: &mut [T], conv: fn(f32) -> T) -> Result<()> {
    let perr = |e: tiff::TiffError| Error::page(path, page, format!("cannot decode (truncated or corrupt?): {e}"));
    // uncompressed pages: one positioned read straight into the buffer
    #[cfg(unix)]
    if matches!(kind, Kind::Gray8 | Kind::Gray16 | Kind::GrayF32) {
        let bytes: &mut [u8] = bytemuck::cast_slice_mut(out);
        if let Some(off) = raw_run(dec, bytes.len()) {
            use std::os::unix::fs::FileExt;
            return dec.inner().get_ref().read_exact_at(bytes, off).map_err(|e| Error::page(path, page, format!("cannot read (truncated?): {e}")));
        }
        if let Some(strips) = own_strips(dec) {
            return strips_page(path, page, dec, strips, out);
        }
    }
    match kind {
        Kind::Packed12 => {
            // rows of 12-bit samples, most significant bits first, each row starting on a byte
            let (w, h) = dec.dimensions().map_err(perr)?;
            let (w, h) = (w as usize, h as usize);
            let row = (12 * w).div_ceil(8);
            let offs = dec.get_tag_u64_vec(Tag::StripOffsets).map_err(perr)?;
            let counts = dec.get_tag_u64_vec(Tag::StripByteCounts).map_err(perr)?;
            let mut bytes = Vec::with_capacity(row * h);
            let mut f = File::open(path).map_err(|e| Error::io(path, e))?;
            for (&o, &c) in offs.iter().zip(&counts) {
                use std::io::{Read, Seek, SeekFrom};
                let c = (c as usize).min(row * h - bytes.len());
                let start = bytes.len();
                bytes.resize(start + c, 0);
                f.seek(SeekFrom::Start(o))
                    .and_then(|_| f.read_exact(&mut bytes[start..]))
                    .map_err(|e| Error::page(path, page, format!("cannot read (truncated?): {e}")))?;
            }
            if bytes.len() < row * h || out.len() != w * h {
                return Err(Error::page(path, page, "12-bit strips hold fewer bytes than the page needs (corrupt?)"));
            }
            for (y, line) in bytes.chunks_exact(row).take(h).enumerate() {
                for x in 0..w {
                    let b = 3 * x / 2;
                    let v = if x % 2 == 0 { (line[b] as u16) << 4 | (line[b + 1] as u16) >> 4 } else { ((line[b] & 0x0F) as u16) << 8 | line[b + 1] as u16 };
                    out[y * w + x] = conv(v as f32);
                }
            }
            Ok(())
        }
        Kind::Ycc => {
            // the JPEG decoder hands back Y, Cb, Cr interleaved (upsampled): Y is the grey
            let mut img = tiff::decoder::DecodingResult::U8(vec![]);
            dec.read_image_to_buffer(&mut img).map_err(perr)?;
            let tiff::decoder::DecodingResult::U8(v) = &img else { return Err(Error::page(path, page, "unexpected YCbCr sample type")) };
            if v.len() < 3 * out.len() {
                return Err(Error::page(path, page, "decoded YCbCr samples do not fill the page (corrupt?)"));
            }
            out.iter_mut().zip(v.chunks_exact(3)).for_each(|(o, c)| *o = conv(c[0] as f32));
            Ok(())
        }
        Kind::Rgb { channels, .. } => {
            // chunky pages interleave the channels (RGBRGB…); planar ones (PlanarConfiguration 2)
            // hold every red, then every green, then every blue
            let planar = tag(dec, Tag::PlanarConfiguration) == Some(2);
            let mut img = tiff::decoder::DecodingResult::U8(vec![]);
            dec.read_image_to_buffer(&mut img).map_err(perr)?;
            fn grey<T: Sample, S: Copy + Into<f32>>(out: &mut [T], v: &[S], channels: usize, planar: bool, conv: fn(f32) -> T) -> bool {
                let n = out.len();
                if v.len() < n * channels {
                    return false;
                }
                let at = |i: usize, c: usize| v[if planar { c * n + i } else { i * channels + c }].into();
                out.iter_mut().enumerate().for_each(|(i, o)| *o = conv(super::luma(at(i, 0), at(i, 1), at(i, 2))));
                true
            }
            let whole = match &img {
                tiff::decoder::DecodingResult::U8(v) => grey(out, v, channels, planar, conv),
                tiff::decoder::DecodingResult::U16(v) => grey(out, v, channels, planar, conv),
                _ => return Err(Error::page(path, page, "unexpected colour sample type")),
            };
            if !whole {
                return Err(Error::page(path, page, "decoded colour samples do not fill the page (corrupt?)"));
            }
            Ok(())
        }
        Kind::Wide { .. } => {
            use tiff::decoder::DecodingResult as D;
            let img = dec.read_image().map_err(perr)?;
            fn put<T: Sample, S: Copy>(out: &mut [T], v: &[S], conv: fn(f32) -> T, f: fn(S) -> f32) {
                out.iter_mut().zip(v).for_each(|(o, x)| *o = conv(f(*x)));
            }
            match &img {
                D::I8(v) if v.len() == out.len() => put(out, v, conv, |x| x as f32),
                D::I16(v) if v.len() == out.len() => put(out, v, conv, |x| x as f32),
                D::I32(v) if v.len() == out.len() => put(out, v, conv, |x| x as f32),
                D::U32(v) if v.len() == out.len() => put(out, v, conv, |x| x as f32),
                D::F64(v) if v.len() == out.len() => put(out, v, conv, |x| x as f32),
                _ => return Err(Error::page(path, page, "decoded samples do not match the page's size or type (corrupt?)")),
            }
            Ok(())
        }
        _ => dec.read_image_bytes(bytemuck::cast_slice_mut(out)).map_err(perr),
    }
}

/// Voxel size from the first page: OME-XML physical sizes in the image description, else the
/// resolution tags (in-plane) with an ImageJ-style `spacing=` for the slices.
fn voxel_from_tags(dec: &mut Dec) -> Option<VoxelSize> {
    let desc = dec.find_tag(Tag::ImageDescription).ok().flatten().and_then(|v| v.into_string().ok()).unwrap_or_default();
    if let Some(v) = voxel_from_ome(&desc) {
        return Some(v);
    }
    let res = |dec: &mut Dec, tag| -> Option<f64> {
        match dec.find_tag(tag).ok()?? {
            tiff::decoder::ifd::Value::Rational(n, d) if n > 0 && d > 0 => Some(n as f64 / d as f64),
            v => v.into_f64().ok().filter(|x| *x > 0.0),
        }
    };
    let (xr, yr) = (res(dec, Tag::XResolution)?, res(dec, Tag::YResolution)?);
    let unit = tag(dec, Tag::ResolutionUnit).unwrap_or(2);
    let unit_mm = match unit {
        2 => 25.4,
        3 => 10.0,
        _ => desc_value(&desc, "unit=").and_then(|u| unit_to_mm(&u))?,
    };
    let (x, y) = (unit_mm / xr, unit_mm / yr);
    let spacing = desc_value(&desc, "spacing=").and_then(|s| s.parse::<f64>().ok()).filter(|s| *s > 0.0);
    let z_unit = desc_value(&desc, "unit=").and_then(|u| unit_to_mm(&u)).unwrap_or(unit_mm);
    let (z, zsrc) = match spacing {
        Some(s) => (s * z_unit, VoxelSource::DescriptionSpacing),
        None => (x, VoxelSource::AssumedIsotropic),
    };
    Some(VoxelSize::new([x, y, z], [VoxelSource::TiffResolution, VoxelSource::TiffResolution, zsrc]))
}

/// Physical sizes from an OME-XML description (units default to µm as the OME schema says).
pub(crate) fn voxel_from_ome(desc: &str) -> Option<VoxelSize> {
    if !desc.contains("<OME") {
        return None;
    }
    let get = |axis: &str| -> Option<f64> {
        let v: f64 = xml_attr(desc, &format!("PhysicalSize{axis}"))?.parse().ok()?;
        let unit = xml_attr(desc, &format!("PhysicalSize{axis}Unit")).unwrap_or_else(|| "µm".into());
        Some(v * unit_to_mm(&unit)?).filter(|x| *x > 0.0 && x.is_finite())
    };
    let (x, y) = (get("X")?, get("Y")?);
    Some(match get("Z") {
        Some(z) => VoxelSize::new([x, y, z], [VoxelSource::Ome, VoxelSource::Ome, VoxelSource::Ome]),
        None => VoxelSize::new([x, y, x], [VoxelSource::Ome, VoxelSource::Ome, VoxelSource::AssumedIsotropic]),
    })
}

fn xml_attr(xml: &str, name: &str) -> Option<String> {
    let pat = format!("{name}=\"");
    let mut from = 0;
    while let Some(i) = xml[from..].find(&pat) {
        let at = from + i;
        // a whole attribute name: preceded by whitespace
        if at > 0 && xml.as_bytes()[at - 1].is_ascii_whitespace() {
            let rest = &xml[at + pat.len()..];
            return rest.find('"').map(|e| rest[..e].to_string());
        }
        from = at + pat.len();
    }
    None
}

fn desc_value(desc: &str, key: &str) -> Option<String> {
    desc.lines().find_map(|l| l.trim().strip_prefix(key).map(|v| v.trim().to_string()))
}

/// Millimetres per one of `unit` (nm, µm/um/micron, mm, cm, m).
pub(crate) fn unit_to_mm(unit: &str) -> Option<f64> {
    match unit.trim() {
        "nm" => Some(1e-6),
        "µm" | "μm" | "um" | "micron" | "microns" | "\\u00B5m" => Some(1e-3),
        "mm" => Some(1.0),
        "cm" => Some(10.0),
        "m" => Some(1000.0),
        _ => None,
    }
}
