"""The newest bundle a state directory has run: an older one is refused.

A gateway that goes back to an older bundle (a copy restored from a backup, an attacker's
replay of a bundle with a weaker threshold) would detect less without a word. The record sits
beside the --state file as `newest-bundles.json`: for each bundle name, the creation time,
schema version and id of the newest bundle run there. A bundle created earlier (or with a lower
schema version) is refused unless the operator passes --allow-older, which makes it the record.
This protects signed bundles; anyone who can edit an unsigned bundle can edit its time too.
"""

import json
from datetime import datetime, timezone
from pathlib import Path
from typing import Optional, Tuple

from .checkpoint import CheckpointError, write_atomic
from .trust import BundleError

RECORD_NAME = "newest-bundles.json"


def record_path(state_path) -> Path:
    return Path(state_path).resolve().parent / RECORD_NAME


def _rank(entry: dict) -> Tuple[datetime, Tuple[int, ...]]:
    created = datetime.fromisoformat(str(entry["created"]).replace("Z", "+00:00"))
    if created.tzinfo is None:
        created = created.replace(tzinfo=timezone.utc)
    schema = tuple(int(x) for x in str(entry["schema_version"]).split("."))
    return created, schema


def _read(path: Path) -> dict:
    if not path.exists():
        return {}
    try:
        record = json.loads(path.read_text(encoding="utf-8"))
        for entry in record.values():
            _rank(entry)
    except (OSError, ValueError, TypeError, KeyError, AttributeError) as exc:
        raise CheckpointError(f"{path}: unreadable record of the newest bundles ({exc}); "
                              "move it aside (the next bundle becomes the record)") from None
    return record


def check_not_older(state_path, manifest: dict, bundle_id: str,
                    allow_older: bool = False) -> Optional[str]:
    """Refuse (BundleError) a bundle older than the newest of its name run with this state
    directory; record it when it is the newest. Returns a note for the operator, or None."""
    path = record_path(state_path)
    record = _read(path)
    name = manifest["name"]
    here = {"created": manifest["created"], "schema_version": manifest["schema_version"],
            "bundle_id": bundle_id}
    seen = record.get(name)
    if seen is not None and _rank(here) < _rank(seen) and not allow_older:
        raise BundleError(
            f"bundle {name} was created {here['created']} (schema {here['schema_version']}), "
            f"older than the newest one this gateway ran ({seen['created']}, schema "
            f"{seen['schema_version']}, id {seen['bundle_id'][:12]}); refusing a rollback - pass "
            "--allow-older if you mean it"
        )
    if seen == here:
        return None
    record[name] = here
    try:
        write_atomic(path, (json.dumps(record, indent=2, sort_keys=True) + "\n").encode("utf-8"))
    except OSError as exc:
        return f"{path}: could not record the newest bundle ({exc}); rollback protection is " \
               "not up to date"
    return None
