//! Writes a stack as a multi-page TIFF with OME-XML physical sizes (used by the phantom).

use super::{Samples, Stack};
use crate::{Error, Result};
use std::io::{BufWriter, Seek, Write};
use std::path::Path;
use tiff::encoder::{Compression, DeflateLevel, TiffEncoder, TiffKind, colortype};
use tiff::tags::Tag;

/// Page compression for [`write_tiff`].
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Packing {
    None,
    Deflate,
    Lzw,
}

/// The OME-XML description for a stack of `dims` with voxel size `mm`, written in µm, the OME
/// default unit (TIFF ASCII tags cannot hold the µ sign, so the unit attributes are left out).
pub fn ome_xml(dims: [usize; 3], sample: &str, mm: [f64; 3]) -> String {
    let um = mm.map(|x| x * 1000.0);
    format!(
        "<?xml version=\"1.0\" encoding=\"UTF-8\"?><OME xmlns=\"http://www.openmicroscopy.org/Schemas/OME/2016-06\">\
<Image ID=\"Image:0\" Name=\"ductline\"><Pixels ID=\"Pixels:0\" DimensionOrder=\"XYZCT\" Type=\"{}\" \
SizeX=\"{}\" SizeY=\"{}\" SizeZ=\"{}\" SizeC=\"1\" SizeT=\"1\" PhysicalSizeX=\"{}\" \
PhysicalSizeY=\"{}\" PhysicalSizeZ=\"{}\">\
<Channel ID=\"Channel:0:0\" SamplesPerPixel=\"1\"/><TiffData/></Pixels></Image></OME>",
        sample, dims[0], dims[1], dims[2], um[0], um[1], um[2]
    )
}

/// Writes `stack` as a multi-page TIFF (BigTIFF when `big`), OME physical sizes on the first page.
/// The file is written to a temporary name beside `path` and renamed into place.
pub fn write_tiff(stack: &Stack, path: &Path, packing: Packing, big: bool) -> Result<()> {
    let tmp = path.with_extension("tif.partial");
    let f = std::fs::File::create(&tmp).map_err(|e| Error::io(&tmp, e))?;
    let w = BufWriter::with_capacity(1 << 20, f);
    let comp = match packing {
        Packing::None => Compression::Uncompressed,
        Packing::Deflate => Compression::Deflate(DeflateLevel::Fast),
        Packing::Lzw => Compression::Lzw,
    };
    let res = if big {
        TiffEncoder::new_big(w).map(|e| e.with_compression(comp)).and_then(|mut e| pages(stack, &mut e))
    } else {
        TiffEncoder::new(w).map(|e| e.with_compression(comp)).and_then(|mut e| pages(stack, &mut e))
    };
    res.map_err(|e| Error::io(&tmp, e))?;
    std::fs::rename(&tmp, path).map_err(|e| Error::io(path, e))
}

fn pages<W: Write + Seek, K: TiffKind>(stack: &Stack, enc: &mut TiffEncoder<W, K>) -> tiff::TiffResult<()> {
    let [nx, ny, nz] = stack.dims;
    let slice = nx * ny;
    let desc = stack.voxel.as_ref().map(|v| ome_xml(stack.dims, stack.samples.type_name(), v.mm));
    for k in 0..nz {
        let d = if k == 0 { desc.as_deref() } else { None };
        match &stack.samples {
            Samples::U8(v) => page::<_, _, colortype::Gray8>(enc, nx, ny, &v[k * slice..(k + 1) * slice], d)?,
            Samples::U16(v) => page::<_, _, colortype::Gray16>(enc, nx, ny, &v[k * slice..(k + 1) * slice], d)?,
            Samples::F32(v) => page::<_, _, colortype::Gray32Float>(enc, nx, ny, &v[k * slice..(k + 1) * slice], d)?,
        }
    }
    Ok(())
}

fn page<W: Write + Seek, K: TiffKind, C: colortype::ColorType>(
    enc: &mut TiffEncoder<W, K>,
    nx: usize,
    ny: usize,
    data: &[C::Inner],
    desc: Option<&str>,
) -> tiff::TiffResult<()>
where
    [C::Inner]: tiff::encoder::TiffValue,
{
    let mut img = enc.new_image::<C>(nx as u32, ny as u32)?;
    if let Some(d) = desc {
        img.encoder().write_tag(Tag::ImageDescription, d)?;
    }
    img.write_data(data)
}
