"""Shared fixtures: the SKAB folder beside the repository, and small CSV writers."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

REPO = Path(__file__).resolve().parents[1]
SKAB_DIR = REPO / ".." / "shared" / "data" / "skab"


@pytest.fixture
def skab_dir() -> Path:
    """SKAB test data (not part of the repository); the test skips when it is absent."""
    if not (SKAB_DIR / "valve1").is_dir():
        pytest.skip("SKAB data not found at ../shared/data/skab "
                    "(test data beside the repo, not part of it)")
    return SKAB_DIR.resolve()


@pytest.fixture
def write_csv(tmp_path):
    """write_csv(df, name="data.csv", **to_csv_kwargs) -> path of the written file."""

    def write(df: pd.DataFrame, name: str = "data.csv", **kwargs) -> Path:
        path = tmp_path / name
        df.to_csv(path, index=False, **kwargs)
        return path

    return write


@pytest.fixture(scope="module")
def one_torch_thread():
    """Train on one thread: on a shared 2-core machine torch's thread pool oversubscribes and
    tiny LSTMs run many times slower; one thread is also the simplest reproducible setting."""
    import torch

    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)
