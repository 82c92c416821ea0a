"""The README's notebook example and docs/notebook.ipynb run on a (small) demo run, the notebook in a
real Jupyter kernel (nbclient + ipykernel, test-only dependencies)."""
import os

import pytest
from conftest import ROOT


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """A folder holding `unitlens-demo`, as `unitlens demo --out unitlens-demo` makes it, but small:
    36 swatches, 2 units per layer, 4 synthesis steps."""
    from unitlens import build_demo

    d = tmp_path_factory.mktemp("nb")
    build_demo(d / "unitlens-demo", count=36, units=2, steps=4, log=lambda msg: None)
    return d


def readme_notebook_example() -> str:
    text = (ROOT / "README.md").read_text()
    section = text.split("### In a notebook", 1)[1].split("\n### ", 1)[0]
    return section.split("```python\n", 1)[1].split("```", 1)[0]


def test_readme_notebook_example_runs(demo, monkeypatch):
    import pandas

    code = readme_notebook_example()
    assert 'load_run("unitlens-demo")' in code
    monkeypatch.chdir(demo)
    ns: dict = {}
    exec(compile(code, "README.md", "exec"), ns)  # noqa: S102 (our own README)
    assert ns["crop"].size == tuple(b - a for a, b in zip(ns["unit"].exemplars[0].box[:2], ns["unit"].exemplars[0].box[2:]))
    assert isinstance(ns["table"].frame(), pandas.DataFrame) and len(ns["table"]) == 2
    assert ns["evidence"]["max_activation"] == ns["unit"].summary["synth"][0]["max_activation"]


def test_docs_notebook_runs_in_a_kernel(demo):
    import nbformat
    from nbclient import NotebookClient

    nb = nbformat.read(ROOT / "docs" / "notebook.ipynb", as_version=4)
    env_path = os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])
    os.environ["PYTHONPATH"] = env_path  # the kernel imports this checkout's unitlens
    try:
        NotebookClient(nb, timeout=300, kernel_name="python3", resources={"metadata": {"path": str(demo)}}).execute()
    finally:
        os.environ["PYTHONPATH"] = env_path.split(os.pathsep, 1)[1]
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs]
    assert not [o for o in outputs if o.output_type == "error"]
    html = [o["data"]["text/html"] for o in outputs if "text/html" in o.get("data", {})]
    assert any('class="uv-unit"' in h for h in html), "the unit drew itself"
    assert any("<table" in h and "class_selectivity" in h for h in html), "the table drew itself"
    assert sum("image/png" in o.get("data", {}) for o in outputs) >= 2, "a crop and a synthesised image"
