"""Fuzz every reader with hypothesis: only the project's own errors may escape.

Random bytes, CSV-like text, numeric edge values and TOML-like text go into
read_stations, read_picks, read_boreholes and load_survey. Whatever the input,
the call either returns a sane result or raises a RockheadError subclass
(never KeyError, IndexError, UnicodeDecodeError, csv.Error, ...), and the
message stays on one line. About 4600 cases in total.
"""

import math
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from rockhead.core.errors import InputFileError, RockheadError
from rockhead.core.survey import config, readers

pytestmark = pytest.mark.slow  # slow tier: fuzzing: thousands of generated inputs per run

# Together with the inversion's property test these generate over 10,000 cases per run
# (6 reader tests x 1500 + the survey test x 800 + the fit's 600), in well under a minute.
FUZZ = settings(
    max_examples=1500,
    deadline=None,
    database=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)

# load_survey runs the whole reader chain (pyproj included): fewer examples keep it near 20 s
FUZZ_SURVEY = settings(FUZZ, max_examples=800)

STATIONS_OK = "line,station,x,y,z\nA,1,500000,5500000,300\nA,2,500005,5500000,300\nB,1,500002,5499998,300\n"
PICKS_OK = "line,shot,receiver,time_ms\nA,1,2,30\nA,2,1,30.5\nB,1,1,28\n"


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzz")


def _call(fn, *args, **kwargs):
    """Run a reader; return its result or None when it raised a project error (checked)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return fn(*args, **kwargs)
        except RockheadError as err:
            msg = str(err)
            assert msg and "\n" not in msg, repr(msg)
            if isinstance(err, InputFileError) and err.line is not None:
                assert isinstance(err.line, int) and err.line >= 1
            return None


def _check_stations(s):
    if s is None:
        return
    n = len(s)
    assert n >= 1
    for a in (s.x_m, s.y_m, s.z_m):
        assert a.shape == (n,) and np.all(np.isfinite(a))
    assert len(set(zip(s.line, s.station))) == n  # no duplicate stations got through


def _check_picks(p):
    if p is None:
        return
    assert len(p) >= 1
    assert np.all(p.time_s > 0) and np.all(np.isfinite(p.time_s))
    assert np.all(p.sigma_s > 0) and np.all(np.isfinite(p.sigma_s))
    assert len(set(zip(p.line, p.shot, p.receiver, p.reflector))) == len(p)


def _check_boreholes(b):
    if b is None:
        return
    assert np.all(b.depth_m > 0) and np.all(b.sigma_m > 0)
    assert np.all(np.isfinite(b.x_m)) and np.all(np.isfinite(b.elevation_m))


def _write(workdir, name, data):
    path = workdir / name
    path.write_bytes(data if isinstance(data, bytes) else data.encode("utf-8", "surrogatepass"))
    return path


def _read_all(workdir, data):
    """Feed the same content to the three CSV readers."""
    path = _write(workdir, "f.csv", data)
    _check_stations(_call(readers.read_stations, path, "EPSG:32633"))
    _check_picks(_call(readers.read_picks, path, 0.5))
    _check_boreholes(_call(readers.read_boreholes, path, "EPSG:32633", "EPSG:32633"))


# ----------------------------------------------------------------- random bytes


@FUZZ
@given(data=st.binary(max_size=400))
def test_random_bytes(workdir, data):
    _read_all(workdir, data)


# ----------------------------------------------------------------- CSV-like text

TOKENS = st.sampled_from(
    [
        "",
        " ",
        "1",
        "0",
        "-1",
        "12.5",
        "12,5",
        "1e3",
        "1e400",
        "-0",
        ".5",
        "5.",
        "nan",
        "NaN",
        "inf",
        "-Infinity",
        "abc",
        "A",
        "B",
        "L1",
        '"',
        '""',
        '"A"',
        '"1,2"',
        "#",
        ";",
        "\t",
        "\ufeff",
        "\x00",
        "é",
        "\u2028",
        "\x85",
        "500000",
        "5500000",
        "300",
        "0.02",
        "2500",
        "1_000",
        "0x10",
        "١٢",
        "'",
        "\\",
    ]
)
HEADERS = st.sampled_from(
    [
        "line,station,x,y,z",
        "line,shot,receiver,time_ms",
        "line,shot,receiver,time_ms,sigma_ms,reflector",
        "borehole,x,y,z,depth_m,sigma_m",
        "LINE ; STATION ; X ; Y ; Z",
        "line,station,x,y",
        "line,line,x,y,z",
        ",,,",
        "",
        "# comment",
    ]
)
SEPS = st.sampled_from([",", ",", ",", ";", "\t", ", "])
NEWLINES = st.sampled_from(["\n", "\r\n", "\r", "\n\n"])


@st.composite
def csv_text(draw):
    header = draw(HEADERS)
    nl = draw(NEWLINES)
    rows = draw(st.lists(st.lists(TOKENS, min_size=0, max_size=8), max_size=8))
    sep = draw(SEPS)
    lines = [header] + [sep.join(r) for r in rows]
    if draw(st.booleans()):
        lines.insert(draw(st.integers(0, len(lines))), draw(st.sampled_from(["# c", "", "  ", "#,,"])))
    return nl.join(lines) + (nl if draw(st.booleans()) else "")


@FUZZ
@given(text=csv_text(), bom=st.booleans())
def test_random_csv_text(workdir, text, bom):
    data = text.encode("utf-8", "surrogatepass")
    _read_all(workdir, (b"\xef\xbb\xbf" if bom else b"") + data)


@FUZZ
@given(text=st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=300))
def test_random_unicode_text(workdir, text):
    _read_all(workdir, "line,station,x,y,z\n" + text)


# ----------------------------------------------------------------- numeric edge values


def _fmt(v):
    if isinstance(v, str):
        return v
    return repr(v) if isinstance(v, float) else str(v)


NUMBERS = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.floats(min_value=-1e7, max_value=1e7),
    st.integers(min_value=-(10**30), max_value=10**30),
    st.sampled_from(["1e308", "1e309", "-1e-320", "4.9e-324", "0.0", "-0.0", "+5", "1.", "0001", "1e", "e5"]),
)


def _mostly(realistic):
    """Three times in four a plausible value, else an edge value (keeps the readers' success paths busy)."""
    return st.one_of(realistic, realistic, realistic, NUMBERS)


@FUZZ
@given(data=st.data(), geographic=st.booleans(), n=st.integers(1, 6))
def test_numeric_edges_stations_boreholes(workdir, data, geographic, n):
    crs = "EPSG:4326" if geographic else "EPSG:32633"
    if geographic:
        xs, ys = st.floats(-180, 180), st.floats(-90, 90)
    else:
        xs, ys = st.floats(499000, 501000), st.floats(5.49e6, 5.51e6)
    zs, ds = st.floats(-100, 3000), st.floats(0.5, 80)
    col = {
        name: data.draw(st.lists(_mostly(s), min_size=n, max_size=n))
        for name, s in (("x", xs), ("y", ys), ("z", zs), ("d", ds))
    }
    rows = "".join(f"A,{k},{_fmt(col['x'][k])},{_fmt(col['y'][k])},{_fmt(col['z'][k])}\n" for k in range(n))
    path = _write(workdir, "s.csv", "line,station,x,y,z\n" + rows)
    stations = _call(readers.read_stations, path, crs, "EPSG:32633")
    _check_stations(stations)
    rows = "".join(
        f"B{k},{_fmt(col['x'][k])},{_fmt(col['y'][k])},{_fmt(col['z'][k])},{_fmt(col['d'][k])}\n" for k in range(n)
    )
    path = _write(workdir, "b.csv", "borehole,x,y,z,depth_m\n" + rows)
    _check_boreholes(_call(readers.read_boreholes, path, crs, "EPSG:32633", stations=stations))


@FUZZ
@given(
    values=st.lists(st.tuples(_mostly(st.floats(0.1, 1999)), _mostly(st.floats(0.001, 20))), min_size=1, max_size=6),
    sigma=_mostly(st.floats(0.001, 5)),
)
def test_numeric_edges_picks(workdir, values, sigma):
    rows = "".join(f"A,1,{k},{_fmt(t)},{_fmt(s)}\n" for k, (t, s) in enumerate(values))
    path = _write(workdir, "p.csv", "line,shot,receiver,time_ms,sigma_ms\n" + rows)
    default = sigma if isinstance(sigma, (int, float)) else 0.5
    _check_picks(_call(readers.read_picks, path, default))


# ----------------------------------------------------------------- TOML


def _survey_files(workdir):
    _write(workdir, "stations.csv", STATIONS_OK)
    _write(workdir, "picks.csv", PICKS_OK)


TOML_TOKENS = st.sampled_from(
    [
        "[survey]",
        "[files]",
        "[processing]",
        "[[survey]]",
        "[output]",
        "name",
        "crs",
        "work_crs",
        "stations",
        "picks",
        "boreholes",
        "dem",
        "min_picks",
        "cell_size_m",
        "gather",
        "=",
        " = ",
        '"EPSG:32633"',
        "32633",
        '"stations.csv"',
        '"picks.csv"',
        '"nope.csv"',
        '"."',
        '""',
        "true",
        "1.5",
        "-3",
        "nan",
        "inf",
        "[1, 2]",
        "{a = 1}",
        "1979-05-27",
        "'x'",
        '"""',
        "#",
        "\n",
        "\n",
        "\n",
        " ",
        "\\",
        '"\\u0000"',
        "é",
    ]
)


@FUZZ
@given(tokens=st.lists(TOML_TOKENS, max_size=40))
def test_random_toml_text(workdir, tokens):
    _survey_files(workdir)
    path = _write(workdir, "survey.toml", "".join(tokens))
    _call(config.load_survey, path)


def _toml_scalar():
    return st.one_of(
        st.booleans(),
        st.integers(-(10**6), 10**6),
        st.integers(),  # unbounded: Python's TOML parser accepts more than 64 bits
        st.floats(allow_nan=True, allow_infinity=True),
        st.text(max_size=12),
        st.sampled_from(["EPSG:32633", "EPSG:4326", "stations.csv", "picks.csv", "shot", "huber", "EPSG:2263"]),
    )


def _toml_literal(v):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return "nan" if math.isnan(v) else ("inf" if v == math.inf else "-inf" if v == -math.inf else repr(v))
    return '"' + "".join(c if c.isalnum() or c in " .:_-" else f"\\u{ord(c):04x}" for c in v if ord(c) < 0x10000) + '"'


SURVEY_KEYS = st.sampled_from(["name", "name", "crs", "crs", "work_crs", "work_crs", "epsg"])  # weights
FILE_KEYS = st.sampled_from(["stations", "picks", "boreholes", "boreholes", "dem", "dem", "output"])
PROC_KEYS = st.sampled_from([*config.toml_keys()["processing"], "dem", "min_pick"])


@FUZZ_SURVEY
@given(
    survey=st.dictionaries(SURVEY_KEYS, _toml_scalar(), max_size=4),
    files=st.dictionaries(FILE_KEYS, _toml_scalar(), max_size=4),
    processing=st.dictionaries(PROC_KEYS, _toml_scalar(), max_size=5),
)
def test_structured_toml(workdir, survey, files, processing):
    _survey_files(workdir)
    survey.setdefault("crs", "EPSG:32633")
    files.setdefault("stations", "stations.csv")
    files.setdefault("picks", "picks.csv")
    text = ""
    for name, table in (("survey", survey), ("files", files), ("processing", processing)):
        text += f"[{name}]\n" + "".join(f"{k} = {_toml_literal(v)}\n" for k, v in table.items())
    path = _write(workdir, "survey.toml", text)
    result = _call(config.load_survey, path)
    if result is not None:
        _check_stations(result.stations)
        _check_picks(result.picks)
        assert result.crs.is_projected
