"""The ``tiltaudit`` command's entry point: process settings first, then the command line.

The settings below only take effect if they are in the environment before numpy, polars and
OpenBLAS are loaded, so they are set here, before :mod:`attribution.cli` is imported. A value
already in the environment is kept (the user's choice wins). They tune the command's own
process for a batch of large, short-lived arrays; the Python API (``attribution.run``) does
not change its caller's process.

* ``NUMPY_MADVISE_HUGEPAGE=0``: numpy asks the kernel for 2 MiB pages for every large array.
  A shard allocates and frees hundreds of such arrays; each fresh huge page is zeroed when
  first touched, which cost 1.5 of 3.8 system CPU-seconds in a 5,000-portfolio run (measured
  with ``perf``; ``benchmarks/bench_run.py``).
* ``OPENBLAS_NUM_THREADS=1``: the regressions solve many tiny least-squares problems; extra
  BLAS threads only spin (about 4 % of the run's CPU) and take the core that the reading and
  writing threads need.
* ``_RJEM_MALLOC_CONF``: polars' allocator (jemalloc) returns freed pages to the kernel at
  once by default (``muzzy_decay_ms:0``); keeping them ten seconds lets the next shard reuse
  them (a third fewer page faults in the same run).
"""

from __future__ import annotations

import os

PROCESS_SETTINGS = {
    "NUMPY_MADVISE_HUGEPAGE": "0",
    "OPENBLAS_NUM_THREADS": "1",
    "_RJEM_MALLOC_CONF": "dirty_decay_ms:10000,muzzy_decay_ms:10000",
}


def apply_process_settings() -> None:
    """Put :data:`PROCESS_SETTINGS` into the environment where the user has not set them."""
    for name, value in PROCESS_SETTINGS.items():
        os.environ.setdefault(name, value)


def main() -> None:
    """``tiltaudit``: apply the process settings, then run the command line."""
    apply_process_settings()
    from attribution.cli import main as cli_main

    cli_main(prog_name="tiltaudit")
