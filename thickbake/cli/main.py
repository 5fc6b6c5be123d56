"""The ``thickbake`` command: parse, call the library, turn errors into one line and an exit code.

``thickbake bake | verify | shapes | compare | batch | preview``; one module per command beside this one.  Every
command accepts ``--debug``, ``-q`` and ``-v`` with the same meaning (before or after the command
name).  Heavy modules are imported inside the commands, so ``--help`` answers at once.
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings

from thickbake.cli import bake as bake_cmd
from thickbake.cli import batch as batch_cmd
from thickbake.cli import compare as compare_cmd
from thickbake.cli import preview as preview_cmd
from thickbake.cli import shapes as shapes_cmd
from thickbake.cli import verify as verify_cmd
from thickbake.cli.output import EXIT_INTERNAL, EXIT_INTERRUPTED, EXIT_USAGE, error
from thickbake.errors import ThickbakeError

EXAMPLES = """examples:
  thickbake bake samples/candle.glb                  map + sidecar beside the input
  thickbake verify                                   the bake against closed forms
  thickbake batch samples/ -o out/                   a whole folder, with report.html
  thickbake preview samples/candle.glb --png lit.png  the candle lit from behind through its map

exit codes: 0 ok, 1 a check or an asset failed, 2 bad input or options, 70 internal error, 130 interrupted"""


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors (exit 2) instead of the usage dump, and examples kept as written."""

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("formatter_class", argparse.RawDescriptionHelpFormatter)
        super().__init__(*args, **kwargs)

    def error(self, message):  # noqa: D401 - argparse API
        # "thickbake: error:" like every other error line, so scripts need one pattern
        text = " ".join(f"thickbake: error: {message} (see '{self.prog} --help')".split())
        self.exit(EXIT_USAGE, text + "\n")


def _common_flags(parser: argparse.ArgumentParser, default) -> None:
    """--debug, -q, -v: the same on every command.  Subcommands default to SUPPRESS so that a flag given
    before the command name is not reset by the subcommand's own default."""
    parser.add_argument("--debug", action="store_true", default=default,
                        help="on an error, show the Python traceback (for bug reports)")
    parser.add_argument("-q", "--quiet", action="store_true", default=default,
                        help="print nothing on stdout and no progress bar; warnings and errors still go to stderr")
    parser.add_argument("-v", "--verbose", action="store_true", default=default,
                        help="also print the resolved settings and timings (on stderr)")


def build_parser() -> argparse.ArgumentParser:
    from thickbake.version import __version__

    parser = _Parser(prog="thickbake", description="Bake thickness maps for real-time translucency (CPU ray casting).",
                     epilog=EXAMPLES)
    parser.add_argument("--version", action="version", version=f"thickbake {__version__}")
    _common_flags(parser, False)
    common = argparse.ArgumentParser(add_help=False)
    _common_flags(common, argparse.SUPPRESS)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for command in (bake_cmd, shapes_cmd, verify_cmd, compare_cmd, batch_cmd, preview_cmd):
        command.add_parser(sub, common)
    return parser


class _SigintSeen:
    """SIGINT handler that remembers it ran, then raises KeyboardInterrupt as Python's own does.

    A Ctrl-C that lands inside a C extension's import (numpy's, for one) can come out as an
    ImportError instead of KeyboardInterrupt; the flag still tells an interruption from a bug.
    """

    def __init__(self):
        self.seen = False

    def __call__(self, signum, frame):
        self.seen = True
        raise KeyboardInterrupt


_SIGINT = _SigintSeen()


def main(argv=None) -> int:
    """Entry point of ``thickbake`` and ``python -m thickbake``; returns the exit code (see cli.output)."""
    import signal
    import threading

    previous = None
    if threading.current_thread() is threading.main_thread() and signal.getsignal(signal.SIGINT) is signal.default_int_handler:
        _SIGINT.seen = False
        previous = signal.signal(signal.SIGINT, _SIGINT)
    try:
        return _main(argv)
    except KeyboardInterrupt:  # Ctrl-C while parsing, or while an error was being reported
        return _interrupted()
    except Exception:  # noqa: BLE001 - building the parser failed: one line, not a traceback
        if _SIGINT.seen:
            return _interrupted()
        if "--debug" in (sys.argv[1:] if argv is None else argv):
            raise
        error(f"internal error ({type(sys.exc_info()[1]).__name__}: {sys.exc_info()[1]}); this is a bug in "
              "thickbake - rerun with --debug and report the traceback")
        return EXIT_INTERNAL
    finally:
        if previous is not None:
            signal.signal(signal.SIGINT, previous)


def _interrupted() -> int:
    print("thickbake: interrupted", file=sys.stderr)
    return EXIT_INTERRUPTED


def _main(argv) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    try:
        with warnings.catch_warnings():
            if not args.debug:
                # Values whose arithmetic would overflow are refused before a bake (README, "What input
                # is refused"); should a numpy RuntimeWarning still occur, it is no message for a user.
                warnings.simplefilter("ignore", RuntimeWarning)
            code = args.func(args)
        if _SIGINT.seen:  # a Ctrl-C that a library swallowed (e.g. inside an optional import)
            return _interrupted()
        return code
    except ThickbakeError as exc:
        if args.debug:
            raise
        error(exc.one_line())
        return EXIT_USAGE
    except KeyboardInterrupt:
        return _interrupted()
    except BrokenPipeError:
        if _stdout_broken():
            # output piped into e.g. `head`, which stopped reading: a quiet exit, as other tools do
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
            return 0
        return _internal(args)
    except Exception:  # noqa: BLE001 - the last line of defence: one line, not a traceback
        return _internal(args)


def _stdout_broken() -> bool:
    """True only when stdout is a pipe whose reader has gone (e.g. ``| head``).

    A BrokenPipeError from anything else (a socket, a pipe to a child process) is a failure, not a
    reason to exit quietly.  ``poll`` reports POLLERR on the write end of a pipe with no reader,
    without writing anything; where poll is missing, a flush of stdout tells the same.
    """
    try:
        fd = sys.stdout.fileno()
    except (AttributeError, OSError, ValueError):
        return False
    try:
        import select

        poller = select.poll()
        poller.register(fd, select.POLLOUT)
        return any(events & select.POLLERR for _, events in poller.poll(0))
    except (AttributeError, OSError, ValueError):
        pass
    try:
        sys.stdout.flush()
    except BrokenPipeError:
        return True
    except (OSError, ValueError):
        return False
    return False


def _internal(args) -> int:
    exc = sys.exc_info()[1]
    if _SIGINT.seen:  # a Ctrl-C that surfaced as another exception type
        return _interrupted()
    if args.debug:
        raise exc
    error(f"internal error ({type(exc).__name__}: {exc}); this is a bug in thickbake - rerun with --debug "
          "and report the traceback")
    return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
