"""Validation of imported tables, column by column, before anything touches the database.

:func:`validate_tables` checks everything that needs no database: header,
required values, allowed values, units and ranges, dates, per-table rules
(koff *or* residence time, bounds around their estimate, tmax for oral PK),
conflicting duplicates; it converts quantities to SI and computes each
measurement's content hash.  Every problem is collected, never raised one at a
time.  Checks against stored data (references, stage changes) follow in
:mod:`tracker.services.importing`.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..domain import canonical
from ..errors import InputError
from .columns import parse_quantity_column
from .export import FORMULA_TRIGGERS, formula_like
from .names import name_key
from .reading import RawTable
from .specs import ORDER, SPECS, TableSpec

_ISO_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")
KD_CONSISTENCY_FOLD = 3.0  # warn when a given KD and koff/kon disagree by more than this (common practice)
META = ("_label", "_line", "_source_name", "_order")


@dataclass
class Validated:
    """Validated rows of every table (DataFrames keyed by table), and all problems found."""

    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    files: dict[str, list[str]] = field(default_factory=dict)
    errors: list[InputError] = field(default_factory=list)
    warnings: list[InputError] = field(default_factory=list)

    @property
    def rows(self) -> int:
        return int(sum(len(df) for df in self.tables.values()))


def _err(label: str, line: int | None, column: str | None, message: str) -> InputError:
    return InputError(message, file=label, line=int(line) if line is not None else None, column=column)


def _check_header(raw: RawTable, spec: TableSpec) -> list[InputError]:
    errors = []
    have = list(raw.cells.columns)
    for name in spec.required:
        if name not in have:
            errors.append(raw.error(raw.header_line, name, f"missing required column (the header must name: {', '.join(spec.required)})"))
    if spec.name == "kinetics" and "koff" not in have and "residence_time" not in have:
        errors.append(raw.error(raw.header_line, "koff", "missing column: give koff or residence_time"))
    for name in have:
        if name not in spec.names:
            errors.append(raw.error(raw.header_line, name, f"unknown column for {spec.name} (allowed: {', '.join(spec.names)})"))
    return errors


def _frame(raws: list[RawTable], spec: TableSpec, order_of: dict[str, int]) -> tuple[pd.DataFrame, list[InputError]]:
    errors: list[InputError] = []
    parts = []
    for raw in raws:
        if raw.errors:
            continue
        header_errors = _check_header(raw, spec)
        if header_errors:
            errors.extend(header_errors)
            continue
        df = raw.cells.reindex(columns=list(spec.names)).astype(object)
        df = df.where(df.notna(), None)
        df["_label"] = raw.label
        df["_line"] = np.asarray(raw.lines, dtype=np.int64)
        df["_source_name"] = raw.source_name
        df["_order"] = order_of[raw.label]
        parts.append(df)
    if not parts:
        return pd.DataFrame(columns=list(spec.names) + list(META)), errors
    return pd.concat(parts, ignore_index=True), errors


class Occurrences:
    """How often each row payload of one table has been seen, across the chunks of a large file.

    Keeps a sorted array of 64-bit BLAKE2b digests of the payloads and their
    counts (16 bytes per distinct row), so numbering a chunk's replicates
    0, 1, ... continues where the previous chunk stopped, in bounded memory.
    """

    def __init__(self) -> None:
        self.keys = np.empty(0, dtype=np.uint64)
        self.counts = np.empty(0, dtype=np.int64)

    def number(self, payloads: list[str]) -> np.ndarray:
        """The occurrence number of each payload (0 for its first appearance in the whole table)."""
        blake = hashlib.blake2b
        keys = np.fromiter((int.from_bytes(blake(p.encode(), digest_size=8).digest(), "little") for p in payloads),
                           dtype=np.uint64, count=len(payloads))
        within = pd.Series(keys).groupby(keys, sort=False).cumcount().to_numpy(dtype=np.int64)
        prev = np.zeros(len(keys), dtype=np.int64)
        if len(self.keys):
            pos = np.minimum(np.searchsorted(self.keys, keys), len(self.keys) - 1)
            hit = self.keys[pos] == keys
            prev[hit] = self.counts[pos[hit]]
        u, c = np.unique(keys, return_counts=True)
        allk = np.concatenate([self.keys, u])
        allc = np.concatenate([self.counts, c.astype(np.int64)])
        order = np.argsort(allk, kind="stable")
        allk, allc = allk[order], allc[order]
        self.keys, first = np.unique(allk, return_index=True)
        self.counts = np.add.reduceat(allc, first) if len(allk) else allc
        return prev + within


def validate_tables(raws: list[RawTable], occurrences: Occurrences | None = None) -> Validated:
    """Validate every table read for one import; see the module docstring.

    ``occurrences`` continues the replicate numbering of an earlier chunk of the
    same table (see :class:`Occurrences`); ``None`` numbers within ``raws``.
    """
    out = Validated()
    order_of = {raw.label: i for i, raw in enumerate(raws)}
    for name in ORDER:
        mine = [r for r in raws if r.table == name]
        if not mine:
            continue
        spec = SPECS[name]
        out.files[name] = [r.label for r in mine]
        df, errors = _frame(mine, spec, order_of)
        out.errors.extend(errors)
        df, errors, warnings = _validate_rows(df, spec, occurrences)
        out.errors.extend(errors)
        out.warnings.extend(warnings)
        out.tables[name] = df
    out.errors.sort(key=lambda e: _sort_key(e, order_of))
    out.warnings.sort(key=lambda e: _sort_key(e, order_of))
    return out


def _sort_key(e: InputError, order_of: dict[str, int]):
    loc = e.location
    if loc is None:
        return (-1, 0, "")
    return (order_of.get(loc.file, -1), loc.line or 0, loc.column or "")


def _validate_rows(df: pd.DataFrame, spec: TableSpec, occurrences: Occurrences | None = None) -> tuple[pd.DataFrame, list[InputError], list[InputError]]:
    errors: list[InputError] = []
    warnings: list[InputError] = []
    bad = np.zeros(len(df), dtype=bool)
    labels = df["_label"].to_numpy()
    lines = df["_line"].to_numpy()

    def flag(positions, column: str, message_or_fn) -> None:
        for pos in positions:
            msg = message_or_fn(pos) if callable(message_or_fn) else message_or_fn
            errors.append(_err(labels[pos], lines[pos], column, msg))
            bad[pos] = True

    for col in spec.columns:
        series = df[col.name]
        cells = series.to_numpy(dtype=object)
        missing = pd.isna(cells)
        texts = cells[~missing].tolist()
        try:
            joined = "".join(texts)  # every cell text: one scan for NUL, lengths only if one is too long
        except TypeError:  # a cell that is not text (not from the readers): check cell by cell
            joined = None
        if joined is None or "\x00" in joined:
            nul = series.map(lambda v: isinstance(v, str) and "\x00" in v).to_numpy(dtype=bool)
            flag(np.flatnonzero(nul), col.name, "NUL character (byte 0x00) in the cell; remove it")
        # formula-like cells (OWASP "CSV Injection"): one C-speed scan of the column, cell by cell only on a hit
        starts = None if joined is None else "\x1f" + "\x1f".join(texts)
        if starts is None or any("\x1f" + ch in starts for ch in FORMULA_TRIGGERS):
            formula = series.map(lambda v: isinstance(v, str) and formula_like(v)).to_numpy(dtype=bool)
            flag(np.flatnonzero(formula), col.name,
                 lambda p, s=series: f"{s.iloc[p][:40]!r} starts with {s.iloc[p][0]!r}, which a spreadsheet runs as a formula; "
                                     "remove the leading character")
        if col.required:
            flag(np.flatnonzero(missing), col.name, "missing value (required)")
        if col.kind in ("text", "ref"):
            if joined is None or (len(joined) > col.max_len and max(map(len, texts)) > col.max_len):
                lengths = series.map(lambda v: len(v) if isinstance(v, str) else 0).to_numpy()
                flag(np.flatnonzero(lengths > col.max_len), col.name, f"longer than {col.max_len} characters")
        elif col.kind == "enum":
            # one canonical() per distinct text, mapped back by code (-1 = empty cell)
            codes, uniques = pd.factorize(cells)
            mapped = [canonical(v, col.choices) for v in uniques.tolist()]
            unknown = (codes >= 0) & np.array([m is None for m in mapped] + [False], dtype=bool)[codes]
            flag(np.flatnonzero(unknown), col.name, lambda p, s=series, c=col: f"unknown {c.name} {s.iloc[p]!r} (allowed: {', '.join(c.choices)})")
            df[col.name] = pd.Series(np.array(mapped + [None], dtype=object)[codes], index=df.index, dtype=object)
        elif col.kind == "date":
            codes, uniques = pd.factorize(cells)
            u = pd.Series(uniques, dtype=object)
            shaped_u = np.array([bool(_ISO_DATE.match(v)) if isinstance(v, str) else False for v in uniques.tolist()], dtype=bool)
            parsed_u = pd.to_datetime(u.where(shaped_u), format="%Y-%m-%d", errors="coerce")
            ok_u = shaped_u & parsed_u.notna().to_numpy()
            wrong = (codes >= 0) & ~np.append(ok_u, True)[codes]
            flag(np.flatnonzero(wrong), col.name, lambda p, s=series: f"not a date: {s.iloc[p]!r} (write YYYY-MM-DD)")
            dates = [d.date() if not pd.isna(d) else None for d in parsed_u] + [None]
            df[col.db] = pd.Series(np.array(dates, dtype=object)[codes], index=df.index, dtype=object)
        elif col.is_quantity:
            res = parse_quantity_column(series, col.kind, positive=col.positive, low=col.low, high=col.high)
            for pos, msg in res.errors:
                errors.append(_err(labels[pos], lines[pos], col.name, msg))
                bad[pos] = True
            for pos, msg in res.warnings:
                warnings.append(_err(labels[pos], lines[pos], col.name, msg))
            if col.db:
                df[col.db] = res.si
                df[col.text_db] = series
            else:
                df[f"_{col.name}_si"] = res.si

    if spec.name == "kinetics":
        _kinetics_rules(df, flag, warnings, labels, lines)
    if spec.name == "compounds" and "smiles" in df.columns:
        _smiles_rules(df, flag)
    if spec.name == "pk":
        oral_no_tmax = ((df["route"] == "oral") & df["tmax"].isna()).to_numpy(dtype=bool)
        flag(np.flatnonzero(oral_no_tmax), "tmax", "tmax is required for oral PK")
        from ..kinetics.pk import MAX_TMAX_KE

        with np.errstate(invalid="ignore", divide="ignore"):
            t_ke = df["tmax_s"].to_numpy(dtype=float) * np.log(2) / df["half_life_s"].to_numpy(dtype=float)
        too_long = ((df["route"] == "oral").to_numpy(dtype=bool) & (t_ke > MAX_TMAX_KE))
        flag(np.flatnonzero(too_long), "tmax",
             f"tmax is more than {MAX_TMAX_KE:g} elimination time constants (tmax x ln2/half_life) long: implausible absorption")
    if "source" in df.columns:
        df["source"] = df["source"].where(df["source"].notna(), df["_source_name"])
    if spec.key:
        _entity_duplicates(df, spec, flag)
    if spec.hashed:
        df["content_hash"] = content_hashes(df, spec, occurrences)
    df["_bad"] = bad
    return df, errors, warnings


def _smiles_rules(df: pd.DataFrame, flag) -> None:
    """Refuse SMILES RDKit cannot read (checked once per distinct text)."""
    cells = df["smiles"].to_numpy(dtype=object)
    codes, uniques = pd.factorize(cells)
    if not len(uniques):
        return
    from .structures import smiles_problem

    problems = [smiles_problem(v) if isinstance(v, str) else None for v in uniques.tolist()]
    if not any(problems):
        return
    wrong = (codes >= 0) & np.array([p is not None for p in problems] + [False], dtype=bool)[codes]
    flag(np.flatnonzero(wrong), "smiles", lambda pos: problems[codes[pos]])


def _kinetics_rules(df: pd.DataFrame, flag, warnings, labels, lines) -> None:
    has_koff = df["koff"].notna().to_numpy()
    has_rt = df["residence_time"].notna().to_numpy()
    flag(np.flatnonzero(~has_koff & ~has_rt), "koff", "give koff or residence_time")
    flag(np.flatnonzero(has_koff & has_rt), "residence_time", "give koff or residence_time, not both")
    rt = df["_residence_time_si"].to_numpy(dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        from_rt = 1.0 / rt
    use_rt = has_rt & ~has_koff
    df["koff_per_s"] = np.where(use_rt, from_rt, df["koff_per_s"].to_numpy(dtype=float))
    df["koff_text"] = np.where(use_rt, df["residence_time"], df["koff_text"])
    df["koff_given_as"] = np.where(use_rt, "residence_time", "koff")
    for name, lo, hi in (("kon", "kon_low", "kon_high"), ("koff", "koff_low", "koff_high")):
        si = df[f"{name}_per_M_s" if name == "kon" else "koff_per_s"].to_numpy(dtype=float)
        low = df[f"{lo}_per_M_s" if name == "kon" else f"{lo}_per_s"].to_numpy(dtype=float)
        high = df[f"{hi}_per_M_s" if name == "kon" else f"{hi}_per_s"].to_numpy(dtype=float)
        with np.errstate(invalid="ignore"):
            flag(np.flatnonzero(low > si), lo, f"lower bound is above the {name} estimate")
            flag(np.flatnonzero(high < si), hi, f"upper bound is below the {name} estimate")
            flag(np.flatnonzero(low > high), hi, "upper bound is below the lower bound")
    kon = df["kon_per_M_s"].to_numpy(dtype=float)
    koff = df["koff_per_s"].to_numpy(dtype=float)
    kd = df["kd_M"].to_numpy(dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = kd / (koff / kon)
    off = np.isfinite(ratio) & ((ratio > KD_CONSISTENCY_FOLD) | (ratio < 1 / KD_CONSISTENCY_FOLD))
    for pos in np.flatnonzero(off):
        warnings.append(
            _err(labels[pos], lines[pos], "kd", f"kd differs from koff/kon = {koff[pos] / kon[pos]:.3g} M by {max(ratio[pos], 1 / ratio[pos]):.3g}-fold")
        )


def _entity_duplicates(df: pd.DataFrame, spec: TableSpec, flag) -> None:
    key = spec.key
    cols = [c.name for c in spec.columns]
    present = df[key].notna()
    _near_duplicates(df, key, flag)
    dup = df[present & df.duplicated(subset=[key], keep=False)]
    if dup.empty:
        return
    for _, group in dup.groupby(key, sort=False):
        first = group.index[0]
        base = tuple(group.loc[first, cols])
        for pos in group.index[1:]:
            if tuple(group.loc[pos, cols]) != base:
                flag([pos], key, f"{key} {df.at[pos, key]!r} is also on {group.at[first, '_label']} line {group.at[first, '_line']} with different values")


def _near_duplicates(df: pd.DataFrame, key: str, flag) -> None:
    """Flag names that equal an earlier, differently spelled name of the import after :func:`name_key`."""
    codes, uniques = pd.factorize(df[key].to_numpy(dtype=object))
    if len(uniques) < 2:
        return
    keys = [name_key(u) if isinstance(u, str) else u for u in uniques.tolist()]
    if len(set(keys)) == len(keys):
        return
    first_pos = pd.Series(np.arange(len(df))).groupby(codes).min()  # first row of every distinct spelling
    spelled: dict[str, int] = {}  # key -> code of its first spelling (by row order)
    for code in sorted(range(len(uniques)), key=lambda c: first_pos[c]):
        k = keys[code]
        if k not in spelled:
            spelled[k] = code
            continue
        first = int(first_pos[spelled[k]])
        other = uniques[spelled[k]]
        flag(np.flatnonzero(codes == code), key,
             f"{key} {uniques[code]!r} differs from {other!r} ({df.at[first, '_label']} line {df.at[first, '_line']}) "
             "only by case or look-alike characters; use one spelling")


def content_hashes(df: pd.DataFrame, spec: TableSpec, occurrences: Occurrences | None = None) -> list[str]:
    """SHA-256 per row over the table name, the row's text cells (``source`` excluded) and its occurrence number.

    Identical rows within one import are replicates and get occurrence numbers
    0, 1, ...; re-importing the same rows yields the same hashes, so nothing is
    added twice.
    """
    cols = [c.name for c in spec.columns if c.name != "source" and not c.added]
    added = [c.name for c in spec.columns if c.added]
    if df.empty:
        return []
    columns = []
    for c in cols:
        cells = df[c].to_numpy(dtype=object).copy()
        cells[pd.isna(cells)] = ""
        columns.append(cells.tolist())
    try:
        payloads = ["\x1f".join(cells) for cells in zip(*columns)]
    except TypeError:  # a cell that is not text
        payloads = ["\x1f".join(map(str, cells)) for cells in zip(*columns)]
    for c in added:  # columns added later count only when filled: older rows keep their hashes
        if c not in df.columns:
            continue
        cells = df[c].to_numpy(dtype=object)
        filled = ~pd.isna(cells) & (cells != "")
        if filled.any():
            payloads = [p + f"\x1d{c}={v}" if f else p for p, v, f in zip(payloads, cells, filled)]
    out = []
    sha256 = hashlib.sha256
    prefix = f"{spec.name}\x1e"
    if occurrences is not None:
        return [sha256(f"{prefix}{p}\x1e{k}".encode()).hexdigest() for p, k in zip(payloads, occurrences.number(payloads).tolist())]
    seen: dict[str, int] = {}
    for p in payloads:
        k = seen.get(p, 0)
        seen[p] = k + 1
        out.append(sha256(f"{prefix}{p}\x1e{k}".encode()).hexdigest())
    return out


__all__ = ["Validated", "validate_tables", "content_hashes", "Occurrences"]
