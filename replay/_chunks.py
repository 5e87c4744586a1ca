"""Track-file chunks encoded here and stored with h5py's ``write_direct_chunk``.

HDF5 runs a dataset's filters (shuffle, deflate, Fletcher-32) inside the write call,
which holds h5py's global lock: a writer thread that lets HDF5 compress keeps every other
h5py call of the replay (reading the log) waiting for the whole time. Encoded here
(zlib, numpy's copies and the compiled checksum let go of the GIL and take no h5py
lock), a chunk holds the lock only while its bytes are stored, so the encoding really
runs beside the replay.

The bytes are the ones HDF5's own filters make, so the file is an ordinary HDF5 file that
any reader opens and checks: the dataset's filters in its own pipeline order, the chunk
padded to its full size with the fill value, and the checksum appended as HDF5's
Fletcher-32 filter does it (``H5Z_filter_fletcher32``: ``H5_checksum_fletcher32`` of the
filtered bytes, 4 bytes little-endian). A dataset whose pipeline is anything else gets
no `ChunkEncoding` and is written through h5py as usual.
"""
from __future__ import annotations

import sys
import zlib

import h5py
import numpy as np
from numba import njit

__all__ = ["ChunkEncoding", "fletcher32"]

_SHUFFLE, _DEFLATE, _FLETCHER32 = h5py.h5z.FILTER_SHUFFLE, h5py.h5z.FILTER_DEFLATE, \
    h5py.h5z.FILTER_FLETCHER32


@njit(nogil=True, cache=True)
def fletcher32(data):
    """HDF5's Fletcher-32 of a byte array (``H5_checksum_fletcher32``, H5checksum.c):
    big-endian 16-bit words, both sums folded every 360 words, uint32 arithmetic."""
    n = data.size
    m32 = np.int64(0xFFFFFFFF)
    s1 = np.int64(0)
    s2 = np.int64(0)
    words = n // 2
    i = 0
    while words:
        t = min(words, 360)
        words -= t
        for _ in range(t):
            s1 = (s1 + ((np.int64(data[i]) << 8) | np.int64(data[i + 1]))) & m32
            s2 = (s2 + s1) & m32
            i += 2
        s1 = (s1 & 0xFFFF) + (s1 >> 16)
        s2 = (s2 & 0xFFFF) + (s2 >> 16)
    if n % 2:
        s1 = (s1 + (np.int64(data[i]) << 8)) & m32
        s2 = (s2 + s1) & m32
        s1 = (s1 & 0xFFFF) + (s1 >> 16)
        s2 = (s2 & 0xFFFF) + (s2 >> 16)
    s1 = (s1 & 0xFFFF) + (s1 >> 16)
    s2 = (s2 & 0xFFFF) + (s2 >> 16)
    return (s2 << 16) | s1


class ChunkEncoding:
    """How the chunks of one 1-D dataset are encoded, read from its creation properties;
    `of` returns None for a dataset it cannot encode exactly."""

    def __init__(self, dtype, rows, shuffle, level, checksum, fill):
        self.dtype, self.rows = dtype, rows
        self.shuffle, self.level, self.checksum = shuffle, level, checksum
        self.fill = np.frombuffer(fill, np.uint8).copy()
        self.nbytes = rows * dtype.itemsize

    @classmethod
    def of(cls, ds):
        dt = ds.dtype
        # fixed-size numbers stored in this machine's (little-endian) byte order
        if ds.chunks is None or len(ds.chunks) != 1 or dt.kind not in "biuf" or \
                dt.byteorder not in ("<", "=", "|") or sys.byteorder != "little":
            return None
        plist = ds.id.get_create_plist()
        ids = [plist.get_filter(i)[0] for i in range(plist.get_nfilters())]
        # only these filters, each at most once, in this order (h5py's order)
        known = [f for f in (_SHUFFLE, _DEFLATE, _FLETCHER32) if f in ids]
        if ids != known:
            return None
        level = None
        if _DEFLATE in ids:
            level = int(plist.get_filter_by_id(_DEFLATE)[1][0])
        fill = np.array(ds.fillvalue, dt).tobytes()
        return cls(dt, ds.chunks[0], _SHUFFLE in ids, level, _FLETCHER32 in ids, fill)

    def encode(self, data, scratch):
        """The stored bytes of one chunk holding `data` (at most `rows` values) from its
        first row; `scratch` is a dict of reusable buffers (one writer thread's)."""
        src = np.ascontiguousarray(data, self.dtype)
        n, size = src.shape[0], self.dtype.itemsize
        if n > self.rows:
            raise ValueError("more rows than a chunk holds")
        raw = src.view(np.uint8)
        if self.shuffle and size > 1:
            # HDF5's shuffle: byte j of every element, then byte j + 1, ...: a transpose
            # of the (rows, itemsize) bytes (numpy copies it without the GIL)
            raw = _buffer(scratch, "chunk", self.nbytes)
            planes = raw.reshape(size, self.rows)
            planes[:, :n] = src.view(np.uint8).reshape(n, size).T
            planes[:, n:] = self.fill[:, None]
        elif n < self.rows:
            raw = _buffer(scratch, "chunk", self.nbytes)
            raw[:n * size] = src.view(np.uint8)
            raw[n * size:].reshape(-1, size)[:] = self.fill
        if self.level is not None:
            raw = np.frombuffer(zlib.compress(raw, self.level), np.uint8)
        if not self.checksum:
            return raw
        out = _buffer(scratch, "out", raw.size + 4)
        out[:raw.size] = raw
        # summed over the writable copy: one array type, so one compiled checksum
        out[raw.size:] = np.frombuffer(int(fletcher32(out[:raw.size])).to_bytes(4, "little"),
                                       np.uint8)
        return out


def _buffer(scratch, key, n):
    """A view of `n` bytes of a buffer kept in `scratch` (grown when too small)."""
    buf = scratch.get(key)
    if buf is None or buf.size < n:
        buf = scratch[key] = np.empty(max(n, 1 << 17), np.uint8)
    return buf[:n]
