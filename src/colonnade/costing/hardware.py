"""Hardware profiles: the budget of a target device, read from YAML and validated once.

A profile names a device class and its budgets for one inference: weight memory,
activation (working) memory, sustained MAC rate, latency, and the dtype deployed.
Every quantity carries its unit (``512 KiB``, ``20 MMAC/s``, ``50 ms``), so a profile
reads like a data sheet and a wrong unit is caught instead of silently misread.
Examples live in ``specs/hardware/``; ``--hardware NAME`` finds them there by name.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict, ValidationError
from pydantic_core import PydanticCustomError

from ..errors import SpecError
from ..model.yamlfile import load_yaml
from .costs import DTYPE_BYTES

__all__ = ["HardwareProfile", "load_profile", "parse_profile", "profile_dirs", "MEMORY_UNITS",
           "RATE_UNITS", "TIME_UNITS", "format_bytes", "format_rate", "verdict_text"]

# SI prefixes are powers of 1000, IEC prefixes (KiB, MiB, GiB) powers of 1024 (IEC 80000-13).
MEMORY_UNITS = {"B": 1, "kB": 10**3, "MB": 10**6, "GB": 10**9, "KiB": 2**10, "MiB": 2**20,
                "GiB": 2**30}
RATE_UNITS = {"MAC/s": 1, "kMAC/s": 10**3, "MMAC/s": 10**6, "GMAC/s": 10**9,
              "TMAC/s": 10**12}
TIME_UNITS = {"us": 1e-6, "ms": 1e-3, "s": 1.0}

_QUANTITY = re.compile(r"^\s*([0-9]+(?:\.[0-9]*)?(?:[eE][+-]?[0-9]+)?|\.[0-9]+)\s*(\S+)\s*$")


def _quantity(what: str, units: dict[str, float], example: str):
    names = ", ".join(units)
    example = repr(example)

    def parse(value: Any) -> float:
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            raise PydanticCustomError("quantity", "expected {what} such as {example}, got "
                                      "{got}", {"what": what, "example": example,
                                                "got": repr(value)})
        if isinstance(value, (int, float)):
            raise PydanticCustomError("quantity", "{got} needs a unit, one of {names}; write "
                                      "for example {example}",
                                      {"got": value, "names": names, "example": example})
        if value.strip().startswith("-"):
            raise PydanticCustomError("quantity", "must be positive, got {got}",
                                      {"got": repr(value)})
        m = _QUANTITY.match(value)
        if not m:
            raise PydanticCustomError("quantity", "expected a number and a unit ({names}), "
                                      "such as {example}, got {got}",
                                      {"names": names, "example": example, "got": repr(value)})
        number, unit = float(m.group(1)), m.group(2)
        if unit not in units:
            raise PydanticCustomError("quantity", "{unit} is not a unit of {what}; use one "
                                      "of {names}, for example {example}",
                                      {"unit": repr(unit), "what": what, "names": names,
                                       "example": example})
        if not number > 0 or number == float("inf"):
            raise PydanticCustomError("quantity", "must be positive and finite, got {got}",
                                      {"got": repr(value)})
        return number * units[unit]

    return parse


def _dtype(value: Any) -> str:
    if not isinstance(value, str) or value not in DTYPE_BYTES:
        raise PydanticCustomError("dtype", "expected one of {names}, got {got}",
                                  {"names": ", ".join(DTYPE_BYTES), "got": repr(value)})
    return value


def _text(value: Any) -> str:
    if not isinstance(value, str) or not value.strip():
        raise PydanticCustomError("text", "expected a non-empty text, got {got}",
                                  {"got": repr(value)})
    return value.strip()


Bytes = Annotated[float, BeforeValidator(_quantity("memory", MEMORY_UNITS, "512 KiB"))]
Rate = Annotated[float, BeforeValidator(_quantity("MAC rate", RATE_UNITS, "20 MMAC/s"))]
Seconds = Annotated[float, BeforeValidator(_quantity("time", TIME_UNITS, "50 ms"))]
DType = Annotated[str, BeforeValidator(_dtype)]
Text = Annotated[str, BeforeValidator(_text)]


class HardwareProfile(BaseModel):
    """A device class's budgets; quantities are stored in bytes, MAC/s and seconds."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    name: Text
    description: Text | None = None
    weight_memory: Bytes  # parameters and norm statistics at the deployed dtype
    activation_memory: Bytes  # the peak of live tensors during one inference
    mac_rate: Rate  # sustained multiply-accumulates per second
    latency_budget: Seconds  # per inference at batch 1
    dtype: DType = "fp32"

    @property
    def element_bytes(self) -> int:
        return DTYPE_BYTES[self.dtype]

    def budgets(self) -> dict[str, float]:
        """The budgets in the units the verdicts use: bytes, bytes, milliseconds."""
        return {"weight_memory": self.weight_memory,
                "activation_memory": self.activation_memory,
                "latency": self.latency_budget * 1000.0}

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "description": self.description,
                "weight_memory_bytes": self.weight_memory,
                "activation_memory_bytes": self.activation_memory,
                "mac_rate_per_s": self.mac_rate, "latency_budget_ms": self.latency_budget * 1e3,
                "dtype": self.dtype}


def parse_profile(raw: Any, where: str = "profile") -> HardwareProfile:
    """Validate a profile given as plain data; one sentence naming the field on error."""
    if not isinstance(raw, dict):
        raise SpecError(f"{where}: expected a mapping of fields (name, weight_memory, "
                        f"activation_memory, mac_rate, latency_budget, dtype), got {raw!r}")
    allowed = list(HardwareProfile.model_fields)
    for key in raw:
        if key not in allowed:
            raise SpecError(f"{where}: unknown field {key!r}; the fields are "
                            f"{', '.join(allowed)}")
    try:
        return HardwareProfile.model_validate(raw)
    except ValidationError as err:
        first = err.errors(include_url=False)[0]
        field = ".".join(str(p) for p in first["loc"]) or "profile"
        if first["type"] == "missing":
            raise SpecError(f"{where}: {field} is required but missing") from None
        raise SpecError(f"{where}: {field}: {first['msg']}") from None


def profile_dirs() -> list[Path]:
    """Where profile names are looked up: ./specs/hardware, then the source checkout's."""
    dirs = [Path("specs") / "hardware"]
    checkout = Path(__file__).resolve().parents[2] / "specs" / "hardware"
    if checkout.is_dir() and checkout.resolve() != dirs[0].resolve():
        dirs.append(checkout)
    return dirs


def load_profile(name_or_path: str | Path) -> HardwareProfile:
    """A profile from a YAML path, or by name from ``specs/hardware/NAME.yaml``."""
    path = Path(name_or_path)
    if not path.is_file():
        candidates = [d / f"{name_or_path}.yaml" for d in profile_dirs()]
        found = [c for c in candidates if c.is_file()]
        if not found:
            known = sorted({p.stem for d in profile_dirs() if d.is_dir()
                            for p in d.glob("*.yaml")})
            hint = f"; known profiles: {', '.join(known)}" if known else ""
            raise SpecError(f"{name_or_path}: no such hardware profile file or name{hint}")
        path = found[0]
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(f"{path}: cannot read the profile ({exc.__class__.__name__})") from None
    return parse_profile(load_yaml(text, str(path), SpecError), str(path))


def format_rate(n: float) -> str:
    """MAC/s for people, with SI prefixes."""
    for unit, size in (("TMAC/s", 1e12), ("GMAC/s", 1e9), ("MMAC/s", 1e6), ("kMAC/s", 1e3)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n:.3g} MAC/s"


def format_bytes(n: float) -> str:
    """Bytes for people: B, KiB, MiB, GiB (powers of 1024)."""
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if abs(n) >= size:
            return f"{n / size:.1f} {unit}"
    return f"{n:.0f} B"


def verdict_text(verdict: dict[str, Any]) -> str:
    """A sizing verdict as words: ``fits``, or which budgets it exceeds and by how much."""
    if verdict["fits"]:
        return "fits"
    parts = []
    for k, o in verdict["over"].items():
        extra = o["need"] - o["budget"]
        by = f"{extra:.3g} ms" if k == "latency" else format_bytes(extra)
        parts.append(f"{k.replace('_', ' ')} by {by} (+{o['ratio'] - 1:.0%})")
    return "exceeds " + ", ".join(parts)
