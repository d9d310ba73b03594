"""Joint groups: several categorical (or binned) columns randomized as one report over their
product domain (policy section ``joint``; docs/formulas.md section 22).

A group's members are encoded as on their own (categories, bins, <missing>, <other>), and their
codes combined into one product code in mixed radix, the first member most significant: with
domain sizes k_1..k_r, cell (c_1..c_r) has code ((c_1 k_2 + c_2) k_3 + c_3) ...  One frequency
oracle over the K = k_1...k_r cells randomizes it at the sum of the members' eps (the same
automatic rule as a categorical column picks it).  So a cross-tab cell of two members is a cell
of one report (M. Cormode, T. Kulkarni, D. Srivastava, "Marginal Release Under Local
Differential Privacy", SIGMOD 2018; Z. Zhang, T. Wang, N. Li, S. He, J. Chen, "CALM: Consistent
Adaptive Local Marginal for Marginal Release under Local Differential Privacy", CCS 2018), not a
product of two independent reports each at its own eps.

Decoding.  Every row's report gives the oracle's per-row unbiased estimates u (one per cell).
A member's marginal share of value a is L u, the sum of the cells with that value (a linear map
L), so its per-row estimate is unbiased, and the sample covariance of the per-row marginals is
L Cov L^T for Cov the sample covariance of the per-row cell estimates (what the decoder of a
categorical column reports, docs/formulas.md section 0.3).  Two members' cross-tab is the pair's
marginal of the cells (the cells themselves for a group of two).  A member's cross-tab with a
column outside the group multiplies the member's per-row marginal with the other column's per-row
estimate: unbiased because the group's report and the other column's are randomized
independently given the row (docs/formulas.md section 12).

Nothing here names a mechanism: the group's oracle is asked through the mechanism contract.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa

from .mechanisms.decoders import FrequencyDecoder, moments

if TYPE_CHECKING:
    from .manifest import ColumnEntry, OutputColumn
    from .mechanisms.categorical import FrequencyOracle
    from .policy import ResolvedColumn

#: per-row cell estimates are computed in slices of at most this many values (rows x cells)
SLICE_VALUES = 1 << 21


# -- release: codes and the manifest entry ------------------------------------------------------

def combine_codes(codes: list[np.ndarray], sizes: list[int]) -> np.ndarray:
    """The product code of the members' codes (mixed radix, the first member most significant)."""
    out = np.zeros(len(codes[0]), dtype=np.int64)
    for c, k in zip(codes, sizes):
        out = out * k + np.asarray(c, dtype=np.int64)
    return out


def joint_entry(rc: ResolvedColumn, outputs: list[OutputColumn], report_rate: float) -> ColumnEntry:
    """The manifest entry of a joint group: its oracle's spec over the product domain, its members
    (names, code labels, bins) in order, and a note saying what a cell is.  Only the policy's text."""
    from .manifest import ColumnEntry, JointMember

    assert rc.mechanism is not None and rc.members is not None
    members = [JointMember(name=m.name, type="binned" if m.type == "binned" else "categorical",
                           labels=m.domain_labels,
                           bins=[float(b) for b in m.config.bins] if m.type == "binned" else None)
               for m in rc.members]
    names = ", ".join(m.name for m in rc.members)
    sizes = " x ".join(str(len(m.labels)) for m in members)
    note = (f"joint group of {names}: one report per row over the {sizes} = {len(rc.labels)} cells of their "
            "product domain (a cell's label is the JSON array of its members' labels; the first member varies "
            f"slowest), randomized at eps {rc.mechanism.epsilon:g}, the sum of the members' eps. The members are "
            "not written separately: their marginals and cross-tabs are sums of the cells")
    return ColumnEntry(name=rc.name, type="joint", mechanism=rc.mechanism.to_spec(), chosen_because=rc.chosen_because,
                       outputs=outputs, report_rate=report_rate, note=note, members=members)


def check_members(entry: ColumnEntry, built: Any) -> str | None:
    """Why a joint entry's members do not fit its mechanism (None when they do): the mechanism's
    categories must be the product of the members' labels, in order."""
    from .policy import joint_label

    members = entry.members or []
    if len(members) < 2:
        return "a joint group has two members or more"
    if len({m.name for m in members}) != len(members):
        return "a member is listed twice"
    for m in members:
        if m.type == "binned" and (m.bins is None or len(m.bins) < 3):
            return f"binned member {m.name!r} needs its bin edges"
    cells = math.prod(len(m.labels) for m in members)
    cats = list(getattr(built, "categories", ()))
    if len(cats) != cells:
        return f"the members have {cells} cells, the mechanism {len(cats)} categories"
    first = [joint_label([m.labels[0] for m in members]), joint_label([m.labels[-1] for m in members])]
    if [cats[0], cats[-1]] != first:
        return "the mechanism's categories are not the product of the members' labels"
    return None


# -- decoding ------------------------------------------------------------------------------------

@dataclass
class Layout:
    """A joint group as the decoder reads it: the oracle, the members' names, sizes and labels."""

    oracle: FrequencyOracle
    names: list[str]
    sizes: list[int]
    labels: list[list[str]]

    @classmethod
    def of(cls, entry: ColumnEntry, oracle: FrequencyOracle) -> Layout:
        members = entry.members or []
        return cls(oracle, [m.name for m in members], [len(m.labels) for m in members],
                   [list(m.labels) for m in members])

    def index(self, member: str) -> int:
        return self.names.index(member)

    def project(self, u: np.ndarray, keep: tuple[int, ...]) -> np.ndarray:
        """Per-row cell estimates (n, K) summed over the members not in ``keep``: shape (n, k_keep...)."""
        cube = u.reshape((u.shape[0], *self.sizes))
        drop = tuple(1 + i for i in range(len(self.sizes)) if i not in keep)
        out = cube.sum(axis=drop) if drop else cube
        order = sorted(keep)
        if list(keep) != order:   # the members in the order asked
            out = np.moveaxis(out, [1 + order.index(i) for i in keep], list(range(1, len(keep) + 1)))
        return out

    def row_slices(self, arrays: list[pa.Array]) -> list[np.ndarray]:
        """The per-row cell estimates of ``arrays``, in slices of rows (memory bounded by SLICE_VALUES)."""
        n = len(arrays[0])
        step = max(1, SLICE_VALUES // max(self.oracle.k, 1))
        return [np.asarray(self.oracle.row_estimates([a.slice(s, min(step, n - s)) for a in arrays]), dtype=float)
                for s in range(0, n, step)]


@dataclass
class MemberView:
    """One member of a joint group as a frequency column of its own, for the two-column statistics
    (cross-tab with a column outside the group, grouped means): its per-row estimate of each value
    is the sum of the group's per-row cell estimates with that value (``row_estimates``)."""

    layout: Layout
    member: str

    @property
    def categories(self) -> list[str]:
        return self.layout.labels[self.layout.index(self.member)]

    @property
    def k(self) -> int:
        return len(self.categories)

    def row_estimates(self, arrays: list[pa.Array]) -> np.ndarray:
        i = self.layout.index(self.member)
        parts = [self.layout.project(u, (i,)) for u in self.layout.row_slices(arrays)]
        return np.concatenate(parts) if parts else np.zeros((0, self.k))


@dataclass
class GroupStats:
    """The sufficient statistics of a group's member marginals: per member, the sums of the per-row
    marginal estimates and of their outer products (the covariance L Cov L^T), over reporting rows."""

    layout: Layout
    n: int = 0
    sums: list[np.ndarray] = field(default_factory=list)
    outer: list[np.ndarray] = field(default_factory=list)

    def __post_init__(self) -> None:
        if not self.sums:
            self.sums = [np.zeros(k) for k in self.layout.sizes]
            self.outer = [np.zeros((k, k)) for k in self.layout.sizes]

    def add(self, arrays: list[pa.Array]) -> GroupStats:
        for u in self.layout.row_slices(arrays):
            self.n += u.shape[0]
            for i in range(len(self.layout.sizes)):
                mi = self.layout.project(u, (i,))
                self.sums[i] += mi.sum(axis=0)
                self.outer[i] += mi.T @ mi
        return self

    def merge(self, other: GroupStats) -> GroupStats:
        self.n += other.n
        for i in range(len(self.sums)):
            self.sums[i] += other.sums[i]
            self.outer[i] += other.outer[i]
        return self

    def member(self, name: str) -> MemberDecoder:
        return MemberDecoder(MemberView(self.layout, name), group=self, index=self.layout.index(name))  # type: ignore[arg-type]


@dataclass
class MemberDecoder(FrequencyDecoder):
    """A member's marginal read off its group's statistics, with the interface of a categorical
    column's decoder (shares, SEs, intervals, the covariance): what ``estimate`` reports for it."""

    group: GroupStats | None = None
    index: int = 0

    def __post_init__(self) -> None:
        assert self.group is not None
        self.n = self.group.n

    def add(self, arrays: list[pa.Array]) -> MemberDecoder:
        raise TypeError("a member's marginal is read off its group's statistics; add the group's reports there")

    def sums(self) -> tuple[np.ndarray, np.ndarray]:
        assert self.group is not None
        return self.group.sums[self.index], np.diag(self.group.outer[self.index]).copy()

    def estimates(self) -> tuple[np.ndarray | None, np.ndarray | None]:
        total, sq = self.sums()
        return moments(total, sq, self.n)

    def covariance(self) -> np.ndarray:
        """The sample covariance of the per-row marginal estimates over n: L Cov L^T."""
        assert self.group is not None
        n, s = self.n, self.group.sums[self.index]
        if n < 2:
            return np.full((s.size, s.size), np.nan)
        return (self.group.outer[self.index] - np.outer(s, s) / n) / ((n - 1) * n)


# -- planning: small-share n*Var, joint report vs separate columns ----------------------------------

def small_share_nvar(oracle: FrequencyOracle) -> float:
    """n * Var of one share near 0 (the per-value noise q*(1-q*)/(p*-q*)^2, formulas section 0.3)."""
    return float(oracle.approx_variance())


def product_cell_nvar(oracles: list[FrequencyOracle]) -> float:
    """n * Var of a small cross-tab cell estimated as the average of products of independent per-row
    estimates (one report per column): as the share tends to 0 the product's second moment is the
    product of the per-column noise variances (docs/formulas.md section 22)."""
    return float(math.prod(small_share_nvar(o) for o in oracles))


def simulated_marginal_nvar(oracle: FrequencyOracle, sizes: list[int], member: int, rows: int,
                            uniform: bool = False, key_label: str = "plan-joint") -> float:
    """n * Var (the noise of the report, for fixed data) of one marginal share of member ``member`` read
    off the group's cells (the sum of the per-row cell estimates with that value, value 0), by
    simulation under the public planning key: ``rows`` reports of inputs spread evenly over the cells
    whose member value is not 0 (a share near 0, ``uniform`` False), or over all cells (every value's
    share 1 / k, ``uniform`` True).  The sample variance of the per-row marginal estimates less the
    spread of the true indicators f (1 - f).  A simulation, so an approximation (relative SE about
    sqrt(2 / rows) for light-tailed per-row estimates); formulas section 22 says why."""
    from .keys import SecretKey
    from .random import KeyedStream

    K = math.prod(sizes)
    stride = math.prod(sizes[member + 1:])
    cells = np.arange(K)
    pool = cells if uniform else cells[(cells // stride) % sizes[member] != 0]
    x = pool[np.arange(rows) % pool.size]
    words = KeyedStream(SecretKey(bytes(range(32))), "0" * 32, key_label, str(member)).words(0, rows,
                                                                                           oracle.words_per_row)
    layout = Layout(oracle, [str(i) for i in range(len(sizes))], list(sizes), [[str(j) for j in range(k)]
                                                                              for k in sizes])
    stats = GroupStats(layout).add(oracle.randomize(x, words))
    total, sq = stats.sums[member][0], stats.outer[member][0, 0]
    f = float(np.mean((x // stride) % sizes[member] == 0))
    sample_var = (sq - total * total / rows) / (rows - 1)
    return float(sample_var - f * (1 - f) * rows / (rows - 1))
