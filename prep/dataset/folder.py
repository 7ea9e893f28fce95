"""The dataset folder's life: refusing or replacing an old dataset, the staging swap."""
from __future__ import annotations

import json
import logging
import os
import shutil
from pathlib import Path

from prep.errors import ConfigError
from prep.schema import MANIFEST, TABLE_FILES, TENSOR_FILES

log = logging.getLogger("prep")


def swap_in(staging: Path, out: Path) -> None:
    """Move the staged files into ``out``; the manifest, which vouches for the others, last.
    A failure while writing (no space, no permission) happens in the staging folder, before
    anything in ``out`` is touched."""
    for name in TENSOR_FILES + TABLE_FILES + (MANIFEST,):
        os.replace(staging / name, out / name)


def prepare_out(out: Path, overwrite: bool, config_hash: str) -> None:
    """Refuse, before any work, an output that is in the way; nothing is deleted here.

    A dataset folder written with the same configuration hash is processed again in place (the
    outputs are the same for the same inputs); one with another configuration needs --overwrite.
    """
    if out.exists() and not out.is_dir():
        raise ConfigError(f"output {out} exists and is not a folder; choose another --out")
    if out.exists() and any(out.iterdir()):
        previous = previous_hash(out)
        if previous == config_hash:
            mark_run(out, config_hash)
            return
        if not overwrite:
            if previous:
                raise ConfigError(f"output folder {out} holds a dataset made with another "
                                  f"configuration (hash {previous[:12]}, this run {config_hash[:12]}); "
                                  "choose a new --out or pass --overwrite to replace it")
            raise ConfigError(f"output folder {out} is not empty; choose a new --out or pass "
                              "--overwrite to replace it")
        if not (out / MANIFEST).exists() and not (out / ".shards" / "RUN.json").exists():
            raise ConfigError(f"refusing to replace {out}: it holds files but no {MANIFEST}, so "
                              "it is not a beatmill dataset; remove it yourself if you mean it")
    if not os.access(out if out.exists() else existing_parent(out), os.W_OK):
        raise ConfigError(f"cannot write to {out}: permission denied; choose another --out")
    if overwrite and (out / ".shards").exists():
        shutil.rmtree(out / ".shards")  # shards of another configuration
    mark_run(out, config_hash)


def mark_run(out: Path, config_hash: str) -> None:
    """Record the configuration of the run in progress, so a killed run is resumed only with it."""
    (out / ".shards").mkdir(parents=True, exist_ok=True)
    (out / ".shards" / "RUN.json").write_text(json.dumps({"config_sha256": config_hash}))


def previous_hash(out: Path) -> str | None:
    """Config hash of the dataset in ``out``, or of the run that was writing it when it stopped."""
    for f in (out / MANIFEST, out / ".shards" / "RUN.json"):
        try:
            return json.loads(f.read_text(encoding="utf-8")).get("config_sha256")
        except (OSError, ValueError, AttributeError):
            continue
    return None


def existing_parent(p: Path) -> Path:
    while not p.exists():
        p = p.parent
    return p
