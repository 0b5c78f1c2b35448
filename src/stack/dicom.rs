//! DICOM: a folder holding a series of single-frame images, or one multi-frame file (enhanced
//! CT/MR, frames placed by their per-frame plane positions). Parsing is the dicom-rs crates';
//! here the slices are put in order and turned into a stack:
//!
//! - Order is by position along the slice normal (the cross product of the row and column
//!   direction cosines, Image Orientation Patient), never by file name or instance number.
//! - A folder holding several series: the one with the most slices is read, and a note says so.
//! - Rescale slope and intercept are applied (values held as float32 then, with a note).
//! - The index-to-world transform is kept in LPS millimetres: column i runs along the row
//!   direction cosines times the column spacing, row j along the column cosines times the row
//!   spacing (Pixel Spacing gives row spacing first), slice k by the mean step between positions.
//! - Pixel data uncompressed (implicit or explicit VR little endian, deflated explicit VR), RLE
//!   Lossless or JPEG (lossless, baseline, extended; the dicom-rs decoders) is read; a note says
//!   when the compression was lossy. Other transfer syntaxes (JPEG 2000, JPEG-LS, big endian …)
//!   are refused by name.

use super::raw::{self, Kind};
use super::{LoadOptions, Samples, Stack, VoxelSize, VoxelSource, World};
use crate::progress::Progress;
use crate::{Error, Result};
use dicom_dictionary_std::tags;
use dicom_object::{DefaultDicomObject, InMemDicomObject, OpenFileOptions};
use rayon::prelude::*;
use std::path::{Path, PathBuf};

/// True for a file with the DICOM part-10 signature ("DICM" after the 128-byte preamble).
pub(super) fn claims(path: &Path) -> bool {
    let mut head = [0u8; 132];
    std::fs::File::open(path).and_then(|mut f| std::io::Read::read_exact(&mut f, &mut head)).is_ok() && &head[128..] == b"DICM"
}

/// True for a folder holding DICOM files and no TIFF or PNG slices.
pub(super) fn claims_dir(dir: &Path) -> bool {
    if super::folder::slice_files(dir).is_ok() {
        return false;
    }
    files_of(dir).is_ok_and(|f| !f.is_empty())
}

/// The DICOM files of a folder (hidden files and subfolders are passed over).
fn files_of(dir: &Path) -> Result<Vec<PathBuf>> {
    let rd = std::fs::read_dir(dir).map_err(|e| Error::io(dir, e))?;
    let mut out: Vec<PathBuf> = rd
        .filter_map(|e| e.ok())
        .map(|e| e.path())
        .filter(|p| p.is_file() && !p.file_name().is_some_and(|n| n.to_string_lossy().starts_with('.')) && claims(p))
        .collect();
    out.sort();
    Ok(out)
}

/// What one image's header says, and where its frames lie.
#[derive(Clone, Debug)]
struct Image {
    path: PathBuf,
    series: String,
    rows: usize,
    cols: usize,
    kind: Kind,
    /// Bits stored of the bits allocated (the rest are masked off; signed values sign-extended).
    bits_stored: u32,
    /// Row then column direction cosines.
    orientation: [f64; 6],
    /// Row spacing (between rows), column spacing (between columns), mm.
    spacing: [f64; 2],
    slope: f64,
    inter: f64,
    /// The position of each frame's first pixel (one for single-frame images).
    positions: Vec<[f64; 3]>,
    /// The pixel data went through lossy compression (JPEG baseline or extended).
    lossy: bool,
    /// Byte offset of the first sample when the pixel data is stored as it is and is the file's
    /// last element (as most writers leave it): then each slice is one positioned read.
    at: Option<u64>,
}

/// Transfer syntaxes whose pixel data is stored as it is (the data set may be deflated).
const NATIVE: [&str; 3] = ["1.2.840.10008.1.2", "1.2.840.10008.1.2.1", "1.2.840.10008.1.2.1.99"];

/// Compressed transfer syntaxes read through the dicom-rs decoders: (UID, name, lossy).
const COMPRESSED: [(&str, &str, bool); 5] = [
    ("1.2.840.10008.1.2.5", "RLE Lossless", false),
    ("1.2.840.10008.1.2.4.57", "JPEG Lossless", false),
    ("1.2.840.10008.1.2.4.70", "JPEG Lossless (first-order prediction)", false),
    ("1.2.840.10008.1.2.4.50", "JPEG Baseline", true),
    ("1.2.840.10008.1.2.4.51", "JPEG Extended", true),
];

/// The transfer syntax of a file, without padding.
fn syntax_of(obj: &DefaultDicomObject) -> String {
    obj.meta().transfer_syntax().trim_end_matches(['\0', ' ']).to_string()
}

fn open(path: &Path, pixels: bool) -> Result<DefaultDicomObject> {
    let opts = OpenFileOptions::new();
    let opts = if pixels { opts } else { opts.read_until(tags::PIXEL_DATA) };
    opts.open_file(path).map_err(|e| Error::format(path, format!("not a readable DICOM file: {}", one_line(&e.to_string()))))
}

fn one_line(s: &str) -> String {
    s.split_whitespace().collect::<Vec<_>>().join(" ")
}

type Element = dicom_core::DataElement<InMemDicomObject>;

/// An element of `o`, when present.
fn get(o: &InMemDicomObject, tag: dicom_core::Tag) -> Option<&Element> {
    o.element_opt(tag).ok().flatten()
}

/// The header facts of one file.
fn image(path: &Path) -> Result<Image> {
    let obj = open(path, false)?;
    let bad = |m: String| Error::format(path, m);
    let ts = syntax_of(&obj);
    if !NATIVE.contains(&ts.as_str()) && !COMPRESSED.iter().any(|c| c.0 == ts) {
        return Err(bad(format!(
            "pixel data in transfer syntax {ts} is not supported (read: uncompressed little endian, RLE Lossless, JPEG lossless, baseline or extended); convert the series first"
        )));
    }
    let int = |tag, name: &str| -> Result<i64> { get(&obj, tag).and_then(|e| e.to_int::<i64>().ok()).ok_or_else(|| bad(format!("no {name}"))) };
    let floats = |o: &InMemDicomObject, tag| get(o, tag).and_then(|e| e.to_multi_float64().ok());
    // enhanced (multi-frame) files keep plane facts in functional group sequences
    let item = |o: &InMemDicomObject, seq, i: usize| get(o, seq).and_then(|e| e.items()).and_then(|it| it.get(i)).cloned();
    let shared = item(&obj, tags::SHARED_FUNCTIONAL_GROUPS_SEQUENCE, 0);
    let in_shared = |seq, tag| shared.as_ref().and_then(|s| item(s, seq, 0)).and_then(|o| floats(&o, tag));
    let photometric = get(&obj, tags::PHOTOMETRIC_INTERPRETATION).and_then(|e| e.to_str().ok()).map(|s| s.trim().to_string()).unwrap_or_default();
    if photometric != "MONOCHROME2" && photometric != "MONOCHROME1" {
        return Err(bad(format!("photometric interpretation {photometric:?} is not grey (MONOCHROME2 is read)")));
    }
    if photometric == "MONOCHROME1" {
        return Err(bad("MONOCHROME1 (minimum shown white) is not read: ductline would have to guess which way values run".into()));
    }
    if int(tags::SAMPLES_PER_PIXEL, "samples per pixel").unwrap_or(1) != 1 {
        return Err(bad("colour pixel data (samples per pixel above 1) is not read".into()));
    }
    let (rows, cols) = (int(tags::ROWS, "Rows")?, int(tags::COLUMNS, "Columns")?);
    if rows < 1 || cols < 1 {
        return Err(bad(format!("image size {cols} × {rows} is empty")));
    }
    let alloc = int(tags::BITS_ALLOCATED, "Bits Allocated")?;
    let stored = int(tags::BITS_STORED, "Bits Stored").unwrap_or(alloc);
    let signed = int(tags::PIXEL_REPRESENTATION, "Pixel Representation").unwrap_or(0) == 1;
    let kind = match (alloc, signed) {
        (8, false) => Kind::U8,
        (8, true) => Kind::I8,
        (16, false) => Kind::U16,
        (16, true) => Kind::I16,
        (32, false) => Kind::U32,
        (32, true) => Kind::I32,
        _ => return Err(bad(format!("{alloc} bits allocated per sample is not read (8, 16 and 32 are)"))),
    };
    if !(1..=alloc).contains(&stored) {
        return Err(bad(format!("bits stored {stored} does not fit {alloc} bits allocated")));
    }
    let orientation = floats(&obj, tags::IMAGE_ORIENTATION_PATIENT)
        .or_else(|| in_shared(tags::PLANE_ORIENTATION_SEQUENCE, tags::IMAGE_ORIENTATION_PATIENT))
        .filter(|v| v.len() == 6)
        .map(|v| std::array::from_fn(|i| v[i]))
        .ok_or_else(|| bad("no image orientation (0020,0037): the slice order cannot be known".into()))?;
    let spacing = floats(&obj, tags::PIXEL_SPACING)
        .or_else(|| in_shared(tags::PIXEL_MEASURES_SEQUENCE, tags::PIXEL_SPACING))
        .filter(|v| v.len() == 2 && v.iter().all(|x| x.is_finite() && *x > 0.0))
        .map(|v| [v[0], v[1]])
        .ok_or_else(|| bad("no positive pixel spacing (0028,0030)".into()))?;
    let scale = |tag| floats(&obj, tag).or_else(|| in_shared(tags::PIXEL_VALUE_TRANSFORMATION_SEQUENCE, tag)).and_then(|v| v.first().copied());
    let (slope, inter) = (scale(tags::RESCALE_SLOPE).unwrap_or(1.0), scale(tags::RESCALE_INTERCEPT).unwrap_or(0.0));
    if !(slope.is_finite() && slope != 0.0 && inter.is_finite()) {
        return Err(bad(format!("rescale slope {slope} and intercept {inter} do not give values")));
    }
    let frames = int(tags::NUMBER_OF_FRAMES, "Number of Frames").unwrap_or(1).max(1) as usize;
    let positions: Vec<[f64; 3]> = if frames > 1 {
        let per = get(&obj, tags::PER_FRAME_FUNCTIONAL_GROUPS_SEQUENCE).and_then(|e| e.items()).unwrap_or(&[]);
        if per.len() != frames {
            return Err(bad(format!("{frames} frames but {} per-frame plane positions", per.len())));
        }
        per.iter()
            .map(|f| item(f, tags::PLANE_POSITION_SEQUENCE, 0).and_then(|p| floats(&p, tags::IMAGE_POSITION_PATIENT)))
            .map(|v| v.filter(|v| v.len() == 3).map(|v| [v[0], v[1], v[2]]))
            .collect::<Option<_>>()
            .ok_or_else(|| bad("a frame without its plane position (0020,9113)".into()))?
    } else {
        let p = floats(&obj, tags::IMAGE_POSITION_PATIENT).filter(|v| v.len() == 3).ok_or_else(|| bad("no image position (0020,0032)".into()))?;
        vec![[p[0], p[1], p[2]]]
    };
    let series = get(&obj, tags::SERIES_INSTANCE_UID).and_then(|e| e.to_str().ok()).map(|s| s.trim_end_matches('\0').trim().to_string()).unwrap_or_default();
    Ok(Image {
        path: path.to_path_buf(),
        series,
        rows: rows as usize,
        cols: cols as usize,
        kind,
        bits_stored: stored as u32,
        orientation,
        spacing,
        slope,
        inter,
        positions,
        lossy: COMPRESSED.iter().any(|c| c.0 == ts && c.2),
        at: if NATIVE[..2].contains(&ts.as_str()) { pixel_offset(path, (rows * cols) as u64 * frames as u64 * kind.bytes() as u64) } else { None },
    })
}

/// Where a file stored uncompressed (not deflated) keeps its `need` bytes of pixel data when
/// Pixel Data (7FE0,0010) is its last element: the offset of the first sample. The element's
/// header is looked for just before the file's last `need` bytes (padded to even length), in
/// explicit VR (tag, OW/OB, 2 reserved bytes, 32-bit length) or implicit VR (tag, 32-bit length)
/// little endian (DICOM PS3.5 section 7.1). None otherwise: the data set parser reads the file.
#[cfg(unix)]
fn pixel_offset(path: &Path, need: u64) -> Option<u64> {
    use std::os::unix::fs::FileExt;
    let f = std::fs::File::open(path).ok()?;
    let len = f.metadata().ok()?.len();
    let declared = need + need % 2;
    for (hdr, explicit) in [(12u64, true), (8, false)] {
        let Some(p) = len.checked_sub(declared + hdr) else { continue };
        let mut h = [0u8; 12];
        if f.read_exact_at(&mut h[..hdr as usize], p).is_err() || h[..4] != [0xE0, 0x7F, 0x10, 0x00] {
            continue;
        }
        let l = match explicit {
            true if matches!(&h[4..8], b"OW\0\0" | b"OB\0\0") => u32::from_le_bytes([h[8], h[9], h[10], h[11]]),
            true => continue,
            false => u32::from_le_bytes([h[4], h[5], h[6], h[7]]),
        };
        if l as u64 == declared {
            return Some(p + hdr);
        }
    }
    None
}

#[cfg(not(unix))]
fn pixel_offset(_: &Path, _: u64) -> Option<u64> {
    None
}

/// The slices in order: (image, frame within it) sorted by position along the normal, the
/// stack's voxel size, its world transform and the notes to show.
struct Series {
    slices: Vec<(usize, usize)>,
    images: Vec<Image>,
    voxel_mm: [f64; 3],
    world: World,
    notes: Vec<String>,
}

fn series(path: &Path) -> Result<Series> {
    let files = if path.is_dir() { files_of(path)? } else { vec![path.to_path_buf()] };
    if files.is_empty() {
        return Err(Error::format(path, "holds no DICOM files"));
    }
    let mut notes = vec![];
    let mut images: Vec<Image> = files.par_iter().map(|f| image(f)).collect::<Result<_>>()?;
    // several series: the one with the most slices
    let mut counts: Vec<(String, usize)> = vec![];
    for im in &images {
        match counts.iter_mut().find(|c| c.0 == im.series) {
            Some(c) => c.1 += im.positions.len(),
            None => counts.push((im.series.clone(), im.positions.len())),
        }
    }
    counts.sort_by(|a, b| b.1.cmp(&a.1).then(a.0.cmp(&b.0)));
    if counts.len() > 1 {
        let others: Vec<String> = counts[1..].iter().map(|c| format!("{} ({} slices)", c.0, c.1)).collect();
        notes.push(format!(
            "{}: {} series; the largest, {} ({} slices), is read; left: {}",
            path.display(),
            counts.len(),
            counts[0].0,
            counts[0].1,
            others.join(", ")
        ));
        images.retain(|im| im.series == counts[0].0);
    }
    let first = images[0].clone();
    for im in &images[1..] {
        if (im.rows, im.cols) != (first.rows, first.cols) || im.kind != first.kind {
            return Err(Error::format(
                &im.path,
                format!(
                    "{} × {} {} differs from the series' first image ({} × {} {})",
                    im.cols,
                    im.rows,
                    im.kind.name(),
                    first.cols,
                    first.rows,
                    first.kind.name()
                ),
            ));
        }
        if im.orientation.iter().zip(&first.orientation).any(|(a, b)| (a - b).abs() > 1e-4) {
            return Err(Error::format(&im.path, "image orientation differs from the series' first image (a tilted or localizer slice?)"));
        }
    }
    let o = first.orientation;
    let normal = [o[1] * o[5] - o[2] * o[4], o[2] * o[3] - o[0] * o[5], o[0] * o[4] - o[1] * o[3]];
    let along = |p: [f64; 3]| p[0] * normal[0] + p[1] * normal[1] + p[2] * normal[2];
    let mut slices: Vec<(usize, usize)> = images.iter().enumerate().flat_map(|(i, im)| (0..im.positions.len()).map(move |f| (i, f))).collect();
    let pos = |s: &(usize, usize)| images[s.0].positions[s.1];
    slices.sort_by(|a, b| along(pos(a)).total_cmp(&along(pos(b))));
    let n = slices.len();
    let steps: Vec<f64> = slices.windows(2).map(|w| along(pos(&w[1])) - along(pos(&w[0]))).collect();
    if let Some(k) = steps.iter().position(|d| !(d.abs() > 1e-6)) {
        let (a, b) = (&images[slices[k].0].path, &images[slices[k + 1].0].path);
        return Err(Error::format(path, format!("two slices at the same position ({} and {}): not one volume", a.display(), b.display())));
    }
    let (p0, p1) = (pos(&slices[0]), pos(&slices[n - 1]));
    let step: [f64; 3] = if n > 1 { std::array::from_fn(|a| (p1[a] - p0[a]) / (n - 1) as f64) } else { normal };
    let mean = if n > 1 { (along(p1) - along(p0)) / (n - 1) as f64 } else { f64::NAN };
    if let (Some(lo), Some(hi)) = (steps.iter().copied().reduce(f64::min), steps.iter().copied().reduce(f64::max))
        && hi - lo > 0.01 * mean.abs()
    {
        notes.push(format!("{}: slice spacing varies from {lo:.4} to {hi:.4} mm; the mean, {mean:.4} mm, is used", path.display()));
    }
    if images.iter().any(|im| im.lossy) {
        notes.push(format!("{}: pixel data stored with lossy JPEG compression: values near, not equal to, the scanner's", path.display()));
    }
    if n == 1 {
        notes.push(format!("{}: a single slice gives no slice spacing; give it with --voxel-um X,Y,Z", path.display()));
    }
    let [row_sp, col_sp] = first.spacing;
    let z = if n > 1 { mean.abs() } else { col_sp };
    let matrix = std::array::from_fn(|r| [o[r] * col_sp, o[3 + r] * row_sp, if n > 1 { step[r] } else { normal[r] * z }, p0[r]]);
    let source = format!("DICOM image plane ({} slices ordered by position along the normal)", n);
    Ok(Series { slices, images, voxel_mm: [col_sp, row_sp, z], world: World { matrix, frame: "LPS", source }, notes })
}

/// Reads `buf.len()` bytes at `offset` of `path`.
fn read_at(path: &Path, buf: &mut [u8], offset: u64) -> Result<()> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::FileExt;
        let f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
        f.read_exact_at(buf, offset).map_err(|e| Error::format(path, format!("pixel data cannot be read (truncated?): {e}")))
    }
    #[cfg(not(unix))]
    {
        let _ = (buf, offset);
        Err(Error::format(path, "positioned reads need a Unix system"))
    }
}

fn scaled(im: &Image) -> bool {
    im.slope != 1.0 || im.inter != 0.0
}

pub(super) fn header(path: &Path) -> Result<super::Header> {
    let s = series(path)?;
    let im = &s.images[0];
    let (sample, bytes_per_sample) = im.kind.held(s.images.iter().any(scaled));
    let voxel = Some(VoxelSize::new(s.voxel_mm, std::array::from_fn(|_| VoxelSource::FileHeader)));
    Ok(super::Header { dims: [im.cols, im.rows, s.slices.len()], sample, bytes_per_sample, voxel })
}

/// The raw samples of every frame of one file, with the bits beyond `bits_stored` masked off
/// (sign-extended for signed types).
fn frames_of(im: &Image) -> Result<Vec<u8>> {
    let obj = open(&im.path, true)?;
    let el = obj.element(tags::PIXEL_DATA).map_err(|_| Error::format(&im.path, "no pixel data"))?;
    let ts = syntax_of(&obj);
    let mut data = match COMPRESSED.iter().find(|c| c.0 == ts) {
        None => {
            el.to_bytes().map_err(|_| Error::format(&im.path, format!("pixel data is encapsulated though transfer syntax {ts} says it is not")))?.into_owned()
        }
        Some((_, name, _)) => {
            use dicom_transfer_syntax_registry::TransferSyntaxRegistry;
            let reader = dicom_encoding::TransferSyntaxIndex::get(&TransferSyntaxRegistry, &ts)
                .and_then(|t| t.pixel_data_reader())
                .ok_or_else(|| Error::format(&im.path, format!("no decoder for {name} pixel data")))?;
            let mut out = Vec::with_capacity(im.rows * im.cols * im.positions.len() * im.kind.bytes());
            for f in 0..im.positions.len() {
                reader
                    .decode_frame(&obj, f as u32, &mut out)
                    .map_err(|e| Error::format(&im.path, format!("frame {f}: {name} pixel data cannot be decoded: {}", one_line(&e.to_string()))))?;
            }
            out
        }
    };
    let need = im.rows * im.cols * im.positions.len() * im.kind.bytes();
    if data.len() < need {
        return Err(Error::format(
            &im.path,
            format!("pixel data holds {} bytes, {} × {} × {} frames need {need} (truncated?)", data.len(), im.cols, im.rows, im.positions.len()),
        ));
    }
    data.truncate(need);
    mask_bits(im, &mut data);
    Ok(data)
}

/// Masks off the bits beyond Bits Stored of 16-bit samples (sign-extending signed ones).
fn mask_bits(im: &Image, data: &mut [u8]) {
    if im.bits_stored < 16 && im.kind.bytes() == 2 {
        let shift = 16 - im.bits_stored;
        for c in data.chunks_exact_mut(2) {
            let v = u16::from_le_bytes([c[0], c[1]]) << shift;
            let v = if im.kind == Kind::I16 { ((v as i16) >> shift) as u16 } else { v >> shift };
            c.copy_from_slice(&v.to_le_bytes());
        }
    }
}

pub(super) fn load(path: &Path, opts: &LoadOptions, progress: &Progress) -> Result<Stack> {
    let s = series(path)?;
    let im0 = &s.images[0];
    let plane = im0.rows * im0.cols;
    let n = plane * s.slices.len();
    let any_scaled = s.images.iter().any(scaled);
    let same_scale = s.images.iter().all(|im| im.slope == im0.slope && im.inter == im0.inter);
    let (held, held_bytes) = im0.kind.held(any_scaled);
    let fb = plane * im0.kind.bytes();
    // files whose pixel data is found by offset are read slice by slice straight into the
    // stack; the others (compressed, deflated, trailing elements) are decoded whole first
    let direct = s.images.iter().all(|im| im.at.is_some());
    let staged = if direct { 0 } else { n * im0.kind.bytes() };
    super::check_memory(path, (n * held_bytes + staged) as u64, opts.max_bytes)?;
    progress.start(if direct { s.slices.len() } else { s.images.len() } as u64);
    let raw: Vec<Vec<u8>> = if direct {
        vec![]
    } else {
        s.images
            .par_iter()
            .map(|im| {
                progress.check()?;
                let d = frames_of(im);
                progress.add(1);
                d
            })
            .collect::<Result<_>>()?
    };
    // one slice of the stack (stack slice k) converted into `out`
    let fill = |k: usize, out: raw::Out| -> Result<()> {
        let (i, f) = s.slices[k];
        let im = &s.images[i];
        let scale = (im.slope, im.inter);
        match im.at {
            Some(at) if direct => {
                progress.check()?;
                let mut buf = vec![0u8; fb];
                read_at(&im.path, &mut buf, at + (f * fb) as u64)?;
                mask_bits(im, &mut buf);
                raw::convert(&buf, im.kind, false, scale, out);
                progress.add(1);
            }
            _ => raw::convert(&raw[i][f * fb..(f + 1) * fb], im.kind, false, scale, out),
        }
        Ok(())
    };
    let samples = match held {
        "uint8" => {
            let mut v = vec![0u8; n];
            v.par_chunks_mut(plane).enumerate().try_for_each(|(k, o)| fill(k, raw::Out::U8(o)))?;
            Samples::U8(v.into())
        }
        "uint16" => {
            let mut v = vec![0u16; n];
            v.par_chunks_mut(plane).enumerate().try_for_each(|(k, o)| fill(k, raw::Out::U16(o)))?;
            Samples::U16(v.into())
        }
        _ => {
            let mut v = vec![0f32; n];
            v.par_chunks_mut(plane).enumerate().try_for_each(|(k, o)| fill(k, raw::Out::F32(o)))?;
            Samples::F32(v.into())
        }
    };
    drop(raw);
    let mut notes = s.notes;
    if same_scale {
        notes.extend(raw::notes(path, im0.kind, any_scaled.then_some((im0.slope, im0.inter, "Rescale Slope, Rescale Intercept"))));
    } else {
        notes.push(format!("{}: rescale slope and intercept differ between slices; each applied to its own, held as float32", path.display()));
    }
    let voxel = Some(VoxelSize::new(s.voxel_mm, std::array::from_fn(|_| VoxelSource::FileHeader)));
    let stack = Stack {
        dims: [im0.cols, im0.rows, s.slices.len()],
        samples,
        voxel,
        origin_vox: [0.0; 3],
        path: path.to_path_buf(),
        warnings: notes,
        world: Some(s.world),
    };
    super::crop_and_bin(stack, opts)
}
