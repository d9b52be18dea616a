"""Error classes. Every message is one sentence a user can act on; the GUI shows it verbatim."""


class ChunkscopeError(ValueError):
    """Base class for every error the tool reports to a user."""


class CheckpointError(ChunkscopeError):
    """A checkpoint file cannot be used; the message names the file and the problem."""


class TextError(ChunkscopeError):
    """An evaluation text cannot be used (empty, not UTF-8, unreadable)."""


class SettingsError(ChunkscopeError):
    """Sweep settings that cannot work (bad grid, posterior noise on a plain codec, ...)."""


class SweepCancelled(Exception):
    """Raised inside a sweep when its caller asked it to stop; nothing half-made is returned."""
