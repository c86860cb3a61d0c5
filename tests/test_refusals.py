"""Refusals a user meets every day: each one sentence, a non-zero exit, nothing written.

Outside references: PyYAML's own line numbering (``yaml.compose`` marks) for the lines a
duplicate key sits on, and argparse's own usage text for the verb's short usage line.
"""

from __future__ import annotations

import numpy as np
import pytest
import yaml
from conftest import snapshot

from colonnade.cli import main
from colonnade.costing.hardware import load_profile
from colonnade.errors import SpecError
from colonnade.model.spec import load_spec

GOOD = """name: small
input: [4]
column:
  - {dense: 8}
  - {act: relu}
  - {dense: 3}
lateral: {kind: linear}
train: {epochs: 1}
"""


def _one_sentence(err: str) -> str:
    lines = [ln for ln in err.strip().splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert "Traceback" not in err
    return lines[0]


def test_unknown_layer_kind_names_the_nearest(tmp_path, capsys):
    spec = tmp_path / "s.yaml"
    spec.write_text(GOOD.replace("{dense: 8}", "{densee: 8}"))
    assert main(["new", str(spec), "-o", str(tmp_path / "ws")]) != 0
    line = _one_sentence(capsys.readouterr().err)
    assert "column[0]: unknown layer kind 'densee'; did you mean 'dense'?" in line
    assert not (tmp_path / "ws").exists()


def test_duplicate_key_names_the_key_and_both_lines(tmp_path, capsys):
    text = GOOD.replace("lateral: {kind: linear}\n", "lateral: {kind: linear}\nname: again\n")
    spec = tmp_path / "s.yaml"
    spec.write_text(text)
    # Source: PyYAML's own marks for where each 'name' key starts.
    root = yaml.compose(text)
    lines = [k.start_mark.line + 1 for k, _ in root.value if k.value == "name"]
    assert len(lines) == 2
    with pytest.raises(SpecError) as err:
        load_spec(spec)
    assert f"key 'name' appears twice, at line {lines[0]} and line {lines[1]}" in str(err.value)
    assert main(["new", str(spec), "-o", str(tmp_path / "ws")]) != 0
    _one_sentence(capsys.readouterr().err)
    assert not (tmp_path / "ws").exists()


def test_duplicate_key_in_a_hardware_profile(tmp_path):
    profile = tmp_path / "p.yaml"
    profile.write_text("name: a\nweight_memory: 1 MB\nweight_memory: 2 MB\n")
    with pytest.raises(SpecError, match="key 'weight_memory' appears twice, at line 2 and "
                                        "line 3"):
        load_profile(profile)


@pytest.mark.parametrize("opening", ["[", "{a: "])
def test_deep_nesting_is_one_sentence(tmp_path, capsys, opening):
    closing = "]" if opening == "[" else "}"
    spec = tmp_path / "s.yaml"
    spec.write_text("input: " + opening * 5000 + "1" + closing * 5000 + "\n")
    assert main(["new", str(spec), "-o", str(tmp_path / "ws")]) != 0
    line = _one_sentence(capsys.readouterr().err)
    assert "nested more than" in line and "RecursionError" not in line


def test_argparse_error_is_one_sentence_and_the_usage_line(tmp_path, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["grow", str(tmp_path), "--task", "a", "--train", "x.npz", "--width", "abc"])
    assert exc.value.code == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 2, lines
    assert lines[0] == "colonnade grow: error: argument --width: expected a positive number, " \
                       "got 'abc'"
    # Source: argparse's own usage line names the verb's required arguments.
    assert lines[1].startswith("usage: colonnade grow WORKSPACE --task TASK --train TRAIN")


def test_too_small_width_is_refused(tmp_path, capsys):
    spec = tmp_path / "s.yaml"
    spec.write_text(GOOD)
    ws = tmp_path / "ws"
    assert main(["new", str(spec), "-o", str(ws)]) == 0
    g = np.random.default_rng(0)
    np.savez(tmp_path / "d.npz", x=g.normal(size=(30, 4)).astype(np.float32),
             y=np.arange(30) % 3)
    before = snapshot(ws)
    capsys.readouterr()
    # 8 units at width 0.05 round to 0 (round(0.4) == 0): no units at all.
    assert main(["grow", str(ws), "--task", "a", "--train", str(tmp_path / "d.npz"),
                 "--width", "0.05", "--quiet"]) != 0
    line = _one_sentence(capsys.readouterr().err)
    assert "--width 0.05 leaves column[0] (8 units) with no units" in line
    assert snapshot(ws) == before
