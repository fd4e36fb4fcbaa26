"""Board profiles: every shipped board loads, validation says what is wrong, [measured] wins."""

import pytest
import tomllib

from ganlet.compile.boards import (
    BOARDS_DIR,
    DEFAULT_BOARD,
    Board,
    board_table,
    list_boards,
    load_board,
)

GOOD = """
name = "tiny"
description = "test board"
cpu_class = "test-core"
mflops_single_core = 250.0
ram_budget_mb = 32
storage_budget_kb = 100
onnxruntime = false
python = "3.9"
numpy = "1.19"
compute_fraction = 0.05
"""


def _write(tmp_path, text, name="tiny.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def _replace(line_start, new_line):
    lines = [ln for ln in GOOD.splitlines() if not ln.startswith(line_start)]
    return "\n".join(lines + ([new_line] if new_line else [])) + "\n"


def test_boards_dir_is_the_installed_package_data():
    # an editable install maps ganlet.boards onto the repository's boards/ folder
    assert BOARDS_DIR.name == "boards"
    assert (BOARDS_DIR.parent / "pyproject.toml").is_file()


@pytest.mark.parametrize("path", sorted(BOARDS_DIR.glob("*.toml")), ids=lambda p: p.stem)
def test_every_shipped_board_loads_and_matches_the_file(path):
    board = load_board(path.stem)
    # reference: tomllib (Python stdlib TOML 1.0 parser) reads the same file independently
    with open(path, "rb") as f:
        raw = tomllib.load(f)
    assert board.name == path.stem == raw["name"]
    for key in ("ram_budget_mb", "storage_budget_kb", "onnxruntime", "python", "numpy"):
        assert getattr(board, key) == raw[key], key
    assert board.compute_fraction == pytest.approx(raw["compute_fraction"])
    expected = raw.get("measured", {}).get("mflops_single_core", raw["mflops_single_core"])
    assert board.mflops_single_core == pytest.approx(expected)
    assert board.measured == ("measured" in raw)
    assert board.source_path == str(path)
    # loading by path gives the same board
    assert load_board(str(path)) == board


def test_at_least_four_boards_and_the_default_is_the_smallest():
    boards = list_boards()
    names = {b.name for b in boards}
    assert {"a53-512", "a72-2g", "x86-lowpower", "workstation"} <= names
    default = load_board(DEFAULT_BOARD)
    # "if it fits there it fits everywhere": the default is minimal in every budget
    for b in boards:
        assert default.ram_budget_mb <= b.ram_budget_mb
        assert default.storage_budget_kb <= b.storage_budget_kb
        assert default.mflops_single_core <= b.mflops_single_core
        assert default.mflops_single_core * default.compute_fraction <= \
            b.mflops_single_core * b.compute_fraction
    assert default.onnxruntime is False
    assert default.python == "3.9"


@pytest.mark.parametrize("line", ['python = "3.8"', 'numpy = "1.18"'])
def test_board_older_than_the_runtime_needs_is_refused(tmp_path, line):
    # runtime/manifest.py REQUIRES: the gateway runtime is written for Python 3.9, numpy 1.19
    path = _write(tmp_path, _replace(line.split(" ")[0] + " ", line))
    with pytest.raises(ValueError, match="older than the gateway runtime needs"):
        load_board(str(path))


def test_missing_field_is_named(tmp_path):
    path = _write(tmp_path, _replace("ram_budget_mb", None))
    with pytest.raises(ValueError, match="missing field 'ram_budget_mb'"):
        load_board(str(path))


def test_mistyped_field_name_gets_a_suggestion(tmp_path):
    path = _write(tmp_path, _replace("ram_budget_mb", "ram_budget_mib = 32"))
    with pytest.raises(ValueError, match="unknown field 'ram_budget_mib'.*did you mean 'ram_budget_mb'"):
        load_board(str(path))


@pytest.mark.parametrize(
    "line, field",
    [
        ('storage_budget_kb = "lots"', "storage_budget_kb"),
        ("ram_budget_mb = true", "ram_budget_mb"),  # bool is an int subclass; still refused
        ("onnxruntime = 1", "onnxruntime"),
        ("ram_budget_mb = 32.5", "ram_budget_mb"),
        ("python = 3.9", "python"),
        ('mflops_single_core = "fast"', "mflops_single_core"),
    ],
)
def test_wrong_type_is_named(tmp_path, line, field):
    path = _write(tmp_path, _replace(line.split(" ")[0] + " ", line))
    with pytest.raises(ValueError, match=f"field '{field}' must be a"):
        load_board(str(path))


@pytest.mark.parametrize(
    "line", ["storage_budget_kb = -150", "ram_budget_mb = 0", "mflops_single_core = -1.0"]
)
def test_negative_or_zero_budget_is_refused(tmp_path, line):
    field = line.split(" ")[0]
    path = _write(tmp_path, _replace(field + " ", line))
    with pytest.raises(ValueError, match=f"'{field}' must be > 0"):
        load_board(str(path))


def test_compute_fraction_range(tmp_path):
    path = _write(tmp_path, _replace("compute_fraction", "compute_fraction = 1.5"))
    with pytest.raises(ValueError, match="compute_fraction"):
        load_board(str(path))


def test_unknown_name_lists_available_boards():
    with pytest.raises(ValueError) as err:
        load_board("a53-521")
    msg = str(err.value)
    assert "unknown board 'a53-521'" in msg
    assert "did you mean 'a53-512'" in msg.lower()
    for path in BOARDS_DIR.glob("*.toml"):
        assert path.stem in msg


def test_missing_path_is_reported(tmp_path):
    with pytest.raises(ValueError, match="does not exist"):
        load_board(str(tmp_path / "nope.toml"))


def test_invalid_toml_is_reported(tmp_path):
    path = _write(tmp_path, GOOD + "ram_budget_mb = = 3\n")
    with pytest.raises(ValueError, match="not valid TOML"):
        load_board(str(path))


def test_measured_override_wins(tmp_path):
    text = GOOD + '\n[measured]\nmflops_single_core = 412.5\nmeasured_on = "2026-03-01, bench run"\n'
    b = load_board(str(_write(tmp_path, text)))
    assert b.measured is True
    assert b.mflops_single_core == pytest.approx(412.5)
    assert b.mflops_estimate == pytest.approx(250.0)
    assert b.measured_on == "2026-03-01, bench run"
    plain = load_board(str(_write(tmp_path, GOOD, "plain.toml")))
    assert plain.measured is False and plain.mflops_single_core == pytest.approx(250.0)
    table = board_table([b, plain])
    assert "412.5*" in table and "tiny: measured on 2026-03-01" in table


def test_measured_table_is_validated(tmp_path):
    text = GOOD + "\n[measured]\nmflops_single_core = 412.5\n"
    with pytest.raises(ValueError, match=r"\[measured\]: missing field 'measured_on'"):
        load_board(str(_write(tmp_path, text)))


def test_board_table_has_one_row_per_board():
    boards = list_boards()
    table = board_table(boards)
    lines = table.splitlines()
    assert lines[0].split()[0] == "board"
    for b in boards:
        row = next(ln for ln in lines if ln.startswith(b.name))
        assert str(b.ram_budget_mb) in row.split() and str(b.storage_budget_kb) in row.split()
    assert isinstance(boards[0], Board)
