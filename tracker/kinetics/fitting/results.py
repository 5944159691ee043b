"""Fit results: frozen, typed, serialisable, able to redraw their curves.

:class:`FitResult` and :class:`CurveModel` are frozen dataclasses whose
mappings are read-only views and whose sequences are tuples, so a result
cannot be changed after the fit (``to_dict``/``from_dict`` round-trip it
through plain JSON types; pickling goes through the same plain form).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from types import MappingProxyType
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
import numpy.typing as npt

from .curves import CURVE_FUNCTIONS, CurveInfo
from .engine import FloatArray, _Fit
from .intervals import _ci, _Interval, _to_nat, _tq

SCHEMA_VERSION = 1


def _frozen(obj: Any) -> Any:
    """Read-only deep copy: mappings to MappingProxyType, lists to tuples."""
    if isinstance(obj, Mapping):
        return MappingProxyType({k: _frozen(v) for k, v in obj.items()})
    if isinstance(obj, (list, tuple)):
        return tuple(_frozen(v) for v in obj)
    if isinstance(obj, np.ndarray):
        return tuple(_frozen(v) for v in obj.tolist())
    return obj


def _thawed(obj: Any) -> Any:
    """Plain deep copy of a :func:`_frozen` value (dicts and lists), for pickling."""
    if isinstance(obj, Mapping):
        return {k: _thawed(v) for k, v in obj.items()}
    if isinstance(obj, tuple):
        return [_thawed(v) for v in obj]
    return obj


def _plain(obj: Any) -> Any:
    """Plain JSON types: numpy scalars to floats, tuples to lists, non-finite floats to None."""
    if isinstance(obj, Mapping):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, np.ndarray)):
        return [_plain(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    if obj is None or isinstance(obj, str):
        return obj
    return str(obj)


class _FrozenPickle:
    """Pickle/deepcopy support for frozen dataclasses holding read-only mappings."""

    _freeze: tuple[str, ...] = ()

    def __reduce__(self) -> tuple[Any, ...]:
        state = {f.name: getattr(self, f.name) for f in fields(self)}  # type: ignore[arg-type]
        return (_rebuild, (type(self), {k: (_thawed(v) if k in self._freeze else v) for k, v in state.items()}))


def _rebuild(cls: type[Any], state: dict[str, Any]) -> Any:
    return cls(**state)


# ============================================================== curve model
@dataclass(frozen=True)
class CurveModel(_FrozenPickle):
    """Enough of a fit to redraw its curves and their confidence band.

    ``cov`` is the covariance of the free parameters in fitted coordinates
    (log10 for ``log`` parameters).
    """

    kind: str
    names: tuple[str, ...]
    values: tuple[float, ...]
    log: tuple[bool, ...]
    free: tuple[bool, ...]
    cov: tuple[tuple[float, ...], ...] | None
    dof: int
    curves: tuple[CurveInfo, ...]
    context: Mapping[str, float] = field(default_factory=lambda: MappingProxyType({}))
    x_range: Mapping[str, tuple[float, float]] = field(default_factory=lambda: MappingProxyType({}))

    _freeze = ("context", "x_range")

    def __post_init__(self) -> None:
        object.__setattr__(self, "context", MappingProxyType({str(k): float(v) for k, v in self.context.items()}))
        object.__setattr__(self, "x_range", MappingProxyType(
            {str(k): (float(a), float(b)) for k, (a, b) in self.x_range.items()}))
        object.__setattr__(self, "curves", tuple(self.curves))

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(c.label for c in self.curves)

    def params(self) -> dict[str, float]:
        return dict(zip(self.names, self.values))

    def _index(self, label: str | None) -> int:
        if label is None:
            if len(self.curves) == 1:
                return 0
            raise ValueError(f"name the curve: one of {list(self.labels)}")
        for i, c in enumerate(self.curves):
            if c.label == label:
                return i
        raise ValueError(f"no curve {label!r}; curves are {list(self.labels)}")

    def _eval(self, theta: FloatArray, x: FloatArray, i: int) -> FloatArray:
        log = np.array(self.log)
        v = np.where(log, 10.0 ** np.where(log, theta, 0.0), theta)
        p = dict(zip(self.names, map(float, v)))
        return CURVE_FUNCTIONS[self.kind](p, x, np.full(x.shape, i, dtype=np.intp), self.curves, self.context)

    def _theta(self) -> FloatArray:
        return np.array([math.log10(v) if lg else v for v, lg in zip(self.values, self.log)], dtype=np.float64)

    def predict(self, x: npt.ArrayLike, label: str | None = None) -> FloatArray:
        """The fitted curve ``label`` at ``x`` (SI)."""
        xa = np.atleast_1d(np.asarray(x, dtype=np.float64))
        return self._eval(self._theta(), xa, self._index(label))

    def band(self, x: npt.ArrayLike, label: str | None = None, level: float = 0.95) -> tuple[FloatArray, FloatArray]:
        """Pointwise confidence band of the fitted curve (delta method)."""
        xa = np.atleast_1d(np.asarray(x, dtype=np.float64))
        i = self._index(label)
        th = self._theta()
        y = self._eval(th, xa, i)
        if self.cov is None or self.dof <= 0:
            return y * np.nan, y * np.nan
        cov = np.array(self.cov, dtype=np.float64)
        free = np.flatnonzero(self.free)
        g = np.empty((xa.size, free.size))
        for k, j in enumerate(free):
            h = 1e-6 * max(1.0, abs(float(th[j])))
            tp, tm = th.copy(), th.copy()
            tp[j] += h
            tm[j] -= h
            g[:, k] = (self._eval(tp, xa, i) - self._eval(tm, xa, i)) / (2 * h)
        half = _tq(self.dof, level) * np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", g, cov, g), 0.0))
        return y - half, y + half

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "names": list(self.names),
            "values": [float(v) for v in self.values],
            "log": list(self.log),
            "free": list(self.free),
            "cov": None if self.cov is None else [[float(v) for v in row] for row in self.cov],
            "dof": int(self.dof),
            "curves": [c.to_dict() for c in self.curves],
            "context": {k: float(v) for k, v in self.context.items()},
            "x_range": {k: [float(a), float(b)] for k, (a, b) in self.x_range.items()},
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> CurveModel:
        return cls(
            kind=d["kind"],
            names=tuple(d["names"]),
            values=tuple(float(v) for v in d["values"]),
            log=tuple(bool(v) for v in d["log"]),
            free=tuple(bool(v) for v in d["free"]),
            cov=None if d.get("cov") is None else tuple(tuple(float(v) for v in row) for row in d["cov"]),
            dof=int(d["dof"]),
            curves=tuple(CurveInfo.from_dict(c) for c in d["curves"]),
            context=dict(d.get("context") or {}),
            x_range={k: (float(a), float(b)) for k, (a, b) in (d.get("x_range") or {}).items()},
        )


def _curve_model(fits: Sequence[_Fit]) -> CurveModel:
    """One CurveModel from one fit, or from separate fits of disjoint curves (block covariance)."""
    names: list[str] = []
    values: list[float] = []
    logs: list[bool] = []
    frees: list[bool] = []
    covs: list[FloatArray] = []
    dofs = 0
    curves: list[CurveInfo] = []
    x_range: dict[str, tuple[float, float]] = {}
    ok = True
    for fit in fits:
        p = fit.prob
        nat = p.natural(fit.theta)
        names += p.names
        values += [nat[n] for n in p.names]
        logs += [bool(v) for v in p.log]
        fr = np.zeros(len(p.names), dtype=bool)
        fr[p.free] = True
        frees += [bool(v) for v in fr]
        if fit.cov is None:
            ok = False
        else:
            covs.append(fit.cov)
        dofs += fit.dof
        for i, c in enumerate(p.curves):
            curves.append(c)
            xs = p.x[p.idx == i]
            if xs.size:
                x_range[c.label] = (float(xs.min()), float(xs.max()))
    cov = None
    if ok and covs:
        from scipy.linalg import block_diag

        m = block_diag(*covs)
        cov = tuple(tuple(float(v) for v in row) for row in m)
    first = fits[0].prob
    return CurveModel(
        kind=first.kind, names=tuple(names), values=tuple(values), log=tuple(logs), free=tuple(frees),
        cov=cov, dof=int(dofs), curves=tuple(curves), context=dict(first.context), x_range=x_range,
    )


# ============================================================== fit result
# estimate name -> (JSON key, JSON key of its interval)
JSON_KEYS: Mapping[str, tuple[str, str]] = MappingProxyType({
    "koff": ("koff_per_s", "koff_ci95_per_s"),
    "kon": ("kon_per_M_per_s", "kon_ci95_per_M_per_s"),
    "kd": ("kd_M", "kd_ci95_M"),
    "residence_time": ("residence_time_s", "residence_time_ci95_s"),
    "half_life": ("half_life_s", "half_life_ci95_s"),
    "kobs": ("kobs_per_s", "kobs_ci95_per_s"),
    "residence_time_lower_bound": ("residence_time_lower_bound_s", ""),
    "ki_shift_ratio": ("ki_shift_ratio", "ki_shift_ratio_ci95"),
    "ki": ("ki_M", "ki_ci95_M"),
    "max_response_fraction": ("max_response_fraction", "max_response_fraction_ci95"),
    "kapp": ("kapp_M", "kapp_ci95_M"),
    "ic50": ("ic50_M", "ic50_ci95_M"),
})
ALWAYS_JSON = ("koff", "kon", "kd", "residence_time", "half_life")
# extras copied to the flat JSON when present
JSON_EXTRAS = ("rt_is_lower_bound", "incubation_short_s", "incubation_long_s", "kobs_line", "two_phase",
               "two_state", "depletion", "tracer_uncertainty", "tracer_check")


@dataclass(frozen=True)
class FitResult(_FrozenPickle):
    """The outcome of one fit.  Frozen (read-only mappings, tuples); SI units throughout.

    Attributes
    ----------
    method : str
        One of :data:`tracker.domain.FIT_METHODS`.
    estimates : Mapping[str, float]
        ``koff`` (1/s), ``kon`` (1/(M*s)), ``kd`` (M), ``residence_time`` (s),
        ``half_life`` (s), ``kobs`` (1/s), per-curve ``name[label]`` ...
    ci95 : Mapping[str, tuple[float, float]]
        The same names to (low, high) 95% limits in the same units; ``0``/``inf``
        where an interval is open.
    ci_kind, ci_kinds : str, Mapping[str, str]
        Which recipe produced the intervals (``covariance``, ``profile``,
        ``monte-carlo``).
    weights : str
        The weighting used: ``none``, ``proportional`` or ``poisson``.
    warnings : tuple[tuple[str, str], ...]
        ``(code, message)`` pairs.
    """

    method: str
    estimates: Mapping[str, float]
    ci95: Mapping[str, tuple[float, float]]
    ci_kind: str
    residual_sd: float
    r_squared: float
    aic: float
    n_points: int
    n_params: int
    success: bool
    warnings: tuple[tuple[str, str], ...] = ()
    ci_kinds: Mapping[str, str] = field(default_factory=lambda: MappingProxyType({}))
    extras: Mapping[str, Any] = field(default_factory=lambda: MappingProxyType({}))
    model: CurveModel | None = None
    schema_version: int = SCHEMA_VERSION
    weights: str = "none"

    _freeze = ("estimates", "ci95", "ci_kinds", "extras")

    def __post_init__(self) -> None:
        object.__setattr__(self, "estimates", MappingProxyType({str(k): float(v) for k, v in self.estimates.items()}))
        object.__setattr__(self, "ci95", MappingProxyType(
            {str(k): (float(v[0]), float(v[1])) for k, v in self.ci95.items()}))
        object.__setattr__(self, "ci_kinds", MappingProxyType(dict(self.ci_kinds)))
        object.__setattr__(self, "extras", _frozen(self.extras))
        object.__setattr__(self, "warnings", tuple((str(c), str(m)) for c, m in self.warnings))

    # ---- curves
    @property
    def curve_labels(self) -> tuple[str, ...]:
        return self.model.labels if self.model else ()

    def curve(self, x: npt.ArrayLike, label: str | None = None) -> FloatArray:
        """The fitted curve ``label`` (any curve when the fit has one) at ``x`` (SI)."""
        if self.model is None:
            raise ValueError("this result stores no curve model")
        return self.model.predict(x, label)

    def band(self, x: npt.ArrayLike, label: str | None = None, level: float = 0.95) -> tuple[FloatArray, FloatArray]:
        """(low, high) pointwise confidence band of :meth:`curve`."""
        if self.model is None:
            raise ValueError("this result stores no curve model")
        return self.model.band(x, label, level)

    @property
    def warning_codes(self) -> tuple[str, ...]:
        return tuple(c for c, _ in self.warnings)

    # ---- serialisation
    def to_dict(self) -> dict[str, Any]:
        """Everything, as plain JSON types (``from_dict`` restores it)."""
        out: dict[str, Any] = _plain(
            {
                "schema_version": self.schema_version,
                "method": self.method,
                "weights": self.weights,
                "estimates": dict(self.estimates),
                "ci95": {k: list(v) for k, v in self.ci95.items()},
                "ci_kind": self.ci_kind,
                "ci_kinds": dict(self.ci_kinds),
                "residual_sd": self.residual_sd,
                "r_squared": self.r_squared,
                "aic": self.aic,
                "n_points": self.n_points,
                "n_params": self.n_params,
                "success": self.success,
                "warnings": [{"code": c, "message": m} for c, m in self.warnings],
                "extras": _thawed(self.extras),
                "model": self.model.to_dict() if self.model else None,
            }
        )
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> FitResult:
        def num(v: Any) -> float:
            return math.nan if v is None else float(v)

        def ci(pair: Sequence[Any], name: str) -> tuple[float, float]:
            lo = num(pair[0])
            hi = math.inf if pair[1] is None else float(pair[1])
            if lo != lo and (d.get("ci_kinds") or {}).get(name) == "profile":
                lo = -math.inf
            return (lo, hi)

        return cls(
            method=d["method"],
            estimates={k: num(v) for k, v in d["estimates"].items()},
            ci95={k: ci(v, k) for k, v in d["ci95"].items()},
            ci_kind=d["ci_kind"],
            residual_sd=num(d["residual_sd"]),
            r_squared=num(d["r_squared"]),
            aic=num(d["aic"]),
            n_points=int(d["n_points"]),
            n_params=int(d["n_params"]),
            success=bool(d["success"]),
            warnings=tuple((w["code"], w["message"]) for w in d["warnings"]),
            ci_kinds=dict(d.get("ci_kinds") or {}),
            extras=dict(d.get("extras") or {}),
            model=CurveModel.from_dict(d["model"]) if d.get("model") else None,
            schema_version=int(d.get("schema_version", SCHEMA_VERSION)),
            weights=str(d.get("weights") or "none"),
        )

    def to_json_keys(self) -> dict[str, Any]:
        """The flat JSON contract of ``krt fit --json`` (SI units in the key names)."""
        out: dict[str, Any] = {"schema_version": self.schema_version, "method": self.method}
        for name, (key, ci_key) in JSON_KEYS.items():
            if name in self.estimates or name in ALWAYS_JSON:
                out[key] = self.estimates.get(name)
                if ci_key:
                    ci = self.ci95.get(name)
                    out[ci_key] = list(ci) if ci is not None else None
        out.update(
            {
                "weights": self.weights,
                "ci_kind": self.ci_kind,
                "warnings": [{"code": c, "message": m} for c, m in self.warnings],
                "n_points": self.n_points,
                "n_params": self.n_params,
                "r_squared": self.r_squared,
                "residual_sd": self.residual_sd,
                "aic": self.aic,
                "success": self.success,
                "estimates": dict(self.estimates),
                "ci95": {k: list(v) for k, v in self.ci95.items()},
            }
        )
        for k in JSON_EXTRAS:
            if k in self.extras:
                out[k] = _thawed(self.extras[k])
        plain: dict[str, Any] = _plain(out)
        return plain


# ============================================================== builder
class _Builder:
    """Collects estimates, intervals and warnings while a fit_* function runs."""

    def __init__(self, method: str, weights: str = "none"):
        self.method = method
        self.weights = weights
        self.estimates: dict[str, float] = {}
        self.ci95: dict[str, tuple[float, float]] = {}
        self.kinds: dict[str, str] = {}
        self.warnings: list[tuple[str, str]] = []
        self.extras: dict[str, Any] = {}

    def put(self, name: str, value: float, ci: Sequence[float] | None = None, kind: str | None = None) -> None:
        self.estimates[name] = float(value)
        if ci is not None:
            self.ci95[name] = (float(ci[0]), float(ci[1]))
            if kind:
                self.kinds[name] = kind

    def put_params(self, fit: _Fit, ivs: dict[str, _Interval], names: Iterable[str] | None = None) -> None:
        nat = fit.prob.natural(fit.theta)
        wanted = None if names is None else set(names)
        for j, name in enumerate(fit.prob.names):
            if wanted is not None and name not in wanted:
                continue
            if j in fit.prob.free:
                iv = ivs.get(name)
                ci = _ci(fit, ivs, name)
                self.put(name, nat[name], ci, iv.kind if iv else None)
                if iv is not None and iv.kind == "profile" and (not np.isfinite(iv.lo) or not np.isfinite(iv.hi)):
                    self.warn("ci-open", f"the 95% interval of {name} reaches the fitting limit on one side: "
                              "the data do not bound it there")
            else:
                self.estimates[name] = nat[name]

    def warn(self, code: str, message: str) -> None:
        if (code, message) not in self.warnings:
            self.warnings.append((code, message))

    def bound_warnings(self, fit: _Fit) -> None:
        p = fit.prob
        for jf, j in enumerate(p.free):
            if fit.active[jf] and p.key[j]:
                v = _to_nat(p, p.names[j], float(fit.theta[j]))
                self.warn("at-limit", f"{p.names[j]} = {v:.3g} sits at its fitting limit: the data do not determine it")

    def result(self, fits: Sequence[_Fit], model_fits: Sequence[_Fit] | None = None) -> FitResult:
        n = sum(f.n for f in fits)
        k = sum(f.k for f in fits)
        ssr = sum(f.ssr for f in fits)
        sst = 0.0
        for f in fits:
            w2 = f.prob.w**2
            ybar = float(np.sum(w2 * f.prob.y) / np.sum(w2))
            sst += float(np.sum(w2 * (f.prob.y - ybar) ** 2))
        dof = n - k
        kinds = set(self.kinds.values())
        ci_kind = "monte-carlo" if "monte-carlo" in kinds else ("profile" if "profile" in kinds else "covariance")
        aic = n * math.log(max(ssr, 1e-300) / n) + 2 * k
        self.extras.setdefault("aicc", aic + (2 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else math.inf))
        self.extras.setdefault("ssr", ssr)
        return FitResult(
            method=self.method,
            estimates=dict(self.estimates),
            ci95=dict(self.ci95),
            ci_kind=ci_kind,
            residual_sd=math.sqrt(ssr / dof) if dof > 0 else math.nan,
            r_squared=1.0 - ssr / sst if sst > 0 else math.nan,
            aic=aic,
            n_points=n,
            n_params=k,
            success=all(f.success for f in fits),
            warnings=tuple(self.warnings),
            ci_kinds=dict(self.kinds),
            extras=_plain(self.extras),
            model=_curve_model(model_fits or fits),
            weights=self.weights,
        )
