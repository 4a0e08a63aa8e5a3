"""The ``roikit`` command line: a thin shell over the Python API.

Each command lives in its own module ``roikit.cli._<command>`` defining
``add_parser(subparsers)`` (which registers the sub-command and its options) and
``run(args) -> int``. Exit status: 0 ok, 1 data error (any :class:`RoikitError`),
2 usage error (bad options, :class:`UsageError`). Errors are one line on stderr.
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import sys
import warnings

from .. import __version__
from .._options import entry_point
from ..errors import RoikitError, RoikitWarning, UsageError, describe_os_error

__all__ = ["main", "build_parser"]

#: Sub-commands in the order ``roikit --help`` lists them.
COMMANDS = ("demo", "init", "regions", "extract", "stats", "report", "run", "plan")


class _Parser(argparse.ArgumentParser):
    """An argument parser whose usage errors print one line and exit 2."""

    def error(self, message):  # noqa: D401 - argparse API
        self.exit(2, f"{self.prog}: error: {message}\n")


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The ``roikit`` parser; with ``only``, only that sub-command gets its options (the others their one-line
    help), so that ``roikit --help`` and ``--version`` do not import the libraries every command needs."""
    parser = _Parser(
        prog="roikit",
        description="Region-of-interest group analysis of first-level contrast maps. "
        "For research group analysis, not for clinical decisions about an individual patient.",
    )
    parser.add_argument("--version", action="version", version=f"roikit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMANDS:
        module_name = f"roikit.cli._{name}"
        if importlib.util.find_spec(module_name) is None:
            continue
        module = importlib.import_module(module_name)
        if only is None or only == name or not hasattr(module, "HELP"):
            module.add_parser(sub)
        else:
            sub.add_parser(name, help=module.HELP)
    return parser


def _format_warning(message, category, filename, lineno, line=None):
    return f"roikit: warning: {message}\n"


def _print_warnings(caught, args) -> None:
    """At most one line per problem (<= 200 characters) on stderr; nothing with --quiet."""
    from ..errors import WARNING_PREFIX, summarise_warnings, warning_records

    if getattr(args, "quiet", False) or not caught:
        return
    ours = [w for w in caught if issubclass(w.category, RoikitWarning)]
    lines = summarise_warnings(warning_records(ours), prefix=WARNING_PREFIX)
    for w in caught:
        if not issubclass(w.category, RoikitWarning):
            text = str(w.message).splitlines()[0] if str(w.message) else w.category.__name__
            lines.append(WARNING_PREFIX + (text if len(text) <= 180 else text[:177] + "..."))
    lines = list(dict.fromkeys(lines))
    where = getattr(args, "warnings_file", None)
    if where is not None and ours:
        lines.append(f"roikit: every warning, one row per participant and region: {where}")
    sys.stderr.write("".join(line + "\n" for line in lines))


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``roikit`` console script."""
    argv = sys.argv[1:] if argv is None else list(argv)
    first = next((a for a in argv if not a.startswith("-")), "")
    parser = build_parser(first if first in COMMANDS else "")
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help(sys.stderr)
        return 2
    from .._outputs import command_line

    previous = warnings.formatwarning
    warnings.formatwarning = _format_warning
    caught: list = []
    try:
        with warnings.catch_warnings(record=True) as caught, entry_point("cli"), command_line():
            warnings.simplefilter("always", RoikitWarning)
            status = int(args.func(args) or 0)
            _print_warnings(caught, args)  # only after success: a failed command prints its one error line
            return status
    except UsageError as exc:
        print(f"roikit {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except RoikitError as exc:  # before OSError: InputFileError and OutputWriteError also subclass it
        print(f"roikit {args.command}: error: {exc}", file=sys.stderr)
        return 1
    except OSError as exc:  # last safety net: an OS error that no layer turned into a roikit error
        print(f"roikit {args.command}: error: {describe_os_error(exc.filename or '(unnamed file)', exc, action='use')}",
              file=sys.stderr)
        return 1
    except MemoryError:
        print(f"roikit {args.command}: error: not enough memory; an input is larger than this machine can hold "
              "(or its header is corrupt)", file=sys.stderr)
        return 1
    except RecursionError:
        print(f"roikit {args.command}: error: an input is nested too deeply to read", file=sys.stderr)
        return 1
    except KeyboardInterrupt as exc:
        detail = f" ({exc.args[0]})" if exc.args and isinstance(exc.args[0], str) else ""
        print(f"roikit {args.command}: interrupted{detail}", file=sys.stderr)
        return 130
    finally:
        warnings.formatwarning = previous


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
