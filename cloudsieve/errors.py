"""Error types users see. Each carries a message that says what is wrong and how to fix it."""


class CloudsieveError(Exception):
    """Base of every error cloudsieve reports to a user (never shown as a traceback).

    Attributes
    ----------
    exit_code : int
        Exit status the command line uses for this error.
    """

    exit_code = 1

    def __init__(self, message, problems=None):
        super().__init__(message)
        self.problems = list(problems or [])

    def __str__(self):
        text = super().__str__()
        if self.problems:
            text += "\n" + "\n".join(f"  - {p}" for p in self.problems)
        return text


class SceneError(CloudsieveError):
    """A scene file that cannot be read or fails validation."""

    exit_code = 2


class ConfigError(CloudsieveError):
    """A configuration file with unknown keys, wrong types or impossible values."""

    exit_code = 2


class OutputError(CloudsieveError):
    """An output that cannot be written (folder missing, no permission, disk full)."""

    exit_code = 3


class PathError(CloudsieveError):
    """A file name that points outside the allowed data folder."""

    exit_code = 2
