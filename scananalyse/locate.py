"""Where a point of the floor is, in the words a tank crew uses.

Clock position from the datum: 12 o'clock is the +y direction of the floor frame (the
datum, drawn as north on the maps), counted clockwise seen from above, written as
``hours:minutes`` (``3:00`` is +x, ``6:00`` is −y, ``9:00`` is −x; the tank centre
itself has no clock position and is written as an empty cell).  Distance from the
shell: the inside radius of the shell less the distance from the tank centre
(negative outside the shell).

Coordinates are reported rounded to a step that suits the scan (:func:`coordinate_step`):
a 25 mm grid does not locate anything to 0.01 mm.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

__all__ = ["clock_position", "distance_from_shell", "coordinate_step", "add_location_columns"]


def clock_position(x_mm, y_mm, *, centre=(0.0, 0.0), minutes_step: int = 15):
    """Clock position of points seen from the tank centre.

    Parameters
    ----------
    x_mm, y_mm : floor coordinates (scalars or arrays). [mm]
    centre : tank centre in the floor frame. [mm]
    minutes_step : the minutes are rounded to this step (15: ``3:15``, ``3:30``). [min]

    Returns
    -------
    list of str
        ``"h:mm"`` with h from 1 to 12, 12 o'clock = +y (the datum), clockwise; ``""``
        at the centre or where a coordinate is not finite.
    """
    x = np.atleast_1d(np.asarray(x_mm, dtype=float)) - float(centre[0])
    y = np.atleast_1d(np.asarray(y_mm, dtype=float)) - float(centre[1])
    out = []
    for dx, dy in zip(x, y):
        if not (math.isfinite(dx) and math.isfinite(dy)) or (dx == 0.0 and dy == 0.0):
            out.append("")
            continue
        ang = math.degrees(math.atan2(dx, dy)) % 360.0  # from +y, clockwise
        minutes = int(round(ang * 2.0 / minutes_step)) * minutes_step  # 720 min = 360°
        minutes %= 720
        h, m = divmod(minutes, 60)
        out.append(f"{12 if h == 0 else h}:{m:02d}")
    return out


def distance_from_shell(x_mm, y_mm, *, radius_mm: float, centre=(0.0, 0.0)) -> np.ndarray:
    """Radius less the distance from the tank centre. [mm]

    Parameters
    ----------
    x_mm, y_mm : floor coordinates. [mm]
    radius_mm : inside radius of the shell. [mm]
    centre : tank centre in the floor frame. [mm]
    """
    x = np.asarray(x_mm, dtype=float) - float(centre[0])
    y = np.asarray(y_mm, dtype=float) - float(centre[1])
    return float(radius_mm) - np.hypot(x, y)


def coordinate_step(pitch_mm: float | None) -> float:
    """A rounding step for reported coordinates: about a fifth of the scan pitch,
    as 1, 2 or 5 × 10^k mm and at least 1 mm (a 25 mm grid gives 5 mm, a 2 mm grid 1 mm)."""
    if pitch_mm is None or not math.isfinite(pitch_mm) or pitch_mm <= 0:
        return 1.0
    target = pitch_mm / 5.0
    if target <= 1.0:
        return 1.0
    e = math.floor(math.log10(target))
    for m in (5, 2, 1):
        if m * 10 ** e <= target:
            return float(m * 10 ** e)
    return float(10 ** e)


def add_location_columns(df: pd.DataFrame, *, radius_mm: float, centre=(0.0, 0.0), x_col: str = "x_mm",
                         y_col: str = "y_mm", pitch_mm: float | None = None) -> pd.DataFrame:
    """A copy of ``df`` with ``clock`` and ``from_shell_mm`` placed right after ``y_col``.

    Parameters
    ----------
    df : table with point coordinates ``x_col``, ``y_col`` (e.g. indication centroids, or
        patch centres: give ``x_col``/``y_col`` of columns computed beforehand). [mm]
    radius_mm : inside radius of the shell. [mm]
    centre : tank centre. [mm]
    x_col, y_col : the coordinate columns.
    pitch_mm : scan pitch; ``from_shell_mm`` is rounded to :func:`coordinate_step`. [mm]

    Returns
    -------
    DataFrame
    """
    out = df.copy()
    x = out[x_col].to_numpy(dtype=float)
    y = out[y_col].to_numpy(dtype=float)
    step = coordinate_step(pitch_mm)
    ds = np.round(distance_from_shell(x, y, radius_mm=radius_mm, centre=centre) / step) * step
    pos = list(out.columns).index(y_col) + 1
    for c in ("clock", "from_shell_mm"):
        if c in out.columns:
            out = out.drop(columns=c)
    out.insert(pos, "clock", clock_position(x, y, centre=centre) if len(out) else [])
    out.insert(pos + 1, "from_shell_mm", ds)
    return out
