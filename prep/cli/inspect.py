"""The commands that read: config, check, demo, reasons, why, leads, report."""
from __future__ import annotations

from pathlib import Path
from typing import List, Optional

import typer

from prep.cli.app import _fail, app


@app.command("config")
def config_cmd(check: Optional[Path] = typer.Option(None, "--check",
                                                    metavar="CHECK", help="Validate this TOML file instead.")) -> None:
    """Print the fully commented default configuration (TOML).

    Example:

      beatmill config > beatmill.toml
    """
    from prep.config import Config
    from prep.errors import ConfigError

    if check:
        try:
            Config.from_toml(check)
        except ConfigError as exc:
            _fail("\n  ".join(["configuration is invalid:"] + exc.problems))
        typer.echo(f"{check}: valid")
        return
    typer.echo(Config().to_toml())


@app.command()
def check(run_dir: Path = typer.Argument(..., metavar="RUN_DIR", help="A dataset folder written by 'beatmill run'.")) -> None:
    """Verify a dataset: tensors, mask and tables agree and every file matches its SHA-256.

    Example:

      beatmill check runs/demo
    """
    from prep.dataset.check import check_dataset
    from prep.schema import MANIFEST

    if not (run_dir / MANIFEST).is_file():
        _fail(f"{run_dir} is not a beatmill dataset (no {MANIFEST}); give a folder written by "
              "'beatmill run'")
    problems = check_dataset(run_dir)
    if problems:
        for p in problems:
            typer.echo(f"problem: {p}", err=True)
        _fail(f"{run_dir}: {len(problems)} problem(s) found", code=1)
    typer.echo(f"{run_dir}: ok")


@app.command()
def demo(out: Path = typer.Option(Path("demo_records"), "--out", "-o", metavar="OUT", help="Folder to write."),
         overwrite: bool = typer.Option(False, "--overwrite", help="Replace files already there.")) -> None:
    """Write the synthetic demo records (byte for byte the same every time).

    Example:

      beatmill demo --out demo_records --overwrite
    """
    from prep.demo import write_demo

    if out.exists() and any(out.iterdir()) and not overwrite:
        _fail(f"{out} is not empty; pass --overwrite to replace the demo records there")
    names = write_demo(out)
    typer.echo(f"wrote {len(names)} demo records to {out}: {', '.join(names)}")


@app.command()
def reasons() -> None:
    """List every exclusion reason code and warning flag with its meaning.

    Example:

      beatmill reasons
    """
    from prep.quality.reasons import FLAGS, REASONS, group

    width = max(len(c) for c in [*REASONS, *FLAGS]) + 2
    typer.echo("Exclusion reasons (beats.parquet 'reasons'), by group and stage. A beat can hold "
               "several;\nthe manifest counts it under each, so its per-reason counts can sum to "
               "more than\nthe excluded beats. Rows with a not_a_beat reason have is_beat False.")
    for g in ("not_a_beat", "beat", "split"):
        typer.echo(f"\n {g}:")
        for code, (stage, text) in sorted(((c, v) for c, v in REASONS.items() if group(c) == g),
                                          key=lambda kv: (kv[1][0], kv[0])):
            typer.echo(f"  {code:<{width}}[{stage}] {text}")
    typer.echo("\nFlags on kept beats (beats.parquet 'beat_flags'):")
    for code, text in sorted(FLAGS.items()):
        typer.echo(f"  {code:<{width}}{text}")


@app.command()
def why(run_dir: Path = typer.Argument(..., metavar="RUN_DIR", help="A dataset folder."),
        beat_id: str = typer.Argument(..., metavar="BEAT_ID", help="A beat_id from beats.parquet, e.g. night05:10536."),
        plot: Optional[Path] = typer.Option(None, "--plot", metavar="PLOT", help="Also draw the beat in context "
                                            "to this PNG file.")) -> None:
    """Explain one beat: where it is, its label, kept or not, and every reason with its evidence.

    Example:

      beatmill why runs/demo night05:10536 --plot night05.png
    """
    from prep.dataset.view import open_dataset
    from prep.errors import BeatmillError

    try:
        ds = open_dataset(run_dir)
        e = ds.explain(beat_id)
    except BeatmillError as exc:
        _fail(str(exc))
    typer.echo(f"beat      {e['beat_id']}")
    typer.echo(f"record    {e['record']} (patient {e['patient']}, split {e['split'] or '-'})")
    typer.echo(f"time      {e['r_time_s']:.3f} s (sample {e['r_sample']})")
    typer.echo(f"label     {e['label'] or '-'} (class {e['beat_class']})")
    typer.echo(f"leads     {', '.join(e['leads_used']) or '-'} used")
    typer.echo("status    " + (f"kept, tensor row {e['tensor_index']}" if e["included"]
                               else "excluded, " + ("a heartbeat" if e["is_beat"] else
                                                    "not counted as a heartbeat")))
    for x in e["reasons"]:
        ev = ""
        if "score" in x:
            ev = f": {x['score_name']} = {x['score']}, threshold {x['threshold_name']} = {x['threshold']}"
        typer.echo(f"reason    {x['code']} [stage {x['stage']}, group {x['group']}] "
                   f"{x['explanation']}{ev}")
    for x in e["beat_flags"]:
        typer.echo(f"flag      {x['code']}: {x['explanation']}")
    for w in e["windows"]:
        typer.echo(f"window    {w['lead']}: {w['grade']} ({w['start_s']}-{w['end_s']} s)" +
                   (f", decided by {w['decided_by']}" if w["decided_by"] else "") +
                   (f"; rhythm: {w['rhythm_findings']}" if w.get("rhythm_findings") else ""))
    sc = ", ".join(f"{k} {v:.3g}" if isinstance(v, float) else f"{k} {v}"
                   for k, v in e["scores"].items() if v is not None)
    typer.echo(f"scores    {sc}")
    if plot:
        from prep.report.figures import plot_beat_context
        try:
            path = plot_beat_context(ds, beat_id, plot)
        except (BeatmillError, OSError) as exc:
            _fail(f"cannot draw the beat: {exc}")
        typer.echo(f"plot      {path}")


@app.command()
def leads(inputs: List[str] = typer.Argument(..., metavar="INPUTS", help="Records or folders to survey."),
          require: List[str] = typer.Option([], "--require", metavar="REQUIRE", help="Rule every (or one) lead must "
                                            "meet, e.g. 'usable>=0.8' or 'II:good>=0.5'; "
                                            "repeatable."),
          config: Optional[Path] = typer.Option(None, "--config", "-c", metavar="CONFIG", help="TOML configuration."),
          fs: Optional[float] = typer.Option(None, "--fs", metavar="FS", help="Sampling rate of CSV inputs."),
          workers: Optional[int] = typer.Option(None, "--workers", "-w", min=1, metavar="WORKERS",
                                                help="Parallel processes (default: all cores)."),
          quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress lines.")) -> None:
    """Survey lead quality without writing a dataset; exit 1 when a lead fails a --require rule.

    Measures: usable (share of windows not unusable), good (share of good windows).

    Example:

      beatmill leads demo_records --require 'usable>=0.9'
    """
    from prep.config import Config
    from prep.errors import ConfigError
    from prep.report.survey import check_rules, parse_rule, survey

    try:
        cfg = Config.from_toml(config) if config else Config()
        if fs:
            cfg = cfg.replace(read={"csv_fs_hz": float(fs)})
        rules = [parse_rule(r) for r in require]

        def progress(name, done, total):
            typer.echo(f"beatmill: surveyed {done}/{total} {name}", err=True)
        table, failed = survey(inputs, cfg, workers, None if quiet else progress)
    except ConfigError as exc:
        _fail("\n  ".join(exc.problems))
    if table.empty and not failed:
        _fail("no record found")
    typer.echo(f"{'record':<14}{'lead':<8}{'used':<6}{'usable':>8}{'good':>7}{'noisy':>7}"
               f"{'unusable':>10}  main fault / reason")
    for row in table.itertuples():
        typer.echo(f"{row.record:<14}{row.lead:<8}{'yes' if row.used else 'no':<6}"
                   f"{row.usable:>8.2f}{row.good:>7.2f}{row.windows_noisy:>7}{row.windows_unusable:>10}"
                   f"  {row.reason or row.main_fault}")
    for name, err in failed:
        typer.echo(f"{name}: failed: {err}", err=True)
    broken = check_rules(table, rules)
    for msg in broken:
        typer.echo(f"rule failed: {msg}", err=True)
    raise typer.Exit(1 if broken or failed else 0)


@app.command()
def report(run_dir: Path = typer.Argument(..., metavar="RUN_DIR", help="A dataset folder."),
           out: Optional[Path] = typer.Option(None, "--out", "-o",
                                              metavar="OUT", help="HTML file to write (default RUN_DIR/report.html).")
           ) -> None:
    """Write a self-contained HTML report to read before training on a dataset.

    Example:

      beatmill report runs/demo
    """
    from prep.errors import BeatmillError
    from prep.report.html import write_report

    if out is not None and not out.parent.is_dir():
        _fail(f"--out {out}: folder {out.parent} does not exist; create it or choose another path")
    try:
        path = write_report(run_dir, out)
    except BeatmillError as exc:
        _fail(str(exc))
    except OSError as exc:
        _fail(f"cannot write the report ({exc.strerror or exc}: {exc.filename or out})", code=4)
    typer.echo(f"wrote {path}")
