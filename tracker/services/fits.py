"""Save a kinetic fit, with its raw data, as evidence of a compound.

A saved fit becomes
* a ``time_courses`` row holding the raw readings (SI) and, in ``meta_json``,
  the fit method, the units and options it was read with and the whole
  :meth:`FitResult.to_dict`;
* for fits that yield a koff (dissociation, association, competition kinetics,
  jump dilution, washout recovery) a ``kinetic_measurements`` row with kon,
  koff, KD and their 95% bounds, linked to the time course;
* one audit event per row written, sealing the row's stored values
  (:func:`tracker.db.seals.seal_row`, re-checked by ``krt audit verify``).

Ki-shift, insurmountability and Morrison fits carry evidence other than a
rate constant (a ratio, a fraction of Emax, a Ki), so they are stored as time
courses only; the rules read them from there (``meta.fit_method``, ``meta.fit``).
Saving the same data again for the same compound adds nothing.

Guards (shared by the CLI and the dashboard, enforced here): only an active
``scientist`` or ``lead`` may save; a residence time that differs more than
:data:`SUPERSEDE_FACTOR` x from one already stored (and not superseded) for
the compound is refused - the classic sign of a unit slip - unless a reason is
given.  With a reason the new value is stored and each conflicting older one
stays on record, marked superseded (``superseded_by_id``, reason, time) and
audited with that reason; the grader then reads the new value.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Engine, insert, select, update

from ..db.audit import append_event, canonical_json
from ..db.models import Compound, KineticMeasurement, TimeCourse, utcnow
from ..db.seals import seal_row
from ..db.session import open_engine, with_retry
from ..db.uow import UnitOfWork
from ..errors import FitError, InputError, KrtError, NotFoundError
from ..fmt import duration as fmt_duration
from .fitoptions import FIT_OPTIONS, WEIGHTS, fit_options  # noqa: F401  (re-exported for the front ends)
from .users import require_role

#: a stored residence time this many times longer or shorter than the new one needs a reason to be superseded
SUPERSEDE_FACTOR = 3.0
#: roles that may save fits
SAVE_ROLES = ("scientist", "lead")


class ResidenceTimeConflict(KrtError, ValueError):
    """A fit whose residence time differs more than SUPERSEDE_FACTOR x from a stored one, without a reason."""

#: fit method -> the stored measurement method (tracker.domain.METHODS)
STORED_METHOD = {
    "dissociation": "association-dissociation",
    "association": "association-dissociation",
    "competition-kinetics": "competition-kinetics",
    "jump-dilution": "jump-dilution",
    "washout-recovery": "washout-recovery",
    "ki-shift": "other",
    "insurmountability": "other",
    "morrison": "other",
}
QUALITATIVE = ("ki-shift", "insurmountability", "morrison")


def fit_time_course(method: str, df: pd.DataFrame, *, source: str = "", **options: Any):
    """Fit a table read by :func:`tracker.io.timecourse.read_time_course`; the one entry for the CLI, demo and dashboard.

    ``options`` are SI floats (and ``control_label``) as :func:`tracker.kinetics.fitting.fit_table` takes them.
    A :class:`~tracker.errors.FitError` names ``source``; a fit that does not converge is refused.
    """
    from ..kinetics import fit_table

    prefix = f"{source}: " if source else ""
    try:
        result = fit_table(method, df, **options)
    except FitError as exc:
        raise FitError(f"{prefix}{exc}") from None
    if not result.success:
        raise FitError(f"{prefix}the {method} fit did not converge")
    return result


def _point_labels(result, df: pd.DataFrame) -> list[str]:
    """The model curve of each row: by curve (and replicate) label, else by nearest concentration, else the one curve."""
    labels = list(result.curve_labels)
    n = len(df)
    if len(labels) <= 1:
        return [labels[0] if labels else "data"] * n
    cands = []
    if "curve" in df and "replicate" in df:
        from ..kinetics.fitting.common import REPLICATE_SEP

        cands.append([f"{c}{REPLICATE_SEP}{r}" for c, r in zip(df["curve"], df["replicate"])])
    for col in ("curve", "replicate"):
        if col in df:
            cands.append([str(v) for v in df[col]])
    for cand in cands:
        if all(c in labels for c in cand):
            return cand
    model = result.model
    if "concentration" in df and model is not None:
        concs = np.array([c.conc for c in model.curves], float)
        if np.any(np.isfinite(concs)):
            return [labels[int(np.nanargmin(np.abs(concs - c)))] for c in df["concentration"].to_numpy(float)]
    return [labels[0]] * n


def fit_overlay(result, df: pd.DataFrame, n: int = 200) -> dict[str, Any]:
    """What a chart of the fit needs, in SI: measured points with fitted values and residuals, and each curve.

    Returns ``{"points": x, y, curve, fitted, residual; "curves": x, y, lo, hi, curve (95% band);
    "x_kind": "time" | "conc", "weights"}``.  ``x`` is time (s) or concentration (M).
    """
    from ..io.timecourse import DOSE_RESPONSE_METHODS

    is_conc = result.method in DOSE_RESPONSE_METHODS or "time" not in df
    x = df["concentration" if is_conc else "time"].to_numpy(float)
    y = df["signal"].to_numpy(float)
    labels = _point_labels(result, df)
    fitted = np.full(len(df), np.nan)
    lab = np.asarray(labels, dtype=object)
    frames = []
    for label in dict.fromkeys(labels):
        sel = lab == label
        if result.model is None:
            continue
        fitted[sel] = result.curve(x[sel], label)
        xs_data = x[sel]
        if is_conc:
            pos = xs_data[xs_data > 0]
            lo_x = float(pos.min()) if pos.size else 1e-12
            xs = np.geomspace(lo_x, max(float(xs_data.max()), lo_x * 10), n)
        else:
            xs = np.linspace(min(0.0, float(xs_data.min())), float(xs_data.max()), n)
        lo, hi = result.band(xs, label)
        frames.append(pd.DataFrame({"x": xs, "y": result.curve(xs, label), "lo": lo, "hi": hi, "curve": label}))
    curves = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=["x", "y", "lo", "hi", "curve"])
    points = pd.DataFrame({"x": x, "y": y, "curve": labels, "fitted": fitted, "residual": y - fitted})
    return {"points": points, "curves": curves, "x_kind": "conc" if is_conc else "time",
            "weights": result.to_dict().get("weights", "none")}


def describe_saved(saved: dict[str, Any]) -> str:
    """What a save stored, in units (one line, a second per superseded value); the CLI and the dashboard print it."""
    from ..fmt import conc as fmt_conc
    from ..fmt import rate1, rate2

    who = saved["compound"]
    if not saved.get("created"):
        return f"already stored for {who} (time course {saved['time_course_id']}); nothing new was written"
    st = saved.get("stored") or {}
    if st.get("koff_per_s"):
        parts = [f"residence time {fmt_duration(st.get('residence_time_s'))}", f"koff {rate1(st['koff_per_s'])}"]
        if st.get("kon_per_M_per_s"):
            parts.append(f"kon {rate2(st['kon_per_M_per_s'])}")
        if st.get("kd_M"):
            parts.append(f"KD {fmt_conc(st['kd_M'])}")
        text = (f"saved for {who}: {', '.join(parts)} (kinetic measurement {saved['kinetic_measurement_id']}, "
                f"raw data as time course {saved['time_course_id']})")
    else:
        text = f"saved for {who}: the fit and its raw data (time course {saved['time_course_id']})"
    for old in saved.get("superseded") or []:
        text += (f"\nsuperseded for {who}: kinetic measurement {old['id']} (residence time "
                 f"{fmt_duration(old['residence_time_s'])}), kept on record")
    return text


def _raw_columns(df: pd.DataFrame) -> dict[str, list]:
    out: dict[str, list] = {}
    if "time" in df:
        out["time_s"] = [float(v) for v in df["time"]]
    out["signal"] = [float(v) for v in df["signal"]]
    if "concentration" in df:
        out["concentration_M"] = [float(v) for v in df["concentration"]]
    if "curve" in df:
        out["curve"] = [None if pd.isna(v) else str(v) for v in df["curve"]]
    if "replicate" in df:
        out["replicate"] = [None if pd.isna(v) else str(v) for v in df["replicate"]]
    if "incubation" in df:
        out["incubation_s"] = [float(v) for v in df["incubation"]]
    return out


def _finite(v: Any) -> float | None:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) and f > 0 else None


def _pair(ci: Any) -> tuple[float | None, float | None]:
    if not ci:
        return None, None
    return _finite(ci[0]), _finite(ci[1])


def _conflicts(session, cid: int, koff: float) -> list[dict[str, Any]]:
    """Stored, not superseded measurements of the compound whose residence time is > SUPERSEDE_FACTOR x off."""
    rows = session.execute(
        select(KineticMeasurement.id, KineticMeasurement.koff_per_s, KineticMeasurement.source, KineticMeasurement.method)
        .where(KineticMeasurement.compound_id == cid, KineticMeasurement.superseded_by_id.is_(None))
        .order_by(KineticMeasurement.id)
    ).all()
    out = []
    for r in rows:
        old = _finite(r.koff_per_s)
        if old is None:
            continue
        ratio = old / koff  # = new RT / old RT
        if ratio > SUPERSEDE_FACTOR or ratio < 1 / SUPERSEDE_FACTOR:
            out.append({"id": r.id, "koff_per_s": old, "residence_time_s": 1 / old, "source": r.source,
                        "method": r.method, "ratio": ratio})
    return out


def _conflict_message(compound: str, rt_new: float, c: dict[str, Any], n: int) -> str:
    ratio = c["ratio"]
    how = f"{ratio:.3g}x longer" if ratio > 1 else f"{1 / ratio:.3g}x shorter"
    more = f" (and {n - 1} more stored value(s))" if n > 1 else ""
    src = f", from {c['source']}" if c.get("source") else ""
    return (f"{compound} already has a residence time of {fmt_duration(c['residence_time_s'])} (kinetic measurement "
            f"{c['id']}{src}){more}; this fit gives {fmt_duration(rt_new)}, {how}, more than {SUPERSEDE_FACTOR:g}x "
            f"apart. Check the time and concentration units; to store it anyway and mark the older value superseded, "
            f"give a reason (--supersede \"REASON\")")


def save_fit(
    compound: str,
    result,
    raw: pd.DataFrame,
    source: str | os.PathLike,
    *,
    engine: Engine | None = None,
    actor: str,
    units: dict[str, str] | None = None,
    options: dict[str, Any] | None = None,
    supersede: str | None = None,
) -> dict[str, Any]:
    """Store ``result`` (a fit result) and its raw data for ``compound``, guarded (see the module docstring).

    Returns ``{"compound", "time_course_id", "kinetic_measurement_id", "created", "stored", "superseded"}``:
    ``stored`` holds the SI values written (``koff_per_s``, ``residence_time_s``, ``kon_per_M_per_s``,
    ``kd_M``; empty for qualitative fits), ``superseded`` the older measurements marked superseded
    (``id``, ``residence_time_s``).  Raises :class:`ResidenceTimeConflict`, :class:`~tracker.errors.PermissionDenied`,
    :class:`~tracker.errors.NotFoundError`.
    """
    engine = engine or open_engine()
    reason = " ".join(str(supersede).split()) if supersede is not None else None
    if supersede is not None and not reason:
        raise InputError("--supersede needs a reason (why the older value is replaced)")
    keys = result.to_json_keys()
    fit_dict = result.to_dict()
    method = keys.get("method") or result.method
    data = _raw_columns(raw)
    data_json = canonical_json(data)
    meta = {"fit_method": method, "source": Path(source).name, "units": units or {}, "options": options or {},
            "fit": fit_dict}
    digest = hashlib.sha256((method + "\n" + data_json).encode()).hexdigest()
    koff = _finite(keys.get("koff_per_s"))
    if method not in QUALITATIVE and koff is None:
        raise FitError(f"{Path(source).name}: the {method} fit gives no koff to store (give --koff or more concentrations)")
    kon = _finite(keys.get("kon_per_M_per_s"))
    kd = _finite(keys.get("kd_M"))
    stored = {} if method in QUALITATIVE else {"koff_per_s": koff, "residence_time_s": 1 / koff if koff else None,
                                               "kon_per_M_per_s": kon, "kd_M": kd}

    def work() -> dict[str, Any]:
        with UnitOfWork(engine) as uow:
            s = uow.session
            user = require_role(s, actor, SAVE_ROLES, "save fits")["name"]
            cid = s.execute(select(Compound.id).where(Compound.name == compound)).scalar()
            if cid is None:
                raise NotFoundError(f"unknown compound {compound!r}: import it before saving fits for it")
            tc_id = s.execute(select(TimeCourse.id).where(TimeCourse.compound_id == cid,
                                                          TimeCourse.content_hash == digest)).scalar()
            if tc_id is not None:
                km_id = s.execute(select(KineticMeasurement.id).where(KineticMeasurement.time_course_id == tc_id)).scalar()
                return {"compound": compound, "time_course_id": tc_id, "kinetic_measurement_id": km_id, "created": False,
                        "stored": stored, "superseded": []}
            conflicts = _conflicts(s, cid, koff) if koff is not None and method not in QUALITATIVE else []
            if conflicts and reason is None:
                raise ResidenceTimeConflict(_conflict_message(compound, 1 / koff, conflicts[0], len(conflicts)))
            tc_id = s.execute(insert(TimeCourse).values(
                compound_id=cid, method=STORED_METHOD.get(method, "other"), data_json=data_json,
                meta_json=json.dumps(meta, allow_nan=False, default=str), content_hash=digest,
            ).returning(TimeCourse.id)).scalar_one()
            append_event(s, user, "save-fit", "time_course", tc_id, None,
                         {"compound": compound, "fit_method": method, "source": meta["source"],
                          "n_points": keys.get("n_points"), "warnings": [w["code"] for w in keys.get("warnings", [])],
                          **seal_row(s, TimeCourse.__tablename__, tc_id)},
                         reason or "fit saved with its raw data")
            km_id = None
            if koff is not None and method not in QUALITATIVE:
                # texts at full precision (repr), so an export reads back the same float
                kon_lo, kon_hi = _pair(keys.get("kon_ci95_per_M_per_s"))
                koff_lo, koff_hi = _pair(keys.get("koff_ci95_per_s"))
                row = dict(
                    compound_id=cid, method=STORED_METHOD[method],
                    kon_per_M_s=kon, kon_text=None if kon is None else f"{kon!r} /M/s",
                    koff_per_s=koff, koff_text=f"{koff!r} /s", koff_given_as="koff",
                    kd_M=kd, kd_text=None if kd is None else f"{kd!r} M",
                    kon_low_per_M_s=kon_lo, kon_high_per_M_s=kon_hi,
                    koff_low_per_s=koff_lo, koff_high_per_s=koff_hi,
                    kon_low_text=None if kon_lo is None else f"{kon_lo!r} /M/s",
                    kon_high_text=None if kon_hi is None else f"{kon_hi!r} /M/s",
                    koff_low_text=None if koff_lo is None else f"{koff_lo!r} /s",
                    koff_high_text=None if koff_hi is None else f"{koff_hi!r} /s",
                    fit_json=json.dumps(fit_dict, allow_nan=False, default=str), time_course_id=tc_id,
                    source=meta["source"], content_hash=digest,
                )
                km_id = s.execute(insert(KineticMeasurement).values(**row).returning(KineticMeasurement.id)).scalar_one()
                append_event(s, user, "create", "kinetic_measurement", km_id, None,
                             {"compound": compound, "method": row["method"], "koff_per_s": koff, "kon_per_M_s": kon,
                              "time_course_id": tc_id, **seal_row(s, KineticMeasurement.__tablename__, km_id)},
                             reason or "from a saved fit")
                now = utcnow()
                for c in conflicts:
                    s.execute(update(KineticMeasurement).where(KineticMeasurement.id == c["id"])
                              .values(superseded_by_id=km_id, superseded_reason=reason, superseded_at=now))
                    append_event(s, user, "supersede", "kinetic_measurement", c["id"],
                                 {"superseded_by_id": None, "koff_per_s": c["koff_per_s"]},
                                 {"superseded_by_id": km_id, "new_koff_per_s": koff,
                                  "residence_time_ratio": c["ratio"], "superseded_reason": reason,
                                  "superseded_at": now}, reason)
            uow.commit()
            return {"compound": compound, "time_course_id": tc_id, "kinetic_measurement_id": km_id, "created": True,
                    "stored": stored, "superseded": [{"id": c["id"], "residence_time_s": c["residence_time_s"]}
                                                     for c in conflicts]}

    out = with_retry(work)
    if out["created"]:  # grade history and actions follow the new measurement
        from .history import refresh

        refresh(engine, f"fit saved for {compound}", actor)
    return out
