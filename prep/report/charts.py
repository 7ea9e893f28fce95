"""The report's figures: matplotlib PNGs embedded as data URIs. Colours follow Paul Tol's
colour-blind-safe "bright" scheme; every axis carries a label and unit."""
from __future__ import annotations

import base64
import html
import io

import numpy as np
import pandas as pd

from prep.quality.reasons import REASONS

# Paul Tol "bright" (colour-blind safe): blue, cyan, green, yellow, red, purple, grey
TOL = ["#4477AA", "#66CCEE", "#228833", "#CCBB44", "#EE6677", "#AA3377", "#BBBBBB"]
GRADE = {"good": "#4477AA", "noisy": "#CCBB44", "unusable": "#EE6677"}


def png(fig) -> str:
    import matplotlib.pyplot as plt
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=96, bbox_inches="tight")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode()


def img(src: str, alt: str) -> str:
    return f'<figure><img src="{src}" alt="{html.escape(alt)}"><figcaption>{html.escape(alt)}' \
           f'</figcaption></figure>'


def quality_strips(ds, top: int = 40) -> str:
    """Each lead's window grades over time; in a large collection the ``top`` record-leads
    with the largest share of non-good windows."""
    import matplotlib.pyplot as plt
    w = ds.windows if ds.windows is not None else pd.DataFrame()
    if w.empty:
        return "<p>No quality windows in this dataset.</p>"
    fs = ds.records.set_index("record")["fs"]
    rows = w[["record", "lead"]].drop_duplicates().to_numpy().tolist()
    note = ""
    if len(rows) > top:
        bad = (w.grade != "good").groupby([w.record, w.lead]).mean()
        worst = set(bad.sort_values(ascending=False, kind="stable").index[:top])
        note = (f" The {top} of {len(rows)} record-leads with the largest share of noisy or "
                "unusable windows are drawn.")
        rows = [r for r in rows if tuple(r) in worst]
    fig, ax = plt.subplots(figsize=(10, 0.32 * len(rows) + 1.2))
    for k, (rec, lead) in enumerate(rows):
        part = w[(w.record == rec) & (w.lead == lead)]
        f = float(fs.get(rec, 1.0))
        for g, colour in GRADE.items():
            sel = part[part.grade == g]
            if len(sel):
                ax.broken_barh(list(zip(sel.start / f / 60, (sel.end - sel.start) / f / 60)),
                               (k - 0.4, 0.8), facecolors=colour, label=g)
    ax.set_yticks(range(len(rows)), [f"{r} {l}" for r, l in rows], fontsize=7)
    ax.invert_yaxis()
    ax.set_xlabel("time in record (min)")
    ax.set_ylabel("record and lead")
    handles, labels = ax.get_legend_handles_labels()
    uniq = dict(zip(labels, handles))
    ax.legend(uniq.values(), uniq.keys(), loc="upper right", fontsize=8, ncol=3)
    ax.set_title("Window grades (10 s windows)")
    return img(png(fig), "Quality strip: each lead's window grades over time (blue good, "
                           "yellow noisy, red unusable)." + note)


def class_means(ds) -> str:
    """Per split, class and axis lead: the mean kept beat, its band and five beats at random."""
    t = ds.table
    kept = t[t.included].sort_values("tensor_index")
    if kept.empty:
        return "<p>No kept beats.</p>"
    out = []
    for split in ("train", "val", "test"):
        part = kept[kept["split"] == split]
        if len(part):
            out.append(_class_figure(ds, part, split))
    return "\n".join(out)


def _class_figure(ds, kept, split: str) -> str:
    import matplotlib.pyplot as plt
    classes = [c for c in ds.class_names if (kept["beat_class"] == c).any()]
    axis = ds.lead_axis
    n_show = len(axis)
    fig, axes = plt.subplots(n_show, len(classes),
                             figsize=(2.6 * len(classes) + 1, 1.3 * n_show + 0.8),
                             squeeze=False, sharex=True)
    x, xlabel = _beat_axis(ds)
    rng = np.random.default_rng(0)  # the same examples every time
    for ci, c in enumerate(classes):
        idx = kept.loc[kept["beat_class"] == c, "tensor_index"].to_numpy()
        idx = idx[:: max(1, idx.size // 2000)]  # at most ~2000 beats per class
        for j in range(n_show):
            ax = axes[j, ci]
            ok = np.asarray(ds.lead_mask[idx, j])
            if ok.any():
                b = np.asarray(ds.beats[idx[ok], j], dtype=np.float64)
                m, s = b.mean(0), b.std(0)
                ax.fill_between(x, m - s, m + s, color=TOL[0], alpha=0.3, lw=0)
                for k in rng.choice(len(b), size=min(5, len(b)), replace=False):
                    ax.plot(x, b[k], color=TOL[1], lw=0.5, alpha=0.8)
                ax.plot(x, m, color=TOL[0], lw=1.4)
            ax.set_title(f"{c} ({idx.size}) {axis[j]}", fontsize=7)
            ax.tick_params(labelsize=6)
            if ci == 0:
                ax.set_ylabel("a.u.", fontsize=6)
            if j == n_show - 1:
                ax.set_xlabel(xlabel, fontsize=7)
    fig.suptitle(f"{split}: kept beats per class and lead: mean (dark line), +-1 SD (band), five "
                 "beats drawn at random (seed 0, thin lines)", fontsize=9)
    fig.tight_layout()
    return img(png(fig), f"Kept beats of the {split} split per class and lead, normalized")


def _beat_axis(ds) -> tuple[np.ndarray, str]:
    """The x axis of a beat: ms from R in the fixed-window mode, else fraction of the window."""
    seg = ds.manifest["config"]["segment"]
    n = ds.beats.shape[2]
    if seg.get("mode") == "fixed":
        return np.linspace(-seg["before_ms"], seg["after_ms"], n), "ms from R"
    return np.linspace(0, 1, n), "beat window (fraction; RR-relative windows)"


#: score column, its threshold in the configuration, the side a beat is excluded on
_DECIDING = [("hf_ratio", ("quality", "max_hf_ratio"), "above", "high_freq_noise"),
             ("template_corr", ("quality", "exclude_template_corr"), "below",
              "unlike_neighbours"),
             ("qrs_match", ("quality", "noise_min_qrs_match"), "below", "unmatched_in_noise"),
             ("amplitude_z", ("quality", "max_amplitude_z"), "above", "amplitude_outlier")]


def score_histograms(ds) -> str:
    """Each deciding beat score as a histogram with its threshold and the share excluded by
    the rule that reads it."""
    import matplotlib.pyplot as plt
    t, cfg = ds.table, ds.manifest["config"]
    shown = [d for d in _DECIDING if d[0] in t and t[d[0]].notna().any()]
    if not shown:
        return "<p>No beat scores.</p>"
    fig, axes = plt.subplots(1, len(shown), figsize=(3.6 * len(shown), 3.0), squeeze=False)
    for ax, (col, (sec, key), side, code) in zip(axes[0], shown):
        v = t[col].dropna().to_numpy(dtype=float)
        thr = cfg[sec][key]
        lo, hi = np.percentile(v, [0.5, 99.5]) if v.size else (0, 1)
        lo, hi = min(lo, thr), max(hi, thr)
        ax.hist(np.clip(v, lo, hi), bins=60, color=TOL[0])
        ax.axvline(thr, color=TOL[2], lw=1.5)
        share = float(t.reasons.str.contains(code).mean()) if len(t) else 0.0
        ax.set_title(f"{code}: {share:.2%} of rows\nexcluded {side} {key} = {thr:g}",
                     fontsize=7)
        ax.set_xlabel(col, fontsize=7)
        ax.set_ylabel("beats (count)", fontsize=7)
        ax.set_yscale("log")
    fig.tight_layout()
    return img(png(fig), "Deciding beat scores with their thresholds (vertical line)")


#: window index -> the windows settings that grade on it
_WINDOW_DECIDING = [("ksqi", ["min_ksqi"]), ("psqi", ["psqi_range"]), ("bassqi", ["min_bassqi"]),
                    ("bsqi", ["bsqi_noisy", "bsqi_unusable"]),
                    ("tsqi", ["tsqi_noisy", "tsqi_unusable"]), ("hf_share", ["max_hf_share"]),
                    ("line_share", ["max_line_share"]), ("amplitude_mv", ["amplitude_range_mv"]),
                    ("fault_fraction", ["noisy_fault_fraction", "unusable_fault_fraction"])]


def window_histograms(ds) -> str:
    """Each graded window index as a histogram with its thresholds and the share of windows
    whose grade it decided (alone or with others)."""
    import matplotlib.pyplot as plt
    w, cfg = ds.windows, ds.manifest["config"].get("windows", {})
    if w is None or w.empty or "decided_by" not in w:
        return "<p>No quality windows in this dataset.</p>"
    shown = [(c, keys) for c, keys in _WINDOW_DECIDING if c in w and w[c].notna().any()]
    cols = 3
    rows = -(-len(shown) // cols)
    fig, axes = plt.subplots(rows, cols, figsize=(11, 2.6 * rows), squeeze=False)
    decided = w.decided_by.str.get_dummies(sep=";")  # one column per test, split once
    for ax, (col, keys) in zip(axes.ravel(), shown):
        v = w[col].dropna().to_numpy(dtype=float)
        thr = [t for k in keys for t in np.atleast_1d(cfg.get(k, []))]
        lo, hi = np.percentile(v, [0.5, 99.5])
        lo, hi = min([lo, *thr]), max([hi, *thr])
        ax.hist(np.clip(v, lo, hi), bins=50, color=TOL[0])
        for t in thr:
            ax.axvline(t, color=TOL[2], lw=1.5)
        share = float(decided[col].mean()) if col in decided else 0.0
        ax.set_title(f"{col}: decided {share:.1%} of windows\n({', '.join(keys)})", fontsize=7)
        ax.set_xlabel(col, fontsize=7)
        ax.set_ylabel("windows (count)", fontsize=7)
        ax.set_yscale("log")
        ax.tick_params(labelsize=6)
    for ax in axes.ravel()[len(shown):]:
        ax.axis("off")
    fig.tight_layout()
    return img(png(fig), "Window quality indices with the thresholds that grade on them "
                         "(vertical lines)")


def excluded_examples(ds, per_reason: int = 2) -> str:
    """Excluded rows, a few per reason drawn at random (seed 0, no row twice), each on every
    lead of its record with the deciding score and threshold written on the figure."""
    t = ds.table
    rng = np.random.default_rng(0)
    drawn: set[str] = set()
    cache: dict[str, object] = {}
    out = []
    codes = t.reasons.str.get_dummies(sep=";")  # one column per reason code, split once
    for code in REASONS:
        if code not in codes:
            continue
        hit = t[codes[code].astype(bool) & ~t.beat_id.isin(drawn)]
        if hit.empty:
            continue
        pick = hit.iloc[np.sort(rng.choice(len(hit), size=min(per_reason, len(hit)),
                                           replace=False))]
        for row in pick.itertuples():
            drawn.add(row.beat_id)
            rec = _record_of(ds, row.record, cache)
            if isinstance(rec, str):  # the source moved or is unreadable: say so on the page
                out.append(f"<p>{html.escape(row.beat_id)}: source not readable "
                           f"({html.escape(rec)})</p>")
                continue
            out.append(_excluded_figure(ds, rec, row, code))
    return "\n".join(out) or "<p>No excluded beats.</p>"


def rejected_leads(ds, top: int = 8) -> str:
    """Rejected ECG leads drawn for 10 s from their first unusable window, with the reason."""
    import matplotlib.pyplot as plt
    leads, w = ds.leads, ds.windows
    if leads.empty or "usable_share" not in leads:
        return "<p>No lead was rejected.</p>"
    bad = leads[~leads.used.astype(bool) & leads.usable_share.notna() & (leads.reason != "")]
    if bad.empty:
        return "<p>No ECG lead was rejected.</p>"
    out, cache = [], {}
    for row in bad.head(top).itertuples():
        rec = _record_of(ds, row.record, cache)
        if isinstance(rec, str) or row.lead not in rec.leads:
            continue
        j, fs = rec.leads.index(row.lead), rec.fs
        start = 0
        if w is not None:
            lw = w[(w.record == row.record) & (w.lead == row.lead) & (w.grade == "unusable")]
            start = int(lw.start.iloc[0]) if len(lw) else 0
        a, b = start, min(rec.n_samples, start + int(10 * fs))
        fig, ax = plt.subplots(figsize=(6, 1.6))
        ax.plot(np.arange(a, b) / fs, rec.signals[j, a:b], color="#222222", lw=0.7)
        ax.axvspan(a / fs, b / fs, color=TOL[4], alpha=0.12, lw=0)
        ax.set_title(f"{row.record} {row.lead}: {row.reason}", fontsize=8)
        ax.set_xlabel("time in record (s)", fontsize=8)
        ax.set_ylabel("mV", fontsize=8)
        out.append(img(png(fig), f"Rejected lead {row.record} {row.lead}: 10 s from its first "
                                   "unusable window (shaded)"))
    note = "" if len(bad) <= top else f"<p>{top} of {len(bad)} rejected leads drawn.</p>"
    return "\n".join(out) + note


def _record_of(ds, name: str, cache: dict):
    """The record's signal (read once per report), or why it cannot be read."""
    from prep.config import ReadConfig
    from prep.io.sources import Source, find_sources, read_source
    if name not in cache:
        try:
            found, problems = find_sources([ds.source_of(name)])
            if not found:
                raise ValueError("; ".join(problems))
            cache[name] = read_source(Source(found[0].kind, found[0].path, name),
                                      ReadConfig(**ds.manifest["config"]["read"]))
        except Exception as exc:
            cache[name] = str(exc)
    return cache[name]


def _excluded_figure(ds, rec, row, code: str) -> str:
    import matplotlib.pyplot as plt
    seg = ds.manifest["config"]["segment"]
    fs, r = rec.fs, int(row.r_sample)
    a, b = max(0, int(r - 2 * fs)), min(rec.n_samples, int(r + 2 * fs))
    n = min(len(rec.leads), 6)
    fig, axes = plt.subplots(n, 1, figsize=(6, 1.1 * n + 0.7), sharex=True, squeeze=False)
    for j, ax in enumerate(axes[:, 0]):
        xs = rec.signals[j, a:b]
        ax.plot(np.arange(a, b) / fs, xs - np.nanmedian(xs), color="#222222", lw=0.7)
        if seg["mode"] == "fixed":
            ax.axvspan((r - seg["before_ms"] * fs / 1000) / fs,
                       (r + seg["after_ms"] * fs / 1000) / fs, color=TOL[1], alpha=0.3, lw=0)
        ax.axvline(r / fs, color=TOL[4], ls="--", lw=1)
        ax.set_ylabel(f"{rec.leads[j]}\n(mV)", fontsize=7)
        ax.tick_params(labelsize=7)
    axes[-1, 0].set_xlabel("time in record (s)", fontsize=8)
    axes[0, 0].set_title(f"{row.beat_id}: {row.reasons}" + _evidence_text(ds, row.beat_id, code),
                         fontsize=8)
    return img(png(fig), f"Excluded row {row.beat_id} ({code}); run "
                           f"'beatmill why {ds.path} {row.beat_id}' for details")


def _evidence_text(ds, beat_id: str, code: str) -> str:
    """'; score S = v (threshold T = t)' for a reason that reads one score, else ''."""
    for item in ds.explain(beat_id)["reasons"]:
        if item.get("code") == code and "score_name" in item:
            return (f"\n{item['score_name']} = {item['score']} "
                    f"(threshold {item['threshold_name']} = {item['threshold']})")
    return ""


def rhythm(ds) -> str:
    import matplotlib.pyplot as plt
    t = ds.table
    kept = t[t.included & t.rr_prev_s.notna()]
    if kept.empty:
        return "<p>No RR intervals.</p>"
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(11, 3.2))
    if kept.record.nunique() <= 6:  # one distinct colour per record, with a legend
        for k, (rec, g) in enumerate(kept.groupby("record")):
            a1.plot(g.r_time_s / 60, (60 / g.rr_prev_s).rolling(10, min_periods=1).median(),
                    lw=0.9, color=TOL[k], label=str(rec))
        a1.set_xlabel("time in record (min)")
        a1.set_ylabel("heart rate (bpm, median of 10 beats)")
        a1.set_title("Heart-rate trend per record")
        a1.legend(fontsize=7, ncol=2)
    else:  # a collection: one number per record, no colours to tell apart
        med = 60 / kept.groupby("record").rr_prev_s.median()
        a1.hist(med.clip(20, 250), bins=40, color=TOL[0])
        a1.set_xlabel("median heart rate of the record (bpm)")
        a1.set_ylabel("records (count)")
        a1.set_title(f"Median heart rate per record ({len(med)} records)")
    a2.hist(kept.rr_prev_s.clip(0, 3), bins=80, color=TOL[0])
    a2.set_xlabel("RR interval (s)")
    a2.set_ylabel("kept beats (count)")
    a2.set_title("RR distribution")
    return img(png(fig), "Heart-rate trend and RR-interval distribution of kept beats")
