"""unitlens: what do the channels of a convolutional network respond to?

The library front door; the `unitlens` command calls exactly these. Names load on first use, so
`unitlens --help` does not wait for torch.
"""
__version__ = "0.1.0"

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
    "compare": "comparison",
    "CompareConfig": "comparison",
    "render_atlas": "atlas",
    "run_all": "workflow",
    "build_demo": "demo.build",
}
__all__ = [*_EXPORTS, "__version__"]


def __getattr__(name):
    if name in _EXPORTS:
        import importlib

        value = getattr(importlib.import_module(f".{_EXPORTS[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'unitlens' has no attribute {name!r}")
