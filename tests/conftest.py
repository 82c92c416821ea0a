import os
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image

torch.set_num_threads(min(2, os.cpu_count() or 1))
ROOT = Path(__file__).resolve().parent.parent
TESTS = Path(__file__).resolve().parent


@pytest.fixture(scope="session")
def smooth_corpus(tmp_path_factory):
    """24 smooth random colour images of assorted sizes, written as PNG and JPEG."""
    d = tmp_path_factory.mktemp("smooth")
    rng = np.random.default_rng(7)
    for i in range(24):
        h, w = int(rng.integers(60, 110)), int(rng.integers(60, 110))
        base = rng.random((h // 8 + 2, w // 8 + 2, 3))
        img = Image.fromarray((base * 255).astype(np.uint8)).resize((w, h), Image.BICUBIC)
        img.save(d / (f"img{i:02d}.png" if i % 2 else f"img{i:02d}.jpg"), quality=95)
    return d


@pytest.fixture(scope="session")
def r18_weights(tmp_path_factory):
    """A seeded torchvision resnet18 state dict, saved like a user's checkpoint."""
    import torchvision

    torch.manual_seed(0)
    m = torchvision.models.resnet18()
    p = tmp_path_factory.mktemp("weights") / "r18.pth"
    torch.save(m.state_dict(), p)
    return p


def chromium_or_skip() -> str:
    """The browser for the pages' checks. Without one the test skips, saying why, or fails where
    UNITLENS_REQUIRE_BROWSER=1 (set by .ci/run), so CI cannot pass by skipping them."""
    import cdp

    path = cdp.find_chromium()
    if path is None:
        why = "no Chromium or Chrome on PATH; the browser checks need one (Debian: apt install chromium)"
        if os.environ.get("UNITLENS_REQUIRE_BROWSER") == "1":
            pytest.fail(f"{why}. UNITLENS_REQUIRE_BROWSER=1 makes a missing browser a failure.")
        pytest.skip(why)
    return path


@pytest.fixture(scope="module")
def browser():
    """A headless Chromium driven over the DevTools protocol (tests/cdp.py)."""
    import cdp

    b = cdp.Browser(chromium_or_skip())
    yield b
    b.close()


def run_cli(*args, check=True, **kw):
    import subprocess

    r = subprocess.run([sys.executable, "-m", "unitlens", *map(str, args)], capture_output=True, text=True,
                       cwd=ROOT, **kw)
    if check and r.returncode != 0:
        raise AssertionError(f"unitlens {' '.join(map(str, args))} failed ({r.returncode}):\n{r.stderr}")
    return r


def cli(capsys, *args) -> tuple[int, str, str]:
    """Run `unitlens ARGS` in this process (imports are paid once; a test can inject a failure):
    (exit code, stdout, stderr)."""
    from unitlens.cli import main

    old = sys.argv
    sys.argv = ["unitlens", *map(str, args)]
    code = 0
    try:
        main()
    except SystemExit as e:
        code = e.code or 0
    finally:
        sys.argv = old
    out, err = capsys.readouterr()
    return code, out, err
