"""Reading and writing the neutral floor-scan formats (CSV v1 and HDF5 v1).

``read_scan(path)`` and ``write_scan(scan, path)`` pick the format from the
file extension: ``.csv`` / ``.txt`` for CSV, ``.h5`` / ``.hdf5`` for HDF5.
See docs/formats.md for both layouts and the validation rules.
"""

from __future__ import annotations

import os

from ..errors import InputError, where
from ..scan import FloorScan
from .csvscan import read_csv_scan, write_csv_scan
from .h5scan import read_h5_scan, write_h5_scan
from .validate import check_regular_file

__all__ = ["read_scan", "write_scan", "read_csv_scan", "write_csv_scan", "read_h5_scan",
           "write_h5_scan", "CSV_EXTENSIONS", "H5_EXTENSIONS", "check_regular_file", "output_kind", "check_analysable", "MIN_ANALYSIS_SIDE"]

#: File extensions read and written as floor-scan CSV v1.
CSV_EXTENSIONS = (".csv", ".txt")
#: File extensions read and written as floor-scan HDF5 v1.
H5_EXTENSIONS = (".h5", ".hdf5")


def _kind(path) -> str:
    ext = os.path.splitext(os.fspath(path))[1].lower()
    if ext in CSV_EXTENSIONS:
        return "csv"
    if ext in H5_EXTENSIONS:
        return "h5"
    raise InputError(f"{where(path)}: unknown file type {ext or '(no extension)'!r} "
                     "(use .csv or .txt for CSV, .h5 or .hdf5 for HDF5)")


#: Fewest rows and columns of a grid the analysis (registration, gradients, zones) works
#: on; smaller grids are valid files (``check``, ``convert``) but not floors to analyse.
MIN_ANALYSIS_SIDE = 2


def check_analysable(scan: FloorScan, path=None) -> FloorScan:
    """``scan`` when its grid has at least :data:`MIN_ANALYSIS_SIDE` rows and columns;
    else :class:`InputError` naming the file.  For the commands that analyse a floor
    (compare, assess, register), after :func:`read_scan`."""
    rows, cols = scan.thickness.shape
    if rows < MIN_ANALYSIS_SIDE or cols < MIN_ANALYSIS_SIDE:
        raise InputError(f"{where(path if path is not None else scan.source)}: grid of {rows} x {cols} cells; "
                         f"a floor to analyse needs at least {MIN_ANALYSIS_SIDE} x {MIN_ANALYSIS_SIDE}")
    return scan


def output_kind(path) -> str:
    """``"csv"`` or ``"h5"`` for a scan file name; :class:`InputError` for any other extension."""
    return _kind(path)


def read_scan(path) -> FloorScan:
    """Read a floor scan, choosing the format by extension.

    Parameters
    ----------
    path : ``.csv``/``.txt`` (floor-scan CSV v1) or ``.h5``/``.hdf5`` (floor-scan HDF5 v1).

    Returns
    -------
    FloorScan
        Lengths in mm whatever the file's unit; ``meta.units`` keeps the file's unit.

    Raises
    ------
    InputError
        Unknown extension or an invalid file (one line naming the file and line or field).
    """
    check_regular_file(path, "scan file")
    from ..checks import check_pitch_matches

    scan = read_csv_scan(path) if _kind(path) == "csv" else read_h5_scan(path)
    check_pitch_matches(scan)
    return scan


def write_scan(scan: FloorScan, path) -> None:
    """Write a floor scan in ``scan.meta.units``, choosing the format by extension.

    Parameters
    ----------
    scan : the scan to write.
    path : ``.csv``/``.txt`` or ``.h5``/``.hdf5``; written to a temporary file and renamed into place.
    """
    if _kind(path) == "csv":
        write_csv_scan(scan, path)
    else:
        write_h5_scan(scan, path)
