"""Scanner files for the load benchmark, and the Python reference timings on them.

Writes (once) a 512 × 512 × 500 int16 CT-like volume as a DICOM series (pydicom: one
uncompressed file a slice, rescale slope 1 and intercept −1024, file names shuffled) and as a
gzipped NIfTI-1 (nibabel, int16 with scl_slope / scl_inter), then times, best of 3:
pydicom reading every file, sorting by position along the slice normal, rescaling and stacking
with numpy (float32, as ductline holds it); nibabel loading the .nii.gz to float32.

    python3 bench/scanner_load.py /tmp/sl
    cargo run --release --example bench_load -- /tmp/sl/dicom
    cargo run --release --example bench_load -- /tmp/sl/ct.nii.gz

Each tool's peak RSS is its own process's (run the Rust side separately, as above).
"""
import pathlib
import resource
import sys
import time

import nibabel as nib
import numpy as np
import pydicom
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.pixels import apply_rescale
from pydicom.uid import CTImageStorage, ExplicitVRLittleEndian, generate_uid

out = pathlib.Path(sys.argv[1])
nx, ny, nz = 512, 512, 500
dcm = out / "dicom"
nii = out / "ct.nii.gz"
if not (dcm.exists() and nii.exists()):
    dcm.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(5)
    y, x = np.mgrid[0:ny, 0:nx]
    r = np.hypot(x - nx / 2, y - ny / 2)
    series = generate_uid()
    vol = np.empty((nz, ny, nx), np.int16)
    for k in range(nz):
        sl = np.where(r < 200 + 20 * np.sin(k / 40), 2024, 1024) + rng.normal(0, 30, (ny, nx))
        vol[k] = sl.astype(np.int16)
        meta = FileMetaDataset()
        meta.MediaStorageSOPClassUID, meta.MediaStorageSOPInstanceUID = CTImageStorage, generate_uid()
        meta.TransferSyntaxUID = ExplicitVRLittleEndian
        ds = Dataset()
        ds.file_meta = meta
        ds.SOPClassUID, ds.SOPInstanceUID, ds.SeriesInstanceUID, ds.Modality = CTImageStorage, meta.MediaStorageSOPInstanceUID, series, "CT"
        ds.Rows, ds.Columns, ds.SamplesPerPixel, ds.PhotometricInterpretation = ny, nx, 1, "MONOCHROME2"
        ds.BitsAllocated, ds.BitsStored, ds.HighBit, ds.PixelRepresentation = 16, 16, 15, 1
        ds.ImageOrientationPatient, ds.ImagePositionPatient = [1, 0, 0, 0, 1, 0], [0.0, 0.0, 0.2 * k]
        ds.PixelSpacing, ds.SliceThickness = [0.2, 0.2], 0.2
        ds.RescaleSlope, ds.RescaleIntercept = 1, -1024
        ds.PixelData = vol[k].tobytes()
        ds.save_as(dcm / f"{(k * 7919) % 100003:06d}.dcm", enforce_file_format=True)
    img = nib.Nifti1Image(np.transpose(vol, (2, 1, 0)), np.diag([0.2, 0.2, 0.2, 1]))
    img.header.set_slope_inter(1.0, -1024.0)
    nib.save(img, nii)


def best_of_3(f):
    best = float("inf")
    for _ in range(3):
        t = time.perf_counter()
        a = f()
        best = min(best, time.perf_counter() - t)
        shape = a.shape
        del a
    return best, shape


def pydicom_stack():
    sl = [pydicom.dcmread(f) for f in dcm.glob("*.dcm")]
    n = np.cross(np.array(sl[0].ImageOrientationPatient[:3], float), np.array(sl[0].ImageOrientationPatient[3:], float))
    sl.sort(key=lambda d: float(np.dot(np.array(d.ImagePositionPatient, float), n)))
    return np.stack([apply_rescale(d.pixel_array, d).astype(np.float32) for d in sl])


which = sys.argv[2] if len(sys.argv) > 2 else "both"
if which in ("both", "dicom"):
    t, shape = best_of_3(pydicom_stack)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(f"pydicom {pydicom.__version__} + numpy {dcm} {shape}: best of 3 {t:.3f} s, peak RSS {peak / 1e6:.1f} MB")
if which in ("both", "nifti"):
    t, shape = best_of_3(lambda: nib.load(nii).get_fdata(dtype=np.float32))
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(f"nibabel {nib.__version__} {nii} {shape}: best of 3 {t:.3f} s, peak RSS {peak / 1e6:.1f} MB")
