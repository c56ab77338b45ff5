"""Images as DICOM CT series: one CT Image Storage file per slice, int16 pixels, HU by rescale.

The writer takes a mu image (1/mm) on an :class:`~simbench.geometry.grid.ImageGrid`, the
attenuation of water and air at the image's reference energy, and identifiers; it knows
nothing of runs or folders. docs/export.md lists every attribute written.

Frames and axes (DICOM PS3.3 C.7.6.2, Image Plane Module): the patient coordinate system is
taken to be simbench's world frame itself (x, y, z in mm, rotation axis z), so no coordinate
changes sign. A slice (ny, nx) is stored as it lies in the array: column index along +x, row
index along +y, so ImageOrientationPatient is ``[1, 0, 0, 0, 1, 0]``, PixelSpacing is
``[dy, dx]`` (row spacing first), and ImagePositionPatient is the centre of voxel (iz, 0, 0).

Hounsfield units (the definition in ARCHITECTURE.md): ``HU = 1000 (mu - mu_water) /
(mu_water - mu_air)``. Stored values are ``round((HU - intercept) / slope)`` with intercept
-1024 and slope the HU step (1 HU by default), doubled until the image's range fits int16.

Identifiers are synthetic: every UID is a ``2.25.`` UID (DICOM PS3.5 B.2, derived from a
UUID) made by :func:`synthetic_uid` from the identity of what it names, so exporting the
same data again gives the same UIDs, and other data other UIDs.
"""

from __future__ import annotations

import json
import math
import uuid
from dataclasses import dataclass
from pathlib import Path

import numpy as np

import simbench
from simbench.errors import InputError, Where

#: CT Image Storage (DICOM PS3.4 B.5, Standard SOP Classes)
CT_IMAGE_STORAGE = "1.2.840.10008.5.1.4.1.1.2"
#: the patient name of every exported series (synthetic; no real identifiers)
PATIENT_NAME = "SIMBENCH^PHANTOM"
#: stored value = round((HU - intercept) / slope); -1024 keeps air and above non-negative
RESCALE_INTERCEPT_HU = -1024.0
#: soft-tissue display window (centre, width) in HU (common practice)
WINDOW_HU = (40.0, 400.0)
INT16_MIN, INT16_MAX = -32768, 32767
#: the namespace of every synthetic UID (RFC 4122 name-based UUIDs)
UID_NAMESPACE = uuid.uuid5(uuid.NAMESPACE_URL, "urn:simbench:export")


def synthetic_uid(*parts) -> str:
    """A DICOM UID derived from ``parts`` alone: the same parts give the same UID.

    Parameters
    ----------
    *parts : str or int
        What the UID names, e.g. ``("simbench export", "series", <sha256 of the image>)``.

    Returns
    -------
    str
        ``2.25.<decimal>``: a name-based (SHA-1, version 5) UUID of the parts, as the
        standard library makes it (RFC 4122 section 4.3, ISO/IEC 9834-8), written as a
        decimal integer under the ``2.25`` root (DICOM PS3.5 B.2), which needs no registered
        organization root; at most 44 characters.

    Examples
    --------
    >>> synthetic_uid("a", "b") == synthetic_uid("a", "b")
    True
    >>> synthetic_uid("a", "b") == synthetic_uid("ab")
    False
    >>> synthetic_uid("a", "b").startswith("2.25.")
    True
    """
    name = json.dumps([str(p) for p in parts], ensure_ascii=False)
    return f"2.25.{uuid.uuid5(UID_NAMESPACE, name).int}"


def hu_from_mu(mu, mu_water: float, mu_air: float) -> np.ndarray:
    """Hounsfield units of attenuation values, in float64.

    Parameters
    ----------
    mu : array_like
        Linear attenuation (1/mm).
    mu_water, mu_air : float
        Attenuation of water and air (1/mm) at the same energy.

    Notes
    -----
    ``HU = 1000 (mu - mu_water) / (mu_water - mu_air)``, so water is 0 HU and air -1000 HU.

    Examples
    --------
    >>> float(hu_from_mu(0.02, 0.02, 0.0))
    0.0
    """
    return 1000.0 * (np.asarray(mu, dtype=np.float64) - mu_water) / (mu_water - mu_air)


def rescale_for(hu_min: float, hu_max: float, hu_step: float = 1.0, *,
                step_given: bool = False) -> tuple[float, float]:
    """The rescale slope and intercept that hold ``[hu_min, hu_max]`` in int16.

    Parameters
    ----------
    hu_min, hu_max : float
        Range of the image in HU.
    hu_step : float
        The wanted quantization step (the slope), HU.
    step_given : bool
        The user chose ``hu_step``: a range that does not fit is an error naming
        ``--hu-step`` rather than a coarser step.

    Returns
    -------
    (slope, intercept) : tuple of float
        ``HU = slope * stored + intercept``; intercept is :data:`RESCALE_INTERCEPT_HU`, slope
        is ``hu_step`` times the smallest power of two that makes the range fit.
    """
    def fits(slope: float) -> bool:
        return (math.floor((hu_min - RESCALE_INTERCEPT_HU) / slope + 0.5) >= INT16_MIN
                and math.floor((hu_max - RESCALE_INTERCEPT_HU) / slope + 0.5) <= INT16_MAX)

    slope = float(hu_step)
    if fits(slope):
        return slope, RESCALE_INTERCEPT_HU
    if step_given:
        need = max(hu_max - RESCALE_INTERCEPT_HU, 0.0) / INT16_MAX
        need = max(need, max(RESCALE_INTERCEPT_HU - hu_min, 0.0) / -INT16_MIN)
        raise InputError(Where("<command line>", field="--hu-step"),
                         f"a step of {hu_step:g} HU cannot hold this image's range "
                         f"{hu_min:.1f} to {hu_max:.1f} HU in 16 bits",
                         f"a step of at least {need * 1.0001:.4g} HU")
    while not fits(slope):
        slope *= 2.0
    return slope, RESCALE_INTERCEPT_HU


@dataclass(frozen=True)
class SeriesIdentity:
    """Who and what a series is: synthetic identifiers and descriptions.

    Attributes
    ----------
    study_uid, series_uid, frame_of_reference_uid : str
        UIDs (see :func:`synthetic_uid`); every slice's SOP Instance UID is derived from
        ``series_uid`` and its slice number.
    patient_id : str
        A synthetic patient ID (e.g. ``SIMBENCH-3f9a0c1d2e4b``).
    series_number : int
    series_description, study_description : str
        At most 64 characters each (longer text is cut).
    date, time : str
        ``YYYYMMDD`` and ``HHMMSS`` of the data (the run's start), or empty.
    manufacturer_model : str
        The scanner's name.
    kernel : str
        The reconstruction's name, or "" (the truth).
    """

    study_uid: str
    series_uid: str
    frame_of_reference_uid: str
    patient_id: str
    series_number: int
    series_description: str
    study_description: str
    date: str = ""
    time: str = ""
    manufacturer_model: str = ""
    kernel: str = ""


def write_dicom_series(folder: str | Path, image_mu: np.ndarray, grid, *, mu_water: float,
                       mu_air: float, identity: SeriesIdentity, hu_step: float = 1.0,
                       step_given: bool = False, sid_mm: float | None = None,
                       sdd_mm: float | None = None) -> dict:
    """Write one image as a DICOM CT series, one file ``slice-NNNN.dcm`` per z slice.

    Parameters
    ----------
    folder : str or Path
        Existing folder to write into (the files are named ``slice-0001.dcm`` upward, in
        increasing z).
    image_mu : ndarray
        mu (1/mm), shaped ``grid.image_shape``: (ny, nx) for a 2-D grid, (nz, ny, nx).
    grid : ImageGrid
        Where the voxels sit (mm).
    mu_water, mu_air : float
        Attenuation of water and air (1/mm) at the image's reference energy.
    identity : SeriesIdentity
    hu_step : float
        Quantization step in HU (the rescale slope); raised by powers of two when the
        image's range does not fit 16 bits, unless ``step_given``.
    step_given : bool
        See :func:`rescale_for`.
    sid_mm, sdd_mm : float, optional
        Source-to-isocentre and source-to-detector distances, for DistanceSourceToPatient
        and DistanceSourceToDetector (DICOM PS3.3 C.8.2.1, CT Image Module).

    Returns
    -------
    dict
        ``files`` (names), ``rescale_slope``, ``rescale_intercept``, ``hu_range`` (of the
        float image), ``sop_instance_uids``.

    Notes
    -----
    Stored value ``s = round((HU - intercept) / slope)``; a reader recovers
    ``HU = slope * s + intercept`` within ``slope / 2``.
    """
    from pydicom.dataset import FileDataset, FileMetaDataset
    from pydicom.uid import ExplicitVRLittleEndian

    folder = Path(folder)
    volume = np.asarray(image_mu)
    if grid.dimension == 2:
        volume = volume.reshape((1,) + tuple(volume.shape))
    if tuple(volume.shape) != tuple(grid.shape):
        raise ValueError(f"image shape {volume.shape} does not match grid {grid.shape}")
    nz, ny, nx = volume.shape
    if nz > 9999:
        raise ValueError("at most 9999 slices per series")
    hu_lo, hu_hi = math.inf, -math.inf
    for iz in range(nz):  # one slice at a time: the image may be a memory map
        hu = hu_from_mu(volume[iz], mu_water, mu_air)
        hu_lo, hu_hi = min(hu_lo, float(hu.min())), max(hu_hi, float(hu.max()))
    slope, intercept = rescale_for(hu_lo, hu_hi, hu_step, step_given=step_given)
    dx, dy, dz = (float(v) for v in grid.spacing_mm)
    xs, ys, zs = grid.axis_mm("x"), grid.axis_mm("y"), grid.axis_mm("z")
    files, sops = [], []
    for iz in range(nz):
        hu = hu_from_mu(volume[iz], mu_water, mu_air)
        stored = np.floor((hu - intercept) / slope + 0.5).astype("<i2")
        sop_uid = synthetic_uid("simbench export", "image", identity.series_uid, iz + 1)
        meta = FileMetaDataset()
        meta.MediaStorageSOPClassUID = CT_IMAGE_STORAGE
        meta.MediaStorageSOPInstanceUID = sop_uid
        meta.TransferSyntaxUID = ExplicitVRLittleEndian
        name = f"slice-{iz + 1:04d}.dcm"
        ds = FileDataset(name, {}, file_meta=meta, preamble=b"\0" * 128)
        ds.SpecificCharacterSet = "ISO_IR 192"
        ds.SOPClassUID = CT_IMAGE_STORAGE
        ds.SOPInstanceUID = sop_uid
        ds.ImageType = ["DERIVED", "SECONDARY", "AXIAL"]
        # Patient, General Study, General Series, Frame of Reference, General Equipment
        ds.PatientName = PATIENT_NAME
        ds.PatientID = identity.patient_id
        ds.PatientBirthDate = ""
        ds.PatientSex = "O"
        ds.PatientIdentityRemoved = "YES"
        ds.StudyInstanceUID = identity.study_uid
        ds.StudyID = "SIMBENCH"
        ds.AccessionNumber = ""
        ds.ReferringPhysicianName = ""
        ds.StudyDate = ds.SeriesDate = ds.ContentDate = identity.date
        ds.StudyTime = ds.SeriesTime = ds.ContentTime = identity.time
        ds.StudyDescription = identity.study_description[:64]
        ds.Modality = "CT"
        ds.SeriesInstanceUID = identity.series_uid
        ds.SeriesNumber = int(identity.series_number)
        ds.SeriesDescription = identity.series_description[:64]
        ds.PatientPosition = "HFS"
        ds.FrameOfReferenceUID = identity.frame_of_reference_uid
        ds.PositionReferenceIndicator = ""
        ds.Manufacturer = "simbench"
        ds.ManufacturerModelName = identity.manufacturer_model[:64]
        ds.SoftwareVersions = f"simbench {simbench.__version__}"
        # General Image, Image Plane
        ds.InstanceNumber = iz + 1
        ds.AcquisitionNumber = 1
        ds.ImageComments = simbench.CAUTION
        ds.PixelSpacing = [_ds(dy), _ds(dx)]
        ds.ImageOrientationPatient = ["1", "0", "0", "0", "1", "0"]
        ds.ImagePositionPatient = [_ds(xs[0]), _ds(ys[0]), _ds(zs[iz])]
        ds.SliceThickness = _ds(dz)
        ds.SpacingBetweenSlices = _ds(dz)
        ds.SliceLocation = _ds(zs[iz])
        # Image Pixel, CT Image
        ds.SamplesPerPixel = 1
        ds.PhotometricInterpretation = "MONOCHROME2"
        ds.Rows, ds.Columns = ny, nx
        ds.BitsAllocated, ds.BitsStored, ds.HighBit = 16, 16, 15
        ds.PixelRepresentation = 1
        ds.RescaleIntercept = _ds(intercept)
        ds.RescaleSlope = _ds(slope)
        ds.RescaleType = "HU"
        ds.WindowCenter, ds.WindowWidth = _ds(WINDOW_HU[0]), _ds(WINDOW_HU[1])
        ds.KVP = ""
        ds.ReconstructionDiameter = _ds(max(nx * dx, ny * dy))
        if identity.kernel:
            ds.ConvolutionKernel = identity.kernel[:16]
        if sid_mm is not None and sdd_mm is not None:
            ds.DistanceSourceToPatient = _ds(sid_mm)
            ds.DistanceSourceToDetector = _ds(sdd_mm)
        ds.PixelData = np.ascontiguousarray(stored).tobytes()
        ds.save_as(folder / name, enforce_file_format=True)
        files.append(name)
        sops.append(sop_uid)
    return {"files": files, "rescale_slope": slope, "rescale_intercept": intercept,
            "hu_range": [hu_lo, hu_hi], "sop_instance_uids": sops}


def _ds(value: float) -> str:
    """A decimal string (DICOM VR DS: at most 16 characters), exact where it can be."""
    from pydicom.valuerep import format_number_as_ds

    value = float(value)
    if value == int(value) and abs(value) < 1e15:
        return str(int(value))
    text = repr(value)
    return text if len(text) <= 16 else format_number_as_ds(value)
