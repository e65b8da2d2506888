"""Streamed batch prediction (retpred.batch): the same bytes as the in-memory path, in every
execution mode, with bad rows reported and the output written atomically.

External references: the resolution definition Rs = 2 (t2 - t1) / (wb1 + wb2) with base
widths wb = 4 sigma (IUPAC Compendium of Chromatographic Terminology, "resolution"; from
memory) and Rs >= 1.5 as baseline separation (common practice); the SMILES specification
(OpenSMILES: ring bonds and branches must close, bracket atoms are elements) and carbon's
valence of 4 for the garbage rows of the soak; structures from the open RP data
(RepoRT-derived, CC BY-SA 4.0). The multi-process and cluster runs are compared with the
serial run and the serial run with the existing in-memory path (workflow.predict_table).
"""

from __future__ import annotations

import importlib.util
import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from retpred.batch import stream_predict, whole_list_pairs
from retpred.errors import InputError
from retpred.peaks import any_coelution_probability, neighbour_pairs
from retpred.report import write_csv
from retpred.workflow import predict_table

pytestmark = pytest.mark.opendata
REPO = Path(__file__).resolve().parent.parent


def _soak_module():
    spec = importlib.util.spec_from_file_location("retpred_soak", REPO / "scripts" / "soak.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


@pytest.fixture(scope="module")
def open_smiles(open_data):
    s = pd.read_csv(open_data / "compounds.tsv.gz", sep="\t", usecols=["smiles"])["smiles"]
    return s.dropna().drop_duplicates().sample(400, random_state=3).tolist()


N_OPEN = 120


@pytest.fixture(scope="module")
def mixed_file(tmp_path_factory, open_smiles) -> Path:
    """Open structures, repeated ones (tied times), broken rows, quoted names, extra columns."""
    rows = ["name,smiles,lot,note"]
    for i, s in enumerate(open_smiles[:N_OPEN]):
        rows.append(f'"cmpd {i}, lot A",{s},L{i},"said ""ok"""')
    rows.append("broken ring,C1CC,L-x,")
    rows.append(",,L-empty,")
    for i, s in enumerate(open_smiles[:15]):  # the same structures again: equal times
        rows.append(f"again {i},{s},R{i},")
    rows.append("too many,CCO,L,n,surplus")
    p = tmp_path_factory.mktemp("batch") / "mixed.csv"
    p.write_text("\n".join(rows) + "\n", encoding="utf-8")
    return p


@pytest.fixture(scope="module")
def reference(prep, mixed_file, tmp_path_factory) -> tuple[pd.DataFrame, bytes]:
    """The existing in-memory path: workflow.predict_table + report.write_csv."""
    table = predict_table(prep, mixed_file)
    out = tmp_path_factory.mktemp("reference") / "reference.csv"
    write_csv(table, out, force=True)
    return table, out.read_bytes()


def test_stream_is_byte_identical_to_in_memory_path(prep, mixed_file, reference, tmp_path):
    out = tmp_path / "streamed.csv"
    s = stream_predict(prep, mixed_file, out, chunk_size=23, progress=False)
    assert out.read_bytes() == reference[1]
    pd.testing.assert_frame_equal(s.table, reference[0])
    df = pd.read_csv(out, keep_default_na=False)
    assert df["line"].tolist() == sorted(df["line"])  # input order kept
    assert s.n_rows == len(df) == N_OPEN + 2 + 15 + 1
    # the broken rows: no time, a reason, and listed in the summary
    bad = df[df["rt_min"] == ""]
    assert set(s.failed_lines.tolist()) == set(bad["line"])
    # file lines of the three broken rows (header is line 1)
    assert {N_OPEN + 2, N_OPEN + 3, N_OPEN + 19} <= set(bad["line"])
    assert (bad["status"] != "ok").all()
    # the preview is the start of the elution order
    eo = s.preview["elution_order"].astype(int).tolist()
    assert eo == list(range(1, min(60, s.n_ok) + 1))


def test_rows_of_one_structure_keep_input_order_when_tied(prep, tmp_path):
    # Identical structures elute at identical times: the stable order is the input order.
    p = tmp_path / "tied.csv"
    p.write_text("name,smiles\nfirst,CCCCCCO\nsecond,CCCCCCO\nthird,CCCCCCO\n", encoding="utf-8")
    s = stream_predict(prep, p, None, chunk_size=1, progress=False)
    assert s.table["elution_order"].tolist() == [1, 2, 3]
    # Rs = 0 between identical peaks: each co-elutes with its neighbours (Rs < 1.5)
    assert s.table["coelutes_with"].tolist() == ["second", "first;third", "second"]


def test_pairs_on_a_worked_example():
    # Rs = 2 dt / (wb1 + wb2) (IUPAC definition, from memory):
    #   peaks at 2.0 and 2.1 min, base widths 0.1 min -> Rs = 2 * 0.1 / 0.2 = 1.0
    #   peaks at 2.1 and 3.0 min, widths 0.1 and 0.2 -> Rs = 2 * 0.9 / 0.3 = 6.0
    # With no time error (interval of zero width) the risk is the indicator Rs < 1.5.
    rt = np.array([3.0, np.nan, 2.1, 2.0])
    width = np.array([0.2, np.nan, 0.1, 0.1])
    p = whole_list_pairs(rt, width, rt, rt, rho=0.0)
    assert p.elution_order.tolist() == [3, 0, 2, 1]
    np.testing.assert_allclose(p.resolution_next[[3, 2]], [1.0, 6.0], rtol=1e-12)
    assert np.isnan(p.resolution_next[[0, 1]]).all()
    np.testing.assert_array_equal(p.coelution_risk[[3, 2, 0]], [1.0, 1.0, 0.0])
    assert p.left.tolist() == [-1, -1, 3, -1] and p.right.tolist() == [-1, -1, -1, 2]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_vectorised_pairs_equal_neighbour_pairs(seed):
    # The vectorised whole-list pass must give exactly what peaks.neighbour_pairs gives for
    # order, resolution and partners.
    rng = np.random.default_rng(seed)
    n = 3000
    rt = np.round(rng.uniform(0.5, 12.0, n), 2)  # rounding makes ties
    rt[rng.random(n) < 0.05] = np.nan
    width = rng.uniform(0.01, 0.2, n)
    width[rng.random(n) < 0.02] = np.nan
    half = rng.uniform(0.0, 0.5, n)
    lo, hi = rt - half, rt + half
    rho = 0.6
    half = (hi - lo) / 2  # as predict.add_pairs derives it from the interval
    ref = neighbour_pairs(rt, width / 4.0, [f"n{i}" for i in range(n)],
                          np.where(np.isfinite(half), half / 1.6448536269514722, np.nan),
                          rho=rho)
    got = whole_list_pairs(rt, width, lo, hi, rho=rho)
    order = np.zeros(n, dtype=int)
    order[ref.order] = np.arange(1, ref.order.size + 1)
    np.testing.assert_array_equal(got.elution_order, order)
    np.testing.assert_array_equal(got.resolution_next, ref.resolution_next)
    # the risk column: at least one partner in the whole list (peaks.any_coelution_probability)
    sd = np.where(np.isfinite(half), half / 1.6448536269514722, np.nan)
    np.testing.assert_array_equal(got.coelution_risk,
                                  any_coelution_probability(rt, width / 4.0, sd, rho))
    partners = [";".join(f"n{j}" for j in (a, b) if j >= 0)
                for a, b in zip(got.left, got.right, strict=True)]
    assert partners == ref.coelutes_with


def test_soak_every_garbage_row_reported(prep, tmp_path, open_smiles):
    # Scaled-down soak (scripts/soak.py runs 1,000,000 rows): 5 % broken rows of every kind.
    soak = _soak_module()
    path = tmp_path / "soak.csv"
    garbage = soak.make_input(path, 1000, open_smiles, garbage=0.05, seed=11)
    assert garbage.size == 50
    out = tmp_path / "soak_out.csv"
    s = stream_predict(prep, path, out, chunk_size=150, progress=False)
    assert s.n_rows == 1000
    assert set(garbage.tolist()) <= set(s.failed_lines.tolist())
    rows, reported, _ = soak.check_reported(out, garbage)
    assert (rows, reported) == (1000, 50)


def test_parallel_jobs_equal_serial(prep, mixed_file, reference, tmp_path):
    # the serial stream equals reference[1] (first test)
    parallel = tmp_path / "jobs2.csv"
    stream_predict(prep, mixed_file, parallel, chunk_size=40, jobs=2, progress=False)
    assert parallel.read_bytes() == reference[1]


def test_small_pieces_on_more_processes_equal_serial(prep, mixed_file, tmp_path):
    # many small pieces: the main process shares the work, takes back queued pieces at the
    # end (some then run twice); order and bytes must not change. Compared with a serial
    # run cut the same way: the model's ridge term is a BLAS product whose last bit can
    # depend on the batch layout, which reorders exactly tied (identical) structures.
    for jobs, piece_rows in ((2, 5), (3, 11)):
        serial = tmp_path / f"serial{piece_rows}.csv"
        stream_predict(prep, mixed_file, serial, chunk_size=40, piece_rows=piece_rows,
                       progress=False)
        out = tmp_path / f"jobs{jobs}.csv"
        s = stream_predict(prep, mixed_file, out, chunk_size=40, jobs=jobs,
                           piece_rows=piece_rows, progress=False)
        assert out.read_bytes() == serial.read_bytes()
        assert s.processes == jobs
        assert s.compute_cpu_s > 0


def test_dask_cluster_equals_serial(prep, mixed_file, reference, tmp_path):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1,
                                  dashboard_address=None) as cluster:
        by_address = tmp_path / "dask_address.csv"
        stream_predict(prep, mixed_file, by_address, chunk_size=40, progress=False,
                       scheduler=cluster.scheduler_address)
        with distributed.Client(cluster) as client:
            assert len(client.scheduler_info()["workers"]) == 2
            by_client = tmp_path / "dask_client.csv"
            stream_predict(prep, mixed_file, by_client, chunk_size=40, progress=False,
                           scheduler=client)
            # with the feature cache: workers send back what they computed, the main
            # process stores it and sends the cached features with the next run's chunks
            for run in ("cold", "warm"):
                s = stream_predict(prep, mixed_file, tmp_path / f"dask_{run}.csv",
                                   chunk_size=40, progress=False, scheduler=client,
                                   cache_dir=tmp_path / "cache")
                assert (tmp_path / f"dask_{run}.csv").read_bytes() == reference[1]
            assert s.cache_misses == 0 and s.cache_hits > N_OPEN
    assert by_address.read_bytes() == reference[1]
    assert by_client.read_bytes() == reference[1]


def test_pair_limit_keeps_order_drops_pairs(prep, mixed_file, reference):
    s = stream_predict(prep, mixed_file, None, pair_limit=10, progress=False)
    ref = reference[0]
    assert not s.pairs_computed
    pd.testing.assert_series_equal(s.table["elution_order"], ref["elution_order"])
    assert s.table["resolution_next"].isna().all()
    assert (s.table["coelutes_with"] == "").all()


def test_output_appears_only_when_complete(prep, tmp_path_factory, tmp_path, monkeypatch):
    small = tmp_path_factory.mktemp("small") / "small.csv"
    small.write_text("name,smiles\ntoluene,Cc1ccccc1\nphenol,Oc1ccccc1\n", encoding="utf-8")
    out = tmp_path / "out.csv"

    def fail(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr("retpred.batch.whole_list_pairs", fail)
    with pytest.raises(KeyboardInterrupt):
        stream_predict(prep, small, out, chunk_size=1, progress=False)
    assert list(tmp_path.iterdir()) == []  # no output, no spill file left


def test_refuses_existing_output_and_input_as_output(prep, mixed_file, tmp_path):
    out = tmp_path / "out.csv"
    out.write_text("keep me\n", encoding="utf-8")
    with pytest.raises(InputError, match="--force"):
        stream_predict(prep, mixed_file, out, progress=False)
    assert out.read_text(encoding="utf-8") == "keep me\n"
    with pytest.raises(InputError, match="overwrite the input"):
        stream_predict(prep, mixed_file, mixed_file, force=True, progress=False)
    with pytest.raises(InputError, match="jobs"):
        stream_predict(prep, mixed_file, None, jobs=0, progress=False)


def test_progress_goes_to_stderr_not_the_output(prep, mixed_file, tmp_path, capsys):
    out = tmp_path / "out.csv"
    stream_predict(prep, mixed_file, out, chunk_size=60, progress=True)
    captured = capsys.readouterr()
    assert captured.out == ""
    assert pd.read_csv(io.BytesIO(out.read_bytes())).shape[0] == N_OPEN + 18
