"""The report: report.md, a self-contained report.html and report.json.

The HTML is parsed with the standard library's html.parser; every image must be inline
(a data: URI whose bytes decode to a PNG or an SVG), and nothing may point to the
network. Data: scikit-learn's bundled digits (via conftest), trained for one epoch.
"""

from __future__ import annotations

import base64
import json
import shutil
from html.parser import HTMLParser
from pathlib import Path

import pytest
from conftest import permuted_digit_tasks, task_data

import colonnade
from colonnade.app.views import write_report
from colonnade.cli import main
from colonnade.files import store

SPECS = Path(__file__).parent.parent / "specs"
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, section 5.2)


class _Collect(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


@pytest.fixture(scope="module")
def grown_ws(tmp_path_factory):
    spec = {"name": "digits-small", "input": [64],
            "column": [{"dense": 24}, {"norm": "batch"}, {"act": "relu"}, {"dense": 16},
                       {"act": "relu"}],
            "lateral": {"kind": "nonlinear", "reduce": 0.5},
            "train": {"epochs": 1, "batch_size": 128, "patience": 0, "seed": 0}}
    folder = tmp_path_factory.mktemp("rep") / "ws"
    net = colonnade.create(spec, folder)
    for t in permuted_digit_tasks(2):
        colonnade.grow(net, t["name"], task_data(t), epochs=1, progress=False)
    colonnade.save(net, folder)
    return folder


def _images(html_text: str) -> list[str]:
    parser = _Collect()
    parser.feed(html_text)
    parser.close()
    for tag, attrs in parser.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed")
        for key in ("src", "href"):
            value = attrs.get(key) or ""
            assert not value.startswith(("http:", "https:", "//", "file:")), value
    return [attrs["src"] for tag, attrs in parser.tags if tag == "img"]


def test_report_files(grown_ws, tmp_path):
    out = tmp_path / "report"
    result = write_report(grown_ws, out, hardware=SPECS / "hardware" / "vibe-node.yaml",
                          project_n=4, repeats=2)
    assert {"report.md", "report.html", "report.json", "report.pdf"} <= set(result["files"])
    data = json.loads((out / "report.json").read_text())  # the JSON loads
    ledger = data["ledger"]
    assert [t["task"] for t in ledger["tasks"]] == ["perm0", "perm1"]
    assert len(ledger["projection"]["tasks"]) == 4
    assert ledger["hardware"]["profile"]["name"] == "vibe-node"
    net = store.load(grown_ws)
    assert ledger["total"]["params"] == sum(p.numel() for p in net.parameters())  # numel()
    # The accuracy matrix of the growth record is in the report as a heat map.
    assert data["accuracy"] is not None and len(data["accuracy"]["R"]) == 2
    assert "accuracy.png" in data["figures"]
    for name in ("params_per_task.png", "macs_per_task.png", "growth.png"):
        assert name in data["figures"]

    html_text = (out / "report.html").read_text(encoding="utf-8")
    srcs = _images(html_text)
    assert len(srcs) == len(data["figures"])
    for src in srcs:
        head, _, payload = src.partition(",")
        assert head in ("data:image/png;base64", "data:image/svg+xml;base64")
        raw = base64.b64decode(payload, validate=True)
        if head.endswith("png;base64"):
            assert raw.startswith(PNG_MAGIC)
        else:
            assert b"<svg" in raw[:2000]
    # The HTML stands alone: copied elsewhere without its PNG files it still has them.
    alone = tmp_path / "alone.html"
    shutil.copy(out / "report.html", alone)
    assert _images(alone.read_text(encoding="utf-8")) == srcs

    md = (out / "report.md").read_text(encoding="utf-8")
    for name in data["figures"]:
        assert f"]({name})" in md and (out / name).read_bytes()
    assert "FLOPs = 2 x MACs" in md and "| perm0 |" in md


def test_report_of_an_empty_workspace(tmp_path):
    folder = tmp_path / "ws"
    store.create(SPECS / "mlp_linear.yaml", folder)
    out = tmp_path / "r"
    write_report(folder, out, latency=False)
    data = json.loads((out / "report.json").read_text())
    assert data["ledger"]["tasks"] == [] and data["figures"] == []
    assert _images((out / "report.html").read_text()) == []
    assert any("no task yet" in n for n in data["notes"])


def test_report_cli_and_bad_input(grown_ws, tmp_path, capsys):
    out = tmp_path / "cli"
    assert main(["report", str(grown_ws), "-o", str(out), "--no-latency", "--project", "2",
                 "--no-pdf"]) == 0
    assert "report.html" in capsys.readouterr().out
    assert json.loads((out / "report.json").read_text())["ledger"]["projection"]
    # A file where the folder should be: one sentence, exit 2, nothing written.
    target = tmp_path / "file.txt"
    target.write_text("keep")
    assert main(["report", str(grown_ws), "-o", str(target), "--no-latency"]) == 2
    err = capsys.readouterr().err.strip()
    assert "is not a folder" in err and err.count("\n") == 0
    assert target.read_text() == "keep"
    # A bad profile is refused before anything is written.
    fresh = tmp_path / "fresh"
    assert main(["report", str(grown_ws), "-o", str(fresh), "--hardware", "nope",
                 "--no-latency"]) == 2
    assert "no such hardware profile" in capsys.readouterr().err
    assert not fresh.exists()
