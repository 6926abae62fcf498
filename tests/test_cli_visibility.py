"""What the commands leave unsaid: a replay that judged nothing, a learned baseline's first time
and average moving range, and one definition of a live alert. Real SQLite files filled through
the real pipeline, the installed console script.

Reference value: d2 = 1.128 for moving ranges of two (Montgomery, *Introduction to Statistical
Quality Control*, Appendix VI), so the average moving range shown equals 1.128 x sigma."""

from __future__ import annotations

from tests.helpers import run_cli, write_csv

T0 = 1_798_761_600.0  # 2027-01-01T00:00:00Z
S = "kiln-1/temp"


def test_a_replay_that_never_leaves_learning_says_nothing_was_judged(tmp_path):
    path = write_csv(tmp_path / "t.csv", ["t", "v"], [[i, 10 + i % 3] for i in range(12)])
    result = run_cli("replay", str(path), "--value", "v", "--time", "t")
    assert result.returncode == 1
    assert "No signals" not in result.stdout
    assert "Nothing was judged" in result.stderr and "--baseline-first 25" in result.stderr
    assert "stream 'default' was never judged: it has 12 accepted reading(s)" in result.stderr


def test_a_replay_names_the_streams_it_could_not_judge(tmp_path):
    rows = [[i, "long", 10 + i % 3] for i in range(30)] + [[i, "short", 5] for i in range(4)]
    path = write_csv(tmp_path / "t.csv", ["t", "s", "v"], rows)
    result = run_cli(
        "replay", str(path), "--value", "v", "--time", "t", "--stream", "s", "--baseline-first",
        "20",
    )
    assert result.returncode == 0, result.stderr
    assert "stream 'short' was never judged" in result.stderr
    assert "'long'" not in result.stderr.split("never judged")[0].splitlines()[-1]
