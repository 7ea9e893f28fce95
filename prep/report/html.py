"""``beatmill report``: one self-contained HTML page to read before training on a dataset.

Figures (charts.py) are matplotlib PNGs embedded as data URIs; the few lines of script that sort
tables are inline, so the page needs no network.
"""
from __future__ import annotations

import html
from pathlib import Path

import pandas as pd

from prep.dataset.view import open_dataset
from prep.report import charts
from prep.quality.reasons import FLAGS, REASONS
from prep.schema import REPORT

def _table(df: pd.DataFrame, caption: str) -> str:
    return (f"<table><caption>{html.escape(caption)}</caption>" +
            df.to_html(index=False, border=0, escape=True).split("\n", 1)[1].rsplit("</table>", 1)[0]
            + "</table>")


def _record_table(ds, top: int = 200) -> str:
    """One sortable row per record (the worst kept shares first; large collections: the
    worst ``top``)."""
    t, recs, leads = ds.table, ds.records, ds.leads
    reasons = t.loc[~t.included, ["record", "reasons"]]
    top_reason = (reasons.assign(r=reasons.reasons.str.split(";")).explode("r")
                  .groupby("record")["r"].agg(lambda v: ", ".join(v.value_counts().index[:2]))
                  if len(reasons) else pd.Series(dtype=str))
    used = leads[leads.used.astype(bool)].groupby("record")["lead"].agg(", ".join) \
        if len(leads) else pd.Series(dtype=str)
    df = pd.DataFrame({"record": recs.record, "status": recs.status,
                       "fs (Hz)": recs.fs.round(1), "minutes": (recs.duration_s / 60).round(1),
                       "leads used": recs.record.map(used).fillna("-"),
                       "beats": recs.n_beats, "kept": recs.n_kept,
                       "kept %": (100 * recs.n_kept / recs.n_beats.where(recs.n_beats > 0))
                       .round(1),
                       "top reasons": recs.record.map(top_reason).fillna("")})
    df = df.sort_values(["kept %", "record"], na_position="first")
    note = "" if len(df) <= top else f" (the {top} with the lowest kept share of {len(df)})"
    return _sortable(df.head(top), f"Records{note}; click a column to sort")


def _reason_matrix(ds, top: int = 30) -> str:
    """Excluded beats per reason and record, the records with the most exclusions first."""
    t = ds.table
    ex = t.loc[~t.included, ["record", "reasons"]]
    if ex.empty:
        return "<p>No beat was excluded.</p>"
    long = ex.assign(reason=ex.reasons.str.split(";")).explode("reason")
    m = pd.crosstab(long.record, long.reason)
    n_with = len(m)
    m = m.loc[m.sum(axis=1).sort_values(ascending=False).index[:top]]
    m = m[m.sum().sort_values(ascending=False).index]
    m.columns.name = None
    note = (f", the {len(m)} records with exclusions, most first" if len(m) == n_with else
            f", the {len(m)} of {n_with} records with exclusions that have the most")
    return _sortable(m.reset_index(), "Excluded beats per record and reason" + note +
                     "; a beat with several reasons counts under each")


def _sortable(df: pd.DataFrame, caption: str) -> str:
    body = df.to_html(index=False, border=0, na_rep="-", classes="sortable", escape=True)
    return f"<p class='cap'>{html.escape(caption)}</p>{body}"


_SORT_JS = """<script>
document.querySelectorAll('table.sortable th').forEach(function (th) {
  th.style.cursor = 'pointer';
  th.addEventListener('click', function () {
    var table = th.closest('table'), body = table.tBodies[0];
    var i = Array.prototype.indexOf.call(th.parentNode.children, th);
    var asc = th.dataset.asc !== '1'; th.dataset.asc = asc ? '1' : '0';
    var rows = Array.prototype.slice.call(body.rows);
    rows.sort(function (a, b) {
      var x = a.cells[i].textContent, y = b.cells[i].textContent;
      var nx = parseFloat(x), ny = parseFloat(y);
      var c = (!isNaN(nx) && !isNaN(ny)) ? nx - ny : x.localeCompare(y);
      return asc ? c : -c;
    });
    rows.forEach(function (r) { body.appendChild(r); });
  });
});
</script>"""


def _counts(ds) -> list[str]:
    """Counts, reasons, flags, split balance, class yield, patients, records and leads."""
    t, leads, recs, m = ds.table, ds.leads, ds.records, ds.manifest
    parts: list[str] = []
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
    parts.append(_split_balance(m))
    parts += [f"<p class='caution'>{html.escape(w)}</p>" for w in m.get("warnings", [])]
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
    lt["used"] = lt["used"].map({True: "yes", False: "no"})
    parts.append("<h2>Records</h2>" + _record_table(ds) + _reason_matrix(ds))
    parts.append("<details><summary>Leads used and rejected</summary>" +
                 _table(lt, "Leads used and rejected") + "</details>")
    bad = recs[recs.status != "ok"][["record", "status", "error"]]
    if len(bad):
        parts.append(_table(bad, "Records not used"))
    return parts


def _provenance(ds) -> list[str]:
    """Run, input files with their checksums and the configuration, collapsed."""
    recs, m = ds.records, ds.manifest
    inputs = [{"record": r, "file": x["file"], "sha256": x["sha256"]}
              for r, xs in zip(recs.record, recs.inputs) for x in xs]
    env = m.get("environment", {})
    return ["<h2>Provenance</h2><details><summary>Run, input files and configuration"
              "</summary>",
              _table(pd.DataFrame([{"tool": f"beatmill {m['tool']['version']}",
                                    "config sha256": m["config_sha256"][:_HASH],
                                    "lead axis": ", ".join(m["lead_axis"]),
                                    "tensor": " x ".join(map(str, m["tensor"]["shape"])),
                                    "python": env.get("python", "")}]), "Run"),
              _table(pd.DataFrame(inputs[:500] or [{"record": "-"}]),
                     "Input files and checksums" + (f" (the first 500 of {len(inputs)}; all in "
                                                    "records.parquet)" if len(inputs) > 500
                                                    else "")),
              "<p class='cap'>Configuration (TOML; 'beatmill config --check' reads it)</p><pre>" +
              html.escape(_config_text(m["config"])) + "</pre></details>"]


def write_report(run_dir: str | Path, out: str | Path | None = None) -> Path:
    """Write RUN_DIR/report.html (or ``out``) and return its path."""
    import matplotlib
    matplotlib.use("Agg")
    ds = open_dataset(run_dir)
    m = ds.manifest
    parts = [f"<h1>beatmill dataset report</h1><p class='sub'>{html.escape(str(ds.path))} &middot; "
             f"beatmill {html.escape(m['tool']['version'])} &middot; config "
             f"{html.escape(m['config_sha256'][:_HASH])}</p>",
             "<p class='caution'>Research use only: not a medical device, not for diagnosis. "
             "Quality decisions are heuristics; have qualified clinical staff review data that "
             "informs clinical research.</p>"]
    parts += _counts(ds)
    parts += ["<h2>Signal quality over time</h2>", charts.quality_strips(ds),
              "<h2>Kept beats per class</h2>", charts.class_means(ds),
              "<h2>Scores that decide exclusions</h2>", charts.score_histograms(ds),
              charts.window_histograms(ds),
              "<h2>Excluded beats in context</h2>", charts.excluded_examples(ds),
              "<h2>Rejected leads</h2>", charts.rejected_leads(ds),
              "<h2>Rhythm</h2>", charts.rhythm(ds)]
    parts += _provenance(ds)
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
.cap {{ font-weight: 600; margin-bottom: 0.2rem; }} table.sortable th {{ user-select: none; }}
</style></head><body>
{''.join(parts)}
{_SORT_JS}
</body></html>
"""
    out = Path(out) if out else ds.path / REPORT
    out.write_text(page, encoding="utf-8")
    return out


def _config_text(cfg: dict) -> str:
    """The configuration as TOML, as 'beatmill config' writes it."""
    from prep.config import Config
    try:
        return Config.from_dict(cfg).to_toml(comments=False)
    except Exception:  # a dataset of another version: the keys as they are
        return "\n".join(f"[{sec}]\n" + "\n".join(f"{k} = {v!r}" for k, v in vals.items())
                         for sec, vals in cfg.items())


_HASH = 16  # hex digits of a SHA-256 shown in the report


def _split_balance(m: dict) -> str:
    """Kept beats per split and class, with each split's share of the class."""
    sp = m.get("splits") or {}
    classes = sorted({c for v in sp.values() for c in v["classes"]})
    total = {c: sum(v["classes"].get(c, 0) for v in sp.values()) for c in classes}
    beats = sum(v["beats"] for v in sp.values())
    rows = []
    for name in ("train", "val", "test"):
        v = sp.get(name, {"beats": 0, "patients": [], "classes": {}})
        row = {"split": name, "patients": len(v["patients"]),
               "beats": f"{v['beats']} ({v['beats'] / beats:.0%})" if beats else "0"}
        for c in classes:
            k = v["classes"].get(c, 0)
            row[c] = f"{k} ({k / total[c]:.0%})" if total[c] else "0"
        rows.append(row)
    return _table(pd.DataFrame(rows), "Kept beats per split and class (share of the class)")
