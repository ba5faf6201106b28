"""Combine the two directional alignments of each sentence pair into one.

numpy and numba (never imports pyspark); the engine's output step calls the
batch functions inside Spark tasks on blocks of sentence pairs.

Conventions
-----------
A *link* is ``(i, j)``: 0-based source position ``i`` (``0 <= i < n_src``) and
0-based target position ``j`` (``0 <= j < n_tgt``). Both directional
alignments are given in this (source, target) orientation:

* ``forward`` comes from the source-to-target model, where every target word
  picks at most one source word (so ``j`` is unique among its links);
* ``reverse`` comes from the target-to-source model, where every source word
  picks at most one target word (so ``i`` is unique).

Nothing below relies on those uniqueness properties; any two link sets work.

Heuristics (Och & Ney 2003; Koehn, Och & Marcu 2003)
----------------------------------------------------
``intersection``        forward ∩ reverse: high precision.
``union``               forward ∪ reverse: high recall.
``grow-diag``           start from the intersection; repeatedly add a union link
                        that is a horizontal, vertical or diagonal neighbour of
                        a link already kept, provided its source word or its
                        target word is still unaligned.
``grow-diag-final``     grow-diag, then add any remaining forward link, then
                        any remaining reverse link, whose source word *or*
                        target word is still unaligned.
``grow-diag-final-and`` the same, but the final steps need the source word
                        *and* the target word to be unaligned.

The growing step is order dependent (adding a link can block another), so we
follow the published pseudocode exactly: each pass scans the grid row-major
(source position outer, target position inner), visits every kept link in that
order (including links added earlier in the same pass), tries its neighbours in
the order (-1,0), (0,-1), (1,0), (0,1), (-1,-1), (-1,1), (1,-1), (1,1), and
passes repeat until one adds nothing. The final steps likewise scan row-major,
forward alignment first, then reverse. (The pseudocode names its two inputs
e2f and f2e without fixing which model each comes from; "forward first" is our
choice.) The pseudocode and neighbour order are from memory of Koehn's
*Statistical Machine Translation* (2010), §4.5.

Speed: only union links outside the intersection (*candidates*) can ever be
added, and only kept links next to a candidate can add one, so each pass visits
just those. The batch functions build the intersection and union of a whole
block with numpy; pairs whose two directions disagree are grown by one compiled
loop over small per-pair grids (about 40 us per pair in Python sets before).

Posterior combination
---------------------
:func:`combine_posteriors` averages the two directions' link posteriors
(a link missing from one direction counts 0 there) and keeps the links whose
average is at least ``threshold``.
"""
from __future__ import annotations

from collections.abc import Iterable
from typing import NamedTuple

import numpy as np
from numba import njit

from spark_align.errors import InputError
from spark_align.kernels import ragged

METHODS = ("intersection", "union", "grow-diag", "grow-diag-final", "grow-diag-final-and")

_NEIGHBOURS = ((-1, 0), (0, -1), (1, 0), (0, 1), (-1, -1), (-1, 1), (1, -1), (1, 1))

Link = tuple[int, int]


class LinkArrays(NamedTuple):
    """Links of many sentence pairs in CSR form.

    offsets : int64 array, shape (n_pairs + 1,)
        Links of pair ``k`` are entries ``offsets[k]:offsets[k + 1]``.
    src_index : int32 array, shape (n_links,)
        Source position of every link.
    tgt_index : int32 array, shape (n_links,)
        Target position of every link.
    """

    offsets: np.ndarray
    src_index: np.ndarray
    tgt_index: np.ndarray


class ScoredLinkArrays(NamedTuple):
    """:class:`LinkArrays` plus one posterior per link.

    posterior : float64 array, shape (n_links,)
        Link probability in [0, 1].
    """

    offsets: np.ndarray
    src_index: np.ndarray
    tgt_index: np.ndarray
    posterior: np.ndarray


# ---------------------------------------------------------------------------
# Input checks
# ---------------------------------------------------------------------------

def _check_method(method: str) -> None:
    if method not in METHODS:
        raise InputError(f"unknown symmetrization method {method!r}; choose one of {', '.join(METHODS)}")


def _check_lengths(n_src: int, n_tgt: int, where: str) -> None:
    if n_src < 0 or n_tgt < 0:
        raise InputError(f"{where}: sentence lengths must be >= 0, got n_src={n_src}, n_tgt={n_tgt}")


def _link_set(links: Iterable, n_src: int, n_tgt: int, where: str) -> set[Link]:
    out = set()
    for link in links:
        i, j = int(link[0]), int(link[1])
        if not (0 <= i < n_src and 0 <= j < n_tgt):
            raise InputError(f"{where}: link {i}-{j} is outside the {n_src} x {n_tgt} sentence pair")
        out.add((i, j))
    return out


def _check_csr(name: str, links: tuple, n_pairs: int, n_src: np.ndarray, n_tgt: np.ndarray) -> None:
    """O(n_links) vectorised check of one CSR link batch; names the first bad pair."""
    offsets = np.asarray(links[0])
    if offsets.ndim != 1 or len(offsets) != n_pairs + 1:
        raise InputError(f"{name}: expected {n_pairs + 1} offsets for {n_pairs} pairs, got shape {offsets.shape}")
    if n_pairs and (offsets[0] != 0 or np.any(np.diff(offsets) < 0)):
        raise InputError(f"{name}: offsets must start at 0 and never decrease")
    n_links = int(offsets[-1]) if n_pairs else 0
    for column in links[1:]:
        if len(column) != n_links:
            raise InputError(f"{name}: offsets end at {n_links} but a link array has {len(column)} entries")
    if n_links == 0:
        return
    pair = np.repeat(np.arange(n_pairs), np.diff(offsets))
    src, tgt = np.asarray(links[1]), np.asarray(links[2])
    bad = (src < 0) | (src >= n_src[pair]) | (tgt < 0) | (tgt >= n_tgt[pair])
    if bad.any():
        k = int(np.argmax(bad))
        p = int(pair[k])
        raise InputError(f"{name}: pair {p}: link {int(src[k])}-{int(tgt[k])} is outside the "
                         f"{int(n_src[p])} x {int(n_tgt[p])} sentence pair")


def _pair_lengths(n_src, n_tgt) -> tuple[np.ndarray, np.ndarray]:
    n_src = np.asarray(n_src, dtype=np.int64)
    n_tgt = np.asarray(n_tgt, dtype=np.int64)
    if n_src.shape != n_tgt.shape or n_src.ndim != 1:
        raise InputError(f"n_src and n_tgt must be 1-D arrays of one length, got shapes {n_src.shape} and {n_tgt.shape}")
    if np.any(n_src < 0) or np.any(n_tgt < 0):
        raise InputError(f"pair {int(np.argmax((n_src < 0) | (n_tgt < 0)))}: sentence lengths must be >= 0")
    return n_src, n_tgt


# ---------------------------------------------------------------------------
# Growing, compiled (numba): every pair of a batch on small dense grids
# ---------------------------------------------------------------------------

_FWD, _REV, _KEPT = 1, 2, 4
_FINAL_MODE = {"grow-diag": 0, "grow-diag-final": 1, "grow-diag-final-and": 2}
_DI = np.array([d[0] for d in _NEIGHBOURS], np.int64)
_DJ = np.array([d[1] for d in _NEIGHBOURS], np.int64)


@njit(cache=True, nogil=True)
def _grow_pairs(pairs, fwd_keys, fwd_start, rev_keys, rev_start, n_src, n_tgt, n_tgt_max, cell_size,
                final_mode, di, dj, out):  # pragma: no cover - compiled
    """Grow (and finish) the listed pairs; writes the kept cells' keys to ``out`` row-major per pair.

    Per pair: a grid of flags (forward link, reverse link, kept). Kept starts as the intersection;
    candidates are union cells not kept. A pass visits pending kept cells in row-major order, tries
    their neighbours in the fixed order and keeps a candidate whose source or target word is still
    unaligned. A cell kept ahead of the scan is visited in the same pass, one behind it in the next
    pass (exactly what the published row-major passes do, visiting only the cells that can add a
    link). Then the final steps scan forward links, then reverse links, row-major.
    """
    n_out = 0
    for q in range(len(pairs)):
        p = pairs[q]
        n_i, n_j = n_src[p], n_tgt[p]
        base = p * cell_size
        grid = np.zeros((n_i, n_j), np.uint8)
        for k in range(fwd_start[p], fwd_start[p + 1]):
            c = fwd_keys[k] - base
            grid[c // n_tgt_max, c % n_tgt_max] |= 1
        for k in range(rev_start[p], rev_start[p + 1]):
            c = rev_keys[k] - base
            grid[c // n_tgt_max, c % n_tgt_max] |= 2
        src_al = np.zeros(n_i, np.bool_)
        tgt_al = np.zeros(n_j, np.bool_)
        for i in range(n_i):
            for j in range(n_j):
                if grid[i, j] == 3:
                    grid[i, j] = 7
                    src_al[i] = True
                    tgt_al[j] = True
        pending = np.zeros((n_i, n_j), np.bool_)
        for i in range(n_i):
            for j in range(n_j):
                if grid[i, j] & 4:
                    for d in range(8):
                        a, b = i + di[d], j + dj[d]
                        if 0 <= a < n_i and 0 <= b < n_j and grid[a, b] != 0 and not grid[a, b] & 4:
                            pending[i, j] = True
                            break
        again = True
        while again:
            again = False
            behind = np.zeros((n_i, n_j), np.bool_)
            for i in range(n_i):
                for j in range(n_j):
                    if not pending[i, j]:
                        continue
                    for d in range(8):
                        a, b = i + di[d], j + dj[d]
                        if (0 <= a < n_i and 0 <= b < n_j and grid[a, b] != 0 and not grid[a, b] & 4
                                and (not src_al[a] or not tgt_al[b])):
                            grid[a, b] |= 4
                            src_al[a] = True
                            tgt_al[b] = True
                            if a > i or (a == i and b > j):
                                pending[a, b] = True  # ahead of the scan: visited in this pass
                            else:
                                behind[a, b] = True
                                again = True
            pending = behind
        if final_mode:
            for bit in (1, 2):
                for i in range(n_i):
                    for j in range(n_j):
                        if grid[i, j] & bit and not grid[i, j] & 4:
                            if final_mode == 2:
                                free = not src_al[i] and not tgt_al[j]
                            else:
                                free = not src_al[i] or not tgt_al[j]
                            if free:
                                grid[i, j] |= 4
                                src_al[i] = True
                                tgt_al[j] = True
        for i in range(n_i):
            for j in range(n_j):
                if grid[i, j] & 4:
                    out[n_out] = base + i * n_tgt_max + j
                    n_out += 1
    return n_out


def symmetrize(forward: Iterable[Link], reverse: Iterable[Link], *, n_src: int, n_tgt: int,
               method: str = "grow-diag-final-and") -> list[Link]:
    """Combine one sentence pair's two directional alignments.

    Parameters
    ----------
    forward : iterable of (int, int)
        Links (source position, target position) from the source-to-target model.
    reverse : iterable of (int, int)
        Links, also as (source position, target position), from the target-to-source model.
    n_src, n_tgt : int
        Number of source and target tokens.
    method : str
        One of :data:`METHODS`.

    Returns
    -------
    list of (int, int)
        The combined links, sorted.

    Raises
    ------
    InputError
        Unknown method, negative length, or a link outside the sentence pair.
    """
    _check_method(method)
    _check_lengths(n_src, n_tgt, "sentence pair")
    fwd = sorted(_link_set(forward, n_src, n_tgt, "forward alignment"))
    rev = sorted(_link_set(reverse, n_src, n_tgt, "reverse alignment"))

    def csr(links):
        return (np.array([0, len(links)], np.int64), np.array([i for i, _ in links], np.int32),
                np.array([j for _, j in links], np.int32))

    got = symmetrize_batch(csr(fwd), csr(rev), n_src=np.array([n_src]), n_tgt=np.array([n_tgt]), method=method)
    return list(zip(got.src_index.tolist(), got.tgt_index.tolist()))


# ---------------------------------------------------------------------------
# Many sentence pairs (CSR)
# ---------------------------------------------------------------------------

def _cell_keys(links: tuple, n_pairs: int, n_src_max: int, n_tgt_max: int) -> np.ndarray:
    """One int64 key per link, ordered by (pair, source, target): pair * (L*M) + i * M + j."""
    pair = np.repeat(np.arange(n_pairs, dtype=np.int64), np.diff(np.asarray(links[0], dtype=np.int64)))
    return (pair * n_src_max + np.asarray(links[1], dtype=np.int64)) * n_tgt_max + np.asarray(links[2], dtype=np.int64)


def _key_space(n_pairs: int, n_src: np.ndarray, n_tgt: np.ndarray) -> tuple[int, int]:
    n_src_max = max(int(n_src.max(initial=0)), 1)
    n_tgt_max = max(int(n_tgt.max(initial=0)), 1)
    if n_pairs * n_src_max * n_tgt_max >= 2 ** 62:
        raise InputError(f"batch too large to key: {n_pairs} pairs of up to {n_src_max} x {n_tgt_max} tokens; "
                         "split it into smaller blocks")
    return n_src_max, n_tgt_max


def _keys_to_links(keys: np.ndarray, n_pairs: int, n_src_max: int, n_tgt_max: int) -> LinkArrays:
    """Inverse of :func:`_cell_keys` for sorted unique keys."""
    cell = keys % (n_src_max * n_tgt_max)
    pair = keys // (n_src_max * n_tgt_max)
    offsets = np.zeros(n_pairs + 1, dtype=np.int64)
    np.cumsum(np.bincount(pair, minlength=n_pairs), out=offsets[1:])
    return LinkArrays(offsets, (cell // n_tgt_max).astype(np.int32), (cell % n_tgt_max).astype(np.int32))


def symmetrize_batch(forward: LinkArrays, reverse: LinkArrays, *, n_src: np.ndarray, n_tgt: np.ndarray,
                     method: str = "grow-diag-final-and") -> LinkArrays:
    """:func:`symmetrize` for every pair of a block, on CSR arrays.

    Parameters
    ----------
    forward, reverse : LinkArrays (or any 3-tuple offsets, src_index, tgt_index)
        offsets int64 (n_pairs + 1,); src_index, tgt_index int32 (n_links,),
        both in (source, target) orientation as in :func:`symmetrize`.
    n_src, n_tgt : int array, shape (n_pairs,)
        Sentence lengths.
    method : str
        One of :data:`METHODS`.

    Returns
    -------
    LinkArrays
        offsets int64 (n_pairs + 1,); links of each pair sorted by (source, target).

    Raises
    ------
    InputError
        Unknown method, inconsistent arrays, or a link outside its pair (names the pair index).
    """
    _check_method(method)
    n_src, n_tgt = _pair_lengths(n_src, n_tgt)
    n_pairs = len(n_src)
    _check_csr("forward alignment", tuple(forward), n_pairs, n_src, n_tgt)
    _check_csr("reverse alignment", tuple(reverse), n_pairs, n_src, n_tgt)
    n_src_max, n_tgt_max = _key_space(n_pairs, n_src, n_tgt)
    fwd_keys = ragged.distinct(_cell_keys(forward, n_pairs, n_src_max, n_tgt_max))
    rev_keys = ragged.distinct(_cell_keys(reverse, n_pairs, n_src_max, n_tgt_max))
    if method == "intersection":
        return _keys_to_links(np.intersect1d(fwd_keys, rev_keys, assume_unique=True), n_pairs, n_src_max, n_tgt_max)
    union_keys = ragged.distinct(np.concatenate([fwd_keys, rev_keys]))  # two sorted runs
    if method == "union":
        return _keys_to_links(union_keys, n_pairs, n_src_max, n_tgt_max)

    # Pairs whose two directions agree need no growing: their answer is the union (= intersection).
    cell_size = n_src_max * n_tgt_max
    n_union = np.bincount(union_keys // cell_size, minlength=n_pairs)
    n_inter = np.bincount(np.intersect1d(fwd_keys, rev_keys, assume_unique=True) // cell_size, minlength=n_pairs)
    out_keys = [union_keys[np.isin(union_keys // cell_size, np.flatnonzero(n_union == n_inter))]]
    fwd_start = np.searchsorted(fwd_keys // cell_size, np.arange(n_pairs + 1))
    rev_start = np.searchsorted(rev_keys // cell_size, np.arange(n_pairs + 1))
    grown = np.empty(len(union_keys), np.int64)  # kept links are union links
    n = _grow_pairs(np.flatnonzero(n_union != n_inter).astype(np.int64), fwd_keys, fwd_start, rev_keys, rev_start,
                    n_src, n_tgt, n_tgt_max, cell_size, _FINAL_MODE[method], _DI, _DJ, grown)
    out_keys.append(grown[:n])
    return _keys_to_links(np.sort(np.concatenate(out_keys)), n_pairs, n_src_max, n_tgt_max)


# ---------------------------------------------------------------------------
# Posterior combination
# ---------------------------------------------------------------------------

def _check_threshold(threshold: float) -> None:
    if not (0.0 < threshold <= 1.0):
        # 0 would keep every cell of the grid, including links neither direction proposed.
        raise InputError(f"posterior threshold must be in (0, 1], got {threshold}")


def _scored_dict(links: Iterable, where: str) -> dict[Link, float]:
    out: dict[Link, float] = {}
    for link in links:
        i, j, post = int(link[0]), int(link[1]), float(link[2])
        if i < 0 or j < 0:
            raise InputError(f"{where}: link {i}-{j} has a negative position")
        if not (0.0 <= post <= 1.0):
            raise InputError(f"{where}: link {i}-{j} has posterior {post}, outside [0, 1]")
        if (i, j) in out:
            raise InputError(f"{where}: link {i}-{j} is listed twice")
        out[(i, j)] = post
    return out


def combine_posteriors(forward: Iterable[tuple[int, int, float]], reverse: Iterable[tuple[int, int, float]],
                       threshold: float = 0.5) -> list[tuple[int, int, float]]:
    """Average two directions' link posteriors and keep those at or above a threshold.

    Formula: p(i, j) = (p_fwd(i, j) + p_rev(i, j)) / 2, with a missing link counting 0.

    Parameters
    ----------
    forward, reverse : iterable of (int, int, float)
        (source position, target position, posterior) from each directional model.
    threshold : float in (0, 1]
        Keep links with p(i, j) >= threshold.

    Returns
    -------
    list of (int, int, float)
        Kept links with their averaged posterior, sorted by (source, target).
    """
    _check_threshold(threshold)
    fwd = _scored_dict(forward, "forward posteriors")
    rev = _scored_dict(reverse, "reverse posteriors")
    out = []
    for link in sorted(fwd.keys() | rev.keys()):
        post = (fwd.get(link, 0.0) + rev.get(link, 0.0)) / 2.0
        if post >= threshold:
            out.append((link[0], link[1], post))
    return out


def combine_posteriors_batch(forward: ScoredLinkArrays, reverse: ScoredLinkArrays, *, n_src: np.ndarray,
                             n_tgt: np.ndarray, threshold: float = 0.5) -> ScoredLinkArrays:
    """:func:`combine_posteriors` for every pair of a block, vectorised.

    Parameters
    ----------
    forward, reverse : ScoredLinkArrays (or any 4-tuple)
        offsets int64 (n_pairs + 1,); src_index, tgt_index int32 (n_links,);
        posterior float64 (n_links,).
    n_src, n_tgt : int array, shape (n_pairs,)
        Sentence lengths, used to check the links.
    threshold : float in (0, 1]

    Returns
    -------
    ScoredLinkArrays
        Kept links per pair, sorted by (source, target), with averaged posteriors.
    """
    _check_threshold(threshold)
    n_src, n_tgt = _pair_lengths(n_src, n_tgt)
    n_pairs = len(n_src)
    for name, links in (("forward posteriors", forward), ("reverse posteriors", reverse)):
        _check_csr(name, tuple(links), n_pairs, n_src, n_tgt)
        post = np.asarray(links[3], dtype=np.float64)
        bad = ~((post >= 0.0) & (post <= 1.0))
        if bad.any():
            k = int(np.argmax(bad))
            raise InputError(f"{name}: link {int(links[1][k])}-{int(links[2][k])} of pair "
                             f"{int(np.searchsorted(links[0], k, side='right') - 1)} has posterior {post[k]}, outside [0, 1]")
    n_src_max, n_tgt_max = _key_space(n_pairs, n_src, n_tgt)
    fwd_keys = _cell_keys(forward, n_pairs, n_src_max, n_tgt_max)
    rev_keys = _cell_keys(reverse, n_pairs, n_src_max, n_tgt_max)
    for name, keys, links in (("forward posteriors", fwd_keys, forward), ("reverse posteriors", rev_keys, reverse)):
        ordered = np.sort(keys)
        dup = np.flatnonzero(ordered[1:] == ordered[:-1])
        if len(dup):
            key = int(ordered[dup[0]])
            pair, cell = divmod(key, n_src_max * n_tgt_max)
            raise InputError(f"{name}: pair {pair}: link {cell // n_tgt_max}-{cell % n_tgt_max} is listed twice")
    keys, inverse = np.unique(np.concatenate([fwd_keys, rev_keys]), return_inverse=True)
    total = np.bincount(inverse, weights=np.concatenate([np.asarray(forward[3], np.float64),
                                                         np.asarray(reverse[3], np.float64)]),
                        minlength=len(keys))
    post = total / 2.0
    keep = post >= threshold
    links = _keys_to_links(keys[keep], n_pairs, n_src_max, n_tgt_max)
    return ScoredLinkArrays(links.offsets, links.src_index, links.tgt_index, post[keep])
