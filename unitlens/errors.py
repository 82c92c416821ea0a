"""The one error class of unitlens, its warning class, and a helper for 'did you mean' messages."""
from __future__ import annotations

import difflib
from collections.abc import Iterable


class UnitlensError(Exception):
    """A problem with the user's input or environment, phrased for the user.

    The CLI prints it as a single ``Error: ...`` line and exits with status 1.
    """


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
