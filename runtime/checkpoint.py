"""The service's checkpoint file: one JSON document, replaced atomically.

Write path: temp file in the same directory -> write -> flush -> fsync -> os.replace over the
old file -> fsync the directory. The temp file is created exclusively under an unpredictable
name (tempfile.mkstemp: O_CREAT | O_EXCL | O_NOFOLLOW, mode 0600), so a link planted in the
state directory is never followed, and it is removed when the write fails (a full disk). A power cut at any point leaves either the old checkpoint or
the new one, never a torn file (os.replace is atomic on POSIX within one file system; the
directory fsync makes the rename itself durable).

The checkpoint is tagged with the bundle id: state from another model is refused, because its
ring contents, threshold and alert state mean nothing to this one.
"""

import json
import os
import tempfile
from pathlib import Path
from typing import Optional

CHECKPOINT_VERSION = 3  # 3: detector state split (judge), sink states by sink name


class CheckpointError(Exception):
    """The state file cannot be used; the message says what to do."""


def _fsync_dir(directory: Path) -> None:
    try:
        fd = os.open(str(directory), os.O_RDONLY)
    except OSError:  # some file systems do not allow opening a directory
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def write_atomic(path, data: bytes) -> None:
    path = Path(path)
    directory = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=str(directory))
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, str(path))
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    _fsync_dir(directory)


def save_checkpoint(path, bundle_id: str, state: dict) -> None:
    doc = {"checkpoint_version": CHECKPOINT_VERSION, "bundle_id": bundle_id, "state": state}
    write_atomic(path, (json.dumps(doc, sort_keys=True) + "\n").encode("utf-8"))


def load_checkpoint(path, bundle_id: str) -> Optional[dict]:
    """The saved state, or None when there is no checkpoint yet."""
    path = Path(path)
    if not path.exists():
        return None
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise CheckpointError(
            f"{path}: unreadable checkpoint ({exc}); move it aside to start fresh"
        ) from None
    if not isinstance(doc, dict) or doc.get("checkpoint_version") != CHECKPOINT_VERSION:
        raise CheckpointError(
            f"{path}: checkpoint version {doc.get('checkpoint_version') if isinstance(doc, dict) else '?'} "
            f"is not {CHECKPOINT_VERSION}; move it aside to start fresh"
        )
    if doc.get("bundle_id") != bundle_id:
        raise CheckpointError(
            f"{path}: checkpoint belongs to another bundle ({str(doc.get('bundle_id'))[:12]}...); "
            "use a separate --state file per bundle, or move this one aside to start fresh"
        )
    return doc["state"]
