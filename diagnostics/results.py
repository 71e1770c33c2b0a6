"""Helpers shared by every result type.

Results are frozen dataclasses: values with their unit in the name, uncertainties
as ``*_err_*`` fields, ``flags`` (a tuple of short lowercase words) and a human
``message`` when something is wrong.  :func:`to_record` turns one into a
JSON-safe dict (NaN and inf become ``None``; numpy scalars and arrays become
Python numbers and lists), which is what the CLI prints and the store writes.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np

#: Every quality flag beamdiag may set, with its meaning.  Analysis code only
#: uses flags from this table, so the CLI, store and dashboard can explain them.
FLAGS: Mapping[str, str] = {
    "clipped": "the beam reaches the edge of the scan, ROI or screen",
    "saturated": "pixels or samples sit at the detector's maximum",
    "low_signal": "signal-to-noise ratio below the threshold",
    "fit_failed": "the fit did not converge or could not start",
    "non_gaussian": "the profile departs from a Gaussian (fit and rms disagree)",
    "unphysical": "the result violates a physical constraint (e.g. det(sigma) <= 0)",
    "waist_not_crossed": "the scan does not bracket the beam waist",
    "too_few_points": "too few points for a meaningful fit",
    "poor_fit": "reduced chi-square far from 1",
    "ill_conditioned": "the least-squares system is badly conditioned",
    "resolution_limited": "the beam size is comparable to the monitor resolution",
    "provisional": "preliminary result from an incomplete measurement",
    "aliased": "a known spectral line aliases into the band",
    "out_of_limit": "a tolerance was exceeded",
    "stuck": "the channel does not change",
}


def merge_flags(*groups: Iterable[str]) -> tuple[str, ...]:
    """Union of flag groups, keeping first-seen order and dropping duplicates."""
    seen: dict[str, None] = {}
    for group in groups:
        for flag in group:
            seen.setdefault(flag, None)
    return tuple(seen)


_PLAIN = (str, int, bool, type(None))


@functools.cache
def _field_names(cls: type) -> tuple[str, ...]:
    return tuple(f.name for f in dataclasses.fields(cls))


def jsonable(value: Any) -> Any:
    """Convert numpy / pandas / dataclass values into JSON-safe Python values."""
    # the common leaves first: this runs once per field of every stored result
    kind: Any = type(value)
    if kind is float:
        return value if math.isfinite(value) else None
    if kind in _PLAIN:
        return value
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {name: jsonable(getattr(value, name)) for name in _field_names(kind)}
    if isinstance(value, Mapping):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [jsonable(v) for v in value.tolist()]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return f if math.isfinite(f) else None
    if hasattr(value, "isoformat"):  # datetime, pandas Timestamp
        try:
            return value.isoformat().replace("+00:00", "Z")
        except (TypeError, ValueError):
            return str(value)
    return value


def to_record(result: Any, **extra: Any) -> dict[str, Any]:
    """A result dataclass as a JSON-safe dict, with ``extra`` keys first."""
    record = {k: jsonable(v) for k, v in extra.items()}
    record.update(jsonable(result))
    return record
