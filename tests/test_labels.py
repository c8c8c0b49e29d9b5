"""Label sheets: CSV and class folders, every problem reported at once, fuzzing.

The sheet hash is checked against hashlib's SHA-256 of the file bytes (reference library);
the CSV dialect is the one Python's csv module reads (RFC 4180 quoting).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from topoclass.errors import LabelSheetError
from topoclass.labels import LabelSet, read_labels, write_labels


def _images(root: Path, names) -> list[Path]:
    paths = []
    for name in names:
        path = root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(b"\x89PNG")  # existence is all the label reader checks
        paths.append(path)
    return paths


def _sheet(tmp_path: Path, text: str, name: str = "labels.csv", encoding="utf-8") -> Path:
    path = tmp_path / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(text.encode(encoding))
    return path


def _problems(excinfo) -> tuple[str, ...]:
    return excinfo.value.problems


@pytest.fixture
def scans(tmp_path):
    """Six membrane scans from an anodising line (invented names)."""
    return _images(tmp_path, [f"scans/m{i}.tif" for i in range(6)])


# --------------------------------------------------------------------------- good sheets


def test_reads_csv_with_groups(tmp_path, scans):
    path = _sheet(tmp_path, "image,label,group\n" + "".join(
        f"scans/m{i}.tif,{'ordered' if i < 3 else 'vacancies'},batch{i % 3}\n" for i in range(6)
    ))
    labels = read_labels(path, n_folds=3)
    assert isinstance(labels, LabelSet)
    assert labels.images == tuple(p.resolve() for p in scans)
    assert labels.labels == ("ordered",) * 3 + ("vacancies",) * 3
    assert labels.groups == ("batch0", "batch1", "batch2") * 2
    assert labels.classes == ("ordered", "vacancies")
    assert labels.counts == {"ordered": 3, "vacancies": 3}
    assert len(labels) == 6 and labels.source == path
    # reference: hashlib SHA-256 of the sheet's bytes
    assert labels.sheet_hash == hashlib.sha256(path.read_bytes()).hexdigest()


def test_no_group_column_gives_none(tmp_path, scans):
    path = _sheet(tmp_path, "image,label\nscans/m0.tif,a\nscans/m1.tif,b\n")
    assert read_labels(path).groups is None


def test_bom_crlf_whitespace_case_and_column_order(tmp_path, scans):
    text = ("\ufeff Label , IMAGE \r\n ordered , scans/m0.tif \r\n\r\n"
            "grain boundary,scans/m1.tif\r\n")
    labels = read_labels(_sheet(tmp_path, text))
    assert labels.labels == ("ordered", "grain boundary")
    assert labels.images == (scans[0].resolve(), scans[1].resolve())


def test_absolute_paths_and_quoted_commas(tmp_path):
    (odd,) = _images(tmp_path / "elsewhere", ["pore, dark.png"])
    _images(tmp_path / "sheets", ["b.png"])
    text = f'image,label\n"{odd}",ordered\nb.png,"no order, amorphous"\n'
    labels = read_labels(_sheet(tmp_path / "sheets", text))
    assert labels.images == (odd.resolve(), (tmp_path / "sheets" / "b.png").resolve())
    assert labels.labels == ("ordered", "no order, amorphous")


def test_relative_to_the_sheet_not_the_working_directory(tmp_path, scans, monkeypatch):
    path = _sheet(tmp_path, "image,label\nscans/m0.tif,a\nscans/m1.tif,b\n")
    elsewhere = tmp_path / "cwd"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    assert read_labels(path).images[0] == scans[0].resolve()


def test_sheet_entry_is_relative_with_slashes_or_absolute_outside(tmp_path):
    from topoclass.labels import sheet_entry

    base = tmp_path / "training"
    assert sheet_entry(base / "images" / "m0.tif", base) == "images/m0.tif"
    outside = tmp_path / "other" / "m1.tif"
    assert sheet_entry(outside, base) == outside.as_posix()


def test_semicolon_separated_sheet(tmp_path, scans):
    # Spreadsheet programs in comma-decimal locales write ";" (common practice)
    labels = read_labels(_sheet(tmp_path, "image;label\nscans/m0.tif;a\nscans/m1.tif;b\n"))
    assert labels.labels == ("a", "b")


def test_windows_separators_in_paths(tmp_path, scans):
    labels = read_labels(_sheet(tmp_path, "image,label\nscans\\m0.tif,a\nscans\\m1.tif,b\n"))
    assert labels.images[0] == scans[0].resolve()


def test_check_files_false_skips_existence(tmp_path):
    labels = read_labels(_sheet(tmp_path, "image,label\nx.png,a\ny.png,b\n"), check_files=False)
    assert labels.images[0] == (tmp_path / "x.png").resolve()


def test_folder_per_class(tmp_path):
    root = tmp_path / "sorted"
    _images(root, ["ordered/a.png", "ordered/b.tif", "vacancies/c.png",
                   "vacancies/batch2/d.jpg", "vacancies/notes.txt", ".trash/e.png"])
    labels = read_labels(root)
    assert labels.classes == ("ordered", "vacancies")
    assert labels.counts == {"ordered": 2, "vacancies": 2}
    assert labels.groups is None
    assert [p.relative_to(root.resolve()).as_posix() for p in labels.images] == [
        "ordered/a.png", "ordered/b.tif", "vacancies/batch2/d.jpg", "vacancies/c.png"]
    # the listing hash changes when a file is added and not otherwise
    again = read_labels(root)
    assert again.sheet_hash == labels.sheet_hash
    _images(root, ["ordered/z.png"])
    assert read_labels(root).sheet_hash != labels.sheet_hash


def test_write_then_read_round_trip(tmp_path, scans):
    outside = _images(tmp_path.parent / f"{tmp_path.name}_other", ["far.png"])[0]
    images = [*scans[:4], outside]
    names = ["ordered", "ordered", "vacancies", "vacancies", "no order"]
    groups = ["g1", "g2", "g1", "g2", "g3"]
    sheet = write_labels(tmp_path / "out" / "labels.csv", images, names, groups)
    text = sheet.read_text()
    assert text.splitlines()[0] == "image,label,group"
    assert "../scans/m0.tif" not in text and str(outside) in text  # outside: absolute
    inner = write_labels(tmp_path / "labels.csv", scans[:2], ["a", "b"])
    assert inner.read_text() == "image,label\nscans/m0.tif,a\nscans/m1.tif,b\n"
    back = read_labels(sheet)
    assert back.images == tuple(p.resolve() for p in images)
    assert back.labels == tuple(names) and back.groups == tuple(groups)


def test_write_labels_length_mismatch(tmp_path):
    with pytest.raises(ValueError):
        write_labels(tmp_path / "l.csv", ["a.png"], ["x", "y"])


# --------------------------------------------------------------------------- problems


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("image,label\nscans/m0.tif,a\nscans/none.tif,b\n", "line 3: image"),
        ("image,label\nscans/m0.tif,a\nscans/m0.tif,b\nscans/m1.tif,b\n", "also on line 2"),
        ("image,label\nscans/m0.tif,a\nscans/m1.tif,b\nscans/m1.tif,b\n",
         "line 4: duplicate of line 3"),
        ("image,label\nscans/m0.tif,a\nscans/m1.tif,\n", "line 3: empty label"),
        ("image,label\nscans/m0.tif,a\n,b\n", "line 3: empty image"),
        ("image\nscans/m0.tif\n", "missing required column 'label'"),
        ("image,label,\nscans/m0.tif,a,red\nscans/m1.tif,b,\n", "a column has no name"),
        ("image,label\nscans/m0.tif,a\nscans/m1.tif,a\n", "only one class ('a')"),
        ("image,label,group\nscans/m0.tif,a,g\nscans/m1.tif,b,\n", "line 3: empty group"),
        ("image,label\nscans/m0.tif,a,extra\n", "line 2: 3 cells"),
        ("image,label\nscans/m0.tif,Vacancy\nscans/m1.tif,vacancy\n", "letter case"),
        ("image,label\n", "no image lines"),
        ("", "empty"),
        ("   \r\n\n", "empty"),
        (" , ,\n,\n", "empty"),
        ("image,label\nscans/m0.tif,a\nscans/m1.tif,\"b\n", "not valid CSV"),
        ('image,label\nscans/m0.tif,a\nscans/m1.tif,"b\nc"\n', "line break"),
    ],
)
def test_each_problem_is_named(tmp_path, scans, text, expected):
    path = _sheet(tmp_path, text)
    with pytest.raises(LabelSheetError) as excinfo:
        read_labels(path)
    message = str(excinfo.value)
    assert expected in message
    assert message.startswith(f"{path}: ")
    assert "\n" not in message


def test_misnamed_required_column_is_named(tmp_path, scans):
    with pytest.raises(LabelSheetError) as excinfo:
        read_labels(_sheet(tmp_path, "file,label\nscans/m0.tif,a\n"))
    message = str(excinfo.value)
    assert "missing required column 'image'" in message and "image,label[,group]" in message
    assert "'file' would be kept as notes" in message


def test_other_columns_are_kept_for_the_outputs(tmp_path, scans):
    text = ("image,label,Operator,date\nscans/m0.tif,a,lena,2026-03-02\n"
            "scans/m1.tif,b,,2026-03-03\n")
    labels = read_labels(_sheet(tmp_path, text))
    assert labels.labels == ("a", "b")
    assert labels.extra == {"operator": ("lena", ""), "date": ("2026-03-02", "2026-03-03")}
    with pytest.raises(LabelSheetError, match="'date' appears more than once"):
        read_labels(_sheet(tmp_path, "image,label,date,date\nscans/m0.tif,a,1,2\n"
                           "scans/m1.tif,b,3,4\n"))


def test_not_utf8_says_save_as_utf8(tmp_path, scans):
    path = _sheet(tmp_path, "image,label\nscans/m0.tif,défaut\nscans/m1.tif,b\n",
                  encoding="latin-1")
    with pytest.raises(LabelSheetError, match="save it as UTF-8"):
        read_labels(path)


def test_utf16_sheet_refused_clearly(tmp_path, scans):
    path = _sheet(tmp_path, "image,label\nscans/m0.tif,a\n", encoding="utf-16")
    with pytest.raises(LabelSheetError, match="UTF-8"):
        read_labels(path)


def test_too_few_images_per_class_for_the_folds(tmp_path, scans):
    text = "image,label\n" + "".join(
        f"scans/m{i}.tif,{'a' if i < 4 else 'b'}\n" for i in range(6))
    path = _sheet(tmp_path, text)
    assert read_labels(path, n_folds=2).counts == {"a": 4, "b": 2}
    with pytest.raises(LabelSheetError) as excinfo:
        read_labels(path, n_folds=3)
    (problem,) = _problems(excinfo)
    assert "class 'b' has 2 images, fewer than the 3" in problem
    assert "label 1 more image of 'b', or use --cv 2" in problem


def test_with_two_folds_the_advice_is_to_label_more(tmp_path, scans):
    # Two folds is the least there is: the advice must not be "use fewer folds".
    text = "image,label,group\n" + "".join(
        f"scans/m{i}.tif,{'a' if i < 4 else 'b'},{'m' + str(i) if i < 4 else 'n'}\n"
        for i in range(6))
    with pytest.raises(LabelSheetError) as excinfo:
        read_labels(_sheet(tmp_path, text), n_folds=2)
    (problem,) = _problems(excinfo)
    assert "class 'b' has 1 group, fewer than the 2" in problem
    assert "label images of 1 more sample (groups) of 'b'" in problem
    assert "fewer folds cannot help" in problem and "use --cv" not in problem


def test_too_few_groups_per_class_for_the_folds(tmp_path, scans):
    # class 'a' has 4 images but they come from 2 membranes only
    text = "image,label,group\n" + "".join(
        f"scans/m{i}.tif,{'a' if i < 4 else 'b'},{'m' + str(i % 2) if i < 4 else 'n' + str(i)}\n"
        for i in range(6))
    with pytest.raises(LabelSheetError) as excinfo:
        read_labels(_sheet(tmp_path, text), n_folds=3)
    message = str(excinfo.value)
    assert "class 'a' has 2 groups, fewer than the 3" in message
    assert "class 'b' has 2 groups" in message


def test_n_folds_must_be_at_least_two(tmp_path, scans):
    with pytest.raises(ValueError):
        read_labels(_sheet(tmp_path, "image,label\nscans/m0.tif,a\n"), n_folds=1)


def test_three_problems_reported_at_once(tmp_path, scans):
    text = (
        "image,label\n"
        "scans/m0.tif,ordered\n"
        "scans/missing.tif,ordered\n"  # line 3: missing file
        "scans/m1.tif,\n"  # line 4: empty label
        "scans/m0.tif,ordered\n"  # line 5: duplicate row of line 2
        "scans/m2.tif,vacancies\n"
    )
    path = _sheet(tmp_path, text)
    with pytest.raises(LabelSheetError) as excinfo:
        read_labels(path)
    message = str(excinfo.value)
    assert message.startswith(f"{path}: 3 problems: ")
    problems = _problems(excinfo)
    assert len(problems) == 3
    assert [p.split(":")[0] for p in problems] == ["line 3", "line 4", "line 5"]
    assert message.count("; ") == 2  # details separated by "; "
    assert "\n" not in message


def test_long_problem_lists_are_shortened(tmp_path):
    text = "image,label\n" + "".join(f"gone{i}.png,{'ab'[i % 2]}\n" for i in range(100))
    with pytest.raises(LabelSheetError) as excinfo:
        read_labels(_sheet(tmp_path, text))
    assert len(_problems(excinfo)) == 100
    assert "100 problems" in str(excinfo.value) and "and 75 more" in str(excinfo.value)


def test_missing_source(tmp_path):
    with pytest.raises(LabelSheetError, match="not found") as excinfo:
        read_labels(tmp_path / "nope.csv")
    assert str(tmp_path / "nope.csv") in str(excinfo.value)


def test_folder_problems_all_reported(tmp_path):
    root = tmp_path / "sorted"
    _images(root, ["ordered/a.png", "loose.png"])
    (root / "empty_class").mkdir()
    with pytest.raises(LabelSheetError) as excinfo:
        read_labels(root)
    message = str(excinfo.value)
    assert "3 problems" in message
    assert "loose.png" in message and "'empty_class' holds no images" in message
    assert "only one class ('ordered')" in message


def test_folder_without_class_folders(tmp_path):
    root = tmp_path / "flat"
    root.mkdir()
    with pytest.raises(LabelSheetError, match="no class sub-folders"):
        read_labels(root)


# --------------------------------------------------------------------------- fuzzing

_cells = st.one_of(
    st.sampled_from(["image", "label", "group", "scans/m0.tif", "scans/m1.tif", "a", "b", ""]),
    st.text(max_size=12),
)
_rows = st.lists(st.lists(_cells, max_size=4), max_size=8)
_seps = st.sampled_from([",", ";", "\t", '"'])
_ends = st.sampled_from(["\n", "\r\n", "\r"])
_FUZZ = {"deadline": None, "suppress_health_check": [HealthCheck.function_scoped_fixture]}


@settings(max_examples=200, **_FUZZ)
@given(rows=_rows, sep=_seps, end=_ends, bom=st.booleans(), check=st.booleans())
def test_fuzz_structured_sheets(tmp_path, scans, rows, sep, end, bom, check):
    text = ("\ufeff" if bom else "") + end.join(sep.join(row) for row in rows)
    _read_or_refuse(_sheet(tmp_path, text), check)


@settings(max_examples=150, **_FUZZ)
@given(data=st.binary(max_size=300), check=st.booleans())
def test_fuzz_random_bytes(tmp_path, data, check):
    path = tmp_path / "labels.csv"
    path.write_bytes(data)
    _read_or_refuse(path, check)


def _read_or_refuse(path: Path, check_files: bool) -> None:
    try:
        labels = read_labels(path, n_folds=2 if check_files else None, check_files=check_files)
    except LabelSheetError as exc:
        message = str(exc)
        assert message.startswith(f"{path}: ") and "\n" not in message
        assert len(exc.problems) >= 1
        return
    assert len(labels.images) == len(labels.labels) >= 2
    assert len(labels.classes) >= 2 and all(labels.labels)
    assert len({p.resolve() for p in labels.images}) == len(labels.images)
    if check_files:
        assert all(p.is_file() for p in labels.images)
