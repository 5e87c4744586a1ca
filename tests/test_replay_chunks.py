"""The track writer's own chunk encoding (`replay._chunks`) is HDF5's.

Reference: the HDF5 library itself, through h5py. A chunk that HDF5 filtered when h5py
wrote the data (shuffle, deflate, Fletcher-32, in the pipeline h5py sets up) is read
back raw with ``read_direct_chunk`` and must be the same bytes as ours; a chunk we
store with ``write_direct_chunk`` must read back through HDF5's filters as the values,
and a damaged one must fail HDF5's checksum (the point of the Fletcher-32 filter).
"""
from __future__ import annotations

import zlib

import h5py
import numpy as np
import pytest

from replay._chunks import ChunkEncoding, fletcher32
from replay.run import _FILTERS, _PLAIN

ROWS = 512  # rows per chunk here; the track file's are 16384, the code is the same


def _data(dtype, n, rng):
    if np.dtype(dtype).kind == "f":
        a = np.cumsum(rng.normal(0.0, 0.01, n)) + rng.normal(0.0, 1e-6, n)
        a[rng.random(n) < 0.05] = np.nan  # columns hold NaN where a value is absent
        return a.astype(dtype)
    info = np.iinfo(dtype)
    return rng.integers(info.min, info.max, n, endpoint=True).astype(dtype)


@pytest.mark.parametrize("filters", [_FILTERS, _PLAIN], ids=["gzip", "plain"])
@pytest.mark.parametrize("dtype", [np.int8, np.int16, np.int64, np.float64])
def test_chunks_are_the_bytes_hdf5_writes(tmp_path, filters, dtype):
    rng = np.random.default_rng(7)
    n = 3 * ROWS + 77  # whole chunks and a last part one (padded with the fill value)
    a = _data(dtype, n, rng)
    with h5py.File(tmp_path / "f.h5", "w") as f:
        ref = f.create_dataset("ref", data=a, chunks=(ROWS,), maxshape=(None,), **filters)
        enc = ChunkEncoding.of(ref)
        assert enc is not None
        scratch = {}
        for start in range(0, n, ROWS):
            mask, stored = ref.id.read_direct_chunk((start,))
            assert mask == 0
            ours = bytes(enc.encode(a[start:start + ROWS], scratch))
            if "compression" not in filters:
                assert ours == stored, (start, len(ours), len(stored))
                continue
            # Deflate streams may differ between zlib builds (Python's and the one in
            # HDF5) while both are valid: compare what they inflate to, and the
            # checksum (whose convention the plain case above pins down byte for byte).
            assert zlib.decompress(ours[:-4]) == zlib.decompress(stored[:-4]), start
            body = np.frombuffer(ours[:-4], np.uint8).copy()
            assert int(fletcher32(body)).to_bytes(4, "little") == ours[-4:]


def test_direct_chunks_read_back_and_damage_is_detected(tmp_path):
    rng = np.random.default_rng(3)
    a = _data(np.float64, 2 * ROWS + 5, rng)
    path = tmp_path / "g.h5"
    with h5py.File(path, "w") as f:
        for name, filters in (("gz", _FILTERS), ("plain", _PLAIN)):
            ds = f.create_dataset(name, shape=(a.size,), dtype=a.dtype, chunks=(ROWS,),
                                  **filters)
            enc = ChunkEncoding.of(ds)
            for start in range(0, a.size, ROWS):
                ds.id.write_direct_chunk((start,), enc.encode(a[start:start + ROWS], {}))
    with h5py.File(path, "r") as f:
        for name in ("gz", "plain"):
            np.testing.assert_array_equal(f[name][()], a)  # NaN where NaN, else equal
    # flip one bit of the plain dataset's first chunk, in the file itself
    with h5py.File(path, "r") as f:
        offset = f["plain"].id.get_chunk_info(0).byte_offset
    with open(path, "r+b") as fh:
        fh.seek(offset + 100)
        byte = fh.read(1)[0]
        fh.seek(offset + 100)
        fh.write(bytes([byte ^ 0x10]))
    with h5py.File(path, "r") as f:
        with pytest.raises(OSError):
            f["plain"][:ROWS]
        np.testing.assert_array_equal(f["plain"][ROWS:], a[ROWS:])  # other chunks fine


def test_fletcher32_of_odd_lengths_matches_hdf5(tmp_path):
    # An odd byte count exercises the checksum's last-byte rule: an int8 dataset with
    # an odd chunk stores an odd number of bytes under the checksum.
    rng = np.random.default_rng(11)
    a = rng.integers(-128, 127, 1001, endpoint=True).astype(np.int8)
    with h5py.File(tmp_path / "h.h5", "w") as f:
        ds = f.create_dataset("x", data=a, chunks=(333,), fletcher32=True)
        for start in range(0, a.size, 333):
            _mask, stored = ds.id.read_direct_chunk((start,))
            body = np.frombuffer(stored[:-4], np.uint8).copy()
            assert int(fletcher32(body)).to_bytes(4, "little") == stored[-4:]


def test_other_pipelines_are_left_to_hdf5(tmp_path):
    # what the encoder does not reproduce it must refuse, so h5py writes those chunks
    with h5py.File(tmp_path / "k.h5", "w") as f:
        kw = dict(shape=(100,), chunks=(10,))
        assert ChunkEncoding.of(f.create_dataset("lzf", dtype="f8", compression="lzf",
                                                 **kw)) is None
        assert ChunkEncoding.of(f.create_dataset("so", dtype="i4", scaleoffset=0,
                                                 **kw)) is None
        assert ChunkEncoding.of(f.create_dataset("be", dtype=">f8", **kw)) is None
        assert ChunkEncoding.of(f.create_dataset("contig", shape=(100,), dtype="f8")) is None
        assert ChunkEncoding.of(f.create_dataset("two_d", shape=(10, 10), chunks=(5, 5),
                                                 dtype="f8")) is None
