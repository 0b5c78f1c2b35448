//! Raw sample blocks as volume files hold them (NIfTI, NRRD, MetaImage): a run of fixed-size
//! integers or floats in either byte order, decoded into the in-memory sample type. Unscaled
//! uint8 and uint16 stay as they are; every other type (and any scaled one) is held as float32,
//! with a note saying so.

use super::Samples;
use crate::{Error, Result};
use std::path::Path;

/// A sample type of a raw block.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(super) enum Kind {
    U8,
    I8,
    U16,
    I16,
    U32,
    I32,
    F32,
    F64,
}

impl Kind {
    /// Bytes per sample.
    pub(super) fn bytes(self) -> usize {
        match self {
            Kind::U8 | Kind::I8 => 1,
            Kind::U16 | Kind::I16 => 2,
            Kind::U32 | Kind::I32 | Kind::F32 => 4,
            Kind::F64 => 8,
        }
    }

    pub(super) fn name(self) -> &'static str {
        match self {
            Kind::U8 => "uint8",
            Kind::I8 => "int8",
            Kind::U16 => "uint16",
            Kind::I16 => "int16",
            Kind::U32 => "uint32",
            Kind::I32 => "int32",
            Kind::F32 => "float32",
            Kind::F64 => "float64",
        }
    }

    /// The type held in memory and its bytes per sample, given whether a scaling applies.
    pub(super) fn held(self, scaled: bool) -> (&'static str, usize) {
        match self {
            Kind::U8 if !scaled => ("uint8", 1),
            Kind::U16 if !scaled => ("uint16", 2),
            _ => ("float32", 4),
        }
    }
}

/// Where converted samples go: the in-memory type [`Kind::held`] chose.
pub(super) enum Out<'a> {
    U8(&'a mut [u8]),
    U16(&'a mut [u16]),
    F32(&'a mut [f32]),
}

/// Converts `data` (samples of `kind`, little or big endian, at least as many as `out` holds)
/// into `out`, in parallel blocks: x·slope + intercept for float32 output (`scale`), the value
/// itself for uint8 / uint16 output.
pub(super) fn convert(data: &[u8], kind: Kind, big_endian: bool, (m, c): (f64, f64), out: Out) {
    use rayon::prelude::*;
    const BLOCK: usize = 1 << 16;
    let bps = kind.bytes();
    macro_rules! each {
        ($out:expr, $conv:expr) => {
            $out.par_chunks_mut(BLOCK).zip(data.par_chunks(BLOCK * bps)).for_each(|(o, d)| {
                macro_rules! run {
                    ($t:ty, $n:expr) => {
                        for (x, b) in o.iter_mut().zip(d.chunks_exact($n)) {
                            let a: [u8; $n] = b.try_into().unwrap();
                            let v = if big_endian { <$t>::from_be_bytes(a) } else { <$t>::from_le_bytes(a) };
                            *x = $conv(v as f64);
                        }
                    };
                }
                match kind {
                    Kind::U8 => run!(u8, 1),
                    Kind::I8 => run!(i8, 1),
                    Kind::U16 => run!(u16, 2),
                    Kind::I16 => run!(i16, 2),
                    Kind::U32 => run!(u32, 4),
                    Kind::I32 => run!(i32, 4),
                    Kind::F32 => run!(f32, 4),
                    Kind::F64 => run!(f64, 8),
                }
            })
        };
    }
    match out {
        Out::U8(o) => each!(o, |v: f64| v as u8),
        Out::U16(o) => each!(o, |v: f64| v as u16),
        Out::F32(o) => each!(o, |v: f64| (v * m + c) as f32),
    }
}

/// Decodes `n` samples from `data` (at least n·bytes long), scaling each by `scale` = (slope,
/// intercept) when given; returns the samples and the notes to show (type converted, scaled).
/// `what` names the scaling's source in the note.
pub(super) fn decode(path: &Path, data: &[u8], kind: Kind, big_endian: bool, n: usize, scale: Option<(f64, f64, &str)>) -> Result<(Samples, Vec<String>)> {
    let bps = kind.bytes();
    if data.len() < n * bps {
        return Err(Error::format(
            path,
            format!("the file holds {} bytes of samples where {n} {} samples need {} (truncated?)", data.len(), kind.name(), n * bps),
        ));
    }
    let (m, c) = scale.map(|(m, c, _)| (m, c)).unwrap_or((1.0, 0.0));
    let samples = match kind.held(scale.is_some()).0 {
        "uint8" => {
            let mut v = vec![0u8; n];
            convert(data, kind, big_endian, (m, c), Out::U8(&mut v));
            Samples::U8(v.into())
        }
        "uint16" => {
            let mut v = vec![0u16; n];
            convert(data, kind, big_endian, (m, c), Out::U16(&mut v));
            Samples::U16(v.into())
        }
        _ => {
            let mut v = vec![0f32; n];
            convert(data, kind, big_endian, (m, c), Out::F32(&mut v));
            Samples::F32(v.into())
        }
    };
    Ok((samples, notes(path, kind, scale)))
}

/// The notes for samples of `kind` decoded with `scale`: the type they are held as, the scaling.
pub(super) fn notes(path: &Path, kind: Kind, scale: Option<(f64, f64, &str)>) -> Vec<String> {
    let name = kind.name();
    match (kind.held(scale.is_some()).0, scale) {
        ("float32", Some((m, c, what))) => vec![format!("{}: {name} samples scaled by {m} and offset by {c} ({what}), held as float32", path.display())],
        ("float32", None) if kind != Kind::F32 => vec![format!("{}: {name} samples held as float32", path.display())],
        _ => vec![],
    }
}
