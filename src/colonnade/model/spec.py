"""The spec: a YAML blueprint of the network, validated once at load.

Every error names the field path (``column[2].kernel``) and says what was expected,
because a spec is written by hand and a bare pydantic dump helps nobody. The types are
in ``model.schema``; this module reads YAML safely, validates, and checks that every layer
fits the shape before it (through the layer factory's shape inference).
"""

from __future__ import annotations

import difflib
import math
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from ..errors import SpecError
from .budget import check_activation, check_tensor_bytes
from .layers import ColumnPlan, template_shapes
from .parts import Column
from .schema import (
    LAYER_KINDS,
    InputSpec,
    LateralSpec,
    LayerSpec,
    NormalizeSpec,
    Spec,
    TrainSpec,
    show_value,
)
from .yamlfile import load_yaml

__all__ = ["load_spec", "parse_spec"]


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
        return f"{path}: expected a list, got {show_value(first.get('input'))}"
    if kind in ("too_short", "too_long"):
        return f"{path}: {first['msg'][0].lower() + first['msg'][1:]}"
    if kind == "model_type" or kind == "dict_type":
        return f"{path}: expected a mapping of keys to values, got {show_value(first.get('input'))}"
    return f"{path}: {first['msg']}"


# Keys that qualify a layer rather than name its kind.
_PARAMETER_KEYS = {"kernel", "stride", "padding", "size"}


def _parse_layer(raw: Any, index: int) -> LayerSpec:
    where = f"column[{index}]"
    if not isinstance(raw, dict) or not raw:
        raise SpecError(f"{where}: expected a layer such as {{dense: 64}}, got {show_value(raw)}")
    kinds = [k for k in raw if k in LAYER_KINDS]
    if not kinds:
        unknown = [k for k in raw if isinstance(k, str) and k not in _PARAMETER_KEYS]
        if unknown:
            near = difflib.get_close_matches(unknown[0].lower(), list(LAYER_KINDS), n=1)
            hint = (f"did you mean {near[0]!r}?" if near else
                    f"the kinds are {', '.join(LAYER_KINDS)}")
            raise SpecError(f"{where}: unknown layer kind {unknown[0]!r}; {hint}")
    if len(kinds) != 1:
        names = ", ".join(LAYER_KINDS)
        found = "none" if not kinds else " and ".join(kinds)
        raise SpecError(f"{where}: expected exactly one layer kind ({names}), found {found}")
    model = LAYER_KINDS[kinds[0]]
    try:
        return model.model_validate(raw)
    except ValidationError as err:
        raise SpecError(_sentence(err, where, list(model.model_fields))) from None


# Spec fields written inside ``input: {...}``, never at the top level.
_INPUT_EXTRAS = ("normalize", "input_rate")


def _parse_input(raw: dict[str, Any]) -> dict[str, Any]:
    """The long form ``input: {shape, normalize, rate}`` as Spec fields."""
    raw = dict(raw)
    if isinstance(raw.get("shape"), list):
        raw["shape"] = tuple(raw["shape"])
    norm = raw.pop("normalize", None)
    try:
        parsed = InputSpec.model_validate(raw)
    except ValidationError as err:
        raise SpecError(_sentence(err, "input", list(InputSpec.model_fields))) from None
    if isinstance(norm, dict):
        values = {k: tuple(v) if isinstance(v, list) else v for k, v in norm.items()}
        try:
            norm = NormalizeSpec.model_validate(values)
        except ValidationError as err:
            raise SpecError(_sentence(err, "input.normalize",
                                      list(NormalizeSpec.model_fields))) from None
        channels = parsed.shape[0] if parsed.shape else 0
        for name in ("mean", "std"):
            if len(getattr(norm, name)) not in (1, channels):
                raise SpecError(f"input.normalize.{name}: expected 1 or {channels} values (one "
                                f"per channel, the first axis of {list(parsed.shape)}), got "
                                f"{len(getattr(norm, name))}")
    elif norm is not None and norm != "fit":
        raise SpecError(f"input.normalize: expected fit or a mapping {{mean: [...], std: "
                        f"[...]}}, got {show_value(norm)}")
    return {"input": parsed.shape, "normalize": norm, "input_rate": parsed.rate}


def parse_spec(raw: Any) -> Spec:
    """Validate a spec given as plain data (what ``yaml.safe_load`` returns)."""
    if not isinstance(raw, dict):
        raise SpecError(f"spec: expected a mapping with input, column, lateral and train, "
                        f"got {show_value(raw)}")
    known = [k for k in Spec.model_fields if k not in _INPUT_EXTRAS]
    for key in raw:
        if key not in known:
            raise SpecError(f"{key}: unknown key; allowed top-level keys are {', '.join(known)}")
    if "column" not in raw:
        raise SpecError("column: required but missing")
    if not isinstance(raw["column"], list) or not raw["column"]:
        raise SpecError(f"column: expected a non-empty list of layers, "
                        f"got {show_value(raw['column'])}")
    layers = tuple(_parse_layer(layer, i) for i, layer in enumerate(raw["column"]))
    data = dict(raw, column=layers)
    if isinstance(data.get("input"), dict):
        data.update(_parse_input(data["input"]))
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
    plan = template_shapes(spec)  # raises SpecError naming the first layer that does not fit
    _check_memory(spec, plan)
    return spec


def _check_memory(spec: Spec, plan: ColumnPlan) -> None:
    """Refuse a template whose column, or one sample's activations, exceed the machine.

    The largest activation of a column is the input or a weighted layer's output: the
    layers after one (norm, activation, dropout, pooling, flatten) keep or shrink it.
    """
    fix = "use fewer units, channels or a smaller input"
    check_activation(math.prod(spec.input), "input", SpecError, fix)
    for block in plan.blocks:
        check_activation(math.prod(block.pre_shape), f"column[{block.template_index}]",
                         SpecError, fix)
    check_tensor_bytes(lambda: Column(spec), "the spec's column", SpecError, fix)


def load_spec(path: str | Path) -> Spec:
    """Read and validate a spec file; YAML is parsed with the safe loader only."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError(f"{path}: no such spec file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(f"{path}: cannot read the spec file ({exc.__class__.__name__})") from None
    return parse_spec(load_yaml(text, str(path), SpecError))
