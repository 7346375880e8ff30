"""The one error type a user of the product ever sees.

Every problem with a user's file or options is raised as :class:`OrderDataError`.
Its message says what is wrong, where (file, row, column, value) and what to change,
in plain words that name no front end's controls: the library does not know whether
a command line or a dashboard is asking. The error carries the column role or the
option it concerns, and each front end names its own control for it
(:meth:`OrderDataError.worded`): the command line a flag such as ``--decimal``, the
dashboard the box on the page. The command line and the dashboard catch this type and
show the message alone, never a traceback.
"""

from __future__ import annotations

from typing import Callable

# The column roles a message can concern (see forecasting.reading.ROLES).
COLUMN_ROLES = ("customer", "date", "value", "order_id", "status", "currency", "segment")


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
        What the user can change to make it work, in words that name no control
        ("choose the column that holds the amount"), never a command-line flag.
    role : str, optional
        The column role the fix concerns (one of ``COLUMN_ROLES``), when the fix
        is to pick another column for it.
    option : str, optional
        The library keyword argument the fix concerns (``"decimal"``,
        ``"date_order"``, ``"sheet"``, ``"header_row"``, ``"currency"``,
        ``"method"``...), when the fix is to set an option.

    Examples
    --------
    >>> problem = OrderDataError("no column holds the amounts", file="orders.csv",
    ...                          fix="Choose the column that holds the amounts", role="value")
    >>> str(problem)
    "file 'orders.csv': no column holds the amounts. Choose the column that holds the amounts."
    >>> problem.worded(lambda role, option: "--" + role)
    "file 'orders.csv': no column holds the amounts. Choose the column that holds the amounts (--value)."
    """

    def __init__(self, problem, *, file=None, row=None, column=None, value=None, fix=None, role=None,
                 option=None):
        if role is not None and role not in COLUMN_ROLES:
            raise ValueError(f"role must be one of {COLUMN_ROLES} (got {role!r})")
        self.problem = problem
        self.file = file
        self.row = row
        self.column = column
        self.value = value
        self.fix = fix
        self.role = role
        self.option = option
        super().__init__(self._compose())

    def _compose(self, control: str | None = None) -> str:
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
            text += f". {self.fix.rstrip('.')}"
            if control:
                text += f" ({control})"
        elif control:
            text += f". Change it with {control}"
        if not text.endswith("."):
            text += "."
        return text

    def worded(self, control_name: Callable[[str | None, str | None], str | None]) -> str:
        """The message with a front end's name for the control that fixes it.

        Parameters
        ----------
        control_name : callable
            ``control_name(role, option)`` returns what this front end calls the
            control (a flag, a box on the page), or None to name none.
        """
        if self.role is None and self.option is None:
            return self._compose()
        return self._compose(control_name(self.role, self.option))
