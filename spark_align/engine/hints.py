"""Stored lookup hints: where each block's dictionary keys sat in the table last time.

Without pruning, a table's keys are the same from the second iteration on (every pair that
co-occurs, plus NULL pairs), so the position of each block dictionary key in the sorted table is
too. The E-step's lookup (``kernels.lookup``) therefore keeps what it found: one file per row group
of ``encoded/blocks`` and direction, ``encoded/hints/<direction>/<blocks file>.rgNNNNN``, holding
the insertion point of every dictionary key of that row group's blocks, in block order, whether
each was found, and the id of the table's keys (``kernels.lookup.StoredHints``: about 1.1 bytes per
key and a CRC-32).

When the table's keys are the ones the hints were found in (equal ``keys_id``, a digest of the
reducers' key digests) and the found keys were exactly those the E-step counts (``exact``), the
E-step takes the positions as they are: it reads neither the blocks' dictionary keys (40% of a row
group's bytes) nor the table's keys, only the probabilities at those positions. The positions are
still checked for what they must be (inside the table, increasing within each block, as many as
the blocks' dictionaries; ``kernels.lookup.gather_found``) before any is used.

Otherwise a hint is a cache, never a source of truth: the lookup checks every hint against the table
and searches afresh where it fails, so a missing, damaged, outdated or foreign hints file costs time
and nothing else. A task rewrites a row group's file whenever it had to search for any key (first
use, or a table whose keys changed, as with pruning) or the table's keys id changed. Files are
written under a unique temporary name and moved into place, so readers see whole files or none; a
file that does not decode (wrong CRC-32 included), or whose length does not match the row group's
dictionaries, is ignored. The file names carry the blocks file's name, which is unique to one
ingestion, so hints never outlive the blocks they describe.
"""
from __future__ import annotations

import posixpath

from spark_align.kernels.lookup import StoredHints, decode_hints, encode_hints
from spark_align.store import read_cached, write_cached


def hints_path(root: str, direction: str, blocks_file: str, row_group: int) -> str:
    """The hints file of one row group of a blocks file (an fsspec path) and one direction."""
    return posixpath.join(root, direction, f"{posixpath.basename(blocks_file)}.rg{row_group:05d}")


def read(fs, root: str, direction: str, blocks_file: str, row_group: int) -> StoredHints | None:
    """The stored hints of a row group's dictionary keys, or None if there are none usable (absent,
    unreadable or damaged). Callers check the length against the blocks they read."""
    return read_cached(fs, hints_path(root, direction, blocks_file, row_group), decode_hints)


def write(fs, root: str, direction: str, blocks_file: str, row_group: int, stored: StoredHints) -> None:
    """Store a row group's hints (whole file or nothing; a failure only loses the cache)."""
    write_cached(fs, hints_path(root, direction, blocks_file, row_group), encode_hints(stored))
