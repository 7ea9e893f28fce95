"""Digest every output file of a few reference runs, to show a change keeps the dataset bytes.

    python benchmarks/same_bytes.py --write before.json      # on the old code
    python benchmarks/same_bytes.py --compare before.json    # on the new code: exit 1 on a change

The manifest holds input paths, so run both sides from this checkout's script and point
``PYTHONPATH`` at the old code for ``--write`` (for example a ``git worktree`` of the old commit):
``PYTHONPATH=../old python benchmarks/same_bytes.py --write before.json``.

Runs ``beatmill``'s :func:`prep.run` on demo_records and on records of ../shared/ref-ecg
(MIT-BIH 100 and 119, Supraventricular 800, LUDB 1, PTB s0010_re, Challenge 2015 v102s; those
absent are skipped), one dataset each, and records the SHA-256 of every file in each dataset
folder. ``manifest.json`` is digested with its ``tool`` entry (the version) left out. With
``--rename old=new`` pairs (names a refactor changed: configuration keys, columns, index names),
every occurrence of a new name, as a whole word, is mapped back to the old one in the manifest,
in Parquet column names and in Parquet text cells before digesting, and the manifest's
``config_sha256`` and its digests of Parquet files (hashes over content compared here by
itself) are always left out; the mapped content must then be
identical. Parquet files are digested by content (their table with pyarrow's schema metadata
left out), so a renamed column is compared by its values.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import re
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
REF = ROOT.parent / "shared" / "ref-ecg"
RUNS = {"demo": [ROOT / "demo_records"],
        "mitdb": [REF / "mitdb" / "100.hea", REF / "mitdb" / "119.hea"],
        "svdb": [REF / "svdb" / "800.hea"],
        "ludb": [REF / "ludb" / "1.hea"],
        "ptbdb": [REF / "ptbdb" / "s0010_re.hea"],
        "challenge": [REF / "challenge2015" / "v102s.hea"]}


def _back(text: str, renames: dict[str, str]) -> str:
    for new, old in renames.items():
        text = re.sub(rf"\b{re.escape(new)}\b", old, text)
    return text


def _manifest_bytes(path: Path, renames: dict[str, str]) -> bytes:
    m = json.loads(_back(path.read_text(), renames))
    m.pop("tool", None)
    # hashes over content compared here by itself, which a rename changes: left out always, so
    # that both sides of a comparison are digested alike
    m.pop("config_sha256", None)
    m["files"] = {k: v for k, v in m.get("files", {}).items() if not k.endswith(".parquet")}
    return json.dumps(m, sort_keys=True).encode()


def _parquet_bytes(path: Path, renames: dict[str, str]) -> bytes:
    import pyarrow as pa
    import pyarrow.parquet as pq
    t = pq.read_table(path).replace_schema_metadata(None)
    cols = []
    for name, col in zip(t.column_names, t.columns):
        text = pa.types.is_string(col.type) or pa.types.is_large_string(col.type) or (
            pa.types.is_dictionary(col.type) and pa.types.is_string(col.type.value_type))
        if renames and text:
            col = pa.array([None if v is None else _back(v, renames) for v in col.to_pylist()],
                           col.type)
        cols.append(col)
    t = pa.table(cols, names=[_back(n, renames) for n in t.column_names])
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, t.schema) as w:
        w.write_table(t)
    return sink.getvalue().to_pybytes()


def _digest(f: Path, renames: dict[str, str]) -> str:
    if f.name == "manifest.json":
        data = _manifest_bytes(f, renames)
    elif f.suffix == ".parquet":
        data = _parquet_bytes(f, renames)
    else:
        data = f.read_bytes()
    return hashlib.sha256(data).hexdigest()


def digests(renames: dict[str, str] | None = None) -> dict[str, dict[str, str]]:
    from prep.dataset.run import run
    out: dict[str, dict[str, str]] = {}
    with tempfile.TemporaryDirectory() as tmp:
        for name, inputs in RUNS.items():
            inputs = [p for p in inputs if p.exists()]
            if not inputs:
                continue
            folder = Path(tmp) / name
            run(inputs, folder)
            out[name] = {}
            for f in sorted(folder.iterdir()):
                if f.is_file() and f.name != "report.html":
                    out[name][f.name] = _digest(f, renames or {})
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    g = ap.add_mutually_exclusive_group(required=True)
    g.add_argument("--write", type=Path, help="write the digests to this JSON file")
    g.add_argument("--compare", type=Path, help="compare with digests written before")
    ap.add_argument("--rename", nargs="*", default=[], metavar="OLD=NEW",
                    help="names a refactor changed, mapped back before comparing")
    a = ap.parse_args(argv)
    renames = dict(reversed(r.split("=", 1)) for r in a.rename)  # new -> old
    now = digests(renames)
    if a.write:
        a.write.write_text(json.dumps(now, indent=1, sort_keys=True))
        print(f"wrote digests of {sum(len(v) for v in now.values())} files to {a.write}")
        return 0
    before = json.loads(a.compare.read_text())
    bad = [(run, f) for run in sorted(set(before) | set(now))
           for f in sorted(set(before.get(run, {})) | set(now.get(run, {})))
           if before.get(run, {}).get(f) != now.get(run, {}).get(f)]
    for run, f in bad:
        print(f"differs: {run}/{f}")
    print(f"{sum(len(v) for v in now.values()) - len(bad)} files identical, {len(bad)} differ")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
