"""Usage errors on the command line: one line on stderr, exit code 2, never a traceback.

Exit code 2 for a usage error is common practice for command-line tools (POSIX utilities and
Python's argparse use it).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]

# (arguments, a word the one line must hold so the user knows what was wrong)
USAGE_ERRORS = [
    (["train"], "LABELS"),
    (["score", "models/line-A", "images"], "--out"),
    (["inspect", "--no-such-option", "x.png"], "--no-such-option"),
    (["score", "models/line-A", "images", "--out", "s.csv", "--jobs", "0"], "--jobs"),
    (["trian"], "trian"),
    (["inspect", "x.png", "--json", "true"], "true"),
]


@pytest.mark.parametrize(("args", "word"), USAGE_ERRORS, ids=[" ".join(a) for a, _ in USAGE_ERRORS])
def test_usage_error_is_one_line_exit_2(tmp_path, args, word):
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(REPO), env.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    result = subprocess.run(
        [sys.executable, "-m", "topoclass", *args],
        cwd=tmp_path, env=env, capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 2, result.stderr
    assert "Traceback" not in result.stderr
    lines = result.stderr.splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("topoclass: error: ")
    assert word in lines[0]
    assert "--help" in lines[0]  # says where to read what the command takes
    assert result.stdout == ""


def test_no_arguments_prints_help(monkeypatch, capsys):
    from topoclass.cli import main

    monkeypatch.setattr(sys, "argv", ["topoclass"])
    main()  # returns normally: exit code 0
    out = capsys.readouterr().out
    assert "Usage: topoclass" in out and "score" in out


# command: (its flags, one option that takes a value)
FLAGS = {"inspect": (["--json"], "--out"), "train": (["--select"], "--model"),
         "score": (["--resume", "--overwrite"], "--out")}


@pytest.mark.parametrize("command", sorted(FLAGS))
def test_help_shows_no_value_placeholder_for_flags(monkeypatch, capsys, command):
    from topoclass.cli import main

    monkeypatch.setattr(sys, "argv", ["topoclass", command, "--help"])
    main()
    out = capsys.readouterr().out
    assert "<bool>" not in out
    heads = {line.split()[0]: line.split()[1] for line in out.splitlines()
             if line.strip().startswith("--")}
    flags, valued = FLAGS[command]
    for flag in [*flags, "--help"]:
        # a flag's help line goes straight from the flag to its description
        assert not heads[flag].startswith("<"), out
    assert heads[valued].startswith("<")  # an option that takes a value still says so


def test_readme_lists_the_columns_of_scores_csv_in_order():
    # The README's column list is documentation a script reads; it must match the code.
    import re

    from topoclass.scoring import score_columns

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    block = readme.split("<!-- columns:start -->")[1].split("<!-- columns:end -->")[0]
    listed = [c.strip() for c in re.sub(r"[`\n]", " ", block).split(",")]
    expected = [c for c in score_columns(["A"]) if c != "p_A"]
    expected.insert(score_columns(["A"]).index("p_A"), "p_<class>…")
    assert listed == expected
