"""Hand-over rules: when is a file in the inbox finished?"""

from __future__ import annotations

import gzip
import io

from hypothesis import given
from hypothesis import strategies as st

from pipeline.station.handoff import decide, file_looks_complete, looks_complete


def test_rename_mode_claims_final_names_at_once_and_never_temporary_ones() -> None:
    listing = {"a.csv": (10, 1), "b.csv.tmp": (5, 1), "c.csv.part": (5, 1), ".d.csv": (5, 1)}
    d = decide("rename", listing, {}, 0.0)
    assert d.ready == ("a.csv",)
    assert d.ignored == (".d.csv", "b.csv.tmp", "c.csv.part")


def test_marker_mode_waits_for_the_marker() -> None:
    d = decide("marker", {"a.csv": (10, 1), "b.csv": (10, 1), "b.csv.done": (0, 1)}, {}, 0.0)
    assert d.ready == ("b.csv",)
    assert d.waiting == ("a.csv",)


def test_marker_without_data_becomes_an_orphan_after_its_grace_time() -> None:
    first = decide("marker", {"x.csv.done": (0, 1)}, {}, 0.0, orphan_marker_s=60.0)
    assert first.orphan_markers == ()
    later = decide("marker", {"x.csv.done": (0, 1)}, first.seen, 61.0, orphan_marker_s=60.0)
    assert later.orphan_markers == ("x.csv.done",)


def test_settle_mode_needs_size_and_mtime_unchanged_for_settle_time() -> None:
    d1 = decide("settle", {"a.csv": (100, 1)}, {}, 0.0, settle_s=30.0)
    assert d1.waiting == ("a.csv",)
    d2 = decide("settle", {"a.csv": (200, 2)}, d1.seen, 20.0, settle_s=30.0)  # grew: clock restarts
    assert d2.waiting == ("a.csv",)
    d3 = decide("settle", {"a.csv": (200, 2)}, d2.seen, 45.0, settle_s=30.0)
    assert d3.waiting == ("a.csv",)
    d4 = decide("settle", {"a.csv": (200, 2)}, d3.seen, 50.0, settle_s=30.0)
    assert d4.ready == ("a.csv",)


def test_text_is_complete_only_with_a_final_newline() -> None:
    assert looks_complete(b"a,b\n1,2\n")
    assert not looks_complete(b"a,b\n1,")


@given(st.binary(min_size=1, max_size=3000))
def test_gzip_is_complete_only_when_whole(payload: bytes) -> None:
    packed = gzip.compress(payload, mtime=0)
    assert looks_complete(packed)
    assert not looks_complete(packed[: len(packed) - 9])  # cut inside the trailer or data


@given(st.binary(min_size=0, max_size=3000), st.booleans())
def test_an_open_file_is_judged_like_its_bytes(payload: bytes, packed: bool) -> None:
    data = gzip.compress(payload, mtime=0) if packed else payload
    for cut in (data, data[: len(data) // 2]):
        assert file_looks_complete(io.BytesIO(cut)) == looks_complete(cut)


def test_an_office_lock_file_beside_an_open_workbook_is_never_claimed() -> None:
    decision = decide("rename", {"~$Record.xlsx": (165, 1), "Record.xlsx": (9000, 1)}, {}, 0.0)
    assert decision.ready == ("Record.xlsx",)
    assert decision.ignored == ("~$Record.xlsx",)


def _zip(comment: bytes = b"") -> bytes:
    import zipfile

    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        archive.writestr("xl/workbook.xml", "<workbook/>" * 200)
        archive.comment = comment
    return buffer.getvalue()


@given(cut=st.integers(min_value=1, max_value=400), comment=st.binary(max_size=300))
def test_a_workbook_is_complete_only_once_its_zip_end_record_is_written(cut: int, comment: bytes) -> None:
    # PKWARE APPNOTE.TXT 4.3.16: a zip archive ends with its end-of-central-directory record
    # (22 bytes and the archive comment)
    whole = _zip(comment)
    assert looks_complete(whole)
    assert not looks_complete(whole[: len(whole) - min(cut, len(whole) - 1)])


def test_a_compound_file_workbook_is_complete_in_whole_sectors() -> None:
    # MS-CFB (Compound File Binary Format) 2.2: the file is a header and whole 512-byte sectors
    head = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"
    assert looks_complete(head + bytes(512 * 4 - 8))
    assert not looks_complete(head + bytes(512 * 4 - 100))


def test_a_parquet_file_is_complete_once_its_footer_magic_is_written() -> None:
    # Apache Parquet file format: "PAR1", the column chunks, the footer, its length, "PAR1"
    whole = b"PAR1" + bytes(100) + (100).to_bytes(4, "little") + b"PAR1"
    assert looks_complete(whole)
    assert not looks_complete(whole[:-3])
