"""What-if simulation for the front ends (``krt simulate``, the dashboard's what-if page).

The front ends reach the pure kinetics only through this module or through
:mod:`tracker.rules.evidence` (the layer contract in ``pyproject.toml``).  The
functions take and return SI floats; each is the published method named in its
own docstring in :mod:`tracker.kinetics`.
"""

from __future__ import annotations

from typing import Any

__all__ = ["rate_constants", "assay_readout", "engagement_metrics", "residence_time_bounds"]


def rate_constants(kd: float | None = None, kon: float | None = None, koff: float | None = None,
                   residence_time: float | None = None) -> tuple[float, float, float]:
    """(KD, kon, koff) from any two of KD, kon, koff and residence time (consistency checked)."""
    from ..kinetics.equations import rate_constants as _rate_constants

    kd_, kon_, koff_ = _rate_constants(kd=kd, kon=kon, koff=koff, residence_time=residence_time)
    return float(kd_), float(kon_), float(koff_)


def assay_readout(kd: float, koff: float, kon: float, incubation: float, *, fmt: str, preincubation: float,
                  tolerance: float, **tracer: Any) -> dict[str, Any]:
    """What an assay format reports after ``incubation``: the apparent affinity, the shortest incubation
    that reads within ``tolerance``, the 2×RT rule of thumb and the assay floor for ``kon``."""
    from ..kinetics import assay

    return {
        "apparent": assay.apparent_affinity(kd, koff, incubation, format=fmt, preincubation=preincubation, **tracer),
        "min_incubation": assay.min_incubation(kd, koff, tolerance=tolerance, format=fmt, preincubation=preincubation,
                                               **tracer),
        "rule_of_thumb": assay.rule_of_thumb_incubation(koff),
        "floor": assay.assay_floor(kon, incubation, format=fmt, preincubation=preincubation, **tracer),
    }


def engagement_metrics(*args: Any, **kwargs: Any) -> Any:
    """Target engagement under a PK profile (see :func:`tracker.kinetics.engagement.engagement_metrics`)."""
    from ..kinetics.engagement import engagement_metrics as _engagement_metrics

    return _engagement_metrics(*args, **kwargs)


def residence_time_bounds(*args: Any, **kwargs: Any) -> Any:
    """Residence-time interval implied by a Ki shift (see :func:`tracker.kinetics.assay.residence_time_bounds`)."""
    from ..kinetics.assay import residence_time_bounds as _residence_time_bounds

    return _residence_time_bounds(*args, **kwargs)
