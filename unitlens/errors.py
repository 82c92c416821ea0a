"""The one error class of unitlens, how the library reports what does not stop it, and a helper for
'did you mean' messages.

The library never prints: a hazard or a loss the user should heed (a pickled module, a crop that
could not be cut) is a UnitlensWarning through `warnings`; a note about the data (a skipped file,
statistics recomputed) goes to the `unitlens` logger at WARNING. The CLI decides how both are printed
(cli.report_to_stderr); a notebook shows them as it shows any warning or log record.
"""
from __future__ import annotations

import difflib
import logging
from collections.abc import Iterable


class UnitlensError(Exception):
    """A problem with the user's input or environment, phrased for the user.

    The CLI prints it as a single ``Error: ...`` line and exits with `status`: 1, or 130 (128 + SIGINT,
    the shell's convention) when the user interrupted the command.
    """

    def __init__(self, message: str, status: int = 1):
        super().__init__(message)
        self.status = status


log = logging.getLogger("unitlens")


def interrupted(message: str) -> UnitlensError:
    """The error for Ctrl-C: `message` says how far the command got and what was kept."""
    return UnitlensError(f"Interrupted {message}", status=130)


class UnitlensWarning(UserWarning):
    """Something the user should know that does not stop the work (e.g. random weights).

    The library issues it through `warnings` (shown once per distinct message by default); the
    CLI prints it as one ``Warning: ...`` line.
    """


def closest(name: str, choices: Iterable[str], n: int = 3) -> list[str]:
    """Up to ``n`` entries of ``choices`` that look most like ``name``."""
    choices = list(choices)
    found = difflib.get_close_matches(name, choices, n=n, cutoff=0.4)
    if not found:  # fall back to shared prefixes, e.g. 'layer' -> layer1..layer4
        found = [c for c in choices if c.startswith(name[:3])][:n]
    return found


def shown(text: str) -> str:
    r"""`text` safe to print on a terminal: control characters (escape sequences, newlines) and other
    unprintable ones written as Python escapes, e.g. 'a\x1b[2Jb.png' -> 'a\\x1b[2Jb.png'."""
    text = str(text)
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else c.encode("unicode_escape", "backslashreplace").decode("ascii")
                   for c in text)
