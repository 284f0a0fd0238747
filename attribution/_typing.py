"""Every string option of the public API as a ``Literal`` alias, in one place."""

from typing import Literal

Linking = Literal["carino", "menchero", "grap", "frongello"]
Form = Literal["bf", "bhb"]
StaticMode = Literal["window", "expanding", "trailing"]
Align = Literal["none", "month", "quarter"]
TestsMode = Literal["all", "exact", "none"]
Severity = Literal["error", "warning"]
ReturnSource = Literal["reported", "segments", "index"]
ExposureMode = Literal["beta", "risky-weight"]
