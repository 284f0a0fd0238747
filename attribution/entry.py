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

import contextlib
import os
import sys

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
    """``tiltaudit``: apply the process settings, run the command line, and exit.

    The exit skips the interpreter's teardown (``os._exit`` after flushing the standard
    streams): by then every output is written, closed and renamed into place, and freeing a
    large run's objects one by one only delays the exit (about 0.3 s at 5,000 portfolios).
    A run that started Spark exits normally, so the Spark session's own exit handlers run.
    """
    apply_process_settings()
    from attribution.cli import main as cli_main

    try:
        cli_main(prog_name="tiltaudit")
        code: object = 0
    except SystemExit as finished:
        code = finished.code
    if "pyspark" in sys.modules:
        sys.exit(code)
    if not isinstance(code, int):
        # sys.exit("message") prints the message and exits with 1; keep that behaviour.
        if code is not None:
            print(code, file=sys.stderr)
        code = 0 if code is None else 1
    for stream in (sys.stdout, sys.stderr):
        # A reader that went away (| head) or a closed stream: nothing left to flush to.
        with contextlib.suppress(OSError, ValueError):
            stream.flush()
    os._exit(code)
