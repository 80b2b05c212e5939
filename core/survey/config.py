"""survey.toml: the survey's settings and files, read with every problem located; the whole survey loaded.

``survey.toml``
    ``[survey]``: ``name`` (text; default the folder's name), ``crs`` (required:
    ``"EPSG:32633"``, WKT, a PROJ string, or an integer EPSG code such as
    ``32633``), ``work_crs`` (optional projected CRS in metres to compute in;
    without it a projected ``crs`` is kept and a geographic one goes to the
    WGS 84 / UTM zone of the data). ``[files]``: ``stations``, ``picks``
    (required), ``boreholes``, ``dem``, ``pick_edits`` (optional; without it
    ``pick_edits.csv`` beside the TOML file is read when it exists, see
    :mod:`.edits`); paths relative to the TOML file. ``[processing]``: the fields of :class:`core.survey.model.Settings`
    except ``dem`` and ``work_crs``, type- and range-checked; ``layers`` (reflector
    labels top down) also against the picks. ``[design]``,
    ``[sections]`` and the title-block keys of ``[survey]`` are those of
    :mod:`.handoff`. Unknown keys in any table are errors naming the nearest
    valid key. Outputs are never set here (the command line's ``--out``). A
    UTF-8 byte-order mark is accepted.

Every error in survey.toml is a :class:`~core.errors.SurveyConfigError` naming
the file, the line and the key (``table.key``); the CSV files' errors are
those of :mod:`.readers`. Nothing here ever writes to the input files.
"""

from __future__ import annotations

import codecs
import dataclasses
import difflib
import math
import os
import re
import stat
import warnings
from pathlib import Path
from typing import Any, Optional, Union

import numpy as np

from .. import crs as crsmod
from ..errors import GeoreferenceError, RockheadWarning, SurveyConfigError
from ..text import printable
from .checks import check_survey
from .csvfile import file_kind, read_csv_table, split_lines
from .edits import EDITS_FILE_NAME, apply_pick_edits, read_pick_edits
from .handoff import DESIGN_KEYS, SECTION_KEYS, SURVEY_EXTRA_KEYS, read_handoff
from .model import Settings, Survey
from .readers import (
    MIN_SIGMA_M,
    MIN_SIGMA_MS,
    locate_lonlat,
    parse_stations,
    read_boreholes,
    read_picks,
    to_working_crs,
)

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.9/3.10
    import tomli as tomllib  # type: ignore[no-redef]

__all__ = ["check_for_run", "check_layers", "load_survey", "read_settings", "toml_keys"]

_SURVEY_KEYS = ("name", "crs", "work_crs")
_SURVEY_KEYS = ("name", "crs", "work_crs")
_FILE_KEYS = ("stations", "picks", "boreholes", "dem", "pick_edits")
_NOT_PROCESSING = {"dem": "files", "work_crs": "survey"}
_CHOICES = {
    "gather": ("shot", "cmp"),
    "robust_loss": ("huber", "soft_l1", "cauchy", "linear"),
    "surface_method": ("auto", "kriging", "spline", "tomography"),
    "variogram_model": ("auto", "spherical", "exponential", "gaussian"),
    "trend": ("linear", "none"),
    "gather_figures": ("auto", "all", "flagged", "none"),
}
_MINIMUM = {
    "min_picks": 3,
    "neighbours": 3,
    "index_contour_every": 1,
    "max_grid_cells": 1000,
    "max_picks": 1,
    "default_sigma_ms": MIN_SIGMA_MS,
    "borehole_sigma_m": MIN_SIGMA_M,
}
_RANGES = {"min_line_angle_deg": (0.0, 90.0), "line_cross_dip_deg": (0.0, 60.0)}
_TOML_INT_MAX = 2**63 - 1  # (exclusive low, inclusive high)


def _processing_fields() -> dict[str, dataclasses.Field]:
    out = {}
    for f in dataclasses.fields(Settings):
        if f.name in _NOT_PROCESSING:
            continue
        out[f.name] = f
    return out


def toml_keys() -> dict[str, tuple[str, ...]]:
    """Return the valid keys of each table of survey.toml.

    Returns
    -------
    dict
        Table name (``survey``, ``files``, ``processing``, ``design``,
        ``sections``) to its keys.

    Examples
    --------
    >>> toml_keys()["files"]
    ('stations', 'picks', 'boreholes', 'dem', 'pick_edits')
    """
    return {
        "survey": _SURVEY_KEYS + SURVEY_EXTRA_KEYS,
        "files": _FILE_KEYS,
        "processing": tuple(_processing_fields()),
        "design": DESIGN_KEYS,
        "sections": SECTION_KEYS,
    }


class _Toml:
    """survey.toml text with key-to-line lookup for messages."""

    _HEADER = re.compile(r"^\s*\[\s*([^\[\]]+?)\s*\]\s*(#.*)?$")

    def __init__(self, path: Path, text: str):
        self.path = path
        self.text = text
        self.lines = split_lines(text)

    def line_of(self, table: Optional[str], key: Optional[str] = None) -> Optional[int]:
        current = None
        for i, raw in enumerate(self.lines, start=1):
            m = self._HEADER.match(raw)
            if m:
                current = m.group(1).strip().strip("\"'")
                if (key is None and current == table) or (table is None and current == key):
                    return i
                continue
            if key is not None and current == table:
                if re.match(rf"^\s*([\"']?){re.escape(key)}\1\s*=", raw):
                    return i
            if key is not None and table is None and current is None:
                if re.match(rf"^\s*([\"']?){re.escape(key)}\1\s*=", raw):
                    return i
        return None

    def error(
        self, table: Optional[str], key: Optional[str], message: str, cls: type = SurveyConfigError
    ) -> SurveyConfigError:
        field = f"{table}.{key}" if (table and key) else (key or table)
        return cls(self.path, self.line_of(table, key), field, message)


# lines of survey.toml that name a file: [files] keys, [design] area, [sections] alignment
_PATH_LINE = re.compile(r"^\s*[\"']?(stations|picks|boreholes|dem|pick_edits|area|alignment)[\"']?\s*=")

_ALIASES = {"epsg": "crs", "srs": "crs", "projection": "crs", "coordinate_system": "crs", "title": "name"}


def _suggest(key: Any, valid: tuple) -> str:
    alias = _ALIASES.get(str(key).lower())
    if alias in valid:
        return f"did you mean '{alias}'? "
    close = difflib.get_close_matches(str(key).lower(), list(valid), n=1, cutoff=0.5)
    return f"did you mean '{close[0]}'? " if close else ""


def _unknown_key(toml: _Toml, table: Optional[str], key: Any, valid: tuple) -> SurveyConfigError:
    elsewhere = [t for t, keys in toml_keys().items() if key in keys and t != table]
    if key in _NOT_PROCESSING and table == "processing":
        elsewhere = [_NOT_PROCESSING[key]]
    hint = f"'{key}' belongs in [{elsewhere[0]}]; " if elsewhere else _suggest(key, valid)
    if str(key).lower().startswith("out"):
        hint = "outputs are not set in survey.toml: give the output folder on the command line (--out DIR); "
    where = f"in [{table}]" if table else "at the top level"
    return toml.error(
        table,
        key,
        f"unknown key '{key}' {where}: {hint}valid keys: {', '.join(valid)}",
    )


def _type_name(value: Any) -> str:
    return {str: "text", int: "integer", float: "number", bool: "true/false"}.get(type(value), type(value).__name__)


def _check_settings_value(toml: _Toml, key: str, value: Any, field: dataclasses.Field) -> Any:
    ann = field.type if isinstance(field.type, str) else getattr(field.type, "__name__", str(field.type))
    optional = ann.startswith("Optional[") or "None" in ann
    base = ann[len("Optional[") : -1] if ann.startswith("Optional[") else ann
    shown = repr(value)

    def bad(expected: str) -> SurveyConfigError:
        return toml.error("processing", key, f"value {shown} is {_type_name(value)}; expected {expected}")

    if isinstance(value, int) and not isinstance(value, bool) and abs(value) > _TOML_INT_MAX:
        # TOML integers are 64-bit; Python's parser accepts longer ones
        raise toml.error("processing", key, f"value {str(value)[:20]}... is too large")

    if base == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise bad("a number" + (" (leave the key out for the automatic choice)" if optional else ""))
        value = float(value)
        if not math.isfinite(value):
            raise toml.error("processing", key, f"value {shown} is not a finite number")
    elif base == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            if isinstance(value, float) and value.is_integer():
                raise bad(f"a whole number without decimals ({int(value)})")
            raise bad("a whole number")
    elif base == "bool":
        if not isinstance(value, bool):
            raise bad("true or false")
    elif base == "str":
        if not isinstance(value, str):
            raise bad("text in quotes")
    if key in _CHOICES and value not in _CHOICES[key]:
        raise toml.error(
            "processing",
            key,
            f"value {shown} is not one of {', '.join(repr(c) for c in _CHOICES[key])}"
            + _choice_hint(value, _CHOICES[key]),
        )
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        if key in _MINIMUM and value < _MINIMUM[key]:
            raise toml.error("processing", key, f"value {shown} must be at least {_MINIMUM[key]}")
        if key in _RANGES:
            lo, hi = _RANGES[key]
            if not lo < value <= hi:
                raise toml.error("processing", key, f"value {shown} must be in ({lo:g}, {hi:g}]")
        elif key not in _MINIMUM and base in ("float", "int") and value <= 0:
            raise toml.error("processing", key, f"value {shown} must be > 0")
    return value


def _layers_value(toml: _Toml, value: Any) -> tuple:
    """``[processing] layers``: reflector labels top down, as a tuple of distinct non-empty texts."""
    example = 'e.g. layers = ["wt", "rock"] (the reflector labels of picks.csv, shallowest first)'
    if isinstance(value, str) or not isinstance(value, list):
        raise toml.error("processing", "layers", f"value {value!r} is {_type_name(value)}; expected a list, {example}")
    if not value:
        raise toml.error("processing", "layers", f"the list is empty; name the reflectors top down, {example}")
    out = []
    for item in value:
        if isinstance(item, bool) or not isinstance(item, (str, int)) or not str(item).strip():
            raise toml.error(
                "processing", "layers", f"item {item!r} is not a reflector label (text in quotes); {example}"
            )
        label = str(item).strip()
        if label in out:
            raise toml.error("processing", "layers", f"reflector {label!r} is named twice: each layer once, top down")
        out.append(label)
    return tuple(out)


def check_layers(settings: Settings, picks: Any, toml_path: Union[str, Path], toml_text: str = "") -> None:
    """Check ``[processing] layers`` (and ``reflector``) against the reflector labels of the picks.

    Parameters
    ----------
    settings : Settings
        With ``layers`` (None: nothing to check) and ``reflector``.
    picks : Picks
        The picks (their ``reflector`` labels).
    toml_path, toml_text : str or Path, str
        survey.toml and its text, to name the line.

    Raises
    ------
    SurveyConfigError
        A layer no pick has, or a mapped ``reflector`` that is not one of the layers.

    Warns
    -----
    RockheadWarning
        Picked reflectors left out of the layers (they are fitted gather by
        gather but not in the layered estimate).
    """
    if settings.layers is None:
        return
    toml = _Toml(Path(toml_path), toml_text)
    picked = sorted(set(np.asarray(picks.reflector).astype(str).tolist()))
    missing = [label for label in settings.layers if label not in picked]
    if missing:
        raise toml.error(
            "processing",
            "layers",
            f"{', '.join(repr(m) for m in missing)} {'is' if len(missing) == 1 else 'are'} not a reflector of the "
            f"picks; the picks name {', '.join(picked)}",
        )
    if settings.reflector is not None and str(settings.reflector) not in settings.layers:
        raise toml.error(
            "processing",
            "reflector",
            f"reflector {settings.reflector!r} is not one of the layers {', '.join(settings.layers)}; add it to "
            "layers or map one of them",
        )
    left = [label for label in picked if label not in settings.layers]
    if left:
        warnings.warn(
            RockheadWarning(
                f"{Path(toml_path).name}, line {toml.line_of('processing', 'layers')}: reflector"
                f"{'s' if len(left) > 1 else ''} {', '.join(repr(x) for x in left)} picked but not in [processing] "
                "layers: fitted gather by gather, left out of the layered estimate"
            ),
            stacklevel=2,
        )


def _choice_hint(value: Any, choices: tuple) -> str:
    close = difflib.get_close_matches(str(value).lower(), list(choices), n=1, cutoff=0.5)
    return f"; did you mean {close[0]!r}?" if close else ""


def read_settings(
    table: Any,
    toml_path: Union[str, Path] = "survey.toml",
    toml_text: str = "",
    *,
    dem: Optional[Path] = None,
    work_crs: Optional[str] = None,
) -> Settings:
    """Check a ``[processing]`` table and build :class:`core.model.Settings`.

    Keys are the fields of Settings (except ``dem``, set from ``[files]``, and
    ``work_crs``, set from ``[survey]``). Floats accept integers; integers
    must be whole numbers; keys with a fixed set of values are checked;
    lengths, times, sigmas and velocities must be > 0; ``min_picks`` and
    ``neighbours`` >= 3; ``velocity_max_m_s`` > ``velocity_min_m_s``.

    Parameters
    ----------
    table : dict
        The parsed ``[processing]`` table (may be empty).
    toml_path, toml_text : str or Path, str
        The file and its text, to name the line of a bad key.
    dem, work_crs
        Values for those two fields.

    Returns
    -------
    Settings

    Raises
    ------
    SurveyConfigError
        Naming the key, with the nearest valid key for an unknown one.
    """
    toml = _Toml(Path(toml_path), toml_text or "")
    if not isinstance(table, dict):
        raise toml.error(None, "processing", f"[processing] must be a table, not {_type_name(table)}")
    fields = _processing_fields()
    values: dict[str, Any] = {}
    for key, value in table.items():
        if key not in fields:
            raise _unknown_key(toml, "processing", key, tuple(fields))
        if key == "layers":
            values[key] = _layers_value(toml, value)
            continue
        values[key] = _check_settings_value(toml, key, value, fields[key])
    vmin = values.get("velocity_min_m_s", Settings.velocity_min_m_s)
    vmax = values.get("velocity_max_m_s", Settings.velocity_max_m_s)
    if vmax <= vmin:
        key = "velocity_max_m_s" if "velocity_max_m_s" in values else "velocity_min_m_s"
        raise toml.error(
            "processing", key, f"velocity_max_m_s ({vmax:g}) must be greater than velocity_min_m_s ({vmin:g})"
        )
    return Settings(**values, dem=dem, work_crs=work_crs)


def _read_toml(path: Union[str, Path]) -> tuple[_Toml, dict[str, Any]]:
    if not isinstance(path, Path):
        path = Path(path)
    try:
        is_dir = path.is_dir()
    except (OSError, ValueError) as exc:
        raise SurveyConfigError(path, None, None, f"cannot use the path '{path}': {exc}") from exc
    if is_dir:
        raise SurveyConfigError(path, None, None, f"'{path}' is a folder: give the survey.toml file")
    try:
        data = path.read_bytes()
    except FileNotFoundError as exc:
        raise SurveyConfigError(path, None, None, f"survey file not found: '{path}'") from exc
    except (OSError, ValueError) as exc:
        raise SurveyConfigError(path, None, None, f"cannot read '{path}': {exc}") from exc
    if data.startswith(codecs.BOM_UTF8):
        data = data[len(codecs.BOM_UTF8) :]
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise SurveyConfigError(
            path,
            data.count(b"\n", 0, exc.start) + 1,
            None,
            "not UTF-8 text: save survey.toml as UTF-8",
        ) from exc
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        lineno = getattr(exc, "lineno", None)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        if m:
            lineno = lineno or int(m.group(1))
        elif re.search(r"\(at end of document\)", msg):
            lineno = lineno or len(split_lines(text))
        reason = re.sub(r"\s*\(at (line \d+, column \d+|end of document)\)", "", msg.splitlines()[0])
        lines = split_lines(text)
        hint = "see survey.toml in the sample project"
        if "Illegal character '\\n'" in reason or "Unterminated string" in reason:
            hint = 'a quoted text is not closed on this line: end it with "'
        if lineno and 1 <= lineno <= len(lines) and "\\" in lines[lineno - 1]:
            if _PATH_LINE.match(lines[lineno - 1]):
                hint = (
                    'a backslash starts an escape in "...": write Windows paths with forward slashes '
                    "(\"C:/data/picks.csv\") or in single quotes ('C:\\data\\picks.csv')"
                )
            else:
                hint = (
                    'a backslash starts an escape in "...": write \\\\ for a backslash, or put the text in '
                    "single quotes ('...'), where a backslash is just a character"
                )
        raise SurveyConfigError(path, lineno, None, f"not valid TOML: {reason}; {hint}") from exc
    except RecursionError as exc:
        raise SurveyConfigError(path, None, None, "not valid TOML: nested too deeply") from exc
    return _Toml(path, text), doc


def _get_table(toml: _Toml, doc: dict[str, Any], name: str, required: bool) -> dict[str, Any]:
    if name not in doc:
        if required:
            raise SurveyConfigError(
                toml.path, None, name, f"the table [{name}] is missing: see survey.toml in the sample project"
            )
        return {}
    value = doc[name]
    if not isinstance(value, dict):
        raise toml.error(None, name, f"'{name}' must be a table ([{name}]), not {_type_name(value)}")
    valid = toml_keys()[name]
    for key in value:
        if key not in valid:
            raise _unknown_key(toml, name, key, valid)
    return value


def _crs_value(toml: _Toml, key: str, value: Any) -> Any:
    if isinstance(value, bool) or not isinstance(value, (str, int)):
        raise toml.error(
            "survey",
            key,
            f'value {value!r} is {_type_name(value)}; expected text such as "EPSG:32633" or an EPSG code',
        )
    try:
        return crsmod.parse_crs(value)
    except GeoreferenceError as exc:
        raise toml.error("survey", key, str(exc)) from exc


def _inside(path: Path, folder: Path) -> bool:
    """True when the resolved ``path`` lies in the resolved ``folder`` (or a subfolder)."""
    try:
        path.resolve().relative_to(folder.resolve())
    except ValueError:
        return False
    return True


def _file_value(toml: _Toml, key: str, value: Any, required: bool, confine_to: Optional[Path] = None) -> Optional[Path]:
    if value is None:
        if required:
            raise SurveyConfigError(
                toml.path,
                toml.line_of("files"),
                f"files.{key}",
                f"[files] has no '{key}': name the {key} CSV file, e.g. {key} = \"{key}.csv\"",
            )
        return None
    if not isinstance(value, str):
        raise toml.error("files", key, f"value {value!r} is {_type_name(value)}; expected a file name in quotes")
    if not value.strip():
        raise toml.error("files", key, "the file name is empty")
    if any(ord(c) < 32 for c in value):
        raise toml.error(
            "files",
            key,
            f"the file name {value!r} holds a control character (a backslash escape such as \\n or \\t in "
            '"..."): write Windows paths with forward slashes or in single quotes',
        )
    try:
        resolved = (toml.path.parent / Path(value.strip()).expanduser()).resolve()
        st = os.stat(resolved)
    except FileNotFoundError:
        raise toml.error(
            "files",
            key,
            f"file not found: '{printable(value)}' (resolved to {printable(resolved)}; paths are relative to "
            "survey.toml)",
        ) from None
    except (OSError, ValueError, RuntimeError) as exc:
        raise toml.error("files", key, f"cannot use the path {printable(value)!r}: {exc}") from exc
    if stat.S_ISDIR(st.st_mode):
        raise toml.error("files", key, f"'{printable(value)}' is a folder ({printable(resolved)}), not a file")
    if not stat.S_ISREG(st.st_mode):
        raise toml.error(
            "files",
            key,
            f"'{printable(value)}' ({printable(resolved)}) is {file_kind(st.st_mode)}, not a regular file: name "
            f"the {key} file",
        )
    if confine_to is not None and not _inside(resolved, confine_to):
        raise toml.error(
            "files",
            key,
            f"'{printable(value)}' resolves to {printable(resolved)}, outside the survey's folder "
            f"{printable(confine_to)}: inputs are confined to it here; copy the file into that folder",
        )
    return resolved


#: Processor time of a whole run per million picks (s), measured by benchmarks/bench_survey_size.py
#: (992,256 picks on 272 lines: 581 s; 503,424 picks: 280 s; the time grows about in proportion).
RUN_SECONDS_PER_MILLION_PICKS = 600.0


def _processor_time(n_picks: int) -> str:
    """The processor time of a run of ``n_picks`` picks, in words ("about 10 min", "less than a minute").

    >>> _processor_time(1_000_000), _processor_time(3_000)
    ('about 10 min', 'less than a minute')
    """
    minutes = RUN_SECONDS_PER_MILLION_PICKS * n_picks / 1e6 / 60
    return "less than a minute" if minutes < 0.5 else f"about {minutes:.0f} min"


def count_data_rows(path: Union[str, Path], limit: int) -> int:
    """Data rows of a CSV file (header, blank and '#' comment lines not counted), read in 1 MiB blocks.

    Counting stops being exact above ``limit``: the lines are counted first
    (a cheap upper bound) and only a file over the limit is counted row by
    row, so that comments cannot push it over. No row is parsed.
    """
    lines = 0
    last = b"\n"
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            lines += block.count(b"\n")
            last = block[-1:]
    lines += last != b"\n"  # a last line without its newline
    if lines - 1 <= limit:
        return max(lines - 1, 0)
    rows = -1  # the header
    with open(path, "rb") as fh:
        for line in fh:
            text = line.strip()
            if text and not text.startswith(b"#"):
                rows += 1
    return max(rows, 0)


def load_survey(toml_path: Union[str, Path], *, confine_inputs: bool = False) -> Survey:
    """Read survey.toml and every file it names into a :class:`core.model.Survey`.

    Each file is checked line by line; :func:`check_for_run` then checks the
    files and settings together for a whole run (``rockhead check`` and
    ``rockhead run`` call both). ``[processing] reflector`` is spelled as the
    picks spell it when it differs only in case.

    Parameters
    ----------
    toml_path : str or Path
        The survey.toml file.
    confine_inputs : bool
        Refuse any input file outside the folder of survey.toml (and its
        subfolders), before reading it: for survey folders from elsewhere, run
        on a server (the Processing algorithms under ``qgis_process`` set it).

    Returns
    -------
    Survey
        Stations and boreholes in the working CRS (:func:`core.crs.working_crs`),
        picks checked against the stations, settings checked.

    Raises
    ------
    SurveyConfigError
        survey.toml: TOML syntax (with its line), unknown keys (with the nearest
        valid one), wrong types, missing or unknown CRS, missing files (the key
        and the resolved path).
    InputFileError
        A CSV file's content (file, line, field).
    """
    toml, doc = _read_toml(Path(toml_path))
    confine_to = toml.path.resolve().parent if confine_inputs else None
    for key in doc:
        if key not in toml_keys():
            raise _unknown_key(toml, None, key, tuple(toml_keys()))
    survey = _get_table(toml, doc, "survey", required=True)
    files = _get_table(toml, doc, "files", required=True)
    processing = doc.get("processing", {})
    if "processing" in doc and not isinstance(processing, dict):
        raise toml.error(None, "processing", f"'processing' must be a table, not {_type_name(processing)}")

    name = survey.get("name", toml.path.resolve().parent.name)
    if not isinstance(name, str):
        raise toml.error("survey", "name", f"value {name!r} is {_type_name(name)}; expected text in quotes")
    if "crs" not in survey:
        raise SurveyConfigError(
            toml.path,
            toml.line_of("survey"),
            "survey.crs",
            "[survey] has no 'crs': give the CRS of x/y in the CSV files, e.g. crs = \"EPSG:32633\"",
        )
    crs_in = _crs_value(toml, "crs", survey["crs"])
    requested = None
    work_crs_text = None
    if "work_crs" in survey:
        requested = _crs_value(toml, "work_crs", survey["work_crs"])
        work_crs_text = survey["work_crs"] if isinstance(survey["work_crs"], str) else f"EPSG:{survey['work_crs']}"
        try:
            crsmod.working_crs(crs_in, requested=requested)
        except GeoreferenceError as exc:
            raise toml.error("survey", "work_crs", str(exc)) from exc
    elif not crsmod.is_geographic(crs_in):
        try:
            crsmod.working_crs(crs_in)
        except GeoreferenceError as exc:
            raise toml.error("survey", "crs", f"{exc}; or set work_crs") from exc

    paths: dict[str, Path] = {}
    for key in _FILE_KEYS:
        p = _file_value(toml, key, files.get(key), required=key in ("stations", "picks"), confine_to=confine_to)
        if p is not None:
            for other, q in paths.items():
                if q == p:
                    raise toml.error("files", key, f"'{files[key]}' is the same file as {other}")
            paths[key] = p

    settings = read_settings(processing, toml.path, toml.text, dem=paths.get("dem"), work_crs=work_crs_text)

    rows = parse_stations(paths["stations"])
    lon, lat = locate_lonlat(rows.table, rows.x, rows.y, crs_in)
    try:
        crs_work = crsmod.working_crs(crs_in, lon, lat, requested=requested)
    except GeoreferenceError as exc:
        raise toml.error("survey", "crs", f"{exc}") from exc
    stations = rows.stations(*to_working_crs(rows.table, rows.x, rows.y, crs_in, crs_work))
    n_rows = count_data_rows(paths["picks"], settings.max_picks)
    if n_rows > settings.max_picks:
        raise toml.error(
            "processing",
            "max_picks",
            f"{paths['picks'].name} has {n_rows:,} picks, more than max_picks = {settings.max_picks:,} (a run takes "
            f"{_processor_time(n_rows)} of processor time at that size; a million picks took 6.5 GiB of memory); "
            "split the survey, or raise [processing] max_picks on a machine with the memory",
        )
    picks = read_picks(paths["picks"], settings.default_sigma_ms, stations)
    check_layers(settings, picks, toml.path, toml.text)
    if "pick_edits" not in paths and (toml.path.parent / EDITS_FILE_NAME).is_file():
        paths["pick_edits"] = (toml.path.parent / EDITS_FILE_NAME).resolve()
    edits = None
    if "pick_edits" in paths:
        edits = apply_pick_edits(picks, read_pick_edits(paths["pick_edits"], picks))
        picks = edits.picks
    boreholes = None
    if "boreholes" in paths:
        boreholes = read_boreholes(paths["boreholes"], crs_in, crs_work, settings.borehole_sigma_m, stations=stations)
    handoff = read_handoff(
        survey,
        _get_table(toml, doc, "design", required=False),
        _get_table(toml, doc, "sections", required=False),
        toml_dir=toml.path.parent,
        error=toml.error,
        crs_in=crs_in,
        crs_work=crs_work,
        read_table=read_csv_table,
        confine_to=confine_to,
    )
    if handoff.design_area_path is not None:
        paths["design_area"] = handoff.design_area_path
    for a in handoff.alignments:
        paths[f"alignment_{a.name}"] = a.path
    loaded = Survey(
        name=name,
        path=toml.path,
        input_crs=crs_in,
        crs=crs_work,
        stations=stations,
        picks=picks,
        boreholes=boreholes,
        settings=settings,
        files=dict(paths),
        handoff=handoff,
        edits=edits,
    )
    asked = settings.reflector
    if asked is not None:  # the picks' spelling of a label given in another case
        match = sorted({lab for lab in picks.reflector.astype(str) if lab.casefold() == str(asked).casefold()})
        if match and match[0] != asked:
            loaded = dataclasses.replace(loaded, settings=dataclasses.replace(settings, reflector=match[0]))
    return loaded


def check_for_run(survey: Survey) -> Survey:
    """Check a loaded survey's files and settings together, as a whole run needs them.

    What a run would refuse for input reasons is refused here, before any
    work, with the file, line and field (:func:`.checks.check_survey`); the
    DEM is read as the run reads it. ``rockhead check`` and ``rockhead run``
    call this after :func:`load_survey`; a single step (fitting the gathers of
    a two-gather test line) need not.

    Parameters
    ----------
    survey : Survey
        As :func:`load_survey` returns it.

    Returns
    -------
    Survey
        ``survey``, with ``[processing] reflector`` spelled as in picks.csv.

    Raises
    ------
    SurveyConfigError, InputFileError
        As :func:`.checks.check_survey` says; an unreadable DEM.
    """
    try:
        text = survey.path.read_bytes().decode("utf-8-sig")
    except (OSError, UnicodeDecodeError):
        text = ""
    toml = _Toml(survey.path, text)
    if "dem" in survey.files:  # the run's ground model: a file GDAL cannot read is refused now
        from .ground import GroundModel

        GroundModel.from_raster(survey.files["dem"], survey.crs)
    return check_survey(survey, toml.error)
