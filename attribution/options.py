"""One frozen options object for a run, validated in one place.

Every option of the command line and the Python API is checked here with the same message
template ("The 'linking' option must be one of … Got … instead."), so a bad value never
reaches the numerics. The options are written to the run's manifest as they are here.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any, get_args

from attribution._typing import Align, ExposureMode, Form, Linking, TestsMode
from attribution.errors import OptionError


def _choice(name: str, value: object, allowed: tuple[str, ...]) -> str:
    if value not in allowed:
        listed = ", ".join(repr(a) for a in allowed)
        msg = f"The {name!r} option must be one of {listed}. Got {value!r} instead."
        raise OptionError(msg)
    return str(value)


@dataclass(frozen=True)
class StaticWeight:
    """How the static (average) weight of each class is formed.

    ``window``: the portfolio's mean weight over the evaluation window (the static/dynamic
    split of Hsu, Kalesnik & Myers 2010; uses hindsight). ``expanding``: the mean of the
    weights of all earlier periods. ``trailing`` with ``periods=N``: the mean of the previous
    N periods (fewer at the start). In both ex-ante modes the first period uses its own weight,
    so its timing is 0.
    """

    mode: str = "window"
    periods: int | None = None

    @classmethod
    def parse(cls, text: str) -> StaticWeight:
        """Parse ``window``, ``expanding`` or ``trailing:N`` (N a positive integer)."""
        raw = str(text).strip().lower()
        if raw in ("window", "expanding"):
            return cls(mode=raw)
        if raw.startswith("trailing:"):
            tail = raw.split(":", 1)[1]
            if tail.isdigit() and int(tail) >= 1:
                return cls(mode="trailing", periods=int(tail))
        msg = (
            "The 'static' option must be 'window', 'expanding' or 'trailing:N' with N a "
            f"positive integer. Got {text!r} instead."
        )
        raise OptionError(msg)

    def __str__(self) -> str:
        return f"trailing:{self.periods}" if self.mode == "trailing" else self.mode


@dataclass(frozen=True)
class RunOptions:
    """Options of one run. Build with :meth:`RunOptions.build` to get every value checked."""

    static: StaticWeight = StaticWeight()
    form: Form = "bf"
    linking: Linking = "carino"
    align: Align = "none"
    weight_tolerance: float = 1e-4
    cash_class: str | None = None
    tests: TestsMode = "all"
    market: str = "policy"
    exposure: ExposureMode = "beta"
    beta_window: str = "full"
    pcm_lag: int = 1
    draws: int = 999
    seed: int = 20240611
    reference_hit_rate: float = 0.60
    reference_power: float = 0.50

    @classmethod
    def build(cls, **values: Any) -> RunOptions:
        """Check every value and return the frozen options; unknown names are an error."""
        known = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(values) - known)
        if unknown:
            msg = f"Unknown option(s) {', '.join(map(repr, unknown))}; known: {sorted(known)}."
            raise OptionError(msg)
        clean = {k: v for k, v in values.items() if v is not None}
        if "static" in clean and not isinstance(clean["static"], StaticWeight):
            clean["static"] = StaticWeight.parse(clean["static"])
        for name, alias in (
            ("form", Form),
            ("linking", Linking),
            ("align", Align),
            ("tests", TestsMode),
            ("exposure", ExposureMode),
        ):
            if name in clean:
                clean[name] = _choice(name, str(clean[name]).lower(), get_args(alias))
        if "weight_tolerance" in clean:
            tol = _number("weight_tolerance", clean["weight_tolerance"])
            if not (0 < tol < 1):
                msg = f"The 'weight_tolerance' option must be in (0, 1). Got {tol!r} instead."
                raise OptionError(msg)
            clean["weight_tolerance"] = tol
        for name, low in (("pcm_lag", 1), ("draws", 99)):
            if name in clean:
                clean[name] = _integer(name, clean[name], low)
        if "seed" in clean:
            clean["seed"] = _integer("seed", clean["seed"], 0)
        for name in ("reference_hit_rate", "reference_power"):
            if name in clean:
                val = _number(name, clean[name])
                if not (0 < val < 1):
                    msg = f"The {name!r} option must be in (0, 1). Got {val!r} instead."
                    raise OptionError(msg)
                clean[name] = val
        if "beta_window" in clean:
            clean["beta_window"] = _beta_window(str(clean["beta_window"]))
        if "market" in clean:
            clean["market"] = str(clean["market"])
        return cls(**clean)

    def to_dict(self) -> dict[str, Any]:
        """Plain values for the manifest."""
        out = dataclasses.asdict(self)
        out["static"] = str(self.static)
        return out


def _number(name: str, value: object) -> float:
    try:
        num = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        num = math.nan
    if not math.isfinite(num):
        msg = f"The {name!r} option must be a finite number. Got {value!r} instead."
        raise OptionError(msg)
    return num


def _integer(name: str, value: object, low: int) -> int:
    text = str(value).strip()
    if not text.lstrip("-").isdigit() or int(text) < low:
        msg = f"The {name!r} option must be an integer ≥ {low}. Got {value!r} instead."
        raise OptionError(msg)
    return int(text)


def _beta_window(text: str) -> str:
    raw = text.strip().lower()
    if raw == "full":
        return raw
    tail = raw.split(":", 1)[1] if raw.startswith("expanding:") else ""
    if tail.isdigit() and int(tail) >= 2:
        return raw
    msg = (
        "The 'beta_window' option must be 'full' or 'expanding:N' with N ≥ 2. "
        f"Got {text!r} instead."
    )
    raise OptionError(msg)
