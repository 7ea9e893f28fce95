"""Stages never import the orchestrator, the writer or the CLI (one room per stage)."""
import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "prep"
STAGES = ["powerline", "bandpass", "baseline", "rpeaks", "segment", "resample", "normalize",
          "quality", "labels", "windows", "split"]
HIGHER = {"pipeline", "dataset", "export", "check", "cli", "demo", "bench", "api", "viz",
          "survey", "torch"}


@pytest.mark.parametrize("stage", STAGES)
def test_stage_imports_stay_low(stage):
    tree = ast.parse((PKG / f"{stage}.py").read_text())
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level >= 1:
            top = (node.module or "").split(".")[0]
            assert top not in HIGHER, f"{stage} imports {top}"
            assert top not in set(STAGES) - {stage}, f"{stage} imports stage {top}"
