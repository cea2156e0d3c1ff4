import sys
from pathlib import Path

import pytest
import torch

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))

# Every attention choice the package ships: one YAML each under conf/attention/.
NAMED_ATTENTION = sorted(p.stem for p in (ROOT / "conf" / "attention").glob("*.yaml"))


@pytest.fixture(autouse=True)
def _deterministic():
    torch.manual_seed(0)
    yield


@pytest.fixture(scope="session")
def cache(tmp_path_factory):
    """One corpus cache for every end-to-end test of the session (built once, reused)."""
    return tmp_path_factory.mktemp("corpus-cache")
