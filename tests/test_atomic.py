"""core/atomic.py: the one atomic-write helper."""
import pytest

from core.atomic import replacing, write_bytes, write_with


def test_write_replaces_whole(tmp_path):
    dest = tmp_path / "a.bin"
    dest.write_bytes(b"old")
    write_bytes(dest, b"new contents")
    assert dest.read_bytes() == b"new contents"
    assert [p.name for p in tmp_path.iterdir()] == ["a.bin"]      # no temporary left behind


def test_error_leaves_old_file_and_no_temporary(tmp_path):
    dest = tmp_path / "a.bin"
    dest.write_bytes(b"old")

    def half(tmp):
        tmp.write_bytes(b"half")
        raise RuntimeError("disk full")

    with pytest.raises(RuntimeError):
        write_with(dest, half)
    assert dest.read_bytes() == b"old"
    assert [p.name for p in tmp_path.iterdir()] == ["a.bin"]


def test_suffix_kept_for_format_sniffing_writers(tmp_path):
    with replacing(tmp_path / "g.npz", ".npz") as tmp:
        assert tmp.name.endswith(".npz") and tmp.parent == tmp_path
        tmp.write_bytes(b"x")
    assert (tmp_path / "g.npz").read_bytes() == b"x"
