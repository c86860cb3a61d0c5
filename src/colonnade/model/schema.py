"""The spec's types: the layers of a column template, the lateral policy, training defaults.

Pydantic models with unknown keys forbidden, validated once at load by ``model.spec``;
everything inward receives these typed objects. Kept apart from the parser so that the
layer factory (``model.layers``) can use the types while the parser uses the factory to
check that every layer fits the shape before it.
"""

from __future__ import annotations

from typing import Annotated, Any, Union

from pydantic import BaseModel, BeforeValidator, ConfigDict, model_validator
from pydantic_core import PydanticCustomError

__all__ = [
    "Spec",
    "InputSpec",
    "NormalizeSpec",
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
    "LAYER_KINDS",
    "show_value",
    "ACTIVATIONS",
    "MAX_SIZE",
]

ACTIVATIONS = ("relu", "gelu", "tanh", "sigmoid", "leaky_relu")


def show_value(value: Any) -> str:
    if isinstance(value, str):
        return repr(value)
    if value is None:
        return "nothing"
    return str(value)


def _fail(kind: str, expected: str, value: Any) -> PydanticCustomError:
    return PydanticCustomError(kind, "expected {expected}, got {got}",
                               {"expected": expected, "got": show_value(value)})


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


# The largest whole number a size in a spec may be (units, channels, kernel, stride,
# padding, input dimensions, epochs, batch size): far past any real layer, and small
# enough that a size times a width factor is exact in floating point. Sizes below it are
# still checked against the machine's memory as a whole (model.budget). Our own bound.
MAX_SIZE = 2**31 - 1
# torch.manual_seed takes seeds up to 2**64 - 1 (its documentation).
MAX_SEED = 2**64 - 1


def _bounded(v: Any, low: int, high: int, kind: str, expected: str) -> int:
    if not _is_int(v) or v < low:
        raise _fail(kind, expected, v)
    if v > high:
        raise _fail(kind, f"{expected} of at most {high:,}", v)
    return v


def _positive_int(v: Any) -> int:
    return _bounded(v, 1, MAX_SIZE, "positive_int", "a positive integer")


def _non_negative_int(v: Any) -> int:
    return _bounded(v, 0, MAX_SIZE, "non_negative_int", "a non-negative integer")


def _seed(v: Any) -> int:
    return _bounded(v, 0, MAX_SEED, "seed", "a non-negative integer")


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
Seed = Annotated[int, BeforeValidator(_seed)]
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
LAYER_KINDS: dict[str, type[_Strict]] = {
    "dense": Dense,
    "conv1d": Conv1d,
    "conv2d": Conv2d,
    "norm": Norm,
    "act": Act,
    "dropout": Dropout,
    "pool": Pool,
    "flatten": Flatten,
}


def _tap_map(v: Any) -> dict[int, str] | None:
    if v is None:
        return None
    if not isinstance(v, dict) or not v or not all(
            _is_int(k) and k >= 1 and isinstance(t, str) and t for k, t in v.items()):
        raise _fail("taps", "a mapping of block numbers (1 or more) to tap names, "
                            "such as {1: layer2, 2: layer3}", v)
    return dict(v)


class LateralSpec(_Strict):
    """How earlier columns feed a new one (Rusu et al. 2016, Eq. 1 linear, Eq. 2 nonlinear).

    ``taps`` and ``bridge`` apply to an adopted column 0 only (model.bridges): which
    block reads which tap, and how a tap with positions feeds a dense block.
    """

    kind: Annotated[str, BeforeValidator(_choice("none", "linear", "nonlinear"))] = "nonlinear"
    reduce: Fraction = 0.5
    activation: Annotated[str, BeforeValidator(_choice(*ACTIVATIONS))] = "relu"
    taps: Annotated[dict[int, str] | None, BeforeValidator(_tap_map)] = None
    bridge: Annotated[str, BeforeValidator(_choice("pool", "flatten"))] = "pool"


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
    seed: Seed = 0
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


def _finite_float(v: Any) -> float:
    if not _is_number(v) or v != v or abs(v) == float("inf"):
        raise _fail("finite_float", "a finite number", v)
    return float(v)


FiniteFloat = Annotated[float, BeforeValidator(_finite_float)]


class NormalizeSpec(_Strict):
    """Per-channel input normalisation ``(x - mean) / std``: one value, or one per channel."""

    mean: tuple[FiniteFloat, ...]
    std: tuple[PosFloat, ...]


class InputSpec(_Strict):
    """The long form of ``input``: the sample shape, normalisation, waveform sample rate.

    ``normalize`` is checked by the parser (``fit``, or a ``NormalizeSpec``).
    """

    shape: tuple[PosInt, ...]
    normalize: Any = None
    rate: PosInt | None = None


class Spec(_Strict):
    """A validated spec. ``column`` holds typed layer objects in template order.

    ``input`` is the sample shape; the spec's ``input: {shape, normalize, rate}`` form
    fills ``normalize`` ("fit" or mean/std per channel) and ``input_rate`` (Hz) too.
    """

    name: str = "network"
    input: tuple[PosInt, ...]
    column: tuple[Any, ...]
    lateral: LateralSpec = LateralSpec()
    train: TrainSpec = TrainSpec()
    normalize: NormalizeSpec | str | None = None
    input_rate: PosInt | None = None

    def input_dict(self) -> list[int] | dict[str, Any]:
        """``input`` as written: the plain shape list, or the long form when it has more."""
        if self.normalize is None and self.input_rate is None:
            return list(self.input)
        out: dict[str, Any] = {"shape": list(self.input)}
        if self.normalize is not None:
            out["normalize"] = (self.normalize if isinstance(self.normalize, str) else
                                {"mean": list(self.normalize.mean),
                                 "std": list(self.normalize.std)})
        if self.input_rate is not None:
            out["rate"] = self.input_rate
        return out

    def to_dict(self) -> dict[str, Any]:
        """The spec in its YAML form, so a manifest stores what a user would write."""
        return {
            "name": self.name,
            "input": self.input_dict(),
            "column": [layer.model_dump(exclude_none=True) for layer in self.column],
            "lateral": {k: v for k, v in self.lateral.model_dump().items()
                        if not (k == "taps" and v is None or k == "bridge" and v == "pool")},
            "train": {k: (list(v) if isinstance(v, tuple) else v)
                      for k, v in self.train.model_dump(exclude_none=True).items()},
        }
