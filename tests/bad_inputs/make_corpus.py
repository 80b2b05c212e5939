# ruff: noqa: E501  (expected messages are long regular expressions)
"""Generate the bad-input corpus: one small survey per folder, each with ONE fault.

Run from anywhere::

    python tests/bad_inputs/make_corpus.py

Every case starts from the same good base survey (an invented site: two
crossing lines of 12 stations, 5 m apart, three shots each, over a flat
reflector 20 m deep: the smallest survey a run maps by kriging) and changes
one thing. Folders named ``good_*`` must load without error or warning,
``warn_*`` must load with a RockheadWarning matching ``expected.txt``,
all others must raise an error whose one-line message matches the regular
expression in ``expected.txt`` (anchored at the start, so it pins the file,
line and field). To add a case, write a function below and list it in CASES.
"""

from __future__ import annotations

import copy
import math
import re
import shutil
from pathlib import Path

from pyproj import Transformer

HERE = Path(__file__).resolve().parent

STATION_HEADER = ["line", "station", "x", "y", "z"]
PICK_HEADER = ["line", "shot", "receiver", "time_ms"]
BOREHOLE_HEADER = ["borehole", "x", "y", "z", "depth_m"]
STATION_COMMENT = "# stations of the invented corpus site, x/y in the survey CRS"
VELOCITY_M_S = 1800.0
DEPTH_M = 20.0


def base():
    """The good base survey as editable structures (local east/north offsets in metres)."""
    stations = []
    for k in range(12):
        stations.append(["L1", str(101 + k), 5.0 * k - 27.5, 0.0, 310.0 + 0.1 * k])
    for k in range(12):
        stations.append(["L2", str(201 + k), 0.0, 5.0 * k - 27.5, 310.0 - 0.05 * k])
    picks = []
    for line, first in (("L1", 101), ("L2", 201)):
        for shot in (first, first + 5, first + 11):  # end-on at both ends and split in the middle
            for rec in range(first, first + 12):
                if rec == shot:
                    continue
                offset = 5.0 * abs(rec - shot)
                # horizontal reflector: t = sqrt(x^2 + 4 h^2) / V (Green 1938)
                t_ms = 1000.0 * math.sqrt(offset**2 + 4 * DEPTH_M**2) / VELOCITY_M_S
                picks.append([line, str(shot), str(rec), f"{t_ms:.3f}"])
    boreholes = [["BH1", 3.0, 4.0, 310.2, 20.1], ["BH2", -20.0, 12.0, 309.9, 19.8]]
    return {
        "toml": {
            "survey": [("name", '"Invented corpus site"'), ("crs", '"EPSG:32633"')],
            "files": [
                ("stations", '"stations.csv"'),
                ("picks", '"picks.csv"'),
                ("boreholes", '"boreholes.csv"'),
            ],
            "processing": [("min_picks", "6")],
        },
        "origin": ("EPSG:32633", 500000.0, 5500000.0),  # CRS written to the CSV and local origin
        "stations": {"header": list(STATION_HEADER), "rows": stations, "comment": STATION_COMMENT},
        "picks": {"header": list(PICK_HEADER), "rows": picks, "comment": None},
        "boreholes": {"header": list(BOREHOLE_HEADER), "rows": boreholes, "comment": None},
        "extra_files": {},
        "extra_dirs": [],
        "raw": {},  # file name -> exact bytes overriding the rendered file
    }


def _fmt(v):
    return f"{v:.3f}" if isinstance(v, float) else str(v)


def render_toml(t):
    out = []
    for table, items in t.items():
        if items is None:
            continue
        out.append(f"[{table}]")
        out.extend(f"{k} = {v}" for k, v in items)
        out.append("")
    return "\n".join(out)


def _xy(s, x_local, y_local):
    crs, x0, y0 = s["origin"]
    if crs == "EPSG:32633":
        return x0 + x_local, y0 + y_local
    # geographic variants: place the site in a UTM zone, then take lon/lat
    utm, lon_first = crs
    tr = Transformer.from_crs(utm, "EPSG:4326", always_xy=True)
    lon, lat = tr.transform(x0 + x_local, y0 + y_local)
    return (lon, lat) if lon_first else (lat, lon)


def render_csv(s, name):
    part = s[name]
    lines = []
    if part["comment"]:
        lines.append(part["comment"])
    lines.append(",".join(part["header"]))
    for row in part["rows"]:
        row = list(row)
        if name in ("stations", "boreholes"):
            jx = 2 if name == "stations" else 1
            if isinstance(row[jx], float) and isinstance(row[jx + 1], float):
                x, y = _xy(s, row[jx], row[jx + 1])
                row[jx], row[jx + 1] = (
                    (f"{x:.8f}", f"{y:.8f}") if s["origin"][0] != "EPSG:32633" else (f"{x:.3f}", f"{y:.3f}")
                )
        lines.append(",".join(_fmt(v) for v in row))
    return "\n".join(lines) + "\n"


def write_case(name, s, expected, out=HERE):
    folder = Path(out) / name
    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir()
    (folder / "survey.toml").write_bytes(render_toml(s["toml"]).encode("utf-8"))
    for part in ("stations", "picks", "boreholes"):
        if s[part] is not None:
            (folder / f"{part}.csv").write_bytes(render_csv(s, part).encode("utf-8"))
    for fname, data in s["raw"].items():
        (folder / fname).write_bytes(data)
    for d in s["extra_dirs"]:
        (folder / d).mkdir()
        (folder / d / "README.txt").write_text("A folder, not a CSV file.\n")
    if expected is not None:
        (folder / "expected.txt").write_text(expected + "\n", encoding="utf-8")


# Physical line numbers in the rendered files: stations.csv has a comment line and the header,
# so data row k (0-based) is on line k + 3; picks.csv and boreholes.csv: line k + 2.
def sline(k):
    return k + 3


def pline(k):
    return k + 2


def set_toml(s, table, key, value):
    items = s["toml"].setdefault(table, [])
    for i, (k, _) in enumerate(items):
        if k == key:
            if value is None:
                del items[i]
            else:
                items[i] = (key, value)
            return
    if value is not None:
        items.append((key, value))


def esc(text):
    return re.escape(text)


CASES = {}


def case(fn):
    CASES[fn.__name__] = fn
    return fn


# ----------------------------------------------------------------- good cases (must load)


@case
def good_base(s):
    return None


@case
def good_bom_crlf(s):
    for part in ("stations", "picks", "boreholes"):
        s["raw"][f"{part}.csv"] = b"\xef\xbb\xbf" + render_csv(s, part).replace("\n", "\r\n").encode()
    return None


@case
def good_quoted_fields(s):
    for part in ("stations", "picks", "boreholes"):
        text = render_csv(s, part)
        out = []
        for ln in text.splitlines():
            out.append(ln if ln.startswith("#") else ",".join(f'"{v}"' for v in ln.split(",")))
        s["raw"][f"{part}.csv"] = ("\n".join(out) + "\n").encode()
    return None


@case
def good_comments_blank_lines(s):
    text = render_csv(s, "picks").splitlines()
    text.insert(1, "")
    text.insert(5, "# shot 101 picked twice by hand, second pass kept")
    text.insert(9, "   ")
    s["raw"]["picks.csv"] = ("# picks\n\n" + "\n".join(text) + "\n\n# end\n").encode()
    return None


@case
def good_crs_integer(s):
    set_toml(s, "survey", "crs", "32633")
    return None


@case
def good_geographic(s):
    s["origin"] = (("EPSG:32651", True), 400000.0, 3400000.0)  # lon about 122 E, lat about 30.7 N
    set_toml(s, "survey", "crs", '"EPSG:4326"')
    return None


@case
def good_numeric_line_labels(s):
    for row in s["stations"]["rows"]:
        row[0] = row[0][1:]
    for row in s["picks"]["rows"]:
        row[0] = row[0][1:]
    return None


@case
def good_multi_reflector_sigma(s):
    s["picks"]["header"] += ["sigma_ms", "reflector"]
    deeper = []
    for row in s["picks"]["rows"]:
        deeper.append([*row[:3], f"{float(row[3]) * 1.8:.3f}", "0.8", "2"])
        row += ["", "1"]  # empty sigma takes the default
    s["picks"]["rows"] += deeper
    return None


@case
def good_header_case_spaces(s):
    s["stations"]["header"] = [" Line", "STATION ", " X ", "y", "Z"]
    return None


@case
def good_trailing_commas(s):
    text = render_csv(s, "stations").splitlines()
    s["raw"]["stations.csv"] = ("\n".join(ln if ln.startswith("#") else ln + "," for ln in text) + "\n").encode()
    return None


@case
def good_no_boreholes(s):
    s["boreholes"] = None
    set_toml(s, "files", "boreholes", None)
    return None


# ----------------------------------------------------------------- warnings (must load and warn)


@case
def warn_extra_column(s):
    s["picks"]["header"].append("quality")
    for row in s["picks"]["rows"]:
        row.append("good")
    return r"^picks\.csv, line 1: column 'quality' not used by Rockhead and ignored"


@case
def warn_borehole_far(s):
    s["boreholes"]["rows"][1][1] = 500.0
    return (
        r"^boreholes\.csv, line 3, field 'x': borehole 'BH2' is 4\d\d m from the nearest station, "
        r"farther than the survey's extent"
    )


@case
def warn_projected_slightly_outside(s):
    # the whole site at longitude 11.5 E, half a degree west of UTM zone 33's strip (12..18 E)
    s["origin"] = ("EPSG:32633", 247115.0, 5500044.0)
    return r"^stations\.csv, line \d+: 24 point\(s\) lie outside the area of use of EPSG:32633"


# ----------------------------------------------------------------- survey.toml faults


@case
def toml_syntax_error(s):
    set_toml(s, "survey", "name", '"Invented corpus site')
    return r"^survey\.toml, line 2: not valid TOML: .*a quoted text is not closed on this line"


@case
def toml_windows_backslash_path(s):
    set_toml(s, "files", "picks", '"C:\\survey\\picks.csv"')
    return r"^survey\.toml, line 7: not valid TOML: .*write Windows paths with forward slashes"


@case
def crs_unknown_code(s):
    set_toml(s, "survey", "crs", '"EPSG:999999"')
    return r"^survey\.toml, line 3, field 'survey\.crs': unknown CRS 'EPSG:999999' \(crs not found"


@case
def crs_missing(s):
    set_toml(s, "survey", "crs", None)
    return r"^survey\.toml, line 1, field 'survey\.crs': \[survey\] has no 'crs'"


@case
def crs_wrong_type(s):
    set_toml(s, "survey", "crs", "32633.5")
    return r"^survey\.toml, line 3, field 'survey\.crs': value 32633\.5 is number; expected text"


@case
def survey_name_wrong_type(s):
    set_toml(s, "survey", "name", "5")
    return r"^survey\.toml, line 2, field 'survey\.name': value 5 is integer; expected text"


@case
def survey_unknown_key(s):
    set_toml(s, "survey", "epsg", '"EPSG:32633"')
    return r"^survey\.toml, line 4, field 'survey\.epsg': unknown key 'epsg' in \[survey\]: did you mean 'crs'\?"


@case
def survey_table_missing(s):
    s["toml"]["survey"] = None
    return r"^survey\.toml, field 'survey': the table \[survey\] is missing"


@case
def top_level_output_table(s):
    s["toml"]["output"] = [("folder", '"out"')]
    return (
        r"^survey\.toml, line 13, field 'output': unknown key 'output' at the top level: outputs are not set in "
        r"survey\.toml.*--out DIR"
    )


@case
def files_output_key(s):
    set_toml(s, "files", "output", '"result.gpkg"')
    return r"^survey\.toml, line 9, field 'files\.output': unknown key 'output' in \[files\]: outputs are not set"


@case
def processing_unknown_key(s):
    set_toml(s, "processing", "min_pick", "6")
    return (
        r"^survey\.toml, line 12, field 'processing\.min_pick': unknown key 'min_pick' in \[processing\]: "
        r"did you mean 'min_picks'\?"
    )


@case
def processing_wrong_type(s):
    set_toml(s, "processing", "min_picks", '"six"')
    return r"^survey\.toml, line 11, field 'processing\.min_picks': value 'six' is text; expected a whole number"


@case
def processing_float_for_int(s):
    set_toml(s, "processing", "neighbours", "32.0")
    return r"^survey\.toml, line 12, field 'processing\.neighbours': .*expected a whole number without decimals"


@case
def processing_negative_cell_size(s):
    set_toml(s, "processing", "cell_size_m", "-5.0")
    return r"^survey\.toml, line 12, field 'processing\.cell_size_m': value -5\.0 must be > 0"


@case
def processing_max_sigma_negative(s):
    set_toml(s, "processing", "max_sigma_m", "-0.5")
    return r"^survey\.toml, line 12, field 'processing\.max_sigma_m': value -0\.5 must be > 0"


@case
def processing_bad_choice(s):
    set_toml(s, "processing", "gather", '"shots"')
    return r"^survey\.toml, line 12, field 'processing\.gather': value 'shots' is not one of .*did you mean 'shot'\?"


@case
def processing_bool_as_text(s):
    set_toml(s, "processing", "calibrate_velocity", '"yes"')
    return (
        r"^survey\.toml, line 12, field 'processing\.calibrate_velocity': value 'yes' is text; expected true or false"
    )


@case
def processing_velocity_range(s):
    set_toml(s, "processing", "velocity_max_m_s", "100.0")
    return r"^survey\.toml, line 12, field 'processing\.velocity_max_m_s': velocity_max_m_s \(100\) must be greater"


@case
def processing_dem_misplaced(s):
    set_toml(s, "processing", "dem", '"ground.tif"')
    return r"^survey\.toml, line 12, field 'processing\.dem': unknown key 'dem' in \[processing\]: 'dem' belongs in \[files\]"


@case
def processing_nan(s):
    set_toml(s, "processing", "default_sigma_ms", "nan")
    return r"^survey\.toml, line 12, field 'processing\.default_sigma_ms': value nan is not a finite number"


@case
def picks_key_missing(s):
    set_toml(s, "files", "picks", None)
    return r"^survey\.toml, line 5, field 'files\.picks': \[files\] has no 'picks'"


@case
def missing_picks_file(s):
    set_toml(s, "files", "picks", '"picks_final.csv"')
    return (
        r"^survey\.toml, line 7, field 'files\.picks': file not found: 'picks_final\.csv' "
        r"\(resolved to .*picks_final\.csv; paths are relative to survey\.toml\)"
    )


@case
def stations_path_is_directory(s):
    s["extra_dirs"].append("survey_points")
    set_toml(s, "files", "stations", '"survey_points"')
    return r"^survey\.toml, line 6, field 'files\.stations': 'survey_points' is a folder"


@case
def missing_boreholes_file(s):
    set_toml(s, "files", "boreholes", '"bores.csv"')
    return r"^survey\.toml, line 8, field 'files\.boreholes': file not found: 'bores\.csv'"


@case
def same_file_twice(s):
    set_toml(s, "files", "picks", '"stations.csv"')
    return r"^survey\.toml, line 7, field 'files\.picks': 'stations\.csv' is the same file as stations"


@case
def work_crs_geographic(s):
    s["origin"] = (("EPSG:32651", True), 400000.0, 3400000.0)
    set_toml(s, "survey", "crs", '"EPSG:4326"')
    set_toml(s, "survey", "work_crs", '"EPSG:4258"')
    return r"^survey\.toml, line 4, field 'survey\.work_crs': the requested working CRS EPSG:4258 .*is not a projected"


@case
def crs_in_feet(s):
    set_toml(s, "survey", "crs", '"EPSG:2263"')  # NAD83 / New York Long Island (ftUS)
    return r"^survey\.toml, line 3, field 'survey\.crs': the survey CRS EPSG:2263 .*has axes in .*foot.*metres"


# ----------------------------------------------------------------- stations.csv faults


@case
def stations_semicolon(s):
    text = render_csv(s, "stations").replace(",", ";").replace(".", ",")
    s["raw"]["stations.csv"] = text.encode()
    return r"^stations\.csv, line 2: fields are separated by semicolons: use commas"


@case
def stations_tab_delimiter(s):
    s["raw"]["stations.csv"] = render_csv(s, "stations").replace(",", "\t").encode()
    return r"^stations\.csv, line 2: fields are separated by tabs: use commas"


@case
def stations_missing_z_column(s):
    s["stations"]["header"] = s["stations"]["header"][:4]
    for row in s["stations"]["rows"]:
        del row[4]
    return (
        r"^stations\.csv, line 2, field 'z': missing column 'z': the header has line, station, x, y; "
        r"required: line, station, x, y, z"
    )


@case
def stations_x_nan(s):
    s["stations"]["rows"][4][2] = "NaN"
    return rf"^stations\.csv, line {sline(4)}, field 'x': value 'NaN' is not a finite number"


@case
def stations_y_inf(s):
    s["stations"]["rows"][7][3] = "inf"
    return rf"^stations\.csv, line {sline(7)}, field 'y': value 'inf' is not a finite number"


@case
def stations_x_text(s):
    s["stations"]["rows"][2][2] = "500010.0m"
    return rf"^stations\.csv, line {sline(2)}, field 'x': value '500010\.0m' is not a number"


@case
def stations_decimal_comma_quoted(s):
    s["stations"]["rows"][3][4] = '"310,3"'
    return rf"^stations\.csv, line {sline(3)}, field 'z': value '310,3' uses a decimal comma: write 310\.3"


@case
def stations_decimal_comma_unquoted(s):
    s["stations"]["rows"][3][4] = "310,3"
    return rf"^stations\.csv, line {sline(3)}: the row has 6 fields but the header has 5 .*decimal point \(12\.5\)"


@case
def stations_duplicate_station(s):
    s["stations"]["rows"][6][1] = "105"
    return (
        rf"^stations\.csv, line {sline(6)}, field 'station': duplicate station '105' on line 'L1': "
        rf"also on line {sline(4)}"
    )


@case
def stations_short_row(s):
    del s["stations"]["rows"][9][4]
    return rf"^stations\.csv, line {sline(9)}, field 'z': the row has 4 fields but the header has 5"


@case
def stations_empty_file(s):
    s["raw"]["stations.csv"] = b""
    return r"^stations\.csv: the stations file is empty"


@case
def stations_header_only(s):
    s["stations"]["rows"] = []
    return r"^stations\.csv, line 2: the stations file has a header but no data rows"


@case
def stations_latin1(s):
    s["stations"]["rows"][5][1] = "106\u00e9"
    s["raw"]["stations.csv"] = render_csv(s, "stations").encode("latin-1")
    return rf"^stations\.csv, line {sline(5)}: byte 0xE9 is not UTF-8 text"


@case
def stations_empty_label(s):
    s["stations"]["rows"][12][0] = ""
    return rf"^stations\.csv, line {sline(12)}, field 'line': empty label"


@case
def stations_elevation_absurd(s):
    s["stations"]["rows"][1][4] = 310000.0
    return rf"^stations\.csv, line {sline(1)}, field 'z': elevation '310000\.000' m is outside"


@case
def stations_duplicate_header(s):
    s["stations"]["header"] = ["line", "station", "x", "y", "z", "x"]
    for row in s["stations"]["rows"]:
        row.append(row[2])
    return r"^stations\.csv, line 2, field 'x': column 'x' appears twice"


@case
def stations_no_header(s):
    s["stations"]["comment"] = None
    text = render_csv(s, "stations").splitlines()[1:]
    s["raw"]["stations.csv"] = ("\n".join(text) + "\n").encode()
    return r"^stations\.csv, line 1: the first row .* holds data, not column names"


@case
def geographic_projected_numbers(s):
    set_toml(s, "survey", "crs", '"EPSG:4326"')
    return (
        rf"^stations\.csv, line {sline(0)}, field 'x': x=499972\.5, y=5500000 look like projected coordinates "
        r"in metres, but the survey CRS EPSG:4326 .* is geographic"
    )


@case
def geographic_lat_lon_swapped(s):
    s["origin"] = (("EPSG:32651", False), 400000.0, 3400000.0)
    set_toml(s, "survey", "crs", '"EPSG:4326"')
    return rf"^stations\.csv, line {sline(0)}, field 'y': latitude y=12\d\.\d+ is out of \[-90, 90\].*look swapped"


@case
def geographic_lat_out_of_range(s):
    s["origin"] = (("EPSG:32651", True), 400000.0, 3400000.0)
    set_toml(s, "survey", "crs", '"EPSG:4326"')
    row = s["stations"]["rows"][8]
    row[2], row[3] = f"{_xy(s, row[2], row[3])[0]:.8f}", "95.0"
    return rf"^stations\.csv, line {sline(8)}, field 'y': latitude y=95 is out of \[-90, 90\]"


@case
def geographic_lon_out_of_range(s):
    s["origin"] = (("EPSG:32651", True), 400000.0, 3400000.0)
    set_toml(s, "survey", "crs", '"EPSG:4326"')
    row = s["stations"]["rows"][8]
    row[2], row[3] = "222.5", f"{_xy(s, row[2], row[3])[1]:.8f}"
    return rf"^stations\.csv, line {sline(8)}, field 'x': longitude x=222\.5 is out of \[-180, 180\]"


@case
def projected_xy_swapped(s):
    text = render_csv(s, "stations").splitlines()
    out = [text[0], text[1]]
    for ln in text[2:]:
        f = ln.split(",")
        f[2], f[3] = f[3], f[2]
        out.append(",".join(f))
    s["raw"]["stations.csv"] = ("\n".join(out) + "\n").encode()
    return (
        r"^stations\.csv, line 3, field 'x': x=5500000, y=499972\.5 fall outside the survey CRS EPSG:32633 .*"
        r"the columns look swapped"
    )


@case
def projected_far_outside_area(s):
    row = s["stations"]["rows"][10]
    row[2], row[3] = f"{_xy(s, row[2], row[3])[0]:.3f}", "-4500000.000"
    return (
        rf"^stations\.csv, line {sline(10)}, field 'x': x=500022\.5, y=-4500000 .* degrees outside the area of "
        r"use of EPSG:32633"
    )


# ----------------------------------------------------------------- picks.csv faults


@case
def picks_empty_file(s):
    s["raw"]["picks.csv"] = b"\n\n"
    return r"^picks\.csv: the picks file is empty"


@case
def picks_header_only(s):
    s["picks"]["rows"] = []
    return r"^picks\.csv, line 1: the picks file has a header but no data rows"


@case
def picks_time_text(s):
    s["picks"]["rows"][5][3] = "abc"
    return rf"^picks\.csv, line {pline(5)}, field 'time_ms': value 'abc' is not a number"


@case
def picks_time_decimal_comma(s):
    s["picks"]["rows"][5][3] = '"12,5"'
    return rf"^picks\.csv, line {pline(5)}, field 'time_ms': value '12,5' uses a decimal comma: write 12\.5"


@case
def picks_time_empty(s):
    s["picks"]["rows"][6][3] = ""
    return rf"^picks\.csv, line {pline(6)}, field 'time_ms': empty value"


@case
def picks_time_zero(s):
    s["picks"]["rows"][7][3] = "0"
    return rf"^picks\.csv, line {pline(7)}, field 'time_ms': time '0' ms must be > 0"


@case
def picks_time_negative(s):
    s["picks"]["rows"][7][3] = "-24.5"
    return rf"^picks\.csv, line {pline(7)}, field 'time_ms': time '-24\.5' ms must be > 0"


@case
def picks_time_absurd(s):
    s["picks"]["rows"][3][3] = "24500"
    return rf"^picks\.csv, line {pline(3)}, field 'time_ms': time '24500' ms is beyond 2000 ms"


@case
def picks_times_in_seconds(s):
    for row in s["picks"]["rows"]:
        row[3] = f"{float(row[3]) / 1000:.6f}"
    return r"^picks\.csv, line 2, field 'time_ms': times look like seconds .*time_ms must be milliseconds"


@case
def picks_negative_sigma(s):
    s["picks"]["header"].append("sigma_ms")
    for row in s["picks"]["rows"]:
        row.append("0.5")
    s["picks"]["rows"][9][4] = "-0.5"
    return rf"^picks\.csv, line {pline(9)}, field 'sigma_ms': sigma '-0\.5' ms must be > 0"


@case
def picks_unknown_line(s):
    s["picks"]["rows"][12][0] = "L9"
    return rf"^picks\.csv, line {pline(12)}, field 'line': line 'L9' is not in the stations file \(lines there: 'L1', 'L2'\)"


@case
def picks_shot_not_on_line(s):
    s["picks"]["rows"][40][1] = "105"  # a station of L1, used on line L2
    return rf"^picks\.csv, line {pline(40)}, field 'shot': shot '105' is not a station of line 'L2'"


@case
def picks_unknown_receiver(s):
    s["picks"]["rows"][2][2] = "1044"
    return rf"^picks\.csv, line {pline(2)}, field 'receiver': receiver '1044' is not a station of line 'L1'"


@case
def picks_duplicate(s):
    s["picks"]["rows"][4] = list(s["picks"]["rows"][3])
    return (
        rf"^picks\.csv, line {pline(4)}, field 'receiver': duplicate pick: line 'L1', shot '101', receiver '105', "
        rf"reflector '1' is on lines {pline(3)} and {pline(4)}"
    )


@case
def picks_time_column_renamed(s):
    s["picks"]["header"][3] = "time"
    return r"^picks\.csv, line 1, field 'time_ms': missing column 'time_ms'.*rename 'time' to 'time_ms'"


@case
def picks_file_holds_stations(s):
    s["raw"]["picks.csv"] = render_csv(s, "stations").encode()
    return r"^picks\.csv, line 2, field 'shot': missing columns 'shot', 'receiver', 'time_ms'.*a stations file"


@case
def picks_malformed_quote(s):
    s["picks"]["rows"][10][0] = '"L1'
    return (
        rf"^picks\.csv, line {pline(10)}, field 'line': a quote opened in field 1 \('line'\) is not closed on this "
        r"line"
    )


@case
def picks_nul_bytes(s):
    s["raw"]["picks.csv"] = render_csv(s, "picks").encode().replace(b"L2,201,202", b"L2,201\x00,202")
    row = next(i for i, r in enumerate(s["picks"]["rows"]) if r[:3] == ["L2", "201", "202"])
    return rf"^picks\.csv, line {pline(row)}: the file contains NUL bytes"


@case
def picks_utf16(s):
    s["raw"]["picks.csv"] = render_csv(s, "picks").encode("utf-16")
    return r"^picks\.csv, line 1: the file is UTF-16 text: save it as UTF-8"


@case
def picks_too_many_fields(s):
    s["picks"]["rows"][15].append("x")
    return rf"^picks\.csv, line {pline(15)}: the row has 5 fields but the header has 4"


# ----------------------------------------------------------------- boreholes.csv faults


@case
def boreholes_missing_depth_column(s):
    s["boreholes"]["header"][4] = "depth"
    return r"^boreholes\.csv, line 1, field 'depth_m': missing column 'depth_m'.*rename 'depth' to 'depth_m'"


@case
def boreholes_negative_depth(s):
    s["boreholes"]["rows"][1][4] = -19.8
    return r"^boreholes\.csv, line 3, field 'depth_m': depth '-19\.800' m must be > 0"


@case
def boreholes_duplicate(s):
    s["boreholes"]["rows"][1][0] = "BH1"
    return r"^boreholes\.csv, line 3, field 'borehole': duplicate borehole 'BH1': also on line 2"


@case
def boreholes_sigma_zero(s):
    s["boreholes"]["header"].append("sigma_m")
    s["boreholes"]["rows"][0].append("0")
    s["boreholes"]["rows"][1].append("0.2")
    return r"^boreholes\.csv, line 2, field 'sigma_m': sigma '0' m must be > 0"


# ----------------------------------------------------------------- hostile input (files and settings together)
# Each of these passed `check` and then failed `run` (or ran with a silent surprise) before the
# survey-wide checks (core/survey/checks.py); now `check` refuses them with the file, line and field.


@case
def stations_not_a_csv_file(s):
    # another text file named as the stations file: refused without quoting its content
    s["raw"]["accounts.txt"] = b"root:x:0:0:root:/root:/bin/bash\ndaemon:x:1:1:daemon:/usr/sbin:/usr/sbin/nologin\n"
    set_toml(s, "files", "stations", '"accounts.txt"')
    return (
        r"^accounts\.txt, line 1: line 1 is not the header of a stations file: none of its 1 field\(s\) is a column "
        r"Rockhead reads \(required: line, station, x, y, z\)"
    )


@case
def stations_device_file(s):
    set_toml(s, "files", "stations", '"/dev/null"')
    return (
        r"^survey\.toml, line 6, field 'files\.stations': '/dev/null' \(/dev/null\) is a character device, not a "
        r"regular file"
    )


@case
def toml_backslash_in_name(s):
    set_toml(s, "survey", "name", '"Site \\ north"')
    return (
        r"^survey\.toml, line 2: not valid TOML: .*; a backslash starts an escape in \"\.\.\.\": write \\\\ for a "
        r"backslash, or put the text in single quotes"
    )


@case
def boreholes_unmatched_quote(s):
    text = render_csv(s, "boreholes").replace("BH2,", '"BH2,')
    s["raw"]["boreholes.csv"] = text.encode()
    return (
        r"^boreholes\.csv, line 3, field 'borehole': a quote opened in field 1 \('borehole'\) is not closed on "
        r"this line"
    )


@case
def picks_reflector_empty_cells(s):
    s["picks"]["header"].append("reflector")
    for i, row in enumerate(s["picks"]["rows"]):
        row.append("" if i in (3, 7) else "rock")
    return (
        rf"^picks\.csv, line {pline(3)}, field 'reflector': empty reflector label while other picks name one "
        rf"\('rock' on line {pline(0)}\)"
    )


@case
def warn_reflector_case(s):
    s["picks"]["header"].append("reflector")
    for i, row in enumerate(s["picks"]["rows"]):
        row.append("Rock" if i % 3 == 0 else "rock")
    return (
        rf"^picks\.csv, line {pline(0)}, field 'reflector': reflector labels 'Rock' \(\d+ picks\) and 'rock' "
        r"\(\d+ picks, first on line \d+\) differ only in case: taken as one reflector 'rock'"
    )


@case
def picks_identical_times(s):
    for row in s["picks"]["rows"]:
        row[3] = "30.000"
    return (
        rf"^picks\.csv, line {pline(0)}, field 'time_ms': every gather of reflector '1' has one time at all its "
        r"offsets \(30 ms here\)"
    )


@case
def picks_too_few_gathers(s):
    s["picks"]["rows"] = [r for r in s["picks"]["rows"] if r[1] in ("101", "201")]
    return (
        r"^picks\.csv, line 2: only 2 gather\(s\) of reflector '1' have at least min_picks = 6 picks whose times "
        r"change with offset \(2 gathers in all\); a map needs at least 3"
    )


@case
def picks_too_clustered_for_kriging(s):
    s["picks"]["rows"] = [r for r in s["picks"]["rows"] if r[1] not in ("106", "206")]
    return (
        r"^picks\.csv: the 4 gathers of reflector '1' give reflector points too few or too clustered for a "
        r"variogram \(1 distance class\(es\) of point pairs, at least 3 needed for kriging\)"
    )


@case
def processing_reflector_unknown(s):
    set_toml(s, "processing", "reflector", '"granite"')
    return (
        r"^survey\.toml, line 12, field 'processing\.reflector': reflector = 'granite' is not a reflector of the "
        r"picks \(their reflector labels: '1'\)"
    )


@case
def boreholes_far_away(s):
    s["boreholes"]["rows"][1][1] = 100000.0
    return (
        r"^boreholes\.csv, line 3, field 'x': borehole 'BH2' is 99\d\d\d m from the nearest station, more than 10 "
        r"times the survey's extent"
    )


@case
def boreholes_depth_absurd(s):
    s["boreholes"]["rows"][1][4] = 1e6
    return (
        r"^boreholes\.csv, line 3, field 'depth_m': depth 1e\+06 m of borehole 'BH2' is deeper than any reflector "
        r"the picks can show"
    )


@case
def stations_all_one_point(s):
    for row in s["stations"]["rows"]:
        row[2], row[3] = 0.0, 0.0
    return rf"^stations\.csv, line {sline(0)}, field 'x': line 'L1' has 12 station\(s\) at a single position"


@case
def dem_not_a_raster(s):
    s["raw"]["dem.tif"] = b"not a raster, only text\n"
    set_toml(s, "files", "dem", '"dem.tif"')
    return r"^dem\.tif: GDAL cannot read the raster"


@case
def processing_contour_interval_tiny(s):
    set_toml(s, "processing", "contour_interval_m", "1e-6")
    return (
        r"^survey\.toml, line 12, field 'processing\.contour_interval_m': contour_interval_m = 1e-06 m is below "
        r"0\.1 m"
    )


@case
def processing_max_distance_tiny(s):
    set_toml(s, "processing", "max_distance_m", "1e-6")
    return (
        r"^survey\.toml, line 12, field 'processing\.max_distance_m': max_distance_m = 1e-06 m is below the station "
        r"spacing \(5 m\)"
    )


@case
def processing_cell_size_tiny(s):
    set_toml(s, "processing", "cell_size_m", "1e-6")
    return (
        r"^survey\.toml, line 12, field 'processing\.cell_size_m': cell_size_m = 1e-06 m is below a tenth of the "
        r"station spacing \(5 m\)"
    )


@case
def processing_cell_size_small(s):
    set_toml(s, "processing", "cell_size_m", "0.05")
    return (
        r"^survey\.toml, line 12, field 'processing\.cell_size_m': cell_size_m = 0\.05 m is below a tenth of the "
        r"station spacing"
    )


@case
def processing_cell_size_huge(s):
    set_toml(s, "processing", "cell_size_m", "1e6")
    return (
        r"^survey\.toml, line 12, field 'processing\.cell_size_m': cell_size_m = 1e\+06 m is larger than the "
        r"survey's extent \(55 m\)"
    )


@case
def processing_grid_too_many_cells(s):
    set_toml(s, "processing", "cell_size_m", "0.6")
    set_toml(s, "processing", "max_grid_cells", "2000")
    return (
        r"^survey\.toml, line 12, field 'processing\.cell_size_m': cell_size_m = 0\.6 m over the mapped area "
        r"\(\d+ m x \d+ m\) needs about [\d,]+ cells \(.* GiB for the grids\), more than max_grid_cells = 2,000"
    )


@case
def processing_too_many_picks(s):
    # refused before a pick is parsed: the rows are counted, not read
    set_toml(s, "processing", "max_picks", "50")
    return (
        r"^survey\.toml, line 12, field 'processing\.max_picks': picks\.csv has [\d,]+ picks, more than "
        r"max_picks = 50 \(a run takes less than a minute of processor time at that size; a million picks took "
        r"6\.5 GiB of memory\); split the survey, or raise \[processing\] max_picks"
    )


# ----------------------------------------------------------------- hand-off settings ([design], [sections])

AXIS_CSV = "x,y\n499970.000,5499990.000\n500030.000,5500010.000\n"
AREA_GEOJSON = (
    '{"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": "EPSG:32633"}}, '
    '"features": [{"type": "Feature", "properties": {}, "geometry": {"type": "Polygon", "coordinates": '
    "[[[499980, 5499980], [500020, 5499980], [500020, 5500020], [499980, 5500020], [499980, 5499980]]]}}]}\n"
)


@case
def good_handoff(s):
    s["raw"]["axis.csv"] = AXIS_CSV.encode()
    s["raw"]["area.geojson"] = AREA_GEOJSON.encode()
    set_toml(s, "survey", "date", "2025-06-14")
    set_toml(s, "design", "elevation_m", "292.5")
    set_toml(s, "design", "area", '"area.geojson"')
    set_toml(s, "sections", "alignment", '"axis.csv"')
    set_toml(s, "sections", "corridor_m", "30")
    return None


@case
def design_elevation_text(s):
    set_toml(s, "design", "elevation_m", '"292.5 m"')
    return r"^survey\.toml, line 14, field 'design\.elevation_m': value '292\.5 m' is text; expected a number"


@case
def design_area_without_elevation(s):
    s["raw"]["area.geojson"] = AREA_GEOJSON.encode()
    set_toml(s, "design", "area", '"area.geojson"')
    return r"^survey\.toml, line 14, field 'design\.area': \[design\] has no elevation_m"


@case
def design_simulations_too_few(s):
    set_toml(s, "design", "elevation_m", "292.5")
    set_toml(s, "design", "simulations", "50")
    return r"^survey\.toml, line 15, field 'design\.simulations': value 50 must be at least 200"


@case
def design_area_self_crossing(s):
    s["raw"]["area.csv"] = b"x,y\n499980,5499980\n500020,5500020\n500020,5499980\n499980,5500020\n"
    set_toml(s, "design", "elevation_m", "292.5")
    set_toml(s, "design", "area", '"area.csv"')
    return r"^area\.csv, line 2: the polygon is not valid \(its edges cross themselves\)"


@case
def sections_alignment_decimal_comma(s):
    s["raw"]["axis.csv"] = b'x,y\n499970.0,5499990.0\n"500030,5",5500010.0\n'
    set_toml(s, "sections", "alignment", '"axis.csv"')
    return r"^axis\.csv, line 3, field 'x': value '500030,5' uses a decimal comma"


@case
def sections_alignment_one_vertex(s):
    s["raw"]["axis.csv"] = b"x,y\n499970.0,5499990.0\n"
    set_toml(s, "sections", "alignment", '"axis.csv"')
    return r"^axis\.csv, line 2: an alignment needs at least two distinct vertices"


@case
def sections_corridor_negative(s):
    set_toml(s, "sections", "corridor_m", "-5")
    return r"^survey\.toml, line 14, field 'sections\.corridor_m': value -5\.0 must be > 0"


@case
def sections_unknown_key(s):
    set_toml(s, "sections", "corridor", "25")
    return r"^survey\.toml, line 14, field 'sections\.corridor': unknown key 'corridor' in \[sections\]: did you mean 'corridor_m'"


# ----------------------------------------------------------------- pick edits (pick_edits.csv beside survey.toml)
EDITS_HEADER = "line,shot,receiver,reflector,action,new_time_ms,reason,time_stamp\n"


@case
def good_pick_edits(s):
    s["raw"]["pick_edits.csv"] = (
        EDITS_HEADER
        + "L1,101,105,,exclude,,noisy trace,2026-12-02T07:30:12Z\n"
        + "L1,101,106,1,retime,26.9,cycle skip,2026-12-02T07:31:00+01:00\n"
        + "L1,101,105,,restore,,,\n"
    ).encode()
    return None


@case
def edits_unknown_action(s):
    s["raw"]["pick_edits.csv"] = (EDITS_HEADER + "L1,101,105,,exlcude,,,\n").encode()
    return r"^pick_edits\.csv, line 2, field 'action': action 'exlcude' is not one of exclude, restore, retime \(did you mean 'exclude'\?\)"


@case
def edits_retime_without_time(s):
    s["raw"]["pick_edits.csv"] = (EDITS_HEADER + "L1,101,105,,exclude,,,\nL1,101,106,,retime,,,\n").encode()
    return r"^pick_edits\.csv, line 3, field 'new_time_ms': a retime needs the new two-way time"


@case
def edits_time_decimal_comma(s):
    s["raw"]["pick_edits.csv"] = (EDITS_HEADER + 'L1,101,106,,retime,"26,9",,\n').encode()
    return r"^pick_edits\.csv, line 2, field 'new_time_ms': value '26,9' uses a decimal comma"


@case
def edits_unknown_receiver(s):
    s["raw"]["pick_edits.csv"] = (EDITS_HEADER + "L1,101,1055,,exclude,,,\n").encode()
    return r"^pick_edits\.csv, line 2, field 'receiver': receiver '1055' has no pick in shot '101' of line 'L1'"


@case
def edits_time_stamp_malformed(s):
    s["raw"]["pick_edits.csv"] = (EDITS_HEADER + "L1,101,105,,exclude,,,02/12/2026 07:30\n").encode()
    return r"^pick_edits\.csv, line 2, field 'time_stamp': time stamp '02/12/2026 07:30' is not an ISO 8601"


@case
def edits_named_file_missing(s):
    set_toml(s, "files", "pick_edits", '"edits.csv"')
    return r"^survey\.toml, line 9, field 'files\.pick_edits': file not found: 'edits\.csv'"


def main(out=HERE):
    """Write every case into ``out`` (default: this folder)."""
    out = Path(out)
    for folder in out.iterdir():
        if folder.is_dir() and (folder / "survey.toml").exists() and folder.name not in CASES:
            shutil.rmtree(folder)  # a case that was removed from CASES
    for name, fn in CASES.items():
        s = copy.deepcopy(base())
        expected = fn(s)
        if name.startswith("good_"):
            assert expected is None, name
        else:
            assert expected, name
        write_case(name, s, expected, out)
    print(f"{len(CASES)} cases written to {out}")


if __name__ == "__main__":
    main()
