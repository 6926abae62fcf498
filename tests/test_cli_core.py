"""`limitwatch baseline fit` and `limitwatch replay`, in this process through click's test runner
and once through the installed console script in a process of its own."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from tests.helpers import cli, run_cli, write_csv


@pytest.fixture
def downtime(tmp_path):
    rng = np.random.default_rng(11)
    values = np.round(np.clip(rng.normal(18, 3, 40), 0, None), 2)
    rows = [
        [f"2027-01-{1 + i // 3:02d}T{(i % 3) * 8:02d}:00:00Z", "pack-1", v]
        for i, v in enumerate(values)
    ]
    return write_csv(tmp_path / "downtime.csv", ["time", "line", "minutes"], rows), values


@pytest.mark.parametrize(
    "run",
    [
        pytest.param(cli, id="in-process"),
        pytest.param(run_cli, id="console-script", marks=pytest.mark.integration),
    ],
)
def test_baseline_fit_json_matches_a_plain_computation(downtime, run):
    path, values = downtime
    result = run(
        "baseline", "fit", str(path), "--value", "minutes", "--first", "30", "--format", "json"
    )
    assert result.returncode == 0, result.stderr
    fitted = json.loads(result.stdout)
    first = values[:30]
    mr_bar = float(np.mean(np.abs(np.diff(first))))
    d2 = 2 / math.sqrt(math.pi)  # E|X1 - X2| for two standard normals
    assert fitted["n"] == 30 and fitted["excluded"] == []
    assert fitted["center"] == pytest.approx(float(np.mean(first)))
    assert fitted["mr_bar"] == pytest.approx(mr_bar)
    assert fitted["sigma"] == pytest.approx(mr_bar / d2)
    # Montgomery, Introduction to SQC, Appendix VI (n = 2): E2 = 2.660, D4 = 3.267
    assert fitted["ucl"] == pytest.approx(fitted["center"] + 2.660 * mr_bar, rel=1e-3)
    assert fitted["lcl"] == pytest.approx(fitted["center"] - 2.660 * mr_bar, rel=1e-3)
    assert fitted["mr_ucl"] == pytest.approx(3.267 * mr_bar, rel=1e-3)
    assert "cp" not in fitted or fitted["cp"] is None


def test_baseline_fit_with_spec_limits_reports_capability(downtime):
    path, values = downtime
    result = cli(
        "baseline",
        "fit",
        str(path),
        "--value",
        "minutes",
        "--spec-lower",
        "5",
        "--spec-upper",
        "35",
        "--format",
        "json",
    )
    assert result.returncode == 0, result.stderr
    fitted = json.loads(result.stdout)
    sigma = fitted["sigma"]
    assert fitted["cp"] == pytest.approx(30 / (6 * sigma))
    assert fitted["cpk"] == pytest.approx(
        min(35 - fitted["center"], fitted["center"] - 5) / (3 * sigma)
    )
    s = float(np.std(values, ddof=1))
    assert fitted["pp"] == pytest.approx(30 / (6 * s))


def test_baseline_fit_table_is_readable(downtime):
    path, _ = downtime
    result = cli("baseline", "fit", str(path), "--value", "minutes", "--lower-bound", "0")
    assert result.returncode == 0, result.stderr
    assert "center line" in result.stdout and "MR upper limit" in result.stdout
    assert max(len(line) for line in result.stdout.splitlines()) <= 80


def test_baseline_fit_excludes_a_wild_point_and_says_which(tmp_path):
    values = (
        [10.0, 10.4, 9.8, 10.1, 9.9, 10.2, 10.0, 9.7, 10.3, 10.1] * 2 + [30.0] + [10.0, 10.2, 9.9]
    )
    path = write_csv(tmp_path / "v.csv", ["v"], [[v] for v in values])
    result = cli(
        "baseline", "fit", str(path), "--value", "v", "--exclude-beyond", "--format", "json"
    )
    assert result.returncode == 0, result.stderr
    assert json.loads(result.stdout)["excluded"] == [20]
    plain = json.loads(cli("baseline", "fit", str(path), "--value", "v", "--format", "json").stdout)
    assert plain["excluded"] == [] and plain["mr_bar"] > json.loads(result.stdout)["mr_bar"]


@pytest.mark.parametrize(
    ("content", "args", "needle"),
    [
        (
            "minutes\n1\n2\nabc\n",
            ["--value", "minutes"],
            "line 4, column 'minutes': value 'abc' is not a decimal number",
        ),
        ("minutes\n1\n2\n", ["--value", "mins"], "column 'mins' is not in the header"),
        ("", ["--value", "minutes"], "empty"),
        ("minutes\n" + "1\n2\n" * 3, ["--value", "minutes"], "fewer"),
        ("minutes\n1\nnan\n", ["--value", "minutes"], "line 3"),
    ],
)
def test_baseline_fit_bad_files_name_the_fault(tmp_path, content, args, needle):
    path = tmp_path / "bad.csv"
    path.write_text(content)
    result = cli("baseline", "fit", str(path), *args)
    assert result.returncode == 1
    assert needle in result.stderr
    assert "Traceback" not in result.stderr


def test_missing_file_and_bad_options(tmp_path):
    missing = cli("baseline", "fit", str(tmp_path / "nope.csv"), "--value", "v")
    assert missing.returncode != 0 and "nope.csv" in missing.stderr
    bad_method = cli("baseline", "fit", "x.csv", "--value", "v", "--method", "mode")
    assert bad_method.returncode == 2 and "--method" in bad_method.stderr
    bad_rule = cli("replay", "x.csv", "--value", "v", "--rules", "beyond-limits,not-a-rule")
    assert bad_rule.returncode == 2
    assert "not-a-rule" in bad_rule.stderr and "beyond-limits" in bad_rule.stderr


def test_replay_jsonl_reports_every_signal_with_its_position(tmp_path):
    rng = np.random.default_rng(5)
    quiet = np.round(rng.normal(86.0, 0.5, 30), 3)
    after = [86.0, 86.1, 92.0, 85.9]  # a wild reading at position 32 of each stream
    rows = []
    for stream in ("comp-a", "comp-b"):
        rows += [[i * 60, stream, v] for i, v in enumerate([*quiet, *after])]
    path = write_csv(tmp_path / "t.csv", ["ts", "sensor", "temp"], rows)
    result = cli(
        "replay",
        str(path),
        "--value",
        "temp",
        "--time",
        "ts",
        "--stream",
        "sensor",
        "--baseline-first",
        "30",
        "--rules",
        "limits",
        "--format",
        "jsonl",
    )
    assert result.returncode == 0, result.stderr
    records = [json.loads(line) for line in result.stdout.splitlines()]
    x_hits = [
        (r["stream"], r["index"], r["rule"], r["chart"]) for r in records if r["chart"] == "x"
    ]
    assert x_hits == [("comp-a", 32, "beyond-limits", "x"), ("comp-b", 32, "beyond-limits", "x")]
    for r in records:
        assert {"stream", "index", "time", "value", "rule", "chart"} <= set(r)
        assert r["time"] == str(r["index"] * 60)
    assert {r["rule"] for r in records if r["chart"] == "mr"} == {"mr-beyond-limit"}


def test_replay_refuses_out_of_order_rows_and_says_which_line(tmp_path):
    rows = [[i, 10 + (i % 3) * 0.5] for i in range(30)] + [[5, 10.0], [31, 10.2]]
    path = write_csv(tmp_path / "t.csv", ["t", "v"], rows)
    result = cli("replay", str(path), "--value", "v", "--time", "t", "--baseline-first", "20")
    assert result.returncode == 0
    assert "line 32" in result.stderr and "out-of-order" in result.stderr


def test_replay_refuses_a_huge_value_in_words_not_with_a_traceback(tmp_path):
    """1e308 against a sigma of about 0.006 gave an infinite z, and the detectors raised."""
    rows = [[i, 10 + (i % 3) * 0.005] for i in range(25)] + [[25, 1e308], [26, 10.0], [27, 11.0]]
    path = write_csv(tmp_path / "t.csv", ["t", "v"], rows)
    result = run_cli("replay", str(path), "--value", "v", "--time", "t", "--baseline-first", "20")
    assert result.returncode == 0, result.stderr
    assert "Traceback" not in result.stderr
    assert "line 27: reading 1e+308" in result.stderr and "off-scale" in result.stderr
    assert "too far from the center line" in result.stderr
    assert "beyond-limits" in result.stdout  # the stream is still judged after it


def test_replay_bad_time_names_line_and_column(tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("t,v\n2027-01-01T00:00:00Z,1\nyesterday,2\n")
    result = cli("replay", str(path), "--value", "v", "--time", "t")
    assert result.returncode == 1
    assert "line 3, column 't'" in result.stderr and "yesterday" in result.stderr


# -- the offline commands read files by the service's rules ----------------------------------


OFFLINE = [["baseline", "fit"], ["replay", "--time", "t"]]


@pytest.mark.parametrize("command", OFFLINE, ids=["baseline-fit", "replay"])
def test_an_unquoted_decimal_comma_is_refused_not_read_as_its_whole_part(tmp_path, command):
    path = tmp_path / "export.csv"
    rows = "".join(f"{60 * i},{10 + i % 3}.5\n" for i in range(30))
    path.write_text("t,minutes\n" + rows + "1800,10,43\n")
    result = run_cli(*command, str(path), "--value", "minutes")
    assert result.returncode == 1, result.stdout
    assert f"{path}, line 32: expected 2 columns, found 3" in result.stderr
    assert "Traceback" not in result.stderr


def _service_accepts(time_cell: str, value_cell: str) -> bool:
    from types import SimpleNamespace

    from limitwatch.ingest.payload import PayloadError, RowParser

    source = SimpleNamespace(
        name="f", format="csv", value="v", time="t", time_format="auto", seq=None,
        stream=None, stream_fixed="s",
    )  # fmt: skip
    try:
        RowParser(source).parse({"t": time_cell, "v": value_cell}, received_at=0.0)
    except PayloadError:
        return False
    return True


@pytest.mark.parametrize(
    ("time_cell", "value_cell"),
    [
        ("1700000000", "1_05"),
        ("1_700_000_000", "1.5"),
        ("1700000000", "0x1p3"),
        ("1700000000", "nan"),
        ("1700000000", " 12.5 "),
        ("2027-01-01T00:00:00Z", "-3e2"),
        ("99999999999999", "1"),
    ],
)
@pytest.mark.parametrize("command", OFFLINE, ids=["baseline-fit", "replay"])
def test_offline_commands_refuse_exactly_what_the_service_refuses(
    tmp_path, command, time_cell, value_cell
):
    path = tmp_path / "export.csv"
    quiet = "".join(f"{1600000000 + 60 * i},{10 + i % 3}.5\n" for i in range(30))
    path.write_text(f"t,v\n{quiet}{time_cell},{value_cell}\n")
    result = run_cli(*command, str(path), "--value", "v")
    accepted = result.returncode == 0
    assert "Traceback" not in result.stderr
    if "--time" not in command:  # baseline fit reads values only
        time_cell = "1700000000"
    assert accepted == _service_accepts(time_cell, value_cell), result.stderr
    if not accepted:
        assert "line 32, column" in result.stderr


def test_underscore_separated_times_and_values_are_refused_by_the_service_too():
    # Python's float() reads "1_700_000_000"; the service's one number rule does not.
    assert not _service_accepts("1_700_000_000", "1.5")
    assert not _service_accepts("1700000000", "1_05")
    assert _service_accepts("1700000000", "1.05")
