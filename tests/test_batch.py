"""contenders batch: one configuration, many datasets, one index (local executor).

The datasets are invented, generated in ``batch_cases.py`` from the processes stated
there; the batch runs once per session and is shared with ``test_cluster.py``."""

from __future__ import annotations

import json
import subprocess
import sys

import arviz as az
import pytest

from batch_cases import SETTINGS, local_batch
from contenders.pipeline.batch import find_datasets
from contenders.errors import UserError


def _summary(batch, name):
    return json.loads((batch.out / name / "summary.json").read_text())


def test_every_dataset_listed_and_the_broken_one_with_its_reason(programs):
    _folder, batch = local_batch()
    assert [r.name for r in batch.rows] == ["a_fast", "b_slow", "c_broken", "d_fast_again"]
    assert [r.status for r in batch.rows] == ["ok", "ok", "failed", "ok"]
    broken = batch.rows[2]
    assert "c_broken.csv" in broken.reason and "outcome column 'rt' not found" in broken.reason
    assert "latency" in broken.reason          # names the columns there are
    for r in batch.rows:
        assert (batch.out / r.name / "report.html").exists() == (r.status == "ok")
    assert batch.candidates == ["lognormal", "normal"]


def test_index_tabulates_the_winners(programs):
    _folder, batch = local_batch()
    fast, slow = batch.rows[0], batch.rows[1]
    # lognormal data (log-SD 0.6): the lognormal candidate is separated from the normal one
    assert fast.winner == fast.outcome == "lognormal"
    assert fast.lead > 4 and fast.lead > 2 * fast.lead_se
    # normal data with CV 0.09: the verdict cannot separate the two
    assert slow.winner == "" and slow.outcome == "no clear winner"
    assert sorted(slow.close) == ["lognormal", "normal"]
    assert slow.lead is not None and (slow.lead < 4 or slow.lead < 2 * slow.lead_se)
    print(f"a_fast lead {fast.lead:.2f} (SE {fast.lead_se:.2f}); b_slow lead {slow.lead:.2f} (SE {slow.lead_se:.2f})")


def test_index_numbers_match_each_summary_and_arviz(programs):
    _folder, batch = local_batch()
    checked = 0
    for row in batch.rows:
        if row.status != "ok":
            continue
        summary = _summary(batch, row.name)
        cands = {c["id"]: c for c in summary["candidates"]}
        assert row.n == summary["data"]["n"] == 90
        assert row.best == summary["ranking"][0]
        for cid, w in row.weights.items():
            assert w == pytest.approx(cands[cid]["stacking_weight"], abs=1e-12)
        assert sum(row.weights.values()) == pytest.approx(1.0, abs=1e-6)
        best, second = (cands[cid] for cid in summary["ranking"][:2])
        assert row.lead == pytest.approx(best["elpd_loo"] - second["elpd_loo"], abs=1e-9)
        # Reference: ArviZ's PSIS-LOO on the stored posterior fit (Vehtari, Gelman & Gabry
        # 2017, "Practical Bayesian model evaluation using leave-one-out cross-validation
        # and WAIC", eq. 10) equals the index's elpd where no observation was refitted.
        for cid, path in row.posterior_files.items():
            if cands[cid]["n_refits"] == 0 and cands[cid]["status"] == "ok":
                # the store keeps log_lik as float32; ArviZ gets its values in float64, as the run does
                fit = az.from_netcdf(path)
                fit.log_likelihood = fit.log_likelihood.astype("float64")
                loo = az.loo(fit, pointwise=False)
                assert cands[cid]["elpd_loo"] == pytest.approx(float(loo.elpd_loo), rel=1e-9)
                checked += 1
    assert checked >= 2


def test_same_data_twice_comes_from_the_shared_store(programs):
    _folder, batch = local_batch()
    first, again = _summary(batch, "a_fast"), _summary(batch, "d_fast_again")
    assert first["fits"]["sampled"] > 0
    assert again["fits"]["sampled"] == 0 and again["fits"]["from_store"] > 0
    assert [c["elpd_loo"] for c in again["candidates"]] == [c["elpd_loo"] for c in first["candidates"]]
    assert batch.rows[3].weights == batch.rows[0].weights


def test_index_files(programs):
    _folder, batch = local_batch()
    records = json.loads((batch.out / "index.json").read_text())["datasets"]
    assert [r["name"] for r in records] == ["a_fast", "b_slow", "c_broken", "d_fast_again"]
    assert records[0]["winner"] == "lognormal" and records[1]["outcome"] == "no clear winner"
    lines = (batch.out / "index.csv").read_text().splitlines()
    assert lines[0].split(",")[:7] == ["dataset", "file", "status", "reason", "n", "outcome", "winner"]
    assert "weight_lognormal" in lines[0] and "weight_normal" in lines[0]
    assert len(lines) == 5 and lines[3].startswith("c_broken,") and "not found" in lines[3]
    html = (batch.out / "index.html").read_text()
    assert 'href="a_fast/report.html"' in html and 'href="c_broken/report.html"' not in html
    assert "no clear winner" in html and "outcome column &#39;rt&#39; not found" in html
    assert "<script src" not in html and "<link" not in html and "http" not in html   # self-contained


def test_batch_command_reuses_the_store(programs, tmp_path):
    folder, batch = local_batch()
    flags = ["--outcome", "rt", "--only", "lognormal,normal", "--chains", "2", "--warmup", "200",
             "--draws", "200", "--prior-draws", "100", "--check-draws", "200", "--rhat-max", "1.05",
             "--ess-per-chain-min", "40", "--engine", "pystan", "--seed", str(SETTINGS["seed"]),
             "--store", str(batch.out / "fits")]
    files = [folder / "b_slow.csv", folder / "c_broken.csv"]   # a list of files this time
    res = subprocess.run([sys.executable, "-m", "contenders.cli", "batch", *map(str, files), *flags,
                          "--out", str(tmp_path / "again")], capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr
    assert "b_slow: no clear winner" in res.stdout
    assert "c_broken: not run: " in res.stdout and "outcome column 'rt' not found" in res.stdout
    summary = json.loads((tmp_path / "again" / "b_slow" / "summary.json").read_text())
    assert summary["fits"]["sampled"] == 0
    assert summary["ranking"] == _summary(batch, "b_slow")["ranking"]


def test_a_folder_without_csv_files_is_one_clear_error(tmp_path):
    (tmp_path / "notes.txt").write_text("no data here")
    with pytest.raises(UserError, match="holds no .csv files"):
        find_datasets([tmp_path])


@pytest.mark.parametrize("rows, status", [
    ([("ok", "gamma"), ("failed", "")], 0),
    ([("ok", ""), ("ok", "")], 3),        # every dataset ran, none ranked a candidate
    ([("failed", ""), ("failed", "")], 1),
])
def test_batch_exit_status_says_whether_anything_was_ranked(rows, status, monkeypatch, tmp_path, capsys):
    import types

    from contenders.pipeline import batch as batch_module
    from contenders import cli

    fake = types.SimpleNamespace(out=tmp_path, rows=[
        types.SimpleNamespace(name=f"d{k}", status=s, best=b, winner=b, outcome=b or "no candidate ranked",
                              reason="" if s == "ok" else "broken")
        for k, (s, b) in enumerate(rows)])
    monkeypatch.setattr(batch_module, "run_batch", lambda *a, **k: fake)
    data = tmp_path / "a.csv"
    data.write_text("rt\n1\n2\n")
    assert cli.main(["batch", str(data), "--outcome", "rt", "--out", str(tmp_path / "o")]) == status
    if status == 3:
        assert "exit status 3" in capsys.readouterr().err
