"""Column setup: which input columns a release reads and how each is released (``ColumnPlan``),
the extract's schema, the keyed streams of each column, and the manifest's column entries."""

from __future__ import annotations

from dataclasses import dataclass, field

import pyarrow as pa

from ..errors import DataError, PolicyError
from ..keys import SecretKey
from ..joint import joint_entry
from ..manifest import ColumnEntry, OutputColumn, field_metadata
from ..policy import LoadedPolicy, ResolvedColumn
from ..random.bits import KeyedStream, SubjectPRF
from .kernel import ColumnSampler
from .memo import memo_note, memo_streams

# -- per-column statistics kept for the steward only ------------------------------------

@dataclass
class ColumnDiagnostics:
    missing: int = 0
    filled: int = 0
    unknown_as_other: int = 0
    missing_as_category: int = 0
    clipped_low: int = 0
    clipped_high: int = 0

    def as_dict(self) -> dict[str, int]:
        return {k: v for k, v in self.__dict__.items()}


WARN_SHARE = 0.01  # the steward is warned when more than this share of a column's rows was changed before randomizing


def _share(count: int, rows: int) -> str:
    return f"{count} of {rows} rows ({count / max(rows, 1):.1%})"


def counts_text(plan: ColumnPlan, rows: int) -> str | None:
    """How many of the column's values were changed before randomizing (steward-only: these
    counts depend on the data), e.g. ``age: 1500 clipped high (15.0%)``; None when none was."""
    if plan.members is not None:
        texts = [t for t in (counts_text(m, rows) for m in plan.members) if t is not None]
        return "; ".join(texts) if texts else None
    d, rc = plan.diag, plan.rc
    parts = []
    for count, what, note in ((d.clipped_low, "clipped low", ""), (d.clipped_high, "clipped high", ""),
                              (d.filled, "missing and filled", ""),
                              (d.unknown_as_other, "unknown", ", released as <other>"),
                              (d.missing_as_category, "missing", ", released as <missing>"
                               if rc.type == "categorical" else ", released as its own answer")):
        if count:
            parts.append(f"{count} {what} ({count / max(rows, 1):.1%}{note})")
    return f"{rc.name}: " + ", ".join(parts) if parts else None


def column_warnings(plan: ColumnPlan, rows: int) -> list[str]:
    """The steward's warnings for a column whose estimand the encoding changed for more than
    WARN_SHARE of the rows (clipped into the bounds, missing values filled, categories not in
    the domain), each saying what to do.  Only counts and the policy's own values (bounds, fill,
    category names) appear, never a value of the data."""
    if plan.members is not None:
        return [w for m in plan.members for w in column_warnings(m, rows)]
    d, rc, name = plan.diag, plan.rc, plan.rc.name
    limit = WARN_SHARE * rows
    out = []
    if rc.type in ("numeric", "binned"):
        lo, hi = rc.config.domain
        field = "bins" if rc.type == "binned" else "bounds"
        for count, side, edge in ((d.clipped_low, "below", lo), (d.clipped_high, "above", hi)):
            if count > limit:
                out.append(f"column {name!r}: {_share(count, rows)} were {side} its bounds [{lo:g}, {hi:g}] and were "
                           f"released as {edge:g}, so every statistic of {name!r} describes the clipped values (a "
                           f"mean or share near that end is pulled toward {edge:g}). If such values are real, widen "
                           f"the column's {field} in the policy; otherwise check the input.")
        if d.filled > limit:
            fill = getattr(rc.config.missing, "fill", None)
            fill_text = f"{fill:g} (missing: {{fill: {fill:g}}})" if isinstance(fill, (int, float)) else "the fill"
            out.append(f"column {name!r}: {_share(d.filled, rows)} were missing and were released as "
                       f"{fill_text}, so every statistic of {name!r} describes the column "
                       "with missing values replaced by the fill, not the rows that have a value. To release the "
                       f"share missing and the statistics among rows with a value, set missing: as-answer for {name!r} "
                       "in the policy; otherwise fill the input where the value is known, or choose a fill that suits "
                       "the analysis and tell partners what it does (the manifest records it).")
    if d.unknown_as_other > limit:
        out.append(f"column {name!r}: {_share(d.unknown_as_other, rows)} held a category not among its declared "
                   "categories and were released as '<other>', which partners cannot tell apart. If those categories "
                   f"matter, declare them in the policy's categories of {name!r}.")
    return out


@dataclass
class ColumnPlan:
    rc: ResolvedColumn
    fields: list[pa.Field]
    stream: KeyedStream | None = None
    draw_stream: KeyedStream | None = None  # mechanisms with a variable number of draws per row (rejection samplers)
    diag: ColumnDiagnostics = field(default_factory=ColumnDiagnostics)
    sample_index: int | None = None  # strategy sample: this column's position among the d privatized columns
    reported: int = 0                # strategy sample: cells reported so far (private diagnostics only)
    memo: SubjectPRF | None = None         # memoize: words keyed by (subject, value code), not (nonce, row)
    memo_offset: SubjectPRF | None = None  # memoize on a numeric column: per-subject offset of the coarse rounding
    layer_stream: KeyedStream | None = None  # memoize with rerandomize_epsilon: the second layer's fresh words
    placeholder_stream: KeyedStream | None = None  # --allow-partial: the placeholder values of held-back rows
    members: list[ColumnPlan] | None = None  # a joint group: its member columns' plans (encoding, diagnostics)

    def values(self, batch: pa.RecordBatch) -> pa.Array:
        """The input values this plan encodes: its column of ``batch``; for a joint group, its members'
        columns as the fields of one struct array (``encode`` combines their codes)."""
        if self.members is None:
            return batch.column(self.rc.name)
        arrays = [batch.column(m.rc.name) for m in self.members]
        arrays = [a.combine_chunks() if isinstance(a, pa.ChunkedArray) else a for a in arrays]
        return pa.StructArray.from_arrays(arrays, names=[m.rc.name for m in self.members])

    def sum_member_diagnostics(self) -> None:
        """A joint group's diagnostics: the sums of its members' (which keep their own)."""
        if self.members is None:
            return
        totals = [m.diag.as_dict() for m in self.members]
        self.diag = ColumnDiagnostics(**{k: sum(t[k] for t in totals) for k in totals[0]})


def input_plans(plans: list[ColumnPlan]) -> list[ColumnPlan]:
    """The plans of input columns: a joint group's members in its place (checks of input columns)."""
    return [m for p in plans for m in (p.members or [p])]



# -- planning -----------------------------------------------------------------------------

def plan_columns(policy: LoadedPolicy, input_columns: list[str], source: str) -> list[ColumnPlan]:
    by_name = policy.by_name
    subject = policy.policy.subject_key
    if subject is not None and subject not in input_columns:
        raise DataError(f"policy {policy.source}, field 'subject_key': column {subject!r} is not a column of input "
                        f"{source} (its columns: {', '.join(map(repr, input_columns))}). Name the input column that "
                        "identifies a person, or remove subject_key and memoize from the policy.")
    absent = [n for n, rc in by_name.items() if n not in input_columns and rc.members is None]
    if absent:
        raise DataError(f"the policy names column(s) {', '.join(map(repr, absent))} that input {source} does not have "
                        f"(its columns: {', '.join(map(repr, input_columns))}). Fix the names in the policy or "
                        "remove those entries.")
    unlisted = [n for n in input_columns if n not in by_name and n != subject]  # the subject: never released
    if unlisted and policy.policy.unlisted == "error":
        raise DataError(f"input {source} has column(s) {', '.join(map(repr, unlisted))} that the policy does not "
                        "name. Add each one to the policy (type: drop to leave it out), or set unlisted: drop.")
    plans: list[ColumnPlan] = []
    groups = {rc.name: rc for rc in policy.columns if rc.members is not None}
    for name in input_columns:
        rc = by_name.get(name)
        if rc is None or rc.type == "drop" or name == subject:
            continue
        if rc.group is not None:   # a joint group's member: the group's plan, at its first member's place
            g = groups.pop(rc.group, None)
            if g is not None:
                assert g.mechanism is not None and g.members is not None
                plans.append(ColumnPlan(g, g.mechanism.output_fields(g.name),
                                        members=[ColumnPlan(m, []) for m in g.members]))
            continue
        if rc.type == "public":
            plans.append(ColumnPlan(rc, []))  # fields filled from the input schema
        else:
            assert rc.mechanism is not None
            plans.append(ColumnPlan(rc, rc.mechanism.output_fields(name)))
    if not plans:
        raise PolicyError(f"policy {policy.source}: every column is dropped; there is nothing to release.")
    return plans


def output_schema(plans: list[ColumnPlan], input_schema: pa.Schema, fmt_in: str) -> pa.Schema:
    fields: list[pa.Field] = []
    for p in plans:
        if p.rc.type == "public":
            t = pa.string() if fmt_in == "csv" else input_schema.field(p.rc.name).type
            p.fields = [pa.field(p.rc.name, t)]
        fields.extend(p.fields)
    fields = described_fields(plans)
    names = [f.name for f in fields]
    clash = sorted({n for n in names if names.count(n) > 1})
    if clash:
        raise DataError(f"output column name(s) {', '.join(map(repr, clash))} would be written twice (an input "
                        "column has the same name as a column another mechanism adds, such as NAME__hash). "
                        "Rename the input column.")
    return pa.schema(fields)


def described_fields(plans: list[ColumnPlan]) -> list[pa.Field]:
    """Every output field with the Arrow field metadata of its manifest column entry
    (``manifest.field_metadata``: meaning, mechanism, spec; a public column says it is released in
    the clear), so that a Parquet extract explains itself.  The text is the manifest's own, made
    from the policy only, and the same on every route that writes the extract (one file, dataset
    parts, either engine: they all write this schema).  ``plans`` keep their fields so described."""
    out: list[pa.Field] = []
    for p, entry in zip(plans, column_entries(plans)):
        p.fields = [f.with_metadata(field_metadata(entry, o)) for f, o in zip(p.fields, entry.outputs)]
        out.extend(p.fields)
    return out


def attach_randomness(plans: list[ColumnPlan], policy: LoadedPolicy, key: SecretKey,
                      nonce: str) -> ColumnSampler | None:
    """Give every privatized column its keyed streams (row words; a rejection sampler's draws;
    a memoized column's per-subject words); under strategy sample, the column sampler."""
    for p in plans:
        if p.rc.mechanism is not None:
            p.stream = KeyedStream(key, nonce, "column", p.rc.name)
            p.placeholder_stream = KeyedStream(key, nonce, "placeholder", p.rc.name)
            if p.rc.mechanism.variable_draws:
                p.draw_stream = KeyedStream(key, nonce, "column-draws", p.rc.name)
            if p.rc.memoize:
                p.memo, p.memo_offset = memo_streams(key, p.rc)
            if p.rc.rerandomize_epsilon is not None:
                p.layer_stream = KeyedStream(key, nonce, "second-layer", p.rc.name)
    if policy.strategy != "sample":
        return None
    order = policy.policy.privatized_columns  # policy order: the choice never depends on the input's layout
    sampler = ColumnSampler(KeyedStream(key, nonce, "sampling"), len(order), policy.policy.reported_columns)
    for p in plans:
        if p.rc.mechanism is not None:
            p.sample_index = order.index(p.rc.name)
    return sampler


def read_columns(plans: list[ColumnPlan], policy: LoadedPolicy) -> tuple[list[str], str | None]:
    """The input columns a release reads, and the subject column (only with memoized columns)."""
    read_cols = [p.rc.name for p in input_plans(plans)]
    subject_key = policy.policy.subject_key if any(p.memo is not None for p in plans) else None
    if subject_key is not None:
        read_cols.append(subject_key)
    return read_cols, subject_key


def column_entries(plans: list[ColumnPlan], report_rate: float = 1.0) -> list[ColumnEntry]:
    out = []
    for p in plans:
        rc = p.rc
        if rc.type == "public":
            out.append(ColumnEntry(name=rc.name, type="public", outputs=[OutputColumn(
                name=rc.name, dtype=str(p.fields[0].type), meaning="copied from the input as is: NOT privatized")],
                note="released in the clear; local differential privacy does not protect this column"))
            continue
        m = rc.mechanism
        assert m is not None and rc.type != "drop"  # plan_columns leaves dropped columns out
        outs = [OutputColumn(name=f.name, dtype=str(f.type), meaning=m.output_meaning(f.name))
                for f in p.fields]
        if rc.members is not None:
            out.append(joint_entry(rc, outs, report_rate))
            continue
        cfg = rc.config
        out.append(ColumnEntry(
            name=rc.name, type=rc.type, mechanism=m.to_spec(), chosen_because=rc.chosen_because,
            labels=list(rc.labels) if rc.labels else None,
            bins=[float(b) for b in cfg.bins] if rc.type == "binned" else None,
            outputs=outs, report_rate=report_rate, note=memo_note(rc) if rc.memoize else None))
    return out
