"""Configuration files: bench, sequence and limits schemas, loaded with file:line errors.

- :mod:`benchrun.config.loader` — YAML with line numbers, quantity types, :func:`load_model`.
- :mod:`benchrun.config.bench` — :class:`BenchConfig`, :func:`load_bench`.
- :mod:`benchrun.config.sequence` — :class:`SequenceConfig`, :func:`load_sequence`.
- :mod:`benchrun.config.limits` — limits files (grading).
"""

from benchrun.config.bench import BenchConfig, load_bench
from benchrun.config.sequence import SequenceConfig, load_sequence

__all__ = ["BenchConfig", "SequenceConfig", "load_bench", "load_sequence"]
