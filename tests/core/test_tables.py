"""CSV tables: exact numbers, formula-injection guard, read back with csv and pandas."""

import csv

import numpy as np
import pytest
from rockhead.core.errors import OutputError
from rockhead.core.formats.layer import Layer
from rockhead.core.formats.tables import guard_text, write_csv
from rockhead.core.formats.tables import write_layer_csv as layer_to_csv
from shapely.geometry import LineString, Point


def _rows(path, encoding="utf-8"):
    with open(path, newline="", encoding=encoding) as fh:
        return list(csv.reader(fh))


def test_floats_read_back_exactly(tmp_path, rng):
    values = np.concatenate([rng.normal(0, 1e3, 200), [1e-300, -2.5e-7, 123456789.123, -0.0]])
    path = write_csv(tmp_path / "t.csv", {"depth_m": values})
    rows = _rows(path)
    assert rows[0] == ["depth_m"]
    # repr() is the shortest text that reads back to the same double (Python float semantics)
    np.testing.assert_array_equal(np.array([float(r[0]) for r in rows[1:]]), values)


def test_digits_option(tmp_path):
    path = write_csv(tmp_path / "t.csv", {"v": np.array([1234.56789, -0.000123456])}, digits=4)
    assert [r[0] for r in _rows(path)[1:]] == ["1235", "-0.0001235"]


@pytest.mark.parametrize("prefix", ["=", "+", "-", "@", "\t", "\r"], ids=["eq", "plus", "minus", "at", "tab", "cr"])
def test_text_formula_prefixes_are_guarded(tmp_path, prefix):
    # OWASP "CSV Injection": cells starting with these characters get a leading apostrophe
    text = prefix + "cmd|' /C calc'!A0"
    path = write_csv(tmp_path / "t.csv", {"status": np.array([text, "ok"], dtype=object)})
    rows = _rows(path)
    assert rows[1] == ["'" + text]
    assert rows[2] == ["ok"]


def test_numbers_stay_numbers_with_pandas(tmp_path):
    pd = pytest.importorskip("pandas")  # reference CSV reader (in .venv and Debian's python3-pandas)
    cols = {
        "line": np.array(["L1", "-L2", "Ligne é"], dtype=object),
        "elevation_m": np.array([-12.25, np.nan, 3.0]),
        "picks_used": np.array([-3, 0, 24]),
        "accepted": np.array([True, False, True]),
    }
    path = write_csv(tmp_path / "t.csv", cols)
    df = pd.read_csv(path)
    assert df["elevation_m"].dtype.kind == "f" and df["elevation_m"].iloc[0] == -12.25
    assert np.isnan(df["elevation_m"].iloc[1])
    assert df["picks_used"].tolist() == [-3, 0, 24]
    assert df["accepted"].tolist() == [True, False, True]
    assert df["line"].tolist() == ["L1", "'-L2", "Ligne é"]


def test_guard_text_examples():
    assert guard_text("@SUM(1)") == "'@SUM(1)"
    assert guard_text("12") == "12"  # digits are not a formula
    assert guard_text("L-1") == "L-1"  # only the first character matters


def test_quoting_and_unicode(tmp_path):
    cols = {"note": np.array(['a,b "c"', "線\nnext", None], dtype=object)}
    path = write_csv(tmp_path / "t.csv", cols, bom=True)
    raw = path.read_bytes()
    assert raw.startswith(b"\xef\xbb\xbf")
    rows = _rows(path, encoding="utf-8-sig")
    assert rows == [["note"], ['a,b "c"'], ["線\nnext"], [""]]
    assert raw.endswith(b"\r\n")  # RFC 4180 line ends


def test_point_layer_gets_xy(tmp_path):
    layer = Layer(
        [Point(512000.125, 5001000.5), None],
        {"line": np.array(["L1", "L2"]), "depth_m": np.array([14.5, np.nan])},
    )
    rows = _rows(layer_to_csv(tmp_path / "p.csv", layer))
    assert rows == [
        ["x", "y", "line", "depth_m"],
        ["512000.125", "5001000.5", "L1", "14.5"],
        ["", "", "L2", ""],
    ]


def test_line_layer_gets_wkt(tmp_path):
    layer = Layer([LineString([(0, 0), (1.5, 2)])], {"elevation_m": np.array([200.0])})
    rows = _rows(layer_to_csv(tmp_path / "l.csv", layer))
    assert rows[0] == ["wkt", "elevation_m"]
    from shapely import wkt

    assert wkt.loads(rows[1][0]).equals(LineString([(0, 0), (1.5, 2)]))
    rows = _rows(layer_to_csv(tmp_path / "n.csv", layer, geometry=None))
    assert rows == [["elevation_m"], ["200.0"]]


def test_attribute_layer(tmp_path):
    rows = _rows(layer_to_csv(tmp_path / "a.csv", Layer(None, {"mistie_ms": np.array([1.5, -2.0])})))
    assert rows == [["mistie_ms"], ["1.5"], ["-2.0"]]


def test_repeat_write_is_byte_identical(tmp_path, rng):
    cols = {"a": rng.normal(size=50), "b": np.arange(50), "c": np.array(["x"] * 50)}
    a = write_csv(tmp_path / "a.csv", cols)
    b = write_csv(tmp_path / "b.csv", cols)
    assert a.read_bytes() == b.read_bytes()


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"columns": {"a": np.arange(3), "b": np.arange(2)}}, "one length"),
        ({"columns": {"a": np.zeros((2, 2))}}, "1-D"),
        ({"columns": {"a": np.array([1j])}}, "dtype complex128"),
        ({"columns": {"a": np.arange(2)}, "digits": 0}, "digits=0"),
    ],
    ids=["ragged", "2d", "complex", "digits"],
)
def test_bad_tables_are_refused(tmp_path, kwargs, message):
    target = tmp_path / "t.csv"
    target.write_text("earlier")
    with pytest.raises(OutputError, match=message):
        write_csv(target, **kwargs)
    assert target.read_text() == "earlier"


def test_xy_field_clash(tmp_path):
    with pytest.raises(OutputError, match="field 'x' clashes"):
        layer_to_csv(tmp_path / "c.csv", Layer([Point(0, 0)], {"x": np.array([1.0])}))


def test_random_text_round_trips_through_guard(tmp_path, rng):
    # random strings over an alphabet rich in formula starters, quotes, separators and line breaks
    alphabet = list("=+-@\t\r\n,;\"' aZ09é線")
    texts = ["".join(rng.choice(alphabet, size=int(rng.integers(0, 12)))) for _ in range(400)]
    path = write_csv(tmp_path / "r.csv", {"t": np.array(texts, dtype=object)})
    back = [r[0] for r in _rows(path)[1:]]
    assert len(back) == len(texts)
    for original, cell in zip(texts, back):
        # a cell is the text itself, or the text behind one apostrophe when it starts like a formula
        if original.startswith(("=", "+", "-", "@", "\t", "\r")):
            assert cell == "'" + original
        else:
            assert cell == original
        assert not cell.startswith(("=", "+", "-", "@", "\t", "\r"))


def test_geometry_helpers_match_each_geometrys_own_properties():
    """The vectorised type names and point coordinates equal shapely's per-geometry attributes."""
    from rockhead.core.formats.layer import geometry_type_names, point_xy
    from shapely.geometry import LineString, MultiPoint, Point, Polygon

    geoms = [
        Point(1.25, -2.5),
        None,
        Point(),
        LineString([(0, 0), (1, 1)]),
        MultiPoint([(0, 0), (2, 1)]),
        Polygon([(0, 0), (1, 0), (1, 1)]),
        Point(3.0, 4.0, 5.0),
    ]
    expected = [None if g is None or g.is_empty else g.geom_type for g in geoms]
    assert geometry_type_names(geoms) == expected
    points = [g for g in geoms if g is None or g.geom_type == "Point"]
    xy = point_xy(points)
    reference = [(g.x, g.y) if g is not None and not g.is_empty else (np.nan, np.nan) for g in points]
    np.testing.assert_array_equal(xy, np.array(reference))  # exact: the same doubles, NaN where no point
    assert point_xy([]).shape == (0, 2)
