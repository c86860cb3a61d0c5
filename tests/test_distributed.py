"""Data-parallel growth with torch.distributed: two CPU ranks over loopback (gloo).

Outside references: scikit-learn's bundled digits (a permuted-pixel task), and
single-process training on the same data as the accuracy yardstick.
"""

from __future__ import annotations

import os
import shutil

import numpy as np
import pytest
import torch
import yaml
from conftest import permuted_digit_tasks, snapshot

import colonnade
from colonnade.app.distributed_grow import GrowRequest, grow_distributed, rank_threads
from colonnade.app.evidence import check_workspace, seal_workspace
from colonnade.app.record import history, new_key, verify_record
from colonnade.app.workspace import grow_workspace
from colonnade.training.distributed import WorkerFailed
from colonnade.training.fit import evaluate

pytestmark = pytest.mark.skipif(not torch.distributed.is_available(),
                                reason="this torch build has no torch.distributed")


@pytest.fixture(autouse=True)
def _short_collective_timeout(monkeypatch):
    """Every rank's process group gives up after 120 s instead of gloo's 30 minutes, so a
    lost gradient or buffer sync fails the test with a message instead of hanging it (a
    healthy step here takes well under a second, measured here)."""
    monkeypatch.setenv("COLONNADE_DIST_TIMEOUT_S", "120")


@pytest.fixture(scope="module")
def sealed_workspace(tmp_path_factory):
    from conftest import DIGITS_SPEC

    tmp = tmp_path_factory.mktemp("ddp")
    spec = dict(DIGITS_SPEC, train=dict(DIGITS_SPEC["train"], epochs=12, patience=4))
    (tmp / "spec.yaml").write_text(yaml.safe_dump(spec))
    t0, t1 = permuted_digit_tasks(2)
    for t in (t0, t1):
        np.savez(tmp / f"{t['name']}.npz", x=t["x"], y=t["y"])
        np.savez(tmp / f"{t['name']}_test.npz", x=t["x_test"], y=t["y_test"])
    ws = tmp / "ws"
    colonnade.create(tmp / "spec.yaml", ws)
    grow_workspace(ws, "perm0", tmp / "perm0.npz", progress=False)
    seal_workspace(ws, "perm0", tmp / "perm0_test.npz")
    return tmp, ws, t1


def _copy(src, dst):
    """A copy of the workspace with its seal's probe file beside it, where the seal looks."""
    shutil.copytree(src, dst)
    shutil.copy(src.parent / "perm0_test.npz", dst.parent / "perm0_test.npz")
    return dst


def test_two_ranks_train_a_valid_workspace(sealed_workspace, tmp_path, monkeypatch):
    tmp, ws, t1 = sealed_workspace
    # The ranks meet through a file in the run's staging folder: a folder name that a URL
    # would have to quote works, and no address or port of the environment is used (the
    # ones set here lead nowhere: 192.0.2.1 is reserved for documentation, RFC 5737).
    monkeypatch.setenv("MASTER_ADDR", "192.0.2.1")
    monkeypatch.setenv("MASTER_PORT", "1")
    ddp_ws = _copy(ws, tmp_path / "ddp #1 %20?x")
    one_ws = _copy(ws, tmp_path / "one")
    entry = grow_distributed(GrowRequest(str(ddp_ws), "perm1", str(tmp / "perm1.npz")), 2)
    assert entry["distributed"]["ranks"] == 2 and entry["distributed"]["backend"] == "gloo"
    grow_workspace(one_ws, "perm1", tmp / "perm1.npz", progress=False)

    report = check_workspace(ddp_ws)  # every earlier seal still exact
    assert report.passed and [t.verdict for t in report.tasks] == ["exact"]
    x, y = torch.from_numpy(t1["x_test"]), torch.from_numpy(t1["y_test"])
    acc_ddp, _ = evaluate(colonnade.load(ddp_ws), "perm1", x, y)
    acc_one, _ = evaluate(colonnade.load(one_ws), "perm1", x, y)
    # 0.9: test_digits' bar (measured here for one process). 0.01: two ranks see the same
    # rows in other batches, so the runs differ; one point is our bound, measured here
    # at well under it.
    assert acc_ddp >= 0.9
    assert abs(acc_ddp - acc_one) <= 0.01, (acc_ddp, acc_one)


def test_a_killed_rank_leaves_the_workspace_unchanged(sealed_workspace, tmp_path,
                                                      monkeypatch):
    tmp, ws, _ = sealed_workspace
    work = _copy(ws, tmp_path / "ws")
    before = snapshot(work)
    monkeypatch.setenv("COLONNADE_FAULT_KILL", "1:2")  # rank 1 SIGKILLs itself in epoch 2
    with pytest.raises(WorkerFailed) as err:
        grow_distributed(GrowRequest(str(work), "perm1", str(tmp / "perm1.npz")), 2)
    message = str(err.value)
    assert "rank 1" in message and "SIGKILL" in message and "unchanged" in message
    assert snapshot(work) == before
    assert not any(p.name.startswith(".colonnade-ddp-") for p in tmp_path.iterdir())


def test_cli_reports_a_killed_rank_in_one_sentence(sealed_workspace, tmp_path, monkeypatch,
                                                   capsys):
    from colonnade.cli import main

    tmp, ws, _ = sealed_workspace
    work = _copy(ws, tmp_path / "ws")
    before = snapshot(work)
    monkeypatch.setenv("COLONNADE_FAULT_KILL", "0:1")
    code = main(["grow", str(work), "--task", "perm1", "--train", str(tmp / "perm1.npz"),
                 "--nproc", "2", "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1 and len(err) == 1 and "worker rank 0 stopped" in err[0], err
    assert snapshot(work) == before


def test_a_rank_uses_the_threads_the_environment_names(monkeypatch):
    # References: the OMP_NUM_THREADS convention torch and torchrun follow, os.cpu_count().
    monkeypatch.setenv("OMP_NUM_THREADS", "3")
    assert rank_threads(2) == 3
    for unusable in ("", "0", "two", "-1"):
        monkeypatch.setenv("OMP_NUM_THREADS", unusable)
        assert rank_threads(2) == max(1, (os.cpu_count() or 1) // 2)
    monkeypatch.delenv("OMP_NUM_THREADS")
    assert rank_threads(2) == max(1, (os.cpu_count() or 1) // 2)
    assert rank_threads(10 ** 6) == 1


def test_bad_nproc(sealed_workspace):
    _, ws, _ = sealed_workspace
    with pytest.raises(colonnade.UsageError, match="at least 2"):
        grow_distributed(GrowRequest(str(ws), "perm1", "x.npz"), 1)


def test_torchrun_launch_gives_the_same_model_as_nproc(sealed_workspace, tmp_path,
                                                     monkeypatch):
    # torch's own launcher (torchrun --standalone), as the README shows for several
    # machines; rank 0 writes. Same shards, seeds and thread count as --nproc 2, so the
    # same weights. The thread count is pinned for both launchers (torchrun gives its
    # workers OMP_NUM_THREADS=1 unless the caller set it; --nproc once used this machine's
    # cores per rank, and the weights differed in their last bits). Pinned at 1, not 2:
    # two ranks of two threads on a 2-core machine took this test to 56 s against 22 s at one thread
    # (measured here); the rule itself is test_a_rank_uses_the_threads_the_environment_names.
    import subprocess
    import sys

    monkeypatch.setenv("OMP_NUM_THREADS", "1")
    tmp, ws, _ = sealed_workspace
    a, b = _copy(ws, tmp_path / "a"), _copy(ws, tmp_path / "b")
    grow_distributed(GrowRequest(str(a), "perm1", str(tmp / "perm1.npz")), 2, progress=False)
    # torchrun's own parser takes '--sign' for an abbreviation of its '--signals-to-handle'
    # (and refuses it as ambiguous), so the key goes by the environment, as the README says.
    key = new_key(tmp_path / "runner")
    proc = subprocess.run([sys.executable, "-m", "torch.distributed.run", "--standalone",
                           "--nproc-per-node", "2", "-m", "colonnade", "grow", str(b),
                           "--task", "perm1", "--train", str(tmp / "perm1.npz"), "--quiet",
                           "--by", "Ranks Runner", "--reason", "scaled out"],
                          capture_output=True, text=True, timeout=300,
                          env={**os.environ, "COLONNADE_SIGN_KEY": key["key"]})
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert proc.stdout.count("grew task 'perm1'") == 1  # rank 0 alone reports
    # The launching command's attribution reaches the rank that commits.
    grown = history(b)[-1]
    assert (grown.step, grown.by, grown.reason) == ("column_added", "Ranks Runner",
                                                    "scaled out")
    assert verify_record(b, trust=[key["public"]]).passed
    na, nb = colonnade.load(a), colonnade.load(b)
    sa, sb = na.state_dict(), nb.state_dict()
    assert sa.keys() == sb.keys()
    assert all(torch.equal(sa[k], sb[k]) for k in sa)
