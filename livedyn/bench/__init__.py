"""livedyn's measurement harness: kernel cost (``python -m livedyn.bench kernels``).

Figures are measured, reported as ratios within one run on one machine, and never asserted as
bounds in unit tests.
"""
from .kernels import CASES, Case, machine_info, report, run_kernels

__all__ = ["CASES", "Case", "machine_info", "report", "run_kernels"]
