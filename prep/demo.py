"""Synthetic demo records for a fictional overnight chest-patch study (all signals invented).

The scenario: the (fictional) Brackenfold Sleep Unit fits two-lead chest patches (leads II and V5)
on volunteers overnight. Each demo record is three minutes of one volunteer's night and carries
one kind of trouble a real collection has. Beats are drawn from a sum-of-Gaussians model (P, Q, R,
S, T waves placed relative to each R, durations scaled with the RR interval), so every R position
and beat class is known exactly and written as WFDB reference annotations (``wfdb.wrann``).

``write_demo(folder)`` regenerates the records byte for byte (fixed seeds, no timestamps) and a
``truth.json`` listing every injected fault with its samples, for tests.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

# wave: (centre s after R, width s, amplitude mV) per lead, for a normal beat at RR = 1 s
_NORMAL = {"P": (-0.17, 0.025, 0.12), "Q": (-0.03, 0.010, -0.10), "R": (0.0, 0.011, 1.10),
           "S": (0.03, 0.011, -0.25), "T": (0.25, 0.050, 0.30)}
_V5_GAIN = {"P": 0.7, "Q": 1.4, "R": 1.3, "S": 0.4, "T": 1.2}
# a premature ventricular beat: no P, wide tall QRS, discordant T
_PVC = {"Q": (-0.045, 0.02, -0.25), "R": (0.0, 0.022, 1.6), "S": (0.05, 0.022, -0.7),
        "T": (0.30, 0.07, -0.45)}
FS_DEFAULT = 250.0
DURATION_S = 180.0
ADC_GAIN = 1000.0  # counts per mV
RAIL = 3000       # counts: the simulated amplifier saturates at +-3 mV


@dataclass
class DemoSpec:
    name: str
    description: str
    fs: float = FS_DEFAULT
    hr_bpm: float = 64.0
    ectopy: bool = False
    mains_hz: float | None = None
    wander: bool = False
    motion_bursts: list = field(default_factory=list)   # [(start_s, dur_s)]
    flat_lead: str | None = None
    clip_lead: str | None = None
    clip_spans: list = field(default_factory=list)      # [(start_s, dur_s)]
    seed: int = 0


SPECS = [
    DemoSpec("night01", "clean sinus rhythm", hr_bpm=62, seed=1),
    DemoSpec("night02", "sinus rhythm with ventricular (V) and atrial (A) premature beats",
             hr_bpm=74, ectopy=True, seed=2),
    DemoSpec("night03", "50 Hz powerline and baseline wander (breathing and drift)", hr_bpm=58,
             mains_hz=50.0, wander=True, seed=3),
    DemoSpec("night04", "60 Hz powerline at 360 Hz sampling, with baseline wander", fs=360.0,
             hr_bpm=70, mains_hz=60.0, wander=True, seed=4),
    DemoSpec("night05", "electrode-motion bursts in both leads", hr_bpm=66,
             motion_bursts=[(40.0, 8.0), (120.0, 10.0)], seed=5),
    DemoSpec("night06", "lead V5 off all night (flat line)", hr_bpm=60, flat_lead="V5", seed=6),
    DemoSpec("night07", "lead II saturates (clipped at the amplifier rails) in two stretches",
             hr_bpm=68, clip_lead="II", clip_spans=[(30.0, 20.0), (110.0, 15.0)], seed=7),
]


def _rr_series(rng, n_max: int, hr: float, ectopy: bool):
    """RR intervals (s) and beat symbols; sinus arrhythmia plus jitter, optional ectopy."""
    base = 60.0 / hr
    rr, sym = [], []
    t = 0.0
    k = 0
    while len(rr) < n_max:
        r = base * (1 + 0.04 * np.sin(2 * np.pi * t / 4.5) + 0.02 * rng.standard_normal())
        s = "N"
        if ectopy and k > 5 and k % 11 == 0:
            s, r = "V", base * 0.62
        elif ectopy and k > 5 and k % 17 == 0:
            s, r = "A", base * 0.72
        if sym and sym[-1] == "V":
            r = 2 * base - rr[-1]  # full compensatory pause
        elif sym and sym[-1] == "A":
            r = base * 1.1
        rr.append(r)
        sym.append(s)
        t += r
        k += 1
    return np.array(rr), sym


def _beat_wave(tt: np.ndarray, rr: float, kind: str, lead: str) -> np.ndarray:
    waves = _PVC if kind == "V" else _NORMAL
    scale_qt = np.sqrt(max(rr, 0.3))  # Bazett-like stretching of the T position
    out = np.zeros_like(tt)
    for w, (c, s, a) in waves.items():
        if w == "T":
            c = c * scale_qt
        if kind == "A" and w == "P":
            a, s = -0.6 * a, s * 0.8  # an ectopic atrial focus: inverted, narrower P
        g = _V5_GAIN.get(w, 1.0) if lead == "V5" else 1.0
        if kind == "V" and lead == "V5":
            g = -1.3 if w == "R" else 1.0  # the PVC points the other way in V5
        out += g * a * np.exp(-0.5 * ((tt - c) / s) ** 2)
    return out


def synthesize(spec: DemoSpec):
    """Signals (2, n) in mV, R samples, symbols and a list of injected faults for one spec."""
    rng = np.random.default_rng(spec.seed)
    fs = spec.fs
    n = int(DURATION_S * fs)
    t = np.arange(n) / fs
    rr, sym = _rr_series(rng, int(DURATION_S * spec.hr_bpm / 60 * 1.6) + 10, spec.hr_bpm, spec.ectopy)
    r_times = 0.6 + np.cumsum(np.r_[0, rr[:-1]])
    keep = r_times < DURATION_S - 0.2
    r_times, rr, sym = r_times[keep], rr[keep], [s for s, k in zip(sym, keep) if k]
    leads = ["II", "V5"]
    x = np.zeros((2, n))
    half = int(0.7 * fs)
    for rt, r, s in zip(r_times, rr, sym):  # generation only; not a processing hot path
        c = int(round(rt * fs))
        lo, hi = max(0, c - half), min(n, c + half)
        tt = (np.arange(lo, hi) - c) / fs
        for j, lead in enumerate(leads):
            x[j, lo:hi] += _beat_wave(tt, r, s, lead)
    x += 0.012 * rng.standard_normal(x.shape)  # amplifier noise
    faults = []
    if spec.mains_hz:
        x += 0.12 * np.sin(2 * np.pi * spec.mains_hz * t + np.array([[0.0], [0.7]]))
        faults.append({"kind": f"powerline_{int(spec.mains_hz)}hz", "lead": "all", "start": 0,
                       "end": n})
    if spec.wander:
        x += (0.35 * np.sin(2 * np.pi * 0.25 * t) + 0.5 * np.sin(2 * np.pi * 0.03 * t + 1.0))
        faults.append({"kind": "baseline_wander", "lead": "all", "start": 0, "end": n})
    for st, du in spec.motion_bursts:
        a, b = int(st * fs), int((st + du) * fs)
        m = b - a
        env = np.hanning(m)
        walk = np.cumsum(rng.standard_normal((2, m)), axis=1)
        walk = walk - np.linspace(walk[:, :1], walk[:, -1:], m, axis=1)[..., 0]
        spikes = rng.standard_normal((2, m)) * (rng.random((2, m)) < 0.02) * 2.0
        x[:, a:b] += env * (0.08 * walk + spikes + 0.4 * rng.standard_normal((2, m)))
        faults.append({"kind": "motion", "lead": "all", "start": a, "end": b})
    if spec.flat_lead:
        j = leads.index(spec.flat_lead)
        x[j] = 0.0
        faults.append({"kind": "flat", "lead": spec.flat_lead, "start": 0, "end": n})
    d = np.round(x * ADC_GAIN).astype(np.int64)
    if spec.clip_lead:
        j = leads.index(spec.clip_lead)
        for st, du in spec.clip_spans:
            a, b = int(st * fs), int((st + du) * fs)
            d[j, a:b] += int(2.6 * ADC_GAIN)  # a baseline jump pushes the R waves into the rail
            faults.append({"kind": "clipped", "lead": spec.clip_lead, "start": a, "end": b})
        d[j] = np.clip(d[j], -RAIL, RAIL)
    r_samples = np.round(r_times * fs).astype(np.int64)
    return d.astype(np.int16), leads, r_samples, sym, faults


def write_demo(folder: str | Path) -> list[str]:
    """Write every demo record (WFDB .hea/.dat/.atr) and truth.json into ``folder``."""
    import wfdb

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    truth = {"scenario": "fictional Brackenfold Sleep Unit overnight chest-patch study; all signals "
                         "are synthetic", "records": {}}
    for spec in SPECS:
        d, leads, r, sym, faults = synthesize(spec)
        wfdb.wrsamp(spec.name, fs=spec.fs, units=["mV", "mV"], sig_name=leads,
                    d_signal=d.T.astype(np.int16), fmt=["16", "16"], adc_gain=[ADC_GAIN] * 2,
                    baseline=[0, 0], comments=[f"synthetic demo: {spec.description}",
                                               "fictional Brackenfold Sleep Unit patch study"],
                    write_dir=str(folder))
        wfdb.wrann(spec.name, "atr", r, symbol=sym, write_dir=str(folder))
        truth["records"][spec.name] = {"description": spec.description, "fs": spec.fs,
                                       "n_beats": int(r.size),
                                       "classes": {s: sym.count(s) for s in sorted(set(sym))},
                                       "faults": faults}
    (folder / "truth.json").write_text(json.dumps(truth, indent=2) + "\n", encoding="utf-8")
    return [s.name for s in SPECS]
