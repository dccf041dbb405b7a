"""The one exception users see for bad input, and the warning category for cautions."""


class InputError(ValueError):
    """An input the tool cannot use. The message names the problem and the fix."""


class FitCaution(UserWarning):
    """A result that may mislead (few pixels, low inclination, reprojected inputs...)."""
