"""An open dataset with a documented change, run through `limitwatch replay`.

Nile river annual flow at Aswan, 1871-1970, as shipped in statsmodels (statsmodels.datasets.nile).
Cobb (1978), "The Problem of the Nile: Conditional Solution to a Changepoint Problem",
Biometrika 65(2): 243-51, documents a drop in the mean flow starting in 1898 (the first Aswan dam
works); the mean is about 1098 before and about 850 after (computed below from the data).
"""

from __future__ import annotations

import json

import pytest

from tests.helpers import cli

sm = pytest.importorskip("statsmodels.api")


@pytest.fixture(scope="module")
def nile_csv(tmp_path_factory):
    data = sm.datasets.nile.load_pandas().data
    path = tmp_path_factory.mktemp("nile") / "nile.csv"
    with path.open("w") as handle:
        handle.write("year,volume\n")
        for year, volume in zip(data.year, data.volume, strict=True):
            handle.write(f"{int(year)}-07-01T00:00:00Z,{volume}\n")
    return path, [int(y) for y in data.year], list(data.volume)


@pytest.mark.parametrize("rules", ["western-electric", "nelson", "ewma", "cusum"])
def test_nile_change_of_1898_is_found_soon_after_and_not_before(nile_csv, rules):
    path, years, volume = nile_csv
    before = sum(volume[:27]) / 27
    after = sum(volume[27:]) / len(volume[27:])
    assert before - after > 200  # the documented drop is there in the shipped data
    result = cli(
        "replay",
        str(path),
        "--value",
        "volume",
        "--time",
        "year",
        "--baseline-first",
        "25",
        "--rules",
        rules,
        "--format",
        "jsonl",
    )
    assert result.returncode == 0, result.stderr
    signals = [json.loads(line) for line in result.stdout.splitlines()]
    assert signals, "the change must be detected"
    first_year = years[signals[0]["index"]]
    # baseline 1871-1895; no false alarm in 1896-1897, and the drop is seen by 1905
    assert 1898 <= first_year <= 1905, signals[0]
    low_side = [s for s in signals if s["chart"] == "x" and s["side"] == "lower"]
    assert low_side, "the change is a drop: signals below the center line"
