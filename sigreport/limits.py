"""Ceilings that keep memory and time bounded by what the input files really hold.

Every size a file declares (Rows x Columns x frames x bits, a label image's dimensions, a gzip
stream's inflated length, the number of ROIs in a case file) is checked against the bytes the
file holds and against these ceilings *before* anything of that size is allocated. They are far
above any clinical MR study (common practice: MR matrices are at most 1024 per side, a 3D series
a few hundred slices) and low enough that a hostile file cannot drive one run past about 1 GB.
They are safety limits of the program, not reading thresholds, so they live here and not in the
site lexicon; docs/ingestion.md lists them. The last two bound how much of a study a report
holds at once (docs/performance.md, Memory).
"""

from __future__ import annotations

# One image (frame) of a study: at most this many pixels per side.
MAX_IMAGE_SIDE = 8192
# Frames in one multi-frame (Enhanced MR) file.
MAX_FRAMES_PER_FILE = 100_000
# Decoded pixel bytes of one file (all its frames, as stored).
MAX_PIXEL_BYTES_PER_FILE = 512 * 1024**2
# Voxels of one loaded stack (float32: 4 bytes each, so 512 MiB).
MAX_STACK_VOXELS = 128 * 1024**2
# Values a header's coordinates and spacings may take (mm): a 100 m field of view, 1 um pixels.
MAX_COORDINATE_MM = 1.0e5
MIN_SPACING_MM = 1.0e-3
MAX_SPACING_MM = 1.0e3
# A mask file (label image or SEG): voxels of its grid, and the inflated bytes of a gzip stream.
MAX_MASK_VOXELS = 128 * 1024**2
MAX_INFLATED_BYTES = 1024**3
# A deflated DICOM data set (Deflated Explicit VR Little Endian) inflated in memory.
MAX_DEFLATED_BYTES = 256 * 1024**2
# A case file: ROIs, and the largest radius / semi-axis / box edge of an analytic ROI (mm).
MAX_ROIS = 200
MAX_ROI_EXTENT_MM = 500.0
# Series a report holds loaded besides the anchor while it streams the study through
# (sigreport.pipeline.stream_series): up to this many (one per core) while they register in
# worker threads, when their float32 pixels together fit SERIES_WINDOW_BYTES; a larger series,
# or one that is not registered, is loaded, registered and measured alone, so a long series
# costs its own size and no more.
SERIES_IN_FLIGHT = 2
SERIES_WINDOW_BYTES = 64 * 1024**2
