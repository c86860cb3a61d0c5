"""The review pack: evidence first in report.md / report.json / report.pdf, and ``diff``.

Outside references: poppler's pdftotext extracts the text that lies on each page (text
past the page edge is lost there, so a column cut off is caught) and pypdf counts the
pages; the PDF format's own "%PDF-" signature; safetensors' own reader and writer for the tensor
edited by hand; NumPy for the largest difference that edit made. Data: scikit-learn's
bundled digits (via conftest), one epoch per task.
"""

from __future__ import annotations

import io
import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from conftest import permuted_digit_tasks
from pypdf import PdfReader
from safetensors.numpy import load_file, save_file

from colonnade.app.diff import diff_workspaces
from colonnade.app.evidence import seal_workspace, unseal_workspace
from colonnade.app.lifecycle import retire_workspace
from colonnade.app.trim import trim_workspace
from colonnade.app.views import write_report
from colonnade.app.workspace import grow_workspace
from colonnade.cli import main
from colonnade.files import store
from colonnade.model.guard import sealed_tasks

SPEC = {"name": "digits-review", "input": [64],
        "column": [{"dense": 24}, {"act": "relu"}, {"dense": 16}, {"act": "relu"}],
        "lateral": {"kind": "nonlinear", "reduce": 0.5},
        "train": {"epochs": 1, "batch_size": 128, "patience": 0, "seed": 0}}
PDFTOTEXT = shutil.which("pdftotext")
needs_pdftotext = pytest.mark.skipif(PDFTOTEXT is None, reason="poppler's pdftotext is not "
                                     "installed (Debian: apt-get install poppler-utils)")
COST_HEADERS = ["task", "mode", "params added", "params on path", "column", "adapters", "head",
                "MACs (batch 1)", "weights fp32", "weights int8", "peak activations",
                "latency b1 ms (IQR)", "latency b64 ms (IQR)"]


def _words(text: str) -> str:
    """Whitespace collapsed, so a header wrapped inside its cell still reads as one."""
    return re.sub(r"\s+", " ", text)


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    """Three permuted-digit tasks as .npz files: training data and a probe set each."""
    folder = tmp_path_factory.mktemp("data")
    for t in permuted_digit_tasks(3):
        np.savez(folder / f"{t['name']}.npz", x=t["x"], y=t["y"])
        np.savez(folder / f"{t['name']}_probe.npz", x=t["x_test"], y=t["y_test"])
    return folder


@pytest.fixture(scope="module")
def history(tmp_path_factory, data):
    """Copies of one workspace at each step: 2 tasks sealed; a 3rd task; then trimmed."""
    root = tmp_path_factory.mktemp("ws")
    ws = root / "ws"
    store.create(SPEC, ws)
    for name in ("perm0", "perm1"):
        grow_workspace(ws, name, data / f"{name}.npz", progress=False)
        seal_workspace(ws, name, data / f"{name}_probe.npz")
    shutil.copytree(ws, root / "two_sealed")
    grow_workspace(ws, "perm2", data / "perm2.npz", progress=False)
    shutil.copytree(ws, root / "three")
    trim_workspace(ws, "perm2", data / "perm2_probe.npz", max_drop=100.0, progress=False,
                   reason="a smaller path")
    shutil.copytree(ws, root / "trimmed")
    return root


def test_report_leads_with_the_evidence(history, tmp_path):
    ws = history / "three"
    out = tmp_path / "report"
    result = write_report(ws, out, latency=False, project_n=3)
    assert {"report.md", "report.html", "report.json", "report.pdf"} <= set(result["files"])
    data = json.loads((out / "report.json").read_text())
    md = (out / "report.md").read_text()
    net = store.load(ws)
    sealed = sealed_tasks(net)
    assert list(sealed) == ["perm0", "perm1"]
    # The summary comes first, the caution with it; costs come after the evidence.
    assert md.index("## Summary") < md.index("## Seals") < md.index("## History") < md.index(
        "## What each task costs now")
    assert "not a safety certification" in md[:md.index("## Seals")]
    check = data["evidence"]["check"]
    assert {t["task"]: t["verdict"] for t in check["tasks"]} == {"perm0": "exact",
                                                                 "perm1": "exact"}
    for task, entry in sealed.items():
        digest = entry["closure"]["sha256"]
        assert data["evidence"]["seals"][task]["closure"]["sha256"] == digest  # whole
        assert f"### Seal of {task}" in md and digest[:12] in md  # short form
        section = md[md.index(f"### Seal of {task}"):]
        assert "| check now | exact |" in section[:2000]
        # The kept probe's long name is shortened in the table (its first 12 hex digits)
        # and given whole below it; report.json keeps it whole.
        kept = entry["probe"]["file"]
        assert f"| probe kept as | {kept[:18]}\u2026.npz |" in section
        assert f"Probe kept in the workspace as {kept};" in section
        assert data["evidence"]["seals"][task]["probe"]["file"] == kept
        html_text = (out / "report.html").read_text(encoding="utf-8")
        assert f"<td class=\"text\">{kept[:18]}\u2026.npz</td>" in html_text
        figure = f"confusion_{task}.png"
        assert figure in data["figures"] and f"]({figure})" in md
        assert (out / figure).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        # Per-class recall rows agree with the seal's confusion matrix.
        confusion = entry["metrics"]["confusion"]
        for c, row in enumerate(confusion):
            assert f"| {c} | {row[c] / sum(row):.3f} | {sum(row)} |" in section
    # Every history entry is a row of the timeline, numbered from 1.
    timeline = md[md.index("## History"):md.index("## What each task costs now")]
    rows = [line for line in timeline.splitlines() if re.match(r"\| \d+ \|", line)]
    assert len(rows) == len(net.meta["history"])
    for i, entry in enumerate(net.meta["history"], start=1):
        assert rows[i - 1].startswith(f"| {i} | {entry['step'].replace('_', ' ')} |")
        assert entry["time"] in rows[i - 1]


def _visible_pages(pdf: Path) -> list[str]:
    """Each page's text as poppler's pdftotext extracts it, whitespace collapsed.

    pdftotext keeps only what lies on the page (text pushed past the page edge is dropped,
    see test_text_off_the_page_is_lost_to_pdftotext), so finding a column's header and
    figures in its output means the column is printed."""
    done = subprocess.run([PDFTOTEXT, "-raw", str(pdf), "-"], capture_output=True,
                          check=True)
    return [_words(p) for p in done.stdout.decode("utf-8").split("\f")[:-1]]


@needs_pdftotext
def test_pdf_keeps_every_column_and_task(history, tmp_path):
    out = tmp_path / "report"
    write_report(history / "trimmed", out, project_n=3, repeats=2, hardware="vibe-node")
    raw = (out / "report.pdf").read_bytes()
    assert raw.startswith(b"%PDF-")  # the PDF signature (ISO 32000-1, 7.5.2)
    pages = _visible_pages(out / "report.pdf")
    assert len(pages) == len(PdfReader(io.BytesIO(raw)).pages)  # pypdf counts the same
    text = " ".join(pages)
    for header in COST_HEADERS:
        assert header in text, header
    data = json.loads((out / "report.json").read_text())
    for t in data["ledger"]["tasks"]:  # every task's figures, as the table prints them
        lat = t["latency_ms"]["batch_64"]
        # A figure too spread out to trust is printed as its spread, not as a result.
        shown = (f"untrustworthy: spread {lat['q1']:.3f}-{lat['q3']:.3f}"
                 if lat.get("trusted") is False else
                 f"{lat['median']:.3f} ({lat['q1']:.3f}-{lat['q3']:.3f})")
        for figure in (f"{t['params_added']:,}", f"{t['params_path']:,}", f"{t['macs']:,}",
                       shown):
            assert figure in text, (t["task"], figure)
    for header in ("future task", "network params", "verdict", "projected"):
        assert header in text, header
    for task, entry in data["evidence"]["seals"].items():
        assert entry["closure"]["sha256"][:12] in text and f"Seal of {task}" in text
        assert entry["probe"]["file"][:18] in text  # the kept probe's digest prefix
    # First page: the caution. Every page: its number, the workspace, the generation time.
    assert "not a safety certification" in pages[0]
    for n, page in enumerate(pages, start=1):
        assert f"page {n} of {len(pages)}" in page
        assert "workspace: trimmed" in page and data["generated"] in page


@needs_pdftotext
def test_text_off_the_page_is_lost_to_pdftotext(tmp_path):
    """Why the column check reads pdftotext: a table made too wide for its page loses its
    last cells there, while pypdf still extracts them from the content stream."""
    import weasyprint

    cells = "".join(f"<td>cell{i:02d}</td>" for i in range(60))
    page = (f"<style>@page{{size:A4}} td{{white-space:nowrap;padding:0 4em}}</style>"
            f"<table><tr>{cells}</tr></table>")
    (tmp_path / "wide.pdf").write_bytes(weasyprint.HTML(string=page).write_pdf())
    visible = " ".join(_visible_pages(tmp_path / "wide.pdf"))
    assert "cell00" in visible and "cell59" not in visible
    assert "cell59" in PdfReader(tmp_path / "wide.pdf").pages[0].extract_text()


# ----------------------------------------------------------------------------- diff
def test_diff_of_identical_workspaces(history, tmp_path, capsys):
    copy = tmp_path / "copy"
    shutil.copytree(history / "three", copy)
    result = diff_workspaces(history / "three", copy)
    assert result["identical"] and result["sealed_in_a"]["all_kept"]
    assert main(["diff", str(history / "three"), str(copy)]) == 0
    assert "A and B are identical" in capsys.readouterr().out


def test_diff_names_a_task_added(history, capsys):
    result = diff_workspaces(history / "two_sealed", history / "three")
    assert result["tasks"] == {"added": ["perm2"], "retired": [], "retrained": []}
    assert "column 2" in result["parts"]["columns_added"]
    net = store.load(history / "three")
    new_keys = {k for k in net.state_dict() if k.startswith(("columns.2.", "heads.perm2."))}
    assert new_keys <= set(result["tensors"]["only_in_b"])
    assert result["tensors"]["changed"] == []  # nothing of A moved
    assert result["sealed_in_a"]["all_kept"]
    assert main(["diff", str(history / "two_sealed"), str(history / "three"), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["tasks"]["added"] == ["perm2"]


def test_diff_names_adapters_pruned(history):
    result = diff_workspaces(history / "three", history / "trimmed")
    net = store.load(history / "trimmed")
    pruned = sorted(k for k, a in net.adapter_info.items() if a.state == "pruned")
    assert pruned and sorted(result["parts"]["pruned"]) == pruned
    steps = [e for e in net.meta["history"] if e["step"] == "adapter_pruned"]
    assert len(result["history"]["only_in_b"]) >= len(steps)


def test_diff_since_agrees_with_a_copy_of_that_point(history):
    """``--since N`` rebuilds the earlier state from the record; a copy taken then agrees."""
    n = len(store.load(history / "two_sealed").meta["history"])
    since = diff_workspaces(history / "trimmed", since=n)
    copies = diff_workspaces(history / "two_sealed", history / "trimmed")
    for section in ("tasks", "parts", "seals", "spec"):
        assert since[section] == copies[section], section
    assert since["costs"]["total"] == copies["costs"]["total"]
    assert since["sealed_in_a"]["all_kept"] and since["since"] == n


def test_diff_names_a_seal_superseded_with_its_reason(history, tmp_path, data):
    ws = tmp_path / "resealed"
    shutil.copytree(history / "three", ws)
    unseal_workspace(ws, "perm1", "probe set replaced by the customer's")
    # sealing a task that was sealed before needs a reason (the record issue)
    seal_workspace(ws, "perm1", data / "perm1_probe.npz",
                   reason="probe set replaced by the customer's")
    result = diff_workspaces(history / "three", ws)
    assert result["seals"]["superseded"] == [{"task": "perm1", "version": 1, "by": 2,
                                              "reason": "probe set replaced by the customer's"}]
    assert {"task": "perm1", "version": 2,
            "reason": "probe set replaced by the customer's"} in result["seals"]["added"]
    # Re-sealed over the same closure: still sealed and exact.
    assert result["sealed_in_a"]["tasks"]["perm1"]["kept"]


def test_diff_names_a_tensor_edited_by_hand(history, tmp_path, capsys):
    ws = tmp_path / "edited"
    shutil.copytree(history / "three", ws)
    weights_path = store.listed_files(ws)[store.WEIGHTS]
    weights = load_file(weights_path)  # safetensors' own reader
    key = "columns.0.blocks.0.main.0.weight" if "columns.0.blocks.0.main.0.weight" in weights \
        else sorted(k for k in weights if k.startswith("columns.0.") and "weight" in k)[0]
    before = weights[key].copy()
    weights[key] = before.copy()
    weights[key].flat[3] += np.float32(0.5)
    save_file(weights, weights_path)
    expected = float(np.abs(weights[key].astype(np.float64) - before.astype(np.float64)).max())
    result = diff_workspaces(history / "three", ws)
    changed = {c["key"]: c for c in result["tensors"]["changed"]}
    assert list(changed) == [key]
    assert changed[key]["max_abs_diff"] == pytest.approx(expected, rel=1e-6)
    kept = result["sealed_in_a"]
    assert not kept["all_kept"] and not kept["tasks"]["perm0"]["kept"]
    assert kept["tasks"]["perm0"]["check_b"] == "moved"
    assert any("weights.safetensors" in n for n in result["notes"])
    assert main(["diff", str(history / "three"), str(ws)]) == 1  # a seal of A did not hold
    out = capsys.readouterr().out
    assert f"Tensor {key} differs: largest difference {expected:.6g}" in out
    assert "NOT every task sealed in A" in out


@pytest.mark.parametrize("argv, words", [
    ([], "give a second workspace"),
    (["--since", "999"], "the history has entries 1 to"),
    (["{other}", "--since", "2"], "not both"),
])
def test_diff_bad_input_is_one_sentence(history, capsys, argv, words):
    argv = [a.replace("{other}", str(history / "three")) for a in argv]
    assert main(["diff", str(history / "two_sealed"), *argv]) == 2
    err = capsys.readouterr().err.strip()
    assert words in err and len(err.splitlines()) == 1


def test_report_since_has_the_changes_section(history, tmp_path):
    n = len(store.load(history / "two_sealed").meta["history"])
    out = tmp_path / "r"
    assert main(["report", str(history / "trimmed"), "-o", str(out), "--since", str(n),
                 "--no-latency", "--no-pdf"]) == 0
    md = (out / "report.md").read_text()
    data = json.loads((out / "report.json").read_text())
    assert "## What changed since" in md and "Tasks added: perm2" in md
    assert data["changes"]["tasks"]["added"] == ["perm2"] and not (out / "report.pdf").exists()


def test_diff_names_a_task_retired(history, tmp_path):
    ws = tmp_path / "retired"
    shutil.copytree(history / "three", ws)
    retire_workspace(ws, "perm2", "line closed")
    result = diff_workspaces(history / "three", ws)
    assert result["tasks"]["retired"] == ["perm2"] and result["sealed_in_a"]["all_kept"]
    n = len(store.load(history / "three").meta["history"])
    assert diff_workspaces(ws, since=n)["tasks"]["retired"] == ["perm2"]  # from the record


# ----------------------------------------------------------------------------- record
def test_report_states_the_record_and_its_signatures(history, tmp_path, data, capsys):
    ws = tmp_path / "signed"
    shutil.copytree(history / "three", ws)
    out = tmp_path / "plain"
    write_report(ws, out, latency=False, pdf=False)
    md = (out / "report.md").read_text()
    record = json.loads((out / "report.json").read_text())["evidence"]["record"]
    assert record["passed"] and "the chain verifies" in md and "No entry is signed" in md
    # Sign a step with a new key: the timeline says which entry is signed, by which key,
    # and with --trust the summary names the trusted key (cryptography verifies it).
    assert main(["key", "new", "-o", str(tmp_path / "reviewer")]) == 0
    capsys.readouterr()
    assert main(["unseal", str(ws), "--task", "perm1", "--reason", "new probe",
                 "--sign", str(tmp_path / "reviewer.key")]) == 0
    out = tmp_path / "trusted"
    assert main(["report", str(ws), "-o", str(out), "--no-latency", "--no-pdf",
                 "--trust", str(tmp_path / "reviewer.pub")]) == 0
    md = (out / "report.md").read_text()
    record = json.loads((out / "report.json").read_text())["evidence"]["record"]
    signed = [s for s in record["signatures"] if s["status"] != "unsigned"]
    assert signed and all(s["status"] == "trusted" for s in signed)
    assert "checked against the trusted key" in md and "not a legal electronic signature" in md
    timeline = md[md.index("## History"):]
    row = next(line for line in timeline.splitlines() if "task unsealed" in line)
    assert "new probe" in row and "yes, key" in row and "trusted" in row
