"""The one base class of the errors a user's input can cause.

Every module's error derives from :class:`EmulantError`; its message names the file, table,
column, row or key and what was expected. The command line and the workflow scripts print it and
exit with code 2, never with a traceback.
"""


class EmulantError(Exception):
    """An input problem, reported to the user as its message alone."""


class ReplicateFailure(EmulantError):
    """A sample that cannot be analysed; in a bootstrap replicate it marks the replicate failed.

    ``reason`` is the short tag the bootstrap counts (e.g. ``"empty arm"``).
    """

    def __init__(self, reason: str, detail: str = ""):
        self.reason = reason
        super().__init__(f"{reason}: {detail}" if detail else reason)


class NonConvergenceWarning(UserWarning):
    """A model fit stopped before converging. The point estimate logs it; a bootstrap replicate
    in which it is raised counts as failed (never as a silently wrong value)."""
