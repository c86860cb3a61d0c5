"""Spec validation: the issue's example loads unchanged; every bad spec names its field."""

from __future__ import annotations

import pytest
import yaml

from colonnade.errors import SpecError
from colonnade.model.layers import plan_column
from colonnade.model.spec import load_spec, parse_spec

ISSUE_EXAMPLE = """
input: [64]                 # one sample: [features], [channels, length] or [channels, height, width]
column:                     # the template each column is built from, in order
  - {dense: 128}
  - {norm: batch}           # batch | layer
  - {act: relu}             # relu | gelu | tanh | sigmoid | leaky_relu
  - {dropout: 0.1}
  - {dense: 64}
  - {act: relu}
lateral: {kind: nonlinear, reduce: 0.5}   # kind: none | linear | nonlinear
train: {optimizer: adamw, lr: 0.001, weight_decay: 0.01, epochs: 30, batch_size: 64, patience: 5, seed: 0}
"""


def test_issue_example_loads_unchanged():
    spec = parse_spec(yaml.safe_load(ISSUE_EXAMPLE))
    assert spec.input == (64,)
    assert len(spec.column) == 6
    assert spec.lateral.kind == "nonlinear" and spec.lateral.reduce == 0.5
    assert spec.train.optimizer == "adamw" and spec.train.patience == 5
    plan = plan_column(spec)
    assert [b.pre_shape for b in plan.blocks] == [(128,), (64,)]


def test_round_trip_through_to_dict():
    spec = parse_spec(yaml.safe_load(ISSUE_EXAMPLE))
    assert parse_spec(spec.to_dict()) == spec


@pytest.mark.parametrize("path", ["specs/pump_spectra.yaml", "specs/mlp_linear.yaml",
                                  "specs/conv1d_spectra.yaml", "specs/conv2d_images.yaml"])
def test_example_specs_load(path):
    from pathlib import Path

    spec = load_spec(Path(__file__).parent.parent / path)
    assert plan_column(spec).out_shape[0] > 0


def _with(change: dict | None = None, layer: tuple[int, dict] | None = None) -> dict:
    raw = yaml.safe_load(ISSUE_EXAMPLE)
    if layer is not None:
        raw["column"][layer[0]] = layer[1]
    for key, value in (change or {}).items():
        section, _, field = key.partition(".")
        if field:
            raw[section][field] = value
        else:
            raw[section] = value
    return raw


CONV = {"input": [1, 32], "column": [{"conv1d": 4, "kernel": 3}, {"act": "relu"},
                                     {"pool": "global_avg"}, {"dense": 8}]}

BAD = [
    # the message the issue gives as its example
    (_with(layer=(2, {"conv1d": 4, "kernel": -3})),
     "column[2].kernel: expected a positive integer, got -3"),
    (dict(CONV, column=[{"conv1d": 4, "kernel": -3}, {"pool": "global_avg"}]),
     "column[0].kernel: expected a positive integer, got -3"),
    (dict(CONV, column=[{"conv1d": 4, "kernel": 3.5}, {"pool": "global_avg"}]),
     "column[0].kernel: expected a positive integer, got 3.5"),
    (dict(CONV, column=[{"conv1d": 4, "kernel": 99}, {"pool": "global_avg"}]),
     "column[0].kernel: 99 is larger than the padded input"),
    (_with(layer=(0, {"dense": 0})), "column[0].dense: expected a positive integer, got 0"),
    (_with(layer=(1, {"norm": "group"})),
     "column[1].norm: expected one of batch, layer, got 'group'"),
    (_with(layer=(2, {"act": "swish"})), "column[2].act: expected one of relu, gelu"),
    (_with(layer=(3, {"dropout": 1.5})), "column[3].dropout: expected a number in [0, 1)"),
    (_with(layer=(0, {"dense": 8, "units": 3})), "column[0].units: unknown key"),
    (_with(layer=(0, {"dense": 8, "act": "relu"})), "column[0]: expected exactly one layer"),
    (_with(layer=(0, {"bogus": 1})), "column[0]: unknown layer kind 'bogus'"),
    (_with(layer=(0, {"densee": 64})), "column[0]: unknown layer kind 'densee'; did you mean 'dense'?"),
    (_with(layer=(0, {"dense": 4, "conv1d": 4})), "column[0]: expected exactly one layer kind"),
    (_with(layer=(0, "dense")), "column[0]: expected a layer such as"),
    (_with({"lateral.kind": "quadratic"}), "lateral.kind: expected one of none, linear"),
    (_with({"lateral.reduce": 0}), "lateral.reduce: expected a number in (0, 1]"),
    (_with({"lateral.scale": 2}), "lateral.scale: unknown key"),
    (_with({"train.lr": -1}), "train.lr: expected a positive number, got -1"),
    (_with({"train.epochs": "ten"}), "train.epochs: expected a positive integer, got 'ten'"),
    (_with({"train.optimizer": "rmsprop"}), "train.optimizer: expected one of adamw"),
    (_with({"train.momentum": 0.9}), "train: momentum applies to optimizer sgd only"),
    (_with({"input": [0]}), "input[0]: expected a positive integer, got 0"),
    (_with({"input": [1, 2, 3, 4]}), "input: expected [features], [channels, length]"),
    (_with({"extra": 1}), "extra: unknown key"),
    (_with({"column": []}), "column: expected a non-empty list of layers"),
    (_with({"column": [{"act": "relu"}]}), "column: needs at least one dense"),
    ({"input": [3, 16], "column": [{"conv1d": 4}]}, "column: the last layer's output [4, 14]"),
    ({"input": [3, 16], "column": [{"dense": 4}]}, "column[0].dense: needs a flat input"),
    ({"input": [4], "column": [{"pool": "max"}, {"dense": 2}]}, "column[0]: max pooling needs"),
    ({"column": [{"dense": 2}]}, "input: required but missing"),
    ([1, 2], "spec: expected a mapping"),
]


@pytest.mark.parametrize("raw,message", BAD, ids=[m for _, m in BAD])
def test_bad_spec_names_the_field(raw, message):
    with pytest.raises(SpecError) as err:
        parse_spec(raw)
    text = str(err.value)
    assert text.startswith(message), text
    assert "\n" not in text


def test_unreadable_yaml(tmp_path):
    p = tmp_path / "s.yaml"
    p.write_text("input: [64\ncolumn: -", encoding="utf-8")
    with pytest.raises(SpecError, match="not valid YAML at line"):
        load_spec(p)


def test_yaml_tags_never_execute(tmp_path):
    # The safe loader refuses python object tags (PyYAML documentation, yaml.safe_load).
    p = tmp_path / "s.yaml"
    p.write_text("input: !!python/object/apply:os.system ['echo hi']\ncolumn: []\n")
    with pytest.raises(SpecError, match="not valid YAML"):
        load_spec(p)
