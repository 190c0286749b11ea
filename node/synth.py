"""The synthetic phantom as a DICOM saturation series (the demo scanner's convention).

One classic MR Image Storage instance per (slice, saturation offset). The convention is ours
and documented in the README and DEVELOPERS.md:

* the saturation offset in ppm sits in a private element: creator ``CESTNODE SIM 1`` in group
  0x0029, element byte 0x10 (tag ``(0029,xx10)``), VR DS;
* the unsaturated reference M0 has the offset ``-300`` ppm (|offset| >= 20 ppm means M0);
* ``ImageComments`` repeats the offset for humans;
* ``InstanceNumber`` and ``AcquisitionNumber`` follow acquisition order, which is not offset
  order, so a node that orders by instance number gets it wrong.

Everything here is invented: the patient is a phantom, the site does not exist.
"""

from __future__ import annotations

import datetime as _dt
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from pydicom import Dataset
from pydicom.dataset import FileMetaDataset
from pydicom.uid import UID, ExplicitVRLittleEndian, MRImageStorage

from node import __version__
from node.types import uid_from

PRIVATE_GROUP = 0x0029
PRIVATE_CREATOR = "CESTNODE SIM 1"
OFFSET_ELEMENT = 0x10
M0_OFFSET_PPM = -300.0
SERIES_DESCRIPTION = "CEST APT phantom"
PROTOCOL_NAME = "cest_apt_3T"
GAMMA_MHZ_PER_T = 42.577478  # CODATA 2018 proton gyromagnetic ratio / 2 pi

def series_from_arrays(
    signal: np.ndarray,
    offsets_ppm: Sequence[float] | np.ndarray,
    *,
    pixel_spacing_mm: float = 1.8,
    slice_thickness_mm: float = 5.0,
    field_t: float = 3.0,
    b1_ut: float = 1.0,
    tsat_s: float = 2.0,
    scale: float | None = None,
    seed: str = "phantom-0",
    patient_name: str = "PHANTOM^CEST",
    patient_id: str = "CESTPH-0001",
    patient_birth_date: str = "19700101",
    accession_number: str = "SIMACC0001",
    series_description: str = SERIES_DESCRIPTION,
    protocol_name: str = PROTOCOL_NAME,
    study_uid: str | None = None,
    series_uid: str | None = None,
    series_number: int = 901,
) -> list[Dataset]:
    """Build one MR Image Storage dataset per (slice, offset).

    Parameters
    ----------
    signal
        Magnitude images ``(slices, rows, cols, n_offsets)``, M0 frames included, in
        acquisition order along the last axis (any units; multiplied by ``scale`` and
        stored as uint16).
    scale
        Factor to stored values; default: the brightest voxel maps to 30,000 (room below the
        uint16 ceiling so that nothing clips).
    offsets_ppm
        Saturation offset of each frame, in acquisition order.

    Returns
    -------
    list of Dataset
        In acquisition order: offset by offset, and within an offset slice by slice.
    """
    signal = np.asarray(signal)
    if signal.ndim != 4:
        raise ValueError(f"signal must be (slices, rows, cols, n_offsets), got shape {signal.shape}")
    offsets = np.asarray(offsets_ppm, dtype=np.float64)
    if offsets.shape != (signal.shape[-1],):
        raise ValueError(
            f"offsets_ppm has {offsets.size} values but signal has {signal.shape[-1]} frames"
        )
    n_slices, rows, cols, n_off = signal.shape
    study_uid = study_uid or uid_from(seed, "study")
    series_uid = series_uid or uid_from(seed, "series")
    frame_uid = uid_from(seed, "frame-of-reference")
    if scale is None:
        peak = float(np.nanmax(signal)) if signal.size else 0.0
        scale = 30000.0 / peak if peak > 0 else 1.0
    pixels = np.clip(np.rint(np.nan_to_num(signal * scale, nan=0.0)), 0, 65535).astype(np.uint16)
    now = _dt.datetime(2026, 1, 15, 9, 30, 0)
    freq_mhz = GAMMA_MHZ_PER_T * field_t
    out: list[Dataset] = []
    instance = 0
    for k in range(n_off):
        for s in range(n_slices):
            instance += 1
            ds = Dataset()
            sop_uid = UID(uid_from(seed, "instance", k, s))
            ds.file_meta = FileMetaDataset()
            ds.file_meta.MediaStorageSOPClassUID = MRImageStorage
            ds.file_meta.MediaStorageSOPInstanceUID = sop_uid
            ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
            ds.SpecificCharacterSet = "ISO_IR 100"
            ds.ImageType = ["ORIGINAL", "PRIMARY", "OTHER"]
            ds.SOPClassUID = MRImageStorage
            ds.SOPInstanceUID = sop_uid
            ds.StudyDate = now.strftime("%Y%m%d")
            ds.SeriesDate = ds.StudyDate
            ds.AcquisitionDate = ds.StudyDate
            ds.ContentDate = ds.StudyDate
            ds.StudyTime = now.strftime("%H%M%S")
            ds.SeriesTime = ds.StudyTime
            ds.AcquisitionTime = (now + _dt.timedelta(seconds=4 * k)).strftime("%H%M%S")
            ds.ContentTime = ds.AcquisitionTime
            ds.AccessionNumber = accession_number
            ds.Modality = "MR"
            ds.Manufacturer = "cest-node phantom scanner"
            ds.InstitutionName = "Synthetic Phantom Lab"
            ds.ReferringPhysicianName = ""
            ds.StationName = "PHANTOM01"
            ds.StudyDescription = "CEST phantom study"
            ds.SeriesDescription = series_description
            ds.ManufacturerModelName = "virtual"
            ds.SoftwareVersions = f"cest-node {__version__}"
            ds.PatientName = patient_name
            ds.PatientID = patient_id
            ds.PatientBirthDate = patient_birth_date
            ds.PatientSex = "O"
            ds.BodyPartExamined = "BRAIN"
            ds.ScanningSequence = "GR"
            ds.SequenceVariant = "SP"
            ds.ScanOptions = ""
            ds.MRAcquisitionType = "2D"
            ds.SliceThickness = f"{slice_thickness_mm:g}"
            ds.RepetitionTime = "5000"
            ds.EchoTime = "3"
            ds.EchoTrainLength = "1"
            ds.ImagingFrequency = f"{freq_mhz:.6f}"
            ds.ImagedNucleus = "1H"
            ds.MagneticFieldStrength = f"{field_t:g}"
            ds.ProtocolName = protocol_name
            ds.PatientPosition = "HFS"
            ds.StudyInstanceUID = study_uid
            ds.SeriesInstanceUID = series_uid
            ds.StudyID = "1"
            ds.SeriesNumber = series_number
            ds.AcquisitionNumber = k + 1
            ds.InstanceNumber = instance
            # every frame of the series belongs to one acquisition: lets a node see completion
            ds.ImagesInAcquisition = n_off * n_slices
            z = (s - (n_slices - 1) / 2.0) * slice_thickness_mm
            ds.ImagePositionPatient = [
                f"{-cols * pixel_spacing_mm / 2:.3f}",
                f"{-rows * pixel_spacing_mm / 2:.3f}",
                f"{z:.3f}",
            ]
            ds.ImageOrientationPatient = ["1", "0", "0", "0", "1", "0"]
            ds.FrameOfReferenceUID = frame_uid
            ds.PositionReferenceIndicator = ""
            ds.SliceLocation = f"{z:.3f}"
            ds.ImageComments = f"sat offset {offsets[k]:+.3f} ppm; B1 {b1_ut:g} uT; tsat {tsat_s:g} s"
            ds.SamplesPerPixel = 1
            ds.PhotometricInterpretation = "MONOCHROME2"
            ds.Rows = rows
            ds.Columns = cols
            ds.PixelSpacing = [f"{pixel_spacing_mm:g}", f"{pixel_spacing_mm:g}"]
            ds.BitsAllocated = 16
            ds.BitsStored = 16
            ds.HighBit = 15
            ds.PixelRepresentation = 0
            block = ds.private_block(PRIVATE_GROUP, PRIVATE_CREATOR, create=True)
            block.add_new(OFFSET_ELEMENT, "DS", f"{offsets[k]:.4f}")
            ds.PixelData = np.ascontiguousarray(pixels[s, :, :, k]).tobytes()
            out.append(ds)
    return out


def phantom_series(
    *,
    slices: int = 4,
    size: int = 64,
    seed: int = 0,
    snr: float | None = None,
    **kwargs: object,
) -> list[Dataset]:
    """The quant phantom (:func:`quant.phantom.make_phantom`) as a DICOM series.

    Extra keyword arguments go to :func:`series_from_arrays` (patient attributes, UIDs).
    """
    from quant.phantom import make_phantom

    opts: dict[str, object] = {"slices": slices, "size": size, "seed": seed}
    if snr is not None:
        opts["snr"] = snr
    ph = make_phantom(**opts)  # type: ignore[arg-type]
    kwargs.setdefault("seed", f"phantom-{seed}-{slices}-{size}")
    kwargs.setdefault("field_t", getattr(ph, "field_t", 3.0))
    return series_from_arrays(ph.signal, ph.offsets_ppm, **kwargs)  # type: ignore[arg-type]


def write_series(datasets: Sequence[Dataset], out_dir: str | Path) -> list[Path]:
    """Write datasets as DICOM files (PS3.10) into ``out_dir``; returns the paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = []
    for i, ds in enumerate(datasets):
        path = out / f"IM{i + 1:05d}.dcm"
        ds.save_as(path, enforce_file_format=True)
        paths.append(path)
    return paths
