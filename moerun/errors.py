"""User-facing error families.

Library code raises one of these with a message written for the person at the
keyboard; ``moerun.cli.main`` turns any of them into one line on stderr and exit 2.
"""

from __future__ import annotations


class MoerunError(Exception):
    """Base of every error meant to be shown to the user as one line."""

    exit_code = 2


class BadModelFile(MoerunError):
    """A model directory, config, weight file or tokenizer is missing or invalid."""


class ImpossibleBudget(MoerunError):
    """A memory cap or slot split that cannot run the model."""


class BadTrace(MoerunError):
    """A routing trace that cannot be read or does not match its model."""


class BadOption(MoerunError):
    """A command-line option or API argument with an unusable value."""


class BadInput(MoerunError):
    """Input text or data files that cannot be used (not UTF-8, empty, ...)."""


class PageInError(MoerunError):
    """Reading an expert from storage failed (I/O error, file changed under us)."""


class ModelFileChanged(PageInError):
    """The opened model file was written to during the run (rewritten in place: its size, modification or
    change time moved since it was opened): what was computed from it cannot be trusted.  A file renamed
    over the path is another file and changes nothing (the open descriptor keeps the one opened)."""


class OutputError(MoerunError):
    """An output that cannot or must not be written: a destination that is not ours to replace, a missing
    parent directory, a full disk, a read-only file system.  Not a bad option: the same command may work
    with another destination or after space is freed.  ``errno``: the system's error number, when one caused it."""

    def __init__(self, message: str, errno: int | None = None):
        super().__init__(message)
        self.errno = errno


class ReaderError(MoerunError):
    """The prefetch reader process could not be started."""


EXIT_INTERRUPTED = 130  # 128 + SIGINT: the shells' convention for a process ended by a signal
EXIT_TERMINATED = 143  # 128 + SIGTERM


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised the way Ctrl-C raises KeyboardInterrupt (the command line's handler): every clean-up
    that runs on Ctrl-C runs on it too (partial traces written, temporaries removed, the reader stopped)."""


class ReaderStalled(UserWarning):
    """Warning: the prefetch reader stopped making progress; the engine read experts itself from then on."""
