"""Scale benchmark: throughput with 1 and 2 workers, consolidation memory with 20 and 200
records, and a 24-hour two-lead record.

    python -m benchmarks.bench_scale [--ref ../shared/ref-ecg] [--work /tmp/beatmill-scale] [--skip-24h]
                               [--repeat 5]

Throughput is measured on 20 and on 40 records. Records are copies of the 30-minute, two-lead,
360 Hz MIT-BIH records 100, 105 and 119 (made in the work folder, never in the repository); the
24-hour record repeats record 100 48 times. Peak memory is the maximum resident set size of a
child process doing only that step. Throughput is the best of ``--repeat`` runs of each (1 and 2
workers taken in turn), as the speed benchmark does: on a shared 2-core machine single runs vary
by 20 % or more.

Speed-ups are printed for the whole run on 20 and on 40 records (every fixed cost included: the
worker processes' start, reading headers, hashing inputs, consolidation, the
manifest), and for a peer measured in the same run:
neurokit2's own R-peak pipeline (ecg_clean then ecg_peaks on a 30-minute lead), the same work
done by one process and split over two, timed from a common start after every process has
imported and warmed up. The peer has no fixed cost and no coordination, so it shows what two
processes gain on this machine at best.
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
from prep.dataset.run import run
t = time.perf_counter()
s = run([sys.argv[1]], sys.argv[2], workers=int(sys.argv[3]))
print(json.dumps({"seconds": time.perf_counter() - t, "beats": s.n_kept,
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def _child(src: Path, out: Path, workers: int) -> dict:
    p = subprocess.run([sys.executable, "-c", CHILD, str(src), str(out), str(workers)],
                       capture_output=True, text=True, check=True)
    return json.loads(p.stdout.strip().splitlines()[-1])


PEER = r"""
import json, sys, time
import neurokit2 as nk, wfdb
x = wfdb.rdrecord(sys.argv[1], channels=[0]).p_signal[:, 0]
nk.ecg_peaks(nk.ecg_clean(x, sampling_rate=360), sampling_rate=360)  # first-call costs
print("ready", flush=True)
sys.stdin.readline()
for _ in range(int(sys.argv[2])):
    nk.ecg_peaks(nk.ecg_clean(x, sampling_rate=360), sampling_rate=360)
print(json.dumps({"end": time.time()}), flush=True)
"""


def _peer(ref: Path, units: int, procs: int) -> float:
    """Wall time of ``units`` neurokit2 R-peak runs on a 30-minute lead, split over ``procs``
    processes that start together once all are ready."""
    import os
    import time
    env = {**os.environ, **{k: "1" for k in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS",
                                             "MKL_NUM_THREADS")}}
    ps = [subprocess.Popen([sys.executable, "-c", PEER, str(ref / "mitdb" / "100"),
                            str(units // procs)], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                           text=True, env=env) for _ in range(procs)]
    for p in ps:
        if p.stdout.readline().strip() != "ready":
            raise RuntimeError("the neurokit2 peer process did not start")
    t0 = time.time()
    for p in ps:
        p.stdin.write("go\n")
        p.stdin.flush()
    ends = [json.loads(p.stdout.readline())["end"] for p in ps]
    for p in ps:
        p.wait()
    return max(ends) - t0


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


def _short_copies(ref: Path, folder: Path, n: int) -> Path:
    """``n`` short 12-lead records: LUDB 1-5 (10 s, 500 Hz) under new names."""
    folder.mkdir(parents=True, exist_ok=True)
    for i in range(n):
        src = ref / "ludb" / str(1 + i % 5)
        dst = f"s{i:03d}"
        if (folder / f"{dst}.hea").exists():
            continue
        hea = Path(str(src) + ".hea").read_text().splitlines()
        hea[0] = hea[0].replace(str(1 + i % 5), dst, 1)
        hea = [ln.replace(f"{1 + i % 5}.dat", f"{dst}.dat") for ln in hea]
        (folder / f"{dst}.hea").write_text("\n".join(hea) + "\n")
        shutil.copy(str(src) + ".dat", folder / f"{dst}.dat")
    return folder


def _short_throughput(folder: Path, work: Path, repeat: int) -> None:
    """1 vs 2 workers on many short 12-lead records (per-record overhead dominates)."""
    times: tuple[list, list] = ([], [])
    for _ in range(max(1, repeat)):
        for w in (1, 2):
            shutil.rmtree(work / "out" / f"s{w}", ignore_errors=True)
            times[w - 1].append(_child(folder, work / "out" / f"s{w}", w)["seconds"])
    one, two = min(times[0]), min(times[1])
    n = len(list(folder.glob("*.hea")))
    print(f"Throughput, {n} short 12-lead records (LUDB 1-5, 10 s, 500 Hz), best of "
          f"{len(times[0])}: 1 worker {one:.1f} s ({n / one:.1f} records/s), 2 workers "
          f"{two:.1f} s; speed-up {one / two:.2f}x (goal >= 1.85x)")


def _throughput(sizes: list[tuple[int, Path]], work: Path, repeat: int, ref: Path) -> None:
    """Best-of-``repeat`` wall time of whole runs with 1 and 2 workers for each batch size, and
    of the neurokit2 peer with 1 and 2 processes, all taken in turn."""
    times: dict = {}
    for _ in range(max(1, repeat)):  # fresh output folders each time: nothing is reused
        times.setdefault("peer", ([], []))
        times["peer"][0].append(_peer(ref, 80, 1))
        times["peer"][1].append(_peer(ref, 80, 2))
        for n, folder in sizes:
            times.setdefault(n, ([], []))
            for w in (1, 2):
                shutil.rmtree(work / "out" / f"w{w}", ignore_errors=True)
                times[n][w - 1].append(_child(folder, work / "out" / f"w{w}", w)["seconds"])
    best = {k: (min(a), min(b)) for k, (a, b) in times.items()}
    for n, _ in sizes:
        one, two = best[n]
        print(f"Throughput, {n} records of 30 min, 2 leads, 360 Hz (whole run), best of "
              f"{len(times[n][0])}: 1 worker " + ", ".join(f"{t:.1f}" for t in times[n][0]) +
              " s; 2 workers " + ", ".join(f"{t:.1f}" for t in times[n][1]) + " s")
        print(f"  1 worker : {one:7.1f} s  ({n / one:.2f} records/s)")
        print(f"  2 workers: {two:7.1f} s  ({n / two:.2f} records/s)")
        print(f"  speed-up : {one / two:.2f}x (goal >= 1.8x on 2 cores)")
    one, two = best["peer"]
    print("Peer, neurokit2 ecg_clean + ecg_peaks, 80 runs on a 30-minute lead, best of "
          f"{len(times['peer'][0])}: 1 process {one:.1f} s, 2 processes {two:.1f} s: "
          f"{one / two:.2f}x (what two processes gain here with no fixed cost)")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ref", default=str(Path(__file__).resolve().parents[1].parent / "shared" /
                                         "ref-ecg"))
    ap.add_argument("--work", default="/tmp/beatmill-scale")
    ap.add_argument("--skip-24h", action="store_true")
    ap.add_argument("--repeat", type=int, default=5, help="throughput runs; the best is shown")
    a = ap.parse_args(argv)
    ref, work = Path(a.ref), Path(a.work)
    shutil.rmtree(work / "out", ignore_errors=True)
    twenty = _copies(ref, work / "r20", 20)
    _throughput([(20, twenty), (40, _copies(ref, work / "r40", 40))], work, a.repeat, ref)
    if (ref / "ludb" / "1.hea").exists():
        _short_throughput(_short_copies(ref, work / "s200", 200), work, min(a.repeat, 3))
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
