"""Checks for the synthetic pump demo data (examples/pump_data.py)."""

import importlib.util
import pathlib

import numpy as np
import pytest

_PATH = pathlib.Path(__file__).resolve().parents[1] / "examples" / "pump_data.py"
_spec = importlib.util.spec_from_file_location("pump_data", _PATH)
pump_data = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(pump_data)


@pytest.mark.parametrize("name", list(pump_data.TASKS))
def test_shapes_dtypes_balance_finite(name):
    x, y = pump_data.make_task(name, 200, seed=3)
    k = len(pump_data.TASKS[name]["classes"])
    assert x.shape == (200, 128) and x.dtype == np.float32
    assert y.shape == (200,) and y.dtype == np.int64
    assert np.isfinite(x).all()
    counts = np.bincount(y, minlength=k)
    assert len(counts) == k and counts.max() - counts.min() <= 1


def test_deterministic_for_seed_and_streams_differ():
    a = pump_data.make_task("pump_b_faults", 100, seed=5)
    b = pump_data.make_task("pump_b_faults", 100, seed=5)
    c = pump_data.make_task("pump_b_faults", 100, seed=6)
    d = pump_data.make_task("pump_b_faults", 100, seed=5, stream=1)
    assert np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1])
    assert not np.array_equal(a[0], c[0])
    assert not np.array_equal(a[0], d[0])


@pytest.mark.parametrize("name", ["pump_a_faults", "pump_b_faults"])
def test_imbalance_peak_at_running_speed(name):
    x, y = pump_data.make_task(name, 400, seed=0)
    rpm = pump_data.MODELS[pump_data.TASKS[name]["model"]]["rpm"]
    expected = int(round(rpm / 60.0 / pump_data.DF))  # frequency = rpm / 60
    excess = x[y == 1].mean(axis=0) - x[y == 0].mean(axis=0)
    assert int(np.argmax(excess)) == expected


def test_bad_inputs_raise():
    with pytest.raises(ValueError):
        pump_data.make_task("no_such_task", 10, seed=0)
    with pytest.raises(ValueError):
        pump_data.make_task("pump_a_faults", 3, seed=0)


def test_write_task_files(tmp_path):
    paths = pump_data.write_task_files(tmp_path, "pump_a_cavitation", 40, 20, seed=1)
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "pump_a_cavitation.npz",
        "pump_a_cavitation_probe.npz",
    ]
    with np.load(paths["train"]) as t, np.load(paths["probe"]) as p:
        assert t["x"].shape == (40, 128) and p["x"].shape == (20, 128)
        rows = {r.tobytes() for r in t["x"]}
        assert not any(r.tobytes() in rows for r in p["x"])


def test_cli_rejects_bad_count(tmp_path, capsys):
    assert pump_data.main(["--out", str(tmp_path), "--train", "4", "--probe", "4"]) == 0
    with pytest.raises(SystemExit) as e:
        pump_data.main(["--out", str(tmp_path), "--train", "0"])
    assert e.value.code == 2
    assert capsys.readouterr().err.count("\n") == 1


def test_class_folders_hold_the_same_spectra_as_the_arrays(tmp_path):
    from colonnade.training.data import load_task_data

    paths = pump_data.write_task_folders(str(tmp_path), "pump_a_cavitation", 12, 4, seed=2)
    x, y = pump_data.make_task("pump_a_cavitation", 12, seed=2)
    data = load_task_data(paths["train"], (128,), split=False)
    names = pump_data.TASKS["pump_a_cavitation"]["classes"]
    assert data.class_names == sorted(names)
    # Reference: the arrays themselves, each .npy read back by numpy.
    for i, sample in enumerate(data.ids):
        k = int(pathlib.Path(sample).stem)
        assert np.array_equal(np.load(sample), x[k])
        assert np.array_equal(data.x[i].numpy(), x[k])
        assert data.class_names[int(data.y[i])] == names[y[k]]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["pump_a_cavitation",
                                                          "pump_a_cavitation_probe"]
