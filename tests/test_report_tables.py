"""The report's tables: one number format per column (the project's own presentation rule,
no outside reference: a column must not show "1" beside "1.0")."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from pipeline.report import _table


def cells(html_text: str, column: int) -> list[str]:
    rows = re.findall(r"<tr>(.*?)</tr>", html_text.split("<tbody>")[1])
    return [re.findall(r"<td>(.*?)</td>", r)[column] for r in rows]


def test_a_column_with_fractions_shows_every_value_with_one_decimal():
    df = pd.DataFrame({"share": [1.0, 0.9996, 0.25, np.nan], "aki": [85.0, 86.0, 87.0, 85.0]})
    out = _table(df, (("share", "Share"), ("aki", "AKI")))
    assert cells(out, 0) == ["1.0", "1.0", "0.2", "—"]  # 0.25 → 0.2: Python rounds half to even
    assert cells(out, 1) == ["85", "86", "87", "85"]


def test_large_values_keep_thousands_separators_and_the_column_format():
    df = pd.DataFrame(
        {
            "risk": [286516.4, 12.5, 1000.0],
            "m": [2530.0, 2469.0, 44674.0],
            "elev": [1475.3, 1601.9, 2524.0],
        }
    )
    out = _table(df, (("risk", "Risk"), ("m", "Length"), ("elev", "Elevation")))
    # a column with one fraction below 1,000 shows every value with one decimal
    assert cells(out, 0) == ["286,516.4", "12.5", "1,000.0"]
    assert cells(out, 1) == ["2,530", "2,469", "44,674"]
    assert cells(out, 2) == ["1,475", "1,602", "2,524"]  # all at least 1,000: whole
