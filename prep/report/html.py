"""``beatmill report``: one self-contained HTML page to read before training on a dataset.

Figures are matplotlib PNGs embedded as data URIs; the page needs no network and no JavaScript.
Colours follow Paul Tol's colour-blind-safe "bright" scheme; every axis carries a label and unit.
"""
from __future__ import annotations

import base64
import html
import io
from pathlib import Path

import numpy as np
import pandas as pd

from prep.dataset.view import open_dataset
from prep.quality.reasons import FLAGS, REASONS
from prep.schema import REPORT, WINDOWS_TABLE

# Paul Tol "bright" (colour-blind safe): blue, cyan, green, yellow, red, purple, grey
TOL = ["#4477AA", "#66CCEE", "#228833", "#CCBB44", "#EE6677", "#AA3377", "#BBBBBB"]
GRADE = {"good": "#4477AA", "noisy": "#CCBB44", "unusable": "#EE6677"}


def _png(fig) -> str:
    import matplotlib.pyplot as plt
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=96, bbox_inches="tight")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode()


def _img(src: str, alt: str) -> str:
    return f'<figure><img src="{src}" alt="{html.escape(alt)}"><figcaption>{html.escape(alt)}' \
           f'</figcaption></figure>'


def _table(df: pd.DataFrame, caption: str) -> str:
    return (f"<table><caption>{html.escape(caption)}</caption>" +
            df.to_html(index=False, border=0, escape=True).split("\n", 1)[1].rsplit("</table>", 1)[0]
            + "</table>")


def _quality_strips(ds) -> str:
    import matplotlib.pyplot as plt
    w = ds._table("windows") if (ds.path / WINDOWS_TABLE).exists() else pd.DataFrame()
    if w.empty:
        return "<p>No quality windows in this dataset.</p>"
    fs = ds.records.set_index("record")["fs"]
    rows = w[["record", "lead"]].drop_duplicates().to_numpy().tolist()
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
    return _img(_png(fig), "Quality strip: each lead's window grades over time (blue good, "
                           "yellow noisy, red unusable)")


def _class_means(ds) -> str:
    import matplotlib.pyplot as plt
    t = ds.table
    kept = t[t.included].sort_values("tensor_index")
    if kept.empty:
        return "<p>No kept beats.</p>"
    classes = [c for c in ds.class_names if (kept["beat_class"] == c).any()]
    axis = ds.lead_axis
    n_show = min(len(axis), 6)
    fig, axes = plt.subplots(n_show, len(classes), figsize=(2.6 * len(classes) + 1, 1.8 * n_show + 0.6),
                             squeeze=False, sharex=True)
    x = np.linspace(0, 1, ds.beats.shape[2])
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
                ax.plot(x, m, color=TOL[0], lw=1.2)
            ax.set_title(f"{c} ({idx.size}) {axis[j]}", fontsize=8)
            if ci == 0:
                ax.set_ylabel("normalized (a.u.)", fontsize=7)
            if j == n_show - 1:
                ax.set_xlabel("beat window (fraction)", fontsize=7)
    fig.suptitle("Mean (line) and +-1 SD (band) of kept beats per class and lead")
    return _img(_png(fig), "Kept beats per class and lead: mean and spread")


def _excluded_examples(ds, per_reason: int = 2) -> str:
    import matplotlib.pyplot as plt

    from prep.config import ReadConfig
    from prep.io.sources import Source, read_source
    t = ds.table
    out = []
    seg = ds.manifest["config"]["segment"]
    cache: dict[str, object] = {}
    for code in REASONS:
        hit = t[t.reasons.str.split(";").apply(lambda xs: code in xs)]
        if hit.empty:
            continue
        for row in hit.head(per_reason).itertuples():
            try:
                if row.record not in cache:
                    src = Path(ds.source_of(row.record))
                    kind = {".csv": "csv", ".edf": "edf"}.get(src.suffix.lower(), "wfdb")
                    cache[row.record] = read_source(Source(kind, src, row.record),
                                                    ReadConfig(**ds.manifest["config"]["read"]))
                rec = cache[row.record]
            except Exception as exc:  # the source moved or is unreadable: say so on the page
                out.append(f"<p>{html.escape(row.beat_id)}: source not readable ({html.escape(str(exc))})</p>")
                continue
            fs, r = rec.fs, int(row.r_sample)
            a, b = max(0, int(r - 2 * fs)), min(rec.n_samples, int(r + 2 * fs))
            fig, ax = plt.subplots(figsize=(6, 1.8))
            xs = rec.signals[0, a:b]
            ax.plot(np.arange(a, b) / fs, xs - np.nanmedian(xs), color="#222222", lw=0.8)
            if seg["mode"] == "fixed":
                ax.axvspan((r - seg["before_ms"] * fs / 1000) / fs,
                           (r + seg["after_ms"] * fs / 1000) / fs, color=TOL[1], alpha=0.3, lw=0)
            ax.axvline(r / fs, color=TOL[4], ls="--", lw=1)
            ax.set_xlabel("time in record (s)", fontsize=8)
            ax.set_ylabel(f"{rec.leads[0]} (mV)", fontsize=8)
            ax.set_title(f"{row.beat_id}: {row.reasons}", fontsize=8)
            out.append(_img(_png(fig), f"Excluded beat {row.beat_id} ({code}); run "
                                       f"'beatmill why {ds.path} {row.beat_id}' for details"))
    return "\n".join(out) or "<p>No excluded beats.</p>"


def _rhythm(ds) -> str:
    import matplotlib.pyplot as plt
    t = ds.table
    kept = t[t.included & t.rr_prev_s.notna()]
    if kept.empty:
        return "<p>No RR intervals.</p>"
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(11, 3.2))
    for k, (rec, g) in enumerate(kept.groupby("record")):
        a1.plot(g.r_time_s / 60, (60 / g.rr_prev_s).rolling(10, min_periods=1).median(),
                lw=0.9, color=TOL[k % 6], label=str(rec))
    a1.set_xlabel("time in record (min)")
    a1.set_ylabel("heart rate (bpm, median of 10 beats)")
    a1.set_title("Heart-rate trend per record")
    if kept.record.nunique() <= 12:
        a1.legend(fontsize=7, ncol=2)
    a2.hist(kept.rr_prev_s.clip(0, 3), bins=80, color=TOL[0])
    a2.set_xlabel("RR interval (s)")
    a2.set_ylabel("kept beats (count)")
    a2.set_title("RR distribution")
    return _img(_png(fig), "Heart-rate trend and RR-interval distribution of kept beats")


def write_report(run_dir: str | Path, out: str | Path | None = None) -> Path:
    """Write RUN_DIR/report.html (or ``out``) and return its path."""
    import matplotlib
    matplotlib.use("Agg")
    ds = open_dataset(run_dir)
    t, leads, recs, m = ds.table, ds.leads, ds.records, ds.manifest
    parts = [f"<h1>beatmill dataset report</h1><p class='sub'>{html.escape(str(ds.path))} &middot; "
             f"beatmill {html.escape(m['tool']['version'])} &middot; config "
             f"{html.escape(m['config_sha256'][:16])}</p>",
             "<p class='caution'>Research use only: not a medical device, not for diagnosis. "
             "Quality decisions are heuristics; have qualified clinical staff review data that "
             "informs clinical research.</p>"]
    c = m["counts"]
    parts.append("<h2>Counts</h2>")
    parts.append(_table(pd.DataFrame([{"records": c["records"], "ok": c["records_ok"],
                                       "failed": c["records_failed"],
                                       "no usable lead": c["records_no_usable_lead"],
                                       "beats detected": c["beats"], "kept": c["beats_kept"],
                                       "excluded": c["beats_excluded"]}]), "Records and beats"))
    ex = [{"reason": k, "beats": v, "meaning": REASONS.get(k, ("", ""))[1]}
          for k, v in c["excluded_by_reason"].items()]
    parts.append(_table(pd.DataFrame(ex or [{"reason": "-", "beats": 0, "meaning": ""}]),
                        "Excluded beats per reason code"))
    fl = t.loc[t.included, "beat_flags"].str.split(";").explode()
    fl = fl[fl != ""].value_counts()
    parts.append(_table(pd.DataFrame({"flag": fl.index, "kept beats": fl.values,
                                      "meaning": [FLAGS.get(f, "") for f in fl.index]})
                        if len(fl) else pd.DataFrame([{"flag": "-", "kept beats": 0}]),
                        "Warnings on kept beats"))
    cls = pd.crosstab(t["split"].replace("", "-"), t["beat_class"], values=t["included"],
                      aggfunc="sum").fillna(0).astype(int)
    cls.columns.name = None
    cls = cls.reset_index()
    parts.append(_table(cls, "Kept beats per split and class"))
    cy = m.get("class_yield") or {}
    if cy.get("by_class"):
        rows = [{"class": k, "reference beats": v["reference"],
                 "never detected": v["reference"] - v["detected"], "kept": v["kept"],
                 "kept share": "-" if v["kept_share"] is None else f"{v['kept_share']:.1%}"}
                for k, v in cy["by_class"].items()]
        parts.append(_table(pd.DataFrame(rows), "Reference beats kept, per class "
                            f"({cy['records_with_reference']} annotated records)"))
        parts += [f"<p class='caution'>{html.escape(w)}</p>" for w in cy.get("warnings", [])]
    pat = t.groupby(["patient", "split"]).agg(detected=("included", "size"),
                                              kept=("included", "sum")).reset_index()
    parts.append(_table(pat, "Beats per patient"))
    lt = leads[["record", "lead", "used", "reason"] +
               [c for c in ("usable_share", "main_fault") if c in leads]].copy()
    parts.append(_table(lt, "Leads used and rejected"))
    bad = recs[recs.status != "ok"][["record", "status", "error"]]
    if len(bad):
        parts.append(_table(bad, "Records not used"))
    parts += ["<h2>Signal quality over time</h2>", _quality_strips(ds),
              "<h2>Kept beats per class</h2>", _class_means(ds),
              "<h2>Excluded beats in context</h2>", _excluded_examples(ds),
              "<h2>Rhythm</h2>", _rhythm(ds)]
    inputs = [{"record": r, "file": x["file"], "sha256": x["sha256"]}
              for r, xs in zip(recs.record, recs.inputs) for x in xs]
    env = m.get("environment", {})
    parts += ["<h2>Provenance</h2>",
              _table(pd.DataFrame([{"tool": f"beatmill {m['tool']['version']}",
                                    "config sha256": m["config_sha256"],
                                    "lead axis": ", ".join(m["lead_axis"]),
                                    "tensor": " x ".join(map(str, m["tensor"]["shape"])),
                                    "python": env.get("python", "")}]), "Run"),
              _table(pd.DataFrame(inputs or [{"record": "-"}]), "Input files and checksums"),
              "<details><summary>Configuration</summary><pre>" +
              html.escape(_config_text(m["config"])) + "</pre></details>"]
    page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>beatmill report: {html.escape(ds.path.name)}</title>
<style>
body {{ font-family: system-ui, sans-serif; margin: 2rem auto; max-width: 70rem; color: #222;
       line-height: 1.45; padding: 0 1rem; }}
h1 {{ margin-bottom: 0.2rem; }} .sub {{ color: #555; margin-top: 0; }}
.caution {{ border-left: 4px solid #EE6677; padding: 0.4rem 0.8rem; background: #fbeff1; }}
table {{ border-collapse: collapse; margin: 0.8rem 0; font-size: 0.85rem; }}
caption {{ text-align: left; font-weight: 600; padding-bottom: 0.3rem; }}
th, td {{ border-bottom: 1px solid #ddd; padding: 0.2rem 0.6rem; text-align: left; }}
th {{ background: #f2f4f7; }} img {{ max-width: 100%; }} figure {{ margin: 1rem 0; }}
figcaption {{ font-size: 0.8rem; color: #555; }} pre {{ font-size: 0.75rem; }}
</style></head><body>
{''.join(parts)}
</body></html>
"""
    out = Path(out) if out else ds.path / REPORT
    out.write_text(page, encoding="utf-8")
    return out


def _config_text(cfg: dict) -> str:
    lines = []
    for sec, vals in cfg.items():
        lines.append(f"[{sec}]")
        lines += [f"{k} = {v!r}" for k, v in vals.items()]
        lines.append("")
    return "\n".join(lines)
