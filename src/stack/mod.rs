//! The image stack: voxels in one contiguous buffer of the file's own sample type, plus the voxel
//! size and where it came from.
//!
//! Stack frame (DESIGN.md): voxel (column i, row j, slice k) has its centre at (i·vx, j·vy, k·vz) mm.

mod dicom;
mod folder;
mod nifti;
mod nrrd;
mod raw;
mod tiff;
pub mod write;

use crate::{Error, Result};
use rayon::prelude::*;
use std::path::{Path, PathBuf};

pub use folder::natural_cmp;

/// The slice files of a folder in natural order (errors when it holds none).
pub fn folder_files(dir: &Path) -> Result<Vec<PathBuf>> {
    folder::slice_files(dir)
}

/// A grey sample type the stack can hold. `f` widens one sample to f32 for arithmetic.
pub trait Sample: Copy + Send + Sync + bytemuck::Pod + 'static {
    const NAME: &'static str;
    fn f(self) -> f32;
    /// Undoes TIFF horizontal differencing (Predictor 2) along one row: a running sum, wrapping.
    fn undo_differencing(row: &mut [Self]);
}
impl Sample for u8 {
    const NAME: &'static str = "uint8";
    #[inline]
    fn f(self) -> f32 {
        self as f32
    }
    fn undo_differencing(row: &mut [u8]) {
        for i in 1..row.len() {
            row[i] = row[i].wrapping_add(row[i - 1]);
        }
    }
}
impl Sample for u16 {
    const NAME: &'static str = "uint16";
    #[inline]
    fn f(self) -> f32 {
        self as f32
    }
    fn undo_differencing(row: &mut [u16]) {
        for i in 1..row.len() {
            row[i] = row[i].wrapping_add(row[i - 1]);
        }
    }
}
impl Sample for f32 {
    const NAME: &'static str = "float32";
    #[inline]
    fn f(self) -> f32 {
        self
    }
    /// On the bit patterns as 32-bit integers (libtiff's reading; ductline's own inflate path
    /// leaves float pages with a predictor to the tiff crate).
    fn undo_differencing(row: &mut [f32]) {
        for i in 1..row.len() {
            row[i] = f32::from_bits(row[i].to_bits().wrapping_add(row[i - 1].to_bits()));
        }
    }
}

/// Voxel storage: an owned buffer, or a read-only memory map of an uncompressed file whose pages
/// lie back to back (the operating system reads pages on demand). Dereferences to a slice.
#[derive(Clone)]
pub enum Buf<T: Sample> {
    Owned(Vec<T>),
    Mapped { map: std::sync::Arc<memmap2::Mmap>, offset: usize, len: usize },
}

impl<T: Sample> std::ops::Deref for Buf<T> {
    type Target = [T];
    fn deref(&self) -> &[T] {
        match self {
            Buf::Owned(v) => v,
            Buf::Mapped { map, offset, len } => bytemuck::cast_slice(&map[*offset..*offset + len * std::mem::size_of::<T>()]),
        }
    }
}

impl<T: Sample> From<Vec<T>> for Buf<T> {
    fn from(v: Vec<T>) -> Self {
        Buf::Owned(v)
    }
}

impl<T: Sample + PartialEq> PartialEq<Vec<T>> for Buf<T> {
    fn eq(&self, other: &Vec<T>) -> bool {
        **self == other[..]
    }
}

impl<T: Sample> std::fmt::Debug for Buf<T> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Buf::Owned(v) => write!(f, "Owned({} samples)", v.len()),
            Buf::Mapped { len, offset, .. } => write!(f, "Mapped({len} samples at byte {offset})"),
        }
    }
}

impl<T: Sample> Buf<T> {
    pub fn is_mapped(&self) -> bool {
        matches!(self, Buf::Mapped { .. })
    }
}

/// The voxel buffer, x fastest, then y, then z; kept in the file's own sample type.
#[derive(Clone, Debug)]
pub enum Samples {
    U8(Buf<u8>),
    U16(Buf<u16>),
    F32(Buf<f32>),
}

/// Runs `$body` with `$v` bound to the typed sample slice of a [`Samples`].
#[macro_export]
macro_rules! with_samples {
    ($samples:expr, $v:ident => $body:expr) => {
        match $samples {
            $crate::stack::Samples::U8($v) => $body,
            $crate::stack::Samples::U16($v) => $body,
            $crate::stack::Samples::F32($v) => $body,
        }
    };
}

impl Samples {
    pub fn type_name(&self) -> &'static str {
        match self {
            Samples::U8(_) => u8::NAME,
            Samples::U16(_) => u16::NAME,
            Samples::F32(_) => f32::NAME,
        }
    }
    pub fn bytes(&self) -> usize {
        with_samples!(self, v => std::mem::size_of_val(&v[..]))
    }
    pub fn len(&self) -> usize {
        with_samples!(self, v => v.len())
    }
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// True when the voxels are a memory map of the file rather than a copy.
    pub fn is_mapped(&self) -> bool {
        with_samples!(self, v => v.is_mapped())
    }
    /// One voxel by linear index, widened to f32.
    #[inline]
    pub fn get(&self, idx: usize) -> f32 {
        with_samples!(self, v => v[idx].f())
    }
}

/// Where a voxel size came from; shown to the user beside the value.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum VoxelSource {
    /// OME-XML physical sizes in the TIFF image description.
    Ome,
    /// TIFF XResolution/YResolution with ResolutionUnit (in-plane only).
    TiffResolution,
    /// The `spacing=` entry of an ImageJ-style image description (slice spacing).
    DescriptionSpacing,
    /// PNG pHYs chunk (in-plane only).
    PngPhys,
    /// Assumed equal to the in-plane size because the file gives none.
    AssumedIsotropic,
    /// Given by the user (`--voxel-um` or the app).
    User,
    /// The header of a volume file (NIfTI pixdim).
    FileHeader,
}

impl VoxelSource {
    pub fn label(&self) -> &'static str {
        match self {
            VoxelSource::Ome => "OME-XML",
            VoxelSource::TiffResolution => "TIFF resolution tags",
            VoxelSource::DescriptionSpacing => "image description spacing",
            VoxelSource::PngPhys => "PNG pHYs",
            VoxelSource::AssumedIsotropic => "assumed equal to x",
            VoxelSource::User => "user",
            VoxelSource::FileHeader => "file header",
        }
    }
}

/// Voxel size (mm) per axis with the source of each value.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct VoxelSize {
    pub mm: [f64; 3],
    pub source: [VoxelSource; 3],
    /// The file's own voxel size before binning (equal to `mm` when not binned).
    #[serde(default)]
    pub original_mm: [f64; 3],
}

impl VoxelSize {
    /// A voxel size (mm) read from a file, not binned.
    pub fn new(mm: [f64; 3], source: [VoxelSource; 3]) -> Self {
        VoxelSize { mm, source, original_mm: mm }
    }

    /// A user-given size in µm (one value = isotropic). Errors on zero, negative or non-finite sizes.
    pub fn from_user_um(um: &[f64]) -> Result<Self> {
        let v = match um.len() {
            1 => [um[0]; 3],
            3 => [um[0], um[1], um[2]],
            n => return Err(Error::invalid(format!("voxel size needs 1 or 3 values in µm, got {n}"))),
        };
        for x in v {
            if !(x.is_finite() && x > 0.0) {
                return Err(Error::invalid(format!("voxel size must be positive, got {x} µm")));
            }
        }
        let mm = v.map(|x| x / 1000.0);
        Ok(VoxelSize { mm, source: std::array::from_fn(|_| VoxelSource::User), original_mm: mm })
    }
    /// Smallest side (mm).
    pub fn min(&self) -> f64 {
        self.mm.iter().cloned().fold(f64::INFINITY, f64::min)
    }
    /// Largest side (mm).
    pub fn max(&self) -> f64 {
        self.mm.iter().cloned().fold(0.0, f64::max)
    }
    /// "40 × 40 × 40 µm (OME-XML)" style text.
    pub fn describe(&self) -> String {
        let um = self.mm.map(|x| x * 1000.0);
        let mut src: Vec<&str> = self.source.iter().map(|s| s.label()).collect();
        src.dedup();
        format!("{:.4} × {:.4} × {:.4} µm ({})", um[0], um[1], um[2], src.join(", "))
    }
}

/// Options for loading a stack.
#[derive(Clone, Debug)]
pub struct LoadOptions {
    /// User voxel size; overrides the file's metadata.
    pub voxel: Option<VoxelSize>,
    /// Bin b×b×b (average) while loading: 1 = none, 2 or 4.
    pub bin: usize,
    /// Load only voxels i0..i1, j0..j1, k0..k1 (half-open, original indices) of a larger stack.
    pub crop: Option<[[usize; 2]; 3]>,
    /// Memory-map uncompressed stacks whose pages lie back to back instead of copying them.
    pub map: bool,
    /// Refuse stacks whose decoded size exceeds this many bytes (also capped by available memory).
    pub max_bytes: Option<u64>,
}

impl Default for LoadOptions {
    fn default() -> Self {
        LoadOptions { voxel: None, bin: 1, crop: None, map: true, max_bytes: None }
    }
}

/// A loaded stack.
#[derive(Clone, Debug)]
pub struct Stack {
    /// (nx, ny, nz): columns, rows, slices.
    pub dims: [usize; 3],
    pub samples: Samples,
    /// None when neither the file nor the user gave one.
    pub voxel: Option<VoxelSize>,
    /// Where voxel (0, 0, 0) of this buffer lies, in voxels of the original file: non-zero after
    /// cropping or binning, so coordinates stay those of the whole stack (see [`Stack::origin_mm`]).
    pub origin_vox: [f64; 3],
    /// The file or folder it was read from.
    pub path: PathBuf,
    /// Non-fatal remarks made while loading (e.g. RGB turned into grey).
    pub warnings: Vec<String>,
    /// The file's own index-to-world transform, when it has one (NIfTI). Kept and shown; the
    /// stack frame stays (i·vx, j·vy, k·vz).
    pub world: Option<World>,
}

/// A file's index-to-world transform: world = M · (i, j, k, 1), millimetres.
#[derive(Clone, Debug, PartialEq)]
pub struct World {
    /// Rows of the 3×4 matrix.
    pub matrix: [[f64; 4]; 3],
    /// The world axes: "RAS" (NIfTI) or "LPS" (DICOM, NRRD, MetaImage).
    pub frame: &'static str,
    /// Where it came from (e.g. "NIfTI sform (code 2)").
    pub source: String,
}

impl World {
    /// One line a row, for `inspect`.
    pub fn describe(&self) -> String {
        let rows: Vec<String> = self.matrix.iter().map(|r| format!("[{:.4} {:.4} {:.4} {:.4}]", r[0], r[1], r[2], r[3])).collect();
        format!("(i, j, k, 1) → {} mm from {}: {}", self.frame, self.source, rows.join(" "))
    }

    /// The world point (mm, in this transform's frame) of a stack-frame point `p` (mm: i·vx,
    /// j·vy, k·vz) for voxel sizes `voxel_mm`: M · (i, j, k, 1). The inverse of [`World::to_stack`].
    ///
    /// ```
    /// use ductline::stack::World;
    /// let w = World { matrix: [[0.0, -0.05, 0.0, 10.0], [0.05, 0.0, 0.0, 20.0], [0.0, 0.0, 0.08, 30.0]], frame: "LPS", source: "example".into() };
    /// let world = w.to_world([0.1, 0.2, 0.4], [0.05, 0.05, 0.08]);
    /// assert!((world[0] - 9.8).abs() < 1e-12 && (world[1] - 20.1).abs() < 1e-12 && (world[2] - 30.4).abs() < 1e-12);
    /// ```
    pub fn to_world(&self, p: [f64; 3], voxel_mm: [f64; 3]) -> [f64; 3] {
        let idx: [f64; 3] = std::array::from_fn(|k| p[k] / voxel_mm[k]);
        std::array::from_fn(|r| self.matrix[r][0] * idx[0] + self.matrix[r][1] * idx[1] + self.matrix[r][2] * idx[2] + self.matrix[r][3])
    }

    /// The stack-frame point (mm: i·vx, j·vy, k·vz) of a world point `p` (mm, in this
    /// transform's frame), for voxel sizes `voxel_mm`; None when the matrix is singular.
    ///
    /// ```
    /// use ductline::stack::World;
    /// // index axes scaled by 0.05, 0.05, 0.08 mm, rotated 90° about z, origin at (10, 20, 30)
    /// let w = World { matrix: [[0.0, -0.05, 0.0, 10.0], [0.05, 0.0, 0.0, 20.0], [0.0, 0.0, 0.08, 30.0]], frame: "RAS", source: "example".into() };
    /// // index (2, 4, 5) lies at world (10 − 0.2, 20 + 0.1, 30 + 0.4)
    /// let p = w.to_stack([9.8, 20.1, 30.4], [0.05, 0.05, 0.08]).unwrap();
    /// assert!((p[0] - 0.1).abs() < 1e-12 && (p[1] - 0.2).abs() < 1e-12 && (p[2] - 0.4).abs() < 1e-12);
    /// ```
    pub fn to_stack(&self, p: [f64; 3], voxel_mm: [f64; 3]) -> Option<[f64; 3]> {
        let m = &self.matrix;
        let a = |r: usize, c: usize| m[r][c];
        let det = a(0, 0) * (a(1, 1) * a(2, 2) - a(1, 2) * a(2, 1)) - a(0, 1) * (a(1, 0) * a(2, 2) - a(1, 2) * a(2, 0))
            + a(0, 2) * (a(1, 0) * a(2, 1) - a(1, 1) * a(2, 0));
        if !(det.abs() > 1e-300) || !det.is_finite() {
            return None;
        }
        let d = [p[0] - a(0, 3), p[1] - a(1, 3), p[2] - a(2, 3)];
        // Cramer's rule: index k is det(A with column k replaced by d) / det(A)
        let idx: [f64; 3] = std::array::from_fn(|k| {
            let col = |r: usize, c: usize| if c == k { d[r] } else { a(r, c) };
            (col(0, 0) * (col(1, 1) * col(2, 2) - col(1, 2) * col(2, 1)) - col(0, 1) * (col(1, 0) * col(2, 2) - col(1, 2) * col(2, 0))
                + col(0, 2) * (col(1, 0) * col(2, 1) - col(1, 1) * col(2, 0)))
                / det
        });
        Some(std::array::from_fn(|k| idx[k] * voxel_mm[k]))
    }
}

impl Stack {
    /// A stack from a buffer (used by the phantom and tests). Errors when sizes disagree.
    pub fn from_samples(dims: [usize; 3], samples: Samples, voxel: Option<VoxelSize>) -> Result<Self> {
        if dims.iter().product::<usize>() != samples.len() {
            return Err(Error::invalid(format!("buffer holds {} samples, dims {:?} need {}", samples.len(), dims, dims.iter().product::<usize>())));
        }
        Ok(Stack { dims, samples, voxel, origin_vox: [0.0; 3], path: PathBuf::new(), warnings: vec![], world: None })
    }

    /// The voxel size, or a clear error when none is known.
    pub fn voxel(&self) -> Result<&VoxelSize> {
        self.voxel.as_ref().ok_or_else(|| Error::format(&self.path, "no voxel size in the file; give it with --voxel-um X[,Y,Z]"))
    }

    /// Stack-frame position (mm) of voxel (0, 0, 0)'s centre: zero unless cropped or binned.
    /// `origin_vox` counts voxels of the original file, whose size is this voxel size / bin.
    pub fn origin_mm(&self) -> [f64; 3] {
        match &self.voxel {
            Some(v) => std::array::from_fn(|a| self.origin_vox[a] * v.original_mm[a]),
            None => [0.0; 3],
        }
    }

    /// Continuous voxel indices of a stack-frame point (mm).
    #[inline]
    pub fn to_index(&self, p: [f64; 3]) -> [f64; 3] {
        let (Some(v), o) = (&self.voxel, self.origin_mm()) else { return [f64::NAN; 3] };
        std::array::from_fn(|a| (p[a] - o[a]) / v.mm[a])
    }

    /// Stack-frame position (mm) of voxel (i, j, k)'s centre (fractional indices allowed).
    pub fn to_mm(&self, idx: [f64; 3]) -> [f64; 3] {
        let (Some(v), o) = (&self.voxel, self.origin_mm()) else { return [f64::NAN; 3] };
        std::array::from_fn(|a| o[a] + idx[a] * v.mm[a])
    }

    /// Trilinear value at a stack-frame point (mm); NaN outside the voxel centres.
    pub fn sample_mm(&self, p: [f64; 3]) -> f32 {
        let x = self.to_index(p);
        with_samples!(&self.samples, d => crate::section::trilinear_idx(d, self.dims, x))
    }

    /// Linear index of voxel (i, j, k).
    #[inline]
    pub fn index(&self, i: usize, j: usize, k: usize) -> usize {
        (k * self.dims[1] + j) * self.dims[0] + i
    }

    /// Minimum and maximum sample value (NaN samples ignored).
    pub fn value_range(&self) -> (f32, f32) {
        with_samples!(&self.samples, v => v
            .par_chunks(1 << 16)
            .map(|c| c.iter().fold((f32::INFINITY, f32::NEG_INFINITY), |(lo, hi), s| {
                let x = s.f();
                if x.is_nan() { (lo, hi) } else { (lo.min(x), hi.max(x)) }
            }))
            .reduce(|| (f32::INFINITY, f32::NEG_INFINITY), |a, b| (a.0.min(b.0), a.1.max(b.1))))
    }

    /// Stack-frame positions (mm) of the first and the last voxel centre.
    pub fn bounds_mm(&self) -> Result<([f64; 3], [f64; 3])> {
        self.voxel()?;
        Ok((self.to_mm([0.0; 3]), self.to_mm(self.dims.map(|n| n as f64 - 1.0))))
    }

    /// True when a stack-frame point (mm) lies within half a voxel of the voxel centres.
    pub fn contains_mm(&self, p: [f64; 3]) -> bool {
        if self.voxel.is_none() {
            return false;
        }
        let x = self.to_index(p);
        (0..3).all(|a| x[a] >= -0.5 && x[a] <= self.dims[a] as f64 - 0.5)
    }

    /// Bytes held by the voxel buffer.
    pub fn bytes(&self) -> usize {
        self.samples.bytes()
    }
}

/// Loads a stack: a multi-page TIFF, a folder of single-page TIFF/PNG slices in natural order, a
/// NIfTI, NRRD or MetaImage volume, or DICOM (a folder holding a series, or one multi-frame file).
pub fn load(path: &Path, opts: &LoadOptions) -> Result<Stack> {
    load_with_progress(path, opts, &crate::progress::Progress::new())
}

/// [`load`] reporting progress per page and honouring cancel.
pub fn load_with_progress(path: &Path, opts: &LoadOptions, progress: &crate::progress::Progress) -> Result<Stack> {
    if ![1, 2, 4].contains(&opts.bin) {
        return Err(Error::invalid(format!("binning must be 1, 2 or 4, got {}", opts.bin)));
    }
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, e))?;
    let mut stack = if meta.is_dir() {
        if dicom::claims_dir(path) { dicom::load(path, opts, progress)? } else { folder::load(path, opts, progress)? }
    } else if nifti::claims(path) {
        nifti::load(path, opts, progress)?
    } else if nrrd::claims(path) {
        nrrd::load(path, opts, progress)?
    } else if dicom::claims(path) {
        dicom::load(path, opts, progress)?
    } else {
        tiff::load(path, opts, progress)?
    };
    if let Some(v) = &opts.voxel {
        stack.voxel = Some(v.clone());
        // the user's size replaces what the file lacked
        stack.warnings.retain(|w| !w.contains("gives no slice spacing"));
    }
    // voxel (0,0,0) of a b-binned, cropped buffer covers original voxels c..c+b−1: its centre
    let b = opts.bin as f64;
    let c = opts.crop.map(|c| c.map(|r| r[0] as f64)).unwrap_or([0.0; 3]);
    stack.origin_vox = std::array::from_fn(|a| c[a] + (b - 1.0) / 2.0);
    if let Some(v) = &mut stack.voxel {
        v.original_mm = v.mm;
        v.mm = v.mm.map(|x| x * b);
    }
    Ok(stack)
}

/// The header facts of a stack file, read without decoding the voxels.
#[derive(Clone, Debug)]
pub struct Header {
    pub dims: [usize; 3],
    pub sample: &'static str,
    pub bytes_per_sample: usize,
    pub voxel: Option<VoxelSize>,
}

/// Refuses a decoded size above the cap or the memory available now, before allocating.
pub(crate) fn check_memory(path: &Path, bytes: u64, max_bytes: Option<u64>) -> Result<()> {
    let avail = available_memory().map(|a| a / 10 * 9);
    let cap = match (max_bytes, avail) {
        (Some(m), Some(a)) => Some(m.min(a)),
        (m, a) => m.or(a),
    };
    if let Some(cap) = cap
        && bytes > cap
    {
        return Err(Error::format(
            path,
            format!(
                "decoded stack needs {:.2} GB but only {:.2} GB may be used; load it binned 2×2×2 (--bin 2) or crop it",
                bytes as f64 / 1e9,
                cap as f64 / 1e9
            ),
        ));
    }
    Ok(())
}

/// MemAvailable from /proc/meminfo in bytes (None where it cannot be read).
pub fn available_memory() -> Option<u64> {
    let text = std::fs::read_to_string("/proc/meminfo").ok()?;
    let line = text.lines().find(|l| l.starts_with("MemAvailable:"))?;
    let kb: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb * 1024)
}

/// Averages b×b×b blocks of `pages` (b decoded pages of nx×ny, fewer at the end of a stack)
/// into one output slice of (nx/b)×(ny/b).
pub(crate) fn bin_block<T: Sample, U: Sample>(pages: &[&[T]], nx: usize, ny: usize, b: usize, out: &mut [U], conv: fn(f32) -> U) {
    let (bx, by) = (nx / b, ny / b);
    let n = (pages.len() * b * b) as f32;
    for j in 0..by {
        for i in 0..bx {
            let mut sum = 0.0f32;
            for page in pages {
                for dj in 0..b {
                    let row = &page[(b * j + dj) * nx + b * i..][..b];
                    sum += row.iter().map(|x| x.f()).sum::<f32>();
                }
            }
            out[j * bx + i] = conv(sum / n);
        }
    }
}

/// Turns up to `bin` decoded full pages (nx wide) into one output slice: crop, then bin.
pub(crate) fn assemble<T: Sample>(pages: &[Vec<T>], nx: usize, crop: [[usize; 2]; 2], bin: usize, out: &mut [T], conv: fn(f32) -> T) {
    if bin == 1 {
        return crop_page(&pages[0], nx, crop, out);
    }
    let (cw, ch) = (crop[0][1] - crop[0][0], crop[1][1] - crop[1][0]);
    let cropped: Vec<Vec<T>> = pages
        .iter()
        .map(|p| {
            let mut v = vec![T::zeroed(); cw * ch];
            crop_page(p, nx, crop, &mut v);
            v
        })
        .collect();
    let refs: Vec<&[T]> = cropped.iter().map(|v| &v[..]).collect();
    bin_block(&refs, cw, ch, bin, out, conv);
}

/// Copies the crop rectangle (columns i0..i1, rows j0..j1) of a full nx-wide page.
pub(crate) fn crop_page<T: Sample>(page: &[T], nx: usize, c: [[usize; 2]; 2], out: &mut [T]) {
    let w = c[0][1] - c[0][0];
    for (r, j) in (c[1][0]..c[1][1]).enumerate() {
        out[r * w..(r + 1) * w].copy_from_slice(&page[j * nx + c[0][0]..j * nx + c[0][1]]);
    }
}

/// The crop box (checked, see [`crop_box`]) and the dimensions of the buffer it gives once
/// binned b×b×b; errors when binning leaves nothing.
pub(crate) fn crop_and_dims(path: &Path, crop: Option<[[usize; 2]; 3]>, dims: [usize; 3], b: usize) -> Result<([[usize; 2]; 3], [usize; 3])> {
    let c = crop_box(path, crop, dims)?;
    let size = c.map(|r| r[1] - r[0]);
    let out = [size[0] / b, size[1] / b, size[2].div_ceil(b)];
    if out.contains(&0) {
        return Err(Error::format(path, "stack too small to bin"));
    }
    Ok((c, out))
}

/// Checks a crop box against the stack's dimensions; the full box when there is none.
pub(crate) fn crop_box(path: &Path, crop: Option<[[usize; 2]; 3]>, dims: [usize; 3]) -> Result<[[usize; 2]; 3]> {
    let c = crop.unwrap_or(dims.map(|n| [0, n]));
    for a in 0..3 {
        if c[a][0] >= c[a][1] || c[a][1] > dims[a] {
            return Err(Error::format(
                path,
                format!("crop {}..{} on axis {} does not fit the stack's {} voxels", c[a][0], c[a][1], ["i", "j", "k"][a], dims[a]),
            ));
        }
    }
    Ok(c)
}

pub(crate) fn to_u8(x: f32) -> u8 {
    x.round_ties_even().clamp(0.0, 255.0) as u8
}
pub(crate) fn to_u16(x: f32) -> u16 {
    x.round_ties_even().clamp(0.0, 65535.0) as u16
}
pub(crate) fn to_f32(x: f32) -> f32 {
    x
}

/// Grey value of an RGB sample (ITU-R BT.601 luma weights; common practice).
pub(crate) fn luma(r: f32, g: f32, b: f32) -> f32 {
    0.299 * r + 0.587 * g + 0.114 * b
}

/// Reads only the header facts of a stack (for `inspect` and the memory check).
pub fn header(path: &Path) -> Result<Header> {
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if meta.is_dir() {
        if dicom::claims_dir(path) { dicom::header(path) } else { folder::header(path) }
    } else if nifti::claims(path) {
        nifti::header(path)
    } else if nrrd::claims(path) {
        nrrd::header(path)
    } else if dicom::claims(path) {
        dicom::header(path)
    } else {
        tiff::header(path)
    }
}

/// Crops and bins a stack read whole into memory (volume files), as `opts` asks.
pub(crate) fn crop_and_bin(st: Stack, opts: &LoadOptions) -> Result<Stack> {
    if opts.crop.is_none() && opts.bin == 1 {
        return Ok(st);
    }
    let [nx, ny, _] = st.dims;
    let b = opts.bin;
    let (crop, dims) = crop_and_dims(&st.path, opts.crop, st.dims, b)?;
    fn run<T: Sample>(v: &[T], nx: usize, ny: usize, crop: [[usize; 2]; 3], b: usize, dims: [usize; 3], conv: fn(f32) -> T) -> Vec<T> {
        let slice = dims[0] * dims[1];
        let mut out = vec![T::zeroed(); slice * dims[2]];
        for (k, o) in out.chunks_mut(slice).enumerate() {
            let k0 = crop[2][0] + k * b;
            let pages: Vec<Vec<T>> = (k0..(k0 + b).min(crop[2][1])).map(|z| v[z * nx * ny..(z + 1) * nx * ny].to_vec()).collect();
            assemble(&pages, nx, [crop[0], crop[1]], b, o, conv);
        }
        out
    }
    let samples = match &st.samples {
        Samples::U8(v) => Samples::U8(run(v, nx, ny, crop, b, dims, to_u8).into()),
        Samples::U16(v) => Samples::U16(run(v, nx, ny, crop, b, dims, to_u16).into()),
        Samples::F32(v) => Samples::F32(run(v, nx, ny, crop, b, dims, to_f32).into()),
    };
    Ok(Stack { dims, samples, ..st })
}
