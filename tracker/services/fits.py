"""Save a kinetic fit, with its raw data, as evidence of a compound.

A saved fit becomes
* a ``time_courses`` row holding the raw readings (SI) and, in ``meta_json``,
  the fit method, the units and options it was read with and the whole
  :meth:`FitResult.to_dict`;
* for fits that yield a koff (dissociation, association, competition kinetics,
  jump dilution, washout recovery) a ``kinetic_measurements`` row with kon,
  koff, KD and their 95% bounds, linked to the time course;
* one audit event per row written.

Ki-shift and insurmountability fits carry qualitative evidence (a ratio, a
fraction of Emax), not a rate constant, so they are stored as time courses
only; the rules read them from there (``meta.fit_method``, ``meta.fit``).
Saving the same data again for the same compound adds nothing.
"""

from __future__ import annotations

import getpass
import hashlib
import json
import math
import os
from pathlib import Path
from typing import Any

import pandas as pd
from sqlalchemy import Engine, insert, select

from ..db.audit import append_event, canonical_json
from ..db.models import Compound, KineticMeasurement, TimeCourse
from ..db.session import open_engine, with_retry
from ..db.uow import UnitOfWork
from ..errors import FitError, NotFoundError

#: fit method -> the stored measurement method (tracker.domain.METHODS)
STORED_METHOD = {
    "dissociation": "association-dissociation",
    "association": "association-dissociation",
    "competition-kinetics": "competition-kinetics",
    "jump-dilution": "jump-dilution",
    "washout-recovery": "washout-recovery",
    "ki-shift": "other",
    "insurmountability": "other",
}
QUALITATIVE = ("ki-shift", "insurmountability")


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


def default_actor() -> str:
    """The acting user for command-line writes: ``$KRT_USER`` or the OS login."""
    return os.environ.get("KRT_USER") or getpass.getuser()


def _raw_columns(df: pd.DataFrame) -> dict[str, list]:
    out: dict[str, list] = {}
    if "time" in df:
        out["time_s"] = [float(v) for v in df["time"]]
    out["signal"] = [float(v) for v in df["signal"]]
    if "concentration" in df:
        out["concentration_M"] = [float(v) for v in df["concentration"]]
    if "curve" in df:
        out["curve"] = [None if pd.isna(v) else str(v) for v in df["curve"]]
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


def save_fit(
    compound: str,
    result,
    raw: pd.DataFrame,
    source: str | os.PathLike,
    *,
    engine: Engine | None = None,
    actor: str | None = None,
    units: dict[str, str] | None = None,
    options: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """Store ``result`` (a :class:`~tracker.kinetics.fitting.FitResult`) and its raw data for ``compound``.

    Returns ``{"time_course_id", "kinetic_measurement_id", "created"}``.
    """
    engine = engine or open_engine()
    actor = actor or default_actor()
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

    def work() -> dict[str, Any]:
        with UnitOfWork(engine) as uow:
            s = uow.session
            cid = s.execute(select(Compound.id).where(Compound.name == compound)).scalar()
            if cid is None:
                raise NotFoundError(f"unknown compound {compound!r}: import it before saving fits for it")
            tc_id = s.execute(select(TimeCourse.id).where(TimeCourse.compound_id == cid,
                                                          TimeCourse.content_hash == digest)).scalar()
            if tc_id is not None:
                km_id = s.execute(select(KineticMeasurement.id).where(KineticMeasurement.time_course_id == tc_id)).scalar()
                return {"time_course_id": tc_id, "kinetic_measurement_id": km_id, "created": False}
            tc_id = s.execute(insert(TimeCourse).values(
                compound_id=cid, method=STORED_METHOD[method], data_json=data_json,
                meta_json=json.dumps(meta, allow_nan=False, default=str), content_hash=digest,
            ).returning(TimeCourse.id)).scalar_one()
            append_event(s, actor, "save-fit", "time_course", tc_id, None,
                         {"compound": compound, "fit_method": method, "source": meta["source"],
                          "n_points": keys.get("n_points"), "warnings": [w["code"] for w in keys.get("warnings", [])]},
                         "fit saved with its raw data")
            km_id = None
            if koff is not None and method not in QUALITATIVE:
                kon = _finite(keys.get("kon_per_M_per_s"))
                kd = _finite(keys.get("kd_M"))  # texts at full precision (repr), so an export reads back the same float
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
                append_event(s, actor, "create", "kinetic_measurement", km_id, None,
                             {"compound": compound, "method": row["method"], "koff_per_s": koff, "kon_per_M_s": kon,
                              "time_course_id": tc_id}, "from a saved fit")
            uow.commit()
            return {"time_course_id": tc_id, "kinetic_measurement_id": km_id, "created": True}

    return with_retry(work)
