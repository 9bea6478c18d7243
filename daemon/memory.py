"""Allocator tuning for block-sized arrays.

A block of 32 channels x 1000 samples is 256 kB of float64, and the hot path makes and frees a
few such arrays per block. With glibc's defaults the memory at the top of the heap is handed
back to the kernel as soon as it is freed and faulted in again, page by page, for the next
block: on this workload that costs 4 to 20 times the arithmetic (measured with
tools/bench_feed.py and a 32 x 1000 copy-and-summarise loop). Keeping a pad of free memory at
the heap top (glibc's M_TOP_PAD, the knob `mallopt(3)` documents) removes that churn at the
price of up to the pad in resident memory. Other C libraries are left alone.
"""

from __future__ import annotations

import argparse
import ctypes
import ctypes.util
import functools
import os

#: mallopt parameter number of M_TOP_PAD in glibc's <malloc.h>
_M_TOP_PAD = -2
#: the pad straind asks for: a few blocks' worth of arrays at 32 channels x 10 000 S/s
DEFAULT_TOP_PAD_BYTES = 16 << 20


@functools.cache
def glibc() -> ctypes.CDLL | None:
    """The process's C library if it is glibc (loaded once), else None."""
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        libc.gnu_get_libc_version  # only glibc has it (and mallopt's M_TOP_PAD meaning)
    except (OSError, AttributeError):
        return None
    return libc


def tune_allocator(top_pad_bytes: int = DEFAULT_TOP_PAD_BYTES) -> bool:
    """Ask glibc to keep `top_pad_bytes` free at the top of the heap; True if it was applied.

    Does nothing (False) on another C library, or when the operator already chose a value
    through glibc's own MALLOC_TOP_PAD_ environment variable.
    """
    libc = glibc()
    if "MALLOC_TOP_PAD_" in os.environ or libc is None:
        return False
    mallopt = libc.mallopt
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    return mallopt(_M_TOP_PAD, int(top_pad_bytes)) == 1


def add_allocator_argument(parser: argparse.ArgumentParser) -> None:
    """The `--allocator` option of the tools/ benchmarks, to measure with or without the pad."""
    parser.add_argument("--allocator", choices=("tuned", "default"), default="tuned",
                        help="tuned (as `straind run`): keep a heap-top pad (straind.memory); "
                             "default: glibc as it comes, to see the difference")


def apply_allocator_argument(args: argparse.Namespace) -> bool:
    """Tune the allocator unless `--allocator default` was given; True if it was tuned."""
    return args.allocator == "tuned" and tune_allocator()
