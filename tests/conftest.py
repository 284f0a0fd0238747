"""Suite-wide test configuration: the hypothesis profiles.

Shared helpers (named tolerances, frame builders, random rosters, the loop
re-implementation of the engine) live in ``tests/tiltaudit_testkit.py``; loading this
conftest puts ``tests/`` on ``sys.path``, so test modules ``import tiltaudit_testkit``.
(Importing from ``conftest`` itself is unreliable once sub-folders carry their own
``conftest.py``: pytest re-registers the module name for each.)

Hypothesis run size is set by a profile (STYLE §14): ``fast`` (the default, sized for CI)
or ``thorough`` for a longer local search::

    HYPOTHESIS_PROFILE=thorough python -m pytest tests/unit/test_properties.py
"""

from __future__ import annotations

import os

from hypothesis import HealthCheck, settings

settings.register_profile(
    "fast",
    max_examples=20,
    deadline=None,  # an engine run is tens of milliseconds of polars set-up, not a hang
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    print_blob=True,
)
settings.register_profile(
    "thorough",
    max_examples=300,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    print_blob=True,
)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "fast"))
