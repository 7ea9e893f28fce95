"""``beatmill``: the command-line door to the pipeline.

Diagnostics and progress go to stderr, results to stdout. Exit codes (README, "Exit codes"):
0 all records ok; 1 some records failed but a dataset was written; 2 usage or configuration error;
3 no record could be used; 4 the dataset could not be written (space, permissions).
"""
from __future__ import annotations

import logging
import os
import sys
from pathlib import Path
from typing import List, Optional

import typer
import typer.core


def _plain_argument_help() -> None:
    """Show arguments as their metavar (``INPUTS...``), without typer's ``{...}`` and type
    labels; display only, and skipped where a typer version lacks these hooks."""
    arg = typer.core.TyperArgument
    if hasattr(arg, "_usage_display_name") and hasattr(arg, "display_type_rich"):
        arg._usage_display_name = lambda self: (self.metavar or self.name.upper()) + (
            "..." if self.nargs != 1 else "")
        arg.display_type_rich = lambda self, ctx: None


_plain_argument_help()

app = typer.Typer(add_completion=False, no_args_is_help=True, rich_markup_mode=None,
                  pretty_exceptions_enable=False,
                  context_settings={"help_option_names": ["-h", "--help"],
                                    "max_content_width": 100},
                  help="Turn raw ECG records into clean, fixed-length, normalized beat tensors "
                       "with a provenance manifest.\n\nExample:\n\n"
                       "  beatmill run demo_records --out runs/demo\n\n"
                       "Research use only: not a medical device, not for diagnosis.")

log = logging.getLogger("prep")


def _version(value: bool) -> None:
    if value:
        from prep import __version__
        typer.echo(f"beatmill {__version__}")
        raise typer.Exit()


@app.callback()
def _root(version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                       help="Print the version and exit.")) -> None:
    """Turn raw ECG records into clean, fixed-length, normalized beat tensors with a provenance
    manifest.

    Example:

      beatmill run demo_records --out runs/demo

    Research use only: not a medical device, not for diagnosis.
    """


def _setup_logging(verbose: int, quiet: bool) -> None:
    level = logging.ERROR if quiet else logging.DEBUG if verbose > 1 else \
        logging.INFO if verbose == 1 else logging.WARNING
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("beatmill: %(message)s"))
    log.handlers[:] = [handler]
    log.setLevel(level)


def _fail(msg: str, code: int = 2) -> None:
    typer.echo(f"beatmill: error: {msg}", err=True)
    raise typer.Exit(code)


@app.command()
def run(inputs: List[str] = typer.Argument(..., metavar="INPUTS", help="WFDB header files, record base names, CSV "
                                           "files or folders to search."),
        out: Path = typer.Option(..., "--out", "-o", metavar="OUT", help="Dataset folder to write."),
        config: Optional[Path] = typer.Option(None, "--config", "-c",
                                              metavar="CONFIG", help="TOML configuration (see 'beatmill config')."),
        leads: Optional[str] = typer.Option(None, "--leads", metavar="LEADS", help="Lead axis, comma-separated, "
                                            "e.g. MLII,V5 (aliases understood)."),
        fs: Optional[float] = typer.Option(None, "--fs", metavar="FS", help="Sampling rate of CSV inputs in Hz."),
        train_classes: Optional[str] = typer.Option(None, "--train-classes",
                                                    metavar="TRAIN_CLASSES", help="Classes kept in the training split, "
                                                         "comma-separated, e.g. N."),
        patients: Optional[Path] = typer.Option(None, "--patients", metavar="PATIENTS", help="CSV record,patient "
                                                "mapping for patient-wise splits."),
        seed: Optional[int] = typer.Option(None, "--seed", metavar="SEED", help="Seed of the patient split."),
        workers: Optional[int] = typer.Option(None, "--workers", "-w", min=1,
                                              metavar="WORKERS", help="Parallel processes (default: all cores)."),
        shards: Optional[str] = typer.Option(None, "--shards", metavar="SHARDS", help="Where per-record shards go "
                                             "(folder or fsspec URL; default OUT/.shards)."),
        dask: Optional[str] = typer.Option(None, "--dask", metavar="DASK", help="dask.distributed scheduler "
                                           "address, or 'local' for a LocalCluster."),
        overwrite: bool = typer.Option(False, "--overwrite",
                                       help="Replace an existing dataset folder."),
        verbose: int = typer.Option(0, "--verbose", "-v", count=True, show_default=False, help="More messages."),
        quiet: bool = typer.Option(False, "--quiet", "-q", help="Errors only.")) -> None:
    """Process records and write a dataset folder, split by patient.

    Re-running the same command on the same folder resumes: records whose committed shard
    matches their inputs are not processed again.

    Example:

      beatmill run demo_records --out runs/demo --leads II,V5 --train-classes N --workers 2
    """
    _setup_logging(verbose, quiet)
    if fs is not None and not fs > 0:
        _fail(f"--fs {fs:g}: a sampling rate is a positive number of Hz (for example --fs 250)")
    from prep.dataset.run import run as run_dataset
    from prep.errors import BeatmillError, ConfigError

    try:
        cfg = _config_from_options(config, leads, train_classes, patients, seed)
    except ConfigError as exc:
        _fail("\n  ".join(["configuration is invalid:"] + exc.problems))
    progress, stop = _progress(quiet)
    try:
        summary = run_dataset(inputs, out, config=cfg, overwrite=overwrite, csv_fs=fs,
                              progress=progress, workers=workers, shards=shards, dask=dask)
    except ConfigError as exc:
        stop()
        _fail("\n  ".join(exc.problems) if len(exc.problems) > 1 else str(exc))
    except OSError as exc:
        stop()
        _fail(f"cannot write the dataset ({exc.strerror or exc}: {exc.filename or out}); {out} is "
              "as it was before this run", code=4)
    except BeatmillError as exc:
        stop()
        _fail(str(exc))
    stop()
    if not quiet:
        _print_summary(summary)
    raise typer.Exit(summary.exit_code)


def _config_from_options(config, leads, train_classes, patients, seed):
    """The configuration file (or the defaults) with the command-line options on top."""
    from prep.config import Config

    def items(text):
        return [x.strip() for x in text.split(",") if x.strip()]
    cfg = Config.from_toml(config) if config else Config()
    if leads:
        cfg = cfg.replace(leads={"select": items(leads)})
    if train_classes:
        cfg = cfg.replace(labels={"train_classes": items(train_classes)})
    if patients:
        cfg = cfg.replace(split={"patient_map": str(patients)})
    if seed is not None:
        cfg = cfg.replace(split={"seed": seed})
    return cfg


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def _print_summary(summary) -> None:
    """The end-of-run lines: counts, splits, class yield, then the dataset's warnings."""
    from prep.dataset.run import split_summary, yield_summary
    typer.echo(f"wrote {summary.out}: {_plural(summary.n_records, 'record')} "
               f"({summary.n_failed} failed, {summary.n_no_lead} without a usable lead), "
               f"{summary.n_beats} beats detected, {summary.n_kept} kept; lead axis "
               f"{','.join(summary.axis)}")
    if summary.n_reused:
        typer.echo(f"resumed: {_plural(summary.n_reused, 'record')} taken from committed shards, "
                   f"{summary.n_records - summary.n_reused} processed now")
    if summary.splits:
        typer.echo(split_summary(summary.splits))
    text = yield_summary(summary.class_yield) if summary.class_yield else ""
    if text:
        typer.echo(text)
    for w in summary.warnings or []:
        typer.echo(f"warning: {w}")


def _progress(quiet: bool):
    """A Rich progress bar on an interactive stderr; off a terminal (a log file, CI) one line
    per record; nothing with --quiet."""
    if quiet:
        return None, lambda: None
    import prep.pipeline.chunks as chunks
    if not sys.stderr.isatty() or os.environ.get("CI"):
        def line(res, done, total):
            what = res.error if res.status != "ok" else f"{res.n_beats} beats, {res.n_kept} kept"
            typer.echo(f"beatmill: record {done}/{total} {res.name}: {res.status}, {what}",
                       err=True)

        def chunk_line(name, done, total):  # a long record: where it is within itself
            if done < total:
                typer.echo(f"beatmill: {name}: chunk {done}/{total}", err=True)
        chunks.on_chunk = chunk_line
        return line, lambda: setattr(chunks, "on_chunk", None)
    from rich.console import Console
    from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TextColumn,
                               TimeElapsedColumn, TimeRemainingColumn)

    bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                   TextColumn("{task.fields[kept]} beats kept"), TimeElapsedColumn(),
                   TextColumn("left"), TimeRemainingColumn(),
                   console=Console(stderr=True, no_color=bool(os.environ.get("NO_COLOR"))))
    state = {"task": None, "kept": 0, "chunk": None}
    bar.start()

    def update(res, done, total):
        if state["task"] is None:
            state["task"] = bar.add_task("records", total=total, kept=0)
        state["kept"] += res.n_kept
        bar.update(state["task"], completed=done, kept=state["kept"])

    def chunk(name, done, total):  # in this process only: a long record's own progress
        if state["chunk"] is None:
            state["chunk"] = bar.add_task(f"chunks of {name}", total=total, kept=state["kept"])
        bar.update(state["chunk"], completed=done, total=total,
                   visible=done < total)

    chunks.on_chunk = chunk

    def stop():
        bar.stop()
        chunks.on_chunk = None
    return update, stop


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


def main() -> None:
    """The ``beatmill`` command: every error in one style (``beatmill: error: ...``), exit 2
    for usage mistakes, 130 on Ctrl-C."""
    cx = _click_exceptions()
    try:
        code = app(standalone_mode=False)
    except cx.UsageError as exc:
        if type(exc).__name__ == "NoArgsIsHelpError":  # bare 'beatmill': the help, not an error
            typer.echo(exc.ctx.get_help())
            sys.exit(0)
        where = exc.ctx.command_path if exc.ctx else "beatmill"
        typer.echo(f"beatmill: error: {exc.format_message()} (see '{where} --help')", err=True)
        sys.exit(2)
    except (KeyboardInterrupt, getattr(cx, "Abort", KeyboardInterrupt)):
        typer.echo("beatmill: interrupted", err=True)
        sys.exit(130)
    except BrokenPipeError:  # output piped into a reader that stopped (head, less)
        sys.stderr = open(os.devnull, "w")
        sys.exit(0)
    except cx.ClickException as exc:
        typer.echo(f"beatmill: error: {exc.format_message()}", err=True)
        sys.exit(exc.exit_code)
    sys.exit(code if isinstance(code, int) else 0)


def _click_exceptions():
    """The exceptions module of the click typer runs on (recent typer versions bundle their own
    copy of click)."""
    try:
        from typer import _click
        return _click.exceptions
    except ImportError:
        import click
        return click.exceptions


if __name__ == "__main__":
    main()
