"""The command line's contract: help text and option names; exit 2 with typer's usage line and a hint
to --help for a usage mistake, exit 1 and one `Error:` line (no traceback) for bad input found while
running, exit 130 and one line for Ctrl-C in every command; names from the user's disk printed so
that they cannot drive the terminal."""
import re
import shutil

import pytest

from typer.testing import CliRunner

from conftest import cli, run_cli
from unitlens.cli import app


def _one_error_line(r_code, err, status=1):
    assert r_code == status and "Traceback" not in err, err
    assert err.startswith("Error: ") and err.strip().count("\n") == 0, err


@pytest.fixture(scope="module")
def hostile(tmp_path_factory, smooth_corpus, r18_weights):
    """A corpus whose file names hold terminal escapes and a newline, one of them unreadable; mined."""
    d = tmp_path_factory.mktemp("hostile")
    c = d / "c"
    c.mkdir()
    for p in sorted(smooth_corpus.iterdir())[:6]:
        shutil.copy(p, c / p.name)
    shutil.copy(sorted(smooth_corpus.iterdir())[7], c / "title\x1b]0;owned\x07.png")
    shutil.copy(sorted(smooth_corpus.iterdir())[9], c / "two\nlines.png")
    (c / "clear\x1b[2J.png").write_bytes(b"not an image")
    r = run_cli("mine", "torchvision:resnet18", "--weights", r18_weights, "--size", "32", "--corpus", c,
                "--layers", "layer1:0-1", "--top", "8", "--workers", "0", "--out", d / "run")
    return d / "run", r


def test_file_names_with_control_characters_are_printed_escaped(hostile):
    run, mined = hostile
    shown = run_cli("show", run, "layer1:0")
    for text in (mined.stdout, mined.stderr, shown.stdout):
        assert "\x1b" not in text and "\x07" not in text, text
    assert "Skipped clear\\x1b[2J.png: " in mined.stderr
    assert "title\\x1b]0;owned\\x07.png" in shown.stdout and "two\\nlines.png" in shown.stdout
    assert len([row for row in shown.stdout.splitlines() if row.startswith("    ")]) == 8  # one table row per exemplar


BAD_INPUT = [  # (arguments, what the one line says); FILE: a user's file, CUT: a run whose index.npz was cut short
    (["MINE", "--layers", "layer1", "--out", "FILE"], "notes.txt is a file, not a folder"),
    (["show", "FILE", "layer1:0"], "notes.txt is a file, not a folder"),
    (["show", "CUT", "layer1:0"], "index.npz is damaged"),
    (["label", "FILE", "--tags", "t.csv"], "notes.txt is a file, not a folder"),
    (["MINE", "--layers", "layer3:", "--out", "NEW"], "'layer3:' names no channels"),
    (["MINE", "--layers", "layer3", "--units", "", "--out", "NEW"], "No channels given"),
]


@pytest.mark.parametrize("args, message", BAD_INPUT, ids=[m for _, m in BAD_INPUT])
def test_bad_input_gives_one_error_line(hostile, tmp_path, smooth_corpus, r18_weights, capsys, args, message):
    run, _ = hostile
    a_file = tmp_path / "notes.txt"
    a_file.write_text("a user's notes")
    truncated = tmp_path / "cut"
    shutil.copytree(run, truncated)
    index = truncated / "mine" / "layer1" / "index.npz"
    index.write_bytes(index.read_bytes()[: index.stat().st_size // 2])
    mine = ["mine", "torchvision:resnet18", "--weights", r18_weights, "--size", "32", "--corpus", smooth_corpus,
            "--workers", "0"]
    given = {"FILE": [a_file], "CUT": [truncated], "NEW": [tmp_path / "r"], "MINE": mine}
    code, _, err = cli(capsys, *[x for a in args for x in given.get(a, [a])])
    _one_error_line(code, err)
    assert message in err, (args, err)
    assert a_file.read_text() == "a user's notes" and not (tmp_path / "r").exists()


def test_ctrl_c_in_compare_and_elsewhere_is_one_line_and_status_130(tmp_path, smooth_corpus, r18_weights, capsys,
                                                                     monkeypatch):
    import unitlens._extract
    import unitlens.summary

    def interrupt(*args, **kw):
        raise KeyboardInterrupt

    monkeypatch.setattr(unitlens._extract, "forward_batch", interrupt)
    code, _, err = cli(capsys, "compare", "torchvision:resnet18", "torchvision:resnet18", "--weights-a",
                                 r18_weights, "--weights-b", r18_weights, "--size", "32", "--corpus", smooth_corpus,
                                 "--layers", "layer1", "--workers", "0", "--out", tmp_path / "cmp")
    _one_error_line(code, err, 130)
    assert err.startswith("Error: Interrupted after 0 of 24 images") and "nothing was written" in err
    monkeypatch.setattr(unitlens.summary, "unit_summary", interrupt)
    monkeypatch.setattr(unitlens, "unit_summary", interrupt, raising=False)
    code, _, err = cli(capsys, "show", tmp_path, "layer1:0")
    _one_error_line(code, err, 130)
    assert err.startswith("Error: Interrupted before the command finished")


# (arguments, what the error says); RUN: a folder (so a run folder to the CLI), NEW: a folder not yet
# made, IMG: an image. Every mistake is found before a model loads or a file is written.
MODEL = "torchvision:resnet18"
USAGE = [
    (["synth", MODEL, "--layers", "layer1"], "To synthesise from a model, give --layers and --out"),
    (["synth", "RUN", "--out", "NEW"], "--out apply only when TARGET is a model"),
    (["synth", "RUN", "--basis", "fourier"], "'fourier' is not one of 'spectral', 'pixel'"),
    (["synth", "RUN", "--drive", "sideways"], "'sideways' is not one of 'up', 'down'"),
    (["probe", MODEL, "--image", "IMG"], "With --image, give --layer L"),
    (["probe", MODEL, "layer1:0", "--image", "IMG", "--layer", "layer1"], "With --image, give --layer L"),
    (["probe", "RUN"], "Name the unit as LAYER:CHANNEL"),
    (["probe", MODEL, "layer1:0"], "To probe a model, give --corpus DIR and --out DIR"),
    (["probe", "RUN", "layer1:0", "--weights", "w.pth"], "--weights apply only when TARGET is a model"),
    (["probe", "RUN", "layer1:0", "--ig-rule", "simpson"], "'simpson' is not one of"),
    (["probe", "RUN", "layer1:0", "--baseline", "white"], "'white' is not one of 'black', 'blur'"),
    (["compare", MODEL, MODEL], "Comparing two models writes a folder: give --out DIR"),
    (["compare", "RUN", MODEL, "--size", "32"], "--size apply only when TARGET is a model"),
    (["mine", MODEL, "--corpus", "RUN", "--layers", "layer1", "--out", "NEW", "--labels", "files"], "'files' is not one of"),
    (["mine", MODEL, "--corpus", "RUN", "--layers", "layer1", "--out", "NEW", "--size", "3y"], "--size takes N"),
    (["run", MODEL, "--corpus", "RUN", "--layers", "layer1", "--out", "NEW", "--top", "0"], "'--top'"),
    (["layers", MODEL, "--mean", "a,b,c"], "--mean takes one number per input channel"),
    (["layers", MODEL, "--arch-option", "novalue"], "--arch-option takes key=value"),
    (["mine", MODEL, "--corpus", "RUN", "--layers", "layer1"], "Missing option '--out'"),  # typer's own
    (["link", "RUN", "--layer", "layer1", "--method", "fast"], "'fast' is not one of 'ig', 'gxa'"),
    (["label", "RUN", "--batch-size", "0"], "'--batch-size'"),
]


@pytest.mark.parametrize("args, message", USAGE, ids=[" ".join(a[:1] + a[2:]) for a, _ in USAGE])
def test_usage_mistakes_exit_2_with_a_hint_to_help(tmp_path, capsys, monkeypatch, args, message):
    import unitlens.model

    def no_model(*a, **kw):
        raise AssertionError("a model was loaded before the usage was checked")

    monkeypatch.setattr(unitlens.model, "load_model", no_model)
    given = {"RUN": tmp_path, "NEW": tmp_path / "new", "IMG": tmp_path / "cat.png"}
    code, out, err = cli(capsys, *[given.get(a, a) for a in args])
    assert code == 2 and "Traceback" not in err, err
    assert f"Try 'unitlens {args[0]} --help' for help." in err and err.startswith("Usage: unitlens"), err
    assert message in err, err
    assert out == "" and not (tmp_path / "new").exists()


CTRL_C = [  # (arguments, the call that the interrupt hits)
    (["layers", MODEL], "unitlens.cli._load"),
    (["mine", MODEL, "--corpus", "RUN", "--layers", "layer1", "--out", "NEW"], "unitlens.cli._load"),
    (["run", MODEL, "--corpus", "RUN", "--layers", "layer1", "--out", "NEW"], "unitlens.cli._load"),
    (["synth", MODEL, "--layers", "layer1", "--out", "NEW"], "unitlens.cli._load"),
    (["compare", MODEL, MODEL, "--out", "NEW"], "unitlens.cli._load"),
    (["probe", MODEL, "layer1:0", "--corpus", "RUN", "--out", "NEW"], "unitlens.cli._load"),
    (["show", "RUN", "layer1:0"], "unitlens.unit_summary"),
    (["atlas", "RUN"], "unitlens.render_atlas"),
    (["demo", "--out", "NEW"], "unitlens.build_demo"),
    (["link", "RUN", "--layer", "layer1"], "unitlens.links.link"),
    (["label", "RUN", "--tags", "tags.csv"], "unitlens.store.Run.corpus"),
]


@pytest.mark.parametrize("args, patched", CTRL_C, ids=[a[0] for a, _ in CTRL_C])
def test_ctrl_c_exits_130_with_one_line_in_every_command(tmp_path, capsys, monkeypatch, args, patched):
    def interrupt(*a, **kw):
        raise KeyboardInterrupt

    monkeypatch.setattr(patched, interrupt, raising=False)
    given = {"RUN": tmp_path, "NEW": tmp_path / "new"}
    code, _, err = cli(capsys, *[given.get(a, a) for a in args])
    _one_error_line(code, err, 130)
    assert err.startswith("Error: Interrupted"), err


def test_every_command_is_in_the_ctrl_c_check():
    assert {c.name or c.callback.__name__ for c in app.registered_commands} == set(COMMANDS)
    assert sorted(a[0] for a, _ in CTRL_C) == sorted(COMMANDS)


COMMANDS = ["layers", "mine", "show", "run", "synth", "compare", "atlas", "probe", "demo", "link", "label"]


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
