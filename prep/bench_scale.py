"""Scale benchmark: throughput with 1 and 2 workers, consolidation memory with 20 and 200
records, and a 24-hour two-lead record.

    python -m prep.bench_scale [--ref ../shared/ref-ecg] [--work /tmp/beatmill-scale] [--skip-24h]
                               [--repeat 3]

Throughput is measured on 20 and on 40 records. Records are copies of the 30-minute, two-lead,
360 Hz MIT-BIH records 100, 105 and 119 (made in the work folder, never in the repository); the
24-hour record repeats record 100 48 times. Peak memory is the maximum resident set size of a
child process doing only that step. Throughput is the best of ``--repeat`` runs of each (1 and 2
workers taken in turn), as the speed benchmark does: on a shared 2-core machine single runs vary
by 20 % or more.
"""
from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
from pathlib import Path

CHILD = r"""
import json, resource, sys, time
from prep.dataset import run
t = time.perf_counter()
s = run([sys.argv[1]], sys.argv[2], workers=int(sys.argv[3]))
print(json.dumps({"seconds": time.perf_counter() - t, "beats": s.n_kept,
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def _child(src: Path, out: Path, workers: int) -> dict:
    p = subprocess.run([sys.executable, "-c", CHILD, str(src), str(out), str(workers)],
                       capture_output=True, text=True, check=True)
    return json.loads(p.stdout.strip().splitlines()[-1])


def _copies(ref: Path, folder: Path, n: int) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    names = ["100", "105", "119"]
    for i in range(n):
        src = ref / "mitdb" / names[i % 3]
        dst = f"r{i:03d}"
        if (folder / f"{dst}.hea").exists():
            continue
        hea = Path(str(src) + ".hea").read_text().replace(names[i % 3], dst)
        (folder / f"{dst}.hea").write_text(hea)
        shutil.copy(str(src) + ".dat", folder / f"{dst}.dat")
        shutil.copy(str(src) + ".atr", folder / f"{dst}.atr")
    return folder


def _throughput(n: int, folder: Path, work: Path, repeat: int) -> None:
    """Best-of-``repeat`` wall time of a whole run with 1 and with 2 workers."""
    ones, twos = [], []
    for _ in range(max(1, repeat)):  # fresh output folders each time: nothing is reused
        shutil.rmtree(work / "out" / "w1", ignore_errors=True)
        shutil.rmtree(work / "out" / "w2", ignore_errors=True)
        ones.append(_child(folder, work / "out" / "w1", 1))
        twos.append(_child(folder, work / "out" / "w2", 2))
    one = min(ones, key=lambda d: d["seconds"])
    two = min(twos, key=lambda d: d["seconds"])
    runs1 = ", ".join(f"{d['seconds']:.1f}" for d in ones)
    runs2 = ", ".join(f"{d['seconds']:.1f}" for d in twos)
    print(f"Throughput, {n} records of 30 min, 2 leads, 360 Hz (processing and consolidation), "
          f"best of {len(ones)}: 1 worker {runs1} s; 2 workers {runs2} s")
    print(f"  1 worker : {one['seconds']:7.1f} s  ({n / one['seconds']:.2f} records/s)")
    print(f"  2 workers: {two['seconds']:7.1f} s  ({n / two['seconds']:.2f} records/s)")
    print(f"  speed-up : {one['seconds'] / two['seconds']:.2f}x (goal >= 1.8x on 2 cores)")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ref", default=str(Path(__file__).resolve().parents[1].parent / "shared" /
                                         "ref-ecg"))
    ap.add_argument("--work", default="/tmp/beatmill-scale")
    ap.add_argument("--skip-24h", action="store_true")
    ap.add_argument("--repeat", type=int, default=3, help="throughput runs; the best is shown")
    a = ap.parse_args(argv)
    ref, work = Path(a.ref), Path(a.work)
    shutil.rmtree(work / "out", ignore_errors=True)
    twenty = _copies(ref, work / "r20", 20)
    for n, folder in ((20, twenty), (40, _copies(ref, work / "r40", 40))):
        _throughput(n, folder, work, a.repeat)
    many = _copies(ref, work / "r200", 200)
    _child(many, work / "out" / "m200", 2)  # make the shards
    _child(twenty, work / "out" / "c20", 1)  # make the shards
    c20 = _child(twenty, work / "out" / "c20", 1)   # resume: consolidation only
    c200 = _child(many, work / "out" / "m200", 1)
    print("Consolidation only (every shard committed), peak memory")
    print(f"   20 records: {c20['peak_mb']:7.0f} MB  {c20['seconds']:6.1f} s  {c20['beats']} beats")
    print(f"  200 records: {c200['peak_mb']:7.0f} MB  {c200['seconds']:6.1f} s  {c200['beats']} beats")
    print(f"  ratio 200/20: {c200['peak_mb'] / c20['peak_mb']:.2f} (goal: roughly equal)")
    if a.skip_24h:
        return
    import numpy as np
    import wfdb
    day = work / "day"
    day.mkdir(exist_ok=True)
    if not (day / "day24.hea").exists():
        r = wfdb.rdrecord(str(ref / "mitdb" / "100"), physical=False)
        d = np.tile(r.d_signal, (48, 1))
        wfdb.wrsamp("day24", fs=r.fs, units=r.units, sig_name=r.sig_name, d_signal=d,
                    fmt=["16", "16"], adc_gain=r.adc_gain, baseline=r.baseline,
                    write_dir=str(day))
    res = _child(day, work / "out" / "day", 1)
    print("24-hour two-lead 360 Hz record (MIT-BIH 100 repeated 48 times), one worker")
    print(f"  wall {res['seconds']:.1f} s, peak {res['peak_mb']:.0f} MB (goal: peak under 1 GB), "
          f"{res['beats']} beats kept")


if __name__ == "__main__":
    main()
