"""Lead-quality survey without writing a dataset (``beatmill leads``), and its --require rules."""
from __future__ import annotations

import operator
import re

import pandas as pd

from prep.config import Config
from prep.errors import BeatmillError, ConfigError
from prep.io.sources import find_sources, read_source
from prep.leads import canonical_lead
from prep.pipeline.record import beats_of_record

_OPS = {">=": operator.ge, "<=": operator.le, ">": operator.gt, "<": operator.lt}
_RULE = re.compile(r"^\s*(?:(?P<lead>[^:<>=\s]+)\s*:)?\s*(?P<what>usable|good)\s*"
                   r"(?P<op>>=|<=|>|<)\s*(?P<value>[0-9.]+)\s*$")


def parse_rule(text: str) -> tuple[str | None, str, str, float]:
    """'usable>=0.8' or 'II:good>=0.5' -> (lead or None, measure, operator, value)."""
    m = _RULE.match(text)
    if not m:
        raise ConfigError(f"--require {text!r}: write MEASURE OP VALUE or LEAD:MEASURE OP VALUE, "
                          "with MEASURE usable or good, OP one of >= <= > <, in quotes so the "
                          "shell leaves > alone, e.g. --require 'usable>=0.8'")
    v = float(m["value"])
    if not 0 <= v <= 1:
        raise ConfigError(f"--require {text!r}: the value is a share between 0 and 1")
    return (canonical_lead(m["lead"]) if m["lead"] else None), m["what"], m["op"], v


def survey(inputs, cfg: Config, workers: int | None = None,
           progress=None) -> tuple[pd.DataFrame, list[tuple[str, str]]]:
    """One row per record and ECG lead: used, usable and good shares, window counts, main fault.
    ``workers``: parallel processes (as ``beatmill run``); ``progress(name, done, total)`` is
    called after each record."""
    found, problems = find_sources(list(inputs))
    if problems or not found:
        raise ConfigError(problems or ["no input records given"])
    from prep.dataset.execute import n_workers, start_pool
    n = min(n_workers(workers), len(found))
    rows, failed = [], []
    tasks = [(src, cfg) for src in found]
    if n > 1:
        with start_pool(n) as pool:
            results = list(_with_progress(pool.map(_survey_one, tasks), found, progress))
    else:
        results = list(_with_progress(map(_survey_one, tasks), found, progress))
    for name, lead_rows, error in results:
        if error:
            failed.append((name, error))
        rows += lead_rows
    return pd.DataFrame(rows), failed


def _with_progress(results, found, progress):
    for k, res in enumerate(results):
        if progress:
            progress(found[k].name, k + 1, len(found))
        yield res


def _survey_one(args) -> tuple[str, list[dict], str]:
    """One record's lead rows (or its error), in this process or a worker."""
    src, cfg = args
    try:
        rec = read_source(src, cfg.read)
        res = beats_of_record(rec, cfg, rec.leads)
    except BeatmillError as exc:
        return src.name, [], str(exc)
    rows = []
    for lead in res.leads:
        if "windows_good" not in lead:
            continue  # skipped non-ECG channel
        n = lead["windows_good"] + lead["windows_noisy"] + lead["windows_unusable"]
        rows.append({**lead, "usable": lead["usable_share"],
                     "good": lead["windows_good"] / max(n, 1)})
    return src.name, rows, ""


def check_rules(table: pd.DataFrame, rules) -> list[str]:
    """Messages for every record and lead that breaks a rule."""
    out = []
    for lead, what, op, value in rules:
        sel = table if lead is None else table[table["lead"].str.lower() == lead.lower()]
        if lead is not None and sel.empty:
            out.append(f"no record has lead {lead}")
        for row in sel.itertuples():
            got = getattr(row, what)
            if not _OPS[op](got, value):
                out.append(f"{row.record} {row.lead}: {what} {got:.2f} is not {op} {value:g}")
    return out
