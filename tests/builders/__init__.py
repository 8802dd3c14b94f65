"""Shared builders for every test folder: small DICOM series and Enhanced MR files
(``builders.dicom``). pytest puts ``tests/`` on ``sys.path`` (``pythonpath`` in pyproject.toml), so
a test module anywhere writes ``from builders.dicom import write_classic_series``."""
