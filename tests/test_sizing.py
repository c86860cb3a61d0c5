"""Sizing: the projection against columns grown for real, counted by numel() and by
torch.utils.flop_counter; the growth rule's numbers; hardware profiles and verdicts."""

from __future__ import annotations

import copy
import json
from pathlib import Path

import pytest
import torch
from conftest import (  # FlopCounterMode's FLOPs / 2 (torch.utils.flop_counter)
    called_params,
    flop_macs,
)

from colonnade.cli import main
from colonnade.costing import costs, sizing, verdicts
from colonnade.costing.hardware import load_profile, parse_profile
from colonnade.errors import SpecError, UsageError
from colonnade.files import store
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import load_spec, parse_spec

SPECS = Path(__file__).parent.parent / "specs"
CATALOGUE = ["pump_spectra.yaml", "mlp_linear.yaml", "conv1d_spectra.yaml",
             "conv2d_images.yaml"]


def _spec(name: str, lateral: str):
    raw = load_spec(SPECS / name).to_dict()
    raw["lateral"]["kind"] = lateral
    return parse_spec(raw)


def _start(spec) -> ProgressiveNet:
    torch.manual_seed(0)
    net = ProgressiveNet(spec)
    net.add_column("a", 3, width=0.5, seed=0)
    net.freeze()
    net.add_column("b", 4, width=1.0, seed=1)
    net.freeze()
    return net


def _numel(params) -> int:
    return sum(p.numel() for p in params)


def _path_numel(net, task) -> int:
    """numel() of the parameters of the modules the task's forward calls (forward hooks)."""
    x = torch.zeros(1, *net.input_shape)
    return called_params(net, lambda: net(x, task=task))


def _float_buffers(net) -> int:
    return sum(b.numel() for b in net.buffers() if b.is_floating_point())


@pytest.mark.parametrize("name", CATALOGUE)
@pytest.mark.parametrize("lateral", ["none", "linear", "nonlinear"])
@pytest.mark.parametrize("mode,width", [("column", None), ("column", 0.75), ("head", None)])
def test_projection_equals_growing_for_real(name, lateral, mode, width):
    net = _start(_spec(name, lateral))
    n = 3
    proj = sizing.project(net, n, width=width, mode=mode, classes=5)
    real = copy.deepcopy(net)
    x = torch.randn(1, *net.input_shape)
    for p in proj.tasks:
        before = {id(q) for q in real.parameters()}
        if mode == "column":
            real.add_column(p.task, 5, width=width or 1.0, seed=0)
        else:
            real.add_head(p.task, 5, on=real.column_info[-1].task, seed=0)
        real.freeze()
        real.eval()
        # Sources: numel() of the grown modules; FlopCounterMode over the real forward.
        assert p.added.params == _numel(q for q in real.parameters() if id(q) not in before)
        assert p.path.params == _path_numel(real, p.task)
        assert p.path.macs == flop_macs(lambda t=p.task: real(x, task=t))
        assert p.network.params == _numel(real.parameters())
        assert p.network.float_buffers == _float_buffers(real)
        assert p.network_macs_all == flop_macs(lambda: real.forward_all(x))
        assert sum(p.added_by_part.values()) == p.added.params
        assert sum(p.path_macs_by_part.values()) == p.path.macs
        # Activation memory: the same rule on the real modules (projected from shapes).
        assert p.activation_elements == costs.task_cost(real, p.task).path.activation_elements


def test_growth_rule_is_linear_per_task_and_quadratic_in_total():
    """With equal widths, task k adds a + b*k and n columns hold n*a + b*n(n-1)/2."""
    net = ProgressiveNet(_spec("pump_spectra.yaml", "nonlinear"))
    proj = sizing.project(net, 6, classes=4)
    a, b = proj.rule.base.params, proj.rule.per_earlier_column.params
    assert b > 0
    for k, p in enumerate(proj.tasks):
        assert p.added.params == a + b * k
        n = k + 1
        assert p.network.params == n * a + b * n * (n - 1) // 2
    # The numbers of the rule, by hand from the pump spec (128 -> 128 -> 64, 4 classes):
    # column 128*128+128 + BN 2*128 + 128*64+64 = 25,024; head 64*4+4 = 260; so a = 25,284.
    # Nonlinear adapter into block 1 from 128 features: alpha 1 + V 128*64 + U 64*64 =
    # 12,289; into the head from 64 features: 1 + 64*32 + 32*4 = 2,177; so b = 14,466.
    assert (a, b) == (25_284, 14_466)
    text = proj.rule.text()
    assert "25,284" in text and "14,466" in text and "quadratic" in text


def test_projection_needs_classes_or_a_task():
    net = ProgressiveNet(_spec("mlp_linear.yaml", "linear"))
    with pytest.raises(UsageError, match="--classes"):
        sizing.project(net, 2)
    with pytest.raises(UsageError, match="from 0 to"):
        sizing.project(net, sizing.MAX_PROJECT + 1, classes=3)
    with pytest.raises(UsageError, match="head-only"):
        sizing.project(net, 2, mode="head", classes=3)


# ----------------------------------------------------------------------------- profiles
GOOD = {"name": "test-box", "weight_memory": "256 KiB", "activation_memory": "16 KiB",
        "mac_rate": "40 MMAC/s", "latency_budget": "10 ms", "dtype": "int8"}


def test_profiles_in_specs_load():
    names = sorted(p.stem for p in (SPECS / "hardware").glob("*.yaml"))
    assert len(names) >= 3
    for name in names:
        prof = load_profile(SPECS / "hardware" / f"{name}.yaml")
        assert prof.name == name
        assert prof.weight_memory > 0 and prof.mac_rate > 0


def test_profile_units():
    prof = parse_profile(GOOD)
    # IEC 80000-13: KiB = 1024 B; SI: M = 10^6.
    assert prof.weight_memory == 256 * 1024
    assert prof.mac_rate == 40e6
    assert prof.latency_budget == pytest.approx(0.010)
    assert parse_profile(dict(GOOD, weight_memory="2 MB")).weight_memory == 2_000_000


@pytest.mark.parametrize("change,words", [
    ({"flash": "1 MiB"}, "unknown field 'flash'"),
    ({"weight_memory": "0 KiB"}, "weight_memory: must be positive"),
    ({"activation_memory": "-4 KiB"}, "activation_memory: must be positive"),
    ({"latency_budget": "0 ms"}, "latency_budget: must be positive"),
    ({"weight_memory": "20 ms"}, "'ms' is not a unit of memory"),
    ({"mac_rate": "40 MHz"}, "'MHz' is not a unit of MAC rate"),
    ({"latency_budget": "10 KiB"}, "'KiB' is not a unit of time"),
    ({"weight_memory": 262144}, "needs a unit"),
    ({"dtype": "fp8"}, "dtype: expected one of fp32, fp16, bf16, int8"),
    ({"mac_rate": None}, "mac_rate: expected MAC rate"),
])
def test_bad_profiles_get_one_sentence(change, words):
    raw = {k: v for k, v in dict(GOOD, **change).items()}
    with pytest.raises(SpecError) as err:
        parse_profile(raw, "box.yaml")
    msg = str(err.value)
    assert words in msg and msg.startswith("box.yaml: ") and "\n" not in msg


def test_missing_field_and_not_a_mapping():
    raw = dict(GOOD)
    del raw["mac_rate"]
    with pytest.raises(SpecError, match="mac_rate is required"):
        parse_profile(raw)
    with pytest.raises(SpecError, match="expected a mapping"):
        parse_profile(["weight_memory"])
    with pytest.raises(SpecError, match="no such hardware profile"):
        load_profile("no-such-device-class")


# ----------------------------------------------------------------------------- verdicts
def test_first_break_matches_numel_by_hand():
    net = _start(_spec("pump_spectra.yaml", "nonlinear"))
    base = costs.ledger_of(net)
    proj = sizing.project(net, 6, classes=4, base=base)
    # Grow for real and find, from numel(), the first network too big for 300 KiB at int8
    # (one byte per element, IEEE-free); floating buffers count too, as the profile says.
    real = copy.deepcopy(net)
    needs = []
    for p in proj.tasks:
        real.add_column(p.task, 4, seed=0)
        real.freeze()
        needs.append(_numel(real.parameters()) + _float_buffers(real))
    budget = 300 * 1024
    expected = next(p.task for p, need in zip(proj.tasks, needs, strict=True) if need > budget)
    prof = parse_profile(dict(GOOD, weight_memory="300 KiB", activation_memory="1 MiB",
                              latency_budget="1 s"))
    rows = verdicts.verdicts(base, proj, prof)
    assert [v.task for v in rows] == net.tasks + [p.task for p in proj.tasks]
    assert all(v.fits for v in rows if not v.future)
    assert verdicts.first_break([v for v in rows if v.future]).task == expected
    broken = verdicts.first_break(rows)
    assert set(broken.over) == {"weight_memory"}
    assert broken.need.weight_bytes == needs[[p.task for p in proj.tasks].index(expected)]
    # Latency model: MACs / rate (stated in the docs), here 40 MMAC/s.
    assert rows[0].need.latency_ms == pytest.approx(base.tasks[0].path.macs / 40e6 * 1e3)


def test_options_are_priced():
    net = _start(_spec("pump_spectra.yaml", "nonlinear"))
    base = costs.ledger_of(net)
    prof = parse_profile(dict(GOOD, dtype="fp32", weight_memory="600 KiB",
                              activation_memory="1 MiB", latency_budget="1 s"))
    opts = {o.name: o for o in verdicts.price_options(net, base, 8, prof, classes=4)}
    assert {"width 0.75", "width 0.5", "width 0.25", "head only", "trim adapters",
            "dtype fp16", "dtype int8"} <= set(opts)
    plain = verdicts.verdicts(base, sizing.project(net, 8, classes=4, base=base), prof)
    # Narrower columns, fewer bytes: the last task's weight need shrinks with the width.
    w = [opts[f"width {f}"].last.weight_bytes for f in ("0.75", "0.5", "0.25")]
    assert plain[-1].need.weight_bytes > w[0] > w[1] > w[2]
    # Lower precision: exactly the element-size ratio (IEEE 754 binary16 vs binary32).
    assert opts["dtype fp16"].last.weight_bytes * 2 == plain[-1].need.weight_bytes
    assert opts["dtype int8"].last.weight_bytes * 4 == plain[-1].need.weight_bytes
    # No task trimmed yet: the trim option is the bound (no future adapters at all).
    assert opts["trim adapters"].status == ("bound" if verdicts.trim_available() else "pending")
    bound = sizing.project(net, 8, classes=4, base=base,
                           lateral=net.spec.lateral.model_copy(update={"kind": "none"}))
    assert opts["trim adapters"].last.weight_bytes == (
        bound.tasks[-1].network.params + bound.tasks[-1].network.float_buffers) * 4


@pytest.mark.skipif(not verdicts.trim_available(), reason="trimming is not in this colonnade")
def test_trim_option_uses_the_measured_rate():
    net = _start(_spec("pump_spectra.yaml", "nonlinear"))
    base = costs.ledger_of(net)
    lateral_b = base.tasks[1].added.adapters
    # As if a trim of task b had saved as many lateral parameters as are left: rate 1/2.
    net.meta["history"].append({"step": "adapter_pruned", "task": "b",
                                "adapters": ["c1_b1_from_c0"], "params_saved": lateral_b})
    assert verdicts.trimmed_fraction(net, base) == pytest.approx(0.5)
    prof = parse_profile(dict(GOOD, dtype="fp32", weight_memory="600 KiB",
                              activation_memory="1 MiB", latency_budget="1 s"))
    opt = {o.name: o for o in verdicts.price_options(net, base, 5, prof, classes=4)}[
        "trim adapters"]
    assert opt.status == "available" and "50%" in opt.what
    full = sizing.project(net, 5, classes=4, base=base)
    halved_lateral = sum(p.added_by_part["adapters"] for p in full.tasks) / 2
    expected = (full.tasks[-1].network.params + full.tasks[-1].network.float_buffers
                - halved_lateral) * 4
    # Each future task rounds its block and head adapter shares once: at most 1 element each.
    assert abs(opt.last.weight_bytes - expected) <= 2 * 5 * 4


# ----------------------------------------------------------------------------- CLI
@pytest.fixture(scope="module")
def workspace(tmp_path_factory):
    folder = tmp_path_factory.mktemp("ws") / "ws"
    net = store.create(SPECS / "pump_spectra.yaml", folder)
    net.add_column("a", 3, seed=0)
    net.freeze()
    net.add_column("b", 4, seed=1)
    net.freeze()
    store.save(net, folder)
    return folder


def test_cost_json_has_the_documented_keys(workspace, capsys):
    assert main(["cost", str(workspace), "--json", "--repeats", "2"]) == 0
    data = json.loads(capsys.readouterr().out)
    net = store.load(workspace)
    assert [t["task"] for t in data["tasks"]] == ["a", "b"]
    for t in data["tasks"]:
        assert {"task", "params_added", "params_path", "macs", "weight_bytes",
                "activation_bytes", "latency_ms"} <= set(t)
        assert {"fp32", "fp16", "int8"} <= set(t["weight_bytes"])
        assert set(t["latency_ms"]) == {"batch_1", "batch_64"}
        for lat in t["latency_ms"].values():  # measured: shapes of the record, no timing
            assert {"median", "q1", "q3", "min", "max", "repeats"} <= set(lat)
            assert lat["repeats"] == 2
    assert sum(t["params_added"] for t in data["tasks"]) == data["total"]["params"] == _numel(
        net.parameters())  # source: numel()
    x = torch.randn(1, *net.input_shape)
    assert data["total"]["macs"] == flop_macs(lambda: net.forward_all(x))


def test_cost_cli_project_and_hardware(workspace, capsys):
    assert main(["cost", str(workspace), "--project", "4", "--width", "0.5", "--hardware",
                 str(SPECS / "hardware" / "vibe-node.yaml"), "--no-latency", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert len(data["projection"]["tasks"]) == 4
    assert {p["width"] for p in data["projection"]["tasks"]} == {0.5}
    hw = data["hardware"]
    assert len(hw["verdicts"]) == 6 and hw["profile"]["dtype"] == "int8"
    assert main(["cost", str(workspace), "--project", "3", "--hardware", "vibe-node",
                 "--no-latency"]) == 0
    out = capsys.readouterr().out
    assert "projection: each future task adds" in out and "device vibe-node" in out


@pytest.mark.parametrize("argv,words", [
    (["--width", "0.5"], "use it with --project N"),
    (["--hardware", "no-such-box"], "no such hardware profile"),
    (["--project", "1000"], "from 0 to"),
])
def test_cost_cli_bad_input_one_sentence(workspace, capsys, argv, words):
    assert main(["cost", str(workspace), "--no-latency", *argv]) == 2
    err = capsys.readouterr().err.strip()
    assert words in err and err.count("\n") == 0 and "Traceback" not in err


def test_cost_cli_bad_profile_file(workspace, tmp_path, capsys):
    bad = tmp_path / "box.yaml"
    bad.write_text("name: box\nweight_memory: 1 MiB\nactivation_memory: 10 ms\n"
                   "mac_rate: 1 GMAC/s\nlatency_budget: 5 ms\n")
    assert main(["cost", str(workspace), "--hardware", str(bad), "--no-latency"]) == 2
    err = capsys.readouterr().err.strip()
    assert "activation_memory" in err and "'ms' is not a unit of memory" in err
    assert err.count("\n") == 0


def test_projection_without_a_manifest_rebuild(monkeypatch):
    """Adapter kinds that cannot be rebuilt from the manifest alone still project."""
    net = _start(_spec("conv1d_spectra.yaml", "nonlinear"))
    expected = sizing.project(net, 2, classes=3)

    def refuse(*args, **kwargs):
        raise ValueError("no rebuild")

    monkeypatch.setattr(ProgressiveNet, "from_architecture", refuse)
    again = sizing.project(net, 2, classes=3)
    assert [p.activation_elements for p in again.tasks] == [
        p.activation_elements for p in expected.tasks]
    assert all(p.device.type == "cpu" for p in net.parameters())  # the original is untouched
