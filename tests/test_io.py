"""Input readers and atomic output.

External references for the check values:
- UTF-8 byte-order mark EF BB BF (The Unicode Standard, section 23.8).
- ISO/IEC 8859-1 code chart: 'sharp s' = 0xDF, 'e acute' = 0xE9 (also Windows-1252).
- RFC 4180: CSV records end in CRLF; a field with the delimiter or a line break is quoted.
- Daylight SMILES file format: a SMILES, whitespace, then an optional name.
- CTfile formats (MDL): an SD file's records end with a line '$$$$'.
- RDKit (reference library) writes the SD files and gives the canonical SMILES we compare to;
  Python's csv module writes the round-trip files.
"""

from __future__ import annotations

import csv
import gzip
import io
import os
import tracemalloc

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from rdkit import Chem

from retpred.errors import InputError
from retpred.io import (
    AnalyteChunk,
    atomic_output,
    atomic_output_path,
    detect_encoding,
    iter_analytes,
    read_calibrants,
    read_training_data,
    write_csv_rows,
)

SETTINGS = settings(max_examples=120, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])


def write(tmp_path, name: str, data: bytes | str):
    path = tmp_path / name
    path.write_bytes(data.encode("utf-8") if isinstance(data, str) else data)
    return path


def read_all(path, chunk_size: int = 5000) -> AnalyteChunk:
    """All chunks joined into one (test helper)."""
    out = AnalyteChunk(mols=None)
    for chunk in iter_analytes(path, chunk_size=chunk_size):
        out.line += chunk.line
        out.name += chunk.name
        out.smiles += chunk.smiles
        out.error += chunk.error
        if chunk.mols is not None:
            out.mols = (out.mols or []) + chunk.mols
        for key, values in chunk.extra.items():
            out.extra.setdefault(key, []).extend(values)
    return out


def canonical(smiles: str) -> str:
    return Chem.MolToSmiles(Chem.MolFromSmiles(smiles))


# --------------------------------------------------------------------------------------------
# delimited text
# --------------------------------------------------------------------------------------------


def test_plain_csv_with_extra_columns(tmp_path):
    path = write(tmp_path, "a.csv", "id,SMILES,Name,logp\n7,CCO,ethanol,-0.3\n8,c1ccccc1,,2.1\n")
    rows = read_all(path)
    assert rows.line == [2, 3]
    assert rows.smiles == ["CCO", "c1ccccc1"]
    assert rows.name == ["ethanol", "row 2"]
    assert rows.extra == {"id": ["7", "8"], "logp": ["-0.3", "2.1"]}
    assert rows.error == [None, None] and rows.mols is None


def test_utf8_bom_does_not_reach_the_header(tmp_path):
    path = write(tmp_path, "bom.csv", b"\xef\xbb\xbfsmiles,name\nCCO,ethanol\n")
    rows = read_all(path)
    assert rows.smiles == ["CCO"] and rows.name == ["ethanol"] and rows.extra == {}


def test_latin1_names(tmp_path):
    # 'Stra\xdfe' and 'caf\xe9' in ISO/IEC 8859-1: sharp s = 0xDF, e acute = 0xE9.
    path = write(tmp_path, "l1.csv", b"name,smiles\nStra\xdfe,CCO\ncaf\xe9ine,CN1C=NC2=C1C(=O)N(C)"
                 b"C(=O)N2C\n")
    rows = read_all(path)
    assert rows.name == ["Stra\u00dfe", "caf\u00e9ine"]
    assert detect_encoding(path) in ("cp1252", "latin-1")


def test_utf8_names_are_not_mistaken_for_latin1(tmp_path):
    path = write(tmp_path, "u8.csv", "name,smiles\nStraße,CCO\ncafé,C\n")
    assert read_all(path).name == ["Straße", "café"]
    assert detect_encoding(path) == "utf-8"


def test_utf16_spreadsheet_export(tmp_path):
    path = write(tmp_path, "u16.txt", "name\tsmiles\r\nStraße\tCCO\r\n".encode("utf-16"))
    rows = read_all(path)
    assert rows.name == ["Straße"] and rows.smiles == ["CCO"]


def test_crlf_line_ends(tmp_path):
    # RFC 4180 line ends.
    path = write(tmp_path, "w.csv",
                 b"smiles,name,rt_min\r\nCCO,ethanol,1.2\r\n\r\nC,methane,0.9\r\n")
    rows = read_all(path)
    assert rows.line == [2, 4]
    assert rows.name == ["ethanol", "methane"]
    assert rows.extra == {"rt_min": ["1.2", "0.9"]}


def test_semicolon_csv_with_decimal_comma(tmp_path):
    path = write(tmp_path, "eu.csv", "Name;SMILES;rt_min\r\nA;CCO;1,5\r\nB;CCCO;12,25\r\n")
    rows = read_all(path)
    assert rows.smiles == ["CCO", "CCCO"]
    frame = read_calibrants(path)
    assert frame["rt_min"].tolist() == [1.5, 12.25]


def test_tab_separated(tmp_path):
    path = write(tmp_path, "t.tsv", "smiles\tname\nCCO\tethanol, absolute\n")
    assert read_all(path).name == ["ethanol, absolute"]


def test_single_column_file(tmp_path):
    assert read_all(write(tmp_path, "s.csv", "smiles\nCCO\nC\n")).smiles == ["CCO", "C"]


def test_quoted_field_with_delimiter_and_newline(tmp_path):
    # RFC 4180 quoting; line numbers count physical lines.
    path = write(tmp_path, "q.csv", 'name,smiles\n"a, b\nc",CCO\nd,C\n')
    rows = read_all(path)
    assert rows.name == ["a, b\nc", "d"] and rows.line == [2, 4]


def test_canonical_smiles_header(tmp_path):
    path = write(tmp_path, "c.csv", "Canonical_SMILES,name\nCCO,x\n")
    assert read_all(path).smiles == ["CCO"]


def test_duplicate_names_are_kept(tmp_path):
    path = write(tmp_path, "d.csv", "name,smiles\nx,CCO\nx,CCC\n")
    rows = read_all(path)
    assert rows.name == ["x", "x"] and rows.error == [None, None]


def test_missing_smiles_is_a_row_error(tmp_path):
    path = write(tmp_path, "m.csv", "name,smiles\nx,\ny,CC\nz\n")
    rows = read_all(path)
    assert rows.error == ["missing SMILES", None, "missing SMILES"]
    assert rows.line == [2, 3, 4]


def test_too_many_fields_is_a_row_error(tmp_path):
    rows = read_all(write(tmp_path, "f.csv", "name,smiles\nx,CC,extra\ny,C,\n"))
    assert rows.error[0] is not None and "fields" in rows.error[0]
    assert rows.error[1] is None  # a trailing empty field is tolerated


def test_ten_thousand_character_line(tmp_path):
    long_name = "n" * 10_000
    long_smiles = "C" * 5_000
    path = write(tmp_path, "long.csv", f"name,smiles\n{long_name},{long_smiles}\nb,CO\n")
    rows = read_all(path)
    assert rows.name == [long_name, "b"] and rows.smiles == [long_smiles, "CO"]
    assert rows.error == [None, None]


def test_overlong_line_is_a_row_error_and_reading_goes_on(tmp_path):
    path = write(tmp_path, "huge.csv", "name,smiles\nx," + "C" * 300_000 + "\ny,CO\n")
    rows = read_all(path)
    assert rows.line == [2, 3]
    assert rows.error[0] is not None and "longer" in rows.error[0]
    assert rows.smiles[1] == "CO" and rows.error[1] is None


def test_chunks_are_bounded_and_in_order(tmp_path):
    body = "".join(f"m{i},{'C' * (i % 5 + 1)}\n" for i in range(12))
    chunks = list(iter_analytes(write(tmp_path, "c.csv", "name,smiles\n" + body), chunk_size=5))
    assert [len(c) for c in chunks] == [5, 5, 2]
    assert sum((c.line for c in chunks), []) == list(range(2, 14))


def test_streaming_memory_is_bounded(tmp_path):
    n = 20_000
    path = tmp_path / "big.csv"
    with path.open("w") as fh:
        fh.write("name,smiles,note\n")
        for i in range(n):
            fh.write(f"compound-{i},CC(=O)Oc1ccccc1C(=O)O,some note text {i}\n")
    tracemalloc.start()
    try:
        count = 0
        for chunk in iter_analytes(path, chunk_size=500):
            count += len(chunk)
        _, streamed_peak = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        kept = list(iter_analytes(path, chunk_size=500))
        _, kept_peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert count == n and sum(len(c) for c in kept) == n
    assert streamed_peak < kept_peak / 3


def test_gzip_input(tmp_path):
    path = tmp_path / "a.tsv.gz"
    path.write_bytes(gzip.compress(b"smiles\trt_min\nCCO\t1.5\n"))
    assert read_all(path).smiles == ["CCO"]
    bad = write(tmp_path, "bad.csv.gz", b"not gzip at all")
    with pytest.raises(InputError, match="gzip"):
        read_all(bad)


# --------------------------------------------------------------------------------------------
# file-level errors
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("content,needle", [
    (b"", "empty"),
    (b" \r\n\n\t\n", "empty"),
    (b"smiles,name\n", "no analytes"),
    (b"smiles,name\r\n\r\n,\r\n", "no analytes"),
    (b"\xef\xbb\xbf", "empty"),
])
def test_empty_or_header_only(tmp_path, content, needle):
    path = write(tmp_path, "e.csv", content)
    with pytest.raises(InputError, match=needle) as info:
        read_all(path)
    assert info.value.path == str(path)


def test_no_smiles_column_lists_columns(tmp_path):
    path = write(tmp_path, "n.csv", "name,structure\nx,CCO\n")
    with pytest.raises(InputError) as info:
        read_all(path)
    text = str(info.value)
    assert "'name'" in text and "'structure'" in text and info.value.line == 1


def test_duplicate_headers(tmp_path):
    path = write(tmp_path, "dup.csv", "smiles,name,name\nCCO,a,b\n")
    with pytest.raises(InputError, match="duplicate") as info:
        read_all(path)
    assert info.value.field == "name" and info.value.line == 1


def test_two_smiles_columns_are_ambiguous(tmp_path):
    with pytest.raises(InputError, match="SMILES"):
        read_all(write(tmp_path, "two.csv", "SMILES,smiles\nC,CC\n"))


def test_nul_bytes_mean_binary(tmp_path):
    path = write(tmp_path, "b.csv", b"smiles\nCCO\nC\x00C\n")
    with pytest.raises(InputError, match="binary") as info:
        iter_analytes(path)
    assert info.value.line == 3


def test_missing_file_and_unknown_type(tmp_path):
    with pytest.raises(InputError, match="not found"):
        iter_analytes(tmp_path / "nope.csv")
    with pytest.raises(InputError, match="unknown file type"):
        iter_analytes(write(tmp_path, "x.xlsx", b"PK"))
    (tmp_path / "d.csv").mkdir()
    with pytest.raises(InputError, match="directory"):
        iter_analytes(tmp_path / "d.csv")


# --------------------------------------------------------------------------------------------
# SMILES files
# --------------------------------------------------------------------------------------------


def test_smi_file_with_header_names_and_comments(tmp_path):
    path = write(tmp_path, "a.smi",
                 "SMILES Name\nCCO ethanol absolute\r\n\n# note\nC\nCC\tethane\n")
    rows = read_all(path)
    assert rows.smiles == ["CCO", "C", "CC"]
    assert rows.name == ["ethanol absolute", "row 2", "ethane"]
    assert rows.line == [2, 5, 6]


def test_smi_header_only(tmp_path):
    with pytest.raises(InputError, match="no analytes"):
        read_all(write(tmp_path, "h.smi", "smiles\n\n"))


# --------------------------------------------------------------------------------------------
# SD files
# --------------------------------------------------------------------------------------------


def _sdf_text(entries) -> str:
    sio = io.StringIO()
    writer = Chem.SDWriter(sio)
    for smiles, name, props in entries:
        mol = Chem.MolFromSmiles(smiles)
        if name is not None:
            mol.SetProp("_Name", name)
        for k, v in props.items():
            mol.SetProp(k, v)
        writer.write(mol)
    writer.close()
    return sio.getvalue()


def test_sdf_with_a_broken_record_between_two_good_ones(tmp_path):
    good1 = _sdf_text([("CCO", "ethanol", {"rt_min": "1.5", "id": "A1"})])
    broken = _sdf_text([("c1ccccc1", "benzene", {"rt_min": "3"})])
    # Corrupt the counts line (4th line of a molfile, CTfile format) so the record is unreadable.
    lines = broken.splitlines(keepends=True)
    lines[3] = "garbage counts line\n"
    broken = "".join(lines)
    good2 = _sdf_text([("CC(=O)O", "", {"name": "acetic acid", "rt_min": "2.5", "id": "A3"})])
    text = good1 + broken + good2
    path = write(tmp_path, "set.sdf", text)
    rows = read_all(path)
    starts = [1] + [i + 2 for i, ln in enumerate(text.splitlines()) if ln == "$$$$"][:-1]
    assert rows.line == starts
    assert rows.smiles[0] == canonical("CCO") and rows.smiles[2] == canonical("CC(=O)O")
    assert rows.error[0] is None and rows.error[2] is None
    assert rows.error[1] is not None and rows.smiles[1] == ""
    assert rows.name == ["ethanol", "benzene", "acetic acid"]
    assert rows.mols[1] is None
    assert Chem.MolToSmiles(rows.mols[0]) == canonical("CCO")
    assert rows.extra["rt_min"] == ["1.5", "", "2.5"] and rows.extra["id"] == ["A1", "", "A3"]
    frame = read_training_data(write(tmp_path, "ok.sdf", good1 + good2))
    assert frame["rt_min"].tolist() == [1.5, 2.5]


def test_sdf_first_record_broken(tmp_path):
    text = "junk\n\n\nM  END\n$$$$\n" + _sdf_text([("CCN", "ethylamine", {"p": "1"})])
    rows = read_all(write(tmp_path, "b.sdf", text), chunk_size=1)
    assert rows.error[0] is not None and rows.smiles[1] == canonical("CCN")
    assert rows.line == [1, 6]


@pytest.mark.parametrize("content", [b"", b"\n\n"])
def test_empty_sdf(tmp_path, content):
    with pytest.raises(InputError):
        read_all(write(tmp_path, "e.sdf", content))


# --------------------------------------------------------------------------------------------
# calibrants and training data
# --------------------------------------------------------------------------------------------


def test_read_calibrants(tmp_path):
    path = write(tmp_path, "cal.csv", "name,smiles,RT_min,comment\nuracil,O=C1C=CNC(=O)N1,0.61,t0\n"
                 "toluene,Cc1ccccc1,5.2,\n")
    frame = read_calibrants(path)
    assert list(frame.columns) == ["line", "name", "smiles", "rt_min"]
    assert frame["line"].tolist() == [2, 3]
    assert frame["name"].tolist() == ["uracil", "toluene"]
    assert frame["rt_min"].tolist() == [0.61, 5.2]


@pytest.mark.parametrize("value", ["0", "-1.2", "nan", "inf", "abc", "", "1.2.3"])
def test_bad_retention_time(tmp_path, value):
    path = write(tmp_path, "cal.csv", f"smiles,rt_min\nCCO,1.0\nCC,{value}\n")
    with pytest.raises(InputError) as info:
        read_calibrants(path)
    err = info.value
    assert (err.path, err.line, err.field) == (str(path), 3, "rt_min")


def test_calibrant_row_without_smiles(tmp_path):
    with pytest.raises(InputError) as info:
        read_calibrants(write(tmp_path, "c.csv", "smiles,rt_min\n,1.0\n"))
    assert (info.value.line, info.value.field) == (2, "smiles")


def test_calibrants_need_rt_column_and_rows(tmp_path):
    with pytest.raises(InputError, match="rt_min") as info:
        read_calibrants(write(tmp_path, "c.csv", "smiles,time\nCCO,1\n"))
    assert "'time'" in str(info.value)
    with pytest.raises(InputError, match="minutes"):
        read_calibrants(write(tmp_path, "s.csv", "smiles,rt_s\nCCO,60\n"))
    with pytest.raises(InputError, match="no analytes"):
        read_calibrants(write(tmp_path, "h.csv", "smiles,rt_min\n"))


def test_training_data_keeps_group_columns(tmp_path):
    path = write(tmp_path, "train.tsv", "dataset\tsmiles\trt_min\n0001\tCCO\t1.1\n0002\tCC\t2\n")
    frame = read_training_data(path)
    assert frame["dataset"].tolist() == ["0001", "0002"]
    assert frame["rt_min"].tolist() == [1.1, 2.0]
    assert frame["name"].tolist() == ["row 1", "row 2"]


# --------------------------------------------------------------------------------------------
# atomic output
# --------------------------------------------------------------------------------------------


def test_atomic_output_writes_and_refuses_existing(tmp_path):
    out = tmp_path / "out.csv"
    with atomic_output(out) as fh:
        csv.writer(fh).writerow(["a", "b"])
    assert out.read_bytes() == b"a,b\r\n"  # csv module default line end (RFC 4180)
    with pytest.raises(InputError, match="use --force") as info:
        with atomic_output(out) as fh:
            fh.write("new")
    assert info.value.path == str(out)
    assert out.read_bytes() == b"a,b\r\n"
    with atomic_output(out, force=True) as fh:
        fh.write("new")
    assert out.read_text() == "new"
    assert sorted(os.listdir(tmp_path)) == ["out.csv"]


def test_atomic_output_mode_matches_a_plain_file(tmp_path):
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    with atomic_output(tmp_path / "atomic.txt") as fh:
        fh.write("x")
    assert (tmp_path / "atomic.txt").stat().st_mode == plain.stat().st_mode


def test_output_equal_to_input_is_refused(tmp_path):
    src = write(tmp_path, "in.csv", "smiles\nCCO\n")
    (tmp_path / "sub").mkdir()
    os.symlink(src, tmp_path / "link.csv")
    os.link(src, tmp_path / "hard.csv")
    for target in (src, tmp_path / "sub" / ".." / "in.csv", tmp_path / "link.csv",
                   tmp_path / "hard.csv"):
        with pytest.raises(InputError, match="input"):
            with atomic_output(target, force=True, inputs=[src]) as fh:
                fh.write("oops")
    assert src.read_text() == "smiles\nCCO\n"


@pytest.mark.parametrize("exc", [RuntimeError, KeyboardInterrupt])
def test_exception_leaves_no_file(tmp_path, exc):
    out = tmp_path / "result.csv"
    with pytest.raises(exc):
        with atomic_output(out) as fh:
            fh.write("half a row")
            raise exc()
    assert os.listdir(tmp_path) == []


def test_exception_keeps_the_old_file(tmp_path):
    out = write(tmp_path, "result.csv", "old")
    with pytest.raises(ValueError):
        with atomic_output(out, force=True) as fh:
            fh.write("new")
            raise ValueError
    assert out.read_text() == "old" and os.listdir(tmp_path) == ["result.csv"]


def test_atomic_output_path_for_binary_writers(tmp_path):
    out = tmp_path / "plot.png"
    with atomic_output_path(out) as tmp:
        assert tmp.parent == tmp_path and tmp.suffix == ".png" and tmp != out
        tmp.write_bytes(b"\x89PNG")
        assert not out.exists()
    assert out.read_bytes() == b"\x89PNG" and os.listdir(tmp_path) == ["plot.png"]
    with pytest.raises(KeyboardInterrupt):
        with atomic_output_path(tmp_path / "m.bin") as tmp:
            tmp.write_bytes(b"x")
            raise KeyboardInterrupt
    assert os.listdir(tmp_path) == ["plot.png"]


def test_output_directory_must_exist(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        with atomic_output(tmp_path / "no" / "out.csv"):
            pass


# --------------------------------------------------------------------------------------------
# property tests
# --------------------------------------------------------------------------------------------


@SETTINGS
@given(blob=st.binary(max_size=600), suffix=st.sampled_from([".csv", ".tsv", ".smi", ".sdf"]))
def test_arbitrary_bytes_only_raise_input_error(tmp_path, blob, suffix):
    path = write(tmp_path, "fuzz" + suffix, blob)
    try:
        for chunk in iter_analytes(path, chunk_size=7):
            n = len(chunk)
            assert len(chunk.name) == len(chunk.smiles) == len(chunk.error) == n
            assert all(len(v) == n for v in chunk.extra.values())
    except InputError as err:
        assert str(path) in str(err) and "\n" not in str(err)


@SETTINGS
@given(text=st.text(max_size=400), suffix=st.sampled_from([".csv", ".txt", ".smi"]))
def test_arbitrary_text_only_raises_input_error(tmp_path, text, suffix):
    path = write(tmp_path, "fuzz" + suffix, text.encode("utf-8", errors="replace"))
    try:
        for _ in iter_analytes(path):
            pass
        read_calibrants(path)
    except InputError:
        pass


name_text = st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"),
                    max_size=20)
smiles_text = st.sampled_from(["C", "CCO", "c1ccccc1", "CC(=O)O", "N#N", "[Na+].[Cl-]"])


@SETTINGS
@given(rows=st.lists(st.tuples(name_text, smiles_text), min_size=1, max_size=15),
       delimiter=st.sampled_from([",", ";", "\t"]), bom=st.booleans(),
       line_end=st.sampled_from(["\n", "\r\n"]))
def test_round_trip_against_csv_writer(tmp_path, rows, delimiter, bom, line_end):
    if line_end == "\n":
        # The csv writer leaves a bare CR unquoted unless it is part of the line terminator,
        # and csv.reader itself then splits the record there: not round-trippable.
        rows = [(n.replace("\r", ""), s) for n, s in rows]
    sio = io.StringIO()
    writer = csv.writer(sio, delimiter=delimiter, lineterminator=line_end)
    writer.writerow(["name", "smiles"])
    writer.writerows(rows)
    path = write(tmp_path, "rt.csv", ("\ufeff" if bom else "") + sio.getvalue())
    got = read_all(path)
    assert got.smiles == [s for _, s in rows]
    assert got.name == [n.strip() or f"row {i + 1}" for i, (n, _) in enumerate(rows)]


latin_names = st.text(st.sampled_from("abcXYZ -ßéüäöñç"), min_size=1, max_size=12)


@SETTINGS
@given(names=st.lists(latin_names, min_size=1, max_size=10))
def test_latin1_round_trip(tmp_path, names):
    # Bytes 0xDF-0xFC (ISO/IEC 8859-1) never form valid UTF-8 with ASCII or each other.
    body = "name;smiles\r\n" + "".join(f"{n};C\r\n" for n in names)
    got = read_all(write(tmp_path, "l1.csv", body.encode("latin-1")))
    assert got.name == [n.strip() or f"row {i + 1}" for i, n in enumerate(names)]


@SETTINGS
@given(st.lists(st.one_of(st.floats(min_value=-1e6, max_value=1e6), st.just(float("nan"))),
                min_size=1, max_size=20))
def test_csv_floats_round_to_four_places_and_never_read_minus_zero(values):
    """A neutral analyte's mean charge (for example -1e-12 from summing species fractions)
    must read 0.0000 in the record, not -0.0000; every other value is the nearest 4-decimal
    number (IEEE 754 signed zero; Python's %-formatting rounds the exact binary value)."""
    buf = io.StringIO()
    write_csv_rows(pd.DataFrame({"charge": values, "name": "x"}), buf)
    cells = [row[0] for row in csv.reader(io.StringIO(buf.getvalue()))][1:]
    for v, cell in zip(values, cells, strict=True):
        if np.isnan(v):
            assert cell == ""
            continue
        assert cell != "-0.0000"
        assert abs(float(cell) - v) <= 0.5e-4 + 1e-9 * abs(v)


def test_csv_writes_plain_zero_for_signed_zeros():
    buf = io.StringIO()
    write_csv_rows(pd.DataFrame({"charge": [-0.0, -4e-5, -5e-4, 0.0]}), buf)
    assert buf.getvalue().split() == ["charge", "0.0000", "0.0000", "-0.0005", "0.0000"]
