"""The repair drawing, ``patches.dxf``: what a fabricator works from.

DXF R2010, drawing units millimetres (``$INSUNITS`` = 4, ``$MEASUREMENT`` = 1), floor
frame coordinates (x, y as in the scan; +y is the datum, drawn as north).  Layers:

``SCANANALYSE_PATCH``
    One closed LWPOLYLINE per patch (corners rounded with bulges); thickness and zone
    in XDATA (application ``SCANANALYSE``).  :func:`scananalyse.repair.read_patches`
    reads these back to the same rectangles.
``SCANANALYSE_PATCH_ID``
    The patch id at the patch's centre (TEXT).
``SCANANALYSE_PATCH_SIZE``
    Size and thickness under the id, e.g. ``600 x 450 x 8 mm``.
``SCANANALYSE_SHELL``
    The inside of the shell (two half ARCs, so the drawing read back as a patch set
    does not take the shell for a patch).
``SCANANALYSE_CRITICAL``
    The inner edge of the critical zone (two half ARCs) and its name.
``SCANANALYSE_SEAM`` / ``SCANANALYSE_PLATE_NO``
    Plate seams (LINEs) and plate numbers (TEXT).
``SCANANALYSE_PROVE_UP``
    Indications to prove up: a cross (two LINEs) and the indication id.
``SCANANALYSE_DATUM``
    The tank centre (a cross), the datum line to 12 o'clock and a north arrow with "N".

Only the patch layers are written without the keyword arguments (the former drawing).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["write_patches_dxf", "LAYERS", "patch_locations"]

#: Layer name -> (ACI colour, what it holds).
LAYERS = {
    "SCANANALYSE_PATCH": (1, "patch outlines"),
    "SCANANALYSE_PATCH_ID": (7, "patch ids"),
    "SCANANALYSE_PATCH_SIZE": (7, "patch size and thickness"),
    "SCANANALYSE_SHELL": (8, "inside of the shell"),
    "SCANANALYSE_CRITICAL": (6, "critical-zone ring"),
    "SCANANALYSE_SEAM": (9, "plate seams"),
    "SCANANALYSE_PLATE_NO": (9, "plate numbers"),
    "SCANANALYSE_PROVE_UP": (30, "indications to prove up"),
    "SCANANALYSE_DATUM": (3, "tank centre, datum and north"),
}


def _text(msp, s, at, height, layer, align=None):
    from ezdxf.enums import TextEntityAlignment

    t = msp.add_text(str(s), height=float(height), dxfattribs={"layer": layer})
    t.set_placement((float(at[0]), float(at[1])), align=align or TextEntityAlignment.MIDDLE_CENTER)
    return t


def _circle_as_arcs(msp, centre, r, layer):
    for a0, a1 in ((0.0, 180.0), (180.0, 360.0)):
        msp.add_arc((float(centre[0]), float(centre[1])), float(r), a0, a1, dxfattribs={"layer": layer})


def _cross(msp, x, y, half, layer):
    msp.add_line((x - half, y), (x + half, y), dxfattribs={"layer": layer})
    msp.add_line((x, y - half), (x, y + half), dxfattribs={"layer": layer})


def write_patches_dxf(patches, path, *, shell_radius_mm=None, centre=(0.0, 0.0), critical_width_mm=None,
                      seams=None, plate=None, grid=None, indications=None, prove_up_ids=None) -> None:
    """Write the repair drawing (DXF R2010, units mm).

    Without the keyword arguments it holds the patch layers only, as before.

    Parameters
    ----------
    patches : patch table (``patches.csv`` columns). [mm]
    path : output ``.dxf`` file.
    shell_radius_mm : inside radius of the shell: the shell, the datum line and north
        are drawn. [mm]
    centre : tank centre in the floor frame. [mm]
    critical_width_mm : width of the critical zone inward from the shell (the rule set's
        ``critical_zone_width_mm``): its inner edge is drawn. [mm]
    seams : plate seams as segments (n, 4) ``(x1, y1, x2, y2)``
        (:func:`scananalyse.repair.seams_from_plate`); derived from ``plate`` if None. [mm]
    plate : plate-id layer (−1 none) for the seams and the plate numbers; needs ``grid``.
    grid : ``(x0, y0, pitch)`` of ``plate``: centre of cell [0, 0] and cell size. [mm]
    indications : indication table (``id``, ``x_mm``, ``y_mm``, optionally ``status``):
        the indications to prove up are marked. [mm]
    prove_up_ids : ids of the indications to mark (default: all of ``indications``
        whose ``status`` is not ``"repaired"``).
    """
    import ezdxf

    from ..repair import (_DXF_APPID, _DXF_LAYER, _DXF_TEXT_LAYER, _atomic_write, _outline_points, _rects_of,
                          _validate_table)

    _validate_table(patches)
    R, rad, thk, ids = _rects_of(patches)
    zones = [str(z) for z in patches["zone"]] if "zone" in patches else [""] * len(R)
    doc = ezdxf.new("R2010", setup=False)
    doc.units = ezdxf.units.MM
    doc.header["$MEASUREMENT"] = 1
    full = any(v is not None for v in (shell_radius_mm, critical_width_mm, seams, plate, indications))
    for name, (colour, _what) in LAYERS.items():
        if full or name in (_DXF_LAYER, _DXF_TEXT_LAYER):
            doc.layers.add(name, color=colour)
    doc.appids.add(_DXF_APPID)
    msp = doc.modelspace()
    cx, cy = float(centre[0]), float(centre[1])
    scale = float(shell_radius_mm) if shell_radius_mm else (
        float(np.max(np.abs(R))) if len(R) else 1000.0)
    small = max(10.0, scale / 150.0)  # text height of the furniture [mm]

    for k in range(len(R)):
        rect = tuple(float(v) for v in R[k])
        pl = msp.add_lwpolyline(_outline_points(rect, rad[k]), format="xyb", close=True,
                                dxfattribs={"layer": _DXF_LAYER})
        xd = [(1000, "zone"), (1000, zones[k] if zones[k] != "nan" else "")]
        if np.isfinite(thk[k]):
            xd = [(1000, "thickness_mm"), (1040, float(thk[k]))] + xd
        pl.set_xdata(_DXF_APPID, xd)
        w, h = rect[2] - rect[0], rect[3] - rect[1]
        height = max(10.0, min(w, h) / 6.0)
        mid = ((rect[0] + rect[2]) / 2.0, (rect[1] + rect[3]) / 2.0)
        _text(msp, ids[k], mid, height, _DXF_TEXT_LAYER)
        if full:
            size = f"{w:.0f} x {h:.0f}" + (f" x {thk[k]:g} mm" if np.isfinite(thk[k]) else " mm")
            _text(msp, size, (mid[0], mid[1] - 1.3 * height), height * 0.6, "SCANANALYSE_PATCH_SIZE")

    if shell_radius_mm:
        r = float(shell_radius_mm)
        _circle_as_arcs(msp, (cx, cy), r, "SCANANALYSE_SHELL")
        # datum: centre cross, a line to 12 o'clock (+y) and a north arrow beyond the shell
        _cross(msp, cx, cy, 2 * small, "SCANANALYSE_DATUM")
        msp.add_line((cx, cy), (cx, cy + r), dxfattribs={"layer": "SCANANALYSE_DATUM"})
        tip = cy + r + 8 * small
        base = cy + r + 2 * small
        # the arrow as LINEs: a closed outline would be read back as a patch
        arrow = [(cx, tip), (cx - 1.5 * small, base), (cx, base + 1.5 * small), (cx + 1.5 * small, base), (cx, tip)]
        for a, b in zip(arrow, arrow[1:]):
            msp.add_line(a, b, dxfattribs={"layer": "SCANANALYSE_DATUM"})
        _text(msp, "N (datum, 12:00)", (cx, tip + 1.5 * small), small, "SCANANALYSE_DATUM")
        if critical_width_mm and 0 < float(critical_width_mm) < r:
            ri = r - float(critical_width_mm)
            _circle_as_arcs(msp, (cx, cy), ri, "SCANANALYSE_CRITICAL")
            a = math.radians(135.0)
            rm = r - float(critical_width_mm) / 2.0
            _text(msp, "critical zone", (cx + rm * math.cos(a), cy + rm * math.sin(a)),
                  min(small, float(critical_width_mm) / 3.0), "SCANANALYSE_CRITICAL")

    if seams is None and plate is not None and grid is not None:
        from ..repair import seams_from_plate

        seams = seams_from_plate(plate, x0=grid[0], y0=grid[1], pitch=grid[2])
    if seams is not None:
        for x1, y1, x2, y2 in np.asarray(seams, dtype=float).reshape(-1, 4):
            if np.all(np.isfinite((x1, y1, x2, y2))):
                msp.add_line((x1, y1), (x2, y2), dxfattribs={"layer": "SCANANALYSE_SEAM"})
    if plate is not None and grid is not None:
        from scipy import ndimage

        p = np.asarray(plate)
        x0, y0, pitch = (float(v) for v in grid)
        lab = np.where(p >= 0, p, -1).astype(np.int64)
        if lab.size and lab.max() >= 0:
            for pid, sl in enumerate(ndimage.find_objects(lab + 1)):
                if sl is None:
                    continue
                m = lab[sl] == pid
                d = ndimage.distance_transform_edt(np.pad(m, 1))[1:-1, 1:-1]
                rr, cc = divmod(int(np.argmax(d)), m.shape[1])
                _text(msp, f"plate {pid}", (x0 + (sl[1].start + cc) * pitch, y0 + (sl[0].start + rr) * pitch),
                      small * 1.5, "SCANANALYSE_PLATE_NO")

    if indications is not None and len(indications):
        ind = indications
        if prove_up_ids is not None:
            keep = set(str(i) for i in prove_up_ids)
            ind = ind[[str(i) in keep for i in ind["id"]]]
        elif "status" in ind.columns:
            ind = ind[ind["status"].astype(str) != "repaired"]
        for iid, x, y in zip(ind["id"], ind["x_mm"].to_numpy(float), ind["y_mm"].to_numpy(float)):
            if np.isfinite(x) and np.isfinite(y):
                _cross(msp, x, y, small, "SCANANALYSE_PROVE_UP")
                from ezdxf.enums import TextEntityAlignment

                _text(msp, f"I{iid}", (x + 1.2 * small, y + 1.2 * small), small, "SCANANALYSE_PROVE_UP",
                      align=TextEntityAlignment.BOTTOM_LEFT)
    _atomic_write(path, doc.saveas)


def patch_locations(patches, *, radius_mm, centre=(0.0, 0.0), pitch_mm=None):
    """The patch table with ``clock`` and ``from_shell_mm`` of each patch's centre after
    ``y_max_mm`` (:func:`scananalyse.locate.add_location_columns`), for ``patches.csv``.

    Parameters
    ----------
    patches : patch table. [mm]
    radius_mm : inside radius of the shell. [mm]
    centre : tank centre. [mm]
    pitch_mm : scan pitch (rounding step of ``from_shell_mm``). [mm]

    Returns
    -------
    DataFrame
    """
    from ..locate import add_location_columns

    df = patches.copy()
    df["_xc"] = (df["x_min_mm"].astype(float) + df["x_max_mm"].astype(float)) / 2.0
    df["_yc"] = (df["y_min_mm"].astype(float) + df["y_max_mm"].astype(float)) / 2.0
    cols = list(df.columns)
    cols.remove("_xc")
    cols.remove("_yc")
    pos = cols.index("y_max_mm") + 1 if "y_max_mm" in cols else len(cols)
    df = df[cols[:pos] + ["_xc", "_yc"] + cols[pos:]]
    out = add_location_columns(df, radius_mm=radius_mm, centre=centre, x_col="_xc", y_col="_yc",
                               pitch_mm=pitch_mm)
    return out.drop(columns=["_xc", "_yc"])
