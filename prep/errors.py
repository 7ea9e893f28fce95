"""The package's one family of exceptions.

Every message names what failed (file, lead, stage, parameter), the rule, the value received and
what to do about it. The orchestrator adds the record and stage to messages raised by stages.
"""
from __future__ import annotations


class BeatmillError(Exception):
    """Base class for every error this package raises on purpose."""


class ConfigError(BeatmillError):
    """A configuration value breaks a rule. Raised before any record is read."""

    def __init__(self, problems: list[str] | str):
        self.problems = [problems] if isinstance(problems, str) else list(problems)
        super().__init__("; ".join(self.problems))


class RecordError(BeatmillError):
    """A record cannot be read or processed. The batch carries on with the other records."""

    def __init__(self, message: str, *, path: str | None = None, lead: str | None = None,
                 stage: str | None = None):
        self.path, self.lead, self.stage = path, lead, stage
        where = [p for p in (path and f"file {path}", lead and f"lead {lead}",
                             stage and f"stage {stage}") if p]
        super().__init__((", ".join(where) + ": " if where else "") + message)


class StageInputError(BeatmillError, ValueError):
    """A stage received input it cannot work on (wrong shape, non-finite values, too short)."""


#: Exit codes shared by every command (README: "Exit codes").
EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, EXIT_NONE_USABLE = 0, 1, 2, 3
