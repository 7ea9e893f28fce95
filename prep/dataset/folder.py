"""The dataset folder's life: refusing or replacing an old dataset, the staging swap."""
from __future__ import annotations

import json
import logging
import os
import shutil
from pathlib import Path

from prep.errors import BeatmillError, ConfigError
from prep.schema import MANIFEST, REPORT, TABLE_FILES, TENSOR_FILES

log = logging.getLogger("prep")


JOURNAL = ".swap.json"  # names the staged files while they are moved in; removed last


def swap_in(staging: Path, out: Path) -> None:
    """Move the staged files into ``out``, all or nothing for a reader at any instant.

    A journal naming the staged files is written (atomically) first, the files are moved, the
    manifest last, and the journal goes. A run killed in between leaves the journal: the next
    run, ``open_dataset``, ``check`` and ``report`` complete the move before reading
    (:func:`finish_swap`), so none of them sees half an old and half a new dataset. A failure
    while writing (no space, no permission) happens in the staging folder, before anything in
    ``out`` is touched. A report of another dataset (``report.html``) goes: it would describe
    records this dataset does not hold."""
    old = _read_bytes(out / MANIFEST)
    tmp = out / (JOURNAL + ".part")
    tmp.write_text(json.dumps({"staging": staging.name,
                               "files": list(TENSOR_FILES + TABLE_FILES + (MANIFEST,))}))
    os.replace(tmp, out / JOURNAL)
    finish_swap(out, interrupted=False)
    if old is not None and old != _read_bytes(out / MANIFEST):
        (out / REPORT).unlink(missing_ok=True)


def finish_swap(out: Path, interrupted: bool = True) -> bool:
    """Complete a swap a killed run left half done (its journal is there): move the remaining
    staged files in, the manifest last; True when there was one. Raises :class:`BeatmillError`
    when the folder cannot be written (the dataset is then not readable as it stands)."""
    journal = out / JOURNAL
    try:
        info = json.loads(journal.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return False
    except (OSError, ValueError) as exc:
        raise BeatmillError(f"{journal}: unreadable swap journal ({exc}); rerun 'beatmill run' "
                            "with --overwrite to rewrite the dataset") from None
    staging = out / str(info.get("staging", ""))
    try:
        for name in info.get("files", []):
            if (staging / name).exists():
                os.replace(staging / name, out / name)
        journal.unlink()
    except PermissionError:
        raise BeatmillError(f"{out}: a run replacing this dataset was interrupted and the "
                            "folder cannot be written to finish it; ask its owner to run "
                            "'beatmill check' on it") from None
    shutil.rmtree(staging, ignore_errors=True)
    if interrupted:
        log.warning("%s: finished replacing the dataset (a run was interrupted while moving it "
                    "in)", out)
    return True


def clean_stale_staging(out: Path) -> list[str]:
    """Remove staging folders of runs that are no longer running (killed ones); returns their
    names. A staging folder is named ``.staging-PID``; one whose process lives is kept."""
    gone = []
    for d in out.glob(".staging-*"):
        try:
            pid = int(d.name.rsplit("-", 1)[1])
        except ValueError:
            continue
        if pid != os.getpid() and not _alive(pid):
            shutil.rmtree(d, ignore_errors=True)
            gone.append(d.name)
    return gone


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's process
        return True
    return True


def _read_bytes(path: Path) -> bytes | None:
    try:
        return path.read_bytes()
    except OSError:
        return None


def prepare_out(out: Path, overwrite: bool, config_hash: str, records: list[str]) -> None:
    """Refuse, before any work, an output that is in the way; nothing is deleted here.

    A dataset folder written with the same configuration hash from the same records is
    processed again in place (the outputs are the same for the same inputs); one with another
    configuration or other records needs --overwrite.
    """
    if out.exists() and not out.is_dir():
        raise ConfigError(f"output {out} exists and is not a folder; choose another --out")
    if out.is_dir():
        finish_swap(out)
        for name in clean_stale_staging(out):
            log.warning("%s: removed %s, left by a run that was stopped", out, name)
    if out.exists() and any(out.iterdir()):
        before = previous_run(out)
        same_config = before.get("config_sha256") == config_hash
        if same_config and before.get("records") == records:
            mark_run(out, config_hash, records)
            return
        if not overwrite:
            raise ConfigError(_in_the_way(out, before, config_hash, records))
        if not (out / MANIFEST).exists() and not (out / ".shards" / "RUN.json").exists():
            raise ConfigError(f"refusing to replace {out}: it holds files but no {MANIFEST}, so "
                              "it is not a beatmill dataset; remove it yourself if you mean it")
        if not same_config and (out / ".shards").exists():
            shutil.rmtree(out / ".shards")  # shards of another configuration
    if not os.access(out if out.exists() else existing_parent(out), os.W_OK):
        raise ConfigError(f"cannot write to {out}: permission denied; choose another --out")
    mark_run(out, config_hash, records)


def _in_the_way(out: Path, before: dict, config_hash: str, records: list[str]) -> str:
    fix = "choose a new --out or pass --overwrite to replace it"
    previous = before.get("config_sha256")
    if not previous:
        return f"output folder {out} is not empty; {fix}"
    if previous != config_hash:
        return (f"output folder {out} holds a dataset made with another configuration (hash "
                f"{previous[:12]}, this run {config_hash[:12]}); {fix}")
    old = before.get("records") or []
    n_old, n_new = len(old), len(records)
    gone = sorted(set(old) - set(records))
    return (f"output folder {out} holds a dataset of {n_old} record{'s' * (n_old != 1)} made from "
            f"other inputs (this run has {n_new} record{'s' * (n_new != 1)}"
            + (f"; not in this run: {', '.join(Path(g).name for g in gone[:5])}"
               + (" ..." if len(gone) > 5 else "") if gone else "") + f"); {fix}")


def mark_run(out: Path, config_hash: str, records: list[str]) -> None:
    """Record the configuration and records of the run in progress, so a killed run is resumed
    only with them."""
    (out / ".shards").mkdir(parents=True, exist_ok=True)
    (out / ".shards" / "RUN.json").write_text(json.dumps({"config_sha256": config_hash,
                                                         "records": records}))


def previous_run(out: Path) -> dict:
    """Configuration hash and record paths of the dataset in ``out``, or of the run that was
    writing it when it stopped ({} when neither says)."""
    for f in (out / MANIFEST, out / ".shards" / "RUN.json"):
        try:
            m = json.loads(f.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        if isinstance(m, dict) and m.get("config_sha256"):
            records = m.get("records") if "records" in m and isinstance(m["records"], list) \
                else (m.get("inputs") or {}).get("records")
            return {"config_sha256": m["config_sha256"], "records": records}
    return {}


def existing_parent(p: Path) -> Path:
    while not p.exists():
        p = p.parent
    return p
