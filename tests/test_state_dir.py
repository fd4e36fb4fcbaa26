"""The state directory: an older bundle is refused (rollback), and the checkpoint's temp file
can neither be predicted nor redirected by a planted link (issue 12 items 6 and 10)."""

import json
import os
import subprocess
import sys

import pytest
import runtime_fixtures as fx

from ganlet.runtime.checkpoint import load_checkpoint, save_checkpoint
from ganlet.runtime.rollback import RECORD_NAME


@pytest.fixture(scope="module")
def bundles(tmp_path_factory):
    root = tmp_path_factory.mktemp("rollback")
    return {"new": fx.build_bundle(root / "new", onnx_model=False,
                                   created="2024-03-01T00:00:00Z"),
            "old": fx.build_bundle(root / "old", onnx_model=False, seed=1,
                                   created="2024-02-01T00:00:00Z")}


def stream(bundle, state, feed, *extra):
    # --replay: the fixture feeds are recorded history, dated before these bundles were made
    return subprocess.run([sys.executable, str(bundle / "run.py"), "stream", "--input", str(feed),
                           "--state", str(state), "--heartbeat", "0", "--replay", *extra],
                          capture_output=True, text=True, timeout=120)


def test_an_older_bundle_is_refused_unless_allowed(bundles, tmp_path):
    feed = tmp_path / "in.csv"
    fx.write_csv(feed, fx.raw_values(40))
    state_dir = tmp_path / "state"
    state_dir.mkdir()
    first = stream(bundles["new"], state_dir / "state.json", feed)
    assert first.returncode == 0, first.stderr
    record = json.loads((state_dir / RECORD_NAME).read_text())
    assert record["fixture-pump"]["created"] == "2024-03-01T00:00:00Z"

    # the older bundle, with a fresh state file in the same folder: refused, nothing run
    older = stream(bundles["old"], state_dir / "state-old.json", feed)
    assert older.returncode == 1 and older.stdout == ""
    assert "older than the newest one this gateway ran (2024-03-01T00:00:00Z" in older.stderr
    assert "--allow-older" in older.stderr
    check = subprocess.run([sys.executable, str(bundles["old"] / "run.py"), "check", "--state",
                            str(state_dir / "state-old.json")], capture_output=True, text=True)
    assert check.returncode == 1 and "refusing a rollback" in check.stderr

    # the operator means it: allowed once, it becomes the record and runs without the flag
    allowed = stream(bundles["old"], state_dir / "state-old.json", feed, "--allow-older")
    assert allowed.returncode == 0, allowed.stderr
    assert json.loads((state_dir / RECORD_NAME).read_text())["fixture-pump"]["created"] == \
        "2024-02-01T00:00:00Z"
    assert stream(bundles["old"], state_dir / "state-old.json", feed).returncode == 0
    # and the newer one is accepted again (newer than the record)
    assert stream(bundles["new"], state_dir / "state.json", feed).returncode == 0


def test_an_unreadable_record_stops_with_exit_3(bundles, tmp_path):
    feed = tmp_path / "in.csv"
    fx.write_csv(feed, fx.raw_values(40))
    (tmp_path / RECORD_NAME).write_text('{"fixture-pump": {"created": 5}}')
    p = stream(bundles["new"], tmp_path / "state.json", feed)
    assert p.returncode == 3 and "unreadable record of the newest bundles" in p.stderr


def test_checkpoint_temp_file_never_follows_a_planted_link(tmp_path):
    state = tmp_path / "state.json"
    victim = tmp_path / "victim.txt"
    victim.write_text("precious\n")
    # the names the old writer used (".state.json.tmp-PID") for this and nearby pids
    for pid in range(max(1, os.getpid() - 50), os.getpid() + 50):
        os.symlink(victim, tmp_path / f".state.json.tmp-{pid}")
    save_checkpoint(state, "b" * 64, {"detector": {"x": 1}, "sinks": {}})
    assert victim.read_text() == "precious\n"
    assert state.is_file() and not state.is_symlink()
    assert load_checkpoint(state, "b" * 64) == {"detector": {"x": 1}, "sinks": {}}
    leftovers = [p.name for p in tmp_path.iterdir()
                 if p.name.startswith(".state.json.") and not p.is_symlink()]
    assert leftovers == []  # the temp file was renamed into place, nothing left behind


def test_checkpoint_temp_names_are_unpredictable_and_exclusive(tmp_path, monkeypatch):
    import tempfile

    seen = []
    real = tempfile.mkstemp

    def spy(*args, **kwargs):
        fd, name = real(*args, **kwargs)
        seen.append(name)
        return fd, name

    monkeypatch.setattr(tempfile, "mkstemp", spy)
    for _ in range(3):
        save_checkpoint(tmp_path / "s.json", "c" * 64, {"detector": {}, "sinks": {}})
    assert len(set(seen)) == 3  # a new random name every time (tempfile: O_EXCL | O_NOFOLLOW)
    assert all(os.path.dirname(n) == str(tmp_path) for n in seen)  # same folder: atomic rename


def test_a_failed_checkpoint_write_leaves_no_temp_file(tmp_path, monkeypatch):
    def full_disk(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", full_disk)
    with pytest.raises(OSError, match="No space left"):
        save_checkpoint(tmp_path / "s.json", "d" * 64, {"detector": {}, "sinks": {}})
    assert list(tmp_path.iterdir()) == []
