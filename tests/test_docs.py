"""The documentation stays true to the code: every output column, key and reason is listed."""
import json
from pathlib import Path

import pandas as pd

from prep.quality.reasons import FLAGS, REASONS

DOCS = Path(__file__).resolve().parents[1] / "docs"


def test_outputs_page_lists_every_column_and_key(demo_run):
    out, _ = demo_run
    page = (DOCS / "outputs.md").read_text()
    for table in ("beats", "leads", "records", "windows"):
        for col in pd.read_parquet(out / f"{table}.parquet").columns:
            assert f"`{col}`" in page, (table, col)
    manifest = json.loads((out / "manifest.json").read_text())
    for key in manifest:
        assert f"`{key}`" in page, key
    for key in manifest["counts"]:
        assert f"`{key}`" in page, key
    stages = {s["stage"] for r in manifest["records"].values() for s in r["stages"]}
    for s in stages:
        assert f"`{s}`" in page, s


def test_quality_page_lists_every_reason_and_flag():
    page = (DOCS / "quality.md").read_text()
    for code in list(REASONS) + list(FLAGS):
        assert f"`{code}`" in page, code


def test_readme_caution_and_commands():
    readme = (DOCS.parent / "README.md").read_text()
    assert "not a medical device" in readme
    ci = (DOCS.parent / ".ci" / "run").read_text()
    test_cmd = 'python -m pip install -e ".[test]" && python -m pytest -q'
    assert test_cmd in readme and test_cmd in ci
    assert "beatmill run demo_records" in readme


def test_beat_ids_in_help_and_docs_exist_in_the_demo(demo_run):
    import re

    from prep.cli import main as cli_main
    out, _ = demo_run
    ids = set(pd.read_parquet(out / "beats.parquet").beat_id)
    texts = [Path(cli_main.__file__).read_text(), (DOCS / "api.md").read_text(),
             (DOCS.parent / "README.md").read_text()]
    named = {m for t in texts for m in re.findall(r"\bnight0\d:\d+\b", t)}
    assert named and named <= ids, named - ids
