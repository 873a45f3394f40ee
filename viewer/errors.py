"""The one exception type for problems a user can cause (bad folder, bad file, bad option).

The command line turns it into a one-line message on stderr and exit status 2; the window turns
it into a dialog. Programming errors are not wrapped: they still raise as themselves.
"""


class HeadlightError(Exception):
    """A user-facing problem, described in one line."""

    def __init__(self, message: str) -> None:
        one_line = " ".join(str(message).split())
        super().__init__(one_line)
        self.message = one_line

    def __str__(self) -> str:
        return self.message


class Cancelled(Exception):
    """Raised between shards, batches or stages of a long computation once the user (or the
    caller's ``cancelled()``) asked to stop. Not an error: nothing is reported."""
