"""Stored lookup hints: where each block's dictionary keys sat in the table last time.

Without pruning, a table's keys are the same from the second iteration on (every pair that
co-occurs, plus NULL pairs), so the position of each block dictionary key in the sorted table is
too. The E-step's lookup (``kernels.lookup``) therefore keeps what it found: one file per row group
of ``encoded/blocks`` and direction, ``encoded/hints/<direction>/<blocks file>.rgNNNNN``, holding
the insertion point of every dictionary key of that row group's blocks, in block order (about one
byte per key, ``kernels.lookup.encode_hints``).

A hint is a cache, never a source of truth: the lookup checks every hint against the table and
searches afresh where it fails, so a missing, damaged, outdated or foreign hints file costs time and
nothing else. A task rewrites a row group's file whenever it had to search for any key (first use,
or a table whose keys changed, as with pruning). Files are written under a unique temporary name
and moved into place, so readers see whole files or none; a file that does not decode, or whose
length does not match the row group's dictionaries, is ignored.
"""
from __future__ import annotations

import posixpath
import uuid

import numpy as np

from spark_align.kernels.lookup import decode_hints, encode_hints
from spark_align.store import BUCKET_PROTOCOLS


def hints_path(root: str, direction: str, blocks_file: str, row_group: int) -> str:
    """The hints file of one row group of a blocks file (an fsspec path) and one direction."""
    return posixpath.join(root, direction, f"{posixpath.basename(blocks_file)}.rg{row_group:05d}")


def read(fs, root: str, direction: str, blocks_file: str, row_group: int,
         n_keys: int | None = None) -> np.ndarray | None:
    """The stored insertion points of a row group's ``n_keys`` dictionary keys, or None if there are
    none usable (absent, unreadable, or not ``n_keys`` long; None: any length)."""
    try:
        with fs.open(hints_path(root, direction, blocks_file, row_group), "rb") as fh:
            points = decode_hints(fh.read())
    except (OSError, ValueError):
        return None
    return points if n_keys is None or len(points) == n_keys else None


def write(fs, root: str, direction: str, blocks_file: str, row_group: int, points: np.ndarray) -> None:
    """Store a row group's insertion points (whole file or nothing; a failure only loses the cache)."""
    path = hints_path(root, direction, blocks_file, row_group)
    tmp = f"{path}.{uuid.uuid4().hex}.tmp"
    try:
        protocols = fs.protocol if isinstance(fs.protocol, tuple) else (fs.protocol,)
        if not set(protocols) & BUCKET_PROTOCOLS:  # object stores need no directories
            fs.makedirs(posixpath.dirname(path), exist_ok=True)
        with fs.open(tmp, "wb") as fh:
            fh.write(encode_hints(points))
        fs.mv(tmp, path)
    except OSError:
        try:
            fs.rm(tmp)
        except OSError:
            pass
