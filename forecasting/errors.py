"""The one error type a user of the product ever sees.

Every problem with a user's file or options is raised as :class:`OrderDataError`.
Its message says what is wrong, where (file, row, column, value) and how to fix it.
The command line and the dashboard catch this type and show the message alone,
never a traceback.
"""

from __future__ import annotations


class OrderDataError(ValueError):
    """A problem with the user's data or options, explained in plain words.

    Parameters
    ----------
    problem : str
        What is wrong, in one sentence.
    file : str, optional
        The file name as the user knows it.
    row : int, optional
        The row number as a spreadsheet shows it (the header is row 1).
    column : str, optional
        The column heading.
    value : object, optional
        The offending value, shown quoted.
    fix : str, optional
        What the user can change to make it work.
    """

    def __init__(self, problem, *, file=None, row=None, column=None, value=None, fix=None):
        self.problem = problem
        self.file = file
        self.row = row
        self.column = column
        self.value = value
        self.fix = fix
        super().__init__(self._compose())

    def _compose(self) -> str:
        where = []
        if self.file is not None:
            where.append(f"file '{self.file}'")
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.column is not None:
            where.append(f"column '{self.column}'")
        text = self.problem
        if where:
            text = f"{', '.join(where)}: {text}"
        if self.value is not None:
            shown = str(self.value)
            if len(shown) > 60:
                shown = shown[:57] + "..."
            text += f" (found '{shown}')"
        if self.fix:
            text += f". {self.fix}"
        if not text.endswith("."):
            text += "."
        return text
