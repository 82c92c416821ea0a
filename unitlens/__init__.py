"""unitlens: what do the channels of a convolutional network respond to?

The library front door; the `unitlens` command calls exactly these. Names load on first use, so
`unitlens --help` does not wait for torch.
"""
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
__all__ = [*_EXPORTS, "__version__"]


__getattr__ = lazy_exports(__name__, _EXPORTS, globals())
