"""unpack never writes outside its folder, never through links, never set-id bits."""
import os
import stat

import pytest

from lcodec import api
from lcodec.format import container as C
from lcodec.errors import DataError, UsageError


def test_force_into_folder_refuses_a_symlinked_subfolder(tmp_path):
    src = tmp_path / "logs"
    (src / "sub").mkdir(parents=True)
    (src / "sub" / "a.txt").write_bytes(b"station kestrel-ridge ok\n" * 20)
    blob, _ = api.pack_paths([str(src)])
    out, elsewhere = tmp_path / "out", tmp_path / "elsewhere"
    (out / "logs").mkdir(parents=True)
    elsewhere.mkdir()
    os.symlink(elsewhere, out / "logs" / "sub")
    with pytest.raises(UsageError, match="symbolic link"):
        api.unpack_to_dir(blob, str(out), force=True)
    assert os.listdir(elsewhere) == []


def test_set_id_bits_are_not_restored(tmp_path):
    f = tmp_path / "tool.sh"
    f.write_bytes(b"#!/bin/sh\necho hi\n")
    os.chmod(f, 0o4755)
    blob, _ = api.pack_paths([str(f)])
    out = tmp_path / "out"
    api.unpack_to_dir(blob, str(out))
    mode = os.stat(out / "tool.sh").st_mode
    assert stat.S_IMODE(mode) == 0o755


def test_member_table_refuses_links_and_sized_folders():
    data = b"hello"
    for mode, size, what in ((0o120777, 5, "neither a file nor a folder"), (0o040755, 5, "has a size")):
        m = C.Member("x", mode, size, C.sha256(data))
        blob = C.header_bytes(5, C.sha256(data), 1, 1 << 20, {"model": "strata", "preset": "o6m"}, [m])
        blob += C.frame_record(5, data, C.METHOD_STORED, 1, C.crc32c(data))
        with pytest.raises(DataError, match=what):
            api.decode(blob)
