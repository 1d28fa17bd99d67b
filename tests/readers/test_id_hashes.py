"""FNV-1a 64 over Arrow's buffers (`readers/id_hashes.py`) against the algorithm written out byte by byte."""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from counterbid.readers.id_hashes import FNV_OFFSET_BASIS, FNV_PRIME, fnv1a_64


def _fnv1a_64(text: str) -> int:
    """draft-eastlake-fnv-17, FNV-1a: for each octet, xor it into the hash, then multiply by the prime."""
    h = FNV_OFFSET_BASIS
    for octet in text.encode("utf-8"):
        h = ((h ^ octet) * FNV_PRIME) % 2**64
    return h


def test_published_vectors():
    # test vectors of the FNV-1a 64-bit function (draft-eastlake-fnv-17, appendix C; recalled from memory,
    # and checked against the byte-by-byte loop above)
    got = fnv1a_64(pa.array(["", "a", "foobar"])).view(np.uint64).tolist()
    assert got == [0xCBF29CE484222325, 0xAF63DC4C8601EC8C, 0x85944171F73967E8]
    assert got == [_fnv1a_64(t) for t in ["", "a", "foobar"]]


def test_every_length_and_type_matches_the_loop():
    rng = np.random.default_rng(3)
    words = ["stall-" + "x" * int(k) + str(i) for i, k in enumerate(rng.integers(0, 40, 500))] + ["é-ü", "", "seat 7"]
    want = [_fnv1a_64(w) for w in words]
    for arr in (pa.array(words), pa.array(words, pa.large_string()), pa.array(words).slice(0),
                pa.chunked_array([words[:100], words[100:]])):
        assert fnv1a_64(arr).view(np.uint64).tolist() == want
    sliced = pa.array(words).slice(7, 50)  # an array that starts inside its buffers
    assert fnv1a_64(sliced).view(np.uint64).tolist() == want[7:57]
