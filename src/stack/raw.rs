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
    let word = |o: usize| -> [u8; 8] {
        let mut a = [0u8; 8];
        a[..bps].copy_from_slice(&data[o * bps..(o + 1) * bps]);
        if big_endian {
            a[..bps].reverse();
        }
        a
    };
    let value = |i: usize| -> f64 {
        let w = word(i);
        match kind {
            Kind::U8 => w[0] as f64,
            Kind::I8 => w[0] as i8 as f64,
            Kind::I16 => i16::from_le_bytes([w[0], w[1]]) as f64,
            Kind::U16 => u16::from_le_bytes([w[0], w[1]]) as f64,
            Kind::I32 => i32::from_le_bytes(w[..4].try_into().unwrap()) as f64,
            Kind::U32 => u32::from_le_bytes(w[..4].try_into().unwrap()) as f64,
            Kind::F32 => f32::from_le_bytes(w[..4].try_into().unwrap()) as f64,
            Kind::F64 => f64::from_le_bytes(w),
        }
    };
    let mut notes = vec![];
    let samples = match kind.held(scale.is_some()).0 {
        "uint8" => Samples::U8((0..n).map(|i| value(i) as u8).collect::<Vec<_>>().into()),
        "uint16" => Samples::U16((0..n).map(|i| value(i) as u16).collect::<Vec<_>>().into()),
        _ => {
            let (m, c) = scale.map(|(m, c, _)| (m, c)).unwrap_or((1.0, 0.0));
            let name = kind.name();
            if let Some((m, c, what)) = scale {
                notes.push(format!("{}: {name} samples scaled by {m} and offset by {c} ({what}), held as float32", path.display()));
            } else if kind != Kind::F32 {
                notes.push(format!("{}: {name} samples held as float32", path.display()));
            }
            Samples::F32((0..n).map(|i| (value(i) * m + c) as f32).collect::<Vec<_>>().into())
        }
    };
    Ok((samples, notes))
}
