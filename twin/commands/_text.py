"""Text output shared by the commands: no negative zeros, help that shows defaults.

A value that rounds to zero prints as ``0.00``, never ``-0.00``: :func:`no_negative_zero`
rewrites finished text (keeping column widths) and :func:`print_text` runs a printer
through it. :class:`HelpFormatter` appends ``(default: …)`` to option help that does not
state its default already, and :func:`uniform_metavars` gives every value-taking
argument an upper-case metavar (``CONFIG``, ``--load LOAD``).
"""

from __future__ import annotations

import argparse
import contextlib
import io
import re
import sys
from collections.abc import Callable
from typing import Any

# a minus sign before a number made only of zeros ("-0", "-0.000", "-0.0 %"), not part
# of a longer number, a word or an exponent
_NEG_ZERO = re.compile(r"(?<![\w.])-(?=0+(?:\.0+)?(?![\d.]|e\d|E\d))")


def no_negative_zero(text: str) -> str:
    """``text`` with the sign of every printed negative zero removed (a space where it pads)."""
    def repl(m: re.Match[str]) -> str:
        before = text[m.start() - 1] if m.start() > 0 else " "
        return " " if before in " \t\n" else ""

    return _NEG_ZERO.sub(repl, text)


def print_text(printer: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
    """Run ``printer`` (which writes to stdout), then write its output without negative zeros."""
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        out = printer(*args, **kwargs)
    sys.stdout.write(no_negative_zero(buf.getvalue()))
    sys.stdout.flush()
    return out


class HelpFormatter(argparse.HelpFormatter):
    """Shows each option's default unless its help already mentions one (or it has none)."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        text = re.sub(r"\(default (?!:)", "(default: ", action.help or "")
        if "default" in text or action.default in (None, False, argparse.SUPPRESS) or not action.option_strings:
            return text
        if isinstance(action, argparse._VersionAction | argparse._HelpAction):
            return text
        return f"{text} (default: %(default)s)" if text else "default: %(default)s"


def uniform_metavars(parser: argparse.ArgumentParser) -> None:
    """Upper-case metavars for every value-taking argument that has neither choices nor one."""
    for action in parser._actions:
        if action.nargs == 0 or action.choices is not None or action.metavar is not None:
            continue
        if isinstance(action, argparse._SubParsersAction):
            continue
        action.metavar = action.dest.upper()
