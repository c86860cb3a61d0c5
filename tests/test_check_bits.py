"""``exact`` means bit-identical logits; values equal but bits not (+0.0 against -0.0)
pass only ``within T``.

Outside reference: IEEE 754 signed zeros (-0.0 == +0.0 in value, different sign bit),
read through Python's ``struct`` byte packing.
"""

from __future__ import annotations

import struct

import torch

from colonnade.evidence.seal import Probe, entry_digest, seal_task
from colonnade.evidence.verify import check_net
from colonnade.model.digest import tensor_digest
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec


def _sealed_with_signed_zero_reference():
    torch.manual_seed(0)
    net = ProgressiveNet(parse_spec({"input": [4], "column": [{"dense": 3}],
                                     "lateral": {"kind": "none"}}))
    net.add_column("t", 2, seed=0)
    net.freeze()
    with torch.no_grad():  # every logit is exactly +0.0
        net.heads["t"].weight.zero_()
        net.heads["t"].bias.zero_()
    probe = Probe(torch.randn(5, 4), torch.tensor([0, 1, 0, 1, 0]), "0" * 64, "probe.npz")
    entry = seal_task(net, "t", probe)
    key = entry["reference"]["key"]
    stored = net.attachments["seals.safetensors"][key]
    flipped = -stored  # every +0.0 becomes -0.0
    # Source: IEEE 754 signed zero, equal in value, different in bytes.
    assert torch.equal(flipped, stored)
    assert struct.pack("<f", 0.0) != struct.pack("<f", float(flipped[0, 0]))
    net.attachments["seals.safetensors"][key] = flipped
    entry["reference"]["sha256"] = tensor_digest(key, flipped)
    entry["entry_sha256"] = entry_digest(entry)
    return net, probe


def test_equal_values_in_other_bits_are_not_exact():
    net, probe = _sealed_with_signed_zero_reference()
    assert check_net(net, {"t": probe}, tolerance=0.1).tasks[0].verdict == "within 0.1"
    assert check_net(net, {"t": probe}).tasks[0].verdict == "moved"
