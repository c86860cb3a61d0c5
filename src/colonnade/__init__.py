"""colonnade: grow progressive neural networks one column per task, frozen bit for bit.

Progressive Neural Networks: Rusu et al. 2016, arXiv:1606.04671.

The public names below are loaded on first use (PEP 562 module ``__getattr__``), so that
``colonnade --help``, ``--version`` and ``show`` start without importing torch. The code is
layered (see DEVELOPERS.md): model, training, evidence, costing, trimming, views, files,
app, cli, each importing only from the layers below it.
"""

from __future__ import annotations

import importlib

from ._version import __version__
from .errors import (
    BusyError,
    ColonnadeError,
    DataError,
    SealedError,
    SpecError,
    UsageError,
    WorkspaceError,
)

# public name -> (module, attribute); attribute None means the module itself.
_PUBLIC: dict[str, tuple[str, str | None]] = {
    "ProgressiveNet": ("colonnade.model.network", "ProgressiveNet"),
    "Spec": ("colonnade.model.schema", "Spec"),
    "load_spec": ("colonnade.model.spec", "load_spec"),
    "parse_spec": ("colonnade.model.spec", "parse_spec"),
    "TaskData": ("colonnade.training.data", "TaskData"),
    "load_task_data": ("colonnade.training.data", "load_task_data"),
    "grow": ("colonnade.training.growth", "grow"),
    "adopt": ("colonnade.app.adopt", "adopt"),
    "create": ("colonnade.files.store", "create"),
    "load": ("colonnade.files.store", "load"),
    "save": ("colonnade.files.store", "save"),
    "build_graph": ("colonnade.views.graph", "build_graph"),
    # modules the README uses by name
    "graph": ("colonnade.views.graph", None),
    "seal": ("colonnade.evidence.seal", None),
    "verify": ("colonnade.evidence.verify", None),
    "transfer": ("colonnade.evidence.transfer", None),
    "store": ("colonnade.files.store", None),
    "costs": ("colonnade.costing.costs", None),
    "sizing": ("colonnade.costing.sizing", None),
    # every workspace verb, one call each
    "new_workspace": ("colonnade.app.workspace", "new_workspace"),
    "grow_workspace": ("colonnade.app.workspace", "grow_workspace"),
    "describe": ("colonnade.app.show", "describe"),
    "predict_file": ("colonnade.app.workspace", "predict_file"),
    "seal_workspace": ("colonnade.app.evidence", "seal_workspace"),
    "unseal_workspace": ("colonnade.app.evidence", "unseal_workspace"),
    "check_workspace": ("colonnade.app.evidence", "check_workspace"),
    "cost_workspace": ("colonnade.app.views", "cost_workspace"),
    "write_report": ("colonnade.app.views", "write_report"),
    "draw_workspace": ("colonnade.app.views", "draw_workspace"),
    "diff_workspaces": ("colonnade.app.diff", "diff_workspaces"),
    "retrain_workspace": ("colonnade.app.lifecycle", "retrain_workspace"),
    "retire_workspace": ("colonnade.app.lifecycle", "retire_workspace"),
    "usage_workspace": ("colonnade.app.trim", "usage_workspace"),
    "trim_workspace": ("colonnade.app.trim", "trim_workspace"),
    "export_task": ("colonnade.app.export", "export_task"),
    "export_artifact": ("colonnade.app.export", "export_artifact"),
    "check_artifact": ("colonnade.app.export", "check_artifact"),
    # the record: verify it, read it as typed entries, make a signing key, match data
    "verify_record": ("colonnade.app.record", "verify_record"),
    "history": ("colonnade.app.record", "history"),
    "new_key": ("colonnade.app.record", "new_key"),
    "start_record": ("colonnade.app.record", "start_record"),
    "match_data_file": ("colonnade.app.record", "match_data_file"),
    "record": ("colonnade.evidence.record", None),
    # the store: one writer at a time, recovery of an interrupted write
    "lock_wait": ("colonnade.app.transaction", "lock_wait"),
    "recover_workspace": ("colonnade.app.transaction", "recover"),
    "listed_files": ("colonnade.files.store", "listed_files"),
}

__all__ = ["__version__", "ColonnadeError", "SpecError", "DataError", "WorkspaceError",
           "SealedError", "UsageError", "BusyError", *_PUBLIC]


def __getattr__(name: str) -> object:
    """Import a public name's module on first use and cache the name here.

    (Annotated ``object``, not ``typing.Any``: importing ``typing`` here would lengthen
    the start-up moment before ``colonnade._startup`` can answer Ctrl-C.)"""
    try:
        module_name, attribute = _PUBLIC[name]
    except KeyError:
        raise AttributeError(f"module 'colonnade' has no attribute {name!r}") from None
    module = importlib.import_module(module_name)
    value = module if attribute is None else getattr(module, attribute)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_PUBLIC))
