"""The bundle's entry point, `run.py`: the one file a gateway runs.

run.py is standard library only until the bundle is checked. In order, it
  1. takes its own folder off sys.path (`python3 run.py` puts it first, so a planted json.py
     there would shadow the standard module) and stops Python writing bytecode;
  2. reads manifest.json and runs trust.py's checks: signatures under the operator's keys,
     paths confined to the folder, no links, no bytecode, no unlisted code, the SHA-256 of every
     code file (the text of runtime/trust.py is copied into run.py, so nothing of the bundle is
     imported to do this);
  3. imports the runtime copy from the checked folder only (the package is bound to
     BUNDLE/ganlet; the bundle root never goes on sys.path) and hands over to the command line,
     which verifies the rest (data files, schema) through load_bundle.
`--bundle DIR` checks and runs another folder, so a run.py installed once outside any bundle can
vouch for bundles copied later (INSTALL.txt). The packer writes RUN_PY verbatim; its SHA-256 is
listed in the manifest like every other file.
"""

from pathlib import Path

_HEAD = '''#!/usr/bin/env python3
"""Run this bundle: python3 -I -B run.py check | stream | bench (see INSTALL.txt).

Nothing of the bundle is imported before it is checked; the checks below are a copy of
ganlet/runtime/trust.py (standard library only)."""
import os
import sys

HERE = os.path.dirname(os.path.realpath(__file__))
# `python3 run.py` puts this folder first on sys.path: take it off before any other import.
sys.path[:] = [p for p in sys.path if os.path.realpath(p or ".") != HERE]
sys.dont_write_bytecode = True  # never leave (or later trust) bytecode in the bundle

# ---------------------------------------------------------------- copy of runtime/trust.py
'''

_MAIN = '''
# ---------------------------------------------------------------- end of the copy
def _trust_options(argv):
    import argparse

    p = argparse.ArgumentParser(add_help=False, allow_abbrev=False)
    for name in ("--bundle", "--key", "--public-key"):
        p.add_argument(name)
    for name in ("--require-signature", "--skip-signature"):
        p.add_argument(name, action="store_true")
    return p.parse_known_args(argv)[0]


def _import_runtime(bundle_dir):
    """Bind the package `ganlet` to the checked folder BUNDLE/ganlet, nothing else."""
    import importlib.util

    for name in [m for m in sys.modules if m == "ganlet" or m.startswith("ganlet.")]:
        del sys.modules[name]  # an installed ganlet must not stand in for the checked copy
    pkg = os.path.join(bundle_dir, "ganlet")
    spec = importlib.util.spec_from_file_location(
        "ganlet", os.path.join(pkg, "__init__.py"), submodule_search_locations=[pkg])
    module = importlib.util.module_from_spec(spec)
    sys.modules["ganlet"] = module
    spec.loader.exec_module(module)
    from ganlet.runtime.cli import main as cli_main

    return cli_main


def run(argv):
    opts = _trust_options(argv)
    bundle_dir = os.path.realpath(opts.bundle or HERE)
    try:
        raw, manifest = read_manifest(bundle_dir)
        verify_trust(Path(bundle_dir), raw, manifest, read_keys(opts.key, opts.public_key),
                     opts.require_signature, opts.skip_signature)
    except (BundleError, OSError) as exc:
        sys.stderr.write("bundle refused: {}\\n".format(exc))
        return 1
    return _import_runtime(bundle_dir)(argv, bundle_dir=bundle_dir)


if __name__ == "__main__":
    sys.exit(run(sys.argv[1:]))
'''


def _trust_source() -> str:
    return (Path(__file__).resolve().parent / "trust.py").read_text(encoding="utf-8")


RUN_PY = _HEAD + _trust_source() + _MAIN
