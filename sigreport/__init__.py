"""sigreport: MRI lesion signal-behaviour tables and draft reports from a DICOM study."""

__version__ = "0.1.0"
