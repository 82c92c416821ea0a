"""unitlens: what do the channels of a convolutional network respond to?

The library front door; the `unitlens` command calls exactly these. Names load on first use, so
`unitlens --help` does not wait for torch.
"""
from __future__ import annotations

from typing import TYPE_CHECKING

__version__ = "0.1.0"

from ._lazy import lazy_exports

_EXPORTS = {
    "UnitlensError": "errors",
    "load_model": "model",
    "open_corpus": "corpus",
    "parse_layers": "units",
    "mine": "mining",
    "MineConfig": "mining",
    "unit_summary": "summary",
    "load_run": "runview",
    "synthesize": "synth",
    "SynthConfig": "synth",
    "Goal": "synth",
    "compare": "comparison",
    "CompareConfig": "comparison",
    "render_atlas": "atlas",
    "run_all": "workflow",
    "build_demo": "demo.build",
    "probe": "probing",
    "probe_image": "probing",
    "ProbeConfig": "probing",
}
# spelled out (not built from _EXPORTS) so that type checkers read it; tests/test_runview.py holds them equal
__all__ = [
    "CompareConfig",
    "Goal",
    "MineConfig",
    "ProbeConfig",
    "SynthConfig",
    "UnitlensError",
    "__version__",
    "build_demo",
    "compare",
    "load_model",
    "load_run",
    "mine",
    "open_corpus",
    "parse_layers",
    "probe",
    "probe_image",
    "render_atlas",
    "run_all",
    "synthesize",
    "unit_summary",
]

if TYPE_CHECKING:  # what type checkers and editors see; at run time the names load on first use
    from .atlas import render_atlas
    from .comparison import CompareConfig, compare
    from .corpus import open_corpus
    from .demo.build import build_demo
    from .errors import UnitlensError
    from .mining import MineConfig, mine
    from .model import load_model
    from .probing import ProbeConfig, probe, probe_image
    from .runview import load_run
    from .summary import unit_summary
    from .synth import Goal, SynthConfig, synthesize
    from .units import parse_layers
    from .workflow import run_all

__getattr__ = lazy_exports(__name__, _EXPORTS, globals())


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__})
