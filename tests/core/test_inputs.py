"""Tests for core.survey (csvfile, readers, config): readers give back exactly what the files hold, in the working CRS.

The bad-input corpus (test_bad_inputs.py) covers the error messages case by case;
here the values, units, CRS handling and settings are checked.
"""

import dataclasses
import hashlib
import warnings
from pathlib import Path

import numpy as np
import pyproj
import pytest
from rockhead.core.crs import parse_crs
from rockhead.core.errors import InputFileError, RockheadWarning, SurveyConfigError
from rockhead.core.survey import config, csvfile, readers
from rockhead.core.survey.model import Settings

STATIONS = """# invented site
line,station,x,y,z
L1,1,500000.0,5500000.0,300.0

L1,2,500005.0,5500000.0,300.5
L2,1,500002.5,5499995.0,299.0
L2,2,500002.5,5500005.0,299.5
"""

PICKS = """line,shot,receiver,time_ms
L1,1,2,30.5
L2,1,2,31.25
L2,2,1,31.0
"""


def write(path: Path, text, encoding="utf-8"):
    path.write_bytes(text.encode(encoding) if isinstance(text, str) else text)
    return path


def survey_dir(tmp_path, toml_extra="", stations=STATIONS, picks=PICKS, boreholes=None, crs='"EPSG:32633"'):
    write(tmp_path / "stations.csv", stations)
    write(tmp_path / "picks.csv", picks)
    files = 'stations = "stations.csv"\npicks = "picks.csv"\n'
    if boreholes is not None:
        write(tmp_path / "boreholes.csv", boreholes)
        files += 'boreholes = "boreholes.csv"\n'
    write(tmp_path / "survey.toml", f'[survey]\nname = "T"\ncrs = {crs}\n\n[files]\n{files}\n{toml_extra}')
    return tmp_path / "survey.toml"


# ----------------------------------------------------------------- stations


def test_read_stations_values_lines_and_labels(tmp_path):
    st = readers.read_stations(write(tmp_path / "s.csv", STATIONS), "EPSG:32633")
    assert list(st.line) == ["L1", "L1", "L2", "L2"]
    assert list(st.station) == ["1", "2", "1", "2"]  # labels stay text
    np.testing.assert_array_equal(st.x_m, [500000.0, 500005.0, 500002.5, 500002.5])
    np.testing.assert_array_equal(st.z_m, [300.0, 300.5, 299.0, 299.5])
    # physical 1-based lines: comment (1), header (2), blank line (4) counted
    assert list(st.file_line) == [3, 5, 6, 7]


def test_spreadsheet_blank_rows_skipped(tmp_path):
    text = STATIONS.replace("\n\n", "\n,,,,\n , , ,,\n")
    st = readers.read_stations(write(tmp_path / "s.csv", text), "EPSG:32633")
    assert list(st.file_line) == [3, 6, 7, 8]


@pytest.mark.parametrize("newline", ["\n", "\r\n", "\r"], ids=["lf", "crlf", "cr"])
def test_line_numbers_with_any_line_end(tmp_path, newline):
    text = STATIONS.replace("\n", newline).replace("L2,1,500002.5", "L2,1,abc")
    with pytest.raises(InputFileError, match=r"^s\.csv, line 6, field 'x': value 'abc' is not a number"):
        readers.read_stations(write(tmp_path / "s.csv", text), 32633)


def test_geographic_stations_end_in_utm(tmp_path):
    lon = np.array([15.20, 15.201, 15.2005, 15.2005])
    lat = np.array([48.10, 48.10, 48.0995, 48.1005])
    rows = "\n".join(f"L{1 + k // 2},{k % 2},{lo:.7f},{la:.7f},300" for k, (lo, la) in enumerate(zip(lon, lat)))
    st = readers.read_stations(write(tmp_path / "g.csv", "line,station,x,y,z\n" + rows + "\n"), "EPSG:4326")
    # reference: pyproj itself, x = longitude first (always_xy)
    tr = pyproj.Transformer.from_crs(4326, 32633, always_xy=True)
    x, y = tr.transform(np.round(lon, 7), np.round(lat, 7))
    np.testing.assert_allclose(st.x_m, x, atol=1e-6)
    np.testing.assert_allclose(st.y_m, y, atol=1e-6)


def test_stations_explicit_working_crs(tmp_path):
    st = readers.read_stations(write(tmp_path / "s.csv", STATIONS), 32633, crs_work="EPSG:3035")
    tr = pyproj.Transformer.from_crs(32633, 3035, always_xy=True)
    x, _ = tr.transform(500000.0, 5500000.0)
    assert abs(st.x_m[0] - x) < 1e-6


def test_unknown_column_warns_and_is_ignored(tmp_path):
    text = STATIONS.replace("line,station,x,y,z", "line,station,x,y,z,remark").replace("300.0", "300.0,flag")
    text = text.replace("300.5", "300.5,").replace("299.0", "299.0,").replace("299.5", "299.5,")
    with pytest.warns(RockheadWarning, match=r"s\.csv, line 2: column 'remark' not used"):
        st = readers.read_stations(write(tmp_path / "s.csv", text), 32633)
    assert len(st) == 4


def test_unknown_column_suggests_name(tmp_path):
    text = PICKS.replace("time_ms", "time_ms,sigma").replace("30.5", "30.5,1")
    text = text.replace("31.25", "31.25,1").replace("31.0\n", "31.0,1\n")
    with pytest.warns(RockheadWarning, match=r"'sigma' \(did you mean 'sigma_ms'\?\)"):
        readers.read_picks(write(tmp_path / "p.csv", text), 0.5)


def test_area_of_use_warning_counts_points(tmp_path):
    # 11.5 E is half a degree west of UTM zone 33's strip (EPSG area of use 12..18 E)
    tr = pyproj.Transformer.from_crs(4326, 32633, always_xy=True)
    x, y = tr.transform(11.5, 47.0)
    text = f"line,station,x,y,z\nA,1,{x:.2f},{y:.2f},1\nA,2,{x + 5:.2f},{y:.2f},1\n"
    with pytest.warns(
        RockheadWarning,
        match=r"2 point\(s\) lie outside the area of use of EPSG:32633 .*, up to 0\.50 degrees",
    ):
        readers.read_stations(write(tmp_path / "s.csv", text), 32633)


# ----------------------------------------------------------------- picks


def test_read_picks_units_defaults(tmp_path):
    p = readers.read_picks(write(tmp_path / "p.csv", PICKS), default_sigma_ms=0.75)
    np.testing.assert_allclose(p.time_s, [0.0305, 0.03125, 0.031])  # ms -> s
    np.testing.assert_allclose(p.sigma_s, 0.00075)
    assert list(p.reflector) == ["1", "1", "1"]
    assert list(p.file_line) == [2, 3, 4]


def test_read_picks_optional_columns(tmp_path):
    text = "LINE, Shot ,receiver,time_ms,sigma_ms,reflector\n"
    text += "L1,1,2,30,0.4,top\nL1,1,2,50,,base\nL1,2,1,30,1.5,top\n"
    p = readers.read_picks(write(tmp_path / "p.csv", text), default_sigma_ms=0.5)
    np.testing.assert_allclose(p.sigma_s, [0.0004, 0.0005, 0.0015])  # empty cell -> default
    assert list(p.reflector) == ["top", "base", "top"]


def test_reflector_column_empty_everywhere_is_one_reflector(tmp_path):
    text = "line,shot,receiver,time_ms,reflector\nL1,1,2,30,\nL1,2,1,31,\n"
    assert list(readers.read_picks(write(tmp_path / "p.csv", text)).reflector) == ["1", "1"]


def test_empty_reflector_cell_among_labels_is_refused(tmp_path):
    # it would silently become a reflector of its own ("1") beside "top"
    text = "line,shot,receiver,time_ms,reflector\nL1,1,2,30,top\nL1,2,1,31,\n"
    with pytest.raises(InputFileError, match=r"line 3, field 'reflector': empty reflector label while other picks"):
        readers.read_picks(write(tmp_path / "p.csv", text))


def test_reflector_labels_differing_in_case_are_one(tmp_path):
    text = "line,shot,receiver,time_ms,reflector\nL1,1,2,30,Rock\nL1,2,1,31,rock\nL1,1,3,32,rock\n"
    with pytest.warns(RockheadWarning, match=r"differ only in case: taken as one reflector 'rock'"):
        p = readers.read_picks(write(tmp_path / "p.csv", text))
    assert list(p.reflector) == ["rock", "rock", "rock"]


def test_picks_checked_against_stations_only_when_given(tmp_path):
    st = readers.read_stations(write(tmp_path / "s.csv", STATIONS), 32633)
    text = PICKS + "L1,1,7,33.0\n"
    path = write(tmp_path / "p.csv", text)
    assert len(readers.read_picks(path, 0.5)) == 4
    with pytest.raises(InputFileError, match=r"line 5, field 'receiver': receiver '7' is not a station of line 'L1'"):
        readers.read_picks(path, 0.5, st)


@pytest.mark.parametrize(
    "times, ok",
    [
        ([0.02, 0.03, 0.04], False),  # seconds: all < 1, median < 0.5
        ([0.2, 0.4, 0.45], False),
        ([20.0, 30.0, 40.0], True),
        ([0.6, 0.7, 0.9], True),  # all < 1 ms but median >= 0.5: not the seconds pattern
        ([0.2, 0.3, 1.5], True),  # one time >= 1: milliseconds
    ],
    ids=["s_small", "s_large", "ms", "sub_ms_high_median", "mixed"],
)
def test_seconds_heuristic(tmp_path, times, ok):
    text = "line,shot,receiver,time_ms\n" + "".join(f"A,1,{k},{t}\n" for k, t in enumerate(times))
    path = write(tmp_path / "p.csv", text)
    if ok:
        assert len(readers.read_picks(path, 0.5)) == 3
    else:
        with pytest.raises(InputFileError, match=r"times look like seconds"):
            readers.read_picks(path, 0.5)


def test_max_time_parameter(tmp_path):
    path = write(tmp_path / "p.csv", "line,shot,receiver,time_ms\nA,1,2,2500\n")
    with pytest.raises(InputFileError, match=r"line 2, field 'time_ms': time '2500' ms is beyond 2000 ms"):
        readers.read_picks(path, 0.5)
    assert readers.read_picks(path, 0.5, max_time_ms=3000.0).time_s[0] == 2.5


@pytest.mark.parametrize("sigma", [0, -1.0, float("nan"), 1e-300], ids=["zero", "negative", "nan", "tiny"])
def test_default_sigma_must_be_positive(tmp_path, sigma):
    with pytest.raises(InputFileError, match=r"must be >= 0\.001"):
        readers.read_picks(write(tmp_path / "p.csv", PICKS), sigma)


@pytest.mark.parametrize(
    "row, match",
    [
        ("A,1,2,30,4.9e-324", r"line 3, field 'sigma_ms': sigma '4\.9e-324' ms is below 0\.001 ms"),
        ("A,1,2,0.05,0.5", r"line 3, field 'time_ms': time '0\.05' ms is below 0\.1 ms"),
    ],
    ids=["sigma_underflow", "time_tiny"],
)
def test_tiny_values_refused(tmp_path, row, match):
    # found by the fuzz tests: 4.9e-324 ms is > 0 but becomes 0 s after the unit change
    text = "line,shot,receiver,time_ms,sigma_ms\nA,1,3,30,0.5\n" + row + "\n"
    with pytest.raises(InputFileError, match=match):
        readers.read_picks(write(tmp_path / "p.csv", text), 0.5)


# ----------------------------------------------------------------- boreholes


def test_read_boreholes(tmp_path):
    st = readers.read_stations(write(tmp_path / "s.csv", STATIONS), 32633)
    text = "borehole,x,y,z,depth_m,sigma_m\nB1,500001,5500001,300.2,12.5,\nB2,500003,5499999,299.8,13,0.3\n"
    with warnings.catch_warnings():
        warnings.simplefilter("error", RockheadWarning)
        bh = readers.read_boreholes(write(tmp_path / "b.csv", text), 32633, 32633, 0.2, stations=st)
    np.testing.assert_allclose(bh.elevation_m, [300.2 - 12.5, 299.8 - 13.0])
    np.testing.assert_allclose(bh.sigma_m, [0.2, 0.3])
    assert list(bh.name) == ["B1", "B2"]


def test_far_borehole_warns_with_distance(tmp_path):
    st = readers.read_stations(write(tmp_path / "s.csv", STATIONS), 32633)
    text = "borehole,x,y,z,depth_m\nB1,500001,5500001,300,12\nFAR,500000,5501000,300,12\n"
    with pytest.warns(RockheadWarning, match=r"line 3, field 'x': borehole 'FAR' is 995 m from the nearest"):
        readers.read_boreholes(write(tmp_path / "b.csv", text), 32633, 32633, stations=st)


# ----------------------------------------------------------------- settings


def _toml_value(v):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return f'"{v}"'
    return repr(v)


def test_every_settings_field_is_accepted_with_its_default():
    fields = [f for f in dataclasses.fields(Settings) if f.name not in ("dem", "work_crs")]
    table = {f.name: f.default for f in fields if f.default is not None}
    assert config.read_settings(table) == Settings()
    assert set(config.toml_keys()["processing"]) == {f.name for f in fields}


def test_settings_from_toml(tmp_path):
    extra = "[processing]\ndefault_sigma_ms = 1\nmin_picks = 8\ncell_size_m = 2.5\ncalibrate_velocity = true\n"
    extra += 'surface_method = "spline"\n'
    s = config.load_survey(survey_dir(tmp_path, extra)).settings
    assert s.default_sigma_ms == 1.0 and isinstance(s.default_sigma_ms, float)  # int accepted for a float
    assert s.min_picks == 8 and s.cell_size_m == 2.5 and s.calibrate_velocity is True
    assert s.surface_method == "spline" and s.max_distance_m is None


@pytest.mark.parametrize(
    "key, value, match",
    [
        ("min_picks", "6.5", r"expected a whole number"),
        ("min_picks", "2", r"must be at least 3"),
        ("default_sigma_ms", "true", r"is true/false; expected a number"),
        ("default_sigma_ms", "0", r"must be at least 0\.001"),
        ("default_sigma_ms", "inf", r"not a finite number"),
        ("robust_loss", '"L1"', r"is not one of 'huber', 'soft_l1', 'cauchy', 'linear'"),
        ("variogram_model", '"spherica"', r"did you mean 'spherical'\?"),
        ("min_line_angle_deg", "95.0", r"must be in \(0, 90\]"),
        ("neighbours", '"32"', r"is text; expected a whole number"),
        ("work_crs", '"EPSG:32633"', r"'work_crs' belongs in \[survey\]"),
        ("cell_size", "2.0", r"did you mean 'cell_size_m'\?"),
        ("contour_interval_m", "[1, 2]", r"is list; expected a number"),
        ("max_sigma_m", "0.0", r"must be > 0"),
        ("max_sigma_m", '"2 m"', r"is text; expected a number \(leave the key out for the automatic choice\)"),
    ],
    ids=[
        "int_float",
        "int_small",
        "bool_for_float",
        "zero_sigma",
        "inf",
        "choice",
        "choice_typo",
        "angle_range",
        "text_for_int",
        "work_crs_misplaced",
        "typo_key",
        "list",
        "max_sigma_zero",
        "max_sigma_text",
    ],
)
def test_settings_errors(tmp_path, key, value, match):
    path = survey_dir(tmp_path, f"[processing]\n{key} = {value}\n")
    with pytest.raises(SurveyConfigError, match=rf"^survey\.toml, line 10, field 'processing\.{key}': .*{match}"):
        config.load_survey(path)


# ----------------------------------------------------------------- survey.toml


def test_load_survey_fields(tmp_path):
    bh = "borehole,x,y,z,depth_m\nB1,500001,5500001,300,12\n"
    path = survey_dir(tmp_path, boreholes=bh)
    sv = config.load_survey(path)
    assert sv.name == "T" and sv.path == path
    assert sv.input_crs.to_epsg() == 32633 and sv.crs.to_epsg() == 32633
    assert set(sv.files) == {"stations", "picks", "boreholes"}
    assert sv.files["picks"] == (tmp_path / "picks.csv").resolve()
    assert len(sv.stations) == 4 and len(sv.picks) == 3 and len(sv.boreholes) == 1


def test_load_survey_geographic_with_work_crs_and_dem(tmp_path):
    tr = pyproj.Transformer.from_crs(32633, 4326, always_xy=True)
    lines = ["line,station,x,y,z"]
    for row in STATIONS.splitlines()[2:]:
        if row:
            ln, st, x, y, z = row.split(",")
            lo, la = tr.transform(float(x), float(y))
            lines.append(f"{ln},{st},{lo:.9f},{la:.9f},{z}")
    write(tmp_path / "ground.tif", b"not read here")
    path = survey_dir(tmp_path, stations="\n".join(lines) + "\n", crs='"EPSG:4326"\nwork_crs = 3035')
    text = path.read_text().replace('picks = "picks.csv"', 'picks = "picks.csv"\ndem = "ground.tif"')
    write(path, text)
    sv = config.load_survey(path)
    assert sv.input_crs.is_geographic and sv.crs.to_epsg() == 3035
    assert sv.settings.work_crs == "EPSG:3035"
    assert sv.settings.dem == (tmp_path / "ground.tif").resolve()
    x, _ = pyproj.Transformer.from_crs(32633, 3035, always_xy=True).transform(500000.0, 5500000.0)
    assert abs(sv.stations.x_m[0] - x) < 1e-3  # 1e-9 deg of rounding is < 1e-4 m


def test_load_survey_default_name_and_bom_toml(tmp_path):
    path = survey_dir(tmp_path)
    text = path.read_text().replace('name = "T"\n', "")
    write(path, b"\xef\xbb\xbf" + text.replace("\n", "\r\n").encode())
    assert config.load_survey(path).name == tmp_path.name


@pytest.mark.parametrize(
    "text, line",
    [
        ('[survey]\nname = "a"\ncrs = \n', 3),
        ('[survey]\nname = "a"\n[survey]\ncrs = "EPSG:32633"\n', 3),
        ('[survey]\nname = "a\n', 2),
        ('\n\n\n[files\nstations = "s.csv"\n', 4),
        ("[survey]\nname 'a'\n", 2),
    ],
    ids=["missing_value", "duplicate_table", "open_string", "open_header", "no_equals"],
)
def test_toml_syntax_error_line(tmp_path, text, line):
    path = write(tmp_path / "survey.toml", text)
    with pytest.raises(SurveyConfigError, match=rf"^survey\.toml, line {line}: not valid TOML: "):
        config.load_survey(path)


def test_windows_paths_in_toml(tmp_path):
    path = survey_dir(tmp_path)
    text = path.read_text()
    write(path, text.replace('picks = "picks.csv"', 'picks = "C:\\data\\picks.csv"'))
    with pytest.raises(SurveyConfigError, match=r"^survey\.toml, line 7: not valid TOML: .*forward slashes"):
        config.load_survey(path)
    write(path, text.replace('picks = "picks.csv"', 'picks = "C:\\new.csv"'))  # \n is a valid escape
    with pytest.raises(SurveyConfigError, match=r"line 7, field 'files\.picks': .*control character"):
        config.load_survey(path)
    # single quotes (literal strings) keep backslashes; the file then simply does not exist here
    write(path, text.replace('picks = "picks.csv"', "picks = 'C:\\data\\picks.csv'"))
    with pytest.raises(SurveyConfigError, match=r"line 7, field 'files\.picks': file not found"):
        config.load_survey(path)


def test_missing_toml_and_not_utf8(tmp_path):
    with pytest.raises(SurveyConfigError, match=r"survey file not found"):
        config.load_survey(tmp_path / "nope.toml")
    with pytest.raises(SurveyConfigError, match=r"^[^:]+: '[^']+' is a folder: give the survey\.toml file$"):
        config.load_survey(tmp_path)
    with pytest.raises(InputFileError, match=r"^[^:]+: '[^']+' is a folder, not the stations file$"):
        readers.read_stations(tmp_path, 32633)
    with pytest.raises(InputFileError, match=r"^nope\.csv: picks file not found"):
        readers.read_picks(tmp_path / "nope.csv", 0.5)
    path = write(tmp_path / "survey.toml", '[survey]\nname = "caf\xe9"\n', encoding="latin-1")
    with pytest.raises(SurveyConfigError, match=r"^survey\.toml, line 2: not UTF-8"):
        config.load_survey(path)


def test_inputs_are_never_modified(tmp_path):
    path = survey_dir(tmp_path, boreholes="borehole,x,y,z,depth_m\nB1,500001,5500001,300,12\n")
    before = {p.name: (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns) for p in tmp_path.iterdir()}
    config.load_survey(path)
    after = {p.name: (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns) for p in tmp_path.iterdir()}
    assert before == after  # same files, same bytes, untouched


def test_unicode_labels(tmp_path):
    text = STATIONS.replace("L1", "Linie Ä").replace("L2", "线2")
    picks = PICKS.replace("L1", "Linie Ä").replace("L2", "线2")
    sv = config.load_survey(survey_dir(tmp_path, stations=text, picks=picks))
    assert set(sv.picks.line) == {"Linie Ä", "线2"}


def test_station_rows_then_working_crs_equal_read_stations(tmp_path):
    # the two-step path that load_survey takes (rows, checked lon/lat, working CRS) gives the same
    # stations as read_stations in one call; the coordinates against pyproj directly
    path = write(tmp_path / "s.csv", STATIONS)
    rows = readers.parse_stations(path)
    crs_in = parse_crs(32633)
    lon, lat = readers.locate_lonlat(rows.table, rows.x, rows.y, crs_in)
    to_ll = pyproj.Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)
    # pyproj's own transform, same pipeline: equal to rounding (1e-12 degrees is 0.1 micrometre)
    expected = np.column_stack(to_ll.transform(rows.x, rows.y))
    np.testing.assert_allclose(np.column_stack([lon, lat]), expected, atol=1e-12)
    two_step = rows.stations(*readers.to_working_crs(rows.table, rows.x, rows.y, crs_in, parse_crs("EPSG:3035")))
    one_call = readers.read_stations(path, 32633, crs_work="EPSG:3035")
    for name in ("line", "station", "x_m", "y_m", "z_m", "file_line"):
        np.testing.assert_array_equal(getattr(two_step, name), getattr(one_call, name))


def test_csv_lines_and_fields_are_located(tmp_path):
    # line numbers count LF, CRLF and lone CR alike (common practice of spreadsheet exports)
    assert csvfile.split_lines("a\r\nb\rc\nd") == ["a", "b", "c", "d"]
    table = csvfile.read_csv_table(
        write(tmp_path / "t.csv", "# note\r\nline,station\r\n\r\nL1, 12 \r\n"), ("line", "station"), role="stations"
    )
    assert table.lines == [4] and table.rows == [["L1", "12"]]
    with pytest.raises(InputFileError, match=r"t.csv, line 4, field 'station': value '12,5' uses a decimal comma"):
        table.number(0, "station", "12,5")
    with pytest.raises(InputFileError, match=r"line 4, field 'line': empty label"):
        table.label(0, "line", "")


def test_area_and_alignment_csv_read_without_a_reader_argument(tmp_path):
    # the vertex files go through the project's own CSV reader by default (no bare ValueError);
    # a 40 m x 25 m rectangle in the working CRS itself has area 1000 m^2 exactly (shapely)
    from rockhead.core.survey import handoff

    utm = parse_crs("EPSG:32633")
    area = write(tmp_path / "area.csv", "x,y\n500000,5500000\n500040,5500000\n500040,5500025\n500000,5500025\n")
    assert handoff.read_area(area, utm, utm).area == pytest.approx(1000.0, abs=1e-6)
    line = handoff.read_alignment_csv(write(tmp_path / "axis.csv", "x,y\n500000,5500000\n500030,5500040\n"), utm, utm)
    assert line.name == "axis" and np.hypot(np.diff(line.x_m), np.diff(line.y_m))[0] == pytest.approx(50.0)
    with pytest.raises(InputFileError, match=r"area.csv, line 2, field 'y': value '5500,5' uses a decimal comma"):
        handoff.read_area(write(tmp_path / "area.csv", 'x,y\n500000,"5500,5"\n1,2\n3,4\n'), utm, utm)


def test_retime_made_in_memory_without_a_time_is_a_project_error(tmp_path):
    # an edit built in code (e.g. by the QC panel) is checked like one read from a file
    from rockhead.core.survey import edits

    picks = readers.read_picks(write(tmp_path / "p.csv", PICKS), 0.5)
    bad = edits.PickEdits((edits.PickEdit("L1", "1", "2", "1", "retime"),), tmp_path / "pick_edits.csv")
    with pytest.raises(InputFileError, match=r"pick_edits.csv, field 'new_time_ms': a retime needs its new two-way"):
        edits.apply_pick_edits(picks, bad)
    good = edits.PickEdits((edits.PickEdit("L1", "1", "2", "1", "retime", new_time_ms=30.0),))
    assert edits.apply_pick_edits(picks, good).picks.time_s[0] == pytest.approx(0.030)  # ms to s


@pytest.mark.parametrize(
    "text",
    ["a,b,c", " a , b ,c ", "a,,c,", "\ufeffline,shot", "1.5,-2,3e4", "a;b;c", "a\tb", ",,,", 'a,"b, c",d', '"x""y",z'],
)
def test_rows_split_as_the_csv_module_splits_them(text):
    """Rows without quotes take a shortcut; every row gives the fields Python's csv module gives."""
    import csv
    from pathlib import Path

    from rockhead.core.survey.csvfile import _split_row

    reference = next(csv.reader([text], strict=True, skipinitialspace=True))
    assert _split_row(Path("picks.csv"), 1, text) == [f.strip().strip("\ufeff").strip() for f in reference]
