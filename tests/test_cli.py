"""The command line itself: help text, option names, warnings."""
import re

import pytest
from typer.testing import CliRunner

from unitlens.cli import app

COMMANDS = ["layers", "mine", "show", "run", "synth", "compare", "atlas", "probe", "demo"]


def _help(command: str) -> str:
    r = CliRunner().invoke(app, [command, "--help"], env={"COLUMNS": "240", "NO_COLOR": "1", "TERM": "dumb"})
    assert r.exit_code == 0, r.output
    return r.output


@pytest.mark.parametrize("command", COMMANDS)
def test_help_shows_no_python_types_after_flags_or_lists(command):
    text = _help(command)
    assert "--help" in text
    for bad in ("<bool>", "<list[", "list[str]"):
        assert bad not in text, f"{command} --help shows {bad}"


def _options(command: str) -> set[str]:
    return set(re.findall(r"(--[a-z][a-z0-9-]*)", _help(command)))


def test_size_means_the_network_input_everywhere():
    synth = _options("synth")
    assert "--synth-size" in synth  # the synthesised image's side
    assert "Input size" in _help("synth").split("--size", 1)[1][:200]
    for command in ("run", "probe"):
        assert "--synth-size" in _options(command)


def test_compare_takes_architecture_options():
    assert "--arch-option" in _options("compare")


def test_compare_passes_architecture_options_to_both_models(tmp_path):
    from conftest import run_cli

    r = run_cli("compare", "torchvision:resnet18", "torchvision:resnet18", "--arch-option", "no_such_option=1",
                "--corpus", tmp_path, "--out", tmp_path / "cmp", check=False)
    # the option reached the constructor (before the corpus was opened), which refused it by name
    assert r.returncode == 1 and "Bad architecture option for resnet18" in r.stderr and "no_such_option" in r.stderr


def test_layers_table_explains_global_pools_and_fields_wider_than_the_input():
    from conftest import ROOT, run_cli

    spec = f"{ROOT / 'unitlens' / 'demo' / 'net.py'}:swatch_net"
    rows = {line.split()[0]: line for line in run_cli("layers", spec, "--size", "16").stdout.splitlines() if line.strip()}
    # AdaptiveAvgPool2d(1): every output value averages the whole input (geometry gives stride 0)
    pool = rows["pool"].split()
    assert pool[2:5] == ["global", "-", "-"], rows["pool"]
    # block4 ends four 3x3 convs of strides 1, 2, 2, 2: field 1 + 2 * (1 + 1 + 2 + 4) = 17 px > 16 px
    assert rows["block4"].split()[2] == "17*"
    assert rows["block1"].split()[2] == "3"  # one 3x3 conv: 3 px, inside the 16 px input
    notes = run_cli("layers", spec, "--size", "16").stdout
    assert "* wider than the 16 px input" in notes and "global:" in notes
