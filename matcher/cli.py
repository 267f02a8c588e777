"""The command line: ``matcher SUBCOMMAND ...``.

Each subcommand lives in its own module under :mod:`matcher.commands` and
exposes ``register(subparsers)``, which adds its parser and sets
``func=handler``. A handler takes the parsed arguments and returns an exit
code. Adding a command is one new module; this file does not change.

Errors the user can fix (:class:`matcher.errors.MatcherError`) are printed as
one line on stderr with exit code 2; no traceback.
"""

from __future__ import annotations

import argparse
import importlib
import pkgutil
import sys
import warnings

from matcher import __version__
from matcher.errors import MatcherError, MatcherWarning

__all__ = ["main", "build_parser"]


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="matcher",
        description="Multi-messenger alert matcher for gravitational-wave follow-up. "
        "Results are decision aids for observers; they do not replace the "
        "collaborations' own vetting.",
    )
    parser.add_argument("--version", action="version", version=f"matcher {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    import matcher.commands as commands

    for info in sorted(pkgutil.iter_modules(commands.__path__), key=lambda m: m.name):
        if info.name.startswith("_"):
            continue
        module = importlib.import_module(f"matcher.commands.{info.name}")
        module.register(sub)
    return parser


def _show_warning(message, category, filename, lineno, file=None, line=None):
    # Our own warnings are advice for the user: one line, no source location.
    if issubclass(category, MatcherWarning):
        print(f"warning: {message}", file=sys.stderr)
    else:
        _default_showwarning(message, category, filename, lineno, file, line)


_default_showwarning = warnings.showwarning


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    warnings.showwarning = _show_warning
    try:
        return int(args.func(args) or 0)
    except MatcherError as exc:
        print(f"matcher: error: {exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # pragma: no cover - e.g. piped into head
        return 0
    finally:
        warnings.showwarning = _default_showwarning


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
