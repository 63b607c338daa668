"""Job settings for ``compare`` and ``assess``: one dataclass, read from TOML and CLI flags.

A job file is TOML only (no code is ever evaluated).  Every key is checked: an
unknown key or a value of the wrong type is an :class:`~scananalyse.errors.InputError`
naming the file and the key.  Paths in a job file are resolved relative to the
job file's folder and must stay inside it unless ``allow_absolute_paths`` is set.

Example::

    [floor]
    diameter = 8000          # inside diameter, in the scans' units
    annular_width = 600      # optional annular ring width, scans' units
    centre = [0.0, 0.0]

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

    [repair]
    target_interval = 10
    patch_thickness = 6.35   # mm
    repair_to = 0            # mm; 0 = plan from rates instead

    [rules]
    name = "api653"
    [rules.overrides]
    interval_cap_y = 15

    [report]
    units = "mm"

    [zones]                  # optional user zones, carved out of the interior
    rings = 2                # a ring x sector grid ...
    sectors = 4
    polygons = [{name = "draw-off", points = [[-3000, -500], [-2000, -500], [-2000, 500]]}]
"""

from __future__ import annotations

import dataclasses
import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from .errors import InputError

__all__ = ["Job", "read_job", "resolve_path"]


@dataclass
class Job:
    """Everything a compare/assess run needs besides the two scans.

    Lengths given by the user in the scans' units are converted to mm by the
    pipeline once the scans are read (``*_in_scan_units`` fields); fields named
    ``*_mm`` are already millimetres.
    """

    diameter: float | None = None  # scans' units
    annular_width: float | None = None  # scans' units
    centre: tuple[float, float] = (0.0, 0.0)  # scans' units
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
    patch_thickness_mm: float | None = None
    repair_to_mm: float | None = None
    patches: str | None = None
    under_cause_removed: bool = False
    ruleset: str = "api653"
    rule_overrides: dict = field(default_factory=dict)
    units: str = "mm"
    block_mm: float = 1000.0
    zone_rings: int | None = None
    zone_sectors: int | None = None
    zone_polygons: list = field(default_factory=list)  # [(name, [(x, y), ...]) in the scans' units]
    seed: int = 0
    allow_absolute_paths: bool = False
    source: str | None = None

    def replace(self, **changes) -> "Job":
        return dataclasses.replace(self, **changes)


# (section, key) -> (Job field, accepted python types, converter)
_NUM = (int, float)
_SCHEMA = {
    ("floor", "diameter"): ("diameter", _NUM),
    ("floor", "annular_width"): ("annular_width", _NUM),
    ("floor", "centre"): ("centre", (list,)),
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
    ("repair", "patch_thickness"): ("patch_thickness_mm", _NUM),
    ("repair", "repair_to"): ("repair_to_mm", _NUM),
    ("repair", "patches"): ("patches", (str,)),
    ("repair", "under_cause_removed"): ("under_cause_removed", (bool,)),
    ("rules", "name"): ("ruleset", (str,)),
    ("rules", "overrides"): ("rule_overrides", (dict,)),
    ("report", "units"): ("units", (str,)),
    ("statistics", "block_mm"): ("block_mm", _NUM),
    ("zones", "rings"): ("zone_rings", (int,)),
    ("zones", "sectors"): ("zone_sectors", (int,)),
    ("zones", "polygons"): ("zone_polygons", (list,)),
    ("statistics", "seed"): ("seed", (int,)),
    ("paths", "allow_absolute"): ("allow_absolute_paths", (bool,)),
}
_PATH_FIELDS = ("shapes", "top_depth", "repairs", "control_points", "patches")


def resolve_path(value: str, base: Path, *, allow_absolute: bool, what: str) -> str:
    """Resolve a path from a job or manifest file against its folder.

    A relative path that escapes ``base`` (``..``) or an absolute path is refused
    unless ``allow_absolute`` is set.
    """
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
        label = str(item.get("name") or f"zone{i}")
        out.append((label, clean))
    return out


def read_job(path) -> Job:
    """Read a TOML job file into a :class:`Job`, checking every key and type."""
    path = Path(path)
    name = os.fspath(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{name}: cannot read job file ({exc.strerror or exc})") from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise InputError(f"{name}: not UTF-8 text (byte {exc.start})") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{name}: not valid TOML ({exc})") from None
    values = {}
    for section, body in data.items():
        if not isinstance(body, dict):
            raise InputError(f"{name}: field '{section}': expected a [{section}] table")
        for key, val in body.items():
            spec = _SCHEMA.get((section, key))
            if spec is None:
                raise InputError(f"{name}: field '{section}.{key}': unknown key")
            fname, types = spec
            if isinstance(val, bool) and bool not in types:
                raise InputError(f"{name}: field '{section}.{key}': expected a number, got {val!r}")
            if not isinstance(val, types):
                want = "/".join(t.__name__ for t in types)
                raise InputError(f"{name}: field '{section}.{key}': expected {want}, got {type(val).__name__}")
            if fname in ("zone_rings", "zone_sectors") and not 1 <= val <= 100:
                raise InputError(f"{name}: field '{section}.{key}': must be between 1 and 100, got {val}")
            if fname == "zone_polygons":
                val = _polygons(val, name)
            if fname == "centre":
                if len(val) != 2 or not all(isinstance(v, _NUM) and not isinstance(v, bool) for v in val):
                    raise InputError(f"{name}: field 'floor.centre': expected two numbers")
                val = (float(val[0]), float(val[1]))
            elif types is _NUM:
                val = float(val)
                if not val == val or val in (float("inf"), float("-inf")):
                    raise InputError(f"{name}: field '{section}.{key}': not a finite number")
                if val < 0 or (val == 0 and fname in ("diameter",)):
                    raise InputError(f"{name}: field '{section}.{key}': must be positive, got {val}")
            values[fname] = val
    if ("zone_rings" in values) != ("zone_sectors" in values):
        raise InputError(f"{name}: field 'zones.rings': give both zones.rings and zones.sectors")
    if values.get("default_side", "under") not in ("under", "top"):
        raise InputError(f"{name}: field 'attribution.default_side': must be 'under' or 'top'")
    if values.get("units", "mm") not in ("mm", "in"):
        raise InputError(f"{name}: field 'report.units': must be 'mm' or 'in'")
    if values.get("repair_to_mm") == 0:
        values["repair_to_mm"] = None
    base = path.parent
    allow = values.get("allow_absolute_paths", False)
    for f in _PATH_FIELDS:
        if f in values:
            sec = next(s for (s, k), (fn, _) in _SCHEMA.items() if fn == f)
            key = next(k for (s, k), (fn, _) in _SCHEMA.items() if fn == f)
            values[f] = resolve_path(values[f], base, allow_absolute=allow, what=f"{name}: field '{sec}.{key}'")
    return Job(source=name, **values)
