"""Named errors. The CLI maps each to a one-line message and an exit code."""


class CurateError(Exception):
    """Base class for every error curate raises on purpose."""

    exit_code = 2


class ConfigError(CurateError):
    """The pipeline config is invalid: names the file, the key and what was expected."""

    def __init__(self, message: str, *, file: str | None = None, key: str | None = None):
        where = ", ".join(p for p in (f"file {file}" if file else "", f"key {key}" if key else "") if p)
        super().__init__(f"{where}: {message}" if where else message)
        self.file = file
        self.key = key


class InputError(CurateError):
    """The input root or an input set cannot be read at all (one bad sample is never this)."""


class OutputError(CurateError):
    """The output directory cannot be created or written (read-only, a file in the way, disk full)."""


class LockedError(CurateError):
    """Another live run holds the lock on this output directory."""


class ModelError(CurateError):
    """A model cannot be loaded (offline and not cached, bad checkpoint, unknown name)."""


class NotFoundError(CurateError):
    """A sample id or source asked for by explain is not in the ledger."""


class StageError(CurateError):
    """A whole stage failed for a shard (not one sample): carries stage and shard."""

    exit_code = 3

    def __init__(self, message: str, *, stage: str, shard: str | None = None):
        super().__init__(f"stage {stage}" + (f", shard {shard}" if shard else "") + f": {message}")
        self.stage = stage
        self.shard = shard
