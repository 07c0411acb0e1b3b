"""SHA-256 against coreutils sha256sum."""

from __future__ import annotations

import shutil
import subprocess

import pytest

from mapstore.formats._hashing import BLOCK, digest_file, sha256_file


@pytest.mark.skipif(shutil.which("sha256sum") is None, reason="coreutils sha256sum missing")
@pytest.mark.parametrize("size", [0, 1, 4095, 4096, BLOCK - 1, BLOCK, BLOCK + 1, 3 * BLOCK + 17])
def test_sha256_equals_sha256sum(tmp_path, rng, size):
    # reference: coreutils sha256sum (FIPS 180-4 SHA-256)
    f = tmp_path / "blob.bin"
    f.write_bytes(rng.integers(0, 256, size, dtype="u1").tobytes())
    ref = subprocess.run(["sha256sum", str(f)], capture_output=True, text=True, check=True).stdout.split()[0]
    assert sha256_file(str(f)) == ref
    d = digest_file(str(f))
    assert d.nbytes == size and d.head == f.read_bytes()[:4096]


def test_sha256_of_known_string(tmp_path):
    # reference: FIPS 180-2 appendix B.1 worked example, SHA-256("abc")
    f = tmp_path / "abc"
    f.write_bytes(b"abc")
    assert sha256_file(str(f)) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_read_deadline_restarts_on_progress_and_fires_without_it():
    import time

    import pytest

    from mapstore.formats._hashing import ReadDeadline, ReadTimeout

    with ReadDeadline(0.3) as dl:
        with dl.armed():
            for _ in range(6):  # 0.6 s in all, never 0.3 s without progress
                time.sleep(0.1)
                dl.progress()
        with pytest.raises(ReadTimeout), dl.armed():
            time.sleep(2)  # no progress: interrupted after 0.3 s
    with ReadDeadline(None) as off, off.armed():
        time.sleep(0.01)  # no deadline: nothing fires
