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
