"""The one exception family pixelfit raises on bad input.

Every loader and command refuses bad input with a :class:`PixelfitError` (or a subclass) whose
message is one line a user can act on; anything else escaping is a bug.
"""


class PixelfitError(Exception):
    """Bad input or an impossible request; the message is meant for the user."""


class DatasetError(PixelfitError):
    """A dataset path that cannot be imported as a whole."""


class RuleFileError(PixelfitError):
    """A rule file that is refused on load, with the field and the problem."""


class TrainingError(PixelfitError):
    """A ladder that cannot be trained on the given data and settings."""
