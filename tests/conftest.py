"""Shared fixtures. Real reference records live in ../shared/ref-ecg (never copied here)."""
from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

# one worker by default in tests (each test's batch is small); tests of parallel runs ask for more
os.environ.setdefault("BEATMILL_WORKERS", "1")

ROOT = Path(__file__).resolve().parents[1]
REF = ROOT.parent / "shared" / "ref-ecg"
DEMO = ROOT / "demo_records"


def ref_path(*parts: str) -> Path:
    """Path inside ../shared/ref-ecg; skips the test (with a message) when it is absent."""
    p = REF.joinpath(*parts)
    if not (p.exists() or p.with_suffix(".hea").exists() or Path(str(p) + ".hea").exists()):
        pytest.skip(f"needs the shared reference records at {REF} (absent here)")
    return p


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """One run of the whole pipeline on demo_records, shared by the tests that read it."""
    from prep.dataset.run import run

    out = tmp_path_factory.mktemp("demo_run") / "run"
    summary = run([DEMO], out)
    return out, summary


@pytest.fixture()
def demo_copy(tmp_path):
    dst = tmp_path / "records"
    shutil.copytree(DEMO, dst)
    return dst
