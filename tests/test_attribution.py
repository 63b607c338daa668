"""Tests of operator attribution: side layer, shapes file, top-side depth map."""

import datetime as dt

import numpy as np
import pytest
from matplotlib.path import Path

from scananalyse.attribution import (Shape, attribution_summary, raw_side_map, read_shapes,
                                     resolve_side, shape_mask, side_map, split_loss,
                                     top_depth_map)
from scananalyse.errors import InputError
from scananalyse.rates import compute_rates
from scananalyse.scan import SIDE_TOP, SIDE_UNDER, SIDE_UNKNOWN, FloorScan, ScanMeta

META = ScanMeta(inspected=dt.date(2024, 5, 14), nominal=6.35, threshold=1.0, sigma=0.1,
                installed=dt.date(2004, 5, 14))


def scan(rows=40, cols=50, pitch=10.0, x0=-245.0, y0=-195.0, side=None, thickness=None):
    t = np.full((rows, cols), 6.35, np.float32) if thickness is None else thickness
    return FloorScan(t, x0, y0, pitch, META, side=side)


def write(tmp_path, text, name="shapes.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


# ---------------------------------------------------------------- side map
def test_default_is_underside_and_option_top():
    # domain.md §2 [seen/practice]: whatever is not found from above is underside
    s = scan()
    assert np.all(side_map(s) == SIDE_UNDER)
    assert np.all(side_map(s, default="top") == SIDE_TOP)
    with pytest.raises(InputError, match="unknown_side"):
        side_map(s, default="split")


def test_side_layer_kept_and_unknowns_reported():
    layer = np.zeros((40, 50), np.int8)
    layer[:10] = SIDE_TOP
    layer[10:20] = SIDE_UNDER
    s = scan(side=layer)
    raw = raw_side_map(s)
    assert np.array_equal(raw, layer)  # raw keeps the unknowns
    res = resolve_side(raw, "under")
    assert np.all(res[:10] == SIDE_TOP) and np.all(res[10:] == SIDE_UNDER)
    assert np.count_nonzero(raw == SIDE_UNKNOWN) == 20 * 50
    loss = np.full((40, 50), 2.0, np.float32)
    summ = attribution_summary(raw, loss)
    # counting by hand: 10 rows top, 10 under, 20 rows defaulted, 50 columns each
    assert summ["cells_top"] == 500 and summ["cells_under"] == 500
    assert summ["cells_defaulted"] == 1000 and summ["defaulted_pct"] == pytest.approx(50.0)


def test_shapes_paint_over_layer_later_wins():
    layer = np.full((40, 50), SIDE_UNDER, np.int8)
    s = scan(side=layer)
    shapes = [Shape("rect", SIDE_TOP, x=0.0, y=0.0, w=100.0, h=100.0),
              Shape("circle", SIDE_UNDER, x=0.0, y=0.0, r=20.0)]
    m = side_map(s, shapes=shapes)
    rect = shape_mask(shapes[0], s)
    circ = shape_mask(shapes[1], s)
    assert np.all(m[rect & ~circ] == SIDE_TOP)
    assert np.all(m[circ] == SIDE_UNDER)
    assert np.all(m[~rect] == SIDE_UNDER)
    assert np.count_nonzero(circ) > 0 and np.count_nonzero(rect & ~circ) > 0


def test_circle_and_rect_masks_match_cell_centre_rule():
    s = scan()
    X, Y = s.grid_xy()
    c = Shape("circle", SIDE_TOP, x=13.0, y=-7.0, r=83.0)
    # independent rule, common practice: a cell belongs to a shape if its centre is inside
    assert np.array_equal(shape_mask(c, s), (X - 13.0) ** 2 + (Y + 7.0) ** 2 <= 83.0 ** 2)
    r = Shape("rect", SIDE_TOP, x=-100.0, y=40.0, w=120.0, h=61.0)
    ref = (np.abs(X + 100.0) <= 60.0) & (np.abs(Y - 40.0) <= 30.5)
    assert np.array_equal(shape_mask(r, s), ref)


def test_polygon_mask_matches_matplotlib_path():
    s = scan()
    pts = ((-200.0, -150.0), (150.0, -120.0), (60.0, 170.0), (-30.0, 20.0))
    p = Shape("polygon", SIDE_TOP, points=pts)
    X, Y = s.grid_xy()
    ref = Path(np.array(pts)).contains_points(np.column_stack([X.ravel(), Y.ravel()]))
    got = shape_mask(p, s).ravel()
    # reference library: matplotlib's point-in-polygon; cells on the edge may differ
    assert np.count_nonzero(got != ref) <= 0.01 * ref.sum()
    assert ref.sum() > 100


def test_shape_partly_outside_is_clipped():
    s = scan()
    c = Shape("circle", SIDE_TOP, x=-245.0, y=-195.0, r=25.0)  # centred on cell [0, 0]
    m = shape_mask(c, s)
    X, Y = s.grid_xy()
    assert np.array_equal(m, (X + 245.0) ** 2 + (Y + 195.0) ** 2 <= 625.0)


# ---------------------------------------------------------------- shapes file
GOOD = """# format: scananalyse-shapes 1
# units: mm
shape,side,x,y,r,w,h,points
circle,top,0,0,50,,,
rect,under,-100,50,,80,40,
polygon,top,,,,,,"-200 -150; 150 -120; 60 170"
"""


def test_read_shapes_good_file(tmp_path):
    shapes = read_shapes(write(tmp_path, GOOD), scan=scan())
    assert [s.kind for s in shapes] == ["circle", "rect", "polygon"]
    assert shapes[0].side == SIDE_TOP and shapes[1].side == SIDE_UNDER
    assert shapes[1].w == 80.0 and shapes[2].points[1] == (150.0, -120.0)
    assert shapes[2].line == 6


def test_read_shapes_inches(tmp_path):
    text = GOOD.replace("# units: mm", "# units: in")
    shapes = read_shapes(write(tmp_path, text))
    # 1 in = 25.4 mm exactly [seen: corrosion reference pages]
    assert shapes[0].r == pytest.approx(50 * 25.4)


def test_side_map_from_shapes_file(tmp_path):
    s = scan()
    m = side_map(s, shapes=str(write(tmp_path, GOOD)))
    assert m[s.cell_of(0.0, 0.0)[0].astype(int), s.cell_of(0.0, 0.0)[1].astype(int)] == SIDE_TOP


@pytest.mark.parametrize("row, match", [
    ("hexagon,top,0,0,5,,,", r"shapes.csv:4: field 'shape': unknown shape"),
    ("circle,sideways,0,0,5,,,", r"shapes.csv:4: field 'side': bad side"),
    ("circle,top,0,abc,5,,,", r"shapes.csv:4: field 'y': not a number"),
    ("circle,top,0,0,-5,,,", r"shapes.csv:4: field 'r': must be positive"),
    ("circle,top,0,0,,,,", r"shapes.csv:4: field 'r': required"),
    ("rect,top,0,0,,nan,5,", r"shapes.csv:4: field 'w': not a finite number"),
    ('polygon,top,,,,,,"0 0; 10 10"', r"shapes.csv:4: field 'points': .*at least 3"),
    ('polygon,top,,,,,,"0 0; 10 10; 20 20"', r"shapes.csv:4: field 'points': .*zero area"),
    ('polygon,top,,,,,,"0 0; 10; 20 20"', r"shapes.csv:4: field 'points': vertex 2"),
    ("circle,top,5000,0,50,,,", r"shapes.csv:4: circle lies entirely outside"),
    ("circle,top,0,0,5,,,,extra", r"shapes.csv:4: 9 fields"),
])
def test_shapes_file_errors(tmp_path, row, match):
    text = "# format: scananalyse-shapes 1\n# units: mm\nshape,side,x,y,r,w,h,points\n" + row + "\n"
    with pytest.raises(InputError, match=match):
        read_shapes(write(tmp_path, text), scan=scan())


def test_shapes_file_header_errors(tmp_path):
    with pytest.raises(InputError, match="field 'units'"):
        read_shapes(write(tmp_path, GOOD.replace("# units: mm", "# units: furlong")))
    with pytest.raises(InputError, match="field 'format'"):
        read_shapes(write(tmp_path, GOOD.replace("shapes 1", "shapes 9")))
    with pytest.raises(InputError, match="field 'colour': unknown column"):
        read_shapes(write(tmp_path, GOOD.replace("h,points", "h,points,colour")))
    with pytest.raises(InputError, match="field 'side': required column"):
        read_shapes(write(tmp_path, "shape,x,y,r\ncircle,0,0,5\n"))
    with pytest.raises(InputError, match="cannot read"):
        read_shapes(tmp_path / "missing.csv")


def test_outside_shape_caught_when_painting():
    s = scan()
    far = Shape("rect", SIDE_TOP, x=9000.0, y=0.0, w=10.0, h=10.0, source="ops.csv", line=7)
    with pytest.raises(InputError, match=r"ops.csv:7: rect lies entirely outside"):
        side_map(s, shapes=[far])


# ---------------------------------------------------------------- top-side depth map
def test_split_loss_with_top_depth():
    loss = np.array([[2.0, 2.0, 1.0, np.nan]], np.float32)
    side = np.full((1, 4), SIDE_UNDER, np.int8)
    depth = np.array([[0.5, np.nan, 3.0, 1.0]], np.float32)
    top, under = split_loss(loss, side, top_depth=depth)
    # domain.md §2: underside loss = total − measured top loss, clipped at 0
    np.testing.assert_allclose(top, [[0.5, 0.0, 1.0, np.nan]])
    np.testing.assert_allclose(under, [[1.5, 2.0, 0.0, np.nan]])
    assert top.dtype == np.float32 and under.dtype == np.float32


def test_top_depth_map_validation():
    s = scan(rows=4, cols=5)
    with pytest.raises(InputError, match="shape"):
        top_depth_map(np.zeros((3, 3)), s)
    with pytest.raises(InputError, match=">= 0"):
        top_depth_map(np.full((4, 5), -1.0), s)
    other = scan(rows=4, cols=5, x0=0.0)
    with pytest.raises(InputError, match="not on the newer scan's grid"):
        top_depth_map(other, s)
    d = top_depth_map(scan(rows=4, cols=5, thickness=np.full((4, 5), 0.7, np.float32)), s)
    assert d.dtype == np.float32 and np.all(d == np.float32(0.7))


def test_rates_attributed_by_top_depth():
    # one cell: 3 mm loss now, 1 mm of it measured from above (pit gauge); 1 mm growth
    t_new = np.full((3, 3), 6.35, np.float32)
    t_new[1, 1] = 3.35
    t_old = t_new.copy()
    t_old[1, 1] = 4.35
    new = scan(rows=3, cols=3, thickness=t_new)
    old = FloorScan(t_old, new.x0, new.y0, new.pitch, META.replace(inspected=dt.date(2019, 5, 14)))
    depth = np.full((3, 3), np.nan, np.float32)
    depth[1, 1] = 1.0
    r = compute_rates(new, old, side_map(new), top_depth=depth)
    assert r.loss_top[1, 1] == pytest.approx(1.0) and r.loss_under[1, 1] == pytest.approx(2.0)
    dt_y = r.dt_years
    # the change is shared like the loss now: 1/3 top, 2/3 under (our documented rule)
    assert r.rate_short_top[1, 1] == pytest.approx(1.0 / 3 / dt_y, rel=1e-5)
    assert r.rate_short_under[1, 1] == pytest.approx(2.0 / 3 / dt_y, rel=1e-5)
    # long-term: loss / 20 years in service
    assert r.rate_long_under[1, 1] == pytest.approx(2.0 / r.age_years, rel=1e-5)
