"""The ``pellucid`` command line.

Exit codes: 0 success; 1 a check failed (an audit gate); 2 bad input or usage, with one line on
stderr; 130 interrupted. Set PELLUCID_DEBUG=1 to see a traceback for unexpected errors.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import os
import sys
import warnings
from collections.abc import Callable, Sequence

from pellucid import __version__
from pellucid.core.errors import PellucidError

EXIT_OK, EXIT_CHECK_FAILED, EXIT_BAD_INPUT, EXIT_INTERRUPTED = 0, 1, 2, 130

# Each subcommand lives in its own module under server/commands/ with
# ``register(subparsers) -> None`` that sets ``func`` on its parser.
COMMAND_MODULES = ("serve", "models", "inspect", "demo", "audit", "runs", "report", "bench")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, plain, exit 2
        self.exit(EXIT_BAD_INPUT, f"pellucid: {message} (try 'pellucid {self._sub()}--help')\n")

    def _sub(self) -> str:
        parts = self.prog.split()[1:]
        return (" ".join(parts) + " ") if parts else ""


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="pellucid",
        description=(
            "Pellucid shows why an image classifier makes its calls: kernels, feature maps, top-k, "
            "occlusion and other attribution maps, and audits of whole image folders. Everything runs "
            "locally on the CPU."
        ),
    )
    parser.add_argument("--version", action="version", version=f"pellucid {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMAND_MODULES:
        importlib.import_module(f"pellucid.commands.{name}").register(sub)
    return parser


class _Held(logging.Handler):
    """Keeps log records (torch's included) until the command's outcome is known."""

    def __init__(self) -> None:
        super().__init__(logging.WARNING)
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append(record)


def _first_line(text: str) -> str:
    return (text.strip().splitlines() or [""])[0][:300]


def run(func: Callable[[argparse.Namespace], int], args: argparse.Namespace) -> int:
    """Run a command; an error is one line on stderr and nothing else.

    Warnings and log messages from libraries (torch's among them) are held back while the command
    runs: after an error only Pellucid's line is printed; after success each distinct one is
    printed as one line. PELLUCID_DEBUG=1, and commands that run until stopped (``hold_output``
    False: the server), let everything through as it happens.
    """
    if os.environ.get("PELLUCID_DEBUG") or not getattr(args, "hold_output", True):
        return _run(func, args)
    held = _Held()
    root = logging.getLogger()
    root.addHandler(held)
    try:
        with warnings.catch_warnings(record=True) as caught:
            code = _run(func, args)
    finally:
        root.removeHandler(held)
    if code != EXIT_BAD_INPUT:
        seen: set[str] = set()
        for text in [f"{w.category.__name__}: {w.message}" for w in caught] + [r.getMessage() for r in held.records]:
            line = _first_line(text)
            if line and line not in seen:
                seen.add(line)
                print(f"pellucid: warning: {line}", file=sys.stderr)
    return code


def _run(func: Callable[[argparse.Namespace], int], args: argparse.Namespace) -> int:
    try:
        return int(func(args) or 0)
    except PellucidError as exc:
        print(f"pellucid: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("pellucid: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Exception as exc:  # noqa: BLE001 - the user gets one line, developers get PELLUCID_DEBUG
        if os.environ.get("PELLUCID_DEBUG"):
            raise
        print(f"pellucid: internal error ({type(exc).__name__}: {_first_line(str(exc))}); rerun with "
              "PELLUCID_DEBUG=1 for details", file=sys.stderr)
        return EXIT_BAD_INPUT


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_BAD_INPUT
    return run(args.func, args)


if __name__ == "__main__":
    sys.exit(main())
