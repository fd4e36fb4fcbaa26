"""The `ganlet` command's entry point: the standard library only until the workstation half is
there, so a missing `compile` extra is one line that says what to install, not a traceback."""

import sys
from typing import Optional

# Top-level modules of the `compile` extra (pyproject.toml) and of what they pull in.
EXTRA_MODULES = ("torch", "onnx", "onnxruntime", "pandas", "pyarrow", "typer", "click", "rich",
                 "matplotlib", "sklearn", "scipy", "dask", "distributed", "tomli")
INSTALL_HINT = 'pip install "ganlet[compile]"'


def missing_extra(exc: ImportError) -> Optional[str]:
    """The one-line message for an import of the compile extra that failed, else None."""
    name = (getattr(exc, "name", None) or "").split(".")[0]
    if name not in EXTRA_MODULES:
        return None
    return (f"error: the workstation commands need the 'compile' extra ({name} is not "
            f"installed): {INSTALL_HINT}. A gateway needs none of it: a bundle runs with "
            "python3 run.py and numpy.")


def main() -> None:
    try:
        from ganlet.compile.cli import main as cli_main
    except ImportError as exc:
        message = missing_extra(exc)
        if message is None:
            raise
        sys.stderr.write(message + "\n")
        sys.exit(2)
    cli_main()
