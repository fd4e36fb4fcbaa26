"""Fleet: many assets on a Dask LocalCluster; a broken asset never stops the others; a rerun
skips unchanged assets."""

from __future__ import annotations

import csv
import json

import numpy as np
import pandas as pd
import pytest
from synthetic import correlated_series, inject

from ganlet.compile import fleet

FLEET_TOML = """
[fleet]
name = "test fleet (invented)"
out = "out"
board = "workstation"

[train]
window = 16
adversarial_epochs = 1
inversion_epochs = 3
encoder_hidden = [8]
generator_hidden = [4, 8]
max_train_windows = 300
train_until = 0.7

[distil]
epochs = 2
max_real_windows = 300

[[asset]]
id = "alpha"
data = "alpha.csv"
labels = "anomaly"

[[asset]]
id = "bravo"
data = "bravo.csv"
rate = ["temp"]

[[asset]]
id = "broken"
data = "broken.csv"
channels = ["flow", "power", "temp"]
"""


@pytest.fixture(scope="module")
def fleet_dir(tmp_path_factory):
    root = tmp_path_factory.mktemp("fleet")
    alpha, labels = inject(correlated_series(900, seed=1), start=630, seed=5)
    alpha.assign(anomaly=labels.astype(int)).to_csv(root / "alpha.csv", index=False)
    bravo = correlated_series(900, seed=2)
    bravo.iloc[[100, 101]] = bravo.iloc[[101, 100]].to_numpy()   # intake warns: out of order
    bravo.to_csv(root / "bravo.csv", index=False)
    broken = correlated_series(900, seed=3)
    broken["power"] = 4.2          # a constant channel it names: intake refuses it, naming it
    broken.to_csv(root / "broken.csv", index=False)
    (root / "fleet.toml").write_text(FLEET_TOML)
    return root


def test_fleet_on_two_worker_processes_then_rerun_skips_unchanged(fleet_dir, capfd):
    spec = fleet.load_fleet(fleet_dir / "fleet.toml")
    seen = []
    first = fleet.run_fleet(spec, workers=2, on_result=lambda r, k, n: seen.append((r.asset, k, n)))
    by_id = {r.asset: r for r in first}
    # a worker's warning comes back with its asset, as one clean line, not as raw
    # `path:line: UserWarning` lines on the workers' stderr (captured here at the fd level,
    # which the worker processes inherit)
    lines = fleet.warning_lines(by_id["bravo"])
    assert "warning: bravo: 1 rows were out of time order; sorted them" in lines, lines
    assert all("\n" not in line for r in first for line in fleet.warning_lines(r))
    assert not any("out of time order" in w for w in by_id["alpha"].warnings)
    assert "UserWarning" not in capfd.readouterr().err
    assert [r.asset for r in first] == ["alpha", "bravo", "broken"]
    assert sorted(k for _, k, _ in seen) == [1, 2, 3] and all(n == 3 for *_, n in seen)
    assert by_id["alpha"].status == by_id["bravo"].status == "ok", by_id
    assert by_id["broken"].status == "failed"
    assert "power" in by_id["broken"].reason and "constant" in by_id["broken"].reason
    for asset in ("alpha", "bravo"):
        r = by_id[asset]
        assert r.parity == "pass", json.loads((fleet_dir / "out" / asset / "verify.json").read_text())
        assert r.bundle_kb and r.bundle_kb > 0
        manifest = json.loads((fleet_dir / "out" / asset / "bundle" / "manifest.json").read_text())
        assert manifest["scaler"]["features"][2] == ("rate" if asset == "bravo" else "level")
    # alpha's incidents come from its data file's `anomaly` column (reference: pandas reads
    # the labelled rows the detection report counts)
    judged = json.loads((fleet_dir / "out" / "alpha" / "evaluate.json").read_text())
    labelled = int(pd.read_csv(fleet_dir / "alpha.csv")["anomaly"].iloc[630:].sum())
    assert by_id["alpha"].f1 is not None and by_id["bravo"].f1 is None
    assert judged["anomalous_points"] == labelled > 0
    assert any("column 'anomaly'" in note for note in judged["notes"])

    summary = fleet.write_summary(first, spec.out / "fleet_summary.csv")
    with open(summary, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [row["asset"] for row in rows] == ["alpha", "bravo", "broken"]
    assert set(rows[0]) == set(fleet.SUMMARY_COLUMNS)

    # Rerun: the two good assets are unchanged and skipped; the broken one is tried again.
    second = {r.asset: r for r in fleet.run_fleet(fleet.load_fleet(fleet_dir / "fleet.toml"),
                                                 workers=2)}
    assert second["alpha"].status == second["bravo"].status == "skipped"
    assert "unchanged" in second["alpha"].reason
    assert second["alpha"].parity == "pass"
    assert second["broken"].status == "failed"


def test_a_changed_data_file_is_not_skipped(fleet_dir):
    spec = fleet.load_fleet(fleet_dir / "fleet.toml")
    alpha = next(a for a in spec.assets if a.id == "alpha")
    before = fleet.input_hash(alpha, spec)
    df = correlated_series(900, seed=1)
    df.loc[10, "flow"] += np.float64(0.5)
    changed = fleet_dir / "alpha-changed.csv"
    df.to_csv(changed, index=False)
    alpha.data = str(changed)
    assert fleet.input_hash(alpha, spec) != before


@pytest.mark.parametrize("text, message", [
    ("[fleet]\n", "no [[asset]]"),
    ("[[asset]]\nid = 'a'\n", "needs 'id' and 'data'"),
    ("[[asset]]\nid = 'a b'\ndata = 'x.csv'\n", "letters, digits"),
    ("[[asset]]\nid = 'a'\ndata = 'x.csv'\n[[asset]]\nid = 'a'\ndata = 'y.csv'\n", "used twice"),
    ("[train]\nwindw = 3\n[[asset]]\nid = 'a'\ndata = 'x.csv'\n", "unknown key"),
    ("[[asset]]\nid = 'a'\ndata = 'x.csv'\nincidents = 'i.csv'\nlabels = 'anomaly'\n",
     "not both"),
])
def test_fleet_file_errors_say_what_is_wrong(tmp_path, text, message):
    path = tmp_path / "f.toml"
    path.write_text(text)
    with pytest.raises(fleet.FleetError, match=message.replace("[", r"\[")):
        fleet.load_fleet(path)
