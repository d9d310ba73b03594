"""What `ldpt ledger show` and `ldpt ledger verify` report, as typed results.

``LedgerSummary`` (show) and ``LedgerCheck`` (verify) are read through the ledger's public
methods (``Ledger.show``, ``Ledger.verify``) and give ``to_dict()`` (the JSON shape of
``--format json``, kept stable) and ``to_frame()`` (a pandas DataFrame: one row per release, or
one row for the check).  Everything here is steward-only: the spend figures and counts depend on
the data.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .errors import LedgerDamagedError

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd


@dataclass(frozen=True)
class LedgerRelease:
    """One release recorded in the ledger."""

    id: int
    time: str
    eps_per_row: float
    subjects_charged: int
    lifetime_epsilon: float | None

    def to_dict(self) -> dict[str, Any]:
        return {"id": self.id, "time": self.time, "eps_per_row": self.eps_per_row,
                "subjects_charged": self.subjects_charged, "lifetime_epsilon": self.lifetime_epsilon}


@dataclass(frozen=True)
class LedgerSummary:
    """`ldpt ledger show`: the releases and the steward-only spend figures of a ledger."""

    ledger: str
    schema_version: int
    head: str
    eps_per_row_summed_over_releases: float
    release_list: tuple[LedgerRelease, ...]
    subjects: int
    steward_only: str
    spend_quantiles: dict[str, float] | None = None
    lifetime_epsilon: float | None = None
    near_cap: dict[str, int] | None = None
    least_remaining_eps: float | None = None

    @property
    def releases(self) -> int:
        return len(self.release_list)

    @classmethod
    def from_show(cls, d: Mapping[str, Any]) -> LedgerSummary:
        """The summary ``Ledger.show()`` returns, as a typed result."""
        return cls(ledger=str(d["ledger"]), schema_version=int(d["schema_version"]), head=str(d["head"]),
                   eps_per_row_summed_over_releases=float(d["eps_per_row_summed_over_releases"]),
                   release_list=tuple(LedgerRelease(int(r["id"]), str(r["time"]), float(r["eps_per_row"]),
                                                    int(r["subjects_charged"]),
                                                    None if r["lifetime_epsilon"] is None
                                                    else float(r["lifetime_epsilon"]))
                                      for r in d["release_list"]),
                   subjects=int(d["subjects"]), steward_only=str(d["steward_only"]),
                   spend_quantiles=dict(d["spend_quantiles"]) if "spend_quantiles" in d else None,
                   lifetime_epsilon=d.get("lifetime_epsilon") if "near_cap" in d else None,
                   near_cap=dict(d["near_cap"]) if "near_cap" in d else None,
                   least_remaining_eps=d.get("least_remaining_eps"))

    def to_dict(self) -> dict[str, Any]:
        """The JSON of `ldpt ledger show --format json` (the shape ``Ledger.show()`` has always had)."""
        out: dict[str, Any] = {
            "ledger": self.ledger, "schema_version": self.schema_version, "releases": self.releases,
            "head": self.head, "eps_per_row_summed_over_releases": self.eps_per_row_summed_over_releases,
            "release_list": [r.to_dict() for r in self.release_list], "subjects": self.subjects,
            "steward_only": self.steward_only,
        }
        if self.spend_quantiles is not None:
            out["spend_quantiles"] = dict(self.spend_quantiles)
        if self.near_cap is not None:
            out["lifetime_epsilon"] = self.lifetime_epsilon
            out["near_cap"] = dict(self.near_cap)
            out["least_remaining_eps"] = self.least_remaining_eps
        return out

    def to_frame(self) -> pd.DataFrame:
        """One row per release: id, time, eps_per_row, subjects_charged, lifetime_epsilon."""
        import pandas as pd

        cols = ["id", "time", "eps_per_row", "subjects_charged", "lifetime_epsilon"]
        return pd.DataFrame([r.to_dict() for r in self.release_list], columns=cols)


@dataclass(frozen=True)
class LedgerCheck:
    """`ldpt ledger verify`: is the hash chain intact (``ok``)?  ``damaged``: the file is empty, not
    a ledger or a damaged one (then ``detail`` says what, and ``releases`` is 0)."""

    ledger: str
    ok: bool
    releases: int
    first_broken: int | None = None
    detail: str = ""
    head: str | None = None
    damaged: bool = False

    def to_dict(self) -> dict[str, Any]:
        return {"ledger": self.ledger, "ok": self.ok, "releases": self.releases, "first_broken": self.first_broken,
                "detail": self.detail, "head": self.head, "damaged": self.damaged}

    def to_frame(self) -> pd.DataFrame:
        """One row: ledger, ok, releases, first_broken, detail, head, damaged."""
        import pandas as pd

        return pd.DataFrame([self.to_dict()])


def ledger_summary(path: Path | str) -> LedgerSummary:
    """Read the ledger at ``path`` (read-only) and summarize it; errors as ``Ledger.open`` raises them."""
    from .store import Ledger

    with Ledger.open(Path(path), create=False, readonly=True) as led:
        return LedgerSummary.from_show(led.show())


def ledger_check(path: Path | str) -> LedgerCheck:
    """Verify the ledger at ``path`` (read-only).  A damaged file is a failed check (``damaged``),
    never an exception; a missing one (or one that cannot be opened safely) raises as
    ``Ledger.open`` does."""
    from .store import Ledger

    try:
        with Ledger.open(Path(path), create=False, readonly=True) as led:
            res = led.verify()
            where = str(led.path)
    except LedgerDamagedError as err:
        return LedgerCheck(str(path), False, 0, detail=str(err), damaged=True)
    return LedgerCheck(where, bool(res.ok), int(res.releases), res.first_broken, str(res.detail), res.head)
