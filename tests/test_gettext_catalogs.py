"""Tests of the gettext-catalog corpus (spark_align.corpus.gettext_catalogs).

Two kinds: exact expectations on small catalogs written here (invented
messages and an invented target language), and properties of a corpus built
from the catalogs installed on this machine under /usr/share/locale (skipped,
with the reason, when the machine has none).
"""
from __future__ import annotations

import gettext
import json
import os
import struct
from array import array

import pyarrow as pa
import pytest

from spark_align.corpus import gettext_catalogs as gc
from spark_align.errors import ConfigError, InputError

HEADER = "Content-Type: text/plain; charset=UTF-8\nPlural-Forms: nplurals=2; plural=(n != 1);\n"


def write_mo(path, entries: dict[str, str]) -> None:
    """A minimal compiled catalog: the little-endian layout of GNU .mo files
    (magic, revision, count, two (length, offset) tables, NUL-ended strings)."""
    items = sorted((k.encode(), v.encode()) for k, v in entries.items())
    ids = strs = b""
    spans = []
    for key, value in items:
        spans.append((len(ids), len(key), len(strs), len(value)))
        ids += key + b"\0"
        strs += value + b"\0"
    n = len(items)
    key_start = 7 * 4 + 16 * n
    value_start = key_start + len(ids)
    key_table, value_table = [], []
    for key_off, key_len, value_off, value_len in spans:
        key_table += [key_len, key_off + key_start]
        value_table += [value_len, value_off + value_start]
    head = struct.pack("<Iiiiiii", 0x950412DE, 0, n, 7 * 4, 7 * 4 + 8 * n, 0, 0)
    with open(path, "wb") as handle:
        handle.write(head + array("i", key_table).tobytes() + array("i", value_table).tobytes() + ids + strs)


@pytest.fixture()
def locale_dir(tmp_path):
    root = tmp_path / "locale"
    messages = root / "xx" / "LC_MESSAGES"
    messages.mkdir(parents=True)
    write_mo(messages / "a.mo", {"": HEADER, "Open _File": "Ofnu _Filo", "Zeta": "Zetao"})
    write_mo(messages / "b.mo", {
        "": HEADER,
        "Open _File": "Ofnu _Filo",                    # same pair as in a.mo: kept once
        "&Save": "&Sparu",                             # mnemonics
        "%d item\0%d items": "%d ero\0%d eroj",        # plural: singular and msgstr[0]
        "menu\x04Quit": "Forlasu",                     # message context dropped
        "OK": "OK",                                    # identical: skipped
        "Later": "",                                   # untranslated: skipped
        "%s: %s": "%s : %s",                           # no word left: skipped
        "Copied %1$s to %2$s": "%2$s ricevis %1$s",    # format directives removed
        "Linux": "LINUX",                              # equal after lower-casing: skipped
        "one two three four five six": "unu du tri kvar kvin ses",
    })
    (root / "yy").mkdir()                              # no LC_MESSAGES
    (root / "zz" / "LC_MESSAGES").mkdir(parents=True)  # no catalogs
    return str(root)


EXPECTED = [
    ("open file", "ofnu filo", "a.mo"),
    ("zeta", "zetao", "a.mo"),
    ("item", "ero", "b.mo"),
    ("save", "sparu", "b.mo"),
    ("copied to", "ricevis", "b.mo"),
    ("quit", "forlasu", "b.mo"),
    ("one two three four five six", "unu du tri kvar kvin ses", "b.mo"),
]


def _rows(table: pa.Table) -> list[tuple[str, str, str]]:
    return list(zip(*(table.column(name).to_pylist() for name in ("source", "target", "catalog"))))


# --------------------------------------------------------------------------
# Small catalogs with known content
# --------------------------------------------------------------------------

def test_fixture_catalog_is_valid_for_python_gettext(locale_dir):
    # Outside check of the writer above: the standard library reads it back.
    with open(os.path.join(locale_dir, "xx", "LC_MESSAGES", "b.mo"), "rb") as handle:
        translations = gettext.GNUTranslations(handle)
    assert translations.gettext("&Save") == "&Sparu"
    assert translations.ngettext("%d item", "%d items", 5) == "%d eroj"
    assert translations.pgettext("menu", "Quit") == "Forlasu"


def test_rules_on_known_catalogs(locale_dir):
    table = gc.catalog_pairs("xx", locale_dir=locale_dir)
    assert table.schema.remove_metadata().equals(gc.SCHEMA)
    assert _rows(table) == EXPECTED
    assert table.column("id").to_pylist() == list(range(len(EXPECTED)))
    assert json.loads(table.schema.metadata[gc.SKIPPED_KEY]) == []


def test_limits_and_catalog_choice(locale_dir):
    assert _rows(gc.catalog_pairs("xx", locale_dir=locale_dir, max_pairs=3)) == EXPECTED[:3]
    assert _rows(gc.catalog_pairs("xx", locale_dir=locale_dir, max_tokens=5)) == EXPECTED[:-1]
    assert _rows(gc.catalog_pairs("xx", locale_dir=locale_dir, min_tokens=2)) == [EXPECTED[0], EXPECTED[-1]]
    only_b = gc.catalog_pairs("xx", locale_dir=locale_dir, catalogs=["b.mo"])
    assert _rows(only_b)[:3] == [(s, t, "b.mo") for s, t, _ in EXPECTED[2:4]] + [("copied to", "ricevis", "b.mo")]
    assert ("open file", "ofnu filo", "b.mo") in _rows(only_b)  # no longer a duplicate
    assert gc.catalog_pairs("xx", locale_dir=locale_dir, max_pairs=0).num_rows == 0


def test_case_kept_on_request(locale_dir):
    rows = _rows(gc.catalog_pairs("xx", locale_dir=locale_dir, lowercase=False))
    assert rows[0] == ("Open File", "Ofnu Filo", "a.mo")
    assert ("Linux", "LINUX", "b.mo") in rows  # differ once case is kept


def test_unreadable_catalog_is_skipped_and_named(locale_dir):
    bad = os.path.join(locale_dir, "xx", "LC_MESSAGES", "aa-broken.mo")
    with open(bad, "wb") as handle:
        handle.write(b"this is not a compiled catalog")
    with pytest.warns(UserWarning, match="aa-broken.mo"):
        table = gc.catalog_pairs("xx", locale_dir=locale_dir)
    assert _rows(table) == EXPECTED  # the other catalogs are all still there
    skipped = json.loads(table.schema.metadata[gc.SKIPPED_KEY])
    assert [item["catalog"] for item in skipped] == ["aa-broken.mo"]
    assert skipped[0]["reason"]


def test_bad_arguments_name_the_cause(locale_dir):
    with pytest.raises(InputError, match="'qq'.*available_languages"):
        gc.catalog_pairs("qq", locale_dir=locale_dir)
    with pytest.raises(ConfigError, match="lang"):
        gc.catalog_pairs("../xx", locale_dir=locale_dir)
    with pytest.raises(gc.CatalogNotFoundError, match="nope.mo"):
        gc.catalog_pairs("xx", locale_dir=locale_dir, catalogs=["nope.mo"])
    with pytest.raises(ConfigError, match="min_tokens"):
        gc.catalog_pairs("xx", locale_dir=locale_dir, min_tokens=0)
    with pytest.raises(ConfigError, match="max_tokens"):
        gc.catalog_pairs("xx", locale_dir=locale_dir, min_tokens=3, max_tokens=2)


def test_available_languages_counts_declared_messages(locale_dir):
    # a.mo declares 3 messages, b.mo 11 (headers included); yy and zz have none.
    assert gc.available_languages(locale_dir) == [("xx", 14)]
    with pytest.raises(FileNotFoundError):
        gc.available_languages(os.path.join(locale_dir, "missing"))


@pytest.mark.parametrize("raw, expected", [
    ("Use --amend now...", "use -- amend now ..."),
    ("Ü_berschreiben", "überschreiben"),
    ("LC_ALL is %s", "lc_all is"),
    ("&Open &amp; close", "open & amp ; close"),
    ("%1$s of %2$d (%3$.1f%%)", "of ( % )"),
    ("Hello {name}, {0}!", "hello , !"),
    ("%(count)d left, x %-10.3lf y %lu z %zu", "left , x y z"),
    ("Links-nach-rechts", "links-nach-rechts"),
])
def test_normalize(raw, expected):
    assert gc.normalize(raw) == expected


# --------------------------------------------------------------------------
# The catalogs installed on this machine
# --------------------------------------------------------------------------

def _machine_language() -> tuple[str, int]:
    if not os.path.isdir(gc.DEFAULT_LOCALE_DIR):
        pytest.skip(f"{gc.DEFAULT_LOCALE_DIR} does not exist on this machine, so there are no gettext catalogs")
    found = dict(gc.available_languages())
    for lang in ("de", "fr", "es"):
        if found.get(lang, 0) > 100:
            return lang, found[lang]
    candidates = [(lang, n) for lang, n in found.items() if not lang.startswith("en") and n > 100]
    if not candidates:
        pytest.skip(f"no language under {gc.DEFAULT_LOCALE_DIR} has more than 100 catalog messages")
    return max(candidates, key=lambda item: item[1])


@pytest.fixture(scope="module")
def machine_corpus():
    lang, estimate = _machine_language()
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # a mis-encoded system catalog is not this test's concern
        return lang, estimate, gc.catalog_pairs(lang)


def test_machine_corpus_shape(machine_corpus):
    lang, estimate, table = machine_corpus
    assert table.schema.remove_metadata().equals(gc.SCHEMA)
    assert 0 < table.num_rows <= estimate
    assert table.column("id").to_pylist() == list(range(table.num_rows))
    sources, targets = table.column("source").to_pylist(), table.column("target").to_pylist()
    assert all(s.strip() and t.strip() for s, t in zip(sources, targets))
    assert all(s == " ".join(s.split()) and t == " ".join(t.split()) for s, t in zip(sources, targets))
    assert all(s != t for s, t in zip(sources, targets))
    assert len(set(zip(sources, targets))) == table.num_rows
    catalogs = table.column("catalog").to_pylist()
    assert catalogs == sorted(catalogs)


def test_machine_corpus_is_deterministic(machine_corpus):
    lang, _, table = machine_corpus
    import warnings
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        again = gc.catalog_pairs(lang, max_pairs=2000)
    assert again.equals(table.slice(0, 2000))


def test_machine_pairs_trace_back_to_gettext(machine_corpus):
    """Outside check: for pairs of the first catalog, Python's own gettext
    lookup of some msgid gives a msgstr that normalises to the stored target."""
    lang, _, table = machine_corpus
    first = table.column("catalog")[0].as_py()
    with open(os.path.join(gc.DEFAULT_LOCALE_DIR, lang, "LC_MESSAGES", first), "rb") as handle:
        translations = gettext.GNUTranslations(handle)
    def lookup(context: str, msgid: str, plural: bool) -> str:
        if plural:
            return translations.npgettext(context, msgid, msgid, 1) if context else translations.ngettext(msgid, msgid, 1)
        return translations.pgettext(context, msgid) if context else translations.gettext(msgid)

    by_source = {}
    for key in translations._catalog:
        raw = key[0] if isinstance(key, tuple) else key
        context, _, msgid = raw.rpartition("\x04")
        if msgid:
            by_source.setdefault(gc.normalize(msgid), []).append((context, msgid, isinstance(key, tuple)))
    rows = [r for r in _rows(table) if r[2] == first]
    assert rows and all(source in by_source for source, _, _ in rows)
    for source, target, _ in rows:
        looked_up = {gc.normalize(lookup(*entry)) for entry in by_source[source]}
        assert target in looked_up
        # A '%' survives only where the message prints one ('%%').
        if all("%%" not in msgid for _, msgid, _ in by_source[source]):
            assert "%" not in source.split()
