"""Command line: ``rockhead run SURVEY.toml --out DIR``.

Exit codes: 0 success; 2 bad input or an output that cannot be written: any
:class:`~.errors.RockheadError` (an input file, a survey.toml setting, a grid or
surface that the data or settings cannot give, an output folder, a missing
package), one line on stderr, no traceback; 1 only for an internal error, a bug
(any other exception: one line, ``--debug`` shows the traceback); 130 cancelled
(Ctrl-C).
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from typing import Optional, Sequence

# The fits solve many tiny systems at once; a multi-threaded BLAS only adds
# overhead there (and oversubscribes a small machine), so unless the user
# says otherwise numpy's BLAS runs on one thread in this command.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

from . import __version__
from .errors import CancelledError, RockheadError
from .progress import NullProgress, StderrProgress
from .text import printable

CAUTION = (
    "A seismic depth map is an interpretation with stated uncertainty. It does not replace borings; "
    "designs that rely on it must be checked against borings and signed off under local codes by "
    "licensed professionals."
)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="rockhead",
        description="Map a seismic reflector (usually bedrock) from shallow reflection picks.",
        epilog=CAUTION,
    )
    p.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    sub = p.add_subparsers(dest="command", required=True)
    run = sub.add_parser("run", help="run the whole job on a survey and write every output")
    run.add_argument("survey", help="survey.toml naming the stations, picks and borehole files")
    run.add_argument("--out", required=True, help="output folder (created if missing)")
    run.add_argument(
        "--method",
        choices=["auto", "kriging", "spline", "tomography"],
        default=None,
        help="surface method (default: the survey's [processing] surface_method, else auto)",
    )
    run.add_argument(
        "--gather-figures",
        choices=["auto", "all", "flagged", "none"],
        default=None,
        help="QC figure of each gather in qc/ (besides the figure of each line): all, only flagged gathers, "
        "none, or auto (the flagged ones); default the survey's [processing] gather_figures",
    )
    run.add_argument("--progress", action="store_true", help="print progress on stderr")
    run.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    for cmd in (run,):
        cmd.add_argument(
            "--inputs-in-survey-folder",
            action="store_true",
            help="refuse any input file outside the folder of survey.toml (for surveys from elsewhere)",
        )
    check = sub.add_parser("check", help="read and validate the inputs only")
    check.add_argument("survey")
    check.add_argument(
        "--inputs-in-survey-folder",
        action="store_true",
        help="refuse any input file outside the folder of survey.toml (for surveys from elsewhere)",
    )
    return p


def _edits_line(survey) -> str:
    e = survey.edits
    path = survey.files.get("pick_edits")
    return (
        f"pick edits: {len(e.edits)} read from {path.name if path else 'the edits file'}: "
        f"{e.n_excluded} picks excluded, {e.n_retimed} retimed"
    )


def _one_line(message: object) -> str:
    """The text of ``message`` (an error, a warning or a string) on one printable line.

    Whitespace runs are collapsed and control characters (terminal escape
    sequences from a label or a survey name) are shown escaped, never sent raw.
    """
    return printable(" ".join(str(message).split()))


def _print_warnings(caught) -> None:
    for w in caught:
        if issubclass(w.category, UserWarning):
            print(f"rockhead: warning: {_one_line(w.message)}", file=sys.stderr)


def main(argv: Optional[Sequence[str]] = None) -> int:
    """Run the command line with ``argv`` (default ``sys.argv[1:]``); return the exit code.

    0 success; 2 bad input or an output that cannot be written (any
    :class:`~.errors.RockheadError`), one line on stderr; 1 an internal error
    (a bug), one line, the traceback with ``--debug``; 130 cancelled. The
    warnings met are shown whether the run succeeds or fails, before the
    error, which is the last line on stderr.
    """
    args = _parser().parse_args(argv)
    show_progress = getattr(args, "progress", False) or sys.stderr.isatty()
    progress = StderrProgress() if show_progress else NullProgress()
    code, message = 0, None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            if args.command == "check":
                from .survey.config import check_for_run, load_survey

                survey = check_for_run(load_survey(args.survey, confine_inputs=args.inputs_in_survey_folder))
                n_bh = 0 if survey.boreholes is None else len(survey.boreholes)
                print(
                    f"{printable(survey.name)}: {len(survey.stations)} stations, {len(survey.picks)} picks, "
                    f"{n_bh} boreholes; CRS {printable(survey.crs.name)}"
                )
                if survey.edits is not None:
                    print(printable(_edits_line(survey)))
            else:
                from .job import run

                result = run(
                    args.survey,
                    args.out,
                    method=args.method,
                    progress=progress,
                    gather_figures=args.gather_figures,
                    confine_inputs=args.inputs_in_survey_folder,
                )
                print("\n".join(printable(line) for line in result.summary().splitlines()))
                if result.survey.edits is not None:
                    print(printable(_edits_line(result.survey)))
                print(f"Caution: {CAUTION}")
        except CancelledError:
            code, message = 130, "rockhead: cancelled"
        except KeyboardInterrupt:
            code, message = 130, "rockhead: interrupted"
        except RockheadError as err:
            code, message = 2, f"rockhead: error: {_one_line(err)}"
        except Exception as err:  # an internal error: say so in one line unless --debug
            if getattr(args, "debug", False):
                _print_warnings(caught)
                raise
            code = 1
            message = f"rockhead: internal error: {type(err).__name__}: {_one_line(err)} (rerun with --debug)"
    _print_warnings(caught)
    if message is not None:  # last, so that the error is the last line on stderr
        print(message, file=sys.stderr)
    return code


if __name__ == "__main__":
    sys.exit(main())
