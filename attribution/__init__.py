"""tiltaudit: holdings-based timing attribution for multi-asset portfolios.

The package splits each portfolio's active return against its policy mix into static
allocation, timing and selection (Brinson–Fachler form with a static/dynamic split of the
allocation effect), links the effects across periods, and tests whether the weight shifts
anticipated the next period's market excess return. ``attribution.run(...)`` is the Python
entry point; ``tiltaudit`` the command line.
"""

from typing import Any

__version__ = "0.1.0"


def run(**kwargs: Any) -> Any:
    """Run a roster in memory; see :func:`attribution.api.run`."""
    from attribution.api import run as _run

    return _run(**kwargs)


__all__ = ["__version__", "run"]
