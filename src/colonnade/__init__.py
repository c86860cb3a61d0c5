"""colonnade: grow progressive neural networks one column per task, frozen bit for bit.

Progressive Neural Networks: Rusu et al. 2016, arXiv:1606.04671.
"""

__version__ = "0.1.0"

# colonnade.graph is the graph module, callable: colonnade.graph(net) -> networkx.DiGraph.
from . import graph  # noqa: E402
from .data import TaskData, load_task_data  # noqa: E402
from .errors import (  # noqa: E402
    ColonnadeError,
    DataError,
    SealedError,
    SpecError,
    UsageError,
    WorkspaceError,
)
from .graph import build_graph  # noqa: E402
from .growth import grow  # noqa: E402
from .network import ProgressiveNet  # noqa: E402
from .spec import Spec, load_spec, parse_spec  # noqa: E402
from .store import create, load, save  # noqa: E402

__all__ = [
    "__version__",
    "ProgressiveNet",
    "Spec",
    "TaskData",
    "load_spec",
    "parse_spec",
    "load_task_data",
    "create",
    "load",
    "save",
    "grow",
    "graph",
    "build_graph",
    "ColonnadeError",
    "SpecError",
    "DataError",
    "WorkspaceError",
    "SealedError",
    "UsageError",
]
