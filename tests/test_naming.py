"""The one file-naming rule (core/naming.py) shared by the batch and the app's export proposal.

References: the POSIX portable filename character set (POSIX.1-2017, section
3.282: A-Z a-z 0-9 . _ -; from memory), to which the rule adds only '+' and
non-ASCII letters and digits; the usual 255-byte limit of a file name (ext4,
NTFS, APFS: common practice).
"""

import string

import pytest

from core.batch import output_folder_names
from core.naming import events_file_name, file_names, file_part

PORTABLE = set(string.ascii_letters + string.digits + "._-")   # POSIX.1-2017 3.282 (from memory)
HOSTILE = ["rarest 0.5 %", "CD4+ CD8-", "a/b", "a:b", "a-b", "a_b", "Q1: CD3+ (gate #2)", "x>5 & y<3",
           "tab\there", "trailing.", " lead", "..", "", "C:\\temp\\x", "naïve µ", "a\x00b"]


def test_no_name_holds_a_space_or_hash_and_ascii_stays_portable():
    # the old rule wrote 'x #<hash>' folders and '<stem> rare.fcs' files
    parts = file_names(HOSTILE, reserved=["summary.csv"], fallback="region")
    folders = output_folder_names(["x.fcs", "x.FCS", "a:b.fcs", "plain name.fcs", "summary.csv.fcs"])
    for name in list(parts.values()) + list(folders.values()):
        assert name and " " not in name and "#" not in name and "/" not in name and "\\" not in name, name
        assert not name.startswith("."), name
        if name.isascii():
            assert set(name) <= PORTABLE | {"+"}, name
    assert events_file_name(folders["plain name.fcs"], "rare") == "plain_name_rare.fcs"
    assert events_file_name("s", "region", parts["CD4+ CD8-"]) == "s_region_CD4+_CD8-.fcs"
    assert events_file_name("s", "rare_population", 3, "csv") == "s_rare_population_3.csv"


def test_percent_becomes_pct_and_letters_of_any_alphabet_are_kept():
    # the old batch rule gave 'rarest 0.5 _' (the '%' silently lost)
    assert file_part("rarest 0.5 %") == "rarest_0.5_pct"
    assert file_part("CD4+ CD8-") == "CD4+_CD8-"
    assert file_part("naïve µ") == "naïve_µ"


@pytest.mark.parametrize("a, b", [("CD4+", "CD4"), ("a/b", "ab"), ("a/b", "a-b"), ("a:b", "a/b"),
                                  ("CD8 5%", "CD8 5"), ("trailing.", "trailing")])
def test_names_differing_by_a_replaced_or_dropped_character_never_meet(a, b):
    # the old export proposal made 'CD4+' and 'CD4' both 'CD4', 'a/b' and 'a-b' both 'a-b'
    from desktop.dialogs import file_stem

    together = file_names([a, b])
    assert together[a].casefold() != together[b].casefold()
    # each alone: a name where a character was replaced or dropped carries its hash, so it
    # cannot equal the plain name of another (the app proposes one name at a time)
    assert file_part(a).casefold() != file_part(b).casefold()
    assert file_stem(a) != file_stem(b)
    assert file_stem(a) == file_part(a, "events")   # the app's proposal is the core rule


def test_parts_are_stable_short_enough_and_none_when_they_cannot_differ(monkeypatch):
    long = "CD45 " * 60
    part = file_part(long)
    assert file_part(long) == part == file_names([long, "other"])[long]   # same original, same part
    name = events_file_name(part, "region", part)
    assert len(name.encode("utf-8")) <= 255
    assert file_names(["summary.csv"], reserved=["SUMMARY.csv"])["summary.csv"] != "summary.csv"
    both = file_names(["A b", "a_B"])   # equal ignoring case once the space is '_': both get a hash
    assert both["A b"].casefold() != both["a_B"].casefold() and both["A b"].startswith("A_b_")
    import core.naming

    monkeypatch.setattr(core.naming, "short_hash", lambda text: "00000000")
    assert file_names(["a/b", "a:b", "ok"]) == {"a/b": None, "a:b": None, "ok": "ok"}
