"""The atomic write helper: whole new file or the old one untouched, no temporary file left.

Outside reference: POSIX ``rename`` replaces the target in one step (IEEE Std 1003.1,
``rename()``); the rest is the helper's own contract.
"""

from __future__ import annotations

import pytest

from liveshape.atomic import atomic_write, atomic_write_text


def test_writes_the_bytes_and_leaves_no_temporary_file(tmp_path) -> None:
    path = tmp_path / "a.bin"
    atomic_write(path, lambda fh: fh.write(b"\x00\x01abc"), fsync=True)
    assert path.read_bytes() == b"\x00\x01abc"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.bin"]


def test_replaces_an_existing_file(tmp_path) -> None:
    path = tmp_path / "a.txt"
    path.write_text("old", encoding="utf-8")
    atomic_write_text(path, "neu: ä\n")
    assert path.read_bytes() == "neu: ä\n".encode()


def test_a_failing_writer_keeps_the_old_file_and_removes_the_temporary(tmp_path) -> None:
    path = tmp_path / "a.txt"
    path.write_text("old", encoding="utf-8")

    def half(fh) -> None:
        fh.write(b"half")
        raise KeyboardInterrupt  # any exception, even one that is not an Exception

    with pytest.raises(KeyboardInterrupt):
        atomic_write(path, half)
    assert path.read_text(encoding="utf-8") == "old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.txt"]


def test_a_missing_folder_is_an_oserror(tmp_path) -> None:
    with pytest.raises(FileNotFoundError):
        atomic_write_text(tmp_path / "no" / "a.txt", "x")
    assert list(tmp_path.iterdir()) == []


def test_write_yaml_file_turns_a_failed_write_into_one_line_naming_the_file(tmp_path) -> None:
    from liveshape.errors import ConfigError
    from liveshape.testdef.config import write_yaml_file

    path = tmp_path / "no" / "a.yaml"
    with pytest.raises(ConfigError) as err:
        write_yaml_file(path, {"a": 1})
    assert str(err.value).startswith(f"{path}: cannot write") and "\n" not in str(err.value)
