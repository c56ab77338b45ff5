"""simbench: a virtual CT scanner and test bench.

Phantoms written in a small YAML language are ray-traced into exact per-material path
lengths; measurement physics turns them into raw counts, calibration frames and
projections; plugged-in processing code is scored against the exact truth.

simbench is a research and engineering tool. Its results do not replace acceptance
testing, dosimetry or clinical validation of a real scanner; follow local regulations
and qualified physicists for anything touching patients.
"""

__version__ = "0.1.0"

CAUTION = (
    "simbench is a research and engineering tool: its results do not replace acceptance "
    "testing, dosimetry or clinical validation of a real scanner. Follow local regulations "
    "and qualified physicists for anything touching patients."
)
