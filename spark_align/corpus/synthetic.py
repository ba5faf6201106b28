"""A generated parallel corpus with known word alignments.

Two invented languages, called here *source* and *target*, with nothing taken
from any real text. Words are pseudo-words built from syllables; the spelling
of word id ``k`` is a fixed function of ``k`` (independent of the seed), while
the lexicon and the sentences depend on the seed.

The generative story, per sentence pair:

1. the source length ``l`` is uniform in ``[min_len, max_len]``; each source
   word is drawn from a Zipf law over ``src_vocab`` types (rank ``r`` has
   probability proportional to ``(r + 1) ** -zipf_a``; id == rank);
2. every source token gets a *fertility*: 0 (deleted, no link) with the type's
   deletion probability, 2 with the type's doubling probability (it emits its
   translation followed by the type's fixed *companion* word), else 1;
3. each emitted translation is drawn from the type's 1-3 translations (the
   first one dominant);
4. target word order follows the source, except that with probability
   ``reorder`` a source word (with all it emits) moves 1 or 2 positions left or
   right (2 positions with probability ``far_reorder`` given a move), so gold
   links lie near the diagonal;
5. ``Binomial(l, insert_rate)`` target *function words* are inserted at random
   slots; they are aligned to NULL (no link);
6. a pair whose target would be empty keeps its first source word
   (fertility 1), so no side is ever empty.

Gold links are *sure* links ``(source index, target index)``, 0-based, listed
in target order; each target token has at most one link. Model 1 can learn the
lexicon; the near-diagonal order is what position-aware models (IBM Model 2,
HMM) can exploit on top of it.

A small :data:`GLOSSARY` of memorable frequent words is planted at the top
ranks: every glossary translation is its source word spelled backwards
(``tomak`` -> ``kamot``), so a demo can print alignments a reader can check by
eye. Glossary entries also show each phenomenon: a particle that is often
deleted (``ka``), a word with two translations (``sevi``), a word that often
emits two words (``buno`` -> ``onub te``).

Sampling is vectorised numpy (one pass over all tokens of a chunk of
``_CHUNK_PAIRS`` pairs; no Python loop over tokens) and strings are joined by
pyarrow compute kernels.
"""
from __future__ import annotations

import dataclasses
import functools
import json
import os
import tempfile
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from spark_align.errors import ConfigError, InputError, SparkAlignError

LINK_TYPE = pa.struct([("source", pa.int32()), ("target", pa.int32())])
SCHEMA = pa.schema([
    ("id", pa.int64()),
    ("source", pa.string()),
    ("target", pa.string()),
    ("alignment", pa.list_(LINK_TYPE)),
])
METADATA_KEY = b"spark_align.synthetic"

# Memorable frequent source words (ranks 0.., most frequent first). Fields:
# source word, [(translation, probability)], deletion probability,
# companion word or None, probability of emitting the companion too.
GLOSSARY: tuple[tuple[str, tuple[tuple[str, float], ...], float, str | None, float], ...] = (
    ("ka", (("ak", 1.0),), 0.5, None, 0.0),
    ("tomak", (("kamot", 1.0),), 0.0, None, 0.0),
    ("sevi", (("ives", 0.7), ("ivesa", 0.3)), 0.0, None, 0.0),
    ("lirum", (("muril", 1.0),), 0.0, None, 0.0),
    ("buno", (("onub", 1.0),), 0.0, "te", 0.5),
    ("peltar", (("ratlep", 1.0),), 0.0, None, 0.0),
    ("mizu", (("uzim", 1.0),), 0.0, None, 0.0),
    ("dorsa", (("asrod", 1.0),), 0.0, None, 0.0),
    ("venik", (("kinev", 1.0),), 0.0, None, 0.0),
    ("golu", (("ulog", 1.0),), 0.0, None, 0.0),
    ("rasket", (("teksar", 1.0),), 0.0, None, 0.0),
    ("nim", (("min", 1.0),), 0.0, None, 0.0),
)

# Target words inserted spontaneously (aligned to NULL), with their shares.
FUNCTION_WORDS: tuple[tuple[str, float], ...] = (("o", 0.4), ("ey", 0.3), ("lu", 0.2), ("ha", 0.1))

# Syllable inventories: the two languages look different on the page.
_SRC_ONSETS = "b d g k l m n p r s t v z".split()
_SRC_NUCLEI = "a e i o u".split()
_TGT_ONSETS = "f h j q r s w x y".split()
_TGT_NUCLEI = "a e i o u ae ei".split()

_CHUNK_PAIRS = 250_000


class OutputExistsError(SparkAlignError, FileExistsError):
    """The output directory already holds part files and ``overwrite`` was not given."""


# --------------------------------------------------------------------------
# Configuration
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class SyntheticConfig:
    """Settings of the generator; checked once, when built (:class:`ConfigError` names the field).

    Probabilities are per source word *type* unless said otherwise: a share
    ``particle_frac`` of the non-glossary types delete with probability
    ``particle_delete``, the rest with ``p_delete``; a share ``double_frac``
    emit their companion word too with probability ``double_rate``.
    """

    src_vocab: int = 3000
    tgt_vocab: int = 3000
    min_len: int = 5
    max_len: int = 30
    zipf_a: float = 1.0
    reorder: float = 0.3
    far_reorder: float = 0.25
    insert_rate: float = 0.08
    p_delete: float = 0.02
    particle_frac: float = 0.08
    particle_delete: float = 0.4
    double_frac: float = 0.1
    double_rate: float = 0.35

    def __post_init__(self) -> None:
        n_tgt_reserved = len(FUNCTION_WORDS) + len(_glossary_targets())
        if self.src_vocab <= len(GLOSSARY):
            raise ConfigError(f"src_vocab={self.src_vocab} must exceed the {len(GLOSSARY)} glossary words; "
                             f"use src_vocab >= {len(GLOSSARY) + 1}")
        if self.tgt_vocab <= n_tgt_reserved:
            raise ConfigError(f"tgt_vocab={self.tgt_vocab} must exceed the {n_tgt_reserved} reserved target words "
                             f"(function and glossary words); use tgt_vocab >= {n_tgt_reserved + 1}")
        if not 1 <= self.min_len <= self.max_len:
            raise ConfigError(f"need 1 <= min_len <= max_len, got min_len={self.min_len}, max_len={self.max_len}")
        if self.max_len > 1000:
            raise ConfigError(f"max_len={self.max_len} is too long for a sentence; use max_len <= 1000")
        if not self.zipf_a >= 0:
            raise ConfigError(f"zipf_a={self.zipf_a} must be >= 0 (0 gives a uniform vocabulary)")
        for name in ("reorder", "far_reorder", "insert_rate", "p_delete", "particle_frac",
                     "particle_delete", "double_frac", "double_rate"):
            value = getattr(self, name)
            if not 0.0 <= value <= 1.0:
                raise ConfigError(f"{name}={value} must be a probability in [0, 1]")
        if max(self.p_delete, self.particle_delete) + self.double_rate > 1.0:
            raise ConfigError(f"deletion probability + double_rate must be <= 1, got "
                             f"max(p_delete, particle_delete)={max(self.p_delete, self.particle_delete)} "
                             f"+ double_rate={self.double_rate}")

    def to_json(self) -> str:
        """Canonical JSON (sorted keys) for fingerprints and table metadata."""
        return json.dumps(dataclasses.asdict(self), sort_keys=True)


# --------------------------------------------------------------------------
# Vocabularies (fixed spellings, independent of the seed)
# --------------------------------------------------------------------------

def _glossary_targets() -> list[str]:
    """Distinct target words used by the glossary, in first-use order."""
    seen: dict[str, None] = {}
    for _, translations, _, companion, _ in GLOSSARY:
        for word, _ in translations:
            seen.setdefault(word, None)
        if companion is not None:
            seen.setdefault(companion, None)
    return list(seen)


def _pseudo_words(onsets: list[str], nuclei: list[str], n_words: int, reserved: set[str]) -> list[str]:
    """``n_words`` distinct syllable strings (2+ syllables), none in ``reserved``.

    Within each word length the order is scrambled by a fixed affine map
    ``q -> (a q + c) mod n_class`` (a bijection because ``a`` is a prime not
    dividing ``n_class``), so neighbouring ids do not look alike.
    """
    syllables = np.array([o + v for o in onsets for v in nuclei], dtype=object)
    n_syl = len(syllables)
    multiplier, increment = 7919, 104729  # primes larger than any syllable count
    words: list[str] = []
    n_syllables = 2
    while len(words) < n_words:
        n_class = n_syl ** n_syllables
        # Over-draw a little: a few candidates may be reserved words.
        take = min(n_class, n_words - len(words) + len(reserved))
        code = (np.arange(take, dtype=np.int64) * multiplier + increment) % n_class
        spelled = np.full(take, "", dtype=object)
        for _ in range(n_syllables):
            spelled = spelled + syllables[code % n_syl]
            code = code // n_syl
        for word in spelled:
            if word not in reserved:
                words.append(word)
                if len(words) == n_words:
                    break
        n_syllables += 1
    return words


@functools.lru_cache(maxsize=8)
def source_vocabulary(n_words: int) -> tuple[str, ...]:
    """Spelling of source word ids ``0..n_words-1`` (glossary words first)."""
    head = [entry[0] for entry in GLOSSARY]
    return tuple(head + _pseudo_words(_SRC_ONSETS, _SRC_NUCLEI, n_words - len(head), set(head)))


@functools.lru_cache(maxsize=8)
def target_vocabulary(n_words: int) -> tuple[str, ...]:
    """Spelling of target word ids ``0..n_words-1`` (function, then glossary words first)."""
    head = [word for word, _ in FUNCTION_WORDS] + _glossary_targets()
    return tuple(head + _pseudo_words(_TGT_ONSETS, _TGT_NUCLEI, n_words - len(head), set(head)))


# --------------------------------------------------------------------------
# Lexicon (depends on the seed)
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class _Lexicon:
    """Per source type (V = src_vocab): trans_ids int32 (V, 3), trans_prob and
    trans_cdf float64 (V, 3) (unused columns have probability 0), p_delete
    float64 (V,), p_double float64 (V,), companion int32 (V,)."""

    trans_ids: np.ndarray
    trans_prob: np.ndarray
    trans_cdf: np.ndarray
    p_delete: np.ndarray
    p_double: np.ndarray
    companion: np.ndarray


def _build_lexicon(cfg: SyntheticConfig, rng: np.random.Generator) -> _Lexicon:
    n_src = cfg.src_vocab
    n_func = len(FUNCTION_WORDS)
    gloss_tgt = _glossary_targets()
    tgt_index = {word: n_func + k for k, word in enumerate(gloss_tgt)}
    pool = np.arange(n_func + len(gloss_tgt), cfg.tgt_vocab, dtype=np.int32)

    # Primary translations: a random matching of source types onto the pool,
    # tiled when the pool is smaller (then some target words are ambiguous).
    n_repeat = -(-n_src // len(pool))
    primary = np.concatenate([rng.permutation(pool) for _ in range(n_repeat)])[:n_src]
    n_trans = rng.choice(np.array([1, 2, 3]), p=[0.55, 0.3, 0.15], size=n_src)
    trans_ids = np.column_stack([primary, rng.choice(pool, size=(n_src, 2))]).astype(np.int32)
    weights = np.column_stack([np.ones(n_src), rng.uniform(0.1, 0.5, size=(n_src, 2))])
    weights[np.arange(3)[None, :] >= n_trans[:, None]] = 0.0
    trans_prob = weights / weights.sum(axis=1, keepdims=True)

    particle = rng.random(n_src) < cfg.particle_frac
    p_delete = np.where(particle, cfg.particle_delete, cfg.p_delete)
    p_double = np.where(rng.random(n_src) < cfg.double_frac, cfg.double_rate, 0.0)
    companion = rng.choice(pool, size=n_src).astype(np.int32)

    for rank, (_, translations, delete, comp, double) in enumerate(GLOSSARY):
        trans_ids[rank] = [tgt_index[w] for w, _ in translations] + [tgt_index[translations[0][0]]] * (3 - len(translations))
        trans_prob[rank] = [p for _, p in translations] + [0.0] * (3 - len(translations))
        p_delete[rank], p_double[rank] = delete, double
        companion[rank] = tgt_index[comp] if comp is not None else trans_ids[rank, 0]

    trans_cdf = np.cumsum(trans_prob, axis=1)
    # Columns at or past the last real translation are exactly 1 so that a
    # uniform draw in [0, 1) can never select a padding column.
    last_real = (trans_prob > 0).cumsum(axis=1) == (trans_prob > 0).sum(axis=1, keepdims=True)
    trans_cdf[last_real] = 1.0
    return _Lexicon(trans_ids, trans_prob, trans_cdf, p_delete, p_double, companion)


def _streams(seed: int) -> tuple[np.random.Generator, np.random.SeedSequence]:
    """Lexicon generator and the seed sequence that sentence chunks spawn from."""
    lexicon_seq, sentence_seq = np.random.SeedSequence(seed).spawn(2)
    return np.random.default_rng(lexicon_seq), sentence_seq


def true_lexicon(*, seed: int = 0, **settings) -> pa.Table:
    """The lexicon that :func:`generate` with the same seed and settings samples from.

    Returns a table with columns ``source`` (string), ``target`` (string),
    ``prob`` (float64): p(translation | source word) for each of the 1-3
    translations of every source type, ignoring deletion and companions.
    """
    cfg = SyntheticConfig(**settings)
    lex = _build_lexicon(cfg, _streams(seed)[0])
    src_idx, col = np.nonzero(lex.trans_prob > 0)
    src_words = pa.array(source_vocabulary(cfg.src_vocab))
    tgt_words = pa.array(target_vocabulary(cfg.tgt_vocab))
    return pa.table({
        "source": src_words.take(pa.array(src_idx)),
        "target": tgt_words.take(pa.array(lex.trans_ids[src_idx, col])),
        "prob": pa.array(lex.trans_prob[src_idx, col]),
    })


# --------------------------------------------------------------------------
# Sentence sampling
# --------------------------------------------------------------------------

def _offsets(lens: np.ndarray) -> np.ndarray:
    out = np.zeros(len(lens) + 1, dtype=np.int64)
    np.cumsum(lens, out=out[1:])
    return out


def _sample_chunk(cfg: SyntheticConfig, lex: _Lexicon, zipf_cdf: np.ndarray, n_pairs: int,
                  rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Token ids, offsets and gold links of ``n_pairs`` pairs (all int64 / int32 arrays)."""
    src_len = rng.integers(cfg.min_len, cfg.max_len + 1, size=n_pairs)
    src_offsets = _offsets(src_len)
    n_src_tokens = int(src_offsets[-1])
    src_pair = np.repeat(np.arange(n_pairs), src_len)
    src_pos = np.arange(n_src_tokens) - src_offsets[src_pair]
    src_ids = np.searchsorted(zipf_cdf, rng.random(n_src_tokens), side="right").astype(np.int32)

    u = rng.random(n_src_tokens)
    p_del = lex.p_delete[src_ids]
    fertility = np.where(u < p_del, 0, np.where(u < p_del + lex.p_double[src_ids], 2, 1))
    n_insert = rng.binomial(src_len, cfg.insert_rate)
    empty = (np.bincount(src_pair, weights=fertility, minlength=n_pairs) + n_insert) == 0
    fertility[src_offsets[:-1][empty]] = 1

    # Reordering: each source word (and everything it emits) gets a sort key
    # pos + shift; half-integer shifts never tie with unmoved words.
    moved = rng.random(n_src_tokens) < cfg.reorder
    far = rng.random(n_src_tokens) < cfg.far_reorder
    sign = np.where(rng.random(n_src_tokens) < 0.5, -1.0, 1.0)
    key = src_pos + moved * sign * np.where(far, 2.5, 1.5)

    emit = np.flatnonzero(fertility >= 1)
    choice = (rng.random(len(emit))[:, None] >= lex.trans_cdf[src_ids[emit]]).sum(axis=1)
    double = np.flatnonzero(fertility == 2)

    ins_pair = np.repeat(np.arange(n_pairs), n_insert)
    ins_slot = np.floor(rng.random(len(ins_pair)) * (src_len[ins_pair] + 1))
    func_cdf = np.cumsum([p for _, p in FUNCTION_WORDS])
    func_cdf[-1] = 1.0
    ins_word = np.searchsorted(func_cdf, rng.random(len(ins_pair)), side="right")

    tok_pair = np.concatenate([src_pair[emit], src_pair[double], ins_pair])
    tok_key = np.concatenate([key[emit], key[double] + 0.25, ins_slot - 0.4])
    tok_src = np.concatenate([src_pos[emit], src_pos[double], np.full(len(ins_pair), -1)])
    tok_word = np.concatenate([lex.trans_ids[src_ids[emit], choice], lex.companion[src_ids[double]],
                               ins_word]).astype(np.int32)
    order = np.lexsort((tok_key, tok_pair))  # stable: ties keep the order above
    tok_pair, tok_src, tgt_ids = tok_pair[order], tok_src[order], tok_word[order]

    tgt_offsets = _offsets(np.bincount(tok_pair, minlength=n_pairs))
    tgt_pos = np.arange(len(tok_pair)) - tgt_offsets[tok_pair]
    linked = tok_src >= 0
    link_offsets = _offsets(np.bincount(tok_pair[linked], minlength=n_pairs))
    return {
        "src_ids": src_ids, "src_offsets": src_offsets,
        "tgt_ids": tgt_ids, "tgt_offsets": tgt_offsets,
        "link_src": tok_src[linked].astype(np.int32), "link_tgt": tgt_pos[linked].astype(np.int32),
        "link_offsets": link_offsets,
    }


def _join_tokens(words: pa.Array, ids: np.ndarray, offsets: np.ndarray) -> pa.Array:
    """Space-joined sentences from token ids int32 (n_tokens,) and offsets int64 (n_pairs + 1,)."""
    tokens = words.take(pa.array(ids))
    return pc.binary_join(pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32)), tokens), " ")


def generate(n_pairs: int, *, seed: int = 0, **settings) -> pa.Table:
    """Sample ``n_pairs`` sentence pairs with gold alignments.

    Parameters
    ----------
    n_pairs : int
        Number of pairs (>= 0).
    seed : int
        Seed of the numpy Generator; the same seed and settings give an
        identical table.
    **settings
        Fields of :class:`SyntheticConfig` (``src_vocab``, ``tgt_vocab``,
        ``min_len``, ``max_len``, ``zipf_a``, ``reorder``, ``insert_rate``, ...).

    Returns
    -------
    pyarrow.Table
        Schema :data:`SCHEMA`: ``id`` int64 (0..n_pairs-1), ``source`` and
        ``target`` strings of space-separated tokens, ``alignment``
        list<struct<source: int32, target: int32>> of 0-based sure links in
        target order. The schema metadata ``spark_align.synthetic`` holds the
        settings and seed as JSON.
    """
    if isinstance(n_pairs, bool) or not isinstance(n_pairs, (int, np.integer)) or n_pairs < 0:
        raise ConfigError(f"n_pairs must be a non-negative integer, got {n_pairs!r}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ConfigError(f"seed must be a non-negative integer, got {seed!r}")
    cfg = SyntheticConfig(**settings)
    lexicon_rng, sentence_seq = _streams(int(seed))
    lex = _build_lexicon(cfg, lexicon_rng)
    weights = (np.arange(1, cfg.src_vocab + 1, dtype=np.float64)) ** -cfg.zipf_a
    zipf_cdf = np.cumsum(weights / weights.sum())[:-1]  # searchsorted -> ids 0..V-1
    src_words = pa.array(source_vocabulary(cfg.src_vocab))
    tgt_words = pa.array(target_vocabulary(cfg.tgt_vocab))

    n_chunks = max(1, -(-int(n_pairs) // _CHUNK_PAIRS))
    tables = []
    for chunk, chunk_seq in enumerate(sentence_seq.spawn(n_chunks)):
        start = chunk * _CHUNK_PAIRS
        size = min(_CHUNK_PAIRS, int(n_pairs) - start)
        arrays = _sample_chunk(cfg, lex, zipf_cdf, size, np.random.default_rng(chunk_seq))
        links = pa.StructArray.from_arrays([pa.array(arrays["link_src"]), pa.array(arrays["link_tgt"])],
                                           fields=list(LINK_TYPE))
        tables.append(pa.Table.from_arrays([
            pa.array(np.arange(start, start + size, dtype=np.int64)),
            _join_tokens(src_words, arrays["src_ids"], arrays["src_offsets"]),
            _join_tokens(tgt_words, arrays["tgt_ids"], arrays["tgt_offsets"]),
            pa.ListArray.from_arrays(pa.array(arrays["link_offsets"].astype(np.int32)), links),
        ], schema=SCHEMA))
    meta = json.dumps({"seed": int(seed), "config": json.loads(cfg.to_json())}, sort_keys=True)
    return pa.concat_tables(tables).replace_schema_metadata({METADATA_KEY: meta.encode()})


def demo_corpus(n_pairs: int = 3000, *, seed: int = 7) -> pa.Table:
    """A laptop-sized corpus: 2k-word vocabularies, sentences of 5-20 words.

    Small enough that every model trains in seconds; the glossary words are
    frequent enough that their learned translations are reliable.
    """
    return generate(n_pairs, seed=seed, src_vocab=2000, tgt_vocab=2000, min_len=5, max_len=20)


# --------------------------------------------------------------------------
# Writers
# --------------------------------------------------------------------------

def _check_table(table: pa.Table, columns: tuple[str, ...]) -> None:
    missing = [name for name in columns if name not in table.column_names]
    if missing:
        raise InputError(f"table lacks column(s) {missing}; it has {table.column_names}")


def _atomic_write(path: str, write) -> None:
    """Write through ``write(tmp_path)`` to a temporary file beside ``path``, then rename."""
    directory = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=directory)
    os.close(fd)
    try:
        write(tmp)
        os.replace(tmp, path)
    except BaseException:
        os.unlink(tmp)
        raise


def write_parquet(table: pa.Table, path: str, *, n_files: int = 1, overwrite: bool = False) -> list[str]:
    """Write ``table`` as ``n_files`` Parquet files ``part-00000.parquet``... in directory ``path``.

    Rows are split into contiguous slices of near-equal size, in id order.
    Each file is written under a temporary name and renamed, so a reader never
    sees half a file. Existing part files are never replaced unless
    ``overwrite`` is true. Returns the paths written.
    """
    _check_table(table, ("id", "source", "target"))
    if isinstance(n_files, bool) or not isinstance(n_files, int) or n_files < 1:
        raise ConfigError(f"n_files must be a positive integer, got {n_files!r}")
    os.makedirs(path, exist_ok=True)
    existing = sorted(name for name in os.listdir(path) if name.startswith("part-"))
    if existing and not overwrite:
        raise OutputExistsError(f"{path} already holds {existing[0]} (and {len(existing) - 1} more part files); "
                              "choose an empty directory or pass overwrite=True")
    for name in existing:
        os.unlink(os.path.join(path, name))
    bounds = np.linspace(0, table.num_rows, n_files + 1).round().astype(np.int64)
    written = []
    for k in range(n_files):
        out = os.path.join(path, f"part-{k:05d}.parquet")
        piece = table.slice(int(bounds[k]), int(bounds[k + 1] - bounds[k]))
        _atomic_write(out, lambda tmp, piece=piece: pq.write_table(piece, tmp))
        written.append(out)
    return written


def links_text(table: pa.Table) -> list[str]:
    """Gold links of each row as ``"i-j i-j ..."`` (source-target, 0-based)."""
    _check_table(table, ("alignment",))
    column = table.column("alignment").combine_chunks()
    flat = column.flatten()
    pairs = pc.binary_join_element_wise(pc.cast(flat.field("source"), pa.string()),
                                        pc.cast(flat.field("target"), pa.string()), "-")
    offsets = pc.subtract(column.offsets, column.offsets[0])
    return pc.binary_join(pa.ListArray.from_arrays(offsets, pairs), " ").to_pylist()


def write_text(table: pa.Table, src_path: str, tgt_path: str, links_path: str | None = None) -> None:
    """Write one sentence per line to ``src_path`` and ``tgt_path`` (UTF-8).

    With ``links_path``, also write the gold links, one line per pair, as
    space-separated ``i-j`` (source index - target index, 0-based); a pair
    without links gives an empty line. Each file is written atomically.
    """
    _check_table(table, ("source", "target") + (("alignment",) if links_path else ()))
    jobs = [(src_path, table.column("source").to_pylist()), (tgt_path, table.column("target").to_pylist())]
    if links_path is not None:
        jobs.append((links_path, links_text(table)))
    for path, lines in jobs:
        if any("\n" in line for line in lines):
            raise InputError(f"a line of {path} would contain a newline; the table is not tokenised text")
        text = "".join(line + "\n" for line in lines)
        _atomic_write(path, functools.partial(_write_utf8, text=text))


def _write_utf8(path: str, text: str) -> None:
    with open(path, "w", encoding="utf-8", newline="\n") as handle:
        handle.write(text)
