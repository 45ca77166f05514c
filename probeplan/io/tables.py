"""A named result table (rows of plain values, a title and a note) and its pandas DataFrame.

Results that are tables (plan evaluation, depth curves, channel reports, ROI statistics)
are handed between the study, the report and the surfaces as :class:`Table`, and read by
users as :class:`pandas.DataFrame` (:meth:`Table.frame`), whose column names carry the units
(``depth_mm``, ``signal_e``, ``volume_ul``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

__all__ = ["Table"]


@dataclass
class Table:
    """A named table: rows of dicts with the same keys; ``columns`` fixes their order.

    Examples
    --------
    >>> t = Table("light", "Light", [{"wavelength_nm": 640.0, "share_of_mpe": 0.2}])
    >>> t.frame().columns.tolist()
    ['wavelength_nm', 'share_of_mpe']
    """

    name: str
    title: str
    rows: list[dict[str, Any]]
    columns: list[str] | None = None
    note: str = ""

    def cols(self) -> list[str]:
        """The column order."""
        return self.columns or (list(self.rows[0]) if self.rows else [])

    def frame(self):
        """The rows as a :class:`pandas.DataFrame` in column order (units are in the column names)."""
        import pandas as pd

        return pd.DataFrame.from_records(self.rows, columns=self.cols() or None)
