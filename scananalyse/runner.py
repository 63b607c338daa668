"""Files around the analysis: read the scans, run :func:`~scananalyse.pipeline.analyse`,
write every output into a folder that appears only when complete, and say what was done.

``compare`` (two inspections), ``assess_single`` (one), ``register_files`` and
``run_demo`` are what the command line calls; :func:`write_outputs` writes an
:class:`~scananalyse.pipeline.Analysis` into a folder, figures drawn one after the other.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from . import CAUTION, __version__
from .errors import InputError
from .indications import write_indications_csv
from .checks import patches_line
from .io import check_analysable, read_scan
from .io.tables import write_csv
from .job import Job
from .outputs import output_folder, write_json, write_results_h5
from .pipeline import Analysis, analyse, read_job_inputs
from .progress import Progress
from .register import register
from .repair import write_patches_csv
from .report.dxf import patch_locations, write_patches_dxf
from .report import figures as F
from .report.content import actions, report_data
from .report.figlist import figure_specs, file_stem
from .report.units import diameter_text, text_in_units, with_unit
from .report.html import write_report
from .report.pdf import write_pdf
from .scan import to_display

__all__ = ["CompareResult", "STAGES_PAIR", "STAGES_SINGLE", "write_outputs", "compare", "assess_single",
           "register_files", "run_demo", "sample_dir", "DEMO"]

#: The stages a two-inspection job reports progress for, in order.
STAGES_PAIR = ["load", "registration", "readings", "resampling", "attribution", "zones", "extremes", "rates", "indications",
               "assessment", "probability", "repairs", "outputs", "report"]
#: The stages of a one-inspection job.
STAGES_SINGLE = [s for s in STAGES_PAIR if s not in ("registration", "resampling")]
# ("readings" runs only for a job with spot readings: the list of a job without them drops it)


@dataclass
class CompareResult:
    """What ``compare``/``assess`` wrote, for the console and for callers."""

    out_dir: str
    zones: pd.DataFrame
    zones_repaired: pd.DataFrame
    patches: pd.DataFrame
    indications: pd.DataFrame
    registration: dict | None
    report_path: str
    units: str
    tank: str
    single: bool
    files: list
    notes: list = field(default_factory=list)
    diameter: str = ""  # as the report shows it (:func:`~scananalyse.report.units.diameter_text`)

    def console_summary(self) -> str:
        u = self.units
        lu = "in" if u == "in" else "mm"
        lines = [f"scananalyse {__version__}: tank {self.tank or '-'}"
                 + (f", diameter {self.diameter}" if self.diameter else "")
                 + (" (one inspection: long-term rates only)" if self.single else "")]
        if self.registration:
            lines.append(_registration_line(self.registration, u))
        nd = 3 if u == "in" else 1
        hdr = f"  {'zone':<12}{'t_min':>8}{'code':>8}{'local':>8}{'eva':>8}{'recomm.':>9}  {'next due':<11}{'limiting':<10}flags"
        for title, table in (("as found", self.zones), ("after the proposed repairs", self.zones_repaired)):
            if table is None:
                continue
            lines.append(f"per zone, {title} (thickness {lu}; code formula, co-located, extreme-value and "
                         f"recommended intervals in years):")
            lines.append(hdr)
            for _, z in table.iterrows():
                due = z["next_due"] if isinstance(z["next_due"], str) and z["next_due"] else "-"
                flags = z["flags"] if isinstance(z["flags"], str) else ""
                code_txt = _fmt_code(z["interval_code_y"])
                lines.append(
                    f"  {str(z['zone']):<12}{_fmt(to_display(z['t_min_mm'], u), nd):>8}{code_txt:>8}"
                    f"{_fmt(z['life_local_y']):>8}{_fmt(z.get('life_eva_y', float('nan'))):>8}"
                    f"{_fmt(z['interval_recommended_y']):>9}  {due:<11}{str(z['limiting'] or '-') if isinstance(z['limiting'], str) else '-':<10}"
                    f"{flags}")
        area = float(self.patches["area_m2"].sum()) if len(self.patches) else 0.0
        lines.append(_patches_line(len(self.patches), area, self.zones, self.zones_repaired, u))
        st = self.indications["status"].value_counts() if "status" in self.indications else {}
        parts = [f"{int(st[k])} {k}" for k in ("new", "grown", "stable", "repaired", "partly unscanned", "not found") if k in st]
        lines.append(f"indications: {len(self.indications)} (indications.csv)" + (f": {', '.join(parts)}" if parts else ""))
        for n in self.notes:
            lines.append("note: " + text_in_units(n, u))
        lines.append(f"report: {self.report_path}")
        lines.append("CAUTION: " + CAUTION)
        return "\n".join(lines)


def _registration_line(r: dict, units: str) -> str:
    """The console's line on the registration, the shift in mm or inches."""
    return (f"registration: {_rotation_shift(r, units)}, score {r['score'] or 0:.2f}, overlap {r['overlap_pct'] or 0:.1f} %"
            + ("" if r["reliable"] else "  ** UNRELIABLE **"))


def _rotation_shift(r: dict, units: str) -> str:
    """``rotation 1.500 deg, shift (60.0, -40.0) mm`` of a registration.json dict, the shift
    in mm or inches."""
    dx, dy = (to_display(r[k], units) for k in ("dx_mm", "dy_mm"))
    nd = 3 if units == "in" else 1
    return f"rotation {r['rotation_deg']:.3f} deg, shift ({dx:.{nd}f}, {dy:.{nd}f}) {'in' if units == 'in' else 'mm'}"


def _patches_line(n: int, area_m2: float, zones, zones_repaired, units: str) -> str:
    """The console's patch-plate line (:func:`~scananalyse.checks.patches_line`), the area in
    ft² for ``units="in"`` (converted from the unrounded area)."""
    line = patches_line(n, area_m2, zones, zones_repaired)
    return line.replace(f"{area_m2:.2f} m2", with_unit(area_m2, "area", units), 1) if units == "in" else line


def _fmt_code(v) -> str:
    """The code formula's interval for the console: ``<0`` where the formula goes negative
    (the metal is already below MRT; zones.csv keeps the formula's value)."""
    try:
        neg = float(v) < 0
    except (TypeError, ValueError):
        neg = False
    return "<0" if neg else _fmt(v)


def _fmt(v, nd=1) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return "-"
    if math.isnan(v):
        return "-"
    if math.isinf(v):
        return "inf"
    return f"{v:.{nd}f}"


def write_outputs(an: Analysis, folder, *, progress: Progress | None = None, dpi: int = 130) -> list:
    """Write every output file of an analysis into ``folder`` (which must exist).

    The data files first (zones.csv, zones_repaired.csv, patches.csv, patches.dxf,
    indications.csv, registration.json, results.h5), then each figure of
    :func:`~scananalyse.report.figlist.figure_specs` drawn in the report's order as
    ``figures/NN_<slug>.png``, then report.html and report.pdf (when a headless
    Chromium is found; else a note in ``an.notes``).  Returns the files' names relative to
    ``folder``.
    """
    prog = progress or Progress(quiet=True)
    folder = Path(folder)
    units = an.job.units
    files = []
    with prog.stage("outputs"):
        inch = an.job.csv_units == "in"  # inch columns beside the SI ones
        write_csv(an.zone_table, folder / "zones.csv", inch_columns=inch)
        write_csv(an.zones_repaired, folder / "zones_repaired.csv", inch_columns=inch)
        geo, pitch = an.zones.geometry, an.new.pitch
        where = dict(radius_mm=geo.radius_mm, centre=geo.centre, pitch_mm=pitch)
        write_patches_csv(patch_locations(an.patches, **where), folder / "patches.csv", inch_columns=inch)
        write_patches_dxf(an.patches, folder / "patches.dxf", shell_radius_mm=geo.radius_mm, centre=geo.centre,
                          critical_width_mm=float(an.rules.v("critical_zone_width_mm")), plate=an.new.plate,
                          grid=(an.new.x0, an.new.y0, pitch), indications=an.indications)
        write_indications_csv(an.indications, folder / "indications.csv", inch_columns=inch, **where)
        files += ["zones.csv", "zones_repaired.csv", "patches.csv", "patches.dxf", "indications.csv"]
        if an.readings:
            # spot readings: the zones assessed from them, and the indications to prove up next
            write_csv(an.readings["zones"], folder / "readings_zones.csv", inch_columns=inch)
            write_csv(an.readings["prove_up"], folder / "prove_up.csv", inch_columns=inch)
            files += ["readings_zones.csv", "prove_up.csv"]
        reg_dict = None
        if an.registration is not None:
            reg_dict = an.registration.to_dict()
            write_json(reg_dict, folder / "registration.json")
            files.append("registration.json")
        write_results_h5(folder / "results.h5", _result_maps(an), x0=an.new.x0, y0=an.new.y0, pitch=an.new.pitch,
                         attrs=_result_attrs(an), timings=an.timings)
        if an.readings:
            _write_readings_h5(folder / "results.h5", an.readings)
        files.append("results.h5")
    with prog.stage("report"):
        figdir = folder / "figures"
        figdir.mkdir(exist_ok=True)
        figs = []
        for n, (sec, slug, cap, build) in enumerate(figure_specs(an, units), start=1):
            fig = build()
            path = figdir / f"{n:02d}_{file_stem(slug)}.png"
            F.save_png(fig, path, dpi=dpi)
            figs.append((sec, f"{cap} {getattr(fig, 'scananalyse_caption', '')}".strip(), path.read_bytes()))
            files.append(f"figures/{path.name}")
            del fig
        write_report(report_data(an, units, reg_dict, figs), folder / "report.html")
        files.append("report.html")
        # the same page printed (headless Chromium); without a browser, a one-line note instead
        pdf_note = write_pdf(folder / "report.html", folder / "report.pdf")
        if pdf_note is None:
            files.append("report.pdf")
        else:
            an.notes.append(pdf_note)
    return files


def _result_maps(an: Analysis) -> dict:
    """Every map results.h5 holds, by dataset name."""
    maps = dict(an.rates.maps())
    maps.update({"thickness": an.new.thickness, "side_raw": an.side_raw, "side": an.side,
                 "zone": an.zones.labels, "life_local": an.life_map, "mrt": an.mrt_map,
                 "needs_repair": an.needs_repair})
    if an.old_on_new is not None:
        maps["thickness_old_on_new"] = an.old_on_new.thickness
    maps.update(an.repaired_maps)
    if an.readings:  # the scan as scanned, the cells the readings govern, the pit-gauge depths
        maps.update({"thickness_scanned": an.readings["thickness_scanned"],
                     "readings_proved": an.readings["proved"], "readings_depth_top": an.readings["depth_top"]})
    return maps


def _result_attrs(an: Analysis) -> dict:
    return {"tank": an.new.meta.tank, "inspected_new": an.new.meta.inspected.isoformat(),
            "inspected_old": an.old.meta.inspected.isoformat() if an.old else "",
            "zone_names": ";".join(an.zones.names), "scananalyse_version": __version__, "caution": CAUTION,
            **_readings_attrs(an)}


def _write_readings_h5(path, rdg: dict) -> None:
    """Add the spot readings to results.h5: group ``readings/new`` (and ``readings/old``),
    one dataset per column (``x_mm``, ``y_mm``, ``kind``, ``thickness_mm``, ``depth_mm``,
    ``side``, ``id``; the older readings in the older scan's frame), ``inspected`` as an
    attribute."""
    import h5py
    import numpy as np

    with h5py.File(path, "a") as f:
        g = f.create_group("readings")
        for tag in ("new", "old"):
            r = rdg.get(tag)
            if r is None:
                continue
            h = g.create_group(tag)
            h.attrs["inspected"] = r.inspected.isoformat()
            for c in ("x_mm", "y_mm", "thickness_mm", "depth_mm"):
                h.create_dataset(c, data=r.table[c].to_numpy(np.float64))
            for c in ("kind", "side", "id"):
                h.create_dataset(c, data=[str(v) for v in r.table[c]], dtype=h5py.string_dtype())


def _readings_attrs(an: Analysis) -> dict:
    """The readings' sizing check as results.h5 root attributes (none without readings)."""
    if not an.readings:
        return {}
    c = an.readings["check"]
    return {"readings_n": len(an.readings["new"]), "readings_inspected": an.readings["new"].inspected.isoformat(),
            "sizing_n_pairs": c.n_pairs, "sizing_bias_mm": c.bias_mm, "sizing_scatter_mm": c.scatter_mm,
            "sizing_k": c.k, "sizing_k_se": c.k_se, "sizing_undersized": int(c.undersized),
            "sizing_corrected": int(an.readings["corrected"]), "sizing_note": c.note}


def _check_out_dir(out_dir, force):
    p = Path(out_dir)
    if p.exists() and not p.is_dir():
        raise InputError(f"{p}: exists and is not a folder")
    if p.exists() and not force:
        raise InputError(f"{p}: output folder exists; use --force to replace it")


def _run(old_path, new_path, *, job, out_dir, force, quiet, single) -> CompareResult:
    _check_out_dir(out_dir, force)
    stages = [s for s in (STAGES_SINGLE if single else STAGES_PAIR) if s != "readings" or job.readings]
    prog = Progress(stages, quiet=quiet)
    with prog.stage("load"):
        new = check_analysable(read_scan(new_path), new_path)
        old = None if single else check_analysable(read_scan(old_path), old_path)
        inputs = read_job_inputs(job, new, old=old)
    with output_folder(out_dir, force=force) as tmp:
        an = analyse(new, old, job=job, progress=prog, inputs=inputs)
        files = write_outputs(an, tmp, progress=prog)
    prog.finish()
    reg = an.registration.to_dict() if an.registration is not None else None
    return CompareResult(out_dir=str(out_dir), zones=an.zone_table, zones_repaired=an.zones_repaired,
                         patches=an.patches, indications=an.indications, registration=reg,
                         report_path=str(Path(out_dir) / "report.html"), units=job.units,
                         tank=an.new.meta.tank, single=single, files=files,
                         notes=actions(an, job.units) + list(an.notes) + ([an.patch_note] if an.patch_note else []),
                         diameter=_diameter_shown(an.zones.geometry.diameter_mm, an.job.typed.get("diameter"),
                                                  job.units))


def _diameter_shown(diameter_mm: float, typed, units: str) -> str:
    """The tank diameter for the console, as the report shows it: as the user gave it, with
    feet and inches and the mm value where inches are involved; else ``"8000 mm"``."""
    d = diameter_text(diameter_mm, typed, units)
    return d if isinstance(d, str) else f"{d:g} mm"


def compare(old_path, new_path, *, job: Job, out_dir, force: bool = False, quiet: bool = False) -> CompareResult:
    """The whole job on two inspections of one floor; writes the outputs into ``out_dir``."""
    return _run(old_path, new_path, job=job, out_dir=out_dir, force=force, quiet=quiet, single=False)


def assess_single(scan_path, *, job: Job, out_dir, force: bool = False, quiet: bool = False) -> CompareResult:
    """The same assessment from one inspection (long-term rates from ``installed``)."""
    return _run(None, scan_path, job=job, out_dir=out_dir, force=force, quiet=quiet, single=True)


def register_files(old_path, new_path, *, out_dir, control_points=None, force=False, quiet=False,
                   units: str = "mm") -> dict:
    """Register two scan files and write ``out_dir/registration.json`` (mm); the summary's
    numbers in the display ``units`` (the shift in mm or inches, the misfit in mm or mils)."""
    _check_out_dir(out_dir, force)
    prog = Progress(["load", "registration"], quiet=quiet)
    with prog.stage("load"):
        old = check_analysable(read_scan(old_path), old_path)
        new = check_analysable(read_scan(new_path), new_path)
    with output_folder(out_dir, force=force) as tmp:
        with prog.stage("registration"):
            reg = register(new, old, control_points=control_points)
        d = reg.to_dict()
        write_json(d, Path(tmp) / "registration.json")
    prog.finish()
    rms = d["residual_rms_mm"] or float("nan")
    summary = (f"{_rotation_shift(d, units)}, score {d['score'] or 0:.2f}, overlap {d['overlap_pct'] or 0:.1f} %, "
               f"residual RMS {f'{rms:.3f} mm' if units == 'mm' else with_unit(rms, 'depth', units)}, "
               f"method {d['method']}"
               + ("" if d["reliable"] else " -- UNRELIABLE: " + text_in_units("; ".join(d["warnings"]), units))
               + f"\nwrote {Path(out_dir) / 'registration.json'}")
    return {"registration": d, "summary": summary}


def sample_dir() -> Path:
    """Folder of the shipped sample scans (beside the package in a source checkout)."""
    here = Path(__file__).resolve().parent
    for cand in (here.parent / "sample_scans", here / "sample_scans"):
        if cand.is_dir():
            return cand
    raise InputError("sample_scans: the sample scan folder was not found beside the package")


DEMO = {"old": "FQ-214_2015-09-21.h5", "new": "FQ-214_2025-10-06.h5", "repairs": "FQ-214_repairs.csv",
        "readings": "FQ-214_readings_2025-10-06.csv", "diameter": 8000.0}


def run_demo(out_dir="demo_out", *, units=None, quiet=False, force: bool = False) -> CompareResult:
    """The whole job on the shipped sample scans (an invented tank, see sample_scans/README.md).

    Like :func:`compare`, an existing ``out_dir`` is refused unless ``force``, and then only a
    complete earlier output of scananalyse is replaced (:func:`~scananalyse.outputs.output_folder`).
    """
    d = sample_dir()
    job = Job(diameter=DEMO["diameter"], repairs=str(d / DEMO["repairs"]), units=units or "mm",
              readings=[str(d / DEMO["readings"])])
    return compare(d / DEMO["old"], d / DEMO["new"], job=job, out_dir=out_dir, force=force, quiet=quiet)
