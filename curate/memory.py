"""Handing freed memory back to the operating system.

Allocators keep freed blocks for reuse: Arrow's pool, and glibc's heaps (one per thread that
allocated). After a step that frees gigabytes of temporaries (a corpus-wide stage, the worker
threads of the Hamming search), what they keep would sit under the next step's peak: measured with
bench/scale_plan.py at 1M samples, about 0.3-0.5 KB per sample after each such step.
"""
from __future__ import annotations

import ctypes


def trim_heap() -> None:
    """Return the C heap's free pages (glibc's malloc_trim); nothing where the C library has none."""
    try:
        ctypes.CDLL(None).malloc_trim(0)
    except (OSError, AttributeError):
        pass


def release() -> None:
    """Arrow's pool hands back its unused memory, then ``trim_heap``."""
    import pyarrow as pa

    pa.default_memory_pool().release_unused()
    trim_heap()
