"""``beatmill``: the command-line door to the pipeline.

Diagnostics and progress go to stderr, results to stdout. Exit codes (README, "Exit codes"):
0 all records ok; 1 some records failed but a dataset was written; 2 usage or configuration error;
3 no record could be used; 4 the dataset could not be written (space, permissions).
The commands live in this module (run) and in ``inspect`` (the ones that read); ``app`` holds the
command object and what they share.
"""
from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import List, Optional

import typer

from prep.cli.app import _fail, _setup_logging, app


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
        shards: Optional[str] = typer.Option(None, "--shards", metavar="SHARDS", help="Where the shards (scratch results "
                                             "per record or batch) go (folder or fsspec URL; "
                                             "default OUT/.shards)."),
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
    """The configuration file (or the defaults) with the command-line options on top; a bad
    value is reported under the option's name."""
    from prep.config import Config

    def items(text):
        return [x.strip() for x in text.split(",") if x.strip()]
    cfg = Config.from_toml(config) if config else Config()
    if leads:
        cfg = cfg.replace("option --leads", leads={"select": items(leads)})
    if train_classes:
        cfg = cfg.replace("option --train-classes",
                          labels={"train_classes": items(train_classes)})
    if patients:
        cfg = cfg.replace("option --patients", split={"patient_map": str(patients)})
    if seed is not None:
        cfg = cfg.replace("option --seed", split={"seed": seed})
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


import prep.cli.inspect  # noqa: E402,F401  (registers the reading commands, after run)


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
