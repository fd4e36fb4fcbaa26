"""Board profiles: what a target gateway can hold and compute, read from boards/*.toml.

A board is data, not code. The sizer (distillation) and the packer read a Board to decide how
big a student may be and whether a bundle fits; `ganlet budgets` prints `board_table`; the
board's Python and numpy must be ones the gateway runtime is written for.
Schema: see "## Board profiles" in DEVELOPERS.md.
"""

from __future__ import annotations

import difflib
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Dict, List, Sequence, Tuple

try:
    import tomllib
except ModuleNotFoundError:   # Python < 3.11
    import tomli as tomllib

import ganlet.boards as boards_pkg
from ganlet.runtime.manifest import REQUIRES, version_tuple

# The shipped profiles: the repository's boards/ folder, installed as package data
# (ganlet.boards) by a regular or an editable install alike.
BOARDS_DIR = Path(boards_pkg.__file__).resolve().parent
DEFAULT_BOARD = "a53-512"  # the smallest: if it fits there it fits everywhere

_NUMBER = (int, float)
# field -> (accepted types, type name for messages); every field is required.
_FIELDS: Dict[str, Tuple[tuple, str]] = {
    "name": ((str,), "string"),
    "description": ((str,), "string"),
    "cpu_class": ((str,), "string"),
    "mflops_single_core": (_NUMBER, "number"),
    "ram_budget_mb": ((int,), "integer"),
    "storage_budget_kb": ((int,), "integer"),
    "onnxruntime": ((bool,), "boolean (true/false)"),
    "python": ((str,), 'string like "3.9"'),
    "numpy": ((str,), 'string like "1.19"'),
    "compute_fraction": (_NUMBER, "number"),
}
_POSITIVE = ("mflops_single_core", "ram_budget_mb", "storage_budget_kb")
_MEASURED: Dict[str, Tuple[tuple, str]] = {
    "mflops_single_core": (_NUMBER, "number"),
    "measured_on": ((str,), "string"),
}
_NAME_RE = re.compile(r"^[a-z0-9][a-z0-9-]*$")
_VERSION_RE = re.compile(r"^\d+\.\d+$")


@dataclass(frozen=True)
class Board:
    name: str
    description: str
    cpu_class: str
    mflops_single_core: float  # the [measured] value when present, else the estimate
    ram_budget_mb: int
    storage_budget_kb: int
    onnxruntime: bool
    python: str
    numpy: str
    compute_fraction: float
    source_path: str
    measured: bool
    measured_on: str = ""
    mflops_estimate: float = 0.0  # the top-level estimate, kept for display


def _available() -> List[str]:
    return sorted(p.stem for p in BOARDS_DIR.glob("*.toml")) if BOARDS_DIR.is_dir() else []


def _check_table(table: Dict[str, Any], spec: Dict[str, Tuple[tuple, str]], where: str) -> None:
    for key in table:
        if key not in spec and not isinstance(table[key], dict):
            close = difflib.get_close_matches(key, list(spec), n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise ValueError(f"{where}: unknown field '{key}'{hint}; known fields: {', '.join(spec)}")
    for key, (types, tname) in spec.items():
        if key not in table:
            raise ValueError(f"{where}: missing field '{key}' ({tname}); add it to the file")
        value = table[key]
        # bool is a subclass of int in Python; a TOML true is never a count or a budget.
        if (isinstance(value, bool) and bool not in types) or not isinstance(value, types):
            raise ValueError(
                f"{where}: field '{key}' must be a {tname}, got {type(value).__name__} {value!r}"
            )


def _board_from_dict(raw: Dict[str, Any], source: Path) -> Board:
    where = str(source)
    extra = [k for k, v in raw.items() if isinstance(v, dict) and k != "measured"]
    if extra:
        raise ValueError(f"{where}: unknown table [{extra[0]}]; only [measured] is allowed")
    _check_table(raw, _FIELDS, where)
    for key in _POSITIVE:
        if raw[key] <= 0:
            raise ValueError(f"{where}: field '{key}' must be > 0, got {raw[key]!r}")
    if not 0 < raw["compute_fraction"] <= 1:
        raise ValueError(f"{where}: compute_fraction must be in (0, 1], got {raw['compute_fraction']!r}")
    if not _NAME_RE.match(raw["name"]):
        raise ValueError(f"{where}: name {raw['name']!r} must be lower-case letters, digits and '-'")
    for key in ("python", "numpy"):
        if not _VERSION_RE.match(raw[key]):
            raise ValueError(f"{where}: {key} must look like \"3.9\" (major.minor), got {raw[key]!r}")
        if version_tuple(raw[key]) < version_tuple(REQUIRES[key]):
            raise ValueError(f"{where}: {key} {raw[key]} is older than the gateway runtime "
                             f"needs ({REQUIRES[key]}); such a board cannot run a bundle")

    estimate = float(raw["mflops_single_core"])
    mflops, measured, measured_on = estimate, False, ""
    if "measured" in raw:
        m = raw["measured"]
        _check_table(m, _MEASURED, f"{where} [measured]")
        if m["mflops_single_core"] <= 0:
            raise ValueError(f"{where} [measured]: mflops_single_core must be > 0")
        mflops, measured, measured_on = float(m["mflops_single_core"]), True, m["measured_on"]

    return Board(
        name=raw["name"],
        description=raw["description"],
        cpu_class=raw["cpu_class"],
        mflops_single_core=mflops,
        ram_budget_mb=raw["ram_budget_mb"],
        storage_budget_kb=raw["storage_budget_kb"],
        onnxruntime=raw["onnxruntime"],
        python=raw["python"],
        numpy=raw["numpy"],
        compute_fraction=float(raw["compute_fraction"]),
        source_path=str(source),
        measured=measured,
        measured_on=measured_on,
        mflops_estimate=estimate,
    )


def _read(path: Path) -> Board:
    try:
        with open(path, "rb") as f:
            raw = tomllib.load(f)
    except tomllib.TOMLDecodeError as exc:
        raise ValueError(f"{path}: not valid TOML ({exc})") from exc
    return _board_from_dict(raw, path)


def load_board(name_or_path: str) -> Board:
    """A board by name (a file in BOARDS_DIR) or by path to a .toml file."""
    text = str(name_or_path)
    path = Path(text)
    if text.endswith(".toml") or path.parent != Path("."):
        if not path.is_file():
            raise ValueError(f"board file {path} does not exist; give a board name or a .toml path")
        return _read(path)
    candidate = BOARDS_DIR / f"{text}.toml"
    if not candidate.is_file():
        names = _available()
        close = difflib.get_close_matches(text, names, n=1)
        hint = f" Did you mean '{close[0]}'?" if close else ""
        raise ValueError(
            f"unknown board '{text}'.{hint} Available boards: {', '.join(names) or '(none)'} "
            f"(in {BOARDS_DIR}); or pass a path to your own .toml profile."
        )
    board = _read(candidate)
    if board.name != text:
        raise ValueError(f"{candidate}: name = {board.name!r} must match the file name {text!r}")
    return board


def list_boards() -> List[Board]:
    """Every shipped board, smallest RAM budget first."""
    boards = [load_board(n) for n in _available()]
    return sorted(boards, key=lambda b: (b.ram_budget_mb, b.storage_budget_kb, b.name))


def board_table(boards: Sequence[Board]) -> str:
    """Plain-text table, one row per board; '*' marks a measured MFLOP/s figure."""
    header = ("board", "cpu class", "MFLOP/s", "RAM MB", "flash kB", "onnxruntime",
              "python", "numpy", "compute")
    rows = [header]
    for b in boards:
        rows.append((
            b.name + (" (default)" if b.name == DEFAULT_BOARD else ""),
            b.cpu_class,
            f"{b.mflops_single_core:g}" + ("*" if b.measured else ""),
            str(b.ram_budget_mb),
            str(b.storage_budget_kb),
            "yes" if b.onnxruntime else "no",
            b.python,
            b.numpy,
            f"{b.compute_fraction:.0%}",
        ))
    widths = [max(len(r[i]) for r in rows) for i in range(len(header))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    notes = [f"* {b.name}: measured on {b.measured_on}" for b in boards if b.measured]
    if len(notes) < len(boards):
        notes.append("MFLOP/s without '*' are estimates from memory; a bench run measures them.")
    notes.append("compute = share of the data's sample period the detector may spend per hop.")
    return "\n".join(lines + [""] + notes)
