"""README.md's figures come from script runs: its marked blocks are well formed, each has a
script that writes it, and no speed, size or accuracy figure stands outside a block unless its
sentence cites a benchmark result file. Fast: reads files, runs nothing."""

from __future__ import annotations

import re
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


for _p in (ROOT / "tools", ROOT / "benchmarks"):
    if str(_p) not in sys.path:
        sys.path.insert(0, str(_p))

import readme_blocks as blocks  # noqa: E402
import readme_figures as figures  # noqa: E402

SCRIPTS = sorted(p for folder in ("tools", "docs", "benchmarks")
                 for p in (ROOT / folder).glob("*.py"))
# A block that is a list checked against the code (not a figure) is owned by its test.
CHECKERS = sorted(p for p in (ROOT / "tests").glob("test_*.py") if p.name != Path(__file__).name)


def _writers(name: str, files=SCRIPTS) -> list[Path]:
    """Scripts that name the block: its start marker, or its name as a quoted string."""
    return [p for p in files if f"{name}:start" in (text := p.read_text(encoding="utf-8"))
            or f'"{name}"' in text]


def test_readme_blocks_are_well_formed_and_each_has_a_writer():
    found = blocks.find_blocks(README)
    names = {b.name for b in found}
    # The blocks the issue asks for (walk-through outputs, benchmark sentences, pictures).
    assert {"accuracy", "pictures", "out:train", "out:validate", "out:score", "out:inspect",
            "out:score-rows", "out:demo-time", "out:report-cost", "out:speed"} <= names
    commands = dict(figures.command_blocks(README))  # raises on an out: block nothing fills
    for block in found:
        name = block.name.removeprefix("out:")
        if block.name.startswith("out:"):
            assert name in commands or name in figures.FILLERS, block.name
        else:
            assert _writers(block.name) or _writers(block.name, CHECKERS), \
                f"no script in tools/, docs/ or benchmarks/ writes README block {block.name!r}"
    assert all(c[0].startswith("topoclass ") for c in commands.values())


def test_filled_blocks_name_their_script_and_date():
    for block in blocks.find_blocks(README):
        text = block.text(README)
        if block.name == "out:probability-cap":
            continue  # part of a sentence, computed from the model card of the same run
        if not _writers(block.name) and _writers(block.name, CHECKERS):
            continue  # a list a test checks against the code, not a figure
        assert re.search(r"(tools|docs|benchmarks)/\w+\.py", text), \
            f"README block {block.name!r} does not name the script that wrote it (rerun it)"
        assert re.search(r"\d{4}-\d\d-\d\d", text), \
            f"README block {block.name!r} does not give the date of its run (rerun it)"
    demo_time = [b for b in blocks.find_blocks(README) if b.name == "out:demo-time"][0]
    assert "tools/readme_figures.py" in demo_time.text(README)
    report = [b for b in blocks.find_blocks(README) if b.name == "out:report-cost"][0]
    assert "benchmarks/report.md" in report.text(README)


def test_no_figure_typed_outside_the_blocks():
    loose = blocks.loose_figures(README)
    assert loose == [], ("speed/accuracy figures outside a marked block that cite no "
                         "benchmark file:\n" + "\n".join(loose))


@pytest.mark.parametrize("typed", [
    "The demo takes about 70 s on a 2-core machine.",
    "Scoring is 1.7× faster with two workers.",
    "The page adds 114 kB per image.",
    "It reaches macro-F1 0.95 on real images.",
    "```text\naccuracy 1.000, macro-F1 1.000\n```",
    "Half of them (48%) are unfamiliar.",
])
def test_the_check_catches_a_hand_typed_figure(typed):
    assert blocks.loose_figures(f"Intro.\n\n{typed}\n") != []
    # The same inside a block, or citing the result file, passes.
    assert blocks.loose_figures(f"<!-- x:start -->\n{typed}\n<!-- x:end -->\n") == []


def test_a_sentence_citing_a_benchmark_file_may_quote_it():
    assert blocks.loose_figures("Scoring is 1.7× faster with two workers "
                                "([benchmarks/RESULTS.md](benchmarks/RESULTS.md)).\n") == []
    # ... but only the sentence that cites it.
    assert len(blocks.loose_figures("Scoring is 1.7× faster. See benchmarks/RESULTS.md.\n")) == 1


@pytest.mark.parametrize("setting", [
    "`--jobs 2` runs two workers.", "Images above 100 megapixels are refused.",
    "a 1×1 or constant image", "a random forest with 100 trees", "misorientation above 5°",
])
def test_settings_are_not_figures(setting):
    assert blocks.loose_figures(setting + "\n") == []


@pytest.mark.parametrize("bad, says", [
    ("<!-- a:start -->\nx\n", "never closed"),
    ("x\n<!-- a:end -->\n", "without its start"),
    ("<!-- a:start -->\n<!-- b:start -->\n<!-- b:end -->\n<!-- a:end -->\n", "inside block"),
    ("<!-- a:start -->x<!-- a:end -->\n<!-- a:start -->y<!-- a:end -->\n", "second block"),
    ("text <!-- a:start -->\nx\n<!-- a:end -->\n", "alone on their lines"),
])
def test_malformed_markers_are_refused(bad, says):
    with pytest.raises(blocks.BlockError, match=says):
        blocks.find_blocks(bad)


def test_replace_blocks_rewrites_only_the_named_blocks():
    doc = ("a <!-- n:start -->1<!-- n:end --> b\n<!-- t:start -->\nold\n<!-- t:end -->\n"
           "<!-- u:start -->\nkeep\n<!-- u:end -->\n")
    new = blocks.replace_blocks(doc, {"n": "2", "t": "new\ntext"})
    assert new == ("a <!-- n:start -->2<!-- n:end --> b\n<!-- t:start -->\nnew\ntext\n"
                   "<!-- t:end -->\n<!-- u:start -->\nkeep\n<!-- u:end -->\n")
    with pytest.raises(KeyError, match="no block named v"):
        blocks.replace_blocks(doc, {"v": "x"})


def test_benchmark_metrics_reads_the_goal_rows_the_scripts_write():
    rows = figures.benchmark_metrics(ROOT / "benchmarks" / "report.md")
    assert {"report_vs_score", "detail_kb_per_image"} <= set(rows)
    assert float(rows["report_vs_score"][0]) > 0


def test_every_readme_picture_is_written_by_a_script():
    pictures = re.findall(r"!\[[^\]]*\]\(([^)]+\.png)\)", README)
    assert {"docs/overlay.png", "docs/defects.png", "docs/report.png"} <= set(pictures)
    for picture in pictures:
        assert (ROOT / picture).is_file(), f"README shows {picture}, which is not in the repository"
        name = Path(picture).name
        assert any(name in p.read_text(encoding="utf-8") for p in SCRIPTS), \
            f"no script in tools/, docs/ or benchmarks/ writes {picture}"
    for name in ("overlay.png", "defects.png", "report.png"):  # docs/make_figures.py keeps them
        assert (ROOT / "docs" / name).stat().st_size < 300_000, f"docs/{name} is too large"


def test_commands_come_from_the_bash_fence_right_above_each_block():
    doc = ("```bash\ntopoclass demo\n```\ntext\n\n```bash\ntopoclass train a.csv --model m\n```\n"
           "<!-- out:train:start -->\nold\n<!-- out:train:end -->\n")
    assert figures.command_blocks(doc) == [("train", ["topoclass train a.csv --model m"])]
    with pytest.raises(SystemExit, match="no ```bash fence right above"):
        figures.command_blocks("Some text.\n<!-- out:nothing:start -->\n<!-- out:nothing:end -->\n")


def test_score_rows_come_from_the_csv_the_score_command_wrote(tmp_path):
    demo = tmp_path / "topoclass-demo"
    demo.mkdir()
    rows = ["image,status,message", "production/images/a.png,ok,",
            "production/images/vacancies_002.png,ok,", 'production/images/zz_damaged_transfer.png,'
            'error,"cut off, copy again"', "production/images/zz_not_a_membrane.png,ok,odd"]
    (demo / "b.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    run = figures.WalkThrough(demo, "2026-01-02", "test machine",
                              commands={"score": ["topoclass score m x --out b.csv"]})
    text = figures.FILLERS["score-rows"](run)
    assert text.splitlines()[1:5] == [rows[0], *rows[2:]]  # header and the three, not a.png
    assert "2026-01-02 (test machine)" in text


def test_check_mode_ignores_only_the_stamps():
    run_a = figures.WalkThrough(Path("."), "2026-01-02", "A, load average 1.0", demo_seconds=90)
    run_b = figures.WalkThrough(Path("."), "2026-03-04", "B, load average 9.0", demo_seconds=130)
    a, b = ("```text\nscored 25\n```\n" + r.stamp("out") + "\n" + figures.FILLERS["demo-time"](r)
            for r in (run_a, run_b))
    assert figures._without_stamps(a) == figures._without_stamps(b)
    assert figures._without_stamps(a) != figures._without_stamps(a.replace("25", "24"))
