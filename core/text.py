"""Labels and names from input files are data: made safe for a terminal and for file names.

Line, shot, reflector and borehole labels and the survey name come from the
user's files and may hold anything: newlines, terminal escape sequences
(``\\x1b[31m``), 300 characters, characters a file system refuses. Every place
that prints or names something after them goes through one of these.
"""

from __future__ import annotations

import hashlib
import unicodedata

__all__ = ["file_stem", "printable"]

#: Longest file name stem made from labels (file systems allow 255 bytes; leave room).
MAX_STEM_CHARS = 100


def printable(text, max_chars: int | None = None) -> str:
    """``text`` with control and other non-printing characters shown as escapes.

    Terminal escape sequences, newlines and tabs come out as ``\\x1b``,
    ``\\n``, ``\\t``, so printed text can neither move the cursor, recolour the
    terminal nor fake a second line. Longer than ``max_chars``: cut, with
    ``…`` at the end.

    Examples
    --------
    >>> printable("site\\x1b[31m red\\nsecond line")
    'site\\\\x1b[31m red\\\\nsecond line'
    >>> printable("Tarnwick Creek – 2024")
    'Tarnwick Creek – 2024'
    >>> printable("x" * 10, max_chars=5)
    'xxxx…'
    """
    out = "".join(c if (c.isprintable() or c == " ") else repr(c)[1:-1] for c in str(text))
    if max_chars is not None and len(out) > max_chars:
        out = out[: max(max_chars - 1, 0)] + "…"
    return out


def _safe_part(text: str) -> str:
    norm = unicodedata.normalize("NFKD", str(text))
    return "".join(c if (c.isascii() and c.isalnum()) or c in "-" else "_" for c in norm)


def file_stem(*parts, used: set | None = None, max_chars: int = MAX_STEM_CHARS) -> str:
    """A portable file name stem made from labels, unique among ``used`` (compared case-insensitively).

    Letters, digits and ``-`` are kept, everything else becomes ``_``; parts
    are joined by ``_``. When that changed a label, cut it, or gives a name
    already in ``used`` (``"A B"`` and ``"A_B"``; ``"rock"`` and ``"Rock"``,
    one file on Windows and macOS), eight hex digits of the labels' SHA-1 are
    appended, so different labels never share a file. ``used`` (a set of
    case-folded stems) is updated.

    Examples
    --------
    >>> used = set()
    >>> file_stem("gather", "A", "1001", used=used)
    'gather_A_1001'
    >>> file_stem("gather", "a", "1001", used=used)  # one file on Windows: made unique
    'gather_a_1001_aa41ff62'
    >>> file_stem("gather", "A B", "1", used=used)[:12]
    'gather_A_B_1'
    """
    raw = "_".join(str(p) for p in parts)
    stem = "_".join(_safe_part(p) for p in parts)
    cut = len(stem) > max_chars
    if cut:
        stem = stem[: max_chars - 9]
    key = stem.casefold()
    if cut or stem != raw or (used is not None and key in used):
        digest = hashlib.sha1("\x1f".join(str(p) for p in parts).encode("utf-8", "surrogatepass")).hexdigest()[:8]
        stem = f"{stem}_{digest}"
        key = stem.casefold()
    if used is not None:
        used.add(key)
    return stem
