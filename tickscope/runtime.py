"""Process-wide settings made once, at the start of ``tickscope`` (never at import).

:func:`tune` is called by :func:`tickscope.cli.main` before numpy is imported.  A program that
uses tickscope as a library keeps its own settings.
"""
from __future__ import annotations

import os
import sys


def tune() -> None:
    """Set the BLAS threads and glibc's allocator for the analysis (see the two helpers)."""
    _one_blas_thread()
    _keep_freed_memory()


def _one_blas_thread() -> None:
    """numpy's BLAS starts a thread per core for products of a few thousand numbers, the size of the
    per-step work, and spends more CPU than it saves (measured: ~0.1 s more per hour of audio, no
    faster).  One thread, unless the user has set it.  Takes effect only before numpy is imported."""
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")


def _keep_freed_memory() -> None:
    """Let glibc's malloc keep freed blocks for reuse instead of handing each large one back.

    The analysis makes and drops arrays of a few hundred kB to a few MB many times a second (FFT
    rows, audio blocks, numpy's and pocketfft's temporaries).  By default glibc maps each such
    block fresh from the kernel and unmaps it when freed, so every use pays a page fault per 4 kB;
    on virtual machines a fault can cost microseconds (a batch of single-precision FFTs here ran
    4x slower for it).  Blocks below 32 MB now come from the heap and are reused; the peak memory
    is unchanged (benchmarks/run.py prints it).  Elsewhere than glibc this does nothing."""
    if not sys.platform.startswith("linux"):
        return
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        m_trim_threshold, m_top_pad, m_mmap_threshold = -1, -2, -3  # malloc.h
        libc.mallopt(m_mmap_threshold, 32 << 20)
        libc.mallopt(m_trim_threshold, 64 << 20)
        libc.mallopt(m_top_pad, 16 << 20)
    except (OSError, AttributeError):  # not glibc (musl, say): its own allocator, left as it is
        pass
