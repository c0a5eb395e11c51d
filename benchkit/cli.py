"""The `benchkit` command: one entry point, one sub-command per job.

Bad input ends as one line on stderr (`benchkit: error: ...`) and exit code 2; nothing else
is printed for it. Unexpected failures print a traceback, since they are bugs.
"""

from __future__ import annotations

import argparse
import importlib
import os
import re
import sys

from benchkit import __version__
from benchkit.commands import COMMANDS
from benchkit.errors import UserError

SAFETY_NOTE = (
    "Safety: DC bias voltages and charged capacitors can shock, burn and damage parts. "
    "A capacitor keeps its charge after the supply is off: discharge it and check it with a "
    "meter before handling. Use current-limited supplies, guarded fixtures and the "
    "interlocks your lab requires. A climate chamber has hot and cold surfaces and collects "
    "condensation below the dew point: let it return to a safe temperature before opening it. "
    "This tool does not replace local electrical-safety codes, "
    "your lab's safety rules or the judgement of a qualified person."
)


# A value that starts with a minus sign and a digit is a value, not an option: "--bias -5V",
# "--temp -40C" (argparse's own pattern takes only bare numbers such as -5 or -0.5).
_NEGATIVE_VALUE = re.compile(r"^-\.?\d")


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line with exit code 2."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._negative_number_matcher = _NEGATIVE_VALUE

    def error(self, message: str):  # noqa: D401 - argparse hook
        # the program's name once, in main's "benchkit: error: " prefix; the (sub)command
        # is named where the operator can act on it, in the help hint
        raise UserError(f"{message} (see '{self.prog} --help')")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="benchkit",
        description="Measure, fit, store and verify DC-bias curves of ceramic capacitors.",
        epilog=SAFETY_NOTE,
    )
    parser.add_argument("--version", action="version", version=f"benchkit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMANDS:
        importlib.import_module(f"benchkit.commands.{name}").register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    # The CLI draws files only: Agg, chosen here and nowhere in library code, so a notebook
    # that imports benchkit keeps its own backend.
    os.environ["MPLBACKEND"] = "Agg"
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if not getattr(args, "func", None):
            parser.print_help(sys.stderr)  # no command: usage is a message, not a result
            return 2
        code = args.func(args)
        return int(code or 0)
    except UserError as exc:
        print(f"benchkit: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("benchkit: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into a reader that stopped early (e.g. `| head`)
        try:
            sys.stdout.close()  # nothing more can reach the reader; no second error at exit
        except BrokenPipeError:
            pass
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
