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
  international yard and pound agreement, from memory; the same values are listed as exact
  in NIST SP 811 (2008), appendix B.8].

Floor coordinates on the maps are in metres (``units="mm"``) or in feet (inches for a
floor drawn over less than :data:`INCH_AXES_BELOW_M`): :func:`length_axis_unit`.
Sentences built from SI numbers (notes, assumptions) are rewritten for display by
:func:`text_in_units`; the diameter is shown as the user gave it by :func:`diameter_text`.
"""

from __future__ import annotations

import math
import numbers
import re

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
    "M_PER_FT",
    "M_PER_IN",
    "INCH_AXES_BELOW_M",
    "length_axis_unit",
    "with_unit",
    "feet_inches",
    "diameter_text",
    "KG_M3_PER_LB_FT3",
    "rule_value",
    "text_in_units",
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

#: 1 ft = 0.3048 m exactly; 1 in = 0.0254 m exactly (see the module notes).
M_PER_FT = 0.3048
M_PER_IN = 0.0254
#: A map whose drawn width is shorter than this is labelled in inches, not feet. [m]
INCH_AXES_BELOW_M = 3.0

# column names of depths (shown in mils); a registration shift (dx, dy) is a length (in)
_DEPTH_WORDS = ("depth", "loss", "threshold", "sigma", "residual", "bias", "scatter")


def _check(units: str) -> int:
    if units not in UNITS:
        raise ValueError(f"display units must be one of {UNITS}, got {units!r}")
    return UNITS.index(units)


def quantity_of_column(name: str) -> str:
    """The physical quantity of a table column from its SI suffix.

    ``*_mm_y`` → ``"rate"``; ``*_mm`` → ``"depth"`` when the name speaks of a depth,
    loss, threshold, noise or residual, else ``"thickness"``; ``*_y`` → ``"years"``;
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


# ---------------------------------------------------------------------------
# lengths on the maps, the diameter as given, numbers inside sentences
# ---------------------------------------------------------------------------
def length_axis_unit(span_m: float, units: str) -> tuple[str, float]:
    """The unit of floor coordinates on a map: ``(label, metres per unit)``.

    Parameters
    ----------
    span_m : drawn width of the map. [m]
    units : ``"mm"`` (metres) or ``"in"`` (feet; inches when ``span_m`` is below
        :data:`INCH_AXES_BELOW_M`).
    """
    if _check(units) == 0:
        return "m", 1.0
    return ("in", M_PER_IN) if span_m < INCH_AXES_BELOW_M else ("ft", M_PER_FT)


def with_unit(value, quantity: str, units: str) -> str:
    """An internal value as display text with its unit (``"0.100 in"``, ``"17 mils"``)."""
    v = convert(value, quantity, units)
    return f"{fmt_number(v, decimals(quantity, units))} {unit_label(quantity, units)}".strip()


def feet_inches(length_mm: float, *, ndigits: int = 1) -> str:
    """A length in feet and inches, ``"13 ft 1.5 in"`` (1 ft = 12 in = 304.8 mm exactly). [mm]"""
    total = abs(float(length_mm)) / MM_PER_IN
    ft = int(total // 12)
    inch = round(total - 12 * ft, ndigits)
    if inch >= 12:  # rounding reached the next foot
        ft, inch = ft + 1, 0.0
    sign = "−" if length_mm < 0 else ""
    return f"{sign}{ft} ft {inch:.{ndigits}f} in" if ft else f"{sign}{inch:.{ndigits}f} in"


def diameter_text(diameter_mm: float, typed, units: str):
    """The tank diameter for the page, in the form the user gave it.

    Parameters
    ----------
    diameter_mm : the diameter the analysis used. [mm]
    typed : ``(value, units)`` as given on the command line or in the job file, or None.
    units : display units.

    Returns
    -------
    float or str : ``diameter_mm`` unchanged when shown in mm and given in mm (the page
        formats it as a number); else a sentence fragment with the value as given first,
        ``"157.5 in = 13 ft 1.5 in (4000 mm)"`` or ``"26 ft 3.0 in (8000 mm as given)"``.
    """
    _check(units)
    value, given_in = typed if typed else (diameter_mm, "mm")
    if given_in == "in":
        return f"{float(value):g} in = {feet_inches(diameter_mm)} ({float(diameter_mm):.0f} mm)"
    if units == "in":
        return f"{feet_inches(diameter_mm)} ({float(value):g} mm as given)"
    return diameter_mm


# a number (sign, ± allowed before it) and an SI unit; "mm/y" before "mm"
_SI_NUMBER = re.compile(r"(?<![\w.])([−-]?\d+(?:\.\d+)?) ?(mm/y|mm|m²|m2|kg)(?![\w/²])")
# the noise rule's k·sqrt(σ_old² + σ_new²) = g mm: the σ are depths too
_NOISE_RULE = re.compile(r"sqrt\((\d+(?:\.\d+)?)² \+ (\d+(?:\.\d+)?)²\) = (\d+(?:\.\d+)?) mm")
# words that make a millimetre value in a sentence a depth (mils) rather than a thickness or length (in)
_DEPTH_CONTEXT = re.compile(r"loss|depth|deep|threshold|sigma|σ|noise|change|residual|growth|bias|scatter",
                            re.IGNORECASE)
_SI_QUANTITY = {"mm/y": "rate", "m²": "area", "m2": "area", "kg": "mass"}


def _number_text(value: float, quantity: str, units: str) -> str:
    v = float(convert(value, quantity, units))
    nd = decimals(quantity, units)
    if quantity == "thickness" and abs(v) >= 10:  # a length (a block side, a clearance)
        nd = 1
    return f"{fmt_number(v, nd)} {unit_label(quantity, units)}"


def _mm_quantity(text: str, start: int) -> str:
    """Depth or thickness for a millimetre value at ``start``: by the words before it in
    its sentence (at most 45 characters back)."""
    before = text[max(0, start - 45):start]
    before = re.split(r"[.!?] ", before)[-1]
    return "depth" if _DEPTH_CONTEXT.search(before) else "thickness"


def text_in_units(text: str, units: str) -> str:
    """A sentence built from SI numbers, rewritten for display units.

    With ``units="in"`` every ``<number> mm`` becomes inches (mils where the words before it
    in the sentence speak of loss, depth, threshold, noise or change), ``mm/y`` mpy,
    ``m²``/``m2`` ft² and ``kg`` lb; other text is left alone.  ``units="mm"`` returns the
    text unchanged.  For notes and assumptions generated from SI values; files keep SI.
    """
    if _check(units) == 0 or not isinstance(text, str):
        return text

    def noise(m):
        a, b, g = (float(convert(float(x), "depth", units)) for x in m.groups())
        return f"sqrt({a:.1f}² + {b:.1f}²) = {g:.0f} {unit_label('depth', units)}"

    text = _NOISE_RULE.sub(noise, text)

    def one(m):
        value = float(m.group(1).replace("−", "-"))
        unit = m.group(2)
        q = _SI_QUANTITY.get(unit) or _mm_quantity(m.string, m.start())
        return _number_text(value, q, units)

    return _SI_NUMBER.sub(one, text)


#: 1 lb/ft³ = 0.45359237 kg / 0.3048³ m³ = 16.018463… kg/m³ (exact from the two definitions above).
KG_M3_PER_LB_FT3 = KG_PER_LB / 0.3048 ** 3

# a rule value's SI unit -> (internal units per display unit, display unit) for units="in"
_RULE_UNITS = {"mm": (MM_PER_IN, "in"), "mm/y": (MM_Y_PER_MPY, "mpy"), "kg/m3": (KG_M3_PER_LB_FT3, "lb/ft³"),
               "m2": (M2_PER_FT2, "ft²"), "m²": (M2_PER_FT2, "ft²"), "kg": (KG_PER_LB, "lb")}


def rule_value(value, unit: str, units: str):
    """A rule value and its unit (the rule set's SI) as shown: ``(value, unit)``.

    With ``units="in"`` lengths and thicknesses go to inches, rates to mpy, the steel
    density to lb/ft³; years, percentages and plain numbers are unchanged.
    """
    if _check(units) == 0 or unit not in _RULE_UNITS or not _is_real(value):
        return value, unit
    per, shown = _RULE_UNITS[unit]
    return float(value) / per, shown
