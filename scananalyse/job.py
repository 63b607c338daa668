"""Job settings for ``compare`` and ``assess``: one dataclass, read from TOML and CLI flags.

A job file is TOML only (no code is ever evaluated), a regular file of at most
:data:`MAX_JOB_BYTES`.  Every key is checked when the file is read: an unknown key, a
value of the wrong type or out of its range (:data:`BOUNDS`) is an
:class:`~scananalyse.errors.InputError` naming the file and the key.  Paths in a job
file are resolved relative to the job file's folder and must stay inside it unless
``allow_absolute_paths`` is set; a path with a NUL character, or naming a folder, a
FIFO or a device, is refused.

Length units: every length of a job (diameter, annular width, centre, zone polygons,
repair-to, patch thickness and the lower shell course's tmin) is in the job's *length units*: ``report.units`` (or
the command line's ``--units``) when given, else the units of the newer scan.
:func:`resolve_units` converts them once the scan's units are known.

Example::

    [floor]
    diameter = 8000          # inside diameter, in the job's length units (see below)
    annular_width = 600      # optional annular ring width
    centre = [0.0, 0.0]
    shell_course_tmin = 6.0  # optional tmin of the lower shell course (critical-zone minimum)

    [protection]
    leak_detection = false   # release detection and containment (MRT case of Table 4.4)
    reinforced_lining = false
    coated = false
    coating_life_years = 0
    cp_effective = false
    release_prevention_barrier = false

    [attribution]
    shapes = "sides.csv"     # operator attribution shapes (docs/attribution.md)
    default_side = "under"
    repairs = "repairs.csv"

    [registration]
    control_points = "points.csv"

    [inputs]
    readings = ["ut_2025.csv", "ut_2015.csv"]  # spot readings (readings CSV v1), either outage
    sizing_correction = true  # scale unproved MFL loss when the prove-ups show under-sizing

    [repair]
    target_interval = 10
    patch_thickness = 6.35   # in the job's length units
    repair_to = 0            # in the job's length units; 0 = plan from rates instead

    [rules]
    name = "api653"
    [rules.overrides]
    interval_cap_y = 15

    [report]
    units = "mm"             # display units, and the units of every length above

    [zones]                  # optional user zones, carved out of the interior
    rings = 2                # a ring x sector grid ...
    sectors = 4
    polygons = [{name = "draw-off", points = [[-3000, -500], [-2000, -500], [-2000, 500]]}]
"""

from __future__ import annotations

import dataclasses
import math
import os
import stat
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from .errors import InputError

__all__ = ["Job", "read_job", "resolve_path", "resolve_units", "check_value", "check_input_file", "BOUNDS",
           "LENGTH_FIELDS", "MAX_JOB_BYTES", "MM_PER_UNIT", "SCAN_UNITS"]

#: Largest job file read (a job file is a page of settings). [bytes]
MAX_JOB_BYTES = 1_000_000

#: Millimetres per length unit a job may be given in. [mm]
MM_PER_UNIT = {"mm": 1.0, "in": 25.4}

#: ``units`` of :meth:`Job.with_lengths` for values in the scans' units whatever the job's.
SCAN_UNITS = "scan"

#: Job fields holding lengths the user gives in the job's length units.
LENGTH_FIELDS = ("diameter", "annular_width", "centre", "zone_polygons", "repair_to", "patch_thickness",
                 "shell_tmin")

#: Accepted range of every numeric job value: ``field -> (low, high, unit)``.  Lengths
#: (unit ``"mm"`` and in :data:`LENGTH_FIELDS`) are checked in mm once their units are
#: known; before that, a value is accepted if it is in range read as mm or as inches.
#: The bounds only stop absurd values (a diameter of 1e308, a block of a micrometre);
#: they are not engineering limits.  [practice]
BOUNDS = {
    "diameter": (1_000.0, 200_000.0, "mm"),          # 1 m to 200 m
    "annular_width": (10.0, 10_000.0, "mm"),
    "centre": (-200_000.0, 200_000.0, "mm"),
    "zone_polygons": (-200_000.0, 200_000.0, "mm"),
    "repair_to": (0.1, 50.0, "mm"),                  # 0 in a job file means "plan from rates"
    "patch_thickness": (1.0, 50.0, "mm"),
    "shell_tmin": (1.0, 100.0, "mm"),
    "target_interval": (0.5, 30.0, "y"),
    "target_probability": (1e-4, 0.5, ""),
    "coating_life_years": (0.0, 100.0, "y"),
    "block_mm": (100.0, 10_000.0, "mm"),             # always mm
    "seed": (0, 2**32 - 1, ""),
    "zone_rings": (1, 100, ""),
    "zone_sectors": (1, 100, ""),
}

#: The command-line option of each job field, for messages about values not from a file.
OPTIONS = {
    "diameter": "--diameter", "annular_width": "--annular-width", "centre": "floor.centre",
    "zone_polygons": "zones.polygons", "repair_to": "--repair-to", "patch_thickness": "--patch-thickness",
    "shell_tmin": "--shell-tmin",
    "target_interval": "--target-interval", "target_probability": "--target-probability", "coating_life_years": "--coating-life", "block_mm": "--block-mm",
    "seed": "--seed", "shapes": "--shapes", "repairs": "--repairs", "control_points": "--control-points",
    "patches": "--patches", "top_depth": "--top-depth", "readings": "--readings",
    "sizing_correction": "--no-sizing-correction",
}


@dataclass
class Job:
    """Everything a compare/assess run needs besides the two scans.

    Lengths (:data:`LENGTH_FIELDS`) are as the user gave them: each in
    ``length_units_of[field]`` if set, else in ``length_units``, else (None) in the
    newer scan's units.  :func:`resolve_units` turns them into the scans' units (what
    the pipeline reads) and fills ``repair_to_mm``, ``patch_thickness_mm`` and
    ``shell_tmin_mm``.  Before that, those three hold provisional values (the given number read in the stated units,
    mm if none).  Fields named ``*_mm`` otherwise are millimetres; ``units`` is the
    display unit of the report and console.
    """

    diameter: float | None = None  # job's length units
    annular_width: float | None = None  # job's length units
    centre: tuple[float, float] = (0.0, 0.0)  # job's length units
    leak_detection: bool = False
    reinforced_lining: bool = False
    coated: bool = False
    coating_life_years: float = 0.0
    cp_effective: bool = False
    release_prevention_barrier: bool = False
    shapes: str | None = None
    default_side: str = "under"
    top_depth: str | None = None
    repairs: str | None = None
    control_points: str | None = None
    target_interval: float = 10.0
    target_probability: float | None = None  # off; else the largest P(below MRT) at next_due
    patch_thickness_mm: float | None = None
    repair_to_mm: float | None = None
    patches: str | None = None
    under_cause_removed: bool = False
    readings: list = field(default_factory=list)  # readings CSV files (either outage, told apart by date)
    sizing_correction: bool = True  # correct MFL under-sizing found by the prove-ups
    ruleset: str = "api653"
    rule_overrides: dict = field(default_factory=dict)
    units: str = "mm"
    csv_units: str = "mm"  # "in": inch and mils-per-year columns beside the SI ones in the CSVs
    block_mm: float = 1000.0
    zone_rings: int | None = None
    zone_sectors: int | None = None
    zone_polygons: list = field(default_factory=list)  # [(name, [(x, y), ...]) in the job's length units]
    seed: int = 0
    allow_absolute_paths: bool = False
    source: str | None = None
    repair_to: float | None = None  # job's length units (None: plan from rates)
    patch_thickness: float | None = None  # job's length units (None: the rule set's)
    shell_tmin: float | None = None  # job's length units (None: not given; the shell term is not applied)
    shell_tmin_mm: float | None = None  # tmin of the lower shell course [mm], from shell_tmin
    length_units: str | None = None  # units of the lengths; None = the newer scan's units
    length_units_of: dict = field(default_factory=dict)  # field -> units, where one field differs
    origins: dict = field(default_factory=dict)  # field -> "file: field 'x.y'" or "--option"
    typed: dict = field(default_factory=dict)  # field -> (value, units) as typed (filled by resolve_units)

    def replace(self, **changes) -> "Job":
        return dataclasses.replace(self, **changes)

    def where(self, name: str) -> str:
        """Where a field's value came from, for messages: ``"job.toml: field 'floor.diameter'"``
        or the command-line option (``"--diameter"``)."""
        return self.origins.get(name) or OPTIONS.get(name, name)

    def units_of(self, name: str) -> str | None:
        """The units a length field is given in (None: the newer scan's)."""
        u = self.length_units_of.get(name) or self.length_units
        return None if u == SCAN_UNITS else u

    def with_lengths(self, *, units: str | None = None, where: dict | None = None, **values) -> "Job":
        """A copy with length fields set, each in ``units`` (None: the job's length units).

        Parameters
        ----------
        units : ``"mm"``, ``"in"``, :data:`SCAN_UNITS` (the scans' units whatever the job
            says: a fleet manifest's diameter) or None (the job's ``length_units``, else the
            scans').
        where : ``{field: origin}`` for messages (default: the command-line option).
        values : lengths by field name (:data:`LENGTH_FIELDS`); None values are skipped.

        Raises
        ------
        InputError
            A value out of :data:`BOUNDS` (read in ``units``), naming its origin.
        """
        changes, of, origins = {}, dict(self.length_units_of), dict(self.origins)
        for name, val in values.items():
            if val is None:
                continue
            if name not in LENGTH_FIELDS:
                raise TypeError(f"{name} is not a length field")
            origin = (where or {}).get(name) or OPTIONS.get(name, name)
            u = units or self.length_units
            check_value(name, val, what=origin, units=None if u == SCAN_UNITS else u)
            changes[name] = val
            origins[name] = origin
            if units is not None:
                of[name] = units
            else:
                of.pop(name, None)
        return _provisional(self.replace(length_units_of=of, origins=origins, **changes))


def _fmt(v: float) -> str:
    """A number for a message: whole numbers as such (below 1e12), else 4 significant digits."""
    v = float(v)
    if v.is_integer() and abs(v) < 1e12:
        return str(int(v))
    return f"{v:.4g}"


def check_value(name: str, value, *, what: str, units: str | None = "mm") -> None:
    """Check a numeric job value against :data:`BOUNDS`.

    Parameters
    ----------
    name : the job field (a key of :data:`BOUNDS`).
    value : a number, or for ``centre`` a pair, for ``zone_polygons`` the
        ``[(name, [(x, y), ...])]`` list.
    what : where the value came from (``"job.toml: field 'floor.diameter'"``, ``"--diameter"``).
    units : the units of a length: ``"mm"``, ``"in"``, or None when not yet known (then a
        value in range read as mm or as inches passes).

    Raises
    ------
    InputError
        ``"<what>: must be between <lo> and <hi> <unit>, got <value>"`` (or not finite).
    """
    lo, hi, unit = BOUNDS[name]
    if name == "centre":
        nums = list(value)
    elif name == "zone_polygons":
        nums = [c for _, pts in value for p in pts for c in p]
    else:
        nums = [value]
    for v in nums:
        if not math.isfinite(float(v)):
            raise InputError(f"{what}: not a finite number, got {v!r}")
    if name not in LENGTH_FIELDS:
        for v in nums:
            if not lo <= v <= hi:
                raise InputError(f"{what}: must be between {_fmt(lo)} and {_fmt(hi)}{' ' + unit if unit else ''}, "
                                 f"got {_fmt(float(v))}")
        return
    if units is None:
        # the scans' units are not known yet: in range as mm or as inches
        for v in nums:
            if not (lo <= v <= hi or lo <= v * MM_PER_UNIT["in"] <= hi):
                raise InputError(f"{what}: must be between {_fmt(lo)} and {_fmt(hi)} mm (or {_fmt(lo / 25.4)} to "
                                 f"{_fmt(hi / 25.4)} in), got {_fmt(float(v))}")
        return
    f = MM_PER_UNIT[units]
    for v in nums:
        if not lo <= v * f <= hi:
            from .checks import likely_unit

            hint = likely_unit(float(v), units, lambda mm: lo <= mm <= hi) if lo > 0 else None
            raise InputError(f"{what}: must be between {_fmt(lo / f)} and {_fmt(hi / f)} {units}, got {_fmt(float(v))}"
                             + (f" ({hint})" if hint else ""))


#: Lengths the pipeline reads in mm: (job field, its mm field).
_MM_FIELDS = (("repair_to", "repair_to_mm"), ("patch_thickness", "patch_thickness_mm"),
              ("shell_tmin", "shell_tmin_mm"))


def _provisional(job: Job) -> Job:
    """Fill ``repair_to_mm``, ``patch_thickness_mm`` and ``shell_tmin_mm`` from the given values, read in
    their stated units (mm when the scans' units are still unknown)."""
    changes = {}
    for raw, mm in _MM_FIELDS:
        v = getattr(job, raw)
        if v is not None:
            changes[mm] = v * MM_PER_UNIT[job.units_of(raw) or "mm"]
    return job.replace(**changes) if changes else job


def resolve_units(job: Job, scan_units: str) -> Job:
    """The job with its lengths in the scans' units, once those are known.

    Every length (:data:`LENGTH_FIELDS`) given in other units is converted into
    ``scan_units`` (what the pipeline reads: it converts the scans' units to mm);
    ``repair_to_mm``, ``patch_thickness_mm`` and ``shell_tmin_mm`` are set in mm.  The values as typed
    are kept in ``typed`` (for messages that suggest the likely unit), every length is
    range-checked in mm, and the annular width must be less than the radius.
    Idempotent: resolving twice with the same units changes nothing.

    Parameters
    ----------
    job : :class:`Job` as read from the command line and job file.
    scan_units : the newer scan's units, ``"mm"`` or ``"in"``.

    Returns
    -------
    Job

    Raises
    ------
    InputError
        A length out of :data:`BOUNDS` or an annular width not less than the radius,
        naming the option or the job file's field.
    """
    s = MM_PER_UNIT[scan_units]
    typed = dict(job.typed)
    changes = {}
    for name in LENGTH_FIELDS:
        val = getattr(job, name)
        if val is None or (name == "zone_polygons" and not val):
            continue
        if name == "centre" and tuple(val) == (0.0, 0.0) and name not in job.origins:
            continue
        u = job.units_of(name) or scan_units
        typed.setdefault(name, (val, u))
        check_value(name, val, what=job.where(name), units=u)
        r = MM_PER_UNIT[u] / s
        if name == "centre":
            changes[name] = (val[0] * r, val[1] * r)
        elif name == "zone_polygons":
            changes[name] = [(label, [(x * r, y * r) for x, y in pts]) for label, pts in val]
        else:
            changes[name] = val * r
    for raw, mm in _MM_FIELDS:
        if raw in changes:
            changes[mm] = changes[raw] * s
    out = job.replace(length_units=scan_units, length_units_of={}, typed=typed, **changes)
    if out.diameter is not None and out.annular_width is not None and not out.annular_width < out.diameter / 2:
        v, u = typed.get("annular_width", (out.annular_width, scan_units))
        raise InputError(f"{job.where('annular_width')}: an annular ring width of {_fmt(v)} {u} is not less than "
                         f"the tank's radius ({_fmt(out.diameter / 2)} {scan_units})")
    return out


# (section, key) -> (Job field, accepted python types)
_NUM = (int, float)
_SCHEMA = {
    ("floor", "diameter"): ("diameter", _NUM),
    ("floor", "annular_width"): ("annular_width", _NUM),
    ("floor", "centre"): ("centre", (list,)),
    ("floor", "shell_course_tmin"): ("shell_tmin", _NUM),
    ("protection", "leak_detection"): ("leak_detection", (bool,)),
    ("protection", "reinforced_lining"): ("reinforced_lining", (bool,)),
    ("protection", "coated"): ("coated", (bool,)),
    ("protection", "coating_life_years"): ("coating_life_years", _NUM),
    ("protection", "cp_effective"): ("cp_effective", (bool,)),
    ("protection", "release_prevention_barrier"): ("release_prevention_barrier", (bool,)),
    ("attribution", "shapes"): ("shapes", (str,)),
    ("attribution", "default_side"): ("default_side", (str,)),
    ("attribution", "top_depth"): ("top_depth", (str,)),
    ("attribution", "repairs"): ("repairs", (str,)),
    ("registration", "control_points"): ("control_points", (str,)),
    ("repair", "target_interval"): ("target_interval", _NUM),
    ("assessment", "target_probability"): ("target_probability", _NUM),
    ("repair", "patch_thickness"): ("patch_thickness", _NUM),
    ("repair", "repair_to"): ("repair_to", _NUM),
    ("repair", "patches"): ("patches", (str,)),
    ("repair", "under_cause_removed"): ("under_cause_removed", (bool,)),
    ("rules", "name"): ("ruleset", (str,)),
    ("rules", "overrides"): ("rule_overrides", (dict,)),
    ("report", "units"): ("units", (str,)),
    ("report", "csv_units"): ("csv_units", (str,)),
    ("statistics", "block_mm"): ("block_mm", _NUM),
    ("zones", "rings"): ("zone_rings", (int,)),
    ("zones", "sectors"): ("zone_sectors", (int,)),
    ("zones", "polygons"): ("zone_polygons", (list,)),
    ("statistics", "seed"): ("seed", (int,)),
    ("paths", "allow_absolute"): ("allow_absolute_paths", (bool,)),
    ("inputs", "readings"): ("readings", (list,)),
    ("inputs", "sizing_correction"): ("sizing_correction", (bool,)),
}
_PATH_FIELDS = ("shapes", "top_depth", "repairs", "control_points", "patches")

_KINDS = ((stat.S_ISDIR, "a folder"), (stat.S_ISFIFO, "a FIFO (named pipe)"), (stat.S_ISCHR, "a character device"),
          (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"))


def _not_regular(mode: int) -> str | None:
    if stat.S_ISREG(mode):
        return None
    return next((word for test, word in _KINDS if test(mode)), "not a regular file")


def check_input_file(path, what: str, *, must_exist: bool = True) -> None:
    """Refuse an input path that is not a regular file, without opening it.

    A FIFO would block the reader forever and a device (``/dev/zero``) exhaust memory,
    so the path is checked with ``stat`` (which neither blocks nor reads) first.

    Parameters
    ----------
    path : the path.
    what : where it came from, for the message (``"job.toml: field 'attribution.shapes'"``).
    must_exist : refuse a missing path too (else leave that to the reader).

    Raises
    ------
    InputError
        NUL character, missing (when ``must_exist``), or not a regular file (says what it is).
    """
    text = os.fspath(path)
    if "\0" in text:
        raise InputError(f"{what}: the path contains a NUL character")
    try:
        st = os.stat(text)
    except FileNotFoundError:
        if must_exist:
            raise InputError(f"{what}: {text!r} does not exist") from None
        return
    except OSError as exc:
        raise InputError(f"{what}: {text!r}: {exc.strerror or exc}") from None
    kind = _not_regular(st.st_mode)
    if kind:
        raise InputError(f"{what}: {text!r} is {kind}, not a regular file")


def resolve_path(value: str, base: Path, *, allow_absolute: bool, what: str) -> str:
    """Resolve a path from a job or manifest file against its folder.

    A relative path that escapes ``base`` (``..``) or an absolute path is refused
    unless ``allow_absolute`` is set; so is a path with a NUL character.
    """
    if "\0" in value:
        raise InputError(f"{what}: the path contains a NUL character")
    p = Path(value)
    if p.is_absolute():
        if not allow_absolute:
            raise InputError(f"{what}: absolute path {value!r} refused (set allow_absolute to permit)")
        return str(p)
    full = (base / p).resolve()
    try:
        full.relative_to(base.resolve())
    except ValueError:
        if not allow_absolute:
            raise InputError(f"{what}: path {value!r} escapes the folder {str(base)!r}") from None
    return str(full)


def _polygons(val, name):
    """``[{name = "sump area", points = [[x, y], ...]}, ...]`` -> [(name, [(x, y), ...])]."""
    out = []
    for i, item in enumerate(val, start=1):
        where_ = f"{name}: field 'zones.polygons[{i}]'"
        if not isinstance(item, dict) or set(item) - {"name", "points"} or "points" not in item:
            raise InputError(f"{where_}: expected a table with 'name' and 'points'")
        pts = item["points"]
        if not isinstance(pts, list) or len(pts) < 3:
            raise InputError(f"{where_}: 'points' needs at least 3 [x, y] pairs")
        clean = []
        for p in pts:
            if not (isinstance(p, list) and len(p) == 2
                    and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in p)):
                raise InputError(f"{where_}: each point must be [x, y] numbers")
            clean.append((float(p[0]), float(p[1])))
        label = item.get("name")
        if label is not None and not isinstance(label, str):
            raise InputError(f"{where_}: 'name' must be text")
        label = str(label or f"zone{i}")
        out.append((label, clean))
    return out


def _read_bounded(path: Path, name: str) -> bytes:
    """The job file's bytes: a regular file of at most :data:`MAX_JOB_BYTES`, opened
    without blocking (a FIFO is refused, not waited on)."""
    if "\0" in name:
        raise InputError("--job: the path contains a NUL character")
    try:
        fd = os.open(name, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
    except OSError as exc:
        raise InputError(f"{name}: cannot read job file ({exc.strerror or exc})") from None
    try:
        st = os.fstat(fd)
        kind = _not_regular(st.st_mode)
        if kind:
            raise InputError(f"{name}: the job file is {kind}, not a regular file")
        if st.st_size > MAX_JOB_BYTES:
            raise InputError(f"{name}: job file of {st.st_size} bytes is larger than the {MAX_JOB_BYTES} allowed")
        chunks, total = [], 0
        while True:
            chunk = os.read(fd, 65536)
            if not chunk:
                break
            total += len(chunk)
            if total > MAX_JOB_BYTES:
                raise InputError(f"{name}: job file is larger than the {MAX_JOB_BYTES} bytes allowed")
            chunks.append(chunk)
        return b"".join(chunks)
    except OSError as exc:
        raise InputError(f"{name}: cannot read job file ({exc.strerror or exc})") from None
    finally:
        os.close(fd)


def read_job(path) -> Job:
    """Read a TOML job file into a :class:`Job`, checking every key, type and range.

    Parameters
    ----------
    path : the job file (a regular file of at most :data:`MAX_JOB_BYTES`).

    Returns
    -------
    Job
        Lengths in the file's ``report.units`` if given, else in the scans' units
        (see :func:`resolve_units`); paths resolved against the file's folder.

    Raises
    ------
    InputError
        One line naming the file and the field (or the file alone for its size, kind,
        encoding or TOML syntax).
    """
    path = Path(path)
    name = os.fspath(path)
    raw = _read_bounded(path, name)
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise InputError(f"{name}: not UTF-8 text (byte {exc.start})") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{name}: not valid TOML ({exc})") from None
    except RecursionError:
        raise InputError(f"{name}: not valid TOML (arrays or tables nested too deeply)") from None
    values, origins = {}, {}
    for section, body in data.items():
        if not isinstance(body, dict):
            raise InputError(f"{name}: field '{section}': expected a [{section}] table")
        for key, val in body.items():
            spec = _SCHEMA.get((section, key))
            if spec is None:
                raise InputError(f"{name}: field '{section}.{key}': unknown key")
            fname, types = spec
            at = f"{name}: field '{section}.{key}'"
            if isinstance(val, bool) and bool not in types:
                raise InputError(f"{at}: expected a number, got {val!r}")
            if not isinstance(val, types):
                want = "/".join(t.__name__ for t in types)
                raise InputError(f"{at}: expected {want}, got {type(val).__name__}")
            if fname == "zone_polygons":
                val = _polygons(val, name)
            if fname == "readings" and not all(isinstance(r, str) for r in val):
                raise InputError(f"{at}: expected a list of file names")
            if fname == "centre":
                if len(val) != 2 or not all(isinstance(v, _NUM) and not isinstance(v, bool) for v in val):
                    raise InputError(f"{name}: field 'floor.centre': expected two numbers")
                val = (float(val[0]), float(val[1]))
            elif types is _NUM:
                val = float(val)
                if not math.isfinite(val):
                    raise InputError(f"{at}: not a finite number")
                if val < 0 or (val == 0 and fname in ("diameter", "annular_width", "patch_thickness", "shell_tmin",
                                                      "target_interval", "block_mm")):
                    raise InputError(f"{at}: must be positive, got {val:g}")
            if isinstance(val, str) and "\0" in val:
                raise InputError(f"{at}: contains a NUL character")
            values[fname] = val
            origins[fname] = at
    if ("zone_rings" in values) != ("zone_sectors" in values):
        raise InputError(f"{name}: field 'zones.rings': give both zones.rings and zones.sectors")
    if values.get("default_side", "under") not in ("under", "top"):
        raise InputError(f"{name}: field 'attribution.default_side': must be 'under' or 'top'")
    if values.get("units", "mm") not in ("mm", "in"):
        raise InputError(f"{name}: field 'report.units': must be 'mm' or 'in'")
    if values.get("csv_units", "mm") not in ("mm", "in"):
        raise InputError(f"{name}: field 'report.csv_units': must be 'mm' or 'in'")
    if values.get("repair_to") == 0:
        del values["repair_to"]  # 0 = plan from rates
    units = values.get("units")  # the file's lengths are in its display units when it gives them
    for fname in BOUNDS:
        if fname in values:
            check_value(fname, values[fname], what=origins[fname], units=units)
    if "ruleset" in values or "rule_overrides" in values:
        from .rules import get_ruleset

        try:
            get_ruleset(values.get("ruleset", "api653"), values.get("rule_overrides") or None, source=name)
        except InputError as exc:
            msg = str(exc)
            # the rule set's message names the field as 'name' or the override key: make it the job's
            for k in ["name", "overrides", *(values.get("rule_overrides") or {})]:
                tag = f"{name}: field '{k}'"
                if msg.startswith(tag):
                    sec = "rules.name" if k == "name" else "rules.overrides" if k == "overrides" else \
                        f"rules.overrides.{k}"
                    msg = f"{name}: field '{sec}'" + msg[len(tag):]
                    break
            raise InputError(msg) from None
    base = path.parent
    allow = values.get("allow_absolute_paths", False)
    for f in _PATH_FIELDS:
        if f in values:
            values[f] = resolve_path(values[f], base, allow_absolute=allow, what=origins[f])
            check_input_file(values[f], origins[f], must_exist=False)
    if "readings" in values:
        paths = []
        for i, r in enumerate(values["readings"], start=1):
            at = f"{name}: field 'inputs.readings[{i}]'"
            if "\0" in r:
                raise InputError(f"{at}: contains a NUL character")
            paths.append(resolve_path(r, base, allow_absolute=allow, what=at))
            check_input_file(paths[-1], at, must_exist=False)
        values["readings"] = paths
    job = Job(source=name, length_units=units, origins=origins, **values)
    return _provisional(job)
