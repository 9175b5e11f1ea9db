"""Numbers for people (figures.py): a column's values get the digits that tell the segments apart, in
`show`, the HTML and the Markdown report alike.

References: numpy's per-segment means of the labelled rows (make_blobs shifted by 1e13 and -1e9), and
Python's own decimal rounding (``decimal.Decimal``) for the digits written.
"""

from __future__ import annotations

import re
from decimal import Decimal

import numpy as np
import pytest
from sklearn.datasets import make_blobs

from tillite.figures import column_text, digits_to_tell_apart, fmt

from conftest import fetch_columns, run_cli, write_table


@pytest.mark.parametrize("values,digits", [
    ([1e13 + 0.05, 1e13 + 1.05, 1e13 + 2.05], 15),  # exponent 13 less the gap's 0, plus 2
    ([-1e9 + 0.05, -1e9 + 2.05, -1e9 + 4.05], 10),  # 999,999,999.95 has exponent 8
    ([0.5278, 0.2266, 0.7706], 4),  # at least 4
    ([1.0792e307, 1.0328e307, 1.0299e307], 5),
    ([3.0, 3.0], 4),  # equal values: nothing to tell apart
    ([1.0, 1.0 + 1e-15], 17),  # at most a double's round-trip digits
])
def test_digits_to_tell_apart_come_from_the_largest_value_and_the_smallest_gap(values, digits):
    assert digits_to_tell_apart(values) == digits
    shown = [column_text(v, digits) for v in values]
    if len(set(values)) == len(values) and digits < 17:
        assert len(set(shown)) == len(shown)


@pytest.mark.parametrize("value,digits,text", [
    (1e13 + 1.3, 15, "10,000,000,000,001.3"),
    (1e13 + 2.0, 15, "10,000,000,000,002.0"),  # a whole value reads like its column, not like a count
    (-999_999_997.95, 11, "-999,999,997.95"),
    (0.000513, 4, "5.130e-04"),
    (1.0792e307, 5, "1.0792e+307"),
    (0.0, 4, "0"),
])
def test_a_column_value_is_written_with_its_significant_digits(value, digits, text):
    assert column_text(value, digits) == text
    # reference: Python's decimal rounding of the value to that many significant digits
    written = Decimal(text.replace(",", ""))
    if value:
        exponent = Decimal(repr(value)).adjusted()
        assert abs(written - Decimal(repr(value))) <= Decimal(5) * Decimal(10) ** (exponent - digits)


def test_counts_keep_their_thousands_separators():
    assert fmt(1_234_567) == "1,234,567" and fmt(None) == "–"


def _shown_values(text: str, column: str) -> list[float]:
    """The values of one column of `show`'s segment table."""
    lines = text.splitlines()
    head = next(i for i, ln in enumerate(lines) if ln.split()[:2] == ["segment", "size"])
    at = lines[head].split().index(column)
    rows = []
    for ln in lines[head + 1:]:
        if not ln.strip():
            break
        rows.append(float(ln.split()[at].replace(",", "")))
    return rows


def test_centroids_shifted_far_from_zero_are_told_apart_by_show_and_both_reports(tmp_path):
    x, _ = make_blobs(n_samples=6_000, centers=[(0, 0), (3, 6), (6, 3)], n_features=2, cluster_std=0.3, random_state=4)
    a, b = x[:, 0] + 1e13, x[:, 1] - 1e9  # money in cents, timestamps: far from 0, small spread
    path = write_table(tmp_path / "far.duckdb", "t", {"a": a, "b": b, "id": np.arange(len(a))})
    model = tmp_path / "m.json"
    assert run_cli("segment", path, "-t", "t", "-c", "a,b", "--k", 3, "-q", "-o", model).exit_code == 0
    assert run_cli("label", path, "-t", "t", "-m", model, "--into", "labels", "-q").exit_code == 0
    got = fetch_columns(path, "SELECT segment FROM labels ORDER BY id")["segment"]
    shown = run_cli("show", model).stdout
    for column, values in (("a", a), ("b", b)):
        printed = _shown_values(shown, column)
        assert len(set(printed)) == 3, shown  # every segment reads differently
        # reference: numpy's mean of each segment's labelled rows, within the last digit shown
        for sid, value in enumerate(printed):
            assert value == pytest.approx(values[got == sid].mean(), abs=0.06)
    for fmt_name in ("md", "html"):
        out = tmp_path / f"r.{fmt_name}"
        assert run_cli("report", path, "-t", "t", "-m", model, "--format", fmt_name, "-o", out, "-q").exit_code == 0
        page = out.read_text()
        for column, values in (("a", a), ("b", b)):
            for sid in range(3):
                mean = values[got == sid].mean()
                # reference: numpy's mean rounded to one decimal, written as the report writes it
                assert f"{mean:,.1f}" in page or f"{mean:,.2f}" in page, (column, sid, mean)
        assert "e+13" not in page and "e+09" not in page
        assert not re.search(r"\b10,000,000,000,00\d\b(?![.\d])", page)  # no value written as a count
