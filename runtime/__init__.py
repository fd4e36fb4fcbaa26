"""ganlet.runtime: what runs on the gateway. numpy + the standard library (+ onnxruntime if present).

Python 3.9 syntax. Never imports torch, pandas, typer or ganlet.compile.
"""

__version__ = "0.1.0"
