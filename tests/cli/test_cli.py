"""Commands driven through Typer's runner: exit codes and messages."""
import json

import pytest
from typer.testing import CliRunner

from prep.cli.main import app

from ..conftest import DEMO

runner = CliRunner()


@pytest.mark.parametrize("cmd", [[], ["run"], ["config"], ["check"], ["demo"], ["reasons"]])
def test_help_has_an_example(cmd):
    r = runner.invoke(app, cmd + ["--help"])
    assert r.exit_code == 0 and "Example" in r.output


def test_config_prints_valid_commented_toml(tmp_path):
    r = runner.invoke(app, ["config"])
    assert r.exit_code == 0 and "# default source:" in r.output
    p = tmp_path / "c.toml"
    p.write_text(r.output)
    assert runner.invoke(app, ["config", "--check", str(p)]).exit_code == 0
    p.write_text("[bandpass]\nhigh_hz = 'x'\nfoo = 1\n")
    r = runner.invoke(app, ["config", "--check", str(p)])
    assert r.exit_code == 2 and "high_hz" in r.output and "unknown key 'foo'" in r.output


def test_run_then_check(tmp_path):
    out = tmp_path / "run"
    r = runner.invoke(app, ["run", str(DEMO / "night01.hea"), str(DEMO / "night02"), "--out",
                            str(out), "--leads", "MLII"])
    assert r.exit_code == 0, r.output
    assert json.loads((out / "manifest.json").read_text())["lead_axis"] == ["II"]
    assert runner.invoke(app, ["check", str(out)]).exit_code == 0
    (out / "leads.parquet").write_bytes(b"garbage")
    r = runner.invoke(app, ["check", str(out)])
    assert r.exit_code == 1 and "leads.parquet" in r.output


def test_usage_errors_exit_2(tmp_path):
    r = runner.invoke(app, ["run", str(tmp_path / "nothing_here"), "--out", str(tmp_path / "o")])
    assert r.exit_code == 2 and "no such record" in r.output
    bad = tmp_path / "bad.toml"
    bad.write_text("[segment]\nmode = 'sideways'\n")
    r = runner.invoke(app, ["run", str(DEMO), "--out", str(tmp_path / "o"), "--config", str(bad)])
    assert r.exit_code == 2 and "'mode' parameter of [segment]" in r.output


def test_demo_refuses_to_overwrite(tmp_path):
    (tmp_path / "x.txt").write_text("keep me")
    r = runner.invoke(app, ["demo", "--out", str(tmp_path)])
    assert r.exit_code == 2 and "--overwrite" in r.output
