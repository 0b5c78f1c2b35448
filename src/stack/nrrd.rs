//! NRRD (.nrrd; .nhdr with a detached data file) and MetaImage (.mha; .mhd with a detached data
//! file) volumes: a text header of `key: value` (NRRD) or `Key = Value` (MetaImage) lines, then
//! raw samples, plain or compressed (NRRD gzip; MetaImage zlib). Both are read by their published
//! field names with a small parser of our own. The index-to-world transform (NRRD space
//! directions and space origin; MetaImage TransformMatrix, ElementSpacing and Offset) is kept as
//! [`super::World`]; the stack frame itself stays (i·vx, j·vy, k·vz).

use super::raw::{self, Kind};
use super::{LoadOptions, Stack, VoxelSize, VoxelSource, World};
use crate::progress::Progress;
use crate::{Error, Result};
use std::io::Read;
use std::path::{Path, PathBuf};

/// True for the file names this reader takes.
pub(super) fn claims(path: &Path) -> bool {
    let name = path.file_name().map(|n| n.to_string_lossy().to_lowercase()).unwrap_or_default();
    [".nrrd", ".nhdr", ".mha", ".mhd"].iter().any(|e| name.ends_with(e))
}

/// How the samples are stored.
#[derive(Clone, Copy, PartialEq)]
enum Encoding {
    Raw,
    Gzip,
    Zlib,
}

/// What the header says.
struct Head {
    dims: [usize; 3],
    kind: Kind,
    big_endian: bool,
    encoding: Encoding,
    /// The file holding the samples (the header's own for attached data).
    data_file: PathBuf,
    /// Where the samples start in the data file (before inflating); None: at its end (NRRD
    /// `byte skip: -1`).
    offset: Option<u64>,
    /// Bytes to skip after inflating (NRRD `byte skip` with compressed data).
    skip_inflated: u64,
    voxel_mm: Option<[f64; 3]>,
    world: Option<World>,
    notes: Vec<String>,
}

/// The header text: the file's first bytes up to the end of the header (NRRD: the first empty
/// line; MetaImage: the `ElementDataFile` line), and the byte offset just past it.
fn header_text(path: &Path) -> Result<(String, u64, bool)> {
    let mut f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
    let mut buf = vec![];
    (&mut f).take(1 << 20).read_to_end(&mut buf).map_err(|e| Error::io(path, e))?;
    let nrrd = buf.starts_with(b"NRRD");
    let mut pos = 0;
    let mut text = String::new();
    while pos < buf.len() {
        let end = buf[pos..].iter().position(|&c| c == b'\n').map(|e| pos + e + 1).unwrap_or(buf.len());
        let line = String::from_utf8_lossy(&buf[pos..end]).trim_end_matches(['\r', '\n']).to_string();
        pos = end;
        if nrrd && line.is_empty() {
            return Ok((text, pos as u64, true));
        }
        let last = !nrrd && line.trim_start().to_lowercase().starts_with("elementdatafile");
        text.push_str(&line);
        text.push('\n');
        if last {
            return Ok((text, pos as u64, false));
        }
    }
    if nrrd {
        // a detached header may end without an empty line
        return Ok((text, pos as u64, true));
    }
    Err(Error::format(path, "not a MetaImage header: no ElementDataFile line in its first megabyte"))
}

/// Numbers of a header value ("1 2 3", "(1,2,3)", "(1,2,3) (4,5,6)").
fn numbers(v: &str) -> Vec<f64> {
    v.split(|c: char| c.is_whitespace() || c == ',' || c == '(' || c == ')').filter(|t| !t.is_empty()).filter_map(|t| t.parse().ok()).collect()
}

/// Millimetres in one of a unit's names (mm when none is given).
fn unit_mm(u: &str) -> Option<f64> {
    match u.trim().trim_matches('"').to_lowercase().as_str() {
        "" | "mm" | "millimeter" | "millimeters" | "millimetre" => Some(1.0),
        "um" | "µm" | "micron" | "microns" | "micrometer" | "micrometre" => Some(1e-3),
        "cm" => Some(10.0),
        "m" | "meter" | "metre" => Some(1000.0),
        _ => None,
    }
}

fn kind_nrrd(path: &Path, t: &str) -> Result<Kind> {
    Ok(match t.trim().to_lowercase().as_str() {
        "uchar" | "unsigned char" | "uint8" | "uint8_t" => Kind::U8,
        "signed char" | "int8" | "int8_t" => Kind::I8,
        "ushort" | "unsigned short" | "unsigned short int" | "uint16" | "uint16_t" => Kind::U16,
        "short" | "short int" | "signed short" | "signed short int" | "int16" | "int16_t" => Kind::I16,
        "uint" | "unsigned int" | "uint32" | "uint32_t" => Kind::U32,
        "int" | "signed int" | "int32" | "int32_t" => Kind::I32,
        "float" => Kind::F32,
        "double" => Kind::F64,
        other => return Err(Error::format(path, format!("NRRD type \"{other}\" is not supported (8/16/32-bit integers, float and double are)"))),
    })
}

fn kind_meta(path: &Path, t: &str) -> Result<Kind> {
    Ok(match t.trim() {
        "MET_UCHAR" => Kind::U8,
        "MET_CHAR" => Kind::I8,
        "MET_USHORT" => Kind::U16,
        "MET_SHORT" => Kind::I16,
        "MET_UINT" => Kind::U32,
        "MET_INT" => Kind::I32,
        "MET_FLOAT" => Kind::F32,
        "MET_DOUBLE" => Kind::F64,
        other => return Err(Error::format(path, format!("MetaImage ElementType {other} is not supported (8/16/32-bit integers, float and double are)"))),
    })
}

/// The world frame named by an NRRD `space` or a MetaImage `AnatomicalOrientation`.
fn frame(v: &str) -> Option<&'static str> {
    match v.trim().to_lowercase().as_str() {
        "right-anterior-superior" | "ras" => Some("RAS"),
        "left-posterior-superior" | "lps" => Some("LPS"),
        "left-anterior-superior" | "las" => Some("LAS"),
        _ => None,
    }
}

/// Three sizes from a header's list, a missing third one (a single slice) being 1.
fn three_sizes(path: &Path, v: &[f64], what: &str) -> Result<[usize; 3]> {
    let ok = |x: f64| x >= 1.0 && x.fract() == 0.0 && x < 1e9;
    match v {
        [x, y] if ok(*x) && ok(*y) => Ok([*x as usize, *y as usize, 1]),
        [x, y, z] if ok(*x) && ok(*y) && ok(*z) => Ok([*x as usize, *y as usize, *z as usize]),
        [x, y, z, 1.0] if ok(*x) && ok(*y) && ok(*z) => Ok([*x as usize, *y as usize, *z as usize]),
        _ => Err(Error::format(path, format!("{what} {v:?}: a grey 2-D or 3-D image is needed"))),
    }
}

fn parse_nrrd(path: &Path, text: &str, end: u64) -> Result<Head> {
    let bad = |m: String| Error::format(path, m);
    let mut fields = std::collections::HashMap::new();
    for line in text.lines().skip(1) {
        if line.starts_with('#') || line.contains(":=") {
            continue; // comments and key/value pairs
        }
        if let Some((k, v)) = line.split_once(": ") {
            fields.insert(k.trim().to_lowercase(), v.trim().to_string());
        }
    }
    let get = |k: &str| fields.get(k).map(|s| s.as_str());
    let dim = get("dimension").and_then(|d| d.parse::<usize>().ok()).ok_or_else(|| bad("not a readable NRRD header: no dimension".into()))?;
    let sizes = numbers(get("sizes").unwrap_or(""));
    if sizes.len() != dim {
        return Err(bad(format!("NRRD sizes {sizes:?} do not match dimension {dim}")));
    }
    let dims = three_sizes(path, &sizes, "NRRD sizes")?;
    let kind = kind_nrrd(path, get("type").ok_or_else(|| bad("NRRD header has no type".into()))?)?;
    let big_endian = get("endian").is_some_and(|e| e.eq_ignore_ascii_case("big"));
    let encoding = match get("encoding").unwrap_or("raw").to_lowercase().as_str() {
        "raw" => Encoding::Raw,
        "gzip" | "gz" => Encoding::Gzip,
        other => return Err(bad(format!("NRRD encoding \"{other}\" is not supported (raw and gzip are)"))),
    };
    let data_file = match get("data file").or(get("datafile")) {
        None => path.to_path_buf(),
        Some(f) if f.starts_with("LIST") || f.contains('%') => return Err(bad(format!("NRRD data file \"{f}\": a list of data files is not supported"))),
        Some(f) => path.parent().unwrap_or(Path::new(".")).join(f),
    };
    let detached = data_file != path;
    let skip: i64 = get("byte skip").and_then(|s| s.parse().ok()).unwrap_or(0);
    let lines: usize = get("line skip").and_then(|s| s.parse().ok()).unwrap_or(0);
    let base = if detached { line_offset(&data_file, lines)? } else { end };
    let (offset, skip_inflated) = match (skip, encoding) {
        (-1, Encoding::Raw) => (None, 0),
        (s, Encoding::Raw) if s >= 0 => (Some(base + s as u64), 0),
        (s, _) if s >= 0 => (Some(base), s as u64),
        (s, _) => return Err(bad(format!("NRRD byte skip {s} is not supported with compressed data"))),
    };
    let scale = get("space units").map(|u| u.split_whitespace().map(unit_mm).collect::<Vec<_>>());
    let unit = match scale.as_deref() {
        None => 1.0,
        Some([Some(a), Some(b), Some(c)]) if a == b && b == c => *a,
        Some(_) => return Err(bad(format!("NRRD space units \"{}\" are not supported (mm, µm, cm or m on every axis)", get("space units").unwrap_or("")))),
    };
    let mut notes = vec![];
    let dirs: Option<Vec<[f64; 3]>> = get("space directions").and_then(|v| {
        let groups: Vec<&str> = v.split_whitespace().filter(|g| !g.eq_ignore_ascii_case("none")).collect();
        let vecs: Vec<Vec<f64>> = groups.iter().map(|g| numbers(g)).collect();
        (vecs.len() == dim.min(3) && vecs.iter().all(|v| v.len() == 3)).then(|| vecs.iter().map(|v| [v[0] * unit, v[1] * unit, v[2] * unit]).collect())
    });
    let spacings = get("spacings").map(numbers).filter(|s| s.len() >= 2 && s.iter().take(3).all(|x| *x > 0.0));
    let mut voxel_mm = None;
    let mut world = None;
    if let Some(d) = &dirs {
        let norm = |v: &[f64; 3]| (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt();
        let z = d.get(2).copied().unwrap_or([0.0, 0.0, 1.0]);
        voxel_mm = Some([norm(&d[0]), norm(&d[1]), if d.len() > 2 { norm(&z) } else { 1.0 }]);
        let o = get("space origin").map(numbers).filter(|o| o.len() == 3).unwrap_or(vec![0.0; 3]);
        let space = get("space").unwrap_or("");
        match frame(space) {
            Some(f) => {
                let matrix = std::array::from_fn(|r| [d[0][r], d[1][r], z[r], o[r] * unit]);
                world = Some(World { matrix, frame: f, source: format!("NRRD space directions ({space})") });
            }
            None => notes.push(format!("{}: NRRD space \"{space}\" is not an anatomical frame; the world transform is not kept", path.display())),
        }
    } else if let Some(s) = spacings {
        voxel_mm = Some([s[0] * unit, s[1] * unit, s.get(2).copied().unwrap_or(1.0) * unit]);
    }
    Ok(Head { dims, kind, big_endian, encoding, data_file, offset, skip_inflated, voxel_mm, world, notes })
}

/// The byte offset just past the first `lines` lines of a file.
fn line_offset(path: &Path, lines: usize) -> Result<u64> {
    if lines == 0 {
        return Ok(0);
    }
    let mut f = std::io::BufReader::new(std::fs::File::open(path).map_err(|e| Error::io(path, e))?);
    let mut off = 0u64;
    for _ in 0..lines {
        let mut line = vec![];
        let n = std::io::BufRead::read_until(&mut f, b'\n', &mut line).map_err(|e| Error::io(path, e))?;
        if n == 0 {
            return Err(Error::format(path, format!("fewer lines than the {lines} the header skips")));
        }
        off += n as u64;
    }
    Ok(off)
}

fn parse_meta(path: &Path, text: &str, end: u64) -> Result<Head> {
    let bad = |m: String| Error::format(path, m);
    let mut fields = std::collections::HashMap::new();
    for line in text.lines() {
        if let Some((k, v)) = line.split_once('=') {
            fields.insert(k.trim().to_lowercase(), v.trim().to_string());
        }
    }
    let get = |k: &str| fields.get(k).map(|s| s.as_str());
    let true_ = |k: &str| get(k).is_some_and(|v| v.eq_ignore_ascii_case("true") || v == "1");
    if get("objecttype").is_some_and(|o| !o.eq_ignore_ascii_case("image")) {
        return Err(bad(format!("MetaImage ObjectType {} is not an image", get("objecttype").unwrap_or(""))));
    }
    let dims = three_sizes(path, &numbers(get("dimsize").ok_or_else(|| bad("not a readable MetaImage header: no DimSize".into()))?), "MetaImage DimSize")?;
    let channels = get("elementnumberofchannels").and_then(|c| c.parse::<usize>().ok()).unwrap_or(1);
    if channels != 1 {
        return Err(bad(format!("MetaImage with {channels} channels: a grey image is needed")));
    }
    let kind = kind_meta(path, get("elementtype").ok_or_else(|| bad("MetaImage header has no ElementType".into()))?)?;
    let big_endian = true_("elementbyteordermsb") || true_("binarydatabyteordermsb");
    let encoding = if true_("compresseddata") { Encoding::Zlib } else { Encoding::Raw };
    let data = get("elementdatafile").unwrap_or("");
    let data_file = if data.eq_ignore_ascii_case("local") {
        path.to_path_buf()
    } else if data.starts_with("LIST") || data.contains('%') {
        return Err(bad(format!("MetaImage ElementDataFile \"{data}\": a list of data files is not supported")));
    } else {
        path.parent().unwrap_or(Path::new(".")).join(data)
    };
    let detached = data_file != path;
    let header_size: i64 = get("headersize").and_then(|s| s.parse().ok()).unwrap_or(0);
    let offset = match (detached, header_size) {
        (false, _) => Some(end),
        (true, -1) => None,
        (true, h) => Some(h.max(0) as u64),
    };
    let spacing = get("elementspacing").or(get("elementsize")).map(numbers).filter(|s| s.len() >= 2 && s.iter().all(|x| *x > 0.0));
    let voxel_mm = spacing.as_ref().map(|s| [s[0], s[1], s.get(2).copied().unwrap_or(1.0)]);
    let mut world = None;
    if let Some(v) = voxel_mm {
        let o = get("offset").or(get("position")).or(get("origin")).map(numbers).filter(|o| o.len() == 3).unwrap_or(vec![0.0; 3]);
        let m = get("transformmatrix").or(get("rotation")).or(get("orientation")).map(numbers).filter(|m| m.len() == 9);
        let m = m.unwrap_or(vec![1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 1.0]);
        // TransformMatrix holds the direction of each index axis in turn (axis i: m[3i..3i+3])
        let matrix = std::array::from_fn(|r| [m[r] * v[0], m[3 + r] * v[1], m[6 + r] * v[2], o[r]]);
        world = Some(World { matrix, frame: "LPS", source: "MetaImage TransformMatrix, ElementSpacing, Offset".into() });
    }
    Ok(Head { dims, kind, big_endian, encoding, data_file, offset, skip_inflated: 0, voxel_mm, world, notes: vec![] })
}

fn head(path: &Path) -> Result<Head> {
    let (text, end, nrrd) = header_text(path)?;
    if nrrd { parse_nrrd(path, &text, end) } else { parse_meta(path, &text, end) }
}

pub(super) fn header(path: &Path) -> Result<super::Header> {
    let h = head(path)?;
    let (sample, bytes_per_sample) = h.kind.held(false);
    let voxel = h.voxel_mm.map(|mm| VoxelSize::new(mm, std::array::from_fn(|_| VoxelSource::FileHeader)));
    Ok(super::Header { dims: h.dims, sample, bytes_per_sample, voxel })
}

pub(super) fn load(path: &Path, opts: &LoadOptions, progress: &Progress) -> Result<Stack> {
    let h = head(path)?;
    let n = h.dims.iter().product::<usize>();
    let need = (n as u64).saturating_mul(h.kind.bytes() as u64);
    super::check_memory(path, need.saturating_add((n as u64).saturating_mul(h.kind.held(false).1 as u64)), opts.max_bytes)?;
    let df = &h.data_file;
    let mut f = std::fs::File::open(df).map_err(|e| Error::io(df, e))?;
    let len = f.metadata().map_err(|e| Error::io(df, e))?.len();
    let start = match h.offset {
        Some(o) => o,
        None => len
            .checked_sub(need)
            .ok_or_else(|| Error::format(df, format!("the file is shorter than the {need} bytes of samples its header describes (truncated?)")))?,
    };
    std::io::Seek::seek(&mut f, std::io::SeekFrom::Start(start)).map_err(|e| Error::io(df, e))?;
    let want = need + h.skip_inflated;
    let mut data = vec![];
    let reader = std::io::BufReader::new(f);
    let inflate = |e: std::io::Error| Error::format(df, format!("cannot inflate the compressed samples (truncated or corrupt?): {e}"));
    match h.encoding {
        Encoding::Raw => reader.take(want).read_to_end(&mut data).map_err(|e| Error::io(df, e))?,
        Encoding::Gzip => flate2::read::MultiGzDecoder::new(reader).take(want).read_to_end(&mut data).map_err(inflate)?,
        Encoding::Zlib => flate2::read::ZlibDecoder::new(reader).take(want).read_to_end(&mut data).map_err(inflate)?,
    };
    let data = data.get(h.skip_inflated as usize..).unwrap_or(&[]);
    progress.start(1);
    let (samples, notes) = raw::decode(df, data, h.kind, h.big_endian, n, None)?;
    progress.add(1);
    let mut warnings = h.notes;
    warnings.extend(notes);
    if h.voxel_mm.is_none() {
        warnings.push(format!("{}: the header gives no voxel size; give it with --voxel-um", path.display()));
    }
    let voxel = h.voxel_mm.map(|mm| VoxelSize::new(mm, std::array::from_fn(|_| VoxelSource::FileHeader)));
    let stack = Stack { dims: h.dims, samples, voxel, origin_vox: [0.0; 3], path: path.to_path_buf(), warnings, world: h.world };
    super::crop_and_bin(stack, opts)
}
