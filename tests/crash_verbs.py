"""Crash injection for every writing verb: kill a real process at each of its steps.

Run as a script (``python tests/crash_verbs.py BASE OUT PLAN.json``): one process that
imports colonnade once, builds small workspaces in BASE (once), and for every case forks
a child that runs one verb through its public Python function and dies by ``os._exit``
(no clean-up, no ``finally``, like a kill) at the chosen step. A step is every
file-system call that changes state or durability (``crash_driver.STEP_CALLS``) made
anywhere in the verb, from taking the lock to the last clean-up: the lock file, the
folder a ``new`` makes, the commit, an export's artifact beside the workspace.

After each crash, in the parent: the workspace checks (``check``) on the last committed
generation or on the new one, never a mix (its history is the old one, entry for entry,
or the old one and exactly the verb's entries); a killed ``new`` or ``adopt`` that did
not commit leaves a folder the same verb can create again; ``recover`` records what it
found when a write was interrupted; then the manifest, the files and the record verify;
the next write (a grow) succeeds, and afterwards nothing is left in the workspace that
no generation names.

PLAN: ``"count"`` (each verb once, uncrashed: its steps and trace), or
``{"verbs": [...], "steps": "all" | "sample"}``; ``sample`` takes a half-written
temporary file, the manifest's rename (killed there: not committed) and the step
after it (committed). ``{"verbs": [], ...}`` only builds BASE.
"""

from __future__ import annotations

import json
import os
import shutil
import sys
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))
from crash_driver import _counting, make_base  # noqa: E402 -- beside this file

CHAIN_FIELDS = ("seq", "prev_sha256", "verb", "by", "state_sha256", "entry_sha256",
                "signature")
EXPECTED_TOP = {"manifest.yaml", "data", ".writer.lock", ".reader.lock"}


# ------------------------------------------------------------------------------ the verbs
def _verbs() -> dict[str, tuple[str, Any]]:
    """verb name -> (the base workspace it starts from, what it does in the child)."""

    from colonnade.app.adopt import adopt_workspace
    from colonnade.app.evidence import seal_workspace, unseal_workspace
    from colonnade.app.export import export_artifact
    from colonnade.app.lifecycle import retire_workspace, retrain_workspace
    from colonnade.app.record import start_record
    from colonnade.app.transaction import recover
    from colonnade.app.trim import trim_workspace, usage_workspace
    from colonnade.app.workspace import grow_workspace, new_workspace

    def adopt(ws, c):
        adopt_workspace(c["model"], ws, "adopted", ["/1/Relu_output_0"], c["spec"],
                        c["files"]["old"][1], by="crash test")

    def trim(ws, c):  # pruning down to one weight: some adapter goes, so it commits
        report = trim_workspace(ws, "new", c["files"]["new"][1], max_drop=100.0,
                                target_params=1, progress=False, by="crash test",
                                reason="crash test")
        assert report["steps"], "the trim changed nothing, so it commits nothing"

    return {
        "new": ("fresh", lambda ws, c: new_workspace(c["spec"], ws, by="crash test")),
        "adopt": ("fresh", adopt),
        "grow": ("sealed", lambda ws, c: grow_workspace(ws, "new", c["files"]["new"][0],
                                                        progress=False, by="crash test")),
        # Two local ranks (spawned, so slow to start): the parent's steps are counted,
        # from the lock and the staging folder to the commit and the folder's removal.
        "grow-nproc": ("sealed", lambda ws, c: grow_workspace(
            ws, "new", c["files"]["new"][0], progress=False, by="crash test", nproc=2)),
        "seal": ("grown", lambda ws, c: seal_workspace(ws, "new", c["files"]["new"][1],
                                                       by="crash test")),
        "seal-signed": ("grown", lambda ws, c: seal_workspace(
            ws, "new", c["files"]["new"][1], by="crash test", sign=c["key"])),
        "unseal": ("sealed", lambda ws, c: unseal_workspace(ws, "old", "crash test",
                                                            by="crash test")),
        "usage": ("grown", lambda ws, c: usage_workspace(ws, "new", c["files"]["new"][1],
                                                         repeats=1, by="crash test")),
        "trim": ("grown", trim),
        "retrain": ("grown", lambda ws, c: retrain_workspace(
            ws, "new", c["files"]["new"][0], "crash test", epochs=1, progress=False,
            by="crash test")),
        "retire": ("grown", lambda ws, c: retire_workspace(ws, "new", "crash test",
                                                           by="crash test")),
        "record-start": ("unchained", lambda ws, c: start_record(ws, "crash test",
                                                                 by="crash test")),
        "recover": ("pending", lambda ws, c: recover(ws, by="crash test")),
        "export": ("grown", lambda ws, c: export_artifact(ws, Path(ws).parent / "new.pt",
                                                          task="new")),
    }


# ----------------------------------------------------------------------------- the bases
def _bases(folder: Path) -> dict[str, Any]:
    """The workspaces the verbs start from, built once; their paths and the inputs."""
    import yaml

    from colonnade.app.record import new_key
    from colonnade.app.workspace import grow_workspace, new_workspace
    from colonnade.files import store

    ctx = make_base(folder)
    ctx["spec"] = str(folder / "spec.yaml")
    ctx["key"] = new_key(folder / "signer")["key"]
    ctx["pub"] = str(folder / "signer.pub")
    ctx["model"] = _onnx_model(folder / "model.onnx")
    bases = {"sealed": ctx["ws"], "fresh": None}
    grown = folder / "grown"
    shutil.copytree(ctx["ws"], grown)
    grow_workspace(grown, "new", ctx["files"]["new"][0], progress=False, by="crash test")
    bases["grown"] = str(grown)
    # A workspace made before the record existed: chained fields and the record removed.
    unchained = folder / "unchained"
    new_workspace(ctx["spec"], unchained)
    grow_workspace(unchained, "old", ctx["files"]["old"][0], progress=False)
    manifest = yaml.safe_load((unchained / store.MANIFEST).read_text())
    manifest.pop("record")
    for item in manifest["history"]:
        for key in CHAIN_FIELDS:
            item.pop(key, None)
    (unchained / store.MANIFEST).write_text(yaml.safe_dump(manifest, sort_keys=False))
    bases["unchained"] = str(unchained)
    # A workspace whose retire was killed at its manifest's rename: .pending, new files.
    pending = folder / "pending"
    shutil.copytree(grown, pending)
    verbs = _verbs()
    _, trace, _ = _in_child(verbs["retire"][1], str(pending), ctx, None)
    shutil.rmtree(pending)
    shutil.copytree(grown, pending)
    code, _, _ = _in_child(verbs["retire"][1], str(pending), ctx,
                           trace.index("replace manifest.yaml") + 1)
    assert code == 77 and (pending / ".pending").exists(), "the pending base was not made"
    bases["pending"] = str(pending)
    ctx["bases"] = bases
    return ctx


def _onnx_model(path: Path) -> str:
    """A small ONNX classifier of 8 inputs to adopt (torch's TorchScript-based exporter,
    as the adoption tests make theirs)."""
    import io
    import warnings

    import torch

    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(8, 6), torch.nn.ReLU(),
                                torch.nn.Linear(6, 3)).eval()
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(model, (torch.zeros(2, 8),), buf, dynamo=False, input_names=["x"],
                          output_names=["y"], dynamic_axes={"x": {0: "n"}, "y": {0: "n"}})
    path.write_bytes(buf.getvalue())
    return str(path)


# ----------------------------------------------------------------------------- a child
def _in_child(action, ws: str, ctx: dict, crash_at: int | None) -> tuple[int, list[str], str]:
    """Run ``action(ws, ctx)`` in a forked child that dies at step ``crash_at``; its exit
    code (77: killed as asked), the steps it took, and its error (if any)."""
    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:
        os.close(read)
        counter: list[int] = [0]
        trace: list[str] = []
        real, wrapped = _counting(crash_at, counter, trace)
        code, error = 0, ""
        for name, fn in wrapped.items():
            setattr(os, name, fn)
        try:
            action(ws, ctx)
        except BaseException as exc:  # noqa: BLE001 -- reported to the parent
            code, error = 1, f"{type(exc).__name__}: {exc}"[:2000]
        for name, fn in real.items():
            setattr(os, name, fn)
        os.write(write, json.dumps({"trace": trace, "error": error}).encode())
        os._exit(code)
    os.close(write)
    chunks = []
    while chunk := os.read(read, 65536):
        chunks.append(chunk)
    os.close(read)
    _, status = os.waitpid(pid, 0)
    text = b"".join(chunks).decode()
    found = json.loads(text) if text else {"trace": [], "error": ""}
    return os.waitstatus_to_exitcode(status), found["trace"], found["error"]


# ----------------------------------------------------------------------------- verdicts
def _steps_of(ws: Path) -> list[str]:
    from colonnade.files.manifest import read_manifest

    return [str(e.get("step")) for e in read_manifest(ws).get("history") or []]


def _head(ws: Path) -> Any:
    from colonnade.files.manifest import read_manifest

    return (read_manifest(ws).get("record") or {}).get("head")


def _leftovers(ws: Path) -> list[str]:
    from colonnade.files.store import listed_files

    listed = {p.name for p in listed_files(ws).values()}
    extra = sorted(set(os.listdir(ws / "data")) - listed)
    return extra + sorted(set(os.listdir(ws)) - EXPECTED_TOP)


def _record_start_again(ws: Path, ctx: dict, action) -> list[str]:
    """A killed ``record start`` before its commit point: the old manifest is in place
    byte for byte with its files; ``recover`` says in one sentence to start the record
    (it cannot record anything in an unchained workspace); starting it again works."""
    from colonnade.app.transaction import recover
    from colonnade.errors import UsageError
    from colonnade.files.store import load

    problems = []
    base = Path(ctx["bases"]["unchained"])
    if (ws / "manifest.yaml").read_bytes() != (base / "manifest.yaml").read_bytes():
        problems.append("the unchained manifest changed although nothing committed")
    if load(ws, strict=False).meta.get("_mismatched"):
        problems.append("a file of the unchained generation changed")
    try:
        recover(ws)
        problems.append("recover did not say that the record must be started first")
    except UsageError as exc:
        if "record start" not in str(exc):
            problems.append(f"recover said: {exc}")
    code, _, error = _in_child(action, str(ws), ctx, None)
    if code != 0:
        problems.append(f"record start again failed: {error}")
    return problems


def _check(ws: Path, trust: list[str] | None) -> list[str]:
    """What ``check`` finds wrong: the record, files and every seal; with no seal, the
    record and a strict load (``check`` then asks for a seal instead)."""
    from colonnade.app.evidence import check_workspace
    from colonnade.app.record import verify_record
    from colonnade.errors import UsageError
    from colonnade.files.store import load

    try:
        report = check_workspace(ws, trust=trust)
    except UsageError as exc:
        if "is sealed" not in str(exc):
            return [f"check refused: {exc}"]
        record = verify_record(ws, trust=trust)
        try:
            load(ws)
        except Exception as exc:  # noqa: BLE001 -- every failure is a finding here
            return [f"does not open: {exc}"]
        return [] if record.passed else [f"record: {record.first}"]
    if report.passed:
        return []
    return [f"check fails: {report.record.first if report.record else ''} "
            f"{[(t.task, t.verdict) for t in report.tasks]}"]


def run_case(verb: str, ctx: dict, out: Path, crash_at: int | None,
             clean: dict | None) -> dict[str, Any]:
    """One verb killed at step ``crash_at`` (None: not killed); the verdict as a dict."""
    from colonnade.app.record import verify_record
    from colonnade.app.transaction import recover
    from colonnade.app.workspace import grow_workspace

    case_dir = out / f"{verb}-{crash_at}"
    shutil.rmtree(case_dir, ignore_errors=True)
    case_dir.mkdir(parents=True)
    ws = case_dir / "ws"
    base, action = _verbs()[verb]
    if ctx["bases"][base] is not None:
        shutil.copytree(ctx["bases"][base], ws)
    before = _steps_of(ws) if ws.exists() else None
    head = _head(ws) if ws.exists() else None
    case: dict[str, Any] = {"verb": verb, "step": crash_at, "problems": []}
    problems = case["problems"]
    code, trace, error = _in_child(action, str(ws), ctx, crash_at)
    case["steps"], case["trace"], case["code"] = len(trace), trace, code
    if code not in (0, 77):
        problems.append(f"the {verb} failed: {error}")
        return case
    if before is None and not (ws / "manifest.yaml").exists():
        # A killed new/adopt that never committed: the same verb makes the folder again,
        # straight away (odd steps) or after 'recover' emptied it (even steps).
        locks = {".writer.lock", ".reader.lock"}
        if crash_at and crash_at % 2 == 0 and ws.exists() and set(os.listdir(ws)) - locks:
            from colonnade.app.transaction import CREATION_UNDONE

            found = recover(ws, by="crash test")
            if found is None or CREATION_UNDONE not in found or set(os.listdir(ws)) - locks:
                problems.append(f"recover did not empty the folder: {found}")
        again, _, error = _in_child(action, str(ws), ctx, None)
        case["created_again"] = again == 0
        if again != 0:
            problems.append(f"after the crash the {verb} cannot be repeated: {error}")
            return case
        before, head = [], None
        case["committed"] = False  # the killed run did not; the repeated one did
    before = before or []
    after = [s for s in _steps_of(ws) if s != "recovered"]
    committed = _head(ws) != head  # every commit moves the head (a new one: from None)
    if verb == "record-start" and not committed:
        problems += _record_start_again(ws, ctx, action)
    # A signed commit in place is checked against the signer's public key; before the
    # commit point nothing was signed yet, and the record is checked as it was.
    signer = ctx["key"] if verb == "seal-signed" else None
    trust = [ctx["pub"]] if signer and committed else None
    problems += _check(ws, trust)
    case.setdefault("committed", committed)
    case["after"] = after
    if not committed and after != [s for s in before if s != "recovered"]:
        problems.append(f"the head did not move but the history did: {after}")
    if committed and clean is not None and after != clean["after"]:
        problems.append(f"neither the old generation nor the new one: {after}")
    pending = (ws / ".pending").exists()
    try:
        found = recover(ws, by="crash test", sign=signer)
    except Exception as exc:  # noqa: BLE001 -- every failure is a finding here
        problems.append(f"recover failed: {type(exc).__name__}: {exc}")
        return case
    case["recovered"] = found
    if pending and found is None:
        problems.append("an interrupted write was left, but recover found nothing")
    record = verify_record(ws, trust=trust)
    if not record.passed:
        problems.append(f"record after recovery: {record.first}")
    try:
        grow_workspace(ws, "next", ctx["files"]["old"][0], progress=False, by="crash test",
                       sign=signer)
    except Exception as exc:  # noqa: BLE001
        problems.append(f"the next write failed: {type(exc).__name__}: {exc}")
        return case
    if not verify_record(ws, trust=trust).passed:
        problems.append("the record does not verify after the next write")
    left = _leftovers(ws)
    if left:
        problems.append(f"left in the workspace after the next write: {left}")
    if verb == "export":
        problems += _export_verdict(ws, case_dir / "new.pt", committed)
    shutil.rmtree(case_dir, ignore_errors=True)
    return case


def _export_verdict(ws: Path, out: Path, committed: bool) -> list[str]:
    """The artifact beside the workspace: absent or whole, and never one the record
    does not name (it is moved into place only after the commit)."""
    from colonnade.files.commit import sha_hex
    from colonnade.files.manifest import read_manifest

    if not out.exists():
        return []
    exports = [e for e in read_manifest(ws).get("history") or [] if e.get("step") == "artifact_exported"]
    if not committed or not exports:
        return ["an artifact is in place although its export was not recorded"]
    if exports[-1].get("sha256") != sha_hex(out.read_bytes()):
        return ["the artifact in place is not the one the record names"]
    return []


def _sample(trace: list[str]) -> list[int]:
    """The first write (a temporary file half written), the manifest's rename (killed
    there: not committed) and the step after it (committed)."""
    total = len(trace)
    point = trace.index("replace manifest.yaml") + 1 if "replace manifest.yaml" in trace \
        else total
    first_write = next((i + 1 for i, step in enumerate(trace) if step.startswith("write")), 1)
    return sorted({s for s in (first_write, point, point + 1) if 1 <= s <= total})


def main(argv: list[str]) -> int:
    import torch
    import torch._dynamo  # noqa: F401 -- the optimizers import it on their first step

    torch.set_num_threads(1)
    base_dir, out, plan = Path(argv[0]), Path(argv[1]), json.loads(argv[2])
    saved = base_dir / "verbs.json"
    if saved.exists():
        ctx = json.loads(saved.read_text())
    else:
        ctx = _bases(base_dir)
        saved.write_text(json.dumps(ctx))
    out.mkdir(parents=True, exist_ok=True)
    verbs = list(_verbs()) if plan == "count" else plan["verbs"]
    for verb in verbs:
        clean = run_case(verb, ctx, out / "clean", None, None)
        if clean["problems"]:
            print(json.dumps(clean), flush=True)
            continue
        if plan == "count":
            print(json.dumps(clean), flush=True)
            continue
        steps = range(1, clean["steps"] + 1) if plan["steps"] == "all" \
            else _sample(clean["trace"])
        for step in steps:
            try:
                case = run_case(verb, ctx, out, step, clean)
            except Exception as exc:  # noqa: BLE001 -- a finding, and the next case runs
                case = {"verb": verb, "step": step, "problems": [
                    f"unexpected {type(exc).__name__}: {exc}"]}
            case.pop("trace", None)
            case["of"] = clean["steps"]
            print(json.dumps(case), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
