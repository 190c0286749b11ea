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
from typing import Any

import numpy as np
from pydicom import Dataset
from pydicom.dataset import FileMetaDataset
from pydicom.uid import UID, EnhancedMRImageStorage, ExplicitVRLittleEndian, MRImageStorage

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
    frame_of_reference_uid: str | None = None,
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
    frame_of_reference_uid
        Default: derived from ``seed`` (give the saturation series' one to a companion
        series of another seed).

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
    frame_uid = frame_of_reference_uid or uid_from(seed, "frame-of-reference")
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


# --------------------------------------------------------------------------- companions
def _same_study(seed: str, kwargs: dict[str, object]) -> dict[str, Any]:
    """UIDs that tie a companion series to the saturation series written with ``seed``."""
    return {"study_uid": uid_from(seed, "study"),
            "frame_of_reference_uid": uid_from(seed, "frame-of-reference"), **kwargs}


def _as_map(datasets: list[Dataset], comment: str, image_type: str) -> list[Dataset]:
    """Turn datasets of :func:`series_from_arrays` into a derived map series (no offset)."""
    for ds in datasets:
        del ds[ds.private_block(PRIVATE_GROUP, PRIVATE_CREATOR).get_tag(OFFSET_ELEMENT)]
        del ds[(PRIVATE_GROUP, 0x0010)]
        ds.ImageType = ["DERIVED", "PRIMARY", image_type]
        ds.ImageComments = comment
    return datasets


def _rwvm(unit: str, meaning: str, slope: float, top: int) -> Dataset:
    """A Real World Value Mapping item (PS3.3 C.7.6.16.2.11) in a UCUM unit."""
    code = Dataset()
    code.CodeValue = unit
    code.CodingSchemeDesignator = "UCUM"
    code.CodeMeaning = meaning
    item = Dataset()
    item.RealWorldValueFirstValueMapped = 0
    item.RealWorldValueLastValueMapped = top
    item.RealWorldValueSlope = slope
    item.RealWorldValueIntercept = 0.0
    item.LUTExplanation = meaning
    item.LUTLabel = unit
    item.MeasurementUnitsCodeSequence = [code]
    return item


def m0_series(m0: np.ndarray, *, seed: str, scale: float, **kwargs: object) -> list[Dataset]:
    """A separate unsaturated reference series ``(slices, rows, cols)`` of the study of
    ``seed`` (offset element -300 ppm, SeriesDescription ``CEST M0 phantom``).

    ``scale`` must be the saturation series' one: Z = S / M0 compares stored values.
    """
    kwargs.setdefault("series_description", "CEST M0 phantom")
    kwargs.setdefault("series_number", 902)
    return series_from_arrays(np.asarray(m0)[..., None], [M0_OFFSET_PPM], seed=f"{seed}-m0",
                              scale=scale, **_same_study(seed, kwargs))


def wassr_series(signal: np.ndarray, offsets_ppm: Sequence[float] | np.ndarray, *, seed: str,
                 **kwargs: object) -> list[Dataset]:
    """A WASSR series of the study of ``seed``: our offset convention, SeriesDescription
    ``WASSR phantom``. ``signal`` ``(slices, rows, cols, n)`` as from
    :func:`quant.phantom.make_phantom` at low saturation power."""
    kwargs.setdefault("series_description", "WASSR phantom")
    kwargs.setdefault("series_number", 903)
    return series_from_arrays(signal, offsets_ppm, seed=f"{seed}-wassr",
                              **_same_study(seed, kwargs))


def t1_map_series(t1_s: np.ndarray, *, seed: str, unit: str = "ms", rwvm: bool = True,
                  **kwargs: object) -> list[Dataset]:
    """A T1 map ``(slices, rows, cols)`` in seconds as an MR series of the study of ``seed``.

    Stored as whole milliseconds. With ``rwvm`` a Real World Value Mapping names the unit:
    slope 1 in UCUM ``ms`` (``unit="ms"``) or slope 0.001 in ``s`` (``unit="s"``); without
    it the reader must know the unit. NaN is stored as 0. SeriesDescription
    ``T1 map phantom``.
    """
    if unit not in ("ms", "s"):
        raise ValueError(f"unit must be 'ms' or 's', got {unit!r}")
    values = np.nan_to_num(np.asarray(t1_s, dtype=np.float64) * 1000.0, nan=0.0)
    kwargs.setdefault("series_description", "T1 map phantom")
    kwargs.setdefault("series_number", 904)
    out = series_from_arrays(values[..., None], [0.0], seed=f"{seed}-t1", scale=1.0,
                             **_same_study(seed, kwargs))
    _as_map(out, f"T1 map, stored in ms{'' if rwvm else ' (no mapping)'}", "T1 MAP")
    if rwvm:
        item = (_rwvm("ms", "millisecond", 1.0, 65535) if unit == "ms"
                else _rwvm("s", "second", 0.001, 65535))
        for ds in out:
            ds.RealWorldValueMappingSequence = [item]
    return out


def b1_map_series(b1_rel: np.ndarray, *, seed: str, rwvm: bool = True,
                  **kwargs: object) -> list[Dataset]:
    """A relative B1 map ``(slices, rows, cols)`` (1 = nominal) stored in tenths of a percent
    of nominal; with ``rwvm`` a Real World Value Mapping of slope 0.1 in UCUM ``%``.
    SeriesDescription ``B1 map phantom``."""
    values = np.nan_to_num(np.asarray(b1_rel, dtype=np.float64) * 1000.0, nan=0.0)
    kwargs.setdefault("series_description", "B1 map phantom")
    kwargs.setdefault("series_number", 905)
    out = series_from_arrays(values[..., None], [0.0], seed=f"{seed}-b1", scale=1.0,
                             **_same_study(seed, kwargs))
    _as_map(out, "relative B1 map, tenths of a percent of nominal", "B1 MAP")
    if rwvm:
        item = _rwvm("%", "percent", 0.1, 65535)
        for ds in out:
            ds.RealWorldValueMappingSequence = [item]
    return out


# --------------------------------------------------------------------------- Enhanced MR
def _code(value: str, scheme: str, meaning: str) -> Dataset:
    item = Dataset()
    item.CodeValue = value
    item.CodingSchemeDesignator = scheme
    item.CodeMeaning = meaning
    return item


def enhanced_series(
    signal: np.ndarray,
    offsets_ppm: Sequence[float] | np.ndarray,
    *,
    seed: str = "phantom-enhanced",
    pixel_spacing_mm: float = 1.8,
    slice_thickness_mm: float = 5.0,
    field_t: float = 3.0,
    scale: float | None = None,
    patient_name: str = "PHANTOM^CEST",
    patient_id: str = "CESTPH-0001",
    patient_birth_date: str = "19700101",
    series_description: str = SERIES_DESCRIPTION,
    protocol_name: str = PROTOCOL_NAME,
    study_uid: str | None = None,
    series_uid: str | None = None,
    series_number: int = 901,
) -> Dataset:
    """The saturation series as ONE Enhanced MR Image Storage instance (PS3.3 A.36.2).

    Frames go offset by offset (acquisition order), slice by slice within an offset, as
    :func:`series_from_arrays` orders its instances. Each frame's functional groups carry
    its position (Plane Position), FrameContentSequence with TemporalPositionIndex = the
    offset's acquisition index (1-based), InStackPositionNumber = the slice (1-based,
    StackID "1") and DimensionIndexValues (temporal position, in-stack position), and the
    saturation offset in our private element (creator ``CESTNODE SIM 1``, (0029,xx10), DS)
    placed directly in the frame's Per-Frame Functional Groups item. Orientation, pixel
    measures, Pixel Value Transformation and the MR acquisition groups are shared.
    Patient, study and frame of reference UIDs follow :func:`series_from_arrays` for the same
    ``seed``.
    """
    signal = np.asarray(signal)
    if signal.ndim != 4:
        raise ValueError(f"signal must be (slices, rows, cols, n_offsets), got shape {signal.shape}")
    offsets = np.asarray(offsets_ppm, dtype=np.float64)
    if offsets.shape != (signal.shape[-1],):
        raise ValueError(
            f"offsets_ppm has {offsets.size} values but signal has {signal.shape[-1]} frames")
    n_slices, rows, cols, n_off = signal.shape
    study_uid = study_uid or uid_from(seed, "study")
    series_uid = series_uid or uid_from(seed, "series")
    sop_uid = UID(uid_from(seed, "enhanced-instance"))
    if scale is None:
        peak = float(np.nanmax(signal)) if signal.size else 0.0
        scale = 30000.0 / peak if peak > 0 else 1.0
    pixels = np.clip(np.rint(np.nan_to_num(signal * scale, nan=0.0)), 0, 65535).astype(np.uint16)
    now = _dt.datetime(2026, 1, 15, 9, 30, 0)
    date, time_ = now.strftime("%Y%m%d"), now.strftime("%H%M%S")

    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.MediaStorageSOPClassUID = EnhancedMRImageStorage
    ds.file_meta.MediaStorageSOPInstanceUID = sop_uid
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.SpecificCharacterSet = "ISO_IR 100"
    ds.ImageType = ["ORIGINAL", "PRIMARY", "OTHER", "NONE"]
    ds.SOPClassUID = EnhancedMRImageStorage
    ds.SOPInstanceUID = sop_uid
    ds.StudyDate = ds.SeriesDate = ds.ContentDate = date
    ds.StudyTime = ds.SeriesTime = ds.ContentTime = time_
    ds.AcquisitionDateTime = date + time_
    ds.AcquisitionDuration = 4.0 * n_off
    ds.AccessionNumber = "SIMACC0001"
    ds.Modality = "MR"
    ds.Manufacturer = "cest-node phantom scanner"
    ds.ManufacturerModelName = "virtual"
    ds.DeviceSerialNumber = "0"
    ds.SoftwareVersions = f"cest-node {__version__}"
    ds.InstitutionName = "Synthetic Phantom Lab"
    ds.StationName = "PHANTOM01"
    ds.ReferringPhysicianName = ""
    ds.StudyDescription = "CEST phantom study"
    ds.SeriesDescription = series_description
    ds.ProtocolName = protocol_name
    ds.PatientName = patient_name
    ds.PatientID = patient_id
    ds.PatientBirthDate = patient_birth_date
    ds.PatientSex = "O"
    ds.BodyPartExamined = "BRAIN"
    ds.PatientPosition = "HFS"
    ds.StudyInstanceUID = study_uid
    ds.SeriesInstanceUID = series_uid
    ds.StudyID = "1"
    ds.SeriesNumber = series_number
    ds.InstanceNumber = 1
    ds.AcquisitionNumber = 1
    ds.FrameOfReferenceUID = uid_from(seed, "frame-of-reference")
    ds.PositionReferenceIndicator = ""
    # Enhanced MR Image module and MR Image Description macro (PS3.3 C.8.13.1)
    ds.ContentQualification = "RESEARCH"
    ds.ResonantNucleus = "1H"
    ds.KSpaceFiltering = "NONE"
    ds.MagneticFieldStrength = f"{field_t:g}"
    ds.ApplicableSafetyStandardAgency = "IEC"
    ds.ImageComments = "CEST saturation series, one frame per (offset, slice)"
    ds.ComplexImageComponent = "MAGNITUDE"
    ds.AcquisitionContrast = "UNKNOWN"
    ds.PixelPresentation = "MONOCHROME"
    ds.VolumetricProperties = "VOLUME"
    ds.VolumeBasedCalculationTechnique = "NONE"
    ds.BurnedInAnnotation = "NO"
    ds.LossyImageCompression = "00"
    ds.PresentationLUTShape = "IDENTITY"
    # MR Pulse Sequence module (PS3.3 C.8.13.4)
    ds.PulseSequenceName = "CEST_GRE"
    ds.MRAcquisitionType = "2D"
    ds.EchoPulseSequence = "GRADIENT"
    ds.MultiPlanarExcitation = "NO"
    ds.PhaseContrast = "NO"
    ds.TimeOfFlightContrast = "NO"
    ds.SteadyStatePulseSequence = "NONE"
    ds.EchoPlanarPulseSequence = "NO"
    ds.SaturationRecovery = "NO"
    ds.SpectrallySelectedSuppression = "NONE"
    ds.OversamplingPhase = "NONE"
    ds.GeometryOfKSpaceTraversal = "RECTILINEAR"
    ds.SegmentedKSpaceTraversal = "SINGLE"
    ds.RectilinearPhaseEncodeReordering = "LINEAR"
    ds.NumberOfKSpaceTrajectories = 1
    # Acquisition Context module: empty
    ds.AcquisitionContextSequence = []
    # Image Pixel
    ds.SamplesPerPixel = 1
    ds.PhotometricInterpretation = "MONOCHROME2"
    ds.Rows = rows
    ds.Columns = cols
    ds.BitsAllocated = 16
    ds.BitsStored = 16
    ds.HighBit = 15
    ds.PixelRepresentation = 0
    ds.NumberOfFrames = n_off * n_slices
    # Multi-frame Dimension module (PS3.3 C.7.6.17): temporal position, then in-stack position
    dim_uid = uid_from(seed, "dimension-organization")
    ds.DimensionOrganizationSequence = [Dataset()]
    ds.DimensionOrganizationSequence[0].DimensionOrganizationUID = dim_uid
    dims = []
    for pointer in ("TemporalPositionIndex", "InStackPositionNumber"):
        d = Dataset()
        d.DimensionOrganizationUID = dim_uid
        d.DimensionIndexPointer = pointer
        d.FunctionalGroupPointer = "FrameContentSequence"
        dims.append(d)
    ds.DimensionIndexSequence = dims

    shared = Dataset()
    measures = Dataset()
    measures.PixelSpacing = [f"{pixel_spacing_mm:g}", f"{pixel_spacing_mm:g}"]
    measures.SliceThickness = f"{slice_thickness_mm:g}"
    shared.PixelMeasuresSequence = [measures]
    orient = Dataset()
    orient.ImageOrientationPatient = ["1", "0", "0", "0", "1", "0"]
    shared.PlaneOrientationSequence = [orient]
    pvt = Dataset()
    pvt.RescaleIntercept = "0"
    pvt.RescaleSlope = "1"
    pvt.RescaleType = "US"
    shared.PixelValueTransformationSequence = [pvt]
    anat = Dataset()
    anat.FrameLaterality = "U"
    anat.AnatomicRegionSequence = [_code("12738006", "SCT", "Brain")]
    shared.FrameAnatomySequence = [anat]
    ftype = Dataset()
    ftype.FrameType = ["ORIGINAL", "PRIMARY", "OTHER", "NONE"]
    ftype.PixelPresentation = "MONOCHROME"
    ftype.VolumetricProperties = "VOLUME"
    ftype.VolumeBasedCalculationTechnique = "NONE"
    ftype.ComplexImageComponent = "MAGNITUDE"
    ftype.AcquisitionContrast = "UNKNOWN"
    shared.MRImageFrameTypeSequence = [ftype]
    timing = Dataset()
    timing.RepetitionTime = 5000.0
    timing.FlipAngle = 10.0
    timing.EchoTrainLength = 1
    timing.RFEchoTrainLength = 0
    timing.GradientEchoTrainLength = 1
    sar = Dataset()
    sar.SpecificAbsorptionRateDefinition = "IEC_WHOLE_BODY"
    sar.SpecificAbsorptionRateValue = 0.5
    timing.SpecificAbsorptionRateSequence = [sar]
    mode = Dataset()
    mode.OperatingModeType = "RF"
    mode.OperatingMode = "IEC_NORMAL"
    timing.OperatingModeSequence = [mode]
    timing.GradientOutputType = "DB_DT"
    timing.GradientOutput = 0.0
    shared.MRTimingAndRelatedParametersSequence = [timing]
    fov = Dataset()
    fov.InPlanePhaseEncodingDirection = "ROW"
    fov.MRAcquisitionFrequencyEncodingSteps = cols
    fov.MRAcquisitionPhaseEncodingStepsInPlane = rows
    fov.PercentSampling = 100.0
    fov.PercentPhaseFieldOfView = 100.0
    shared.MRFOVGeometrySequence = [fov]
    echo = Dataset()
    echo.EffectiveEchoTime = 3.0
    shared.MREchoSequence = [echo]
    modifier = Dataset()
    modifier.InversionRecovery = "NO"
    modifier.FlowCompensation = "NONE"
    modifier.T2Preparation = "NO"
    modifier.SpectrallySelectedExcitation = "NONE"
    modifier.SpatialPresaturation = "NONE"
    modifier.PartialFourier = "NO"
    modifier.ParallelAcquisition = "NO"
    shared.MRModifierSequence = [modifier]
    imod = Dataset()
    imod.MagnetizationTransfer = "ON_RESONANCE"
    imod.BloodSignalNulling = "NO"
    imod.Tagging = "NONE"
    imod.TransmitterFrequency = GAMMA_MHZ_PER_T * field_t
    imod.PixelBandwidth = 500.0
    shared.MRImagingModifierSequence = [imod]
    rcoil = Dataset()
    rcoil.ReceiveCoilName = "HEAD"
    rcoil.ReceiveCoilManufacturerName = ""
    rcoil.ReceiveCoilType = "VOLUME"
    rcoil.QuadratureReceiveCoil = "NO"
    shared.MRReceiveCoilSequence = [rcoil]
    tcoil = Dataset()
    tcoil.TransmitCoilName = "BODY"
    tcoil.TransmitCoilManufacturerName = ""
    tcoil.TransmitCoilType = "BODY"
    shared.MRTransmitCoilSequence = [tcoil]
    avg = Dataset()
    avg.NumberOfAverages = 1.0
    shared.MRAveragesSequence = [avg]
    ds.SharedFunctionalGroupsSequence = [shared]

    per_frame = []
    frames = []
    for k in range(n_off):
        for s in range(n_slices):
            item = Dataset()
            content = Dataset()
            content.FrameAcquisitionNumber = k + 1
            content.FrameReferenceDateTime = ds.AcquisitionDateTime
            content.FrameAcquisitionDateTime = (now + _dt.timedelta(seconds=4 * k)).strftime(
                "%Y%m%d%H%M%S")
            content.FrameAcquisitionDuration = 4000.0
            content.StackID = "1"
            content.InStackPositionNumber = s + 1
            content.TemporalPositionIndex = k + 1
            content.DimensionIndexValues = [k + 1, s + 1]
            content.FrameComments = f"sat offset {offsets[k]:+.3f} ppm"
            item.FrameContentSequence = [content]
            pos = Dataset()
            z = (s - (n_slices - 1) / 2.0) * slice_thickness_mm
            pos.ImagePositionPatient = [f"{-cols * pixel_spacing_mm / 2:.3f}",
                                        f"{-rows * pixel_spacing_mm / 2:.3f}", f"{z:.3f}"]
            item.PlanePositionSequence = [pos]
            block = item.private_block(PRIVATE_GROUP, PRIVATE_CREATOR, create=True)
            block.add_new(OFFSET_ELEMENT, "DS", f"{offsets[k]:.4f}")
            per_frame.append(item)
            frames.append(pixels[s, :, :, k])
    ds.PerFrameFunctionalGroupsSequence = per_frame
    ds.PixelData = np.ascontiguousarray(np.stack(frames)).tobytes()
    return ds
