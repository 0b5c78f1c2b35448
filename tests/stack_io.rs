//! Stack loading against files written by tifffile (see tests/fixtures/make_fixtures.py), natural
//! order of slice folders, and the bad-input errors.

mod common;
use common::fixture;
use ductline::stack::{self, LoadOptions, Samples, VoxelSize, VoxelSource, natural_cmp};
use std::path::Path;

fn load(p: &Path) -> ductline::Result<stack::Stack> {
    stack::load(p, &LoadOptions::default())
}

/// Each fixture decodes to exactly the array numpy saved beside it (reference: tifffile + numpy).
#[test]
fn decodes_like_tifffile() {
    let manifest: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(fixture("manifest.json")).unwrap()).unwrap();
    let files = manifest["files"].as_array().unwrap();
    assert!(files.len() >= 9);
    for f in files {
        let name = f["name"].as_str().unwrap();
        let st = load(&fixture(&format!("tiff/{name}.tif"))).unwrap_or_else(|e| panic!("{name}: {e}"));
        let shape: Vec<usize> = f["shape"].as_array().unwrap().iter().map(|x| x.as_u64().unwrap() as usize).collect();
        assert_eq!(st.dims, [shape[2], shape[1], shape[0]], "{name}: dims");
        let raw = std::fs::read(fixture(&format!("tiff/{name}.raw"))).unwrap();
        match (&st.samples, f["dtype"].as_str().unwrap()) {
            (Samples::U8(v), "uint8") => assert_eq!(&v[..], raw.as_slice(), "{name}"),
            (Samples::U16(v), "uint16") => assert_eq!(v, &common::raw_u16(&format!("tiff/{name}.raw")), "{name}"),
            (Samples::F32(v), "float32") => {
                let want: Vec<f32> = raw.chunks_exact(4).map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]])).collect();
                assert_eq!(&v[..], &want[..], "{name}");
            }
            // signed and wide types are held as float32: every value of these fixtures is exact
            (Samples::F32(v), d @ ("int8" | "int16" | "int32" | "uint32" | "float64")) => {
                let want: Vec<f32> = match d {
                    "int8" => raw.iter().map(|&b| b as i8 as f32).collect(),
                    "int16" => raw.chunks_exact(2).map(|c| i16::from_le_bytes([c[0], c[1]]) as f32).collect(),
                    "int32" => raw.chunks_exact(4).map(|c| i32::from_le_bytes(c.try_into().unwrap()) as f32).collect(),
                    "uint32" => raw.chunks_exact(4).map(|c| u32::from_le_bytes(c.try_into().unwrap()) as f32).collect(),
                    _ => raw.chunks_exact(8).map(|c| f64::from_le_bytes(c.try_into().unwrap()) as f32).collect(),
                };
                assert_eq!(&v[..], &want[..], "{name}");
                assert!(st.warnings.iter().any(|w| w.contains(d) && w.contains("float32")), "{name}: {:?}", st.warnings);
            }
            (s, d) => panic!("{name}: sample type {} for numpy {d}", s.type_name()),
        }
        if name.starts_with("u16_thumb") {
            assert!(st.warnings.iter().any(|w| w.contains("1 reduced-resolution page")), "{name}: {:?}", st.warnings);
        }
        if let Some(vox) = f["voxel_um"].as_array() {
            let want: Vec<f64> = vox.iter().map(|x| x.as_f64().unwrap()).collect();
            let got = st.voxel.as_ref().unwrap_or_else(|| panic!("{name}: no voxel size")).mm.map(|x| x * 1000.0);
            for a in 0..3 {
                assert!((got[a] - want[a]).abs() < 1e-6, "{name}: voxel {got:?} vs {want:?}");
            }
        }
    }
}

/// Colour pages JPEG-compressed as YCbCr with 2×2 chroma subsampling (fixture by tifffile with
/// imagecodecs): read as grey, the Y channel, within 1.5 grey levels (mean under 0.3) of the BT.601
/// luma of the RGB that tifffile decodes (the two JPEG decoders round their transforms
/// differently, and libjpeg upsamples the chroma before its colour conversion), with a note that
/// says so.
#[test]
fn jpeg_ycbcr_reads_as_luma_like_tifffile() {
    let st = load(&fixture("tiff/ycbcr_jpeg.tif")).unwrap();
    assert_eq!(st.dims, [40, 32, 3]);
    let Samples::U8(v) = &st.samples else { panic!("8-bit colour reads as uint8 grey, got {}", st.samples.type_name()) };
    let want: Vec<f32> =
        std::fs::read(fixture("tiff/ycbcr_jpeg.luma.f32")).unwrap().chunks_exact(4).map(|c| f32::from_le_bytes(c.try_into().unwrap())).collect();
    assert_eq!(want.len(), v.len());
    let diffs: Vec<f32> = v.iter().zip(&want).map(|(&a, &b)| (a as f32 - b).abs()).collect();
    let (max, mean) = (diffs.iter().fold(0f32, |m, &d| m.max(d)), diffs.iter().sum::<f32>() / diffs.len() as f32);
    assert!(max <= 1.5 && mean < 0.3, "grey vs tifffile's luma: largest difference {max}, mean {mean}");
    assert!(st.warnings.iter().any(|w| w.contains("YCbCr") && w.contains("Y channel")), "{:?}", st.warnings);
}

#[test]
fn voxel_sources_are_kept() {
    let ome = load(&fixture("tiff/u16_ome.tif")).unwrap();
    assert_eq!(ome.voxel.unwrap().source, [VoxelSource::Ome, VoxelSource::Ome, VoxelSource::Ome]);
    let ij = load(&fixture("tiff/u16_imagej.tif")).unwrap();
    let v = ij.voxel.unwrap();
    assert_eq!(v.source[0], VoxelSource::TiffResolution);
    assert_eq!(v.source[2], VoxelSource::DescriptionSpacing);
    assert!(load(&fixture("tiff/u8_plain.tif")).unwrap().voxel.is_none(), "a plain TIFF has no voxel size");
    let user = stack::load(&fixture("tiff/u16_ome.tif"), &LoadOptions { voxel: Some(VoxelSize::from_user_um(&[7.0]).unwrap()), ..Default::default() }).unwrap();
    assert_eq!(user.voxel.unwrap().source[0], VoxelSource::User);
}

#[test]
fn sixteen_bit_stays_sixteen_bit() {
    let st = load(&fixture("tiff/u16_deflate.tif")).unwrap();
    assert!(matches!(st.samples, Samples::U16(_)));
    assert_eq!(st.bytes(), st.dims.iter().product::<usize>() * 2);
}

/// 2×2×2 binning on load equals numpy's block mean (rounded), and doubles the voxel size.
#[test]
fn binning_matches_numpy_block_mean() {
    let opts = LoadOptions { bin: 2, voxel: Some(VoxelSize::from_user_um(&[10.0]).unwrap()), ..Default::default() };
    let st = stack::load(&fixture("tiff/u16_bin_src.tif"), &opts).unwrap();
    assert_eq!(st.dims, [6, 5, 2]);
    let Samples::U16(v) = &st.samples else { panic!("type") };
    assert_eq!(v, &common::raw_u16("tiff/u16_bin_expected.raw"));
    assert!((st.voxel.unwrap().mm[0] - 0.02).abs() < 1e-12);
}

#[test]
fn slice_folder_in_natural_order() {
    let st = load(&fixture("slices")).unwrap();
    assert_eq!(st.dims, [9, 8, 12]);
    let Samples::U16(v) = &st.samples else { panic!("type") };
    assert_eq!(v, &common::raw_u16("slices_expected.raw"), "slice_2 must come before slice_10");
}

#[test]
fn natural_sort() {
    let mut names = vec!["slice_10.tif", "slice_2.tif", "slice_1.tif", "Slice_3.tif", "slice_002a.tif", "a", "a0"];
    names.sort_by(|a, b| natural_cmp(a, b));
    assert_eq!(names, vec!["a", "a0", "slice_1.tif", "slice_2.tif", "slice_002a.tif", "Slice_3.tif", "slice_10.tif"]);
}

#[test]
fn png_slices_and_rgb_become_grey() {
    let dir = tempfile::tempdir().unwrap();
    for k in 0..3u8 {
        let f = std::fs::File::create(dir.path().join(format!("s{k}.png"))).unwrap();
        let mut enc = png::Encoder::new(std::io::BufWriter::new(f), 4, 2);
        enc.set_color(png::ColorType::Rgb);
        enc.set_depth(png::BitDepth::Eight);
        let mut w = enc.write_header().unwrap();
        let px: Vec<u8> = (0..8).flat_map(|i| [10 * k + i, 100, 200]).collect();
        w.write_image_data(&px).unwrap();
    }
    let st = load(dir.path()).unwrap();
    assert_eq!(st.dims, [4, 2, 3]);
    assert!(!st.warnings.is_empty(), "colour slices warn");
    // BT.601: 0.299 r + 0.587 g + 0.114 b
    let want = (0.299f32 * 20.0 + 0.587 * 100.0 + 0.114 * 200.0).round();
    assert_eq!(st.samples.get(st.index(0, 0, 2)), want);
}

fn err_of(p: &Path) -> String {
    match load(p) {
        Ok(_) => panic!("{} should not load", p.display()),
        Err(e) => e.to_string(),
    }
}

#[test]
fn bad_inputs_give_one_line_errors() {
    let dir = tempfile::tempdir().unwrap();
    // truncated file: names the file and the page
    let bytes = std::fs::read(fixture("tiff/u16_deflate.tif")).unwrap();
    let trunc = dir.path().join("trunc.tif");
    std::fs::write(&trunc, &bytes[..bytes.len() * 2 / 3]).unwrap();
    let e = err_of(&trunc);
    assert!(e.contains("trunc.tif") && !e.contains('\n'), "{e}");
    // a Deflate strip garbled inside (written by the fixture script): names the file and page
    let e = err_of(&fixture("tiff/u16_deflate_corrupt.tif"));
    assert!(e.contains("u16_deflate_corrupt.tif") && e.contains("page 1") && !e.contains('\n'), "{e}");
    // not a TIFF at all
    let junk = dir.path().join("junk.tif");
    std::fs::write(&junk, b"this is not an image").unwrap();
    assert!(err_of(&junk).contains("junk.tif"));
    // layouts that would read wrong values, and compressions not decoded here, are refused by
    // name (files written by tifffile + imagecodecs)
    for (f, words) in [("refuse_miniswhite", "min-is-white"), ("refuse_lzma", "compression LZMA")] {
        let e = err_of(&fixture(&format!("tiff/{f}.tif")));
        assert!(e.contains(words) && e.contains(f) && e.contains("page 0") && !e.contains('\n'), "{e}");
    }
    // bit-reversed bytes (FillOrder 2) are read for grey strips (fixtures above, checked against
    // tifffile + imagecodecs); other FillOrder 2 layouts are refused by name (tifffile will not
    // write the tag; the tiff crate's encoder does)
    let fill = dir.path().join("fill2.tif");
    {
        use tiff::encoder::{TiffEncoder, colortype};
        let mut enc = TiffEncoder::new(std::fs::File::create(&fill).unwrap()).unwrap();
        let mut img = enc.new_image::<colortype::RGB8>(3, 2).unwrap();
        img.encoder().write_tag(tiff::tags::Tag::FillOrder, 2u16).unwrap();
        img.write_data(&[1u8; 18]).unwrap();
    }
    let e = err_of(&fill);
    assert!(e.contains("FillOrder 2") && e.contains("fill2.tif") && !e.contains('\n'), "{e}");
    // empty folder
    let empty = dir.path().join("empty");
    std::fs::create_dir(&empty).unwrap();
    assert!(err_of(&empty).contains("no TIFF or PNG slices"));
    // missing file
    assert!(err_of(&dir.path().join("nope.tif")).contains("nope.tif"));
    // mixed slice sizes
    let mixed = dir.path().join("mixed");
    std::fs::create_dir(&mixed).unwrap();
    for (k, n) in [(1, 5usize), (2, 5), (3, 6)] {
        let st = stack::Stack::from_samples([n, 4, 1], Samples::U8(vec![7; n * 4].into()), None).unwrap();
        stack::write::write_tiff(&st, &mixed.join(format!("s_{k}.tif")), stack::write::Packing::None, false).unwrap();
    }
    let e = err_of(&mixed);
    assert!(e.contains("s_3.tif") && e.contains("differs"), "{e}");
    // mixed sample types across the pages of one file: a u8 page, then a u16 page
    let mixed_type = dir.path().join("mixed_type.tif");
    {
        use tiff::encoder::{TiffEncoder, colortype};
        let mut enc = TiffEncoder::new(std::fs::File::create(&mixed_type).unwrap()).unwrap();
        enc.write_image::<colortype::Gray8>(3, 2, &[1u8; 6]).unwrap();
        enc.write_image::<colortype::Gray16>(3, 2, &[1u16; 6]).unwrap();
    }
    let e = err_of(&mixed_type);
    assert!(e.contains("page 1") && e.contains("differs"), "{e}");
    // zero and negative voxel sizes
    for bad in [[0.0], [-3.0]] {
        assert!(VoxelSize::from_user_um(&bad).unwrap_err().to_string().contains("positive"));
    }
    // over the memory cap: refused before allocating, with the size and a hint
    let e = stack::load(&fixture("tiff/u16_lzw.tif"), &LoadOptions { max_bytes: Some(1000), ..Default::default() }).unwrap_err().to_string();
    assert!(e.contains("GB") && e.contains("bin"), "{e}");
}

/// Our OME-TIFF writer round-trips through our reader (used by the phantom).
#[test]
fn writer_round_trip_with_ome_sizes() {
    let dir = tempfile::tempdir().unwrap();
    let v = VoxelSize::from_user_um(&[11.0, 12.0, 13.5]).unwrap();
    let data: Vec<u16> = (0..(7 * 5 * 3)).map(|i| (i * 613 % 65535) as u16).collect();
    let st = stack::Stack::from_samples([7, 5, 3], Samples::U16(data.clone().into()), Some(v)).unwrap();
    for (packing, big) in [(stack::write::Packing::None, false), (stack::write::Packing::Deflate, true), (stack::write::Packing::Lzw, false)] {
        let p = dir.path().join("rt.tif");
        stack::write::write_tiff(&st, &p, packing, big).unwrap();
        let back = load(&p).unwrap();
        assert_eq!(back.dims, [7, 5, 3]);
        let Samples::U16(b) = back.samples else { panic!() };
        assert_eq!(b, data);
        let mm = back.voxel.unwrap().mm;
        assert!((mm[2] - 0.0135).abs() < 1e-12 && (mm[1] - 0.012).abs() < 1e-12);
    }
}

/// Which fixtures are memory-mapped (pages back to back, uncompressed), and mapped values equal
/// the copied ones.
#[test]
fn memory_mapped_equals_copied() {
    let mut mapped = 0;
    for name in ["u8_plain", "u16_bigtiff", "f32_plain", "u16_ome", "u16_deflate", "u16_tiled"] {
        let p = fixture(&format!("tiff/{name}.tif"));
        let m = stack::load(&p, &LoadOptions::default()).unwrap();
        let c = stack::load(&p, &LoadOptions { map: false, ..Default::default() }).unwrap();
        assert!(!c.samples.is_mapped());
        mapped += m.samples.is_mapped() as usize;
        assert_eq!(m.dims, c.dims);
        for i in (0..c.samples.len()).step_by(7) {
            assert_eq!(m.samples.get(i).to_bits(), c.samples.get(i).to_bits(), "{name} at {i}");
        }
        if name.contains("deflate") || name.contains("tiled") {
            assert!(!m.samples.is_mapped(), "{name}: compressed or tiled pages are never mapped");
        }
    }
    assert!(mapped >= 2, "tifffile writes uncompressed pages back to back: {mapped} mapped");
}

/// A crop keeps the stack's coordinates: each cropped voxel has the value and the millimetre
/// position of the same voxel in the whole stack.
#[test]
fn crop_keeps_values_and_coordinates() {
    let v = Some(VoxelSize::from_user_um(&[10.0, 12.0, 15.0]).unwrap());
    let p = fixture("tiff/u16_lzw.tif");
    let full = stack::load(&p, &LoadOptions { voxel: v.clone(), ..Default::default() }).unwrap();
    let crop = [[5, 30], [3, 20], [1, 4]];
    let c = stack::load(&p, &LoadOptions { voxel: v, crop: Some(crop), ..Default::default() }).unwrap();
    assert_eq!(c.dims, [25, 17, 3]);
    for (i, j, k) in [(0, 0, 0), (24, 16, 2), (7, 3, 1)] {
        let (fi, fj, fk) = (i + crop[0][0], j + crop[1][0], k + crop[2][0]);
        assert_eq!(c.samples.get(c.index(i, j, k)), full.samples.get(full.index(fi, fj, fk)));
        let (a, b) = (c.to_mm([i as f64, j as f64, k as f64]), full.to_mm([fi as f64, fj as f64, fk as f64]));
        assert!((0..3).all(|x| (a[x] - b[x]).abs() < 1e-12), "{a:?} vs {b:?}");
    }
    let q = full.to_mm([12.3, 9.7, 2.2]);
    assert!((c.sample_mm(q) - full.sample_mm(q)).abs() < 1e-3);
    assert!(!c.contains_mm(full.to_mm([1.0, 1.0, 1.0])));
    let e = stack::load(&p, &LoadOptions { crop: Some([[0, 99], [0, 5], [0, 1]]), ..Default::default() }).unwrap_err();
    assert!(e.to_string().contains("crop"), "{e}");
}

/// Binning 2 and 4 averages blocks of the whole stack and puts each binned voxel at the centre of
/// its block, in the whole stack's millimetres; a crop and a bin combine.
#[test]
fn binning_keeps_coordinates() {
    let v = Some(VoxelSize::from_user_um(&[10.0]).unwrap());
    let p = fixture("tiff/u16_tiled.tif"); // 50 × 40 × 3
    let full = stack::load(&p, &LoadOptions { voxel: v.clone(), ..Default::default() }).unwrap();
    for (b, crop) in [(2usize, None), (4, None), (2, Some([[6usize, 30usize], [4, 36], [1, 3]]))] {
        let st = stack::load(&p, &LoadOptions { voxel: v.clone(), bin: b, crop, ..Default::default() }).unwrap();
        let c0 = crop.map(|c| c.map(|r| r[0])).unwrap_or([0; 3]);
        for (i, j, k) in [(0usize, 0usize, 0usize), (3, 2, 0)] {
            if i >= st.dims[0] || j >= st.dims[1] || k >= st.dims[2] {
                continue;
            }
            // the block's mean and centre in the whole stack
            let (mut sum, mut n, mut centre) = (0.0f64, 0.0, [0.0f64; 3]);
            for dk in 0..b {
                let fk = c0[2] + b * k + dk;
                if fk >= full.dims[2] || crop.is_some_and(|c| fk >= c[2][1]) {
                    continue;
                }
                for dj in 0..b {
                    for di in 0..b {
                        let f = [c0[0] + b * i + di, c0[1] + b * j + dj, fk];
                        sum += full.samples.get(full.index(f[0], f[1], f[2])) as f64;
                        n += 1.0;
                        let m = full.to_mm(f.map(|x| x as f64));
                        centre = [centre[0] + m[0], centre[1] + m[1], centre[2] + m[2]];
                    }
                }
            }
            let got = st.samples.get(st.index(i, j, k)) as f64;
            assert!((got - (sum / n).round()).abs() <= 0.5, "bin {b}: {got} vs {}", sum / n);
            let at = st.to_mm([i as f64, j as f64, k as f64]);
            if n as usize == b * b * b {
                for a in 0..3 {
                    assert!((at[a] - centre[a] / n).abs() < 1e-12, "bin {b}: centre {at:?} vs {:?}", centre.map(|c| c / n));
                }
            }
        }
    }
}

/// NIfTI-1 and NIfTI-2 files written by nibabel (tests/fixtures/make_fixtures.py): values equal
/// nibabel's scaled data (`get_fdata`, scl_slope/scl_inter applied), voxel sizes its zooms, and
/// the kept world transform its affine (sform, or the qform's quaternion).
#[test]
fn reads_nifti_like_nibabel() {
    let manifest: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(fixture("manifest.json")).unwrap()).unwrap();
    let files = manifest["nifti"].as_array().unwrap();
    assert!(files.len() >= 4);
    for f in files {
        matches_reference("nifti", f, "zooms", "RAS", 1e-5);
    }
    // scaled int16 is held as float32 and said so
    let ct = load(&fixture("nifti/ct_int16_scaled.nii.gz")).unwrap();
    assert_eq!(ct.samples.type_name(), "float32");
    assert!(ct.warnings.iter().any(|w| w.contains("scl_slope")), "{:?}", ct.warnings);
    // plain uint8 stays uint8
    assert_eq!(load(&fixture("nifti/u8_plain.nii")).unwrap().samples.type_name(), "uint8");
    // a truncated file names itself and what is wrong
    let dir = tempfile::tempdir().unwrap();
    let bytes = std::fs::read(fixture("nifti/u8_plain.nii")).unwrap();
    let cut = dir.path().join("cut.nii");
    std::fs::write(&cut, &bytes[..bytes.len() - 10]).unwrap();
    let e = load(&cut).unwrap_err().to_string();
    assert!(e.contains("cut.nii") && e.contains("truncated") && !e.contains('\n'), "{e}");
    // a sample offset far past any file (NIfTI-1 vox_offset, a float at byte 108) is an error,
    // not an overflow
    let mut far = bytes.clone();
    far[108..112].copy_from_slice(&1e30f32.to_le_bytes());
    let far_path = dir.path().join("far.nii");
    std::fs::write(&far_path, &far).unwrap();
    let e = load(&far_path).unwrap_err().to_string();
    assert!(e.contains("far.nii") && e.contains("truncated"), "{e}");
    let junk = dir.path().join("junk.nii");
    std::fs::write(&junk, vec![7u8; 400]).unwrap();
    let e = load(&junk).unwrap_err().to_string();
    assert!(e.contains("junk.nii") && e.contains("not a NIfTI"), "{e}");
}

/// NRRD written by pynrrd (gzip, big-endian raw, detached header) and MetaImage written by
/// SimpleITK (plain, zlib-compressed, detached data): the values each library reads back, its
/// spacing, and its index-to-world transform (LPS). Fixtures: tests/fixtures/make_fixtures.py.
#[test]
fn reads_nrrd_like_pynrrd_and_metaimage_like_simpleitk() {
    let manifest: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(fixture("manifest.json")).unwrap()).unwrap();
    let files = manifest["volumes"].as_array().unwrap();
    assert!(files.len() >= 6);
    for f in files {
        matches_reference("volumes", f, "spacing", f["frame"].as_str().unwrap(), 1e-9);
    }
    // the header alone (inspect) agrees with the load
    let h = ductline::stack::header(&fixture("volumes/ct_int16.mha")).unwrap();
    assert_eq!((h.dims, h.sample), ([10, 9, 6], "float32"));
    // bad input: one line naming the file and what is wrong
    let dir = tempfile::tempdir().unwrap();
    let bytes = std::fs::read(fixture("volumes/ct_int16.mha")).unwrap();
    let cut = dir.path().join("cut.mha");
    std::fs::write(&cut, &bytes[..bytes.len() - 10]).unwrap();
    let e = load(&cut).unwrap_err().to_string();
    assert!(e.contains("cut.mha") && e.contains("truncated") && !e.contains('\n'), "{e}");
    let gz = std::fs::read(fixture("volumes/ct_int16_gzip.nrrd")).unwrap();
    let cut = dir.path().join("cut.nrrd");
    std::fs::write(&cut, &gz[..gz.len() - 30]).unwrap();
    let e = load(&cut).unwrap_err().to_string();
    assert!(e.contains("cut.nrrd") && (e.contains("truncated") || e.contains("corrupt")) && !e.contains('\n'), "{e}");
    let vec = dir.path().join("vector.nrrd");
    std::fs::write(&vec, "NRRD0004\ntype: float\ndimension: 4\nsizes: 3 4 5 6\nencoding: raw\n\n").unwrap();
    let e = load(&vec).unwrap_err().to_string();
    assert!(e.contains("vector.nrrd") && e.contains("grey"), "{e}");
    let junk = dir.path().join("junk.mhd");
    std::fs::write(&junk, "this is not a header\n").unwrap();
    let e = load(&junk).unwrap_err().to_string();
    assert!(e.contains("junk.mhd") && e.contains("MetaImage"), "{e}");
}

/// DICOM written by pydicom: a series of single-frame CT files (signed 16-bit, rescale slope and
/// intercept, oblique orientation, file names and instance numbers out of slice order) beside a
/// smaller second series, and one enhanced multi-frame file with its frames stored in reverse;
/// the series and the enhanced file again RLE Lossless (pydicom's encoder), and a series JPEG
/// Lossless (imagecodecs' ljpeg encoder, unsigned 12-bit): the values pydicom (imagecodecs for
/// JPEG) reads back rescaled, sorted by position along the slice normal; the spacing; the
/// index-to-world transform (LPS) from the image plane attributes. Fixtures:
/// tests/fixtures/make_fixtures.py.
#[test]
fn reads_dicom_like_pydicom() {
    let manifest: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(fixture("manifest.json")).unwrap()).unwrap();
    let files = manifest["dicom"].as_array().unwrap();
    let names: Vec<&str> = files.iter().map(|f| f["name"].as_str().unwrap()).collect();
    assert_eq!(names, ["series", "enhanced.dcm", "series_rle", "series_jpeg_lossless", "enhanced_rle.dcm"]);
    for f in files {
        matches_reference("dicom", f, "spacing", "LPS", 1e-9);
    }
    // the larger series is read, and the note says another was left
    let st = load(&fixture("dicom/series")).unwrap();
    assert!(st.warnings.iter().any(|w| w.contains("2 series") && w.contains("(2 slices)")), "{:?}", st.warnings);
    assert_eq!(st.samples.type_name(), "float32");
    let h = ductline::stack::header(&fixture("dicom/series")).unwrap();
    assert_eq!((h.dims, h.sample), ([10, 9, 7], "float32"));
    // bad input: one line naming the file and what is wrong
    let e = load(&fixture("dicom/refuse_j2k.dcm")).unwrap_err().to_string();
    assert!(e.contains("refuse_j2k.dcm") && e.contains("1.2.840.10008.1.2.4.90") && e.contains("not supported") && !e.contains('\n'), "{e}");
    let dir = tempfile::tempdir().unwrap();
    let one = std::fs::read(fixture("dicom/series/IMG003.dcm")).unwrap();
    std::fs::write(dir.path().join("a.dcm"), &one).unwrap();
    std::fs::write(dir.path().join("b.dcm"), &one).unwrap();
    let e = load(dir.path()).unwrap_err().to_string();
    assert!(e.contains("same position") && !e.contains('\n'), "{e}");
    let cut = dir.path().join("cut");
    std::fs::create_dir(&cut).unwrap();
    std::fs::write(cut.join("x.dcm"), &one[..one.len() - 40]).unwrap();
    let e = load(&cut).unwrap_err().to_string();
    assert!(e.contains("x.dcm") && !e.contains('\n'), "{e}");
}

/// Real scans: the small CT (uncompressed) and the RLE-compressed MR that pydicom ships among its
/// test files (NEMA sample images, downsized), copied by the fixture script when the installed
/// package carries them: every value as pydicom reads it, rescaled, and the pixel spacing.
#[test]
fn reads_pydicoms_real_scans_like_pydicom() {
    let manifest: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(fixture("manifest.json")).unwrap()).unwrap();
    let files = manifest["dicom_real"].as_array().unwrap();
    assert!(!files.is_empty(), "the fixture script found no real DICOM scan in the pydicom package");
    for f in files {
        let (name, st) = (f["name"].as_str().unwrap(), same_values("dicom", f));
        let ps: Vec<f64> = f["pixel_spacing"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect();
        let vox = st.voxel.unwrap();
        assert!((vox.mm[0] - ps[1]).abs() < 1e-9 && (vox.mm[1] - ps[0]).abs() < 1e-9, "{name}: {:?} vs {ps:?}", vox.mm);
    }
}

/// `--landmarks-frame world`: a point the reference library's affine puts at index (i, j, k)
/// comes back to the stack-frame point (i·vx, j·vy, k·vz) through `World::to_stack`.
fn world_points_come_home(name: &str, affine: &serde_json::Value, world: &stack::World, vox: [f64; 3]) {
    let a: Vec<Vec<f64>> = affine.as_array().unwrap().iter().map(|r| r.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()).collect();
    for idx in [[0.0, 0.0, 0.0], [3.0, 1.5, 2.0], [7.25, 5.0, 0.5]] {
        let p: [f64; 3] = std::array::from_fn(|r| a[r][0] * idx[0] + a[r][1] * idx[1] + a[r][2] * idx[2] + a[r][3]);
        let q = world.to_stack(p, vox).unwrap();
        for k in 0..3 {
            assert!((q[k] - idx[k] * vox[k]).abs() < 1e-6, "{name}: index {idx:?} came back as {q:?}");
        }
    }
}

/// The fixture of manifest entry `f` under `dir`, loaded: its shape and every sample (to 1e-6
/// relative) as the writing library reads them back (`NAME.expected.raw`, float64).
fn same_values(dir: &str, f: &serde_json::Value) -> stack::Stack {
    let name = f["name"].as_str().unwrap();
    let st = load(&fixture(&format!("{dir}/{name}"))).unwrap_or_else(|e| panic!("{name}: {e}"));
    let shape: Vec<usize> = f["shape"].as_array().unwrap().iter().map(|x| x.as_u64().unwrap() as usize).collect();
    assert_eq!(st.dims.to_vec(), shape, "{name}: dims");
    let raw = std::fs::read(fixture(&format!("{dir}/{name}.expected.raw"))).unwrap();
    let want: Vec<f64> = raw.chunks_exact(8).map(|c| f64::from_le_bytes(c.try_into().unwrap())).collect();
    assert_eq!(want.len(), st.samples.len(), "{name}");
    for (i, w) in want.iter().enumerate() {
        let got = st.samples.get(i) as f64;
        assert!((got - w).abs() <= 1e-6 * w.abs().max(1.0), "{name}: sample {i}: {got} vs {w}");
    }
    st
}

/// A volume fixture read as its writing library reads it back (manifest entry `f` under `dir`):
/// shape, every sample, voxel sizes (manifest key `sizes`) and the world transform in `frame`,
/// to `tol`; and world points come home through `World::to_stack`.
fn matches_reference(dir: &str, f: &serde_json::Value, sizes: &str, frame: &str, tol: f64) {
    let (name, st) = (f["name"].as_str().unwrap(), same_values(dir, f));
    let size: Vec<f64> = f[sizes].as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect();
    let vox = st.voxel.as_ref().unwrap_or_else(|| panic!("{name}: no voxel size"));
    for a in 0..3 {
        assert!((vox.mm[a] - size[a]).abs() < tol, "{name}: voxel {:?} vs {size:?}", vox.mm);
    }
    let world = st.world.as_ref().unwrap_or_else(|| panic!("{name}: no world transform"));
    assert_eq!(world.frame, frame, "{name}");
    for (r, row) in f["affine"].as_array().unwrap().iter().enumerate() {
        for (c, x) in row.as_array().unwrap().iter().enumerate() {
            let x = x.as_f64().unwrap();
            assert!((world.matrix[r][c] - x).abs() < tol, "{name}: world [{r}][{c}] {} vs {x}", world.matrix[r][c]);
        }
    }
    world_points_come_home(name, &f["affine"], world, vox.mm);
}
