"""Feature cache (retpred.cache): a cached run gives the same bytes as an uncached one, hits
really skip the RDKit work, and a stale, corrupt or unusable cache is never trusted.

The reference for every check is the uncached streamed path, which tests/test_batch.py ties
to the in-memory path (workflow.predict_table + report.write_csv). Structures: the open RP
data (RepoRT-derived, CC BY-SA 4.0), plus broken rows that the SMILES specification
(OpenSMILES: ring bonds must close) rules out. SQLite file-format facts used: a database
file starts with the 16-byte header "SQLite format 3\\0" (sqlite.org/fileformat.html; from
memory); a file without it is "not a database".
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import retpred.cache as rc
import retpred.model
from retpred.batch import stream_predict
from retpred.cache import FeatureCache, cache_version, combine_solutes, featurise_known
from retpred.model import featurise

pytestmark = pytest.mark.opendata


@pytest.fixture(scope="module")
def open_smiles(open_data):
    s = pd.read_csv(open_data / "compounds.tsv.gz", sep="\t", usecols=["smiles"])["smiles"]
    return s.dropna().drop_duplicates().sample(150, random_state=5).tolist()


@pytest.fixture(scope="module")
def library(tmp_path_factory, open_smiles) -> Path:
    """Open structures, some twice, a salt form, an unclosed ring, a missing SMILES."""
    rows = ["name,smiles"]
    rows += [f"c{i},{s}" for i, s in enumerate(open_smiles[:100])]
    rows += [f"again{i},{s}" for i, s in enumerate(open_smiles[:10])]
    rows += ["salt,C[NH+](C)CCc1ccccc1.[Cl-]", "broken,C1CC", "empty,"]
    p = tmp_path_factory.mktemp("lib") / "library.csv"
    p.write_text("\n".join(rows) + "\n", encoding="utf-8")
    return p


N_TEXT = 100 + 10 + 2  # rows with a SMILES text (the empty one is never looked up)
N_UNIQUE = 100 + 2


@pytest.fixture(scope="module")
def uncached(prep, library, tmp_path_factory) -> bytes:
    out = tmp_path_factory.mktemp("plain") / "plain.csv"
    stream_predict(prep, library, out, chunk_size=37, progress=False, cache_dir=False)
    return out.read_bytes()


def _run(prep, library, out, cache_dir, **kw):
    s = stream_predict(prep, library, out, chunk_size=37, progress=False, force=True,
                       cache_dir=cache_dir, **kw)
    return s, out.read_bytes()


def test_cold_and_warm_runs_are_byte_identical(prep, library, uncached, tmp_path, monkeypatch):
    cache = tmp_path / "cache"
    # the compound-memory keys parse stereo-marked SMILES again: cached with the features
    stereo_parsed = []
    real_forms, real_forms_of = retpred.model.stereo_forms, retpred.model.stereo_forms_of

    def counting_forms(smiles):
        if "@" in smiles or "/" in smiles or "\\" in smiles:
            stereo_parsed.append(smiles)
        return real_forms(smiles)

    def counting_forms_of(mol, smiles):
        if "@" in smiles or "/" in smiles or "\\" in smiles:
            stereo_parsed.append(smiles)
        return real_forms_of(mol, smiles)

    monkeypatch.setattr(retpred.model, "stereo_forms", counting_forms)
    monkeypatch.setattr(retpred.model, "stereo_forms_of", counting_forms_of)
    cold, cold_bytes = _run(prep, library, tmp_path / "cold.csv", cache)
    assert len(stereo_parsed) > 10  # the library has stereo-marked structures
    stereo_parsed.clear()
    assert cold_bytes == uncached
    # a chunk is looked up after the chunks before it are stored: the ten repeats (all in
    # a later chunk than their first occurrence) already hit in the cold run
    assert (cold.cache_hits, cold.cache_misses) == (10, N_TEXT - 10)
    assert cold.cache_note == ""
    # warm: every structure with a text is found; RDKit work only for the empty row
    seen = []
    real = rc.featurise

    def counting(smiles=None, mols=None):
        seen.extend(smiles or [])
        return real(smiles=smiles, mols=mols)

    monkeypatch.setattr(rc, "featurise", counting)
    warm, warm_bytes = _run(prep, library, tmp_path / "warm.csv", cache)
    assert warm_bytes == uncached
    assert (warm.cache_hits, warm.cache_misses) == (N_TEXT, 0)
    assert seen == [""]
    assert stereo_parsed == []
    with sqlite3.connect(warm.cache_path) as db:
        assert db.execute("SELECT COUNT(*) FROM features").fetchone()[0] == N_UNIQUE


def test_parallel_run_with_cache_is_identical(prep, library, tmp_path):
    # compared with an uncached serial run cut into the same pieces (see test_batch)
    _, plain = _run(prep, library, tmp_path / "plain.csv", False, piece_rows=9)
    cache = tmp_path / "cache"
    _, cold = _run(prep, library, tmp_path / "cold.csv", cache, jobs=2, piece_rows=9)
    s, warm = _run(prep, library, tmp_path / "warm.csv", cache, jobs=2, piece_rows=9)
    assert cold == plain and warm == plain
    assert s.cache_hits == N_TEXT


def test_entries_round_trip_bit_for_bit(open_smiles):
    # several sites, permanent charges and unusable rows: decode(encode(x)) is x exactly,
    # and rows put together from parts equal one whole batch (site padding included)
    texts = [*open_smiles[:40], "C[N+](C)(C)CC(=O)[O-]", "NCCCCN", "C1CC", "[Na+].[Cl-]"]
    whole = featurise(texts)
    rows = rc.encode_records(texts, whole)
    back = rc.decode_records(rows)
    np.testing.assert_array_equal(back.descriptors, whole.descriptors)
    assert back.descriptors.tobytes() == whole.descriptors.tobytes()  # NaN payloads too
    np.testing.assert_array_equal(back.fingerprints, whole.fingerprints)
    np.testing.assert_array_equal(back.sites.kind, whole.sites.kind)
    np.testing.assert_array_equal(back.sites.pka, whole.sites.pka)
    assert back.sites.group == whole.sites.group
    assert back.batch.smiles == whole.batch.smiles
    assert back.batch.status == whole.batch.status
    assert back.batch.changes == whole.batch.changes
    np.testing.assert_array_equal(back.usable, whole.usable)
    assert back.known_keys is not None
    assert back.memory_keys == whole.memory_keys
    assert back.skeleton_keys == whole.skeleton_keys
    known = rc.Known(idx=np.arange(0, len(texts), 3),
                     solutes=rc.decode_records(rows[::3]))
    mixed, records = featurise_known(texts, known, record=True)
    assert len(records) == len(texts) - known.idx.size
    np.testing.assert_array_equal(mixed.sites.pka, whole.sites.pka)
    np.testing.assert_array_equal(mixed.sites.kind, whole.sites.kind)
    np.testing.assert_array_equal(mixed.descriptors, whole.descriptors)
    assert mixed.memory_keys == whole.memory_keys
    assert mixed.skeleton_keys == whole.skeleton_keys
    parts = combine_solutes(2, [(np.array([1]), featurise(["CCO"])),
                                (np.array([0]), featurise(["NCCCCN"]))])
    assert parts.batch.smiles == ["NCCCCN", "CCO"]
    assert parts.sites.pka.shape == (2, 2)  # two amine sites pad the ethanol row


def test_a_changed_group_table_selects_a_new_cache(monkeypatch, tmp_path):
    before = cache_version()
    table = rc._group_table_bytes()
    # the same table with one pKa changed (aliphatic carboxylic acid 4.8 -> 4.9)
    row = b"[OX2H1,OX1-:1][CX3](=[O:2])[#6]\t4.8\t"
    assert row in table
    monkeypatch.setattr(rc, "_group_table_bytes", lambda: table.replace(row, row[:-4] + b"4.9\t"))
    cache_version.cache_clear()
    try:
        after = cache_version()
        assert after != before
        assert FeatureCache(tmp_path, after).path != FeatureCache(tmp_path, before).path
    finally:
        monkeypatch.undo()
        cache_version.cache_clear()
    assert cache_version() == before


def test_other_version_entries_are_never_used(prep, library, open_smiles, uncached, tmp_path):
    cache = tmp_path / "cache"
    # a file of another version holding wrong features for every key: ignored
    other = FeatureCache(cache, "some other version")
    wrong = rc.encode_records(["x"], featurise(["CCCCCCCCCCCCCCCCCC"]))[0]
    other.store([(s, *wrong[1:]) for s in open_smiles])
    other.close()
    s, got = _run(prep, library, tmp_path / "a.csv", cache)
    assert got == uncached
    assert s.cache_path != other.path
    # the current file with a different version stored inside (e.g. a hash collision or
    # a hand-copied file): rebuilt, the wrong entries dropped
    stale = FeatureCache(tmp_path / "c2", cache_version())
    stale.store([(t, *wrong[1:]) for t in open_smiles])
    stale._db.execute("UPDATE meta SET value = 'retpred 0.0.0' WHERE name = 'version'")
    stale.close()
    s, got = _run(prep, library, tmp_path / "b.csv", tmp_path / "c2")
    assert got == uncached
    assert "rebuilt" in s.cache_note
    assert s.cache_hits < N_TEXT - 10  # only repeats of this run, no stale entries


def test_corrupt_file_is_rebuilt(prep, library, uncached, tmp_path):
    cache = tmp_path / "cache"
    s, _ = _run(prep, library, tmp_path / "first.csv", cache)
    path = s.cache_path
    # overwrite the 16-byte "SQLite format 3\0" header: no longer a database
    data = bytearray(path.read_bytes())
    assert bytes(data[:16]) == b"SQLite format 3\x00"
    data[:16] = b"garbage garbage!"
    path.write_bytes(bytes(data))
    for extra in ("-wal", "-shm"):
        Path(str(path) + extra).unlink(missing_ok=True)
    s, got = _run(prep, library, tmp_path / "second.csv", cache)
    assert got == uncached
    assert "rebuilt" in s.cache_note
    s, got = _run(prep, library, tmp_path / "third.csv", cache)
    assert got == uncached and s.cache_hits == N_TEXT and s.cache_note == ""


def test_damaged_entries_are_recomputed(prep, library, open_smiles, uncached, tmp_path):
    cache = tmp_path / "cache"
    s, _ = _run(prep, library, tmp_path / "first.csv", cache)
    db = sqlite3.connect(s.cache_path)
    # one entry with a flipped descriptor byte (length kept: only the checksum sees it),
    # one with a truncated fingerprint, one with a wrong type
    desc = bytearray(db.execute("SELECT descriptors FROM features WHERE key = ?",
                                (open_smiles[0],)).fetchone()[0])
    desc[3] ^= 0xFF
    db.execute("UPDATE features SET descriptors = ? WHERE key = ?", (bytes(desc), open_smiles[0]))
    db.execute("UPDATE features SET fingerprint = x'00' WHERE key = ?", (open_smiles[1],))
    db.execute("UPDATE features SET usable = 'yes' WHERE key = ?", (open_smiles[2],))
    db.commit()
    db.close()
    s, got = _run(prep, library, tmp_path / "second.csv", cache)
    assert got == uncached
    # the three damaged keys miss; their repeats later in the file hit the repaired entries
    assert s.cache_misses == 3
    s, got = _run(prep, library, tmp_path / "third.csv", cache)
    assert got == uncached and s.cache_hits == N_TEXT  # repaired


def test_unusable_cache_directory_is_switched_off(prep, library, uncached, tmp_path):
    not_a_dir = tmp_path / "file"
    not_a_dir.write_text("x", encoding="utf-8")
    s, got = _run(prep, library, tmp_path / "out.csv", not_a_dir / "cache")
    assert got == uncached
    assert "cache not used" in s.cache_note and s.cache_hits == 0


def test_environment_variable_names_the_cache(prep, library, uncached, tmp_path, monkeypatch):
    monkeypatch.setenv(rc.CACHE_ENV, str(tmp_path / "envcache"))
    s, got = _run(prep, library, tmp_path / "a.csv", None)
    assert got == uncached
    assert s.cache_path is not None and s.cache_path.parent == tmp_path / "envcache"
    s, _ = _run(prep, library, tmp_path / "b.csv", False)  # False: no cache, env ignored
    assert s.cache_path is None
    monkeypatch.setenv(rc.CACHE_ENV, "")
    assert rc.resolve_cache_dir(None) is None


def test_housekeeping_lists_and_prunes_only_cache_files(tmp_path):
    """list_cache_files reads every features-*.sqlite read-only (version, entries);
    prune_cache deletes those this version cannot use (another version, an unreadable file
    without the SQLite header), keeps the current one and its entries, and never touches
    other files. ``max_mb`` 0 then empties the directory of cache files too."""
    cache = tmp_path / "cache"
    records = rc.encode_records(["CCO", "c1ccccc1O"], featurise(["CCO", "c1ccccc1O"]))
    cur = FeatureCache(cache)
    cur.store(records)
    cur.close()
    old = FeatureCache(cache, "retpred 0.0.1; an older version")
    old.store(records[:1])
    old.close()
    (cache / "features-0123456789abcdef.sqlite").write_bytes(b"not a database at all" * 50)
    (cache / "notes.txt").write_text("kept", encoding="utf-8")
    files = {f.path.name: f for f in rc.list_cache_files(cache)}
    assert len(files) == 3
    assert files[cur.path.name].current and files[cur.path.name].entries == 2
    assert not files[old.path.name].current and files[old.path.name].entries == 1
    bad = files["features-0123456789abcdef.sqlite"]
    assert not bad.current and bad.entries == -1 and bad.version == ""
    gone = {f.path.name for f in rc.prune_cache(cache)}
    assert gone == {old.path.name, "features-0123456789abcdef.sqlite"}
    left = sorted(p.name for p in cache.iterdir() if not p.name.endswith(("-wal", "-shm")))
    assert left == sorted([cur.path.name, "notes.txt"])
    again = FeatureCache(cache)
    known = again.lookup(["CCO", "c1ccccc1O", "CCCC"])
    again.close()
    assert known is not None and known.idx.tolist() == [0, 1]
    assert {f.path.name for f in rc.prune_cache(cache, max_mb=0.0)} == {cur.path.name}
    assert [p.name for p in cache.iterdir()] == ["notes.txt"]


def test_cache_command_prunes_and_rejects_bad_options(tmp_path):
    from typer.testing import CliRunner

    from retpred.cli import app

    cache = tmp_path / "cache"
    other = FeatureCache(cache, "another version")
    other.store(rc.encode_records(["CCO"], featurise(["CCO"])))
    other.close()
    runner = CliRunner()
    r = runner.invoke(app, ["cache", str(cache)])
    assert r.exit_code == 0 and other.path.exists()  # listing deletes nothing
    r = runner.invoke(app, ["cache", str(cache), "--prune"])
    assert r.exit_code == 0 and "deleted 1 file(s)" in r.output
    assert not other.path.exists()
    r = runner.invoke(app, ["cache", str(cache), "--max-mb", "5"])
    assert r.exit_code == 2 and "--max-mb" in r.output and "Traceback" not in r.output
    r = runner.invoke(app, ["cache", str(tmp_path / "missing")])
    assert r.exit_code == 2 and "not a directory" in r.output


def test_sdf_input_is_cached_and_gives_the_same_bytes(prep, open_smiles, tmp_path,
                                                      monkeypatch):
    """SDF molecules are cached under the SMILES written for them: cold and warm runs give
    the uncached run's bytes, the warm run featurises nothing, and an SDF entry is never
    served to SMILES text input (its own namespace)."""
    from rdkit import Chem

    path = tmp_path / "library.sdf"
    writer = Chem.SDWriter(str(path))
    for i, smi in enumerate(open_smiles[:30] + open_smiles[:5]):  # five repeats
        mol = Chem.MolFromSmiles(smi)
        mol.SetProp("_Name", f"m{i}")
        writer.write(mol)
    writer.close()
    with path.open("a", encoding="utf-8") as fh:
        fh.write("junk\n\n\nM  END\n$$$$\n")  # an unreadable record: reported, not cached
    plain = tmp_path / "plain.csv"
    stream_predict(prep, path, plain, chunk_size=8, progress=False, cache_dir=False)
    cache = tmp_path / "cache"
    cold, cold_bytes = _run(prep, path, tmp_path / "cold.csv", cache)
    assert cold_bytes == plain.read_bytes()
    assert cold.cache_misses + cold.cache_hits == 35
    calls = []
    real = rc.featurise

    def counting(smiles=None, mols=None):
        calls.append(len(mols or smiles or []))
        return real(smiles=smiles, mols=mols)

    monkeypatch.setattr(rc, "featurise", counting)
    warm, warm_bytes = _run(prep, path, tmp_path / "warm.csv", cache)
    assert warm_bytes == plain.read_bytes()
    assert (warm.cache_hits, warm.cache_misses) == (35, 0)
    assert sum(calls) == 1  # only the unreadable record's row
    with sqlite3.connect(warm.cache_path) as db:
        keys = [k for (k,) in db.execute("SELECT key FROM features")]
    assert len(keys) == 30 and all(k.startswith(rc.SDF_KEY_PREFIX) for k in keys)
    store = FeatureCache(cache)
    assert store.lookup([k[len(rc.SDF_KEY_PREFIX):] for k in keys]) is None
    store.close()
