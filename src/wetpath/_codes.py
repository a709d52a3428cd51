"""Phase codes: the mapping from the label values of an input volume to wetpath's canonical phases.

Every array that enters the measurement code is first mapped to the canonical ``uint8`` codes
``EXCLUDED = 0`` (outside the field of view: no phase, no interface), ``SOLID = 1``,
``WETTING = 2`` and ``NONWETTING = 3``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ._errors import WetpathError

__all__ = ["EXCLUDED", "SOLID", "WETTING", "NONWETTING", "PhaseCodes", "to_canonical"]

EXCLUDED, SOLID, WETTING, NONWETTING = 0, 1, 2, 3
PHASE_NAMES = {EXCLUDED: "excluded", SOLID: "solid", WETTING: "wetting", NONWETTING: "nonwetting"}


@dataclass(frozen=True)
class PhaseCodes:
    """Label values used for each phase in an input volume.

    Each field holds the value, or a tuple of values, that stands for that phase in the input.
    The defaults are the canonical codes (0 excluded, 1 solid, 2 wetting, 3 non-wetting).
    """

    excluded: int | tuple[int, ...] = EXCLUDED
    solid: int | tuple[int, ...] = SOLID
    wetting: int | tuple[int, ...] = WETTING
    nonwetting: int | tuple[int, ...] = NONWETTING

    @classmethod
    def from_mapping(cls, mapping: Mapping | None) -> PhaseCodes:
        """Build codes from a mapping such as ``{"solid": 255, "wetting": 128}`` (missing keys keep
        their default)."""
        if mapping is None:
            return cls()
        if isinstance(mapping, PhaseCodes):
            return mapping
        unknown = set(mapping) - {"excluded", "solid", "wetting", "nonwetting"}
        if unknown:
            raise WetpathError(f"unknown phase name(s) {sorted(unknown)} in phase codes", step="codes")
        kwargs = {k: (tuple(int(x) for x in v) if isinstance(v, list | tuple) else int(v))
                  for k, v in mapping.items()}
        return cls(**kwargs)

    def lookup(self) -> dict[int, int]:
        """Input value -> canonical code."""
        table: dict[int, int] = {}
        for canon, field in ((EXCLUDED, self.excluded), (SOLID, self.solid),
                             (WETTING, self.wetting), (NONWETTING, self.nonwetting)):
            for value in (field if isinstance(field, tuple) else (field,)):
                if value in table and table[value] != canon:
                    raise WetpathError(f"label value {value} is given to two phases", step="codes")
                table[value] = canon
        return table

    @property
    def is_canonical(self) -> bool:
        return self.lookup() == {0: 0, 1: 1, 2: 2, 3: 3}


def to_canonical(labels: np.ndarray, codes: PhaseCodes | Mapping | None = None, *,
                 path: str | None = None, step: str = "codes") -> np.ndarray:
    """Map an integer label array to canonical ``uint8`` phase codes.

    Parameters
    ----------
    labels : ndarray of int
        Input labels, any integer dtype, shape (z, y, x).
    codes : PhaseCodes or mapping, optional
        Which input values are which phase; default canonical.
    path, step : str, optional
        Named in the error message when values are unknown.

    Returns
    -------
    ndarray of uint8
        Canonical codes, same shape.

    Raises
    ------
    WetpathError
        If the array holds values that belong to no phase; the message lists them with their counts.
    """
    codes = PhaseCodes.from_mapping(codes)
    labels = np.asarray(labels)
    if labels.dtype.kind not in "iub":
        raise WetpathError(f"labels must be integers, got dtype {labels.dtype}", step=step, path=path)
    table = codes.lookup()
    if labels.dtype.kind == "b":
        labels = labels.view(np.uint8)
    if codes.is_canonical and labels.dtype == np.uint8:
        bad = labels > 3
        if bad.any():
            _raise_unknown(labels[bad], table, path, step)
        return labels
    values = np.array(sorted(table), dtype=np.int64)
    lo, hi = int(labels.min()) if labels.size else 0, int(labels.max()) if labels.size else 0
    if labels.dtype.itemsize <= 2 and lo >= 0:
        lut = np.full(max(hi, values.max()) + 1, 255, dtype=np.uint8)
        lut[values] = [table[v] for v in values]
        out = lut[labels]
    else:
        out = np.full(labels.shape, 255, dtype=np.uint8)
        for v, c in table.items():
            out[labels == v] = c
    bad = out == 255
    if bad.any():
        _raise_unknown(labels[bad], table, path, step)
    return out


def _raise_unknown(bad_values: np.ndarray, table: dict[int, int], path, step) -> None:
    vals, counts = np.unique(bad_values, return_counts=True)
    listing = ", ".join(f"{v} ({c} voxels)" for v, c in list(zip(vals, counts, strict=True))[:10])
    more = "" if len(vals) <= 10 else f" and {len(vals) - 10} more values"
    known = ", ".join(f"{v}={PHASE_NAMES[c]}" for v, c in sorted(table.items()))
    raise WetpathError(f"unexpected label values {listing}{more}; known codes are {known}",
                       step=step, path=path)
