"""The one exception family pixelfit raises on bad input.

Every loader and command refuses bad input with a :class:`PixelfitError` (or a subclass) whose
message is one line a user can act on; anything else escaping is a bug.
"""


class PixelfitError(Exception):
    """Bad input or an impossible request; the message is meant for the user.

    ``field`` names the setting at fault in the core's own words (``"folds"``, ``"positive"``,
    ``"out"`` ...), or is None; the message never names a control of one front end, and each
    front end may put its own name for that setting in front (the CLI its flag, the window its
    control's label).
    """

    def __init__(self, message: str = "", field: str | None = None) -> None:
        super().__init__(message)
        self.field = field


class DatasetError(PixelfitError):
    """A dataset path that cannot be imported as a whole."""


class RuleFileError(PixelfitError):
    """A rule file that is refused on load, with the field and the problem."""


class TrainingError(PixelfitError):
    """A ladder that cannot be trained on the given data and settings."""
