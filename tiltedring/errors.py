"""The one exception users see for bad input, and the warning category for cautions."""


class InputError(ValueError):
    """An input the tool cannot use. The message names the problem and the fix."""


class FitCaution(UserWarning):
    """A result that may mislead (few pixels, low inclination, reprojected inputs...)."""


class OutputFolderExists(InputError):
    """An output folder that already holds files, refused so earlier results are never lost.

    The message names the Python argument (``overwrite=True``); the command line words it as its
    own options (``--out``, ``--overwrite``) from :attr:`folder`.
    """

    def __init__(self, folder):
        self.folder = folder
        super().__init__(f"output folder {folder} already exists and is not empty; choose another folder or pass "
                         "overwrite=True to replace it")


class ResultNotPhysical(RuntimeError):
    """A fit whose disc-wide result lies outside its physical range (e.g. an inclination outside 0-90
    deg): nothing is written and the command exits 1. :attr:`result` keeps the fit for inspection."""

    def __init__(self, message: str, result=None):
        self.result = result
        super().__init__(message)
