"""The one error type users see.

Every failure caused by input (a path, a file, an option, a checkpoint) is raised as
:class:`CompositionError` with one plain sentence naming the file, tensor or option.
The CLI prints that sentence and exits non-zero; it never shows a traceback for one.
"""


class CompositionError(Exception):
    """A user-facing failure: the message is one sentence that says what is wrong."""
