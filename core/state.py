"""A mixture's state as plain arrays and JSON-able metadata (no pickle), and back.

The round trip is exact: the arrays are copied as they are and the metadata holds
Python ints, floats and strings, so a restored mixture scores and learns bit for bit
as the one that was saved.
"""

from __future__ import annotations

import numpy as np

from .covariance import FAMILIES
from .errors import ModelError
from .schedule import StepSchedule

__all__ = ["FORMAT_VERSION", "ARRAYS", "write_state", "read_state"]

FORMAT_VERSION = 1
ARRAYS = ("center", "scale", "s0", "s1", "s2", "weights", "means", "covariances", "ids",
          "avg_s0", "avg_s1", "avg_s2")


def write_state(mixture) -> tuple[dict, dict]:
    """The state of ``mixture``.

    Parameters
    ----------
    mixture : Mixture

    Returns
    -------
    arrays : dict of str to ndarray
        The named numeric arrays of :data:`ARRAYS`, copied.
    meta : dict
        JSON-able scalars: ``format_version``, ``covariance``, the schedule as a dict,
        the learning settings and counters.
    """
    arrays = {name: np.array(getattr(mixture, name)) for name in ARRAYS}
    meta = {
        "format_version": FORMAT_VERSION,
        "covariance": mixture.covariance,
        "next_id": int(mixture.next_id),
        "n_rows": int(mixture.n_rows),
        "sumsq": float(mixture.sumsq),
        "schedule": mixture.schedule.to_dict(),
        "reg_covar": float(mixture.reg_covar),
        "prior_weight": float(mixture.prior_weight),
        "resp_floor": float(mixture.resp_floor),
        "refresh_rows": int(mixture.refresh_rows),
        "mass_floor": float(mixture.mass_floor),
        "averaging": bool(mixture.averaging),
        "avg_count": int(mixture.avg_count),
    }
    return arrays, meta


def read_state(arrays: dict, meta: dict) -> dict:
    """The fields of the mixture saved by :func:`write_state`, checked.

    Parameters
    ----------
    arrays : mapping of str to array-like
    meta : mapping

    Returns
    -------
    fields : dict
        Keyword arguments for the ``Mixture`` constructor.

    Raises
    ------
    ModelError
        On another format version, a missing array or an unknown covariance type.
    """
    version = meta.get("format_version")
    if version != FORMAT_VERSION:
        raise ModelError(
            f"model state has format_version {version!r}; this shoal reads {FORMAT_VERSION}"
        )
    lacking = [name for name in ARRAYS if name not in arrays]
    if lacking:
        raise ModelError(f"model state lacks arrays {lacking}")
    if meta.get("covariance") not in FAMILIES:
        raise ModelError(f"model state has unknown covariance {meta.get('covariance')!r}")
    data = {name: np.array(arrays[name]) for name in ARRAYS}
    data["ids"] = data["ids"].astype(np.int64)
    return dict(
        covariance=meta["covariance"],
        next_id=int(meta["next_id"]),
        n_rows=int(meta["n_rows"]),
        sumsq=float(meta["sumsq"]),
        schedule=StepSchedule.from_dict(meta["schedule"]),
        reg_covar=float(meta["reg_covar"]),
        prior_weight=float(meta["prior_weight"]),
        resp_floor=float(meta["resp_floor"]),
        refresh_rows=int(meta["refresh_rows"]),
        mass_floor=float(meta["mass_floor"]),
        averaging=bool(meta["averaging"]),
        avg_count=int(meta["avg_count"]),
        **data,
    )
