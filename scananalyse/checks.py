"""Plausibility checks that stop a unit mistake from giving a clean bill of health.

Each function is pure (it reads its arguments and raises or returns text) so the
pipeline can call it at the stage where its inputs are known:

- :func:`check_pitch_matches`: a scan whose header pitch disagrees with the spacing of
  its coordinates (right after reading a scan);
- :func:`check_inside_shell`: scanned cells outside the stated shell (a diameter in the
  wrong units, or a wrong centre), before the zones are drawn;
- :func:`shell_reach_warning`: the opposite, a shell far beyond every scanned cell;
- :func:`check_repair_to`: a repair-to thickness below MRT or above nominal, once the
  zones' MRT is known;
- :func:`check_same_tank`: two scans naming different tanks;
- :func:`patches_line` and :func:`no_patches_text`: the console's and the report's
  words on patch plates, which never say "none needed" while a zone is below MRT;
- :func:`check_job_against_scans`: the job's units resolved and the checks above that
  need only the job and the scans, in one call once the scans are read.

Errors are :class:`~scananalyse.errors.InputError` (one line, exit status 2).
"""

from __future__ import annotations

import math
import re

import numpy as np

from .errors import InputError

__all__ = ["LENGTH_UNITS", "check_job_against_scans", "check_inside_shell", "shell_reach_warning",
           "check_repair_to", "check_same_tank", "check_pitch_matches", "patches_line", "no_patches_text", "zones_below_mrt", "likely_unit"]

#: Millimetres per unit, for the units a length may be given in by mistake. [mm]
LENGTH_UNITS = {"mm": 1.0, "in": 25.4, "ft": 304.8, "m": 1000.0}

#: Rows of the grid handled at once when measuring distances (bounds the temporaries).
_CHUNK_ROWS = 256


def _fmt(v: float) -> str:
    """A length for a message: no needless decimals."""
    if v == 0 or abs(v) >= 100:
        return f"{v:.0f}"
    return f"{v:.3g}"


def likely_unit(value: float, given_units: str, fits) -> str | None:
    """The unit ``value`` was most likely meant in, if not ``given_units``.

    Parameters
    ----------
    value : the number as the user typed it.
    given_units : the unit it was read in (a key of :data:`LENGTH_UNITS`).
    fits : callable taking a length in mm and returning True where that reading of
        ``value`` is plausible.

    Returns
    -------
    str or None
        ``"<value> looks like inches: <value> in = <x> mm"`` (or ``"<value> looks like
        millimetres"``) for the first other unit
        (in :data:`LENGTH_UNITS` order) under which ``value`` fits, else None.
    """
    words = {"mm": "millimetres", "in": "inches", "ft": "feet", "m": "metres"}
    for unit, factor in LENGTH_UNITS.items():
        if unit == given_units:
            continue
        mm = value * factor
        if fits(mm):
            if unit == "mm":
                return f"{_fmt(value)} looks like millimetres"
            return f"{_fmt(value)} looks like {words[unit]}: {_fmt(value)} {unit} = {_fmt(mm)} mm"
    return None


def _scanned_radii(scan, centre_mm):
    """Distance of every scanned cell centre from ``centre_mm``, row chunk by row chunk. [mm]"""
    t = scan.thickness
    cx, cy = float(centre_mm[0]), float(centre_mm[1])
    dx = scan.x0 + scan.pitch * np.arange(t.shape[1]) - cx
    dx2 = dx * dx
    for i0 in range(0, t.shape[0], _CHUNK_ROWS):
        block = t[i0:i0 + _CHUNK_ROWS]
        rows, cols = np.nonzero(np.isfinite(block))
        if rows.size == 0:
            continue
        dy = scan.y0 + scan.pitch * (i0 + rows) - cy
        yield np.sqrt(dx2[cols] + dy * dy), rows + i0, cols


def _radial_extent(scan, centre_mm, limit_mm):
    """(cells farther than ``limit_mm``, the farthest distance, its cell, scanned cells). [mm]"""
    n_out, worst, worst_cell, n = 0, -math.inf, None, 0
    for r, rows, cols in _scanned_radii(scan, centre_mm):
        n += r.size
        n_out += int(np.count_nonzero(r > limit_mm))
        k = int(np.argmax(r))
        if r[k] > worst:
            worst, worst_cell = float(r[k]), (int(rows[k]), int(cols[k]))
    return n_out, worst, worst_cell, n


def check_inside_shell(scan, *, diameter_mm: float, centre_mm=(0.0, 0.0), tolerance_pitches: float = 2,
                       given: tuple[float, str] | None = None, what: str = "--diameter") -> None:
    """Refuse a scan with cells outside the stated shell by more than a tolerance.

    A diameter typed in the wrong units (315 meaning inches, read as mm) or a wrong
    centre puts scanned cells outside the tank, where no zone can hold them, and the
    assessment of what is left is meaningless.

    Parameters
    ----------
    scan : :class:`~scananalyse.scan.FloorScan`, in the floor frame.
    diameter_mm : inside diameter of the shell as read. [mm]
    centre_mm : tank centre in the floor frame. [mm]
    tolerance_pitches : cells whose centre lies up to this many pitches beyond the shell
        are accepted (the grid's own coarseness, a slightly short diameter). [-]
    given : ``(value, units)`` of the diameter as the user typed it, for the hint on
        the likely unit (default: ``diameter_mm`` in mm).
    what : the option or job field that gave the diameter, for the message.

    Raises
    ------
    InputError
        One line: how many cells lie outside, the worst distance, and the likely unit of
        the diameter (or the diameter the scan needs).
    """
    pitch = float(scan.pitch)
    tol = tolerance_pitches * pitch
    radius = diameter_mm / 2.0
    n_out, worst, cell, n = _radial_extent(scan, centre_mm, radius + tol)
    if n_out == 0:
        return
    value, units = given if given is not None else (diameter_mm, "mm")
    beyond = worst - radius

    def fits(d_mm):  # the shell just beyond the farthest cell, as a floor scan reaches
        return worst <= d_mm / 2 + tol and worst >= 0.75 * d_mm / 2

    hint = likely_unit(value, units, fits)
    if hint is None:
        need = 2 * worst
        hint = (f"the scanned cells need a diameter of at least {_fmt(need)} mm about the centre "
                f"({_fmt(centre_mm[0])}, {_fmt(centre_mm[1])}) mm: check the diameter, its units and the centre")
    src = f" of {scan.source}" if getattr(scan, "source", None) else ""
    shown = f"{_fmt(value)} {units}" + (f" = {_fmt(diameter_mm)} mm" if units != "mm" else "")
    raise InputError(f"{what}: {n_out} of {n} scanned cells{src} lie outside the shell of diameter {shown} "
                     f"by more than {tolerance_pitches:g} pitches ({_fmt(tol)} mm), up to {_fmt(beyond)} mm "
                     f"beyond it; {hint}")


def shell_reach_warning(scan, *, diameter_mm: float, centre_mm=(0.0, 0.0), given: tuple[float, str] | None = None,
                        what: str = "--diameter", min_reach: float = 0.5) -> str | None:
    """A warning text when no scanned cell comes near the stated shell.

    A diameter typed in mm but read as inches (8000 in = 203 m on an 8 m floor) leaves
    every cell deep in the interior: the critical and annular zones are empty.  A
    partial scan can do the same, so this is a warning, not an error.

    Parameters
    ----------
    scan : :class:`~scananalyse.scan.FloorScan`.
    diameter_mm : inside diameter as read. [mm]
    centre_mm : tank centre. [mm]
    given : ``(value, units)`` as typed, for the likely-unit hint.
    what : the option or field, for the message.
    min_reach : warn when the farthest scanned cell is nearer the centre than this
        fraction of the radius. [-]

    Returns
    -------
    str or None
        The warning text, or None when some scanned cell reaches the shell's region.
    """
    _, worst, _, n = _radial_extent(scan, centre_mm, math.inf)
    radius = diameter_mm / 2.0
    if n == 0 or worst >= min_reach * radius:
        return None
    value, units = given if given is not None else (diameter_mm, "mm")
    tol = 2 * float(scan.pitch)
    hint = likely_unit(value, units, lambda d: worst <= d / 2 + tol and worst >= 0.75 * d / 2)
    return (f"{what}: the shell (diameter {_fmt(diameter_mm)} mm) lies far beyond every scanned cell (the farthest "
            f"is {_fmt(worst)} mm from the centre, {100 * worst / radius:.0f} % of the radius): the critical and "
            f"annular zones hold no scanned cell" + (f"; {hint}" if hint else "; check the diameter and its units"))


def check_repair_to(repair_to_mm: float | None, mrt_mm, *, nominal_mm: float | None = None,
                    given: tuple[float, str] | None = None, what: str = "--repair-to") -> None:
    """Refuse a repair-to thickness below MRT (or above the nominal thickness).

    Repairing "everything below RT" with RT under MRT leaves the cells between RT and
    MRT unrepaired while they are already below MRT; an RT above nominal asks to patch
    the whole floor.  Either is most likely a unit mistake (0.15 meaning inches).

    Parameters
    ----------
    repair_to_mm : the repair-to thickness, or None (plan from rates: nothing to check). [mm]
    mrt_mm : the MRT: a number, an array of per-zone or per-cell values, or a mapping
        ``{zone name: MRT}`` (then the message names the zone); NaN ignored, the largest
        governs. [mm]
    nominal_mm : nominal plate thickness, if known. [mm]
    given : ``(value, units)`` as typed, for the likely-unit hint.
    what : the option or job field, for the message.

    Raises
    ------
    InputError
        One line with the thickness, the MRT (or nominal) and the likely unit.
    """
    if repair_to_mm is None:
        return
    zone = None
    if isinstance(mrt_mm, dict):
        named = {str(k): float(v) for k, v in mrt_mm.items() if v is not None and math.isfinite(float(v))}
        if not named:
            return
        zone = max(named, key=named.get)
        mrt_max = named[zone]
    else:
        mrt = np.asarray(mrt_mm, dtype=float)
        mrt = mrt[np.isfinite(mrt)]
        if mrt.size == 0:
            return
        mrt_max = float(mrt.max())
    value, units = given if given is not None else (repair_to_mm, "mm")
    shown = f"{_fmt(value)} {units}" + (f" = {repair_to_mm:.3g} mm" if units != "mm" else "")
    hi = nominal_mm if nominal_mm is not None and math.isfinite(nominal_mm) else math.inf

    def fits(t_mm):
        return mrt_max <= t_mm <= hi

    if repair_to_mm < mrt_max - 1e-9:
        hint = likely_unit(value, units, fits)
        raise InputError(f"{what}: a repair-to thickness of {shown} is below the MRT of {mrt_max:.4g} mm"
                         + (f" (zone {zone})" if zone else "") + ": cells "
                         "between the two would stay below MRT unrepaired; give at least the MRT"
                         + (f" ({hint})" if hint else ""))
    if repair_to_mm > hi + 1e-9:
        hint = likely_unit(value, units, fits)
        raise InputError(f"{what}: a repair-to thickness of {shown} is above the nominal plate thickness of "
                         f"{hi:.4g} mm: every cell would be repaired" + (f" ({hint})" if hint else ""))


def _tank_key(name: str) -> str:
    return re.sub(r"[^0-9a-z]", "", str(name).casefold())


def check_same_tank(old, new) -> str | None:
    """A warning text when the two scans name different tanks.

    Tank names are compared ignoring case, spaces and punctuation (``TK-07`` and
    ``tk 07`` are one tank).  A scan that names no tank is not compared.

    Parameters
    ----------
    old, new : :class:`~scananalyse.scan.FloorScan` (or anything with ``.meta.tank``).

    Returns
    -------
    str or None
    """
    a, b = (str(getattr(s.meta, "tank", "") or "").strip() for s in (old, new))
    if not a or not b or _tank_key(a) == _tank_key(b):
        return None
    sa = f" ({old.source})" if getattr(old, "source", None) else ""
    sb = f" ({new.source})" if getattr(new, "source", None) else ""
    return (f"the two scans name different tanks: {a!r}{sa} and {b!r}{sb}; "
            "check that both are inspections of the same floor")


def _lattice_step(used: np.ndarray) -> int:
    """The common step of the indices of the occupied rows (or columns); 1 when fewer than 3."""
    if used.size < 3:
        return 1
    return int(np.gcd.reduce(np.diff(used)))


def check_pitch_matches(scan) -> None:
    """Refuse a scan whose header pitch is a fraction of its coordinates' spacing.

    Coordinates every 20 mm under a header pitch of 10 mm pass the on-grid test but
    fill only every other row and column: the grid is a quarter filled, coverage and
    every area-based statistic are wrong.  Detected as the occupied rows (or columns)
    all lying a common step ``k > 1`` apart.

    Parameters
    ----------
    scan : :class:`~scananalyse.scan.FloorScan` as read (``source`` names the file).

    Raises
    ------
    InputError
        ``"<file>: field 'pitch': ..."`` with the header pitch and the spacing found.
    """
    finite = np.isfinite(scan.thickness)
    ky = _lattice_step(np.flatnonzero(finite.any(axis=1)))
    kx = _lattice_step(np.flatnonzero(finite.any(axis=0)))
    if kx == 1 and ky == 1:
        return
    units = getattr(scan.meta, "units", "mm")
    f = 25.4 if units == "in" else 1.0
    p = scan.pitch / f
    fill = 100.0 / (kx * ky)
    src = scan.source or "scan"
    raise InputError(f"{src}: field 'pitch': the header gives {_fmt(p)} {units} but the scanned cells lie every "
                     f"{_fmt(kx * p)} {units} in x and {_fmt(ky * p)} {units} in y (the grid would be at most "
                     f"{fill:.0f} % filled): correct the header's pitch")


def zones_below_mrt(table) -> list[str]:
    """Names of the zones of a zone table that are below MRT.

    A zone is below MRT when its ``flags`` hold ``below-mrt`` or its ``t_min_mm`` is
    less than its ``mrt_mm``.

    Parameters
    ----------
    table : zone table (``zones.csv`` columns) or None.

    Returns
    -------
    list of str
    """
    if table is None or len(table) == 0:
        return []
    out = []
    for _, z in table.iterrows():
        flags = str(z.get("flags", "") or "").split(";")
        try:
            thin = float(z.get("t_min_mm", math.nan)) < float(z.get("mrt_mm", math.nan))
        except (TypeError, ValueError):
            thin = False
        if "below-mrt" in flags or thin:
            out.append(str(z["zone"]))
    return out


def no_patches_text(zones=None, zones_repaired=None) -> str:
    """What to say when no patch plate is proposed: "no patch plates needed" only when no
    zone is below MRT (as found or after the repairs), else which zones are.

    Parameters
    ----------
    zones, zones_repaired : zone tables as found and after the repairs, or None.

    Returns
    -------
    str
    """
    names = list(dict.fromkeys(zones_below_mrt(zones) + zones_below_mrt(zones_repaired)))
    if names:
        return (f"no patch plates proposed, but zones below MRT: {', '.join(names)}; "
                "repair before return to service")
    return "no patch plates needed"


def patches_line(n_patches: int, area_m2: float, zones=None, zones_repaired=None) -> str:
    """The console's line on the proposed patch plates.

    It says "none needed" only when no zone is below MRT (:func:`zones_below_mrt`); with
    patches proposed and a zone still below MRT after them, it names that zone.

    Parameters
    ----------
    n_patches : number of patch plates proposed.
    area_m2 : their total area. [m²]
    zones : the as-found zone table (``zone``, ``flags``, ``t_min_mm``, ``mrt_mm``), or None.
    zones_repaired : the zone table after the repairs, or None.

    Returns
    -------
    str
    """
    if n_patches:
        line = f"proposed patch plates: {n_patches}, {area_m2:.2f} m2 in all (patches.csv, patches.dxf)"
        still = zones_below_mrt(zones_repaired)
        if still:
            line += f"; zones still below MRT after them: {', '.join(still)}"
        return line
    names = list(dict.fromkeys(zones_below_mrt(zones) + zones_below_mrt(zones_repaired)))
    if names:
        return (f"proposed patch plates: none, but zones below MRT: {', '.join(names)}; "
                "repair before return to service (see the notes)")
    return "proposed patch plates: none needed for the target interval"


def check_job_against_scans(job, new, old=None):
    """Resolve the job's length units and check it against the scans, before any analysis.

    In order: each scan's header pitch against its coordinates
    (:func:`check_pitch_matches`), the job's lengths into the newer scan's units
    (:func:`~scananalyse.job.resolve_units`), the newer scan inside the stated shell
    (:func:`check_inside_shell`), then the warnings of :func:`shell_reach_warning` and
    :func:`check_same_tank`.

    Parameters
    ----------
    job : :class:`~scananalyse.job.Job` as built from the command line or a job file.
    new : the newer (or only) :class:`~scananalyse.scan.FloorScan`.
    old : the older scan, or None.

    Returns
    -------
    (Job, list of str)
        The job with its lengths in the scans' units (what the pipeline reads), and the
        warning texts (possibly none).

    Raises
    ------
    InputError
        One line naming the file or the option / job field.
    """
    from .job import resolve_units

    for scan in (old, new):
        if scan is not None:
            check_pitch_matches(scan)
    job = resolve_units(job, new.meta.units)
    warnings_ = []
    if job.diameter is not None:
        f = LENGTH_UNITS[new.meta.units]
        d_mm = job.diameter * f
        centre = (job.centre[0] * f, job.centre[1] * f)
        given = job.typed.get("diameter")
        check_inside_shell(new, diameter_mm=d_mm, centre_mm=centre, given=given, what=job.where("diameter"))
        w = shell_reach_warning(new, diameter_mm=d_mm, centre_mm=centre, given=given, what=job.where("diameter"))
        if w:
            warnings_.append(w)
    if old is not None:
        w = check_same_tank(old, new)
        if w:
            warnings_.append(w)
    return job, warnings_
