"""The gateway half runs with numpy + stdlib only, and parses as Python 3.9."""

import ast
import json
import subprocess
import sys
from pathlib import Path

import pytest
import runtime_fixtures as fx

RUNTIME = Path(__file__).resolve().parent.parent / "runtime"
FORBIDDEN = ("torch", "pandas", "typer", "scipy", "sklearn", "matplotlib", "onnx", "dask",
             "pyarrow")

# Runs run.py with an import blocker installed first: any import of a workstation package
# (or of onnxruntime, to prove it is optional, or of ganlet.compile) raises ImportError.
WRAPPER = r"""
import sys, importlib.abc, runpy
BLOCK = set(sys.argv[1].split(","))
class Blocker(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in BLOCK or name.startswith("ganlet.compile"):
            raise ImportError("blocked on the gateway: " + name)
        return None
sys.meta_path.insert(0, Blocker())
for mod in list(sys.modules):
    if mod.split(".")[0] in BLOCK:
        del sys.modules[mod]
run_py = sys.argv[2]
sys.argv = [run_py] + sys.argv[3:]
code = 0
try:
    runpy.run_path(run_py, run_name="__main__")
except SystemExit as exc:
    code = exc.code
import ganlet.runtime
sys.stderr.write("RUNTIME_FROM=" + ganlet.runtime.__file__ + "\n")
sys.stderr.write("LOADED=" + ",".join(sorted({m.split(".")[0] for m in sys.modules})) + "\n")
sys.exit(code)
"""


@pytest.fixture(scope="module")
def bundle_dir(tmp_path_factory):
    return fx.build_bundle(tmp_path_factory.mktemp("iso") / "bundle")


def _run(bundle_dir, *args, cwd):
    block = ",".join(FORBIDDEN + ("onnxruntime",))
    return subprocess.run(
        [sys.executable, "-c", WRAPPER, block, str(bundle_dir / "run.py"), *args],
        capture_output=True, text=True, cwd=cwd, timeout=120,
    )


def test_bundle_streams_without_workstation_packages(bundle_dir, tmp_path):
    fx.write_csv(tmp_path / "in.csv", fx.raw_values(80, anomalies=[(40, 12, 0, 7.0)]))
    p = _run(bundle_dir, "stream", "--input", str(tmp_path / "in.csv"), "--backend", "numpy",
             "--scores-out", str(tmp_path / "s.csv"), "--alert-db", str(tmp_path / "a.db"),
             "--state", str(tmp_path / "st.json"), cwd=tmp_path)
    assert p.returncode == 0, p.stderr
    events = [json.loads(x) for x in p.stdout.splitlines()]
    assert events[0]["backend"] == "numpy"
    assert events[-1]["event"] == "stop" and events[-1]["counters"]["hops"] == (80 - 16) // 4 + 1
    # the code that ran is the copy inside the bundle, not the workstation's package
    origin = [x for x in p.stderr.splitlines() if x.startswith("RUNTIME_FROM=")][0]
    assert origin.split("=", 1)[1].startswith(str(bundle_dir))
    loaded = [x for x in p.stderr.splitlines() if x.startswith("LOADED=")][0].split("=")[1]
    assert not set(loaded.split(",")) & set(FORBIDDEN + ("onnxruntime",))


def test_auto_backend_falls_back_to_numpy_and_check_works(bundle_dir, tmp_path):
    fx.write_csv(tmp_path / "in.csv", fx.raw_values(40))
    p = _run(bundle_dir, "stream", "--input", str(tmp_path / "in.csv"), cwd=tmp_path)
    assert p.returncode == 0, p.stderr
    assert json.loads(p.stdout.splitlines()[0])["backend"] == "numpy"
    c = _run(bundle_dir, "check", cwd=tmp_path)
    assert c.returncode == 0 and "bundle OK" in c.stdout
    o = _run(bundle_dir, "stream", "--input", str(tmp_path / "in.csv"), "--backend",
             "onnxruntime", cwd=tmp_path)
    assert o.returncode == 1 and "onnxruntime package cannot be imported" in o.stderr


@pytest.mark.parametrize("path", sorted(RUNTIME.glob("*.py")), ids=lambda p: p.name)
def test_runtime_source_is_python39_and_imports_nothing_forbidden(path):
    source = path.read_text()
    # reference: CPython's own parser with the 3.9 grammar (ast.parse feature_version)
    tree = ast.parse(source, filename=str(path), feature_version=(3, 9))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            names = [node.module or ""] if node.level == 0 else []
        else:
            continue
        for name in names:
            top = name.split(".")[0]
            assert top not in FORBIDDEN, f"{path.name} imports {name}"
            assert not name.startswith("ganlet.compile"), f"{path.name} imports {name}"
        # onnxruntime only lazily, inside a function, in the scorer
        if "onnxruntime" in names:
            assert path.name == "scorer.py"


def test_onnxruntime_import_is_lazy():
    tree = ast.parse((RUNTIME / "scorer.py").read_text())
    top_level = [n for n in tree.body if isinstance(n, (ast.Import, ast.ImportFrom))]
    assert all("onnxruntime" not in [a.name for a in n.names] for n in top_level)


def test_bench_runs_on_the_gateway_and_compares_with_the_budget(bundle_dir, tmp_path):
    p = _run(bundle_dir, "bench", "--backend", "numpy", "--hops", "20", "--json", cwd=tmp_path)
    assert p.returncode == 0, p.stderr
    report = json.loads(p.stdout)
    m = report["backends"]["numpy"]
    assert {"latency_ms_p50", "latency_ms_p99", "hops_per_s", "cold_start_s", "peak_rss_mb",
            "hop_ms", "ram_mb", "storage_kb", "flops_per_hop"} <= set(m)
    assert m["latency_ms_p50"] <= m["latency_ms_p99"]  # percentiles are ordered
    assert m["cold_start_s"] is not None  # the spawned stream reached its first score
    assert m["onnxruntime"] is False  # blocked in this process
    # flops per hop: 2 x multiply-adds of the matrix products, worked out by hand for the
    # fixture (enc LSTM 3->8, head 8->3; gen LSTM 3->8, head 8->3; window 16)
    per_step = 2 * (32 * (3 + 8) + 8 * 3 + 32 * (3 + 8) + 8 * 3)
    assert m["flops_per_hop"] == per_step * 16
    rows = {r["key"]: r for r in report["comparison"]["numpy"]}
    assert rows["hop_ms"]["budget"] == 50.0 and rows["hop_ms"]["estimate"] == 1.0
    assert rows["hop_ms"]["measured"] == m["latency_ms_p99"]
    assert rows["ram_mb"]["within_budget"] == (m["peak_rss_mb"] <= 256)
    assert rows["flops_per_hop"]["within_budget"] is None  # information only
    # storage: the bundle minus its runtime copy, as the board profile counts it
    core = sum(p.stat().st_size for p in bundle_dir.rglob("*")
               if p.is_file() and "ganlet" not in p.relative_to(bundle_dir).parts[:1])
    assert rows["storage_kb"]["measured"] == pytest.approx(core / 1024.0)
