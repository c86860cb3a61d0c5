"""Data larger than memory: .npy files read by position, torch Datasets, DataLoader workers.

Streaming must not change a single bit: the same seed on the same rows gives the same
weights whether the rows sit in a tensor, in a .npy file read batch by batch (with or
without worker processes), or behind a torch Dataset. The outside references are numpy's
own .npy reader (np.load) for the values and torch.equal for the bits; the memory cap is
the kernel's, through resource.setrlimit(RLIMIT_AS).
"""

from __future__ import annotations

import subprocess
import sys
import textwrap

import numpy as np
import pytest
import torch
from conftest import permuted_digit_tasks
from torch.utils.data import DataLoader, TensorDataset

from colonnade.errors import DataError
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec
from colonnade.training.data import load_task_data
from colonnade.training.datasets import Rows
from colonnade.training.fit import fit_task
from colonnade.training.growth import grow


@pytest.fixture
def digits_npy(tmp_path):
    task = permuted_digit_tasks(1)[0]
    np.save(tmp_path / "x.npy", np.ascontiguousarray(task["x"]))  # rows stored one by one
    np.save(tmp_path / "y.npy", task["y"])
    np.savez(tmp_path / "d.npz", x=task["x"], y=task["y"])
    return tmp_path


def _spec(digits_spec, epochs=3):
    digits_spec["train"]["epochs"] = epochs
    return parse_spec(digits_spec)


def _weights(net):
    return {k: v.clone() for k, v in net.state_dict().items()}


def test_npy_rows_read_what_numpy_reads(digits_npy):
    data = load_task_data(digits_npy / "x.npy", (64,), labels=digits_npy / "y.npy",
                          split=False)
    assert isinstance(data.x, Rows)
    reference = np.load(digits_npy / "x.npy")  # numpy's own reader
    idx = torch.tensor([5, 0, 1346, 5])
    assert torch.equal(data.x[idx], torch.from_numpy(reference[idx.numpy()]))
    assert torch.equal(data.x[10:20], torch.from_numpy(reference[10:20]))


@pytest.mark.parametrize("workers", [0, 2])
def test_streamed_training_is_bit_identical_to_in_memory(digits_npy, digits_spec, workers):
    spec = _spec(digits_spec)
    weights = {}
    for name, kw in (("memory", {"path": digits_npy / "d.npz"}),
                     ("streamed", {"path": digits_npy / "x.npy",
                                   "labels": digits_npy / "y.npy"})):
        data = load_task_data(kw.pop("path"), (64,), seed=0, **kw)
        net = ProgressiveNet(spec)
        net.add_column("a", 10, seed=0)
        fit_task(net, "a", data, spec.train, progress=False,
                 workers=workers if name == "streamed" else 0)
        weights[name] = _weights(net)
    assert weights["memory"].keys() == weights["streamed"].keys()
    for key, value in weights["memory"].items():
        assert torch.equal(value, weights["streamed"][key]), key


def test_a_second_column_streams_with_the_frozen_cache_bit_identically(digits_npy, digits_spec):
    spec = _spec(digits_spec, epochs=2)
    logits = {}
    for name, kw in (("memory", {"path": digits_npy / "d.npz"}),
                     ("streamed", {"path": digits_npy / "x.npy",
                                   "labels": digits_npy / "y.npy"})):
        net = ProgressiveNet(spec)
        for task in ("a", "b"):
            grow(net, task, load_task_data(kw["path"], (64,), seed=0,
                                           labels=kw.get("labels")), progress=False)
        logits[name] = net(torch.from_numpy(np.load(digits_npy / "x.npy")[:50]), task="b")
        assert "cached" in net.meta["records"]["b"]["train"]["cache"]
    assert torch.equal(logits["memory"], logits["streamed"])


def test_a_torch_dataset_or_dataloader_grows_like_the_arrays(digits_spec):
    task = permuted_digit_tasks(1)[0]
    spec = _spec(digits_spec, epochs=2)
    x, y = torch.from_numpy(task["x"]), torch.from_numpy(task["y"])
    results = {}
    for name, data in (("arrays", (task["x"], task["y"])),
                       ("dataset", TensorDataset(x, y)),
                       ("loader", DataLoader(TensorDataset(x, y), batch_size=7, shuffle=True))):
        net = ProgressiveNet(spec)
        grow(net, "a", data, progress=False)
        results[name] = _weights(net)
    for name in ("dataset", "loader"):
        for key, value in results["arrays"].items():
            assert torch.equal(value, results[name][key]), (name, key)


def test_a_numpy_array_into_the_network_gets_one_sentence(digits_spec):
    net = ProgressiveNet(_spec(digits_spec))
    net.add_column("a", 10)
    with pytest.raises(DataError, match=r"takes a torch.Tensor, got numpy.ndarray; convert it "
                                        r"first, e.g. torch.from_numpy\(x\).float\(\)"):
        net(np.zeros((2, 64), np.float32))


def test_a_corrupt_row_is_named_when_its_batch_is_read(tmp_path):
    x = np.zeros((20, 4), np.float64)
    x[13, 2] = 1e300
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "y.npy", np.arange(20) % 2)
    data = load_task_data(tmp_path / "x.npy", (4,), labels=tmp_path / "y.npy", split=False)
    assert torch.equal(data.x[:13], torch.zeros(13, 4))
    with pytest.raises(DataError, match=r"x.npy: row 13: feature 2 holds 1e\+300, beyond the "
                                        r"float32 range"):
        data.x[10:15]
    (tmp_path / "short.npy").write_bytes((tmp_path / "x.npy").read_bytes()[:-50])
    with pytest.raises(DataError, match="shorter than its header says"):
        load_task_data(tmp_path / "short.npy", (4,), labels=tmp_path / "y.npy")


# The child trains, seals and predicts under an address-space cap below the data's size,
# so the data can be neither read whole nor memory-mapped whole: the mapping of a file
# counts against RLIMIT_AS (setrlimit(2)). The cap is set after torch is imported and warm
# (its libraries reserve most of the address space a process uses), with a margin for
# batches, and the child checks that the cap really is below the file size.
_CAPPED = textwrap.dedent("""
    import os, re, resource, sys
    import numpy as np
    import torch
    torch.set_num_threads(1)
    from colonnade.app.evidence import seal_workspace
    from colonnade.app.workspace import grow_workspace, new_workspace, predict_file
    folder = sys.argv[1]
    new_workspace(os.path.join(folder, "spec.yaml"), os.path.join(folder, "ws"))
    # Warm up torch's kernels on a tiny in-memory problem before the cap is set.
    net = torch.nn.Sequential(torch.nn.AvgPool2d(16), torch.nn.Flatten(), torch.nn.Linear(16, 2))
    torch.optim.AdamW(net.parameters()).step(); net(torch.zeros(256, 1, 64, 64)).sum().backward()
    status = open("/proc/self/status").read()
    used = int(re.search(r"VmSize:\\s+(\\d+)", status).group(1)) * 1024
    cap = used + int(sys.argv[2])
    size = os.path.getsize(os.path.join(folder, "x.npy"))
    if cap >= size:
        print(f"cap {cap} is not below the data size {size}"); sys.exit(3)
    resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
    x, y, ws = (os.path.join(folder, n) for n in ("x.npy", "y.npy", "ws"))
    entry = grow_workspace(ws, "big", x, labels=y, progress=False)
    seal_workspace(ws, "big", x, labels=y)
    result = predict_file(ws, "big", x, os.path.join(folder, "pred.csv"), labels=y)
    print("ok", entry["val_accuracy"], result["accuracy"], cap, size)
""")


def test_train_seal_predict_under_a_memory_cap_below_the_data_size(tmp_path):
    import os

    import yaml

    rows, side = 15_000, 128  # 15,000 rows of 1 x 128 x 128 float32: 983 MB
    rng = np.random.default_rng(0)
    labels = rng.integers(0, 2, rows)
    header = {"descr": "<f4", "fortran_order": False, "shape": (rows, 1, side, side)}
    row_bytes = side * side * 4
    # The class is written into each row's first 8 image lines (4 KiB, with noise); the rest
    # of the file is left as holes, which read as zeros, so writing it costs no disk time.
    with open(tmp_path / "x.npy", "wb") as f:
        np.lib.format.write_array_header_1_0(f, header)
        start = f.tell()
        for r in range(rows):
            f.seek(start + r * row_bytes)
            top = rng.normal(1.0 if labels[r] else -1.0, 1.0, 8 * side).astype(np.float32)
            f.write(top.tobytes())
        f.truncate(start + rows * row_bytes)
    np.save(tmp_path / "y.npy", labels)
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump({
        "input": [1, side, side],
        "column": [{"pool": "avg", "size": 8}, {"flatten": True}, {"dense": 8},
                   {"act": "relu"}],
        "train": {"epochs": 1, "batch_size": 128, "lr": 0.01, "seed": 0,
                  "val_fraction": 0.05}}))
    # Room above what torch itself maps, for batches (a 256-row evaluation batch is 16 MiB
    # here) and the validation sample the workspace keeps (32 MiB); measured here, torch
    # and colonnade map about 690 MiB before any data is read.
    margin = 192 << 20
    out = subprocess.run([sys.executable, "-c", _CAPPED, str(tmp_path), str(margin)],
                         capture_output=True, text=True,
                         env={**os.environ, "MALLOC_ARENA_MAX": "2"})
    assert out.returncode == 0 and out.stdout.startswith("ok"), out.stdout + out.stderr[-3000:]
    _, val_acc, pred_acc, cap, size = out.stdout.split()
    assert int(cap) < int(size)
    assert float(pred_acc) > 0.9  # the class shifts 1,024 values by +-1; measured here: 1.0
