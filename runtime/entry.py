"""The bundle's entry point, `run.py`: the one file a gateway runs.

It puts the bundle's own copy of ganlet.runtime first on the path (so an installed ganlet of
another version never shadows it) and hands over to the gateway command line. The packer writes
RUN_PY verbatim; its SHA-256 is listed in the manifest like every other file.
"""

RUN_PY = '''#!/usr/bin/env python3
"""Run this bundle: python3 run.py check | stream | bench (see INSTALL.txt)."""
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))  # the runtime copy inside this bundle comes first

from ganlet.runtime.cli import main  # noqa: E402

if __name__ == "__main__":
    sys.exit(main(bundle_dir=HERE))
'''
