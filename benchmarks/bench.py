"""Benchmark: detection accuracy per record and speed against neurokit2, in one run.

    python -m benchmarks.bench [--ref ../shared/ref-ecg] [--repeat 3] [--noise] [--no-speed] [--no-yield]

Prints, per annotated record, sensitivity and positive predictivity of our fused detector
(EC57-style matching, 150 ms, every beat), and the seconds our whole pipeline takes on all leads
of the record beside ``neurokit2.ecg_process`` on one lead of it, with the ratio. Single-threaded
BLAS (set before numpy loads) so the figures are one-core figures. The speed table also times
our pipeline with the quality windows switched off, to give the cost of the quality stage.

Then, for every annotated record in ../shared (MIT-BIH 100/105/119, the 23 Supraventricular
Arrhythmia records, the noise-stress records 118e*), what quality does to each beat class: the
share of reference beats kept per AAMI class (reference beats inside annotator-marked noise left
out), kept beats with no reference beat within 150 ms, kept beats whose ``rr_prev_s`` is more
than 100 ms off the reference RR, and sensitivity and positive predictivity of the ``is_beat``
rows. ``--no-yield`` skips it.

``--noise`` adds the noise-stress benchmark: the recorded electrode-motion (em), muscle (ma) and
baseline (bw) noise of the MIT-BIH Noise Stress Test Database is added to clean annotated records
at 24 to -6 dB, from minute 5 in alternating 2-minute stretches as that database's own records
are made, and the share of reference beats kept and of kept beats with no reference beat within
150 ms (mis-segmented) is printed per SNR; then the window-grade agreement with the known noise
timing of the database's 118e* records.
"""
from __future__ import annotations

import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")

import argparse  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from prep.config import Config  # noqa: E402
from prep.evaluate import Score, match_beats  # noqa: E402
from prep.io.wfdb import read_wfdb
from prep.model import BEAT_SYMBOLS  # noqa: E402
from prep.pipeline.record import beats_of_record  # noqa: E402

ACCURACY = [("mitdb", r) for r in ("100", "105", "119")] + \
           [("svdb", r) for r in ("800", "801", "802", "803", "804")] + \
           [("nstdb", r) for r in ("118e24", "118e18", "118e12", "118e06", "118e00", "118e_6")]
SPEED = [("mitdb", r) for r in ("100", "105", "119")]


def _stage_beats(r, cfg: Config) -> np.ndarray:
    """Fused beats of the R-peak stage alone on the filtered record (as the tests score it)."""
    from prep.pipeline.signals import fill_gaps
    from prep.stages.bandpass import bandpass
    from prep.stages.baseline import remove_baseline
    from prep.stages.powerline import remove_powerline
    from prep.stages.rpeaks import detect_beats
    x, _ = fill_gaps(r.signals)
    y, _ = remove_powerline(x, r.fs, cfg.powerline)
    y, _ = bandpass(y, r.fs, cfg.bandpass)
    y, _ = remove_baseline(y, r.fs, cfg.baseline)
    fused, _ = detect_beats(y, r.fs, np.ones(y.shape[0], bool), cfg.rpeaks)
    return fused.r[fused.accepted]


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
    ap.add_argument("--noise", action="store_true", help="also run the noise-stress benchmark")
    ap.add_argument("--no-yield", action="store_true", help="skip the class-yield table")
    ap.add_argument("--speed-only", action="store_true", help="only the speed tables")
    a = ap.parse_args(argv)
    ref = Path(a.ref)
    if not ref.exists():
        raise SystemExit(f"reference records not found at {ref}; pass --ref")
    cfg = Config()
    if a.speed_only:
        speed(ref, cfg, a.repeat)
        return
    print("Detection, 150 ms matching, every reference beat. 'stage': the R-peak stage alone "
          "(fused beats of all usable leads);\n'kept': beats the whole pipeline keeps (quality "
          "exclusions count as misses)")
    print(f"{'record':<16}{'fs':>6}{'beats':>7}{'FN':>6}{'FP':>6}{'Se %':>8}{'+P %':>8}"
          f"{'kept Se %':>11}{'kept +P %':>11}")
    groups: dict[str, list[Score]] = {}
    for db, rec in ACCURACY:
        base = ref / db / rec
        if not Path(str(base) + ".hea").exists():
            continue
        r = read_wfdb(base)
        truth = r.annotations.sample[np.isin(r.annotations.symbol, list(BEAT_SYMBOLS))]
        s = match_beats(_stage_beats(r, cfg), truth, r.fs)
        res = beats_of_record(r, cfg, r.leads)
        k = match_beats(res.beats.loc[res.beats["included"], "r_sample"], truth, r.fs)
        key = "mitdb 100+105+119" if db == "mitdb" else db
        g = groups.setdefault(key, [Score(0, 0, 0), Score(0, 0, 0)])
        g[0], g[1] = g[0] + s, g[1] + k
        print(f"{db + '/' + rec:<16}{r.fs:>6g}{truth.size:>7}{s.fn:>6}{s.fp:>6}"
              f"{100 * s.sensitivity:>8.2f}{100 * s.ppv:>8.2f}{100 * k.sensitivity:>11.2f}"
              f"{100 * k.ppv:>11.2f}")
    for key, (s, k) in groups.items():
        print(f"{'all ' + key:<29}{s.fn:>6}{s.fp:>6}{100 * s.sensitivity:>8.2f}"
              f"{100 * s.ppv:>8.2f}{100 * k.sensitivity:>11.2f}{100 * k.ppv:>11.2f}")
    if not a.no_yield:
        class_yield_table(ref, cfg)
    if a.noise:
        noise_stress(ref, cfg)
    if a.no_speed:
        return
    speed(ref, cfg, a.repeat)


def speed(ref: Path, cfg: Config, repeat: int) -> None:
    """Speed against neurokit2.ecg_process measured in the same run: long records (one lead
    for neurokit2, every lead for us), short 12-lead records (all twelve for both), and the
    wall clock of a one-record 'beatmill run' in a fresh process."""
    import neurokit2 as nk

    print(f"\nSpeed (best of {repeat} runs on long records; short ones: best of 20 for ours, 5 for "
          "neurokit2; one core)")
    print(f"{'record':<14}{'minutes':>8}{'leads':>6}{'ours s':>9}{'no-qual s':>10}"
          f"{'nk s':>9}{'ratio':>8}{'quality +':>10}")
    plain = cfg.replace(windows={"enabled": False})
    for title, records, nk_leads, goal in (
            ("long: neurokit2 on one lead, ours on every lead", SPEED, 1, 50),
            ("short 12-lead: both on all twelve leads", SHORT, 12, 30)):
        ratios = []
        for db, rec in records:
            base = ref / db / rec
            if not Path(str(base) + ".hea").exists():
                continue
            r = read_wfdb(base)
            beats_of_record(r, cfg, r.leads)  # warm imports and caches
            # a 10-s record takes tens of milliseconds, where this shared machine's hiccups
            # are as large: more repeats there (the best of them is the figure)
            reps = repeat if r.duration_s > 60 else max(repeat, 20)
            ours = _best(lambda: beats_of_record(r, cfg, r.leads), reps)
            noq = _best(lambda: beats_of_record(r, plain, r.leads), reps)
            n = min(nk_leads, len(r.leads))
            theirs = _best(lambda: [nk.ecg_process(r.signals[j], sampling_rate=int(r.fs))
                                    for j in range(n)],
                           max(1, repeat - 1) if r.duration_s > 60 else max(repeat, 5))
            ratios.append(theirs / ours)
            print(f"{db + '/' + rec:<14}{r.duration_s / 60:>8.1f}{len(r.leads):>6}{ours:>9.3f}"
                  f"{noq:>10.3f}{theirs:>9.2f}{theirs / ours:>8.1f}x"
                  f"{100 * (ours / noq - 1):>9.0f}%")
        if ratios:
            print(f"{title}: ratio min {min(ratios):.1f}x, median {np.median(ratios):.1f}x; "
                  f"goal >= {goal}x")
    one_record_wall(ref)


def one_record_wall(ref: Path) -> None:
    """Wall clock of 'beatmill run ONE.hea --out DIR' in a fresh process (imports included)."""
    import subprocess
    import sys
    import tempfile
    import time
    base = ref / "mitdb" / "100.hea"
    if not base.exists():
        return
    times = []
    for _ in range(3):
        with tempfile.TemporaryDirectory() as tmp:
            t = time.perf_counter()
            subprocess.run([sys.executable, "-m", "prep.cli.main", "run", str(base), "--out",
                            str(Path(tmp) / "o"), "-q", "--workers", "1"], check=False)
            times.append(time.perf_counter() - t)
    print(f"one-record run (mitdb/100, 30 min, fresh process): best {min(times):.2f} s; "
          "goal <= 2 s")


SHORT = [("ludb", str(i)) for i in range(1, 6)]

YIELD = [("mitdb", r) for r in ("100", "105", "119")] + \
        [("svdb", str(r)) for r in list(range(800, 813)) + list(range(820, 830))] + \
        [("nstdb", r) for r in ("118e24", "118e18", "118e12", "118e06", "118e00", "118e_6")]


def record_yield(r, res) -> dict:
    """Class yield and integrity figures of one processed annotated record.

    Reference beats (beat symbols of the annotation file, AAMI EC57 classes) are matched one to
    one within 150 ms (EC57) to kept rows, to all rows and to ``is_beat`` rows. Reference beats
    inside stretches the annotator marked noisy in any lead are left out of the kept shares.
    """
    from prep.evaluate import match_pairs
    from prep.stages.labels import beat_classes, noise_stretches
    a = r.annotations
    sel = np.isin(a.symbol, list(BEAT_SYMBOLS))
    order = np.argsort(a.sample[sel], kind="stable")
    ref, sym = a.sample[sel][order], a.symbol[sel][order]
    cls = beat_classes(sym).astype(str)
    noisy = noise_stretches(a, r.n_samples, r.channels or list(range(len(r.leads)))).any(axis=0)
    counted = ~noisy[np.clip(ref, 0, r.n_samples - 1)]
    b = res.beats
    kept = b[b["included"]]
    d2r, r2d = match_pairs(kept["r_sample"].to_numpy(), ref, r.fs)
    out = {"classes": {}}
    for c in ("N", "S", "V", "F"):
        m = counted & (cls == c)
        out["classes"][c] = (int(m.sum()), int((m & (r2d >= 0)).sum()))
    rr_ref = np.r_[np.nan, np.diff(ref) / r.fs]
    m = d2r >= 0
    err = np.abs(kept["rr_prev_s"].to_numpy()[m] - rr_ref[d2r[m]])
    out["kept"], out["kept_unmatched"] = len(kept), int((d2r < 0).sum())
    out["rr_n"], out["rr_off"] = int(np.isfinite(err).sum()), int((err > 0.1).sum())
    out["rr_unknown"] = int(np.isnan(kept["rr_prev_s"].to_numpy()).sum())
    ib = b.loc[b["is_beat"], "r_sample"].to_numpy()
    s = match_beats(ib, ref, r.fs)
    out["is_beat"] = (s.tp, s.fn, s.fp)
    return out


def _yield_line(name: str, y: dict) -> str:
    cells = []
    for c in ("N", "S", "V", "F"):
        n, k = y["classes"][c]
        cells.append(f"{100 * k / n:>7.2f}" if n else f"{'-':>7}")
        cells.append(f"{n:>6}")
    tp, fn, fp = y["is_beat"]
    return (f"{name:<16}" + "".join(cells) +
            f"{100 * y['kept_unmatched'] / max(y['kept'], 1):>9.3f}"
            f"{100 * y['rr_off'] / max(y['rr_n'], 1):>9.3f}"
            f"{100 * y['rr_unknown'] / max(y['kept'], 1):>8.2f}"
            f"{100 * tp / max(tp + fn, 1):>8.2f}{100 * tp / max(tp + fp, 1):>8.2f}")


def class_yield_table(ref: Path, cfg: Config) -> None:
    """Print :func:`record_yield` for every annotated record in ``ref``, and per database."""
    print("\nClass yield: share of reference beats kept per class (annotated noise left out), "
          "n = reference beats;\nunmatched = kept beats with no reference beat within 150 ms; "
          "rr off = kept beats whose rr_prev_s is > 100 ms\noff the reference RR; rr ? = kept "
          "beats whose rr_prev_s is unknown (NaN: the first beat, or an unconfirmed\ndetection "
          "inside the interval); is_beat Se / "
          "+P = rows with is_beat True against every reference beat (150 ms)")
    print(f"{'record':<16}" + "".join(f"{c + ' %':>7}{'n':>6}" for c in "NSVF") +
          f"{'unmatch%':>9}{'rr off%':>9}{'rr ?%':>8}{'ib Se':>8}{'ib +P':>8}")
    total: dict[str, dict] = {}
    for db, rec in YIELD:
        base = ref / db / rec
        if not Path(str(base) + ".hea").exists():
            continue
        r = read_wfdb(base)
        y = record_yield(r, beats_of_record(r, cfg, r.leads))
        print(_yield_line(f"{db}/{rec}", y))
        t = total.setdefault(db, {"classes": {c: (0, 0) for c in "NSVF"}, "kept": 0,
                                  "kept_unmatched": 0, "rr_n": 0, "rr_off": 0, "rr_unknown": 0,
                                  "is_beat": (0, 0, 0)})
        for c in "NSVF":
            t["classes"][c] = tuple(a + b for a, b in zip(t["classes"][c], y["classes"][c]))
        for k in ("kept", "kept_unmatched", "rr_n", "rr_off", "rr_unknown"):
            t[k] += y[k]
        t["is_beat"] = tuple(a + b for a, b in zip(t["is_beat"], y["is_beat"]))
    for db, t in total.items():
        print(_yield_line(f"all {db}", t))
    print("goals: kept N >= 98 %, S >= 97 %, V >= 97 %; unmatched < 0.05 %; rr off < 0.2 %; "
          "is_beat Se >= 99.9 %, +P >= 99.8 %")


def _noise_mask(n: int, fs: float) -> np.ndarray:
    """True from minute 5 in alternating 2-minute stretches (the nstdb records' layout)."""
    t = np.arange(n) / fs / 60.0
    return (t >= 5) & (((t - 5) // 2) % 2 == 0)


def add_noise(x: np.ndarray, fs: float, ref_beats: np.ndarray, noise: np.ndarray, snr_db: float):
    """Add ``noise`` (n_leads, >= n) to ``x`` at ``snr_db`` in the alternating stretches.

    Signal power per lead: (median QRS peak-to-peak)^2 / 8, the power of a sine of that
    peak-to-peak (the noise stress test's definition, from memory); noise power: mean square of
    the mean-removed noise.
    """
    out = x.copy()
    m = _noise_mask(x.shape[1], fs)
    h = int(0.05 * fs)
    rb = ref_beats[(ref_beats > h) & (ref_beats < x.shape[1] - h)]
    for j in range(x.shape[0]):
        seg = x[j][rb[:, None] + np.arange(-h, h + 1)]
        ptp = np.median(seg.max(1) - seg.min(1))
        s_pow = ptp ** 2 / 8
        nz = noise[j % noise.shape[0], : x.shape[1]]
        nz = nz - nz.mean()
        gain = np.sqrt(s_pow / (np.mean(nz ** 2) * 10 ** (snr_db / 10)))
        out[j, m] += gain * nz[m]
    return out


def noise_stress(ref: Path, cfg: Config) -> None:
    from prep.model import Record

    clean = [("mitdb", "100"), ("mitdb", "119")]
    kinds = ["em", "ma", "bw"]
    if not all(Path(str(ref / "nstdb" / k) + ".hea").exists() for k in kinds):
        print("noise records not found; skipping the noise-stress benchmark")
        return
    import wfdb
    noises = {k: wfdb.rdrecord(str(ref / "nstdb" / k)).p_signal.T for k in kinds}
    print("\nNoise stress (em, ma, bw added to mitdb 100 and 119 from minute 5, alternating 2 min)")
    print(f"{'SNR dB':>7}{'noise':>6}{'ref beats':>10}{'kept %':>8}{'mis-seg %':>10}")
    for snr in (24, 18, 12, 6, 0, -6):
        tot_ref = tot_keep = tot_kept = tot_bad = 0
        for kind in kinds:
            n_ref = n_keep = n_kept = n_bad = 0
            for db, rec in clean:
                r = read_wfdb(ref / db / rec)
                truth = r.annotations.sample[np.isin(r.annotations.symbol, list(BEAT_SYMBOLS))]
                x = add_noise(r.signals, r.fs, truth, noises[kind], snr)
                rr = Record(f"{rec}_{kind}{snr}", r.fs, x, r.lead_names, r.leads, r.units,
                            annotations=r.annotations, channels=r.channels)
                res = beats_of_record(rr, cfg, r.leads)
                kept = res.beats.loc[res.beats["included"], "r_sample"].to_numpy()
                s = match_beats(kept, truth, r.fs)
                n_ref += truth.size
                n_keep += s.tp
                n_kept += kept.size
                n_bad += s.fp
            print(f"{snr:>7}{kind:>6}{n_ref:>10}{100 * n_keep / n_ref:>8.2f}"
                  f"{100 * n_bad / max(n_kept, 1):>10.3f}")
            tot_ref += n_ref
            tot_keep += n_keep
            tot_kept += n_kept
            tot_bad += n_bad
        print(f"{snr:>7}{'all':>6}{tot_ref:>10}{100 * tot_keep / tot_ref:>8.2f}"
              f"{100 * tot_bad / max(tot_kept, 1):>10.3f}")
    print("goal: mis-segmented kept beats < 0.2 % at every SNR; >= 95 % kept at 12 dB and above")
    print("\nWindow grades on nstdb 118e* against the known noise timing")
    print(f"{'record':<10}{'agree %':>8}{'noise->non-good %':>19}{'clean->good %':>15}")
    for rec in ("118e24", "118e18", "118e12", "118e06", "118e00", "118e_6"):
        base = ref / "nstdb" / rec
        if not Path(str(base) + ".hea").exists():
            continue
        r = read_wfdb(base)
        w = beats_of_record(r, cfg, r.leads).windows
        truth = _noise_mask(r.n_samples, r.fs)[w["start"].to_numpy()]
        bad = (w["grade"] != "good").to_numpy()
        print(f"{rec:<10}{100 * (bad == truth).mean():>8.1f}{100 * bad[truth].mean():>19.1f}"
              f"{100 * (~bad[~truth]).mean():>15.1f}")


if __name__ == "__main__":
    main()
