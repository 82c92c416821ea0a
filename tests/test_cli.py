"""The command line's contract: one `Error:` line (no traceback) for bad input and for Ctrl-C, and
names from the user's disk printed so that they cannot drive the terminal."""
import shutil

import pytest

from conftest import cli, run_cli


def _one_error_line(r_code, err, status=1):
    assert r_code == status and "Traceback" not in err, err
    assert err.startswith("Error: ") and err.strip().count("\n") == 0, err


@pytest.fixture(scope="module")
def hostile(tmp_path_factory, smooth_corpus, r18_weights):
    """A corpus whose file names hold terminal escapes and a newline, one of them unreadable; mined."""
    d = tmp_path_factory.mktemp("hostile")
    c = d / "c"
    c.mkdir()
    for i, p in enumerate(sorted(smooth_corpus.iterdir())[:6]):
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
    assert len([l for l in shown.stdout.splitlines() if l.startswith("    ")]) == 8  # one table row per exemplar


BAD_INPUT = [  # (arguments, what the one line says); FILE: a user's file, CUT: a run whose index.npz was cut short
    (["MINE", "--layers", "layer1", "--out", "FILE"], "notes.txt is a file, not a folder"),
    (["show", "FILE", "layer1:0"], "notes.txt is a file, not a folder"),
    (["show", "CUT", "layer1:0"], "index.npz is damaged"),
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
