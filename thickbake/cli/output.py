"""What the command line writes: stdout lines, warnings and errors on stderr, and the exit codes.

One table of exit codes serves every command (README, "Exit codes and errors"):

====  ==========================================================================
0     done; every check passed
1     a check failed (verify, compare), an asset failed (batch), or --strict saw a warning (bake, batch)
2     bad input or options: one line naming the file or option and the fix; nothing written
70    internal error (a bug): one line; rerun with --debug for the traceback
130   interrupted (Ctrl-C)
====  ==========================================================================
"""

from __future__ import annotations

import json
import sys

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_USAGE = 2
EXIT_INTERNAL = 70  # EX_SOFTWARE of BSD sysexits.h
EXIT_INTERRUPTED = 130  # 128 + SIGINT, what shells report for Ctrl-C


def one_line(text: str) -> str:
    """Collapse any whitespace (newlines in file names included) so a message stays on one line."""
    return " ".join(str(text).split())


def echo(text: str = "") -> None:
    """A line of the command's result on stdout."""
    print(text)


def error(text: str) -> None:
    print(f"thickbake: error: {one_line(text)}", file=sys.stderr)


def print_warnings(warnings, where: str) -> None:
    for text in warnings:
        print(f"thickbake: warning: {one_line(f'{where}: {text}')}", file=sys.stderr)


def strict_failure(count: int) -> None:
    """The closing line of a ``--strict`` run that saw warnings (it exits 1)."""
    print(f"thickbake: error: --strict: {count} warning{'s' if count != 1 else ''} above count as a failure",
          file=sys.stderr)


def verbose_lines(lines) -> None:
    """``-v`` output (resolved settings, timings) on stderr, so stdout stays the result."""
    for line in lines:
        print(f"thickbake: {line}", file=sys.stderr)


def write_json(target: str, data: dict) -> None:
    """``--json FILE`` writes the file atomically; ``--json -`` writes to stdout."""
    if target == "-":
        sys.stdout.write(json.dumps(data, indent=2, sort_keys=False) + "\n")
        sys.stdout.flush()
        return
    from thickbake.maps.files import atomic_write_bytes, json_bytes

    atomic_write_bytes(target, json_bytes(data))
