"""Architecture graph and diagrams, checked against the network's own modules and graphviz.

Outside references: ``named_modules()`` and ``numel()`` of the torch modules,
``torch.utils.flop_counter.FlopCounterMode`` for MACs (counted FLOPs / 2),
forward hooks on the modules torch calls for what a task runs, graphviz's own ``dot`` program (it must
accept every DOT source without a single warning), and ``xml.etree`` for the SVG.
Networks are grown with ``add_column`` / ``add_head`` and frozen, without training, so
the whole file runs in seconds.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import xml.etree.ElementTree as ET

import networkx as nx
import pytest
import torch
from conftest import called_modules, flop_macs  # forward hooks; FlopCounterMode FLOPs / 2

import colonnade
from colonnade.app.views import render
from colonnade.cli import main
from colonnade.evidence import seal
from colonnade.files.store import create, load, save
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec
from colonnade.views.draw import GraphvizMissingError, to_dot
from colonnade.views.graph import build_graph, column_graph

DOT = shutil.which("dot")
needs_dot = pytest.mark.skipif(DOT is None, reason="graphviz's dot program is not installed "
                                                   "(Debian: apt-get install graphviz)")
SVG = "{http://www.w3.org/2000/svg}"

DENSE = {"name": "tiny-dense", "input": [16],
         "column": [{"dense": 12}, {"norm": "batch"}, {"act": "relu"}, {"dropout": 0.1},
                    {"dense": 8}, {"act": "relu"}],
         "lateral": {"kind": "nonlinear", "reduce": 0.5}}
CONV1D = {"name": "tiny-conv1d", "input": [1, 24],
          "column": [{"conv1d": 4, "kernel": 3, "stride": 2, "padding": 1}, {"norm": "batch"},
                     {"act": "relu"}, {"pool": "max", "size": 2},
                     {"conv1d": 6, "kernel": 3, "padding": 1}, {"act": "gelu"},
                     {"pool": "global_avg"}, {"dense": 5}, {"act": "tanh"}],
          "lateral": {"kind": "linear"}}
STEM = {"name": "tiny-stem", "input": [1, 4, 4],  # a flatten before the first weighted layer
        "column": [{"flatten": True}, {"dense": 10}, {"act": "relu"}, {"dense": 6}],
        "lateral": {"kind": "nonlinear"}}
CONV2D = {"name": "tiny-conv2d", "input": [1, 6, 6],
          "column": [{"conv2d": 3, "kernel": 3, "padding": 1}, {"norm": "layer"},
                     {"act": "relu"}, {"pool": "avg", "size": 2}, {"conv2d": 4, "kernel": 3},
                     {"flatten": True}, {"dense": 5}],
          "lateral": {"kind": "linear"}}
NONE = {"name": "independent", "input": [8], "column": [{"dense": 6}, {"act": "relu"}],
        "lateral": {"kind": "none"}}
SPECS = {"dense": DENSE, "conv1d": CONV1D, "stem": STEM, "conv2d": CONV2D, "none": NONE}


def grown(spec: dict, n: int, head_task: bool = False, train_last: bool = False,
          ) -> ProgressiveNet:
    """n column tasks (column 1 half wide), optionally a head task on column 0; untrained."""
    torch.manual_seed(0)
    net = ProgressiveNet(parse_spec(spec))
    for i in range(n):
        net.add_column(f"t{i}", 3 + i % 2, width=0.5 if i == 1 else 1.0, seed=i)
        net.freeze()
    if head_task:
        net.add_head("extra", 2, on="t0", seed=99)
        net.freeze()
    if train_last:  # the newest parts stay trainable, as right after add_column
        net.add_column(f"t{n}", 3, seed=n)
    return net


def prune(net: ProgressiveNet, key: str) -> None:
    """Prune one adapter the way trimming does: state 'pruned', module gone, reindex."""
    net.adapter_info[key].state = "pruned"
    del net.adapters[key]
    net._reindex()


def cut_off_column_1(net: ProgressiveNet) -> list[str]:
    """Adapters from column 1 into columns 2 and 3 and their heads."""
    return [k for k, a in net.adapter_info.items()
            if a.source == 1 and (a.column in (2, 3) or a.head in ("t2", "t3"))]


def seal_task(net: ProgressiveNet, task: str) -> None:
    g = torch.Generator().manual_seed(1)
    x = torch.randn(8, *net.input_shape, generator=g)
    y = torch.arange(8) % net.task_info[task].classes
    seal.seal_task(net, task, seal.Probe(x, y, "0" * 64, "probe.npz"))


def layer_modules(net: ProgressiveNet) -> set[str]:
    """Every layer of every column, by module name, as torch lists them."""
    pattern = re.compile(r"columns\.\d+\.(stem\.\d+|blocks\.\d+\.weighted|blocks\.\d+\.post\.\d+)")
    return {name for name, _ in net.named_modules() if pattern.fullmatch(name)}


def run_dot(source: str, fmt: str = "xdot") -> subprocess.CompletedProcess:
    return subprocess.run([DOT, f"-T{fmt}"], input=source.encode(), capture_output=True,
                          timeout=120, check=False)


def svg_of(net: ProgressiveNet, **kw) -> ET.Element:
    done = run_dot(to_dot(net, **kw).source, "svg")
    assert done.returncode == 0 and done.stderr == b"", done.stderr.decode()
    return ET.fromstring(done.stdout)  # xml.etree: the SVG is well-formed XML


def svg_groups(root: ET.Element) -> dict[str, set[str]]:
    """SVG group id -> its classes, for every node and edge group dot wrote."""
    out = {}
    for g in root.iter(SVG + "g"):
        classes = set((g.get("class") or "").split())
        if classes & {"node", "edge"}:
            out[g.get("id")] = classes
    return out


# ----------------------------------------------------------------------------- the graph
@pytest.mark.parametrize("name", sorted(SPECS))
def test_graph_agrees_with_modules(name):
    net = grown(SPECS[name], 3, head_task=True, train_last=True)
    G = build_graph(net)
    layers = {n: d for n, d in G.nodes(data=True) if d["kind"] == "layer"}
    heads = {n: d for n, d in G.nodes(data=True) if d["kind"] == "head"}
    # Every column layer and head, and nothing else (source: torch's named_modules).
    assert {d["module"] for d in layers.values()} == layer_modules(net)
    assert {d["task"] for d in heads.values()} == set(net.heads)
    assert G.number_of_nodes() == 1 + len(layer_modules(net)) + len(net.heads)
    # Every live adapter is one lateral edge; every adapter on record appears.
    lateral = [d for _u, _v, d in G.edges(data=True) if d["role"] == "lateral"]
    assert {d["key"] for d in lateral if d["state"] == "live"} == set(net.adapters)
    assert len(lateral) == len(net.adapter_info)
    forward = [d for _u, _v, d in G.edges(data=True) if d["role"] == "forward"]
    assert len(forward) == len(layers) + len(heads)  # one way in for each layer and head
    # Parameters: per node against numel of the module, in total against the network.
    modules = dict(net.named_modules())
    for d in list(layers.values()) + list(heads.values()):
        assert d["params"] == sum(p.numel() for p in modules[d["module"]].parameters())
        assert d["buffers"] == sum(b.numel() for b in modules[d["module"]].buffers())
    for d in lateral:
        assert d["params"] == sum(p.numel() for p in net.adapters[d["key"]].parameters())
    total = sum(d["params"] for _n, d in G.nodes(data=True)) + sum(d["params"] for d in lateral)
    assert total == sum(p.numel() for p in net.parameters())
    # Frozen flags against requires_grad: only the newest task's parts are trainable.
    for d in list(layers.values()) + list(heads.values()) + lateral:
        module = modules[d["module"]]
        grads = {p.requires_grad for p in module.parameters()}
        if grads:
            assert grads == {not d["frozen"]}, d
    assert any(not d["frozen"] for d in layers.values())
    # New parts never feed old ones (DESIGN invariant 1): a DAG, laterals old to new.
    assert nx.is_directed_acyclic_graph(G)
    for u, v, d in G.edges(data=True):
        if d["role"] == "lateral":
            assert G.nodes[u]["column"] < G.nodes[v]["column"] or G.nodes[v]["kind"] == "head"
            assert G.nodes[u]["column"] == d["source"]


@pytest.mark.parametrize("name", sorted(SPECS))
def test_macs_match_torch_flop_counter(name):
    net = grown(SPECS[name], 3, head_task=True)
    G = build_graph(net)
    x = torch.zeros(1, *net.input_shape)
    # The whole network in one pass: every node and edge, against FlopCounterMode.
    total = (sum(d["macs"] for _n, d in G.nodes(data=True))
             + sum(d["macs"] for _u, _v, d in G.edges(data=True) if d["role"] == "lateral"))
    with torch.no_grad():
        assert total == flop_macs(lambda: net.forward_all(x))
        for task in net.tasks:
            c = net.closure(task)
            path = (sum(d["macs"] for _n, d in G.nodes(data=True)
                        if d.get("column") in c.columns and d["kind"] == "layer")
                    + G.nodes[f"head_{task}"]["macs"]
                    + sum(G.graph["adapters"][k]["macs"] for k in c.adapters))
            assert path == flop_macs(lambda t=task: net(x, task=t))



def _called_layers(net, run) -> set[str]:
    """Column layers (stem, weighted, post) that torch calls while ``run()`` runs."""
    pattern = re.compile(r"columns\.\d+\.(stem\.\d+|blocks\.\d+\.(weighted|post\.\d+))")
    return {m for m in called_modules(net, run) if pattern.fullmatch(m)}

@pytest.mark.parametrize("name", ["dense", "conv1d"])
def test_graph_reaches_exactly_the_closure(name):
    net = grown(SPECS[name], 4, head_task=True)
    for key in cut_off_column_1(net):
        prune(net, key)  # column 1 no longer reaches task t3, directly or through column 2
    G = build_graph(net)
    live = nx.DiGraph((u, v) for u, v, d in G.edges(data=True)
                      if d["role"] == "forward" or d["state"] == "live")
    x = torch.zeros(2, *net.input_shape)
    for task in net.tasks:
        ancestors = nx.ancestors(live, f"head_{task}")
        layers = {G.nodes[a]["module"] for a in ancestors if G.nodes[a]["kind"] == "layer"}
        # Source: forward hooks on the layers torch really calls for the task.
        assert layers == _called_layers(net, lambda t=task: net(x, task=t))
    assert not any(G.nodes[a].get("column") == 1 for a in nx.ancestors(live, "head_t3"))


def test_pruned_and_merged_states_and_joint_adapters():
    from colonnade.trimming.merge import fit_joint, install_joint

    net = grown(DENSE, 3)
    prune(net, "c2_b1_from_c0")
    G = build_graph(net)
    e = G.edges["c0_b0_3", "c2_b1_0"]
    assert e["state"] == "pruned" and e["params"] == 0 and e["macs"] == 0
    # A joint adapter over columns 0 and 1 into task t2's head replaces two adapters.
    net = grown(DENSE, 3)
    net._make_trainable(["head:t2", "adapter:h_t2_from_c0", "adapter:h_t2_from_c1"])
    keys = ["h_t2_from_c0", "h_t2_from_c1"]
    fit = fit_joint(net, "t2", keys, torch.randn(64, 16, generator=torch.Generator().manual_seed(0)))
    joint, _ = install_joint(net, fit, fit.full_rank)
    G = build_graph(net)
    edges = [(u, v, d) for u, v, d in G.edges(data=True) if d.get("key") == joint]
    assert sorted(G.nodes[u]["column"] for u, _v, _d in edges) == [0, 1]
    assert all(d["state"] == "live" and d["kind"] == "joint" for _u, _v, d in edges)
    assert sorted(k for _u, _v, d in edges for k in d["replaces"]) == keys
    assert {G.graph["adapters"][k]["state"] for k in keys} == {"merged"}
    lateral = sum(d["params"] for _u, _v, d in G.edges(data=True) if d["role"] == "lateral")
    assert lateral == sum(p.numel() for a in net.adapters.values() for p in a.parameters())
    if DOT:
        for compact in (False, True):
            done = run_dot(to_dot(net, compact=compact, show_removed=True).source)
            assert done.returncode == 0 and done.stderr == b"", done.stderr.decode()


def test_sealed_and_usage_attributes():
    net = grown(DENSE, 3)
    seal_task(net, "t1")
    net.adapter_info["c2_b1_from_c1"].extra["usage"] = {"score": 0.25}  # as usage.py records
    net.meta["usage"] = {"t2": {"adapters": {"h_t2_from_c0": {"score": 0.5}}}}
    G = build_graph(net)
    closure = net.closure("t1")
    assert G.graph["sealed"] == ["t1"]
    for n, d in G.nodes(data=True):
        if d["kind"] == "layer":
            assert d["sealed"] == (d["column"] in closure.columns), n
            assert d["sealed_by"] == (["t1"] if d["sealed"] else [])
        elif d["kind"] == "head":
            assert d["sealed"] == (d["task"] == "t1")
    for _u, _v, d in G.edges(data=True):
        if d["role"] == "lateral":
            assert d["sealed"] == (d["key"] in closure.adapters)
    usage = {d["key"]: d["usage"] for _u, _v, d in G.edges(data=True) if d["role"] == "lateral"}
    assert usage.pop("c2_b1_from_c1") == 0.25 and usage.pop("h_t2_from_c0") == 0.5
    assert set(usage.values()) == {None}


def test_colonnade_graph_is_the_callable_module():
    import importlib

    net = grown(DENSE, 2)
    G = colonnade.graph(net)
    assert isinstance(G, nx.DiGraph)
    assert nx.utils.graphs_equal(G, colonnade.build_graph(net))
    assert importlib.import_module("colonnade.views.graph") is colonnade.graph


def test_column_graph_bundles_pairs():
    net = grown(DENSE, 4, head_task=True)
    prune(net, "c3_b1_from_c2")
    prune(net, "h_t3_from_c2")
    C = column_graph(build_graph(net))
    pairs = {}
    for key, a in net.adapter_info.items():
        if a.state == "live":
            target = a.column if a.head is None else net.task_info[a.head].column
            pairs.setdefault((a.source, target), []).append(key)
    bundles = {(C.nodes[u]["column"], C.nodes[v]["column"]): d
               for u, v, d in C.edges(data=True) if d["role"] == "lateral" and d["count"]}
    assert {p: sorted(k) for p, k in pairs.items()} == {p: sorted(d["keys"]) for p, d in
                                                         bundles.items()}
    for d in bundles.values():
        assert d["params"] == sum(p.numel() for key in d["keys"]
                                  for p in net.adapters[key].parameters())
    assert C.edges["c2", "c3"]["count"] == 0 and C.edges["c2", "c3"]["removed"] == 2


# ----------------------------------------------------------------------------- DOT and SVG
@needs_dot
@pytest.mark.parametrize("compact", [False, True], ids=["full", "compact"])
@pytest.mark.parametrize("n", range(1, 13))
def test_dot_accepts_the_source_without_warnings(n, compact):
    net = grown(DENSE, n, head_task=n % 3 == 0, train_last=n % 4 == 0)
    if n >= 3:
        seal_task(net, "t0")
        prune(net, "c2_b1_from_c0")
    # Source: graphviz's own parser and layout (dot -Txdot), which must print nothing.
    done = run_dot(to_dot(net, compact=compact, show_removed=n % 2 == 0).source)
    assert done.returncode == 0, done.stderr.decode()
    assert done.stderr == b"", done.stderr.decode()


@needs_dot
@pytest.mark.parametrize("direction", ["BT", "TB", "LR", "RL"])
@pytest.mark.parametrize("name", sorted(SPECS))
def test_every_spec_and_direction_renders_cleanly(name, direction):
    net = grown(SPECS[name], 3, head_task=True)
    seal_task(net, "t0")
    for compact in (False, True):
        for task in (None, "extra"):
            done = run_dot(to_dot(net, compact=compact, task=task, direction=direction).source)
            assert done.returncode == 0 and done.stderr == b"", done.stderr.decode()


@needs_dot
def test_svg_nodes_and_edges_are_the_graph():
    net = grown(CONV1D, 3, head_task=True)
    prune(net, "c2_b1_from_c1")
    G = build_graph(net)
    groups = svg_groups(svg_of(net))
    nodes = {i for i, c in groups.items() if c & {"layer", "head", "input"}}
    assert nodes == set(G.nodes)
    drawn = {i.removeprefix("lateral:") for i, c in groups.items() if "lateral" in c}
    assert drawn == set(net.adapters)  # live adapters only; the pruned one is hidden
    forward = {i for i, c in groups.items() if "forward" in c}
    assert forward == {f"forward:{u}:{v}" for u, v, d in G.edges(data=True)
                       if d["role"] == "forward"}
    shown = svg_groups(svg_of(net, show_removed=True))
    assert "pruned" in shown["lateral:c2_b1_from_c1"]


@needs_dot
@pytest.mark.parametrize("compact", [False, True], ids=["full", "compact"])
def test_focus_highlights_exactly_the_closure(compact):
    net = grown(DENSE, 4, head_task=True)
    for key in cut_off_column_1(net):
        prune(net, key)
    G = build_graph(net)
    x = torch.zeros(2, *net.input_shape)
    for task in net.tasks:
        c = net.closure(task)
        runs = _called_layers(net, lambda t=task: net(x, task=t))  # source: forward hooks
        groups = svg_groups(svg_of(net, task=task, compact=compact))
        focus = {i for i, cl in groups.items() if "focus" in cl}
        faded = {i for i, cl in groups.items() if "faded" in cl}
        assert not focus & faded
        if not compact:
            want = ({n for n, d in G.nodes(data=True)
                     if d["kind"] == "layer" and d["module"] in runs}
                    | {"input", f"head_{task}"})
            assert {i for i in focus if groups[i] & {"layer", "head", "input"}} == want
            assert {i.removeprefix("lateral:") for i in focus if "lateral" in groups[i]} == set(
                c.adapters)
            assert {i for i in faded if "layer" in groups[i]} == {
                n for n, d in G.nodes(data=True) if d["kind"] == "layer"} - want
        else:
            assert {i for i in focus if "column" in groups[i]} == {f"c{k}" for k in c.columns}
            assert {i for i in focus if "input" in groups[i]} == {"input"}  # drawn once
            assert {i for i in focus if "input-bus" in groups[i] and i.startswith("bus_c")} == {
                f"bus_c{k}" for k in c.columns}
            assert {i for i in focus if "forward" in groups[i]} == {f"forward:input:c{k}"
                                                                   for k in c.columns}
            pairs = set()
            for key in c.adapters:
                a = net.adapter_info[key]
                target = a.column if a.head is None else net.task_info[a.head].column
                pairs.add(f"bundle:c{a.source}:c{target}")
            assert {i for i in focus if "bundle" in groups[i]} == pairs


@needs_dot
def test_compact_bundles_are_labelled_per_pair():
    net = grown(DENSE, 5)
    prune(net, "c4_b1_from_c0")
    root = svg_of(net, compact=True)
    cells = {}
    for g in root.iter(SVG + "g"):
        if "bundle" in (g.get("class") or "").split():
            cells[g.get("id")] = " ".join(t.text or "" for t in g.iter(SVG + "text"))
    expected = {}
    for key, a in net.adapter_info.items():
        if a.state == "live":
            target = a.column if a.head is None else net.task_info[a.head].column
            expected.setdefault(f"bundle:c{a.source}:c{target}", []).append(key)
    assert set(cells) == set(expected)  # one labelled bundle per pair, nothing else
    for cell, keys in expected.items():
        params = sum(p.numel() for k in keys for p in net.adapters[k].parameters())
        assert cells[cell].startswith(f"{len(keys)} nonlinear"), cells[cell]
        assert f"{params} params" in cells[cell] or f"{params / 1000:.3g}k params" in cells[cell]


def legend_text(root: ET.Element) -> str:
    """Every text of the legend node in an SVG, joined."""
    for g in root.iter(SVG + "g"):
        if g.get("id") == "legend":
            return " ".join(t.text or "" for t in g.iter(SVG + "text"))
    raise AssertionError("no legend in the drawing")


@needs_dot
@pytest.mark.parametrize("compact", [False, True], ids=["full", "compact"])
def test_legend_lists_only_what_is_drawn(compact):
    # Everything frozen and sealed: no TRAINABLE, no dashed trainable adapter, no usage.
    net = grown(DENSE, 3)
    for t in net.tasks:
        seal_task(net, t)
    text = legend_text(svg_of(net, compact=compact))
    assert "SEALED" in text and "sealed adapter" in text and "nonlinear adapter" in text
    for absent in ("TRAINABLE", "FROZEN", "trainable adapter", "usage", "pruned"):
        assert absent not in text, (absent, text)
    assert not re.search(r"(?<!non)linear adapter", text)  # only the kind that is drawn
    # A task being trained, one frozen: both appear, and a pruned adapter when drawn.
    net = grown(DENSE, 2, train_last=True)
    prune(net, "c2_b1_from_c0")
    text = legend_text(svg_of(net, compact=compact, show_removed=True))
    for present in ("TRAINABLE", "FROZEN", "trainable adapter", "pruned or merged"):
        assert present in text, (present, text)
    assert "SEALED" not in text and "sealed adapter" not in text


def dot_positions(source: str) -> dict[str, tuple[float, float]]:
    """Node centres as laid out by graphviz's own dot (its JSON output), in points."""
    import json

    done = run_dot(source, "json")
    assert done.returncode == 0, done.stderr.decode()
    layout = json.loads(done.stdout)
    out = {}
    for obj in layout.get("objects", []):
        if "pos" in obj:
            x, y = (float(v) for v in obj["pos"].split(","))
            out[obj["name"]] = (x, y)
    return out


@needs_dot
@pytest.mark.parametrize("n", [4, 12])
def test_compact_draws_the_input_once_and_the_legend_in_a_corner(n):
    net = grown(DENSE, n)
    seal_task(net, "t0")
    root = svg_of(net, compact=True)
    groups = svg_groups(root)
    assert [i for i, c in groups.items() if "input" in c and "input-bus" not in c] == ["input"]
    assert {i for i, c in groups.items() if "forward" in c} == {
        f"forward:input:c{k}" for k in range(n)}  # every column still reads the input
    pos = dot_positions(to_dot(net, compact=True).source)
    columns = [pos[f"c{k}"] for k in range(n)]
    legend = pos["legend"]
    # Corner: right of every column, on the last column's row (the top for BT).
    assert legend[0] > max(x for x, _y in columns)
    assert legend[1] == pytest.approx(columns[-1][1])
    assert legend[1] >= max(y for _x, y in columns)


@needs_dot
def test_full_view_legend_sits_in_the_bottom_corner():
    net = grown(DENSE, 3)
    G = build_graph(net)
    pos = dot_positions(to_dot(net, compact=False).source)  # y grows upwards in dot's JSON
    layers = [pos[n] for n, d in G.nodes(data=True) if d["kind"] == "layer"]
    legend = pos["legend"]
    assert legend[0] > max(x for x, _y in layers)  # right of every column
    assert legend[1] == pytest.approx(min(y for _x, y in layers))  # on the lowest layers' rank


@needs_dot
def test_compact_is_chosen_from_eight_tasks_on():
    for n, compact in ((7, False), (8, True)):
        groups = svg_groups(svg_of(grown(DENSE, n)))
        assert any("bundle" in c for c in groups.values()) == compact, n
        assert any("layer" in c for c in groups.values()) == (not compact), n


@needs_dot
def test_states_differ_beyond_fill():
    """Trainable, frozen and sealed nodes differ in dashes, corners or borders in the SVG,
    so the picture reads in greyscale; each carries its text badge."""
    net = grown(DENSE, 3, train_last=True)
    seal_task(net, "t0")
    root = svg_of(net)
    look = {}
    for g in root.iter(SVG + "g"):
        if g.get("id") in ("head_t0", "head_t1", "head_t3"):
            shapes = [e for e in g.iter() if e.tag in (SVG + "polygon", SVG + "path")]
            dashed = any(e.get("stroke-dasharray") for e in shapes)
            text = " ".join(t.text or "" for t in g.iter(SVG + "text"))
            look[g.get("id")] = (len(shapes), dashed, shapes[0].tag, text)
    sealed, frozen, trainable = look["head_t0"], look["head_t1"], look["head_t3"]
    assert len({sealed[:3], frozen[:3], trainable[:3]}) == 3, look
    assert "SEALED" in sealed[3] and "FROZEN" in frozen[3] and "TRAINABLE" in trainable[3]


@needs_dot
def test_twelve_task_compact_diagram_renders(tmp_path):
    net = grown(DENSE, 12, head_task=True)
    for t in ("t0", "t1", "t2"):
        seal_task(net, t)
    render(net, tmp_path / "twelve.svg", compact=True)
    ET.parse(tmp_path / "twelve.svg")  # well-formed XML
    render(net, tmp_path / "twelve.png", compact=True)
    assert (tmp_path / "twelve.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature


# ----------------------------------------------------------------------------- files and CLI
@pytest.fixture
def workspace(tmp_path):
    ws = tmp_path / "ws"
    create(DENSE, ws)
    net = load(ws)
    for i in range(3):
        net.add_column(f"pump{i}", 3, seed=i)
        net.freeze()
    net.add_head("pump0_wear", 2, on="pump0")
    net.freeze()
    save(net, ws)
    return ws


def no_temp_files(folder) -> bool:
    return not list(folder.glob(".*.tmp"))


@needs_dot
def test_cli_draw_every_format(workspace, tmp_path, capsys):
    out = tmp_path / "out"
    out.mkdir()
    for name in ("a.svg", "a.png", "a.pdf", "a.dot"):
        assert main(["draw", str(workspace), "-o", str(out / name)]) == 0
    ET.parse(out / "a.svg")
    assert (out / "a.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert (out / "a.pdf").read_bytes()[:5] == b"%PDF-"
    done = run_dot((out / "a.dot").read_text())
    assert done.returncode == 0 and done.stderr == b""
    assert main(["draw", str(workspace), "-o", str(out / "b.svg"), "--task", "pump2",
                 "--compact", "--direction", "lr", "--show-pruned"]) == 0
    assert "focused on task 'pump2'" in capsys.readouterr().out
    assert no_temp_files(out)


@pytest.mark.parametrize("argv, words", [
    (["--task", "nope"], "no task named 'nope'"),
    (["-o", "{tmp}/x.jpg"], "unknown diagram format '.jpg'"),
    (["-o", "{tmp}/missing/x.svg"], "no such folder"),
    (["-o", "{tmp}"], "is a folder"),
])
def test_cli_draw_bad_input(workspace, tmp_path, capsys, argv, words):
    argv = [a.replace("{tmp}", str(tmp_path)) for a in argv]
    if "-o" not in argv:
        argv += ["-o", str(tmp_path / "x.svg")]
    before = sorted(p.name for p in tmp_path.iterdir())
    assert main(["draw", str(workspace), *argv]) == 2
    err = capsys.readouterr().err.strip()
    assert words in err and len(err.splitlines()) == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # nothing written


def test_cli_draw_not_a_workspace(tmp_path, capsys):
    assert main(["draw", str(tmp_path), "-o", str(tmp_path / "x.svg")]) == 2
    assert "not a workspace" in capsys.readouterr().err


def test_without_dot_the_source_is_written_beside(workspace, tmp_path, monkeypatch, capsys):
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))  # no dot on the PATH
    net = load(workspace)
    with pytest.raises(GraphvizMissingError) as err:
        render(net, tmp_path / "arch.svg")
    message = str(err.value)
    assert "apt-get install graphviz" in message and "\n" not in message
    assert not (tmp_path / "arch.svg").exists()
    source = (tmp_path / "arch.dot").read_text()
    assert source.startswith("digraph")
    # The CLI: one sentence, a non-zero exit for an image format, the .dot beside it.
    assert main(["draw", str(workspace), "-o", str(tmp_path / "cli.png")]) == 2
    err_text = capsys.readouterr().err.strip()
    assert len(err_text.splitlines()) == 1 and "cli.dot" in err_text
    assert (tmp_path / "cli.dot").is_file() and not (tmp_path / "cli.png").exists()
    # Asking for the source needs no dot at all.
    assert main(["draw", str(workspace), "-o", str(tmp_path / "plain.dot")]) == 0
    assert no_temp_files(tmp_path)
    monkeypatch.undo()
    if DOT:  # the source written without dot is valid DOT (graphviz's parser)
        done = run_dot(source)
        assert done.returncode == 0 and done.stderr == b""


@needs_dot
def test_failed_draw_leaves_an_existing_diagram_alone(workspace, tmp_path):
    target = tmp_path / "arch.svg"
    render(load(workspace), target)
    before = target.read_bytes()
    assert main(["draw", str(workspace), "-o", str(target), "--task", "nope"]) == 2
    assert target.read_bytes() == before
    render(load(workspace), target, compact=True)  # overwriting goes through atomic_write
    assert target.read_bytes() != before and no_temp_files(tmp_path)
