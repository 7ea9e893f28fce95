"""First contact: a database folder runs with defaults, and a user's mistake is a clear exit 2,
never a silent success."""
import json
import os
import shutil
import stat

import numpy as np
import pandas as pd
import pytest
import wfdb
from typer.testing import CliRunner

from prep.cli.main import app
from prep.config import Config
from prep.dataset.run import run
from prep.errors import ConfigError

from ..conftest import DEMO

cli = CliRunner()


def _collection(tmp_path, n=3):
    """Demo records plus one single-lead (V5) record and a metadata table, as a database ships
    them (common practice, no source: PhysioNet databases put such CSV tables beside records)."""
    d = tmp_path / "db"
    d.mkdir()
    for k in range(1, n + 1):
        for ext in ("hea", "dat", "atr"):
            shutil.copy(DEMO / f"night0{k}.{ext}", d / f"night0{k}.{ext}")
    r = wfdb.rdrecord(str(DEMO / "night01"))
    wfdb.wrsamp("solo", fs=r.fs, units=["mV"], sig_name=["V5"], p_signal=r.p_signal[:, 1:2],
                fmt=["16"], write_dir=str(d))
    pd.DataFrame({"record": ["night01", "solo"], "age": [61, 58]}).to_csv(d / "study.csv",
                                                                          index=False)
    return d


def test_a_database_folder_runs_with_no_option(tmp_path):
    d = _collection(tmp_path)
    s = run([d], tmp_path / "out")
    # the metadata table is not a record; the record without II keeps its beats, II masked
    assert s.n_records == 4 and s.n_failed == 0 and s.exit_code == 0
    assert s.axis == ["II", "V5"]
    m = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert m["lead_axis_gaps"] == {"solo": ["II"]}
    assert any("solo lacks II" in w for w in m["warnings"])
    assert m["config"]["leads"]["select"] == ["II", "V5"]  # the axis used, never "auto"
    b = pd.read_parquet(tmp_path / "out" / "beats.parquet")
    mask = np.load(tmp_path / "out" / "lead_mask.npy")
    solo = b[(b.record == "solo") & b.included]
    assert len(solo) > 100 and not mask[solo.tensor_index, 0].any()
    assert mask[solo.tensor_index, 1].all()


def test_a_named_csv_is_a_record_and_a_folder_of_csv_only_too(tmp_path):
    from prep.io.sources import find_sources
    d = _collection(tmp_path)
    found, _ = find_sources([d / "study.csv"])
    assert [s.kind for s in found] == ["csv"]
    only = tmp_path / "csv_only"
    only.mkdir()
    shutil.copy(d / "study.csv", only / "a.csv")
    found, _ = find_sources([only])
    assert [s.name for s in found] == ["a"]
    notes = []
    found, _ = find_sources([d], notes=notes, csv_rate=True)  # --fs given: read as a record
    assert "study" in [s.name for s in found] and not notes


def test_an_input_that_matches_nothing_is_an_error(tmp_path):
    r = cli.invoke(app, ["run", str(DEMO / "night01.hea"), "nothing-here", "--out",
                         str(tmp_path / "o")])
    assert r.exit_code == 2 and "nothing-here" in r.output
    assert not (tmp_path / "o" / "manifest.json").exists()


def test_a_mistyped_lead_names_the_nearest(tmp_path):
    with pytest.raises(ConfigError, match=r"V55 \(did you mean V5\?\)"):
        run([DEMO / "night01.hea"], tmp_path / "o",
            config=Config().replace(leads={"select": ["II", "V55"]}))


def test_training_classes_are_matched_to_the_classes_in_use(tmp_path):
    with pytest.raises(ConfigError, match="'Normal' is not a class in use"):
        run([DEMO / "night01.hea"], tmp_path / "o",
            config=Config().replace(labels={"train_classes": ["Normal"]}))
    s = run([DEMO / "night01.hea"], tmp_path / "o",
            config=Config().replace(labels={"train_classes": ["n"]}))
    m = json.loads((tmp_path / "o" / "manifest.json").read_text())
    assert m["labels"]["train_classes"] == ["N"] and s.splits["train"]["beats"] > 0


def test_an_alias_of_the_default_axis_is_the_same_configuration(tmp_path):
    run([DEMO / "night01.hea"], tmp_path / "o")
    # MLII is an alias of II: the same axis, the same configuration, no --overwrite needed
    run([DEMO / "night01.hea"], tmp_path / "o", config=Config().replace(
        leads={"select": ["MLII", "V5"]}))


def test_every_dataset_file_is_readable_by_colleagues(demo_run):
    # common practice, no source: files a program writes get 0666 less the umask
    out, _ = demo_run
    mask = os.umask(0)
    os.umask(mask)
    for f in out.iterdir():
        if f.is_file():
            assert stat.S_IMODE(f.stat().st_mode) == 0o666 & ~mask, f.name


def test_a_failed_record_takes_no_split(tmp_path):
    d = tmp_path / "recs"
    shutil.copytree(DEMO, d)
    (d / "broken.hea").write_text("broken 2 250 45000\nbroken.dat 16 1000 16 0 0 0 0 II\n"
                                  "broken.dat 16 1000 16 0 0 0 0 V5\n")
    s = run([d], tmp_path / "o")
    rec = pd.read_parquet(tmp_path / "o" / "records.parquet").set_index("record")
    assert rec.loc["broken", "status"] == "failed" and rec.loc["broken", "split"] == ""
    assert s.exit_code == 1


def _beatmill(*args):
    import subprocess
    import sys
    return subprocess.run([sys.executable, "-m", "prep.cli.main", *args], capture_output=True,
                          text=True, timeout=120)


def test_every_error_has_one_style_and_usage_mistakes_exit_2(tmp_path):
    r = _beatmill("run", "--bogus")
    assert r.returncode == 2 and r.stderr.startswith("beatmill: error: No such option: --bogus")
    r = _beatmill("check")
    assert r.returncode == 2 and r.stderr.startswith("beatmill: error: Missing argument")
    r = _beatmill("check", str(tmp_path / "nothing"))
    assert r.returncode == 2 and "not a beatmill dataset" in r.stderr
    r = _beatmill("run", str(DEMO / "night01.hea"), "-v", "2", "--out", str(tmp_path / "o"))
    assert r.returncode == 2 and "a value?" in r.stderr
    r = _beatmill("--version")
    assert r.returncode == 0 and r.stdout.startswith("beatmill ")


def test_help_shows_names_not_python_types():
    r = _beatmill("run", "--help")
    assert r.returncode == 0 and "run [OPTIONS] INPUTS..." in r.stdout
    for bad in ("{inputs}", "<list[str]>", "<bool>", "[default: 0]"):
        assert bad not in r.stdout, bad


def test_a_require_rule_resolves_lead_aliases():
    from prep.report.survey import parse_rule
    assert parse_rule("MLII:usable>=0.9") == ("II", "usable", ">=", 0.9)


@pytest.mark.parametrize("args", [["--help"], ["reasons"], ["config"], ["check", "{out}"],
                                  ["why", "{out}", "night01:150"]])
def test_light_commands_never_load_the_signal_stack(args, demo_run):
    # common practice, no source: a command that detects no beat should not pay for the
    # detector libraries' import (neurokit2 alone takes 1-3 s)
    import subprocess
    import sys
    out, _ = demo_run
    argv = [a.replace("{out}", str(out)) for a in args]
    code = ("import runpy, sys, contextlib, io\n"
            f"sys.argv = ['beatmill'] + {argv!r}\n"
            "try:\n"
            "    with contextlib.redirect_stdout(io.StringIO()):\n"
            "        runpy.run_module('prep.cli.main', run_name='__main__')\n"
            "except SystemExit:\n"
            "    pass\n"
            "print(sorted(m for m in ('neurokit2', 'scipy.signal', 'prep.pipeline.record') "
            "if m in sys.modules))\n")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert r.stdout.strip().splitlines()[-1] == "[]", (args, r.stdout, r.stderr)


def test_records_without_any_axis_lead_are_named(tmp_path):
    # two records named ECG1/ECG2 outnumber one II/V5 record: the axis is ECG1,ECG2 and the
    # II/V5 record keeps no beat; the run says so instead of passing it over
    d = tmp_path / "mix"
    d.mkdir()
    r = wfdb.rdrecord(str(DEMO / "night01"))
    for k in (1, 2):
        wfdb.wrsamp(f"e{k}", fs=r.fs, units=["mV"] * 2, sig_name=["ECG1", "ECG2"],
                    p_signal=r.p_signal, fmt=["16"] * 2, write_dir=str(d))
    for ext in ("hea", "dat", "atr"):
        shutil.copy(DEMO / f"night02.{ext}", d / f"night02.{ext}")
    s = run([d], tmp_path / "out")
    assert s.axis == ["ECG1", "ECG2"]
    assert any("have none of the axis leads" in w and "night02" in w for w in s.warnings)


def test_a_lead_named_twice_through_an_alias_is_a_usage_error(tmp_path):
    with pytest.raises(ConfigError, match="II is named twice"):
        run([DEMO / "night01.hea"], tmp_path / "o",
            config=Config().replace(leads={"select": ["MLII", "II"]}))
