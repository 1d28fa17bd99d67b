"""The memory cap of the running window's lookup on a DuckDB results file.

A day's lookup of its bidders' stored totals (``sql/bidder_window_totals_select_incoming.sql``,
one call per bucket of today's bidders) hashes the bucket's rows and scans the stored window.
Without a cap of its own the connection keeps every block it scanned in DuckDB's buffer pool, up
to the results connection's ``memory_limit`` (on a 12-day window of 9.0M stored bidders: +369 MiB
of DuckDB memory for one lookup). Those blocks are read from the file and can be dropped again
without writing anything; what the lookup cannot drop is its hash table of today's rows and the
rows it found. So the cap follows today's rows, not the stored window: measured on that window
with 975k of today's bidders, the lookup ran in 96 MiB with no temporary directory to spill to
(it failed at 64 MiB), and the cap here (about 2.5 times what it needs) never asks DuckDB to write
next to a results file that may sit on a read-only mount.
"""

from __future__ import annotations

import math

from counterbid.estimators.errors import InputError

__all__ = ["LOOKUP_BYTES_PER_ROW", "LOOKUP_FLOOR_MIB", "LOOKUP_HEADROOM", "lookup_memory_mib"]

#: Least cap, in MiB (a few scanned blocks per thread and the result of a small lookup).
LOOKUP_FLOOR_MIB = 64
#: DuckDB memory per looked-up row besides its id text: hash-table entry, key, segment, a found row's sums.
LOOKUP_BYTES_PER_ROW = 96
#: The cap over that estimate.
LOOKUP_HEADROOM = 2.5


def lookup_memory_mib(n_rows: int, id_bytes: int, *, limit_mib: int) -> int:
    """DuckDB's ``memory_limit`` for one lookup of ``n_rows`` of today's (segment, bidder) rows, in MiB.

    ``ceil(LOOKUP_HEADROOM * (n_rows * LOOKUP_BYTES_PER_ROW + id_bytes) / 2**20)``, at least
    :data:`LOOKUP_FLOOR_MIB` and at most ``limit_mib`` (the results connection's own limit).

    Parameters
    ----------
    n_rows : int
        Rows of the lookup's ``incoming`` relation (>= 0).
    id_bytes : int
        Bytes of their id text as Arrow holds it (offsets included; >= 0).
    limit_mib : int
        The results connection's ``memory_limit`` (>= 1); the cap never exceeds it.

    Returns
    -------
    int
    """
    for value, what in ((n_rows, "n_rows"), (id_bytes, "id_bytes"), (limit_mib, "limit_mib")):
        if isinstance(value, bool) or not isinstance(value, int) or value < (1 if what == "limit_mib" else 0):
            raise InputError(f"lookup memory: `{what}` must be a whole number >= {1 if what == 'limit_mib' else 0}, "
                             f"got {value!r}")
    need = math.ceil(LOOKUP_HEADROOM * (n_rows * LOOKUP_BYTES_PER_ROW + id_bytes) / 2**20)
    return min(limit_mib, max(LOOKUP_FLOOR_MIB, need))
