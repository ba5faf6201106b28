"""Real, human-translated sentence pairs from the system's gettext catalogs.

Where the data comes from: the compiled message catalogs that installed
programs ship under ``<locale_dir>/<lang>/LC_MESSAGES/*.mo`` (by default
``/usr/share/locale``). In each catalog the key (msgid) is the program's
English message and the value (msgstr) is a translator's rendering of it into
``<lang>``. Nothing is downloaded and nothing is committed: the corpus is built
from whatever catalogs the machine has, at test or benchmark time, so its size
varies from machine to machine.

Catalogs are read with Python's :mod:`gettext` (``GNUTranslations`` and its
``_catalog`` dict). The rules, applied to every entry:

* the header entry (empty msgid) is skipped;
* a message context (``ctxt\\x04msgid``) is dropped, keeping the msgid;
* plural entries (keys ``(msgid, n)``) give one pair: the singular msgid with
  ``msgstr[0]``, the form the catalog uses for n = 1 in most languages; the
  other plural forms are skipped (the English plural text is not kept in
  ``_catalog``, so they would pair a plural translation with a singular source);
* untranslated entries (empty msgstr) and entries whose msgstr equals the
  msgid are skipped; compiled catalogs hold no fuzzy entries (the compiler
  leaves them out by default), so none need skipping here;
* format directives are removed: printf style (``%s``, ``%d``, ``%1$s``,
  ``%-10.3lf``, ``%'d``), Python style (``%(name)s``), date style (any
  ``%`` + letter, as in ``%H:%M``, ``%-d``) and brace style (``{0}``,
  ``{name}``); ``%%`` becomes ``%``. They carry no word to align and
  their order differs between languages;
* keyboard mnemonics are removed: a ``&`` right before a letter (not an
  ``&name;`` entity), and an ``_`` right before a letter when it is the
  string's only underscore and does not sit between two capitals or digits (so
  ``LC_ALL``-style names keep theirs);
* text is lower-cased (``lowercase=True``) and tokenised by a regex: a token
  is a run of word characters, hyphen-joined runs staying one token
  (``von-links-nach-rechts``); any other non-space character (punctuation,
  apostrophes, quotes) is a token by itself, a run of the same character
  (``--``, ``...``) one token;
* a pair is kept only if both sides have at least ``min_tokens`` tokens (and
  at most ``max_tokens`` if given), at least one word token each, and differ
  after normalisation.

Order is stable: catalogs by file name, entries by raw msgid within a catalog;
identical (source, target) pairs are kept once, at their first occurrence.
A catalog that cannot be read is skipped with a :class:`UserWarning` naming
the file and the cause; the skipped files and causes are also recorded in the
table's schema metadata (``spark_align.gettext.skipped``).
"""
from __future__ import annotations

import gettext
import json
import os
import re
import struct
import warnings
from collections.abc import Iterable

import pyarrow as pa

from spark_align.errors import ConfigError, InputError

SCHEMA = pa.schema([
    ("id", pa.int64()),
    ("source", pa.string()),
    ("target", pa.string()),
    ("catalog", pa.string()),
])
SKIPPED_KEY = b"spark_align.gettext.skipped"
DEFAULT_LOCALE_DIR = "/usr/share/locale"

_MO_MAGIC = 0x950412DE


class CatalogNotFoundError(InputError, FileNotFoundError):
    """The language directory, or a requested catalog, is not under ``locale_dir``."""

_FORMAT_RE = re.compile(
    r"%\([^)\s]*\)[-+ #0]*\d*(?:\.\d+)?[diouxXeEfFgGcrsa]"                 # %(name)s
    r"|%(?:\d+\$)?[-+ #0']*(?:\d+|\*(?:\d+\$)?)?(?:\.(?:\d+|\*(?:\d+\$)?))?"  # %1$-10.*s
    r"(?:hh|h|ll|l|L|q|j|z|Z|t|I)?[diouxXeEfFgGaAcCsSpnm]"
    r"|%[-_0^#]?[EO]?[A-Za-z]"                                             # strftime: %H %-d %Ey
    r"|\{\w*\}"                                                            # {0} {name}
)
_AMP_MNEMONIC_RE = re.compile(r"&(?=[^\W\d_])(?![^\W_]+;)")
_TOKEN_RE = re.compile(r"\w+(?:-\w+)*|([^\w\s])\1*")
_WORD_RE = re.compile(r"\w")


# --------------------------------------------------------------------------
# Normalisation (pure string functions)
# --------------------------------------------------------------------------

def strip_markup(text: str) -> str:
    """Remove format directives and keyboard mnemonics (rules in the module docstring)."""
    text = _FORMAT_RE.sub(" ", text.replace("%%", "\0")).replace("\0", "%")
    text = _AMP_MNEMONIC_RE.sub("", text)
    at = text.find("_")
    if at >= 0 and text.count("_") == 1 and at + 1 < len(text) and text[at + 1].isalpha():
        before, after = text[at - 1: at], text[at + 1]
        in_caps_name = (before.isupper() or before.isdigit()) and after.isupper()
        if not in_caps_name:
            text = text[:at] + text[at + 1:]
    return text


def tokenize(text: str, *, lowercase: bool = True) -> list[str]:
    """Split into word tokens (hyphen-joined runs kept whole) and punctuation tokens."""
    return [match.group(0) for match in _TOKEN_RE.finditer(text.lower() if lowercase else text)]


def normalize(text: str, *, lowercase: bool = True) -> str:
    """Markup stripped, tokenised, space-joined."""
    return " ".join(tokenize(strip_markup(text), lowercase=lowercase))


# --------------------------------------------------------------------------
# Reading catalogs
# --------------------------------------------------------------------------

def _catalog_dir(lang: str, locale_dir: str) -> str:
    if not lang or "/" in lang or lang in (".", ".."):
        raise ConfigError(f"lang must be a locale directory name such as 'de' or 'pt_BR', got {lang!r}")
    path = os.path.join(locale_dir, lang, "LC_MESSAGES")
    if not os.path.isdir(path):
        raise CatalogNotFoundError(f"no catalogs for language {lang!r}: {path} is not a directory; "
                                f"available_languages({locale_dir!r}) lists the languages present")
    return path


def _mo_files(path: str) -> list[str]:
    return sorted(name for name in os.listdir(path) if name.endswith(".mo"))


def _read_entries(path: str) -> list[tuple[str, str]]:
    """(msgid, msgstr) of one catalog, context dropped, plurals reduced, sorted by raw msgid."""
    with open(path, "rb") as handle:
        catalog = gettext.GNUTranslations(handle)._catalog
    entries = []
    for key, msgstr in catalog.items():
        if isinstance(key, tuple):
            if key[1] != 0:
                continue
            key = key[0]
        entries.append((key, msgstr))
    entries.sort()
    return [(key.split("\x04", 1)[-1], msgstr) for key, msgstr in entries]


def _keep(src_tokens: list[str], tgt_tokens: list[str], min_tokens: int, max_tokens: int | None) -> bool:
    for tokens in (src_tokens, tgt_tokens):
        if len(tokens) < min_tokens or (max_tokens is not None and len(tokens) > max_tokens):
            return False
        if not any(_WORD_RE.match(token) for token in tokens):
            return False
    return src_tokens != tgt_tokens


def catalog_pairs(lang: str, *, locale_dir: str = DEFAULT_LOCALE_DIR, min_tokens: int = 1,
                  max_tokens: int | None = None, max_pairs: int | None = None,
                  catalogs: Iterable[str] | None = None, lowercase: bool = True) -> pa.Table:
    """English-to-``lang`` sentence pairs from the gettext catalogs of one language.

    Parameters
    ----------
    lang : str
        Locale directory name under ``locale_dir`` (``'de'``, ``'fr'``, ``'pt_BR'``).
    locale_dir : str
        Root holding ``<lang>/LC_MESSAGES/*.mo``.
    min_tokens, max_tokens : int, int or None
        Bounds on the token count of each side (after normalisation).
    max_pairs : int or None
        Keep only the first ``max_pairs`` pairs in the stable order (which
        favours catalogs whose names sort first).
    catalogs : iterable of str or None
        If given, read only these catalog file names (``'gtk20.mo'``).
    lowercase : bool
        Lower-case both sides.

    Returns
    -------
    pyarrow.Table
        Schema :data:`SCHEMA`: ``id`` int64 (0..n-1), ``source`` (English) and
        ``target`` (translation) space-separated tokens, ``catalog`` file name.
    """
    if isinstance(min_tokens, bool) or not isinstance(min_tokens, int) or min_tokens < 1:
        raise ConfigError(f"min_tokens must be an integer >= 1, got {min_tokens!r}")
    if max_tokens is not None and (not isinstance(max_tokens, int) or max_tokens < min_tokens):
        raise ConfigError(f"max_tokens must be None or an integer >= min_tokens={min_tokens}, got {max_tokens!r}")
    if max_pairs is not None and (not isinstance(max_pairs, int) or max_pairs < 0):
        raise ConfigError(f"max_pairs must be None or a non-negative integer, got {max_pairs!r}")
    path = _catalog_dir(lang, locale_dir)
    names = _mo_files(path)
    if catalogs is not None:
        wanted = set(catalogs)
        missing = sorted(wanted - set(names))
        if missing:
            raise CatalogNotFoundError(f"catalog(s) {missing} not found in {path}")
        names = [name for name in names if name in wanted]

    sources: list[str] = []
    targets: list[str] = []
    origins: list[str] = []
    seen: set[tuple[str, str]] = set()
    skipped: list[dict[str, str]] = []
    for name in names:
        if max_pairs is not None and len(sources) >= max_pairs:
            break
        try:
            entries = _read_entries(os.path.join(path, name))
        except (OSError, UnicodeDecodeError, ValueError, LookupError) as exc:
            reason = f"{type(exc).__name__}: {exc}"
            skipped.append({"catalog": name, "reason": reason})
            warnings.warn(f"skipped catalog {os.path.join(path, name)}: {reason}", UserWarning, stacklevel=2)
            continue
        for msgid, msgstr in entries:
            if not msgid or not msgstr or msgid == msgstr:
                continue
            src_tokens = tokenize(strip_markup(msgid), lowercase=lowercase)
            tgt_tokens = tokenize(strip_markup(msgstr), lowercase=lowercase)
            if not _keep(src_tokens, tgt_tokens, min_tokens, max_tokens):
                continue
            pair = (" ".join(src_tokens), " ".join(tgt_tokens))
            if pair in seen:
                continue
            seen.add(pair)
            sources.append(pair[0])
            targets.append(pair[1])
            origins.append(name)
            if max_pairs is not None and len(sources) >= max_pairs:
                break

    table = pa.Table.from_arrays([
        pa.array(range(len(sources)), type=pa.int64()),
        pa.array(sources, type=pa.string()),
        pa.array(targets, type=pa.string()),
        pa.array(origins, type=pa.string()),
    ], schema=SCHEMA)
    return table.replace_schema_metadata({SKIPPED_KEY: json.dumps(skipped).encode()})


# --------------------------------------------------------------------------
# What is on this machine
# --------------------------------------------------------------------------

def _n_messages(path: str) -> int:
    """Number of messages a .mo file declares in its header (0 if it is not a .mo file)."""
    try:
        with open(path, "rb") as handle:
            head = handle.read(12)
    except OSError:
        return 0
    if len(head) < 12:
        return 0
    for order in ("<", ">"):
        magic, _, n_strings = struct.unpack(order + "III", head)
        if magic == _MO_MAGIC:
            return n_strings
    return 0


def available_languages(locale_dir: str = DEFAULT_LOCALE_DIR) -> list[tuple[str, int]]:
    """Languages with catalogs under ``locale_dir`` and an upper bound on their pairs.

    The estimate is the number of messages the catalogs declare (header
    entries included); it reads 12 bytes per file. :func:`catalog_pairs`
    never returns more (it keeps at most one pair per message). Sorted by
    estimate, largest first, then by name; languages with no message are left out.
    """
    if not os.path.isdir(locale_dir):
        raise CatalogNotFoundError(f"locale directory {locale_dir} does not exist")
    found = []
    for lang in sorted(os.listdir(locale_dir)):
        path = os.path.join(locale_dir, lang, "LC_MESSAGES")
        if not os.path.isdir(path):
            continue
        total = sum(_n_messages(os.path.join(path, name)) for name in _mo_files(path))
        if total > 0:
            found.append((lang, total))
    found.sort(key=lambda item: (-item[1], item[0]))
    return found
