"""Process capability against specification limits: Cp, Cpk (within sigma) and Pp, Ppk (overall).

Why two pairs: the within sigma (from moving ranges) says what the process could do if it stayed
as steady as it is from one reading to the next; the overall sigma (sample standard deviation)
says what it actually did over the whole history, drifts included. A large gap between Cpk and
Ppk is itself a sign that the process was not stable while the history was taken.

With one specification limit only the one-sided indices exist: Cp and Pp are ``None`` and Cpk /
Ppk equal the index of the side that is given.

>>> cap = compute_capability(16.0, 2.0, 2.0, spec_lower=8.0, spec_upper=20.0)
>>> cap.cp, round(cap.cpk, 4)
(1.0, 0.6667)

References
----------
NIST/SEMATECH e-Handbook of Statistical Methods, section 6.1.6 (process capability).
Montgomery, D. C., *Introduction to Statistical Quality Control*, chapter on process capability
analysis (Cp, Cpk, Pp, Ppk).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any


@dataclass(frozen=True, slots=True)
class Capability:
    """Capability indices; a field is ``None`` when its specification limit or sigma is missing."""

    cp: float | None
    cpk: float | None
    pp: float | None
    ppk: float | None
    cpu: float | None
    cpl: float | None
    ppu: float | None
    ppl: float | None
    spec_lower: float | None = None
    spec_upper: float | None = None

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-friendly data; :meth:`from_dict` rebuilds an equal object."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Capability:
        return cls(**{name: data.get(name) for name in cls.__dataclass_fields__})


def _check_sigma(name: str, sigma: float | None, *, required: bool) -> None:
    if sigma is None:
        if required:
            raise ValueError(f"{name} is required for capability indices")
        return
    if not (math.isfinite(sigma) and sigma > 0):
        raise ValueError(f"{name} must be a positive finite number, got {sigma!r}")


def _indices(
    center: float, sigma: float | None, spec_lower: float | None, spec_upper: float | None
) -> tuple[float | None, float | None, float | None, float | None]:
    """(two-sided index, k index, upper index, lower index) for one sigma."""
    if sigma is None:
        return None, None, None, None
    upper = (spec_upper - center) / (3.0 * sigma) if spec_upper is not None else None
    lower = (center - spec_lower) / (3.0 * sigma) if spec_lower is not None else None
    both = (
        (spec_upper - spec_lower) / (6.0 * sigma)
        if spec_upper is not None and spec_lower is not None
        else None
    )
    k = min(v for v in (upper, lower) if v is not None)
    return both, k, upper, lower


def compute_capability(
    center: float,
    sigma_within: float,
    sigma_overall: float | None,
    spec_lower: float | None = None,
    spec_upper: float | None = None,
) -> Capability:
    """Capability indices of a process with mean ``center`` against the given spec limits.

    ``sigma_overall`` may be ``None`` (e.g. a typed-in baseline with no history); then Pp, Ppk,
    Ppu and Ppl are ``None``. At least one spec limit is required.

    >>> cap = compute_capability(10.0, 1.0, 1.5, spec_upper=16.0)
    >>> cap.cp is None, cap.cpk, cap.ppk
    (True, 2.0, 1.3333333333333333)
    """
    spec_lower = None if spec_lower is None else float(spec_lower)
    spec_upper = None if spec_upper is None else float(spec_upper)
    if spec_lower is None and spec_upper is None:
        raise ValueError("capability needs at least one specification limit (lower or upper)")
    for name, limit in (("spec_lower", spec_lower), ("spec_upper", spec_upper)):
        if limit is not None and not math.isfinite(limit):
            raise ValueError(f"{name} must be a finite number, got {limit!r}")
    if spec_lower is not None and spec_upper is not None and spec_lower >= spec_upper:
        raise ValueError(
            f"spec_lower ({spec_lower!r}) must be below spec_upper ({spec_upper!r}); "
            "swap them or drop one to use a one-sided specification"
        )
    if not math.isfinite(center):
        raise ValueError(f"center must be a finite number, got {center!r}")
    _check_sigma("sigma_within", sigma_within, required=True)
    _check_sigma("sigma_overall", sigma_overall, required=False)
    cp, cpk, cpu, cpl = _indices(center, sigma_within, spec_lower, spec_upper)
    pp, ppk, ppu, ppl = _indices(center, sigma_overall, spec_lower, spec_upper)
    return Capability(
        cp=cp,
        cpk=cpk,
        pp=pp,
        ppk=ppk,
        cpu=cpu,
        cpl=cpl,
        ppu=ppu,
        ppl=ppl,
        spec_lower=spec_lower,
        spec_upper=spec_upper,
    )
