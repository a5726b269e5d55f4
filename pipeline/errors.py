"""One small hierarchy of errors.

``PipelineError`` is what the command line turns into one line on stderr and an exit status.
``InputError`` concerns one input (one scan, one table row): the batch goes on and the input is
listed in ``errors.tsv``. ``ConfigError`` and ``UsageError`` stop everything before any work
(exit 2).
"""


class PipelineError(Exception):
    """Base class of every error the tool reports to a person."""


class InputError(PipelineError, ValueError):
    """One input cannot be used; the message names the file and the reason."""

    def __init__(self, message: str, *, path: str | None = None, subject: str | None = None,
                 session: str | None = None, stage: str = "input") -> None:
        super().__init__(message)
        self.path = path
        self.subject = subject
        self.session = session
        self.stage = stage

    @property
    def reason(self) -> str:
        return str(self)


class ConfigError(PipelineError, ValueError):
    """The configuration file or an option is wrong; nothing is computed."""


class UsageError(PipelineError, ValueError):
    """The command line or a whole input table is unusable; nothing is computed."""
