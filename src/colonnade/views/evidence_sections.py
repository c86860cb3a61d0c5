"""The evidence half of the report: the summary, one section per seal, the history.

A design review asks first which tasks are certified and whether they still check
exact, then what changed and why; costs come after. These builders turn the workspace's
record (seal entries, history) and a fresh ``check`` run (done by the caller, which owns
the workspace) into ``document.Section`` objects plus the confusion-matrix figures and
the plain data for ``report.json``. They read; they never change the network.
"""

from __future__ import annotations

import platform
import re
from collections.abc import Mapping
from typing import Any

from ..costing.hardware import format_bytes
from ..evidence.kept_probe import short_name
from ..evidence.seal import environment
from ..model.guard import sealed_tasks, seals_of
from ..model.network import ProgressiveNet
from .document import Figure, Section, Table
from .plots import confusion_heatmap

__all__ = ["CAUTION", "summary_section", "seal_sections", "timeline_section", "short_digest",
           "verdict_of", "step_text", "evidence_data"]

CAUTION = ("A seal is a software regression check: it shows that a task's outputs on its "
           "probe set did not move by a single bit. It is not a safety certification; the "
           "applicable standards, regulations and qualified assessors decide whether a "
           "system is fit for its use.")


def short_digest(value: Any, n: int = 12) -> str:
    """The first ``n`` hex digits, as reviewers compare them; the JSON keeps the whole."""
    return f"{value[:n]}\u2026" if isinstance(value, str) and len(value) > n else str(value)


def _file_name(task: str) -> str:
    return "confusion_" + re.sub(r"[^A-Za-z0-9_.-]+", "_", task) + ".png"


def verdict_of(check: Mapping[str, Any] | None, task: str) -> dict[str, Any] | None:
    if not check:
        return None
    return next((t for t in check.get("tasks", []) if t.get("task") == task), None)


def _verdict_words(v: Mapping[str, Any] | None, sealed: bool) -> str:
    if not sealed:
        return "not sealed"
    if v is None:
        return "not checked"
    words = str(v["verdict"])
    if v.get("max_abs_diff"):
        words += f" (max diff {v['max_abs_diff']:.3g})"
    return words


def _who(entry: Mapping[str, Any]) -> str:
    by = entry.get("by") or entry.get("who")
    if isinstance(by, Mapping):
        by = by.get("name") or by.get("user")
    return str(by) if by else "not recorded"


def _signed(entry: Mapping[str, Any], status: str | None = None) -> str:
    sig = entry.get("signature")
    if not sig:
        return "no"
    key = sig.get("key") if isinstance(sig, Mapping) else None
    words = "yes" + (f", key {short_digest(key, 8)}" if key else "")
    return words + (f", {status}" if status and status != "valid" else "")


def step_text(e: Mapping[str, Any]) -> str:
    """One history entry in a few words (what the step did, beyond its name and task)."""
    step = e.get("step")
    if step == "column_added":
        acc = e.get("val_accuracy")
        return (f"column {e.get('column')}, width {e.get('width')}, {e.get('classes')} classes"
                + (f", validation accuracy {acc:.4f}" if isinstance(acc, float) else ""))
    if step == "head_added":
        return f"head on column {e.get('column')}, {e.get('classes')} classes"
    if step in ("adapter_pruned", "adapters_merged", "adapter_merged"):
        keys = ", ".join(e.get("adapters") or [])
        return f"{keys}" + (f" (into {e['target']})" if e.get("target") else "")
    if step == "task_sealed":
        return f"seal v{e.get('version')}, closure {short_digest(e.get('closure_sha256'))}"
    if step == "task_unsealed":
        return f"seal v{e.get('version')} lifted"
    if step == "record_started":
        n = e.get("unchained_entries")
        return f"record started; the {n} entries before it were chained as found"
    return ""


# ----------------------------------------------------------------------------- summary
def summary_section(net: ProgressiveNet, check: Mapping[str, Any] | None,
                    ledger: Mapping[str, Any], record: Mapping[str, Any] | None,
                    checked_at: str) -> Section:
    """One screen: tasks and their seals, the fresh check, the record, size, budget."""
    sealed = sealed_tasks(net)
    rows = [["task", "mode", "classes", "column", "seal", "check now", "probe accuracy",
             "validation accuracy"]]
    records = net.meta.get("records") or {}
    for name in net.tasks:
        info = net.task(name)
        entry = sealed.get(name)
        seal = f"v{entry.get('version')}" if entry else (
            "lifted" if seals_of(net, name) else "none")
        if getattr(info, "state", "live") != "live":
            seal += f" ({info.state})"
        probe_acc = (entry or {}).get("metrics", {}).get("accuracy") if entry else None
        val = ((records.get(name) or {}).get("train") or {}).get("val_accuracy")
        rows.append([name, info.mode, str(info.classes), str(info.column), seal,
                     _verdict_words(verdict_of(check, name), entry is not None),
                     f"{probe_acc:.4f}" if isinstance(probe_acc, float) else "-",
                     f"{val:.4f}" if isinstance(val, float) else "-"])
    paragraphs = []
    if check:
        tasks = check.get("tasks", [])
        counts: dict[str, int] = {}
        for t in tasks:
            word = str(t["verdict"]).split(" ")[0]
            counts[word] = counts.get(word, 0) + 1
        env = environment()
        threads = sorted({str((sealed.get(t["task"]) or {}).get("computation", {})
                              .get("threads", "?")) for t in tasks})
        tally = ", ".join(f"{n} {w}" for w, n in counts.items())
        paragraphs.append(
            f"Fresh check at {checked_at}: {len(tasks)} sealed task"
            f"{'s' * (len(tasks) != 1)}, {tally}. Ran on {platform.node() or 'this machine'} "
            f"({env['machine']}, {env['platform']}, torch {env['torch']}), repeating each "
            f"seal's recorded computation with {', '.join(threads)} thread"
            f"{'s' * (threads != ['1'])}.")
        for note in check.get("notes", []):
            paragraphs.append(f"Check note: {note}.")
    elif sealed:
        paragraphs.append("No fresh check was run for this report.")
    else:
        paragraphs.append("No task is sealed yet, so there is nothing to check.")
    paragraphs.append(record_text(record, len(net.meta.get("history") or [])))
    tot = ledger["total"]
    paragraphs.append(
        f"Network: {tot['tasks']} tasks on {tot['columns']} columns, {tot['params']:,} "
        f"parameters ({format_bytes(tot['weight_bytes']['fp32'])} at fp32, "
        f"{format_bytes(tot['weight_bytes']['int8'])} at int8), {tot['macs']:,} MACs per "
        f"sample for all tasks in one pass.")
    hw = ledger.get("hardware")
    if hw:
        name = hw["profile"]["name"]
        if hw.get("already_exceeded"):
            paragraphs.append(f"Device {name!r}: already over budget at task "
                              f"{hw['already_exceeded']!r}.")
        elif hw.get("first_break"):
            paragraphs.append(f"Device {name!r}: the first projected task that breaks the "
                              f"budget is {hw['first_break']!r}.")
        else:
            n = len(ledger.get("projection", {}).get("tasks", []))
            paragraphs.append(f"Device {name!r}: all {n} projected tasks fit the budget.")
    else:
        paragraphs.append("Device budget: no hardware profile given (pass --hardware "
                          "PROFILE to see the first projected task that breaks it).")
    return Section("Summary", paragraphs=paragraphs, tables=[Table(rows)], emphasis=[CAUTION],
                   anchor="summary")


def record_text(record: Mapping[str, Any] | None, entries: int) -> str:
    """The record's integrity and signatures in a sentence or two (``verify_record``)."""
    if not record:
        return f"Record: {entries} history entries; the record was not verified for this report."
    sigs = record.get("signatures") or []
    signed = [s for s in sigs if s.get("status") != "unsigned"]
    keys = sorted({str(s.get("key")) for s in signed if s.get("key")})
    if record.get("passed"):
        head = f"Record: {record.get('entries')} entries; the chain verifies (head " \
               f"{short_digest(record.get('head'))}), bound to the manifest and every file."
    else:
        first = (record.get("findings") or [{}])[0].get("message", "a finding")
        head = f"Record: does NOT verify: {first}."
    if not signed:
        tail = " No entry is signed."
    else:
        tail = (f" {len(signed)} of {len(sigs)} entries signed, by key"
                f"{'s' * (len(keys) != 1)} {', '.join(keys)}")
        trusted = record.get("trusted") or []
        tail += (f"; checked against the trusted key{'s' * (len(trusted) != 1)} "
                 f"{', '.join(trusted)}." if trusted else
                 "; no trusted key was given (--trust KEY.pub), so the signatures show only "
                 "that the record is unchanged since it was signed, not who signed it.")
    return head + tail + (" A signature here is a software record, not a legal electronic "
                          "signature." if signed else "")


# ----------------------------------------------------------------------------- seals
def _class_names(net: ProgressiveNet, task: str, n: int) -> list[str]:
    names = getattr(net.task(task), "class_names", None)
    return [str(c) for c in names] if names and len(names) == n else [str(c) for c in range(n)]


# A kept probe's workspace name: ``probe-`` and 64 hex digits, then its extension.
_KEPT = re.compile(r"probe-[0-9a-f]{64}\.[A-Za-z0-9]+")


def _probe_note(probe: Mapping[str, Any]) -> list[str]:
    """The kept probe's full name and digests, below the table that shortens them."""
    if not probe.get("file"):
        return []
    source = f" from {probe['source']}" if probe.get("source") else ""
    return [f"Probe kept in the workspace as {probe['file']}; read{source}, whose SHA-256 "
            f"is {probe.get('sha256')}."]


def seal_sections(net: ProgressiveNet, check: Mapping[str, Any] | None,
                  ) -> tuple[list[Section], dict[str, bytes]]:
    """A section per sealed task (facts, per-class recall, confusion heat map)."""
    sections: list[Section] = []
    figures: dict[str, bytes] = {}
    sealed = sealed_tasks(net)
    if not sealed:
        return [Section("Seals", paragraphs=["No task is sealed."], anchor="seals",
                        new_page=True)], {}
    sections.append(Section("Seals", paragraphs=[
        "Each sealed task: what its seal covers, how its reference was computed, its "
        "metrics on the probe, and the verdict of the check run for this report. Digests "
        "are shortened here; report.json holds them whole."], anchor="seals", new_page=True))
    for task, entry in sealed.items():
        closure = entry.get("closure") or {}
        probe = entry.get("probe") or {}
        comp = entry.get("computation") or {}
        metrics = entry.get("metrics") or {}
        v = verdict_of(check, task)
        versions = seals_of(net, task)
        made = next((e for e in net.meta.get("history") or [] if isinstance(e, Mapping)
                     and e.get("step") == "task_sealed" and e.get("task") == task
                     and e.get("version") == entry.get("version")), {})
        facts = [["field", "value"],
                 ["seal version", f"v{entry.get('version')} of {len(versions)}"],
                 ["sealed at", str(entry.get("time"))],
                 ["sealed by", _who(entry) if entry.get("by") else _who(made)],
                 ["reason", str(entry.get("reason") or made.get("reason") or "none given")],
                 ["check now", _verdict_words(v, True)],
                 ["closure digest", short_digest(closure.get("sha256"))],
                 ["closure", f"columns {closure.get('columns')}, "
                             f"{len(closure.get('adapters') or [])} adapters, head "
                             f"{closure.get('head')}, {len(closure.get('tensors') or {})} "
                             f"tensors"],
                 ["probe", f"{probe.get('samples')} samples, source SHA-256 "
                           f"{short_digest(probe.get('sha256'))}"],
                 ["probe kept as", short_name(str(probe["file"])) if probe.get("file")
                  else "not kept (an older seal; check with --probe FILE)"],
                 ["accuracy on probe", f"{metrics.get('accuracy'):.4f}"
                  if isinstance(metrics.get("accuracy"), float) else "-"],
                 ["computed with", f"batch {comp.get('batch_size')}, {comp.get('threads')} "
                                   f"threads, {comp.get('dtype')} on {comp.get('device')}"],
                 ["environment", f"torch {(entry.get('environment') or {}).get('torch')}, "
                                 f"{(entry.get('environment') or {}).get('machine')}"]]
        for f in (v or {}).get("failures", []):
            facts.append(["finding", _KEPT.sub(lambda m: short_name(m.group(0)), f)])
        confusion = metrics.get("confusion") or []
        names = _class_names(net, task, len(confusion))
        recall = metrics.get("recall") or []
        rrows = [["class", "recall", "probe samples"]]
        for c, row in enumerate(confusion):
            r = recall[c] if c < len(recall) else None
            rrows.append([names[c], f"{r:.3f}" if isinstance(r, float) else "-",
                          str(sum(row))])
        figs = []
        if confusion:
            name = _file_name(task)
            figures[name] = confusion_heatmap(confusion, names, f"{task}: confusion on probe")
            figs.append(Figure(name, f"confusion matrix of {task}", small=True))
        sections.append(Section(f"Seal of {task}", tables=[Table(facts, key_value=True),
                                                           Table(rrows)],
                                figures=figs, level=3, anchor=f"seal-{task}",
                                after=_probe_note(probe)))
    return sections, figures


# ----------------------------------------------------------------------------- history
def timeline_section(net: ProgressiveNet, record: Mapping[str, Any] | None = None) -> Section:
    """Every history entry in order: step, task, who, when, reason, signed (and how the
    signature stood when the record was verified)."""
    status = {s.get("seq"): s.get("status") for s in (record or {}).get("signatures") or []}
    rows = [["#", "step", "task", "what", "who", "when", "reason", "signed"]]
    for i, e in enumerate(net.meta.get("history") or [], start=1):
        if not isinstance(e, Mapping):
            rows.append([str(i), "unreadable entry", "", "", "", "", "", ""])
            continue
        rows.append([str(i), str(e.get("step", "?")).replace("_", " "), str(e.get("task") or ""),
                     step_text(e), _who(e), str(e.get("time") or ""),
                     str(e.get("reason") or ""), _signed(e, status.get(i))])
    return Section("History", paragraphs=[
        "The workspace's record, oldest first. Entry numbers are what 'colonnade diff "
        "--since N' and 'report --since N' take."], tables=[Table(rows)], anchor="history")


def evidence_data(net: ProgressiveNet, check: Mapping[str, Any] | None,
                  record: Mapping[str, Any] | None, checked_at: str) -> dict[str, Any]:
    """The same evidence, whole, for report.json."""
    return {"caution": CAUTION, "checked_at": checked_at, "check": check, "record": record,
            "checked_on": {**environment(), "host": platform.node()},
            "seals": {t: e for t, e in sealed_tasks(net).items()},
            "history": list(net.meta.get("history") or [])}
