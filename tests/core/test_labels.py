"""Labels are data, never markup: figures, file names, HTML, DXF and the terminal.

Line, shot and reflector labels and the survey name come from the user's files.
A label that is matplotlib mathtext must print as written (unescaped, ``$\\foo{$``
crashes matplotlib's parser); labels that differ only in case or in characters a
file system refuses must still get their own QC figure; control characters never
reach the terminal raw.
"""

import re

import pytest
from rockhead.core import cli, job
from rockhead.core.formats.dxf import _text as dxf_text
from rockhead.core.report.figures import plain_text
from rockhead.core.report.html import Report
from rockhead.core.text import file_stem, printable
from small_survey import write_small_survey

matplotlib = pytest.importorskip("matplotlib")
matplotlib.use("Agg")

HOSTILE = [r"$\foo{$", "x^$2$", "$$", r"a\$b", "$", "{}%_&#"]


def _svg_of(title, plain=True):
    """The figure's title drawn (through figures.plain_text), as SVG text (fonts kept as text)."""
    import io

    import matplotlib.pyplot as plt

    fig, ax = plt.subplots()
    ax.set_title(title)
    ax.annotate(title, (0.5, 0.5))
    if plain:
        plain_text(fig)
    buf = io.BytesIO()
    try:
        with matplotlib.rc_context({"svg.fonttype": "none"}):
            fig.savefig(buf, format="svg")
    finally:
        plt.close(fig)
    return buf.getvalue().decode()


@pytest.mark.parametrize("label", HOSTILE, ids=[f"label{i}" for i in range(len(HOSTILE))])
def test_labels_are_drawn_as_written(label):
    import xml.etree.ElementTree as ET

    root = ET.fromstring(_svg_of(label))
    texts = ["".join(e.itertext()) for e in root.iter("{http://www.w3.org/2000/svg}text")]
    # title and annotation drawn as one run of text, character for character (mathtext
    # would draw glyphs one by one, each in its own tspan, and drop the dollar signs)
    assert texts.count(label) == 2, texts


def test_without_plain_text_a_label_is_typeset():
    import xml.etree.ElementTree as ET

    root = ET.fromstring(_svg_of("x^$2$", plain=False))
    texts = ["".join(e.itertext()) for e in root.iter("{http://www.w3.org/2000/svg}text")]
    assert "x^$2$" not in texts  # the check above can fail


def test_unescaped_mathtext_label_would_crash():
    """The hazard is real: matplotlib parses $...$ as mathtext by default and refuses this one."""
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots()
    ax.set_title(r"line $\foo{$")
    try:
        with pytest.raises(ValueError):
            fig.canvas.draw()
    finally:
        plt.close(fig)


def test_printable_escapes_terminal_control():
    s = printable("site\x1b[31m red\nline two\ttab\x07")
    assert "\x1b" not in s and "\n" not in s and "\t" not in s and "\x07" not in s
    assert s == "site\\x1b[31m red\\nline two\\ttab\\x07"


@pytest.mark.parametrize(
    "a, b", [("A B", "A_B"), ("rock", "Rock"), ("é", "e_")], ids=["space-underscore", "case", "accent"]
)
def test_file_stems_of_different_labels_differ(a, b):
    used = set()
    s1, s2 = file_stem("gather", a, used=used), file_stem("gather", b, used=used)
    assert s1.casefold() != s2.casefold()
    assert re.fullmatch(r"[A-Za-z0-9_-]+", s1) and re.fullmatch(r"[A-Za-z0-9_-]+", s2)


def test_file_stem_of_a_long_label_fits_a_file_name():
    stem = file_stem("gather", "L" * 300, "1", "rock")
    assert len((stem + ".png").encode()) <= 255 - 40  # room for the staging folder's temp names
    assert stem != file_stem("gather", "L" * 299 + "M", "1", "rock")


def test_dxf_text_has_no_control_characters():
    assert dxf_text("a\nb\x1b[31m") == "a b\\U+001B[31m"


def test_html_escapes_labels():
    rep = Report("<script>alert(1)</script>")
    rep.heading("Line <b>&")
    rep.table({"line": ["<img src=x onerror=alert(1)>"]})
    html = rep.render()
    assert "<script>alert" not in html and "<img src=x" not in html
    assert "&lt;script&gt;" in html and "&lt;img src=x" in html


@pytest.mark.slow
def test_whole_run_with_hostile_labels(tmp_path, capsys):
    """Mathtext line labels, names equal once sanitised or case-folded, a 300-character label,
    a survey name with a terminal escape and a newline: the run succeeds, one figure per line and per gather."""
    lines = (r"$\foo{$", "A B", "A_B", "a_b", "L" * 300)
    toml = write_small_survey(tmp_path / "in", name="Site\\u001b[31m red\\nsecond", lines=lines, shots=(4, 20, 36))
    code = cli.main(["run", str(toml), "--out", str(tmp_path / "out"), "--gather-figures", "all"])
    out = capsys.readouterr()
    assert code == 0, out.err
    assert "\x1b" not in out.out + out.err
    assert out.out.splitlines()[0].startswith("Site\\x1b[31m red\\nsecond: 15 gathers fitted")
    pngs = sorted(p.name for p in (tmp_path / "out" / "qc").iterdir())
    assert len(pngs) == 15 + 5 and len({p.casefold() for p in pngs}) == 15 + 5  # 15 gathers, 5 lines
    assert all(len(p.encode()) < 200 for p in pngs)
    html = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    assert r"$\foo{$" in html  # the label is shown as written


@pytest.mark.slow
def test_write_outputs_refuses_nothing_for_case_only_differences(tmp_path):
    toml = write_small_survey(tmp_path / "in", lines=("A", "a", "B"), shots=(4, 12, 20, 28, 36))
    result = job.run(toml, tmp_path / "out", gather_figures="all")
    names = [p.name for p in (tmp_path / "out" / "qc").iterdir()]
    assert len(names) == 15 + 3 and len({n.casefold() for n in names}) == 15 + 3  # 15 gathers, 3 lines
    assert len(result.outputs) > 15
