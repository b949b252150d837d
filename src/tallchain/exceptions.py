"""Every public error and warning of tallchain, in one place.

Errors carry one line that names the field and the fix (`InputError`), or say what stopped and
what was kept (`SamplingInterrupted`). Warnings carry the advice in their text.
"""


class InputError(ValueError):
    """Bad input: the message names the field, what was got, and the fix."""


class ModeNotFoundError(RuntimeError):
    """No posterior mode was found; the message names the cause found (overflow, collinearity,
    separation, too few iterations)."""


class WorkerDiedError(RuntimeError):
    """A local worker process died before returning its task."""


class SamplingInterrupted(KeyboardInterrupt):
    """The run was interrupted (Ctrl-C or SIGTERM); ``result`` holds every completed draw.

    When a checkpoint path was given, the checkpoint is written before this is raised, and
    ``sample(..., checkpoint=path, resume=True)`` continues the run; the final draws are
    bitwise identical to those of an uninterrupted run with the same seed.
    """

    def __init__(self, result, checkpoint):
        super().__init__(f"interrupted after {result.completed_draws} draws per chain")
        self.result = result
        self.checkpoint = checkpoint


class NoisyLogRatioWarning(UserWarning):
    """The minibatch log-ratio is too noisy or too far from Gaussian for the penalty method."""


class ConvergenceWarning(UserWarning):
    """R-hat or ESS says the draws are not yet trustworthy."""


class DataWarning(UserWarning):
    """The data load, but something about them deserves a look (the text says what to do)."""


class DataNote(UserWarning):
    """Not a problem: something done with the data that a user should know of (a cache of an
    encoded table written to disk, and where). ``warnings.simplefilter("ignore", DataNote)``
    silences it."""
