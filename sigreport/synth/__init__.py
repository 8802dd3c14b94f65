"""sigreport.synth: physics-based synthetic MR head studies and the bundled demo scenarios.

A labelled head model (``phantom``) is imaged with textbook signal equations (``physics``,
``sequences``) on each series' geometry (``geometry``) and written as DICOM (``writer``), with
a case file and the expected values (``study``). Scenarios are TOML data (``scenario``).
"""

from sigreport.synth.study import GeneratedStudy, demo_scenarios, generate_study

__all__ = ["GeneratedStudy", "demo_scenarios", "generate_study"]
