"""ganlet: train a small adversarial LSTM anomaly detector on a workstation, run it on a gateway.

ganlet.runtime   the gateway half (numpy + the standard library)
ganlet.compile   the workstation half (the `compile` extra: torch, pandas, typer, ...)
ganlet.command   the `ganlet` command's entry, light enough to say which extra is missing
`python -m ganlet` is the `ganlet` command.

This folder (command/ in the source tree) is the package `ganlet` itself (pyproject.toml maps
it); it holds nothing the gateway needs: a bundle carries its own empty ganlet/__init__.py.
"""
