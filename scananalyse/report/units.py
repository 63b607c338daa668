"""Display units and number formatting for the report and its figures.

Internally everything is mm, mm/y, years, m² (design contract).  The report shows
either SI display units (``units="mm"``: mm, mm/y, m², kg) or US customary ones
(``units="in"``: thickness in inches, loss depth in mils, rates in mpy, areas in
ft², masses in lb).  Files (CSV, HDF5) always keep SI columns; only the page and
the figures convert.

Conversion factors (exact by definition):

* 1 in = 25.4 mm, 1 mil = 0.0254 mm, 1 mpy = 0.0254 mm/y [seen: corrosion reference
  pages; :mod:`scananalyse.scan`];
* 1 ft = 0.3048 m, so 1 ft² = 0.09290304 m²; 1 lb = 0.45359237 kg [seen: the 1959
  international yard and pound agreement, from memory].
"""

from __future__ import annotations

import math
import numbers

import numpy as np

from ..scan import MM_PER_IN, MM_PER_MIL, MM_Y_PER_MPY

__all__ = [
    "UNITS",
    "M2_PER_FT2",
    "KG_PER_LB",
    "quantity_of_column",
    "unit_label",
    "convert",
    "decimals",
    "fmt_number",
    "display_column",
]

#: Accepted display unit systems.
UNITS = ("mm", "in")
#: 1 ft² = 0.3048² m² exactly.
M2_PER_FT2 = 0.3048 ** 2
#: 1 lb = 0.45359237 kg exactly.
KG_PER_LB = 0.45359237

# quantity -> (label in mm system, label in in system)
_LABELS = {
    "thickness": ("mm", "in"),
    "depth": ("mm", "mils"),
    "rate": ("mm/y", "mpy"),
    "years": ("y", "y"),
    "area": ("m²", "ft²"),
    "mass": ("kg", "lb"),
    "pct": ("%", "%"),
    "deg": ("°", "°"),
    "seconds": ("s", "s"),
    "plain": ("", ""),
}

# quantity -> (decimals in mm system, decimals in in system)
_DECIMALS = {
    "thickness": (2, 3),
    "depth": (2, 0),
    "rate": (3, 1),
    "years": (1, 1),
    "area": (2, 1),
    "mass": (0, 0),
    "pct": (1, 1),
    "deg": (3, 3),
    "seconds": (2, 2),
    "plain": (3, 3),
}

_DEPTH_WORDS = ("depth", "loss", "threshold", "sigma", "residual", "dx", "dy", "offset")


def _check(units: str) -> int:
    if units not in UNITS:
        raise ValueError(f"display units must be one of {UNITS}, got {units!r}")
    return UNITS.index(units)


def quantity_of_column(name: str) -> str:
    """The physical quantity of a table column from its SI suffix.

    ``*_mm_y`` → ``"rate"``; ``*_mm`` → ``"depth"`` when the name speaks of a depth,
    loss, threshold, noise or offset, else ``"thickness"``; ``*_y`` → ``"years"``;
    ``*_m2`` → ``"area"``; ``*_kg`` → ``"mass"``; ``*_pct`` → ``"pct"``;
    ``*_deg`` → ``"deg"``; ``*_s`` → ``"seconds"``; anything else ``"plain"``.
    """
    n = str(name).lower()
    if n.endswith("_mm_y") or n.endswith("_mmy") or n.endswith("_mm_per_y"):
        return "rate"
    if n.endswith("_mm"):
        return "depth" if any(w in n for w in _DEPTH_WORDS) else "thickness"
    if n.endswith("_y") or n.endswith("_years"):
        return "years"
    if n.endswith("_m2"):
        return "area"
    if n.endswith("_kg"):
        return "mass"
    if n.endswith("_pct"):
        return "pct"
    if n.endswith("_deg"):
        return "deg"
    if n.endswith("_s"):
        return "seconds"
    return "plain"


def unit_label(quantity: str, units: str) -> str:
    """Display unit text of a quantity (``"thickness"``, ``"depth"``, ``"rate"``, …)."""
    return _LABELS[quantity][_check(units)]


def decimals(quantity: str, units: str) -> int:
    """Decimal places used to print a quantity in the given unit system."""
    return _DECIMALS[quantity][_check(units)]


def convert(value, quantity: str, units: str):
    """Convert an internal value (mm, mm/y, m², kg, …) to display units.

    Parameters
    ----------
    value : number or array in internal units. [mm, mm/y, m², kg, y, %]
    quantity : one of ``thickness, depth, rate, years, area, mass, pct, deg, seconds, plain``.
    units : ``"mm"`` or ``"in"``.

    Returns
    -------
    float or ndarray : the value in display units (NaN and ±inf pass through).
    """
    k = _check(units)
    v = np.asarray(value, dtype=np.float64)
    if k == 1:
        if quantity == "thickness":
            v = v / MM_PER_IN
        elif quantity == "depth":
            v = v / MM_PER_MIL
        elif quantity == "rate":
            v = v / MM_Y_PER_MPY
        elif quantity == "area":
            v = v / M2_PER_FT2
        elif quantity == "mass":
            v = v / KG_PER_LB
    return v if v.ndim else float(v)


def _is_real(x) -> bool:
    return isinstance(x, numbers.Real) and not isinstance(x, bool)


def fmt_number(value, ndigits: int = 2) -> str:
    """Format a number for a table cell: NaN/None → '–', +inf → '∞', −inf → '−∞'.

    Integers print without decimals; other reals with ``ndigits`` decimals and a
    proper minus sign.  Non-numbers are returned as ``str(value)`` (not escaped).
    """
    if value is None:
        return "–"
    if isinstance(value, (np.generic,)):
        value = value.item()
    if isinstance(value, bool):
        return "yes" if value else "no"
    if _is_real(value):
        f = float(value)
        if math.isnan(f):
            return "–"
        if math.isinf(f):
            return "∞" if f > 0 else "−∞"
        if isinstance(value, numbers.Integral):
            s = f"{int(value):d}"
        else:
            s = f"{f:.{ndigits}f}"
            if float(s) == 0.0:
                s = s.lstrip("-")
        return s.replace("-", "−")
    try:
        import pandas as pd

        if value is pd.NaT or (not isinstance(value, str) and pd.isna(value)):
            return "–"
    except (TypeError, ValueError):
        pass
    return str(value)


def display_column(name: str, units: str) -> tuple[str, str, str, int]:
    """How to show an SI table column.

    Returns
    -------
    (base, unit, quantity, ndigits) : the column name without its unit suffix, the
        display unit text, the quantity, and the decimals to print.
    """
    q = quantity_of_column(name)
    base = str(name)
    for suf in ("_mm_y", "_mm_per_y", "_mm", "_years", "_y", "_m2", "_kg", "_pct", "_deg", "_s"):
        if q != "plain" and base.lower().endswith(suf):
            base = base[: -len(suf)]
            break
    return base, unit_label(q, units), q, decimals(q, units)
