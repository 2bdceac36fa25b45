"""The one hierarchy of errors the project reports to its users.

Every error the command line turns into a message is an :class:`EnsembleError`, whose
``exit_status`` is what the command exits with:

- :class:`InputError` (status 2, nothing computed or written): something the user gave is
  wrong, and the message names the file (or option), the key path and the value.
  :class:`ScenarioError` for scenario files, :class:`ProfileError` for cluster profiles,
  :class:`UsageError` for command-line options and result or part files that cannot be
  used as asked.
  :class:`ResultExists`, :class:`FingerprintMismatch`, :class:`NotAResult`,
  :class:`PartError`, :class:`WorkInProgress` and :class:`WorkLocked` are usage errors
  about result, work-in-progress and part files.
- :class:`RunError` (status 1, finished work kept): a run failed while it was computing
  (:class:`RunFailed`) or writing (:class:`StoreWriteError`, :class:`IncompleteWork`).

:class:`InterruptedAfterWriting` is not an error but an interrupt (status 130) that came
too late to cost anything: its message says the result is complete.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable


class EnsembleError(Exception):
    """An error reported to the user as one message; ``exit_status`` is the command's."""

    exit_status = 1


class InputError(EnsembleError):
    """Something the user gave is invalid: exit status 2, nothing written.

    Parameters
    ----------
    file : the file as given (or the command-line option, e.g. ``--cluster``).
    key : key path, e.g. ``model.flows[2].rate`` or ``parameters.R0.sd``; ``""`` for the
        file as a whole.
    value : the offending value as written (``repr``-able), or None.
    message : what is wrong, in the modeller's terms.
    hint : an optional suggestion, such as ``did you mean 'latent_days'?``.
    """

    exit_status = 2

    def __init__(self, file: str, key: str, value: object, message: str,
                 hint: str | None = None):
        self.file = file
        self.key = key
        self.value = value
        self.message = message
        self.hint = hint
        super().__init__(str(self))

    def __str__(self) -> str:
        where = f"{self.file}: {self.key}" if self.key else self.file
        text = f"{where}: {self.message}"
        if self.value is not None:
            text += f" (value: {self.value!r})"
        if self.hint:
            text += f"; {self.hint}"
        return text


class ScenarioError(InputError):
    """An invalid scenario file."""


class ProfileError(InputError):
    """An invalid or missing cluster profile."""


class _Collected(InputError):
    """Several independent problems found in one file, reported together (one line
    each); the first gives the attributes."""

    def __init__(self, errors: list[InputError]):
        self.errors = list(errors)
        first = self.errors[0]
        super().__init__(first.file, first.key, first.value, first.message, first.hint)

    def __str__(self) -> str:
        return "\n".join(InputError.__str__(e) for e in self.errors)


class ScenarioErrors(_Collected, ScenarioError):
    """Several problems in one scenario file."""


class ProfileErrors(_Collected, ProfileError):
    """Several problems in one cluster profile."""


class UsageError(InputError):
    """Command-line options, or files given to a command, that cannot be used as asked."""


class ResultExists(UsageError):
    """The result file exists and replacing it was not asked for (nothing computed)."""


class FingerprintMismatch(UsageError):
    """Work in progress to resume belongs to a different scenario or settings."""


class NotAResult(UsageError):
    """A file given as a result is missing, not netCDF, work in progress or a part file."""


class PartError(UsageError):
    """Part files of a sharded run that cannot be merged, or a file that is not a part."""


class WorkInProgress(UsageError):
    """The work directory of a result holds saved work that the run was not asked to
    continue (``--resume``) or discard (``--force``), or is not the program's own."""


class WorkLocked(UsageError):
    """Another process is running on the same work directory (it holds its lock)."""


class RunError(EnsembleError):
    """A run failed while computing or writing; finished work is kept (exit status 1)."""


class RunFailed(RunError):
    """A chunk of members could not be computed (its task raised, or its worker kept
    dying)."""


class StoreWriteError(RunError):
    """Writing the work in progress or the result failed (unwritable directory, full
    disk...); chunks already saved are kept."""

    @classmethod
    def from_os_error(cls, error: OSError, where: object) -> StoreWriteError:
        """One line for a failed write: the file (``where`` when the error names none)
        and the system's reason ("No space left on device" on a full disk).  Whether
        finished chunks wait for a resume is for the command line to say, which looks."""
        reason = error.strerror or str(error)
        return cls(f"cannot write {error.filename or where}: {reason}")


class IncompleteWork(RunError):
    """A result was to be written before every one of its members was saved."""


class InterruptedAfterWriting(KeyboardInterrupt):
    """An interrupt that came once the result file was complete, while its work in
    progress was being removed: the result is whole and what is left of the work
    directory is no longer needed (exit status 130 all the same, as for any interrupt)."""

    def __init__(self, result: object, work: object):
        super().__init__(f"interrupted after {result} was written: the result is complete, "
                         f"and what is left of {work} is no longer needed")


def did_you_mean(word: str, choices: Iterable[str]) -> str | None:
    """A "did you mean" hint naming the closest of ``choices``, or None if none is close."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f"did you mean {close[0]!r}?" if close else None
