"""Incremental runs: re-evaluate only the portfolios whose inputs changed since the last run.

Every run records fingerprints in its manifest:

* one per portfolio — a 64-bit digest of the portfolio's rows in holdings, policy,
  segment_returns and portfolio_returns (per table: the row count and the wrapping sum of
  each row's 64-bit hash — the XOR of its columns' hashes, each column with its own seed —
  so row order does not matter; then the tables' figures hashed together). A change to any
  of its rows changes it, save with a chance of the order of 2⁻⁶⁴;
* one shared — a SHA-256 of everything that affects every portfolio: index_returns, the
  riskless series, the run's options, the tool's version and the polars version (whose row
  hash is only stable within one version).

Fingerprints cost a pass of hashing over the inputs (about 0.1–0.2 s per 1,000 portfolios
of 12 classes × 240 months), so they are computed only by runs given ``--incremental`` or
``--full``: the nightly job's runs. With ``--incremental`` a run reads the previous manifest
in the output folder. When the
shared fingerprint is unchanged, a portfolio whose fingerprint is unchanged is not evaluated
again: its rows are copied from the previous tables. Everything else is evaluated, and what
spans the roster is always recomputed over the whole roster: q-values, verdicts, π0, the
orphan checks and the money tables. The tables then equal a full run's (the portfolio's
results depend only on its own inputs and the shared ones; resampling draws are seeded per
record, see :mod:`attribution.resampling`). Without a usable previous manifest, or when a
shared input or an option changed, everyone is evaluated and the manifest says why.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import polars as pl

from attribution import __version__

PID = "portfolio_id"
#: The tables a portfolio's fingerprint covers, in a fixed order.
FINGERPRINT_TABLES = ("holdings", "policy", "segment_returns", "portfolio_returns")
_SEED = 20_241_201


def portfolio_fingerprints(
    tables: Mapping[str, pl.DataFrame | None], ids: list[str]
) -> pl.DataFrame:
    """Fingerprint per portfolio of ``ids`` (module docstring): portfolio_id, fingerprint.

    A portfolio with no rows in a table gets count 0 and sum 0 for it, so adding its first
    row to any table changes its fingerprint.
    """
    out = pl.DataFrame({PID: ids}, schema={PID: pl.String})
    figures = []
    for name in FINGERPRINT_TABLES:
        frame = tables.get(name)
        n_col, h_col = f"_{name}_n", f"_{name}_h"
        if frame is None or frame.height == 0:
            out = out.with_columns(
                pl.lit(0, pl.UInt64).alias(n_col), pl.lit(0, pl.UInt64).alias(h_col)
            )
        else:
            values = [c for c in frame.columns if c != PID]
            # Column hashes combined by XOR cost half as much as hashing a struct of the row.
            row = pl.col(values[0]).hash(_SEED)
            for j, name_j in enumerate(values[1:], start=1):
                row = row ^ pl.col(name_j).hash(_SEED + j)
            per = frame.group_by(PID).agg(
                pl.len().cast(pl.UInt64).alias(n_col), row.sum().alias(h_col)
            )
            out = out.join(per, on=PID, how="left").with_columns(
                pl.col(n_col).fill_null(0), pl.col(h_col).fill_null(0)
            )
        figures += [n_col, h_col]
    digest = pl.struct(figures).hash(_SEED)
    return out.select(PID, pl.format("{}", digest).alias("fingerprint"))


def _frame_digest(frame: pl.DataFrame | None) -> str:
    # The shared tables are small (classes × periods): their sorted CSV text, whose floats
    # are written in shortest round-trip form, identifies them exactly.
    if frame is None:
        return "absent"
    text = frame.sort(frame.columns).write_csv()
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def shared_fingerprint(
    index_returns: pl.DataFrame, riskless: pl.DataFrame | None, options: Mapping[str, Any]
) -> str:
    """SHA-256 over the shared inputs, the run's options and the versions (module docstring)."""
    text = json.dumps(
        {
            "index_returns": _frame_digest(index_returns),
            "riskless": _frame_digest(riskless),
            "options": dict(options),
            "tiltaudit": __version__,
            "polars": pl.__version__,
        },
        sort_keys=True,
        default=str,
    )
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


@dataclass(frozen=True)
class PreviousRun:
    """What an incremental run needs of the previous run in the same folder."""

    folder: Path
    shared: str
    fingerprints: dict[str, str]

    def unchanged(self, current: pl.DataFrame) -> list[str]:
        """Ids of ``current`` (portfolio_id, fingerprint) whose fingerprint is as before."""
        before = pl.DataFrame(
            {PID: list(self.fingerprints), "_before": list(self.fingerprints.values())},
            schema={PID: pl.String, "_before": pl.String},
        )
        same = current.join(before, on=PID, how="inner").filter(
            pl.col("fingerprint") == pl.col("_before")
        )
        return same[PID].to_list()

    def table(self, name: str) -> pl.LazyFrame | None:
        """A previous output table, lazily (None when the run did not write it)."""
        from attribution.outputs import scan_output_table

        return scan_output_table(self.folder, name)


def load_previous(folder: Path, shared: str) -> tuple[PreviousRun | None, str]:
    """The previous run in ``folder`` if it can be reused, else None; and the reason.

    Usable when its manifest exists, records fingerprints, finished with exit code 0 or 3,
    has the same shared fingerprint and its tables are there.
    """
    manifest_path = folder / "manifest.json"
    if not manifest_path.is_file():
        return None, "no previous run in the output folder: every portfolio evaluated"
    try:
        manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
        recorded = manifest["fingerprints"]
        before_shared = recorded["shared"]
        portfolios = dict(recorded["portfolios"])
    except (OSError, ValueError, KeyError, TypeError):
        return None, "the previous manifest has no usable fingerprints: every portfolio evaluated"
    if before_shared != shared:
        return None, (
            "a shared input (index_returns, riskfree), an option or the version changed since "
            "the previous run: every portfolio evaluated"
        )
    from attribution.outputs import scan_output_table

    missing = [
        name
        for name in ("effects", "series", "summary", "summary_windows", "data_issues")
        if scan_output_table(folder, name) is None
    ]
    if missing:
        return (
            None,
            f"the previous run's {', '.join(missing)} table(s) are missing: every "
            "portfolio evaluated",
        )
    return PreviousRun(folder=folder, shared=shared, fingerprints=portfolios), ""


def with_incremental_note(result: Any, *, incremental: bool, reason: str) -> Any:
    """The run's result with a note saying how much an incremental run re-evaluated."""
    import dataclasses

    if not incremental:
        return result
    reused = result.reuse.get("reused", 0)
    evaluated = result.reuse.get("evaluated", 0)
    note = reason or (
        f"incremental: {evaluated} portfolio(s) re-evaluated, {reused} unchanged and copied "
        "from the previous run; roster-level figures recomputed"
    )
    reuse = {**result.reuse, "mode": "incremental", "note": note}
    return dataclasses.replace(result, notes=(*result.notes, note), reuse=reuse)
