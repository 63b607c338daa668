"""Tables written for people: one CSV writer for every table the tool writes.

Every CSV goes through :func:`write_csv`:

- it is written to a temporary file beside the target and renamed into place
  (:func:`scananalyse.io.validate.atomic_output`), so a reader never sees half a table;
- text cells that a spreadsheet would run as a formula (a leading ``=``, ``+``, ``-``,
  ``@``, tab or carriage return) get a leading apostrophe, the usual neutralisation
  recommended for CSV files opened in spreadsheets [OWASP, "CSV Injection"; common
  practice].  Numbers are never changed: only text cells (object or string columns)
  are looked at, so a negative number stays a number.
"""

from __future__ import annotations

import pandas as pd

from .validate import atomic_output

__all__ = ["neutralise_text", "neutralise_frame", "write_csv", "FORMULA_LEADS"]

#: Leading characters a spreadsheet reads as the start of a formula.
FORMULA_LEADS = ("=", "+", "-", "@", "\t", "\r")


def neutralise_text(value):
    """``value`` with a leading apostrophe if it is text a spreadsheet would run as a formula;
    anything else unchanged."""
    if isinstance(value, str) and value.startswith(FORMULA_LEADS):
        return "'" + value
    return value


def neutralise_frame(df: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``df`` whose text cells (and column names) are :func:`neutralise_text`-ed."""
    out = df.copy()
    for c in out.columns:
        if out[c].dtype == object or pd.api.types.is_string_dtype(out[c].dtype):
            out[c] = out[c].map(neutralise_text)
    out.columns = [neutralise_text(c) for c in out.columns]
    return out


def write_csv(df: pd.DataFrame, path, *, float_format: str | None = None) -> None:
    """Write ``df`` as a CSV (no index, UTF-8, ``\\n`` line ends) atomically, text cells
    neutralised against spreadsheet formulas (:func:`neutralise_text`).

    Parameters
    ----------
    df : the table. [-]
    path : the file to write. [-]
    float_format : printf-style format of floating-point cells (pandas' ``float_format``);
        None writes the shortest text that reads back to the same value. [-]
    """
    safe = neutralise_frame(df)
    with atomic_output(path) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            safe.to_csv(fh, index=False, float_format=float_format, lineterminator="\n")
