"""tiltaudit: holdings-based timing attribution for multi-asset portfolios.

The package splits each portfolio's active return against its policy mix into static
allocation, timing and selection (Brinson–Fachler form with a static/dynamic split of the
allocation effect), links the effects across periods, and tests whether the weight shifts
anticipated the next period's market excess return.
"""

__version__ = "0.1.0"
