"""FileTail: complete lines only, identity by inode, rotation and truncation."""

from __future__ import annotations

import json
import os

from limitwatch.ingest.files import FileTail, file_identity, glob_folder


def lines(source: FileTail, offsets: dict[str, int]) -> list:
    got = list(source.poll(offsets))
    for line in got:  # the caller commits offsets after using the lines
        offsets[line.file_id] = line.end_offset
    return got


def test_a_partial_last_line_waits_for_its_newline(tmp_path):
    path = tmp_path / "a.csv"
    path.write_text("time,value\n2027-01-01T00:00:00Z,1.5\n2027-01-01T00:01:00Z,2")
    source = FileTail("f", str(tmp_path / "*.csv"), "csv")
    offsets: dict[str, int] = {}
    first = [x.record for x in lines(source, offsets) if x.record]
    assert first == [{"time": "2027-01-01T00:00:00Z", "value": "1.5"}]
    with path.open("a") as f:
        f.write(".5\n")
    second = [x.record for x in lines(source, offsets) if x.record]
    assert second == [{"time": "2027-01-01T00:01:00Z", "value": "2.5"}]
    assert list(source.poll(offsets)) == []


def test_rotation_finishes_the_old_file_and_reads_the_new_one_from_its_start(tmp_path):
    path = tmp_path / "plant.jsonl"
    path.write_text(json.dumps({"v": 1}) + "\n")
    source = FileTail("f", str(tmp_path / "plant.jsonl*"), "jsonl")
    offsets: dict[str, int] = {}
    assert [x.record for x in lines(source, offsets)] == [{"v": 1}]
    with path.open("a") as f:
        f.write(json.dumps({"v": 2}) + "\n")
    os.rename(path, tmp_path / "plant.jsonl.1")  # rotated: the tail is still unread
    path.write_text(json.dumps({"v": 3}) + "\n")
    got = [x.record["v"] for x in lines(source, offsets)]
    assert sorted(got) == [2, 3]
    assert len(offsets) == 2


def test_truncation_in_place_reads_again_from_the_start(tmp_path):
    path = tmp_path / "a.jsonl"
    path.write_text("".join(json.dumps({"v": i}) + "\n" for i in range(5)))
    source = FileTail("f", str(path), "jsonl")
    offsets: dict[str, int] = {}
    assert len(lines(source, offsets)) == 5
    ident = file_identity(os.stat(path))
    with path.open("w") as f:  # same inode, shorter content
        f.write(json.dumps({"v": 99}) + "\n")
    assert os.stat(path).st_ino == int(ident.split(":")[1])
    assert [x.record for x in lines(source, offsets)] == [{"v": 99}]


def test_unreadable_lines_carry_their_reason(tmp_path):
    path = tmp_path / "a.csv"
    path.write_text("time,value\n1,2,3\n\n2027-01-01T00:00:00Z,4\n")
    source = FileTail("f", str(path), "csv")
    got = lines(source, {})
    assert [x.error for x in got if x.error] == ["expected 2 columns, found 3"]
    assert [x.record for x in got if x.record] == [{"time": "2027-01-01T00:00:00Z", "value": "4"}]


def test_start_at_end_skips_what_is_already_there(tmp_path):
    path = tmp_path / "a.jsonl"
    path.write_text(json.dumps({"v": 1}) + "\n")
    source = FileTail("f", str(path), "jsonl", start_at="end")
    offsets: dict[str, int] = {}
    assert lines(source, offsets) == []
    with path.open("a") as f:
        f.write(json.dumps({"v": 2}) + "\n")
    assert [x.record for x in lines(source, offsets)] == [{"v": 2}]


def test_a_symlink_out_of_the_glob_folder_is_refused_once_and_never_read(tmp_path, caplog):
    secret = tmp_path / "private" / "shadow.csv"
    secret.parent.mkdir()
    secret.write_text("time,value\n2027-01-01T00:00:00Z,12345\n")
    secret.chmod(0o600)
    export = tmp_path / "export"
    export.mkdir()
    (export / "line-1.csv").write_text("time,value\n2027-01-01T00:00:00Z,1\n")
    (export / "leak.csv").symlink_to(secret)
    (export / "sub").symlink_to(secret.parent, target_is_directory=True)
    (export / "alias.csv").symlink_to(export / "line-1.csv")  # inside: still allowed
    source = FileTail("f", str(export / "*.csv"), "csv")
    offsets: dict[str, int] = {}
    with caplog.at_level("WARNING", logger="limitwatch.files"):
        got = lines(source, offsets)
        got += lines(source, offsets)
    assert {x.path for x in got} == {str(export / "line-1.csv"), str(export / "alias.csv")}
    assert all(b"12345" not in x.raw for x in got)
    warnings = [r.getMessage() for r in caplog.records if "outside the folder" in r.getMessage()]
    assert len(warnings) == 1 and str(export / "leak.csv") in warnings[0]
    deep = FileTail("g", str(export / "*" / "*.csv"), "csv")
    assert [x for x in lines(deep, {}) if x.record] == []  # export/sub -> private: refused


def test_glob_folder_stops_at_the_first_wildcard():
    assert glob_folder("/srv/export/line-*/*.csv") == "/srv/export"
    assert glob_folder("/srv/export/a.csv") == "/srv/export"
    assert glob_folder("*.csv") == "."
