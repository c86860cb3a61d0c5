"""Input normalisation inside the network, and class names through predict and show.

References: numpy's mean and std (population, ddof=0) for the fitted statistics; the
formula (x - mean) / std applied by hand in front of an identical network without
normalisation; Python's csv module reading the prediction table back.
"""

from __future__ import annotations

import copy
import csv
import json

import numpy as np
import pytest
import torch
import yaml
from conftest import DIGITS_SPEC, permuted_digit_tasks, snapshot, write_npz

from colonnade.cli import main
from colonnade.errors import SealedError, SpecError, UsageError
from colonnade.evidence.seal import Probe, seal_task
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec
from colonnade.training.growth import grow

CONV_SPEC = {
    "input": [3, 16],
    "column": [{"conv1d": 4, "kernel": 3}, {"act": "relu"}, {"flatten": True}, {"dense": 6}],
    "lateral": {"kind": "linear"},
    "train": {"epochs": 2, "batch_size": 16, "seed": 0},
}


def _data(n=60, seed=0):
    rng = np.random.default_rng(seed)
    x = (rng.normal(size=(n, 3, 16)) * [[5.0], [0.1], [30.0]] + [[10.0], [-2.0], [0.0]])
    return x.astype(np.float32), np.arange(n) % 3


def _spec(normalize):
    raw = copy.deepcopy(CONV_SPEC)
    raw["input"] = {"shape": [3, 16], "normalize": normalize}
    return parse_spec(raw)


def test_given_normalisation_equals_the_formula_in_front_of_a_plain_network():
    mean, std = [1.0, -2.0, 0.5], [2.0, 0.25, 4.0]
    net = ProgressiveNet(_spec({"mean": mean, "std": std}))
    net.add_column("a", 3, seed=0)
    plain = ProgressiveNet(parse_spec(CONV_SPEC))
    plain.add_column("a", 3, seed=0)
    plain.load_state_dict({k: v for k, v in net.state_dict().items()
                           if not k.startswith("input_norm.")})
    x = torch.from_numpy(_data()[0])
    by_hand = (x - torch.tensor(mean).view(3, 1)) / torch.tensor(std).view(3, 1)
    assert torch.equal(net(x, task="a"), plain(by_hand, task="a"))
    assert torch.equal(net.forward_all(x)["a"], net(x, task="a"))


def test_fit_takes_numpys_per_channel_mean_and_std_of_the_first_task():
    net = ProgressiveNet(_spec("fit"))
    x, y = _data()
    entry = grow(net, "a", (x, y), progress=False)
    train_rows = entry["input_normalization"]
    # Reference: numpy over the training rows (the split grow made: 80 % of each class).
    from colonnade.training.data import stratified_split

    tr, _ = stratified_split(y, 0.2, 0)
    ref_mean = x[tr].astype(np.float64).mean(axis=(0, 2))
    ref_std = x[tr].astype(np.float64).std(axis=(0, 2))
    np.testing.assert_allclose(train_rows["mean"], ref_mean, rtol=1e-6)
    np.testing.assert_allclose(net.normalization["std"], ref_std.astype(np.float32), rtol=1e-6)


def test_normalisation_is_fixed_once_a_task_exists_and_names_the_sealed_tasks():
    net = ProgressiveNet(_spec("fit"))
    x, y = _data()
    grow(net, "a", (x, y), progress=False)
    with pytest.raises(UsageError, match=r"fixed once the first task exists; changing it "
                                         r"would move every task's outputs \(a\)"):
        net.set_normalization([0.0], [1.0])
    seal_task(net, "a", Probe(torch.from_numpy(x), torch.from_numpy(y), "0" * 64, "p.npz"))
    with pytest.raises(SealedError, match=r"\(sealed: a\)"):
        net.set_normalization([0.0], [1.0])
    # The guard covers the buffers as part of every closure.
    state = {k: v.clone() for k, v in net.state_dict().items()}
    state["input_norm.mean"] += 1
    with pytest.raises(SealedError):
        net.load_state_dict(state)


def test_bad_normalisation_in_the_spec_gets_one_sentence():
    for bad, words in (({"mean": [1, 2], "std": [1]}, "input.normalize.mean: expected 1 or 3"),
                       ({"mean": [0], "std": [0]}, "input.normalize.std[0]: expected a positive"),
                       ("fitted", "input.normalize: expected fit or a mapping")):
        with pytest.raises(SpecError, match=words.replace("[", r"\[").replace("]", r"\]")):
            _spec(bad)


def run(*argv):
    return main([str(a) for a in argv])


@pytest.fixture
def named(tmp_path):
    raw = copy.deepcopy(DIGITS_SPEC)
    raw["train"]["epochs"] = 2
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(raw))
    t0, t1 = permuted_digit_tasks(2)
    names = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine"]
    lines = ["label," + ",".join(f"p{i}" for i in range(64))]
    lines += [names[c] + "," + ",".join(f"{v:.9g}" for v in row)
              for row, c in zip(t0["x"][:400], t0["y"][:400], strict=True)]
    (tmp_path / "named.csv").write_text("\n".join(lines) + "\n")
    unlabelled = ["p" + ",p".join(str(i) for i in range(64))]
    unlabelled += [",".join(f"{v:.9g}" for v in row) for row in t0["x"][:25]]
    (tmp_path / "field.csv").write_text("\n".join(unlabelled) + "\n")
    assert run("new", tmp_path / "spec.yaml", "-o", tmp_path / "ws") == 0
    assert run("grow", tmp_path / "ws", "--task", "words", "--train", tmp_path / "named.csv",
               "--quiet") == 0
    assert run("grow", tmp_path / "ws", "--task", "perm", "--train",
               write_npz(tmp_path / "b.npz", t1), "--quiet",
               "--class-names", ",".join(f"c{i}" for i in range(10))) == 0
    return {"tmp": tmp_path, "names": names, "t0": t0}


def test_class_names_reach_the_manifest_show_and_the_prediction_table(named, capsys):
    tmp = named["tmp"]
    capsys.readouterr()
    assert run("show", tmp / "ws", "--json") == 0
    tasks = {t["task"]: t for t in json.loads(capsys.readouterr().out)["tasks"]}
    assert tasks["words"]["class_names"] == sorted(named["names"])
    assert tasks["perm"]["class_names"] == [f"c{i}" for i in range(10)]
    assert run("show", tmp / "ws") == 0
    assert "classes of words: eight, five, four" in capsys.readouterr().out

    before = snapshot(tmp / "ws")
    assert run("predict", tmp / "ws", "--task", "words", "--data", tmp / "field.csv",
               "-o", tmp / "field_pred.csv") == 0
    assert "accuracy" not in capsys.readouterr().out  # unlabelled: nothing to score
    with open(tmp / "field_pred.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == 25 and rows[0]["id"] == "0" and rows[0]["task"] == "words"
    logits = np.array([[float(r[f"logit:{n}"]) for n in sorted(named["names"])] for r in rows])
    assert [r["predicted"] for r in rows] == [sorted(named["names"])[i]
                                               for i in logits.argmax(1)]
    assert snapshot(tmp / "ws") == before


def test_predict_all_prints_each_tasks_accuracy_and_refuses_foreign_names(named, capsys):
    tmp = named["tmp"]
    capsys.readouterr()
    assert run("predict", tmp / "ws", "--all", "--data", tmp / "named.csv",
               "-o", tmp / "all.npz") == 0
    out = capsys.readouterr().out
    assert "words: accuracy" in out and "perm: accuracy" not in out  # names do not fit perm
    with np.load(tmp / "all.npz") as f:
        assert list(f["classes_words"]) == sorted(named["names"])
        assert f["logits_perm"].shape == (400, 10)
    (tmp / "other.csv").write_text("a," * 64 + "label\n" + "0," * 64 + "eleven\n")
    assert run("predict", tmp / "ws", "--task", "words", "--data", tmp / "other.csv",
               "-o", tmp / "x.csv") != 0
    err = capsys.readouterr().err
    assert "'eleven' that the task does not have" in err and not (tmp / "x.csv").exists()


def test_export_carries_the_normalisation_and_the_class_names():
    import onnx
    import onnxruntime as ort

    from colonnade.files.artifact import artifact_blob, artifact_model
    from colonnade.files.onnx_export import onnx_bytes

    net = ProgressiveNet(_spec({"mean": [1.0, -2.0, 0.5], "std": [2.0, 0.25, 4.0]}))
    net.add_column("a", 3, seed=0, class_names=["ok", "worn", "cracked"])
    x = torch.from_numpy(_data(n=9)[0])
    blob = artifact_blob(net, ["a"])
    meta = blob["meta"]
    assert meta["tasks"][0]["class_names"] == ["ok", "worn", "cracked"]
    assert meta["normalize"] == {"mean": [1.0, -2.0, 0.5], "std": [2.0, 0.25, 4.0]}
    with torch.no_grad():
        assert torch.equal(artifact_model(blob)(x)[0], net(x, task="a"))
    data = onnx_bytes(artifact_model(blob), list(net.input_shape), meta)
    got = ort.InferenceSession(data, providers=["CPUExecutionProvider"]).run(
        ["a"], {"x": x.numpy()})[0]
    with torch.no_grad():
        # onnxruntime as the reference runtime; 1e-5 as the export tests use.
        assert np.abs(got - net(x, task="a").numpy()).max() <= 1e-5
    props = {p.key: p.value for p in onnx.load_from_string(data).metadata_props}
    assert json.loads(props["colonnade.classes"]) == {"a": ["ok", "worn", "cracked"]}
    assert json.loads(props["colonnade.normalization"]) == meta["normalize"]
