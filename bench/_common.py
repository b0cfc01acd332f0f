"""Timing and peak-memory helpers shared by the benchmark scripts.

Peak memory is the largest rise of the process's resident set size (RSS, as
psutil reports it) above its level just before the call, sampled every
``interval`` seconds by a background thread. It counts memory that native
libraries (LightGBM, XGBoost, BLAS) allocate, which ``tracemalloc`` cannot
see; a spike shorter than the interval can be missed. So that memory freed by
an earlier fit is not silently reused (which hides a later fit's peak),
:func:`reexec_with_returning_allocator` restarts the script with glibc's
``MALLOC_MMAP_THRESHOLD_`` fixed at 64 KiB (large arrays get their own pages
and go back to the system when freed), and :func:`measure` trims the heap
before each call.

Results tables live in ``bench/README.md``, one section per benchmark between
``<!-- bench:NAME:start -->`` and ``<!-- bench:NAME:end -->`` markers, so
scripts rewrite their own section and leave the others alone.
"""

from __future__ import annotations

import ctypes
import gc
import os
import re
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import psutil

from wearcast import _atomic

README = Path(__file__).with_name("README.md")


@dataclass
class Measured:
    """What :func:`measure` returns: the call's result, wall seconds, peak RSS rise (MiB)."""

    result: Any
    seconds: float
    peak_mib: float


def reexec_with_returning_allocator() -> None:
    """Restart this script once with ``MALLOC_MMAP_THRESHOLD_=65536`` (glibc reads it at start)."""
    if os.environ.get("MALLOC_MMAP_THRESHOLD_") is None and sys.platform.startswith("linux"):
        env = dict(os.environ, MALLOC_MMAP_THRESHOLD_="65536")
        os.execve(sys.executable, [sys.executable, *sys.argv], env)


def release_memory() -> None:
    """Collect garbage and hand free heap pages back to the system (glibc)."""
    gc.collect()
    try:
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):  # pragma: no cover - not glibc
        pass


def measure(fn: Callable, *args, interval: float = 0.005, **kwargs) -> Measured:
    """Run ``fn(*args, **kwargs)``; time it and sample the peak RSS rise meanwhile."""
    release_memory()
    process = psutil.Process()
    start_rss = process.memory_info().rss
    peak = [start_rss]
    done = threading.Event()

    def sample():
        while not done.is_set():
            rss = process.memory_info().rss
            if rss > peak[0]:
                peak[0] = rss
            done.wait(interval)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    t0 = time.perf_counter()
    try:
        result = fn(*args, **kwargs)
    finally:
        seconds = time.perf_counter() - t0
        done.set()
        sampler.join()
    peak[0] = max(peak[0], process.memory_info().rss)
    return Measured(result, seconds, (peak[0] - start_rss) / 2**20)


def markdown_table(rows: list[dict], columns: list[str]) -> str:
    """A GitHub-style table of ``rows`` (dicts) with the given column order."""
    def cell(v):
        if v is None:
            return "–"
        if isinstance(v, float):
            return f"{v:.4g}" if abs(v) < 1e4 else f"{v:,.0f}"
        return str(v)

    lines = ["| " + " | ".join(columns) + " |", "|" + "---|" * len(columns)]
    lines += ["| " + " | ".join(cell(r.get(c)) for c in columns) + " |" for r in rows]
    return "\n".join(lines)


def write_section(name: str, text: str, readme: Path = README) -> Path:
    """Replace (or append) the ``name`` section of ``bench/README.md``."""
    start, end = f"<!-- bench:{name}:start -->", f"<!-- bench:{name}:end -->"
    block = f"{start}\n{text.rstrip()}\n{end}"
    old = readme.read_text(encoding="utf-8") if readme.exists() else "# Benchmarks\n"
    pattern = re.compile(re.escape(start) + r".*?" + re.escape(end), re.S)
    new = pattern.sub(lambda _m: block, old) if pattern.search(old) else old.rstrip() + "\n\n" + block + "\n"
    return _atomic.write_text(readme, new)
