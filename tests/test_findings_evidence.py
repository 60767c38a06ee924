"""A finding's evidence as stored: JSON whose p-values keep their significant digits.

The numbers are checked against Python's own JSON reader and float text; a p-value far below
1e-10 (a level shift of many standard errors) is a small positive number, never 0.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd

from aftercast.detect.findings import evidence_json
from tests.conftest import make_config


def test_small_p_values_keep_ten_significant_digits() -> None:
    kept = pd.DataFrame(
        {
            "detection": ["accuracy_vs_baseline", "accuracy_vs_baseline", "coverage_low"],
            "n": [14, 14, 84],
            "statistic": [9.123456789012, np.nan, -30.5],
            "p_value": [1.234567891234e-13, 0.5, 2.3541e-05],
            "p_adjusted": [2.3021584638627246e-12, 1.0, 6.488676262961235e-11],
            "ev_recent_mae": [86.68, 3.0, np.nan],
            "ev_kupiec_p": [np.nan, np.nan, 4.2e-12],
            "ev_pairs": [np.nan, np.nan, 84.0],
        }
    )
    out = evidence_json(make_config("sqlite:///unused.db"), 1_786_316_400, kept)
    rows = [json.loads(text) for text in out]
    assert math.isclose(rows[0]["p_value"], 1.234567891e-13, rel_tol=1e-9)
    assert math.isclose(rows[0]["p_adjusted"], 2.302158464e-12, rel_tol=1e-9)
    assert rows[0]["statistic"] == 9.123456789 and rows[0]["recent_mae"] == 86.68
    assert rows[1]["statistic"] is None and rows[1]["p_adjusted"] == 1
    assert math.isclose(rows[2]["p_adjusted"], 6.488676263e-11, rel_tol=1e-9)
    assert rows[2]["kupiec_p"] == 4.2e-12 and rows[2]["pairs"] == 84
    assert list(rows[2])[:3] == ["statistic", "p_value", "p_adjusted"]
    assert rows[2]["window"]["targets"] == 84
