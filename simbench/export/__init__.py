"""Export to open formats that other tools read: NeXus NXtomo, TIFF stacks, DICOM CT series.

Array-level writers, which do not care where their arrays come from:

- :func:`simbench.export.nxtomo.write_nxtomo`: projections, flat and dark frames and their
  geometry as one NXtomo entry in an HDF5 file (h5py);
- :func:`simbench.export.tiff.write_tiff_stack`: an image or a projection stack as TIFF, the
  stored values bit for bit, with the spacing (tifffile);
- :func:`simbench.export.dicom.write_dicom_series`: a mu image as a DICOM CT series in HU
  with synthetic identifiers (pydicom).

Folder-level export (``simbench export``): :func:`simbench.export.writer.export` reads a run,
scan or reconstruction folder (:mod:`simbench.export.source`), checks it, and writes an
export folder committed whole. The fields and axis mappings are in docs/export.md.
"""

from simbench.export.writer import FORMATS, Choice, export

__all__ = ["FORMATS", "Choice", "export"]
