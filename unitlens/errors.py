"""The one error class of unitlens, and a helper for 'did you mean' messages."""
from __future__ import annotations

import difflib
from collections.abc import Iterable


class UnitlensError(Exception):
    """A problem with the user's input or environment, phrased for the user.

    The CLI prints it as a single ``Error: ...`` line and exits with status 1.
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
