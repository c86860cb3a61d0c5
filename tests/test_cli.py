"""The command line as a user meets it: verbs, messages, exit codes, nothing half-written."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import yaml
from conftest import permuted_digit_tasks, snapshot, write_npz

from colonnade.cli import main
from colonnade.evidence import record
from colonnade.training import fit


@pytest.fixture
def files(tmp_path, digits_spec):
    digits_spec["train"]["epochs"] = 3
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(digits_spec))
    t0, t1 = permuted_digit_tasks(2)
    return {"spec": str(spec), "a": write_npz(tmp_path / "a.npz", t0),
            "b": write_npz(tmp_path / "b.npz", t1), "ws": str(tmp_path / "ws"),
            "tmp": tmp_path}


def run(*argv):
    return main([str(a) for a in argv])


def test_new_grow_show_predict(files, capsys):
    assert run("new", files["spec"], "-o", files["ws"]) == 0
    assert run("grow", files["ws"], "--task", "a", "--train", files["a"], "--quiet") == 0
    assert run("grow", files["ws"], "--task", "b", "--train", files["b"], "--quiet",
               "--width", "0.5") == 0
    assert run("grow", files["ws"], "--task", "c", "--train", files["b"], "--quiet",
               "--mode", "head", "--on", "a") == 0
    capsys.readouterr()
    assert run("show", files["ws"]) == 0
    out = capsys.readouterr().out
    assert "a " in out and "head" in out and "parameters:" in out
    assert run("show", files["ws"], "--json") == 0
    info = json.loads(capsys.readouterr().out)
    assert [t["task"] for t in info["tasks"]] == ["a", "b", "c"]
    assert info["columns"][1]["width"] == 0.5
    assert info["tasks"][2]["closure_columns"] == [0]
    out_file = files["tmp"] / "pred.npz"
    assert run("predict", files["ws"], "--task", "a", "--data", files["a"], "-o", out_file) == 0
    assert "accuracy" in capsys.readouterr().out
    with np.load(out_file) as f:
        assert f["logits"].shape == (1347, 10) and f["pred"].shape == (1347,)


def test_bad_spec_exit_2_one_sentence(files, capsys):
    bad = files["tmp"] / "bad.yaml"
    bad.write_text("input: [1, 32]\ncolumn:\n  - {conv1d: 4, kernel: -3}\n  - {pool: global_avg}\n")
    assert run("new", bad, "-o", files["ws"]) == 2
    err = capsys.readouterr().err.strip()
    assert err == "colonnade: error: column[0].kernel: expected a positive integer, got -3"
    assert not (files["tmp"] / "ws").exists()


def test_new_refuses_an_existing_workspace(files, capsys):
    assert run("new", files["spec"], "-o", files["ws"]) == 0
    before = snapshot(files["ws"])
    assert run("new", files["spec"], "-o", files["ws"]) == 2
    assert "exists and is not an empty folder" in capsys.readouterr().err
    assert snapshot(files["ws"]) == before


def _grown(files):
    assert run("new", files["spec"], "-o", files["ws"]) == 0
    assert run("grow", files["ws"], "--task", "a", "--train", files["a"], "--quiet") == 0
    return snapshot(files["ws"])


def test_bad_data_and_flags_leave_the_workspace_unchanged(files, capsys):
    before = _grown(files)
    tmp = files["tmp"]
    np.savez(tmp / "shape.npz", x=np.zeros((10, 5), np.float32), y=np.arange(10) % 2)
    x = np.load(files["a"])["x"]
    y = np.load(files["a"])["y"]
    bad_x = x.copy()
    bad_x[0, 0] = np.inf
    np.savez(tmp / "inf.npz", x=bad_x, y=y)
    np.savez(tmp / "labels.npz", x=x, y=y + 1)
    cases = [
        (["grow", files["ws"], "--task", "b", "--train", tmp / "shape.npz"], "sample shape [5]"),
        (["grow", files["ws"], "--task", "b", "--train", tmp / "inf.npz"], "non-finite"),
        (["grow", files["ws"], "--task", "b", "--train", tmp / "labels.npz", "--classes", "10"],
         "outside 0..9"),
        (["grow", files["ws"], "--task", "a", "--train", files["a"]], "exists already"),
        (["grow", files["ws"], "--task", "b", "--train", files["a"], "--mode", "head",
          "--on", "zz"], "no task named 'zz'"),
        (["grow", files["ws"], "--task", "b", "--train", files["a"], "--on", "a"],
         "--on applies to --mode head"),
        (["grow", files["ws"], "--task", "b", "--train", files["a"], "--device", "cuda"],
         "cuda"),
        (["grow", files["ws"], "--task", "9b", "--train", files["a"]], "must start with a letter"),
        (["grow", tmp / "nope", "--task", "b", "--train", files["a"]], "no such workspace"),
        (["predict", files["ws"], "--task", "a", "--data", tmp / "shape.npz", "-o",
          tmp / "p.npz"], "sample shape [5]"),
        (["predict", files["ws"], "--task", "a", "--data", files["a"], "-o", tmp / "p.txt"],
         "must be an .npz"),
        (["show", tmp], "not a workspace"),
    ]
    for argv, message in cases:
        code = run(*argv)
        err = capsys.readouterr().err.strip()
        if "cuda" in message and code == 0:  # a machine with a GPU grew it: not an error
            pytest.skip("CUDA is available here")
        assert code == 2, (argv, err)
        assert err.startswith("colonnade: error: ") and message in err, (argv, err)
        assert len(err.splitlines()) == 1, err
        assert snapshot(files["ws"]) == before, argv
    assert not (tmp / "p.npz").exists()


def test_argparse_errors_exit_2(files, capsys):
    with pytest.raises(SystemExit) as exit_info:
        run("grow", files["ws"], "--task", "b", "--train", files["a"], "--epochs", "-1")
    assert exit_info.value.code == 2
    assert "expected a positive integer, got -1" in capsys.readouterr().err


def test_interrupt_during_training_leaves_workspace_unchanged(files, capsys, monkeypatch):
    before = _grown(files)
    real = fit.evaluate
    calls = {"n": 0}

    def interrupted(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 2:
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(fit, "evaluate", interrupted)
    assert run("grow", files["ws"], "--task", "b", "--train", files["b"], "--quiet") == 130
    assert "interrupted; the workspace is unchanged" in capsys.readouterr().err
    assert snapshot(files["ws"]) == before


def test_console_script_runs_without_traceback(files):
    # The installed entry point, as a user calls it, on a missing spec.
    proc = subprocess.run([sys.executable, "-m", "colonnade", "new", "missing.yaml", "-o",
                           str(files["tmp"] / "w")], capture_output=True, text=True)
    assert proc.returncode == 2
    assert proc.stderr.strip() == "colonnade: error: missing.yaml: no such spec file"
    assert "Traceback" not in proc.stderr


def test_file_system_refusals_get_one_sentence(files, capsys):
    before = _grown(files)
    blocker = files["tmp"] / "a-file"
    blocker.write_text("not a folder")
    code = run("report", files["ws"], "-o", blocker / "report")
    err = capsys.readouterr().err.strip().splitlines()
    assert code != 0 and len(err) == 1 and err[0].startswith("colonnade: error: "), err
    assert "Traceback" not in "".join(err)
    assert snapshot(files["ws"]) == before


def test_show_reads_the_manifest_only_and_its_counts_match_numel(files, capsys):
    """``show`` never imports torch, and its sizes equal numel() of the loaded modules."""
    import colonnade
    from colonnade.files import store

    assert run("new", files["spec"], "-o", files["ws"]) == 0
    assert run("grow", files["ws"], "--task", "a", "--train", files["a"], "--quiet") == 0
    assert run("grow", files["ws"], "--task", "c", "--train", files["b"], "--quiet",
               "--mode", "head", "--on", "a") == 0
    code = ("import sys, json\nfrom colonnade.cli import main\n"
            f"assert main(['show', {files['ws']!r}, '--json']) == 0\n"
            "assert 'torch' not in sys.modules, 'show imported torch'\n")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            timeout=60)
    assert result.returncode == 0, result.stderr
    info = json.loads(result.stdout)
    net = colonnade.load(files["ws"])
    # numel() of the live modules is the reference (PyTorch's own count).
    assert info["parameters"]["total"] == sum(p.numel() for p in net.parameters())
    assert info["columns"][0]["params"] == sum(p.numel() for p in net.columns[0].parameters())
    # A workspace without the summary (as written before it existed) shows the same.
    # The record binds every section, so the older manifest is committed as such (one more
    # history entry, chained over the state without the summary).
    manifest = store.read_manifest(files["ws"])
    manifest.pop("summary")
    record.extend(manifest, record.Attribution(verb="older-save"))
    (files["tmp"] / "ws" / "manifest.yaml").write_text(yaml.safe_dump(manifest,
                                                                       sort_keys=False))
    from colonnade.app.show import describe

    again = describe(files["ws"])
    assert again.pop("history")[:-1] == info.pop("history")
    assert again == info
