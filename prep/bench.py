"""Benchmark: detection accuracy per record and speed against neurokit2, in one run.

    python -m prep.bench [--ref ../shared/ref-ecg] [--repeat 3]

Prints, per annotated record, sensitivity and positive predictivity of our fused detector
(EC57-style matching, 150 ms, every beat), and the seconds our whole pipeline takes on all leads
of the record beside ``neurokit2.ecg_process`` on one lead of it, with the ratio. Single-threaded
BLAS (set before numpy loads) so the figures are one-core figures.
"""
from __future__ import annotations

import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")

import argparse  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from .config import Config  # noqa: E402
from .evaluate import Score, match_beats  # noqa: E402
from .pipeline import process_record  # noqa: E402
from .read import BEAT_SYMBOLS, read_wfdb  # noqa: E402

ACCURACY = [("mitdb", r) for r in ("100", "105", "119")] + \
           [("svdb", r) for r in ("800", "801", "802", "803", "804")] + \
           [("nstdb", r) for r in ("118e24", "118e18", "118e12", "118e06", "118e00", "118e_6")]
SPEED = [("mitdb", r) for r in ("100", "105", "119")]


def _best(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ref", default=str(Path(__file__).resolve().parents[1].parent / "shared" /
                                         "ref-ecg"))
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--no-speed", action="store_true")
    a = ap.parse_args(argv)
    ref = Path(a.ref)
    if not ref.exists():
        raise SystemExit(f"reference records not found at {ref}; pass --ref")
    cfg = Config()
    print("Detection (fused beats, 150 ms matching, every reference beat)")
    print(f"{'record':<16}{'fs':>6}{'beats':>7}{'TP':>7}{'FN':>5}{'FP':>5}{'Se %':>8}{'+P %':>8}")
    groups: dict[str, Score] = {}
    for db, rec in ACCURACY:
        base = ref / db / rec
        if not Path(str(base) + ".hea").exists():
            continue
        r = read_wfdb(base)
        res = process_record(r, cfg, r.leads)
        b = res.beats
        det = b.loc[~b.reasons.str.contains("one_lead_only"), "r_sample"].to_numpy()
        truth = r.annotations.sample[np.isin(r.annotations.symbol, list(BEAT_SYMBOLS))]
        s = match_beats(det, truth, r.fs)
        key = "mitdb 100+105+119" if db == "mitdb" else db
        groups[key] = groups.get(key, Score(0, 0, 0)) + s
        print(f"{db + '/' + rec:<16}{r.fs:>6g}{truth.size:>7}{s.tp:>7}{s.fn:>5}{s.fp:>5}"
              f"{100 * s.sensitivity:>8.2f}{100 * s.ppv:>8.2f}")
    for k, s in groups.items():
        print(f"{'all ' + k:<30}{s.tp:>7}{s.fn:>5}{s.fp:>5}{100 * s.sensitivity:>8.2f}"
              f"{100 * s.ppv:>8.2f}")
    if a.no_speed:
        return
    import neurokit2 as nk

    print("\nSpeed (best of", a.repeat, "runs, one core)")
    print(f"{'record':<14}{'minutes':>8}{'leads':>6}{'ours s':>9}{'nk s/lead':>11}{'ratio':>8}")
    ratios = []
    for db, rec in SPEED:
        base = ref / db / rec
        if not Path(str(base) + ".hea").exists():
            continue
        r = read_wfdb(base)
        ours = _best(lambda: process_record(r, cfg, r.leads), a.repeat)
        theirs = _best(lambda: nk.ecg_process(r.signals[0], sampling_rate=int(r.fs)),
                       max(1, a.repeat - 1))
        ratios.append(theirs / ours)
        print(f"{db + '/' + rec:<14}{r.duration_s / 60:>8.1f}{len(r.leads):>6}{ours:>9.3f}"
              f"{theirs:>11.2f}{theirs / ours:>8.1f}x")
    if ratios:
        print(f"ratio (neurokit2 one lead / ours all leads): min {min(ratios):.1f}x, "
              f"median {np.median(ratios):.1f}x; target >= 20x")


if __name__ == "__main__":
    main()
