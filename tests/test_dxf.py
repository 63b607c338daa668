"""The repair drawing (report/dxf.py) and the location columns (locate.py)."""

import numpy as np
import pandas as pd
import pytest

ezdxf = pytest.importorskip("ezdxf")

from scananalyse.indications import write_indications_csv  # noqa: E402
from scananalyse.locate import add_location_columns, clock_position, coordinate_step, distance_from_shell  # noqa: E402
from scananalyse.report.dxf import LAYERS, patch_locations, write_patches_dxf  # noqa: E402


def _patches():
    return pd.DataFrame({
        "patch": ["P001", "P002"], "zone": ["interior", "critical"],
        "x_min_mm": [-500.0, 2900.0], "y_min_mm": [-300.0, -200.0],
        "x_max_mm": [100.0, 3400.0], "y_max_mm": [150.0, 300.0],
        "corner_radius_mm": [50.0, 50.0], "thickness_mm": [8.0, 10.0],
    })


def test_clock_position_datum_is_twelve_and_clockwise():
    assert clock_position([0, 10, 0, -10, 10], [10, 0, -10, 0, -10]) == ["12:00", "3:00", "6:00", "9:00", "4:30"]
    assert clock_position([100.0], [100.0], centre=(100.0, 0.0)) == ["12:00"]
    assert clock_position([0.0, np.nan], [0.0, 1.0]) == ["", ""]


def test_distance_from_shell_and_step():
    d = distance_from_shell([0.0, 3000.0, 5000.0], [0.0, 0.0, 0.0], radius_mm=4000.0)
    assert d.tolist() == [4000.0, 1000.0, -1000.0]
    assert coordinate_step(25.0) == 5.0
    assert coordinate_step(2.0) == 1.0
    assert coordinate_step(None) == 1.0
    df = add_location_columns(pd.DataFrame({"id": [1], "x_mm": [1000.0], "y_mm": [0.0], "z": [0]}),
                              radius_mm=4000.0, pitch_mm=25.0)
    assert list(df.columns) == ["id", "x_mm", "y_mm", "clock", "from_shell_mm", "z"]
    assert df["clock"].iloc[0] == "3:00" and df["from_shell_mm"].iloc[0] == 3000.0


def test_old_call_writes_patch_layers_only(tmp_path):
    p = tmp_path / "p.dxf"
    write_patches_dxf(_patches(), p)
    doc = ezdxf.readfile(p)
    names = {ly.dxf.name for ly in doc.layers}
    assert {"SCANANALYSE_PATCH", "SCANANALYSE_PATCH_ID"} <= names
    assert "SCANANALYSE_SHELL" not in names
    from scananalyse.repair import read_patches

    back = read_patches(p)
    assert back["patch"].tolist() == ["P001", "P002"]
    assert back["x_max_mm"].tolist() == [100.0, 3400.0]


def test_full_drawing_layers_units_and_audit(tmp_path):
    p = tmp_path / "full.dxf"
    plate = np.full((40, 40), 0, dtype=np.int32)
    plate[:, 20:] = 1
    ind = pd.DataFrame({"id": [3, 4], "x_mm": [-1000.0, 1200.0], "y_mm": [500.0, -800.0],
                        "status": ["new", "repaired"]})
    write_patches_dxf(_patches(), p, shell_radius_mm=4000.0, centre=(0.0, 0.0), critical_width_mm=600.0,
                      plate=plate, grid=(-3900.0, -3900.0, 200.0), indications=ind)
    doc = ezdxf.readfile(p)
    assert doc.header["$INSUNITS"] == 4
    names = {ly.dxf.name for ly in doc.layers}
    assert set(LAYERS) <= names
    auditor = doc.audit()
    assert not auditor.has_errors and not auditor.has_fixes
    msp = doc.modelspace()
    by_layer = {}
    for e in msp:
        by_layer.setdefault(e.dxf.layer, []).append(e)
    assert set(LAYERS) <= set(by_layer)  # every layer holds something
    texts = {e.dxf.text for e in msp.query("TEXT")}
    assert {"P001", "P002", "600 x 450 x 8 mm", "plate 0", "plate 1", "I3"} <= texts
    assert "I4" not in texts  # repaired: nothing to prove up
    assert len(by_layer["SCANANALYSE_SEAM"]) >= 1
    # read back as a patch set, only the patches are outlines (the drawing's own furniture
    # layers are known and skipped without a warning; the shell circle is no patch)
    import warnings

    from scananalyse.repair import read_patches

    with warnings.catch_warnings():
        warnings.simplefilter("error")
        back = read_patches(p)
    assert back["patch"].tolist() == ["P001", "P002"]


def test_patch_locations_and_indication_csv(tmp_path):
    pl = patch_locations(_patches(), radius_mm=4000.0, pitch_mm=25.0)
    i = list(pl.columns).index("y_max_mm")
    assert list(pl.columns)[i + 1:i + 3] == ["clock", "from_shell_mm"]
    assert pl["clock"].tolist()[1] == "3:00"
    df = pd.DataFrame({"id": [1, 2], "x_mm": np.float32([1000.013, 0.0]), "y_mm": np.float32([0.0, 2000.0]),
                       "depth_max_mm": np.float32([1.4, 2.0]), "plate": [-1, 3],
                       "rate_max_mm_y": np.float32([0.1234567, np.nan])})
    out = tmp_path / "ind.csv"
    write_indications_csv(df, out, radius_mm=4000.0, pitch_mm=25.0)
    text = out.read_text()
    assert "1.3999" not in text and "1000.01" not in text
    back = pd.read_csv(out, keep_default_na=False)
    assert back["depth_max_mm"].tolist() == [1.4, 2.0]
    assert back["plate"].astype(str).tolist() == ["", "3"]
    assert back["clock"].tolist() == ["3:00", "12:00"]
    assert back["from_shell_mm"].tolist() == [3000.0, 2000.0]
