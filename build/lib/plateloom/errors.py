"""The one exception type plateloom raises for bad input."""


class InputError(ValueError):
    """Bad input named precisely: which file, which row or key, and how to fix it."""

    def __init__(self, where: str, problem: str, fix: str = "") -> None:
        self.where = where
        self.problem = problem
        self.fix = fix
        message = f"{where}: {problem}"
        if fix:
            message += f" Fix: {fix}"
        super().__init__(message)
