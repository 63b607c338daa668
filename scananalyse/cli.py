"""Command-line front end: parses arguments and calls the public API.

Exit status: 0 success, 2 bad input (one line naming the file and the line or
field, no traceback), 1 internal fault, 130 interrupted.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import warnings

from . import CAUTION, __version__
from .errors import InputError, ScanWarning

__all__ = ["main", "build_parser"]


class _Parser(argparse.ArgumentParser):
    """An argument parser whose usage errors are one line (exit status 2), like every bad input."""

    def error(self, message):
        self.exit(2, f"scananalyse: error: {' '.join(str(message).split())} (see {self.prog} --help)\n")


def _number(kind, lo=None, hi=None, *, lo_open=False, what="a number"):
    """An argparse type: a finite number of ``kind`` in [lo, hi] (lo excluded if ``lo_open``)."""
    def parse(text):
        try:
            v = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {what}, got {text!r}") from None
        if kind is float and not math.isfinite(v):
            raise argparse.ArgumentTypeError(f"not a finite number, got {text!r}")
        if lo is not None and (v < lo or (lo_open and v == lo)):
            raise argparse.ArgumentTypeError(f"must be {'>' if lo_open else '>='} {lo:g}, got {text}")
        if hi is not None and v > hi:
            raise argparse.ArgumentTypeError(f"must be <= {hi:g}, got {text}")
        return v
    parse.__name__ = what  # argparse names the type in its messages
    return parse


def _input_file(text):
    """An argparse type for an input file: a regular file (a FIFO would block, a device
    never end), without a NUL character; checked without opening it."""
    from .job import check_input_file

    try:
        check_input_file(text, "file", must_exist=False)
    except InputError as exc:
        raise argparse.ArgumentTypeError(str(exc).removeprefix("file: ")) from None
    return text


def _path(text):
    """An argparse type for a path that need not exist: no NUL character."""
    if "\0" in text:
        raise argparse.ArgumentTypeError("the path contains a NUL character")
    return text


_LENGTH = _number(float, 0, lo_open=True, what="a positive number")
_NONNEG = _number(float, 0, what="a number >= 0")


def _add_job_options(p: argparse.ArgumentParser, *, single: bool = False):
    u = "in --units, else the job file's report.units, else the scans' units"
    p.add_argument("--diameter", type=_LENGTH,
                   help=f"inside diameter of the tank ({u}; required here or in --job)")
    p.add_argument("--out", required=True, type=_path, help="output folder (created; refused if it exists, unless --force)")
    p.add_argument("--job", type=_input_file, help="TOML job file with further settings (see docs/job.md)")
    p.add_argument("--annular-width", type=_LENGTH, help=f"annular ring width ({u})")
    p.add_argument("--target-interval", type=_LENGTH, help="target interval for repair planning [years] (default 10)")
    p.add_argument("--target-probability", type=_LENGTH, metavar="P",
                   help="also limit each zone's interval to the longest with P(below MRT) <= P "
                        "(decision support beside the code formula; off by default)")
    p.add_argument("--leak-detection", action="store_true", help="release detection and containment present (MRT 1.27 mm case)")
    p.add_argument("--cp", action="store_true", help="cathodic protection effective: UPr = 0")
    p.add_argument("--coated", action="store_true", help="top side coated (StPr = 0 if coating life >= interval)")
    p.add_argument("--coating-life", type=_NONNEG, help="remaining coating life [years]")
    p.add_argument("--rpb", action="store_true", help="release-prevention barrier present (30-year cap)")
    p.add_argument("--shapes", type=_input_file, help="operator attribution shapes file (docs/attribution.md)")
    p.add_argument("--default-side", choices=["under", "top"], help="side of unattributed loss (default under)")
    if not single:
        p.add_argument("--repairs", type=_input_file, help="repair records since the older scan (docs/attribution.md)")
        p.add_argument("--control-points", type=_input_file,
                       help="matching points old/new for registration (docs/registration.md)")
    p.add_argument("--readings", type=_input_file, action="append", metavar="FILE",
                   help="spot readings (readings CSV v1: hand UT, prove-up, pit gauge); repeatable: each file goes "
                   "to the inspection whose date is nearest its 'inspected' date")
    p.add_argument("--no-sizing-correction", action="store_true",
                   help="do not scale unproved MFL loss when the prove-ups show the scan under-sizes")
    p.add_argument("--patches", type=_input_file, help="re-assess with the engineer's own patch set (patches CSV or DXF)")
    p.add_argument("--repair-to", type=_LENGTH,
                   help=f"repair everything below this thickness, the code's way ({u}); at least the MRT")
    p.add_argument("--patch-thickness", type=_LENGTH, help=f"patch plate thickness ({u}; default: the rule set's)")
    p.add_argument("--shell-tmin", type=_LENGTH,
                   help=f"minimum thickness (tmin) of the lower shell course ({u}): the critical-zone minimum "
                   "takes 50 %% of it into account; default none: that term is not applied (the report says so)")
    p.add_argument("--under-cause-removed", action="store_true",
                   help="the cause of underside corrosion under the patches is removed: no underside rate there")
    p.add_argument("--ruleset", help="rule set name (default api653)")
    p.add_argument("--units", choices=["mm", "in"],
                   help="units of every length given (here and in a job file without report.units) and of the "
                   "display in the report and console (files keep SI); default: lengths in the scans' units, "
                   "display in mm")
    p.add_argument("--csv-units", choices=["mm", "in"], default=None,
                   help="'in' adds inch and mils-per-year columns beside the SI ones in the CSVs")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    p.add_argument("--quiet", action="store_true", help="no progress output")


def _add_display_units(p: argparse.ArgumentParser, what: str = "printed"):
    p.add_argument("--units", choices=["mm", "in"], default="mm",
                   help=f"units of the numbers {what}: mm (default) or in (inches, mils, ft²); files keep SI")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="scananalyse",
        description="Storage-tank floor scan analysis: registration, top/underside loss, rates, "
        "extreme-value pit statistics, remaining life, repairs and intervals per zone. " + CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"scananalyse {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks of internal faults")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("check", help="validate one scan file and print a short summary")
    p.add_argument("file", type=_input_file, help="scan file (.csv floor-scan CSV v1 or .h5 floor-scan HDF5 v1)")
    _add_display_units(p)

    p = sub.add_parser("convert", help="convert a scan between CSV and HDF5 (lossless)")
    p.add_argument("input", type=_input_file, help="input scan file")
    p.add_argument("output", type=_path, help="output scan file (.csv or .h5); refused if it exists, unless --force")
    p.add_argument("--force", action="store_true", help="replace an existing output file")

    p = sub.add_parser("register", help="align the older scan onto the newer one; writes registration.json")
    p.add_argument("old", type=_input_file, help="older inspection's scan")
    p.add_argument("new", type=_input_file, help="newer inspection's scan")
    p.add_argument("--out", required=True, type=_path, help="output folder")
    p.add_argument("--control-points", type=_input_file, help="matching points old/new (docs/registration.md)")
    _add_display_units(p)
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    p.add_argument("--quiet", action="store_true", help="no progress output")

    p = sub.add_parser("compare", help="the whole job on two inspections of one floor")
    p.add_argument("old", type=_input_file, help="older inspection's scan")
    p.add_argument("new", type=_input_file, help="newer inspection's scan")
    _add_job_options(p)

    p = sub.add_parser("assess", help="the assessment from one inspection (long-term rates only)")
    p.add_argument("scan", type=_input_file, help="the inspection's scan")
    _add_job_options(p, single=True)

    p = sub.add_parser("demo", help="the whole job on the shipped sample scans")
    p.add_argument("--out", default="demo_out", type=_path, help="output folder (default demo_out)")
    p.add_argument("--units", choices=["mm", "in"], default=None, help="display units")
    p.add_argument("--force", action="store_true",
                   help="replace an existing output folder (only a complete earlier output)")
    p.add_argument("--quiet", action="store_true", help="no progress output")

    p = sub.add_parser("fleet", help="many tanks on a Dask cluster, ranked by urgency")
    p.add_argument("manifest", type=_input_file, help="CSV with columns tank,old,new,diameter (paths relative to it)")
    p.add_argument("--out", required=True, type=_path,
                   help="output folder (created; or an earlier fleet output folder, whose complete tanks are kept)")
    p.add_argument("--workers", type=_number(int, 1, 1024, what="a whole number"), default=None, help="local cluster worker processes (default: cores)")
    p.add_argument("--scheduler", default=None, help="address of an existing Dask scheduler")
    p.add_argument("--force", action="store_true", help="recompute tanks whose results exist")
    p.add_argument("--timeout", type=_number(float, 0, lo_open=True, what="a positive number"), default=None,
                   help="give up on tanks without a result after this many seconds of the whole run")
    _add_display_units(p, "on fleet.html (each tank's report keeps its job's units)")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    return parser


#: Command-line options that are lengths: option attribute -> job field.
_LENGTH_OPTIONS = {"diameter": "diameter", "annular_width": "annular_width", "repair_to": "repair_to",
                   "patch_thickness": "patch_thickness", "shell_tmin": "shell_tmin"}


def _job_from_args(args):
    """The :class:`~scananalyse.job.Job` of ``compare``/``assess``: the job file, then the options.

    Lengths typed on the command line are in ``--units``, else the job file's
    ``report.units``, else the scans' units; ``--units`` also states the units of a
    job file that gives none.  Every value is range-checked here, before any scan is
    read (:data:`scananalyse.job.BOUNDS`); :func:`scananalyse.job.resolve_units`
    finishes the units once the scans are read.
    """
    from .job import OPTIONS, Job, check_value, read_job

    job = read_job(args.job) if getattr(args, "job", None) else Job()
    units = getattr(args, "units", None)
    if units is not None:
        if job.length_units is None:
            job = job.replace(length_units=units)  # a job file without units: in --units
        job = job.replace(units=units)
    lengths = {f: getattr(args, a, None) for a, f in _LENGTH_OPTIONS.items()}
    job = job.with_lengths(units=units, **lengths)
    changes = {}
    simple = {
        "target_interval": "target_interval", "target_probability": "target_probability",
        "coating_life": "coating_life_years", "shapes": "shapes",
        "default_side": "default_side", "repairs": "repairs", "control_points": "control_points",
        "patches": "patches", "ruleset": "ruleset",
    }
    for a, f in simple.items():
        v = getattr(args, a, None)
        if v is not None:
            changes[f] = os.path.abspath(v) if f in ("shapes", "repairs", "control_points", "patches") else v
    if getattr(args, "readings", None):  # added to the job file's readings
        changes["readings"] = list(job.readings) + [os.path.abspath(r) for r in args.readings]
    if getattr(args, "csv_units", None):
        changes["csv_units"] = args.csv_units
    if getattr(args, "no_sizing_correction", False):
        changes["sizing_correction"] = False
    for a, f in {"leak_detection": "leak_detection", "cp": "cp_effective", "coated": "coated",
                 "rpb": "release_prevention_barrier", "under_cause_removed": "under_cause_removed"}.items():
        if getattr(args, a, False):
            changes[f] = True
    origins = dict(job.origins)
    for f in changes:
        origins[f] = OPTIONS.get(f, f)
    job = job.replace(origins=origins, **changes)
    for f in ("target_interval", "target_probability", "coating_life_years"):
        if f in changes:
            check_value(f, changes[f], what=job.where(f))
    if "ruleset" in changes:
        from .rules import get_ruleset

        try:
            get_ruleset(job.ruleset)
        except InputError as exc:
            raise InputError("--ruleset: " + str(exc).split(": ", 2)[-1]) from None
    if job.diameter is None:
        raise InputError("--diameter: the tank's inside diameter is required (or floor.diameter in --job)")
    return job


def _cmd_check(args) -> int:
    from .io import read_scan
    from .report import units as U

    scan = read_scan(args.file)
    s = scan.summary()
    units = args.units

    def shown(value, quantity):  # a number in the display units, as the run's console prints it
        return U.fmt_number(U.convert(value, quantity, units), U.decimals(quantity, units))

    thick, depth = U.unit_label("thickness", units), U.unit_label("depth", units)
    (x0, x1), (y0, y1) = s["x_range_mm"], s["y_range_mm"]
    if units == "mm":
        pitch, area = f"{s['pitch_mm']:g} mm", f"{s['scanned_area_m2']:.2f} m2"
        where = f"x {x0 / 1000:.3f} to {x1 / 1000:.3f} m, y {y0 / 1000:.3f} to {y1 / 1000:.3f} m"
    else:  # floor coordinates as on the maps: feet, inches on a small grid
        pitch, area = U.with_unit(s["pitch_mm"], "thickness", units), U.with_unit(s["scanned_area_m2"], "area", units)
        ax, per = U.length_axis_unit(max(x1 - x0, y1 - y0) / 1000.0, units)
        nd = 1 if ax == "in" else 2
        where = ", ".join(f"{c} {a / 1000 / per:.{nd}f} to {b / 1000 / per:.{nd}f} {ax}"
                          for c, a, b in (("x", x0, x1), ("y", y0, y1)))
    print(f"{args.file}: valid floor-scan file")
    print(f"  tank {s['tank'] or '-'}, inspected {s['inspected']}, method {s['method'] or '-'}, file units {s['units']}")
    print(f"  grid {s['rows']} x {s['cols']} cells at {pitch} pitch; {where}")
    print(f"  scanned {s['scanned_cells']} cells = {area} ({s['grid_fill_pct']:.1f} % of the grid box)")
    print(f"  thickness {shown(s['t_min_mm'], 'thickness')} to {shown(s['t_max_mm'], 'thickness')} {thick} "
          f"(nominal {shown(s['nominal_mm'], 'thickness')} {thick})")
    m = scan.meta
    extras = []
    if m.threshold is not None:
        extras.append(f"threshold {shown(m.threshold, 'depth')} {depth}")
    if m.sigma is not None:
        extras.append(f"sigma {shown(m.sigma, 'depth')} {depth}")
    if m.installed is not None:
        extras.append(f"installed {m.installed.isoformat()}")
    extras.append("side layer" if scan.side is not None else "no side layer")
    extras.append("plate layer" if scan.plate is not None else "no plate layer")
    print("  " + ", ".join(extras))
    return 0


def _cmd_convert(args) -> int:
    from .io import check_regular_file, output_kind, read_scan, write_scan

    out = args.output
    output_kind(out)  # an unknown extension is refused before anything is read
    if os.path.isdir(out):
        raise InputError(f"{out}: is a folder; give a file name (.csv or .h5) for the converted scan")
    check_regular_file(args.input)
    if os.path.lexists(out):
        try:
            same = os.path.exists(out) and os.path.samefile(args.input, out)
        except OSError:
            same = False
        if same:  # the same file, whatever the path strings (links, symlinked folders)
            raise InputError(f"{out}: output is the input file; inputs are never modified")
        if not args.force:
            raise InputError(f"{out}: exists; use --force to replace it")
        if os.path.exists(out) and not os.path.isfile(out):
            raise InputError(f"{out}: exists and is not a regular file; not replaced")
    scan = read_scan(args.input)
    try:
        write_scan(scan, out)
    except OSError as exc:
        raise InputError(f"{exc.filename or out}: cannot write ({exc.strerror or type(exc).__name__})") from None
    print(f"wrote {out}")
    return 0


def _cmd_register(args) -> int:
    from .runner import register_files

    out = register_files(args.old, args.new, out_dir=args.out, control_points=args.control_points,
                         force=args.force, quiet=args.quiet, units=args.units)
    print(out["summary"])
    return 0


def _cmd_compare(args) -> int:
    from .runner import compare

    job = _job_from_args(args)
    res = compare(args.old, args.new, job=job, out_dir=args.out, force=args.force, quiet=args.quiet)
    print(res.console_summary())
    return 0


def _cmd_assess(args) -> int:
    from .runner import assess_single

    job = _job_from_args(args)
    res = assess_single(args.scan, job=job, out_dir=args.out, force=args.force, quiet=args.quiet)
    print(res.console_summary())
    return 0


def _cmd_demo(args) -> int:
    from .runner import run_demo

    # like compare: an existing folder is refused unless --force, and then only a complete
    # earlier output of scananalyse is replaced (outputs.output_folder)
    res = run_demo(out_dir=args.out, units=args.units, quiet=args.quiet, force=args.force)
    print(res.console_summary())
    return 0


def _cmd_fleet(args) -> int:
    from .fleet import run_fleet

    res = run_fleet(args.manifest, out_dir=args.out, workers=args.workers, scheduler=args.scheduler,
                    force=args.force, quiet=args.quiet, timeout_s=args.timeout, units=args.units)
    print(res["summary"])
    return 0


_COMMANDS = {
    "check": _cmd_check, "convert": _cmd_convert, "register": _cmd_register, "compare": _cmd_compare,
    "assess": _cmd_assess, "demo": _cmd_demo, "fleet": _cmd_fleet,
}


def _show_warning(message, category, filename, lineno, file=None, line=None):
    sys.stderr.write(f"scananalyse: warning: {message}\n")


def main(argv=None) -> int:
    """Run the CLI; returns the exit status (0 ok, 2 bad input, 1 internal fault, 130 interrupted)."""
    try:
        return _main(argv)
    except KeyboardInterrupt:  # an interrupt that lands outside the command itself (set-up, clean-up)
        sys.stderr.write("scananalyse: interrupted; no complete output was written\n")
        return 130


def _main(argv=None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: --help/--version exit 0, usage errors exit 2
        return int(exc.code or 0)
    if not args.command:
        parser.print_help()
        return 2
    old_show = warnings.showwarning
    warnings.showwarning = _show_warning
    from .outputs import interrupt_count, interrupts_as_keyboard

    seen = interrupt_count()
    old_hook = sys.unraisablehook

    def _quiet_interrupts(unraisable):
        # an interrupt that lands in a finaliser or weak-reference callback (matplotlib, h5py)
        # is "ignored" by Python with a traceback on stderr; it is counted (interrupt_count)
        # and reported below as an interrupt, so it is not printed a second time here
        if isinstance(unraisable.exc_value, KeyboardInterrupt):
            return
        old_hook(unraisable)

    sys.unraisablehook = _quiet_interrupts
    try:
        with warnings.catch_warnings(), interrupts_as_keyboard():
            warnings.simplefilter("always", ScanWarning)
            code = _COMMANDS[args.command](args)
        if interrupt_count() > seen:  # an interrupt that a finaliser swallowed: never report success
            raise KeyboardInterrupt
        return code
    except InputError as exc:
        sys.stderr.write(f"scananalyse: error: {exc}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("scananalyse: interrupted; no complete output was written\n")
        return 130
    except BrokenPipeError:
        return 1
    except Exception as exc:  # an internal fault: say so in one line, traceback only with --debug
        if (interrupt_count() > seen or isinstance(exc.__context__, KeyboardInterrupt)
                or isinstance(exc.__cause__, KeyboardInterrupt)):
            # an interrupt that surfaced as another error (e.g. swallowed in a finaliser)
            sys.stderr.write("scananalyse: interrupted; no complete output was written\n")
            return 130
        if args.debug:
            raise
        sys.stderr.write(f"scananalyse: internal error: {type(exc).__name__}: {exc} (rerun with --debug for details)\n")
        return 1
    finally:
        warnings.showwarning = old_show
        sys.unraisablehook = old_hook


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
