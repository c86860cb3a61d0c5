"""The spec: a YAML blueprint of the network, validated once at load.

Every error names the field path (``column[2].kernel``) and says what was expected,
because a spec is written by hand and a bare pydantic dump helps nobody.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any, Union

import yaml
from pydantic import BaseModel, BeforeValidator, ConfigDict, ValidationError, model_validator
from pydantic_core import PydanticCustomError

from .errors import SpecError

__all__ = [
    "Spec",
    "LateralSpec",
    "TrainSpec",
    "LayerSpec",
    "Dense",
    "Conv1d",
    "Conv2d",
    "Norm",
    "Act",
    "Dropout",
    "Pool",
    "Flatten",
    "load_spec",
    "parse_spec",
    "ACTIVATIONS",
]

ACTIVATIONS = ("relu", "gelu", "tanh", "sigmoid", "leaky_relu")


def _show(value: Any) -> str:
    if isinstance(value, str):
        return repr(value)
    if value is None:
        return "nothing"
    return str(value)


def _fail(kind: str, expected: str, value: Any) -> PydanticCustomError:
    return PydanticCustomError(kind, "expected {expected}, got {got}",
                               {"expected": expected, "got": _show(value)})


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _positive_int(v: Any) -> int:
    if not _is_int(v) or v <= 0:
        raise _fail("positive_int", "a positive integer", v)
    return v


def _non_negative_int(v: Any) -> int:
    if not _is_int(v) or v < 0:
        raise _fail("non_negative_int", "a non-negative integer", v)
    return v


def _positive_float(v: Any) -> float:
    if not _is_number(v) or not v > 0 or v != v or v == float("inf"):
        raise _fail("positive_float", "a positive number", v)
    return float(v)


def _non_negative_float(v: Any) -> float:
    if not _is_number(v) or not v >= 0 or v == float("inf"):
        raise _fail("non_negative_float", "a non-negative number", v)
    return float(v)


def _open_fraction(v: Any) -> float:
    if not _is_number(v) or not 0 < v <= 1:
        raise _fail("fraction", "a number in (0, 1]", v)
    return float(v)


def _probability(v: Any) -> float:
    if not _is_number(v) or not 0 <= v < 1:
        raise _fail("probability", "a number in [0, 1)", v)
    return float(v)


def _true(v: Any) -> bool:
    if v is not True:
        raise _fail("flatten", "true", v)
    return True


def _bool(v: Any) -> bool:
    if not isinstance(v, bool):
        raise _fail("bool", "true or false", v)
    return v


def _choice(*options: str):
    def check(v: Any) -> str:
        if not isinstance(v, str) or v not in options:
            raise _fail("choice", "one of " + ", ".join(options), v)
        return v

    return check


PosInt = Annotated[int, BeforeValidator(_positive_int)]
NonNegInt = Annotated[int, BeforeValidator(_non_negative_int)]
PosFloat = Annotated[float, BeforeValidator(_positive_float)]
NonNegFloat = Annotated[float, BeforeValidator(_non_negative_float)]
Fraction = Annotated[float, BeforeValidator(_open_fraction)]
Probability = Annotated[float, BeforeValidator(_probability)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Dense(_Strict):
    """A fully connected layer with ``dense`` output features."""

    dense: PosInt

    @property
    def weighted(self) -> bool:
        return True


class Conv1d(_Strict):
    conv1d: PosInt
    kernel: PosInt = 3
    stride: PosInt = 1
    padding: NonNegInt = 0

    @property
    def weighted(self) -> bool:
        return True


class Conv2d(_Strict):
    conv2d: PosInt
    kernel: PosInt = 3
    stride: PosInt = 1
    padding: NonNegInt = 0

    @property
    def weighted(self) -> bool:
        return True


class Norm(_Strict):
    norm: Annotated[str, BeforeValidator(_choice("batch", "layer"))]

    @property
    def weighted(self) -> bool:
        return False


class Act(_Strict):
    act: Annotated[str, BeforeValidator(_choice(*ACTIVATIONS))]

    @property
    def weighted(self) -> bool:
        return False


class Dropout(_Strict):
    dropout: Probability

    @property
    def weighted(self) -> bool:
        return False


class Pool(_Strict):
    pool: Annotated[str, BeforeValidator(_choice("max", "avg", "global_avg"))]
    size: PosInt | None = None
    stride: PosInt | None = None

    @model_validator(mode="after")
    def _size_fits_kind(self) -> Pool:
        if self.pool == "global_avg" and (self.size is not None or self.stride is not None):
            raise PydanticCustomError("pool", "global_avg takes no size or stride; remove them")
        if self.pool != "global_avg" and self.size is None:
            raise PydanticCustomError("pool", "{kind} pooling needs a size, e.g. size: 2",
                                      {"kind": self.pool})
        return self

    @property
    def weighted(self) -> bool:
        return False


class Flatten(_Strict):
    flatten: Annotated[bool, BeforeValidator(_true)]

    @property
    def weighted(self) -> bool:
        return False


LayerSpec = Union[Dense, Conv1d, Conv2d, Norm, Act, Dropout, Pool, Flatten]  # noqa: UP007
_LAYER_KINDS: dict[str, type[_Strict]] = {
    "dense": Dense,
    "conv1d": Conv1d,
    "conv2d": Conv2d,
    "norm": Norm,
    "act": Act,
    "dropout": Dropout,
    "pool": Pool,
    "flatten": Flatten,
}


class LateralSpec(_Strict):
    """How earlier columns feed a new one (Rusu et al. 2016, Eq. 1 linear, Eq. 2 nonlinear)."""

    kind: Annotated[str, BeforeValidator(_choice("none", "linear", "nonlinear"))] = "nonlinear"
    reduce: Fraction = 0.5
    activation: Annotated[str, BeforeValidator(_choice(*ACTIVATIONS))] = "relu"


class TrainSpec(_Strict):
    """Training defaults for every task; CLI flags may override epochs."""

    optimizer: Annotated[str, BeforeValidator(_choice("adamw", "adam", "sgd"))] = "adamw"
    lr: PosFloat = 1e-3
    weight_decay: NonNegFloat = 0.0
    momentum: Probability | None = None
    betas: tuple[Probability, Probability] | None = None
    epochs: PosInt = 30
    batch_size: PosInt = 64
    patience: NonNegInt = 5
    seed: NonNegInt = 0
    val_fraction: Annotated[float, BeforeValidator(_probability)] = 0.2
    # Reuse frozen columns' outputs across epochs (cache.py); cache_mb caps what is held in
    # memory (MiB), the rest spills to a temporary memory-mapped file.
    cache: Annotated[bool, BeforeValidator(_bool)] = True
    cache_mb: NonNegFloat = 1024.0

    @model_validator(mode="after")
    def _options_fit_optimizer(self) -> TrainSpec:
        if self.momentum is not None and self.optimizer != "sgd":
            raise PydanticCustomError(
                "train", "momentum applies to optimizer sgd only; remove it or use sgd")
        if self.betas is not None and self.optimizer == "sgd":
            raise PydanticCustomError(
                "train", "betas apply to adam and adamw only; remove them or change optimizer")
        return self


class Spec(_Strict):
    """A validated spec. ``column`` holds typed layer objects in template order."""

    name: str = "network"
    input: tuple[PosInt, ...]
    column: tuple[Any, ...]
    lateral: LateralSpec = LateralSpec()
    train: TrainSpec = TrainSpec()

    def to_dict(self) -> dict[str, Any]:
        """The spec in its YAML form, so a manifest stores what a user would write."""
        return {
            "name": self.name,
            "input": list(self.input),
            "column": [layer.model_dump(exclude_none=True) for layer in self.column],
            "lateral": self.lateral.model_dump(),
            "train": {k: (list(v) if isinstance(v, tuple) else v)
                      for k, v in self.train.model_dump(exclude_none=True).items()},
        }


def _path(prefix: str, loc: tuple[Any, ...]) -> str:
    out = prefix
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else str(part)
    return out or "spec"


def _sentence(err: ValidationError, prefix: str, allowed: list[str] | None = None) -> str:
    first = err.errors(include_url=False)[0]
    loc = tuple(p for p in first["loc"] if not (isinstance(p, str) and "[" in p))
    path = _path(prefix, loc)
    kind = first["type"]
    if kind == "extra_forbidden":
        hint = f"; allowed keys here are {', '.join(allowed)}" if allowed else ""
        return f"{path}: unknown key{hint}"
    if kind == "missing":
        return f"{path}: required but missing"
    if kind in ("tuple_type", "list_type"):
        return f"{path}: expected a list, got {_show(first.get('input'))}"
    if kind in ("too_short", "too_long"):
        return f"{path}: {first['msg'][0].lower() + first['msg'][1:]}"
    if kind == "model_type" or kind == "dict_type":
        return f"{path}: expected a mapping of keys to values, got {_show(first.get('input'))}"
    return f"{path}: {first['msg']}"


def _parse_layer(raw: Any, index: int) -> LayerSpec:
    where = f"column[{index}]"
    if not isinstance(raw, dict) or not raw:
        raise SpecError(f"{where}: expected a layer such as {{dense: 64}}, got {_show(raw)}")
    kinds = [k for k in raw if k in _LAYER_KINDS]
    if len(kinds) != 1:
        names = ", ".join(_LAYER_KINDS)
        found = "none" if not kinds else " and ".join(kinds)
        raise SpecError(f"{where}: expected exactly one layer kind ({names}), found {found}")
    model = _LAYER_KINDS[kinds[0]]
    try:
        return model.model_validate(raw)
    except ValidationError as err:
        raise SpecError(_sentence(err, where, list(model.model_fields))) from None


def parse_spec(raw: Any) -> Spec:
    """Validate a spec given as plain data (what ``yaml.safe_load`` returns)."""
    if not isinstance(raw, dict):
        raise SpecError(f"spec: expected a mapping with input, column, lateral and train, "
                        f"got {_show(raw)}")
    known = list(Spec.model_fields)
    for key in raw:
        if key not in known:
            raise SpecError(f"{key}: unknown key; allowed top-level keys are {', '.join(known)}")
    if "column" not in raw:
        raise SpecError("column: required but missing")
    if not isinstance(raw["column"], list) or not raw["column"]:
        raise SpecError(f"column: expected a non-empty list of layers, got {_show(raw['column'])}")
    layers = tuple(_parse_layer(layer, i) for i, layer in enumerate(raw["column"]))
    data = dict(raw, column=layers)
    if isinstance(data.get("input"), list):
        data["input"] = tuple(data["input"])
    if isinstance(data.get("train"), dict) and isinstance(data["train"].get("betas"), list):
        data["train"] = dict(data["train"], betas=tuple(data["train"]["betas"]))
    try:
        spec = Spec.model_validate(data)
    except ValidationError as err:
        first = err.errors(include_url=False)[0]["loc"]
        section = first[0] if first else None
        allowed = None
        if section == "lateral":
            allowed = list(LateralSpec.model_fields)
        elif section == "train":
            allowed = list(TrainSpec.model_fields)
        raise SpecError(_sentence(err, "", allowed)) from None
    if not 1 <= len(spec.input) <= 3:
        raise SpecError(f"input: expected [features], [channels, length] or "
                        f"[channels, height, width], got {list(spec.input)}")
    if not any(layer.weighted for layer in spec.column):
        raise SpecError("column: needs at least one dense, conv1d or conv2d layer")
    from .layers import template_shapes  # late import: layers depends on these spec types

    template_shapes(spec)  # raises SpecError naming the first layer that does not fit
    return spec


def load_spec(path: str | Path) -> Spec:
    """Read and validate a spec file; YAML is parsed with the safe loader only."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError(f"{path}: no such spec file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(f"{path}: cannot read the spec file ({exc.__class__.__name__})") from None
    try:
        raw = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}" if mark is not None else ""
        raise SpecError(f"{path}: not valid YAML{where}; check indentation and brackets") from None
    return parse_spec(raw)
