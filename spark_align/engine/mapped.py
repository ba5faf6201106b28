"""Mapped blocks: the E-step's columns of a row group of encoded blocks as an Arrow IPC file, read in place.

Every iteration reads every block, and Parquet cannot hand its values over in place: even
uncompressed and memory-mapped, each link grid is decoded into fresh memory. Reading the E-step's
columns of 1M pairs that way took 1.3 s of a core per pass in one process; the same columns as
Arrow IPC files, memory-mapped and kept open, 0.1 s (the kernels then read the grids straight
from the page cache, in 0.22-0.26 s against 0.35 s from decoded copies). So on a local file
system the first E-step over a row group also writes it as ``encoded/mapped/<blocks file>.rgNNNNN``
(the batches Parquet gave, with the columns of ``engine.estep.E_STEP_COLUMNS`` but the dictionary
keys, which an E-step that takes stored lookup hints does not read), and later ones map that file
instead, each Python worker keeping its latest maps open (:data:`OPEN_MAPS`).

The cost is disk space: the link grids a second time, 1.6 GB at 1M pairs (the blocks take 2.7 GB).
Like the lookup hints (``engine.hints``), a mapped file is a cache: written whole or not at all
(under a temporary name, then moved into place), named after the blocks file, which is unique to one
ingestion, and ignored, then written again, if it is missing or does not open as blocks (other
columns, grids whose lengths disagree with the sentence lengths). Removing ``encoded/mapped`` at any
time is safe. Other file systems (object stores, HDFS) cannot be mapped:
their E-step reads Parquet as before.
"""
from __future__ import annotations

import contextlib
import os
import posixpath
import threading
import uuid
from collections import OrderedDict

import pyarrow as pa

OPEN_MAPS = 512  # mapped files a Python worker keeps open (one file descriptor each)
_MAPS: OrderedDict[str, list[pa.RecordBatch]] = OrderedDict()
_LOCK = threading.Lock()


def mapped_path(root: str, blocks_file: str, row_group: int) -> str:
    """The mapped file of one row group of a blocks file (a local path)."""
    return posixpath.join(root, f"{posixpath.basename(blocks_file)}.rg{row_group:05d}")


def read(path: str, columns: list[str]) -> list[pa.RecordBatch] | None:
    """The row group's batches from its mapped file (their buffers point into the map), or None where
    there is no usable file (then the caller reads Parquet and :func:`write` s one)."""
    with _LOCK:
        batches = _MAPS.get(path)
        if batches is not None:
            _MAPS.move_to_end(path)
    if batches is None:
        try:
            with pa.ipc.open_file(pa.memory_map(path)) as reader:
                batches = [reader.get_batch(i) for i in range(reader.num_record_batches)]
        except (OSError, pa.ArrowInvalid):
            return None
        if not batches or any(b.schema.names != columns or not _fits(b) for b in batches):
            return None
        with _LOCK:
            _MAPS[path] = batches
            while len(_MAPS) > OPEN_MAPS:
                _MAPS.popitem(last=False)
    return batches


def write(path: str, batches: list[pa.RecordBatch]) -> None:
    """Store a row group's batches, whole file or nothing (under a unique temporary name, then moved into
    place); a failure only loses the cache."""
    tmp = f"{path}.{uuid.uuid4().hex}.tmp"
    try:
        os.makedirs(os.path.dirname(path), exist_ok=True)
        with pa.OSFile(tmp, "wb") as sink, pa.ipc.new_file(sink, batches[0].schema) as out:
            for batch in batches:
                out.write_batch(batch)
        os.replace(tmp, path)
    except OSError:
        with contextlib.suppress(OSError):
            os.remove(tmp)


def _fits(batch: pa.RecordBatch) -> bool:
    """Whether a batch read from a mapped file holds whole blocks: valid Arrow, and each grid as long as
    its sentence lengths say. What a truncated or foreign file gets wrong; the values themselves are
    taken as they are, as those of the Parquet blocks are."""
    from spark_align.engine.ingest import blocks_from_batch

    try:
        batch.validate()
        return all(len(block.grid) == int(block.grid_offsets[-1]) for _id, _rows, block in blocks_from_batch(batch))
    except (pa.ArrowInvalid, KeyError, ValueError, IndexError):
        return False


def forget() -> None:
    """Close every map this worker keeps (tests)."""
    with _LOCK:
        _MAPS.clear()
