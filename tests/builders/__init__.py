"""Shared builders for every test folder. pytest puts ``tests/`` on ``sys.path`` (``pythonpath``
in pyproject.toml), so a test module anywhere writes ``from builders.dicom import ...``.

- ``builders.dicom``: small classic DICOM series and Enhanced MR files;
- ``builders.study``: a small MR study of known values with its case file (stage tests);
- ``builders.synthetic``: synthetic studies from a scenario, read back with SimpleITK, and
  independent ROI measurements (numpy geometry);
- ``builders.golden``: the demo scenarios' normalized outputs, and their stored copies.
"""
